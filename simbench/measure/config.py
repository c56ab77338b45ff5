"""The physics sections of a scanner file: source, exposure, detector and scatter.

Each ``parse_*`` function reads one :class:`simbench.spec.Section` into a frozen dataclass and
raises a one-line :class:`~simbench.errors.InputError` (file, line, column, field, problem,
what is valid) for bad input. Inside, lengths are mm, energies keV, angles radians.

Scanner-file keys (every unit explicit or stated here)::

    source:                      # one of: energy | kvp | spectrum_file
      energy: 60 keV             # monochromatic source
      kvp: 120                   # tube voltage in kV (peak), tube-spectrum model
      anode_angle: 12 deg        # 5 to 30 deg
      filtration:                # list of material + thickness
        - {material: Al, thickness: 2 mm}
      energy_bin: 1 keV          # width of the spectrum's energy bins (0.1 to 2 keV)
      spectrum_file: spectrum.csv  # two columns: energy in keV, relative fluence
      focal_spot: [1.0 mm, 1.0 mm] # width of the focal spot along u and v (or one length)
      focal_spot_samples: [3, 3]   # sub-samples of the spot along u and v (or one number)
    exposure:                    # one of:
      air_counts: 1.0e5          # detected photons per cell per view with no object
      mas_per_view: 0.2          # tube current-time product of one view, mA s
      tube_current_ma: 200       # with view_time_ms: mAs per view = mA * ms / 1000
      view_time_ms: 1.0
    detector:
      type: energy-integrating   # or photon-counting
      thresholds: [20, 50, 80]   # keV, photon counting only; 1 to 8, strictly increasing
      energy_resolution: 6 keV   # FWHM of the measured photon energy (photon counting)
      material: CsI              # sensor: catalogue name or chemical formula; absent = ideal
      density_g_cm3: 4.51        # needed for a formula not in SENSOR_DENSITY_G_CM3
      thickness: 0.6 mm
      electronic_noise: 3.0      # rms per reading, counts (energy-integrating only)
      dark_level: 100.0          # offset per reading, counts
      full_scale: 65535          # saturation, counts (absent = none)
      gain_spread: 0.01          # relative rms of the per-cell gain (in flat and scan alike)
      gain_drift: 0.002          # relative rms per-cell gain change between flat and scan
      dead_cells: 0.001          # fraction, or a list of columns / [row, column] pairs
      hot_cells: [[0, 17]]       # same forms; a hot cell reads full scale with the beam on
      blur: 0.4 mm               # FWHM of a Gaussian point-spread function (or [u, v])
      crosstalk: 0.03            # fraction of a cell's signal seen by each neighbour
      lag: 0.02                  # fraction of a view's signal seen in the next view
      flat_frames: 20            # frames averaged for the flat (air) frame
      dark_frames: 20            # frames averaged for the dark frame
      pattern_seed: 0            # seed of the fixed pattern (gains, dead and hot cells)
      aperture_samples: [3, 3]   # sub-rays across each cell's aperture along u and v
    scatter:
      model: none                # none | centre | thickness
      spr_at_centre: 0.2         # centre: scatter-to-primary ratio at the central cell
      max_spr: 0.5               # thickness: SPR reached behind very thick objects
      thickness_scale: 200 mm    # thickness: water-equivalent thickness of SPR growth
      kernel_width: 120 mm       # FWHM of the Gaussian scatter kernel on the detector
      grid_transmission: 1.0     # fraction of scatter passing the anti-scatter grid

Physical ranges
---------------
Every number is checked against a documented physical range when the file is read, and the
error names the field's place. The limits are the constants of this module::

    field                              range                                why
    source.energy                      1 to 800 keV                         attenuation tables
    source.kvp                         40 to 150 kV                         tube model
    source.anode_angle                 5 to 30 deg                          tube model
    source.energy_bin                  0.1 to 2 keV                         tube model
    source.filtration[].thickness      0 to 100 mm                          beyond any beam filter
    source.filtration (all filters)    passes >= 1e-6 of the photons        else no usable beam
    source.focal_spot                  0 to 10 mm (u and v)                 CT foci ~0.5 to 1.5 mm
    source.focal_spot_samples          1 to 64 (u and v)                    sub-rays
    exposure.air_counts                1 to 1e9 photons per cell per view   below 1 the air starves
    exposure.mas_per_view              above 0, up to 1000 mAs              CT views ~0.1 to 2 mAs
    exposure.tube_current_ma           above 0, up to 2000 mA               CT tubes ~1300 mA at most
    exposure.view_time_ms              above 0, up to 60000 ms              and mA x ms / 1000 <= 1000
    exposure (mAs, with the geometry)  1 to 1e9 detected photons in air     as air_counts
    detector.thresholds                1 keV to below the source's top      each bin >= 1 photon in air
    detector.energy_resolution         0 to 50 keV FWHM                     CdTe ~5 to 10 keV
    detector.density_g_cm3             1e-4 to 22.6 g/cm^3                  osmium is the densest
    detector.thickness                 0.001 to 100 mm                      foils to gas chambers
    detector.electronic_noise          0 to 1e6 counts rms
    detector.dark_level                0 to 1e9 counts
    detector.full_scale                above dark_level, up to 1e12 counts  else every reading starves
    detector.gain_spread, gain_drift   0 to 0.5 relative rms
    detector.dead_cells, hot_cells     fraction 0 to 0.5, or listed cells   on the detector
    detector.blur                      0 to 20 mm FWHM (u and v)
    detector.crosstalk                 0 to 0.25                            kernel [c, 1 - 2c, c] >= 0
    detector.lag                       0 to 0.9
    detector.flat_frames, dark_frames  1 to 10000
    detector.pattern_seed              0 to 2^63 - 1
    detector.aperture_samples          1 to 64 (u and v)                    sub-rays
    scatter.spr_at_centre              0 to 10                              real SPRs reach a few
    scatter.max_spr                    0 to 10
    scatter.thickness_scale            1 to 10000 mm
    scatter.kernel_width               1 to 2000 mm FWHM                    and within the memory budget
    scatter.grid_transmission          0 to 1

Rules across fields: one of energy / kvp / spectrum_file; exactly one way of giving the
exposure; an mAs exposure needs a tube (not a monochromatic line or a relative spectrum file)
and a divergent beam (a source-detector distance); ``full_scale`` above ``dark_level``;
photon-counting thresholds below the source's highest energy; hot cells need ``full_scale``.
The checks that need the geometry or the spectrum (mAs to detected photons, counts per
photon-counting bin, listed cells on the detector, the scatter kernel's memory, an air beam
that saturates) are :func:`check_beam`, run when a scanner file is read.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

from simbench.errors import InputError, Where, warn_input
from simbench.materials.attenuation import VALID_ENERGY_RANGE_KEV
from simbench.materials.spectra import KVP_RANGE
from simbench.spec import Section, check_integer, parse_energy, parse_length

#: anode angles (degrees) and spectrum bin widths (keV) the tube-spectrum model accepts
ANODE_ANGLE_RANGE_DEG = (5.0, 30.0)
ENERGY_BIN_RANGE_KEV = (0.1, 2.0)

#: the most photon-counting thresholds (energy bins) a detector may have
MAX_THRESHOLDS = 8

# Physical ranges of the physics sections' numbers (the module docstring's table).
#: thickness of one filter, mm (beam filters and bow-ties are at most a few cm of aluminium)
FILTER_THICKNESS_RANGE_MM = (0.0, 100.0)
#: the least fraction of the source's photons the whole filtration may pass; the hardest
#: filters in use pass far more (0.6 mm tin at 150 kV: 9 %, 10 mm aluminium at 40 kV: 0.5 %
#: of the tube model's unfiltered photons, computed with this package)
MIN_FILTER_TRANSMISSION = 1e-6
#: focal-spot width along u and v, mm (CT tubes: about 0.5 to 1.5 mm, recalled from memory)
FOCAL_SPOT_RANGE_MM = (0.0, 10.0)
#: sub-samples of the focal spot and of each cell's aperture, per axis
SAMPLES_RANGE = (1, 64)
#: detected photons per cell per view with no object: below 1 the air beam itself starves;
#: 1e9 is far beyond any detector cell's count in one view, and keeps every reading exact
#: to float32's precision and far from its overflow
AIR_COUNTS_RANGE = (1.0, 1.0e9)
#: largest tube current-time product of one view, mAs (clinical CT views: about 0.1 to 2 mAs)
MAX_MAS_PER_VIEW = 1000.0
#: largest tube current, mA (CT tubes deliver up to about 1300 mA, recalled from memory)
MAX_TUBE_CURRENT_MA = 2000.0
#: longest exposure of one view, ms (one minute)
MAX_VIEW_TIME_MS = 60000.0
#: photon-counting thresholds, keV (lowest; the highest must lie below the source's top energy)
MIN_THRESHOLD_KEV = 1.0
#: energy resolution (FWHM) of a photon-counting cell, keV (CdTe: about 5 to 10 keV)
MAX_ENERGY_RESOLUTION_KEV = 50.0
#: sensor density, g/cm^3 (gas to osmium, the densest element at 22.6)
SENSOR_DENSITY_RANGE_G_CM3 = (1e-4, 22.6)
#: sensor thickness, mm (1 um foils to deep gas chambers)
SENSOR_THICKNESS_RANGE_MM = (0.001, 100.0)
#: electronic noise, counts rms per reading
MAX_ELECTRONIC_NOISE = 1.0e6
#: dark level, counts per reading
MAX_DARK_LEVEL = 1.0e9
#: saturation level, counts per reading (above the dark level)
MAX_FULL_SCALE = 1.0e12
#: relative rms of the per-cell gain and of its drift
MAX_GAIN_SPREAD = 0.5
#: fraction of cells drawn dead or hot
MAX_DEFECT_FRACTION = 0.5
#: FWHM of the point-spread function along u and v, mm
MAX_BLUR_MM = 20.0
#: nearest-neighbour cross-talk fraction (the kernel [c, 1 - 2c, c] stays >= 0 and peaked)
MAX_CROSSTALK = 0.25
#: recursive lag fraction
MAX_LAG = 0.9
#: readings averaged into the flat and the dark frame
FRAMES_RANGE = (1, 10000)
#: largest pattern seed (numpy seeds are any non-negative integer; this keeps them int64)
MAX_PATTERN_SEED = 2**63 - 1
#: scatter-to-primary ratios (SPRs of cone-beam CT of the trunk reach a few, recalled from
#: memory; 10 leaves room for grids-off extremes)
MAX_SPR = 10.0
#: water-equivalent thickness scale of the thickness model, mm
THICKNESS_SCALE_RANGE_MM = (1.0, 10000.0)
#: FWHM of the scatter kernel on the detector, mm (published kernels span tens to hundreds)
KERNEL_WIDTH_RANGE_MM = (1.0, 2000.0)

#: densities (g/cm^3) of common sensor materials (recalled from memory; CRC Handbook values)
SENSOR_DENSITY_G_CM3 = {
    "CsI": 4.51,
    "Gd2O2S": 7.34,
    "CdWO4": 7.9,
    "CdTe": 5.85,
    "Cd0.9Zn0.1Te": 5.78,
    "Si": 2.33,
    "GaAs": 5.32,
    "Se": 4.28,
}


# --------------------------------------------------------------------------------------------
# Dataclasses
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SourceConfig:
    """The x-ray source.

    Attributes
    ----------
    kind : str
        ``"monochromatic"``, ``"tube"`` or ``"file"``.
    energy_kev : float or None
        Photon energy of a monochromatic source.
    kvp : float or None
        Tube voltage, kV.
    anode_angle_rad : float
        Anode angle (tube).
    filtration : tuple of (str, float)
        (material, thickness in mm) of each filter (tube and file sources).
    energy_bin_kev : float
        Width of the spectrum's energy bins (tube).
    spectrum_file : str or None
        Path of a user spectrum (two columns: keV, relative fluence), as written in the file.
    focal_spot_mm : (float, float)
        Width of the focal spot along u and v; (0, 0) is a point source.
    focal_spot_samples : (int, int)
        Sub-samples of the spot along u and v (the tracer's sub-rays).
    """

    kind: str
    energy_kev: float | None = None
    kvp: float | None = None
    anode_angle_rad: float = 0.20943951023931953  # 12 deg (common practice)
    filtration: tuple = ()
    energy_bin_kev: float = 1.0
    spectrum_file: str | None = None
    focal_spot_mm: tuple = (0.0, 0.0)
    focal_spot_samples: tuple = (1, 1)

    @property
    def anode_angle_deg(self) -> float:
        return self.anode_angle_rad * 180.0 / 3.141592653589793


@dataclass(frozen=True)
class ExposureConfig:
    """How many photons a view gets: exactly one of the two is set.

    Attributes
    ----------
    air_counts : float or None
        Expected detected photons per cell per view with no object (summed over the spectrum,
        after the sensor's efficiency; for photon counting, before the thresholds).
    mas_per_view : float or None
        Tube current-time product of one view (mA s), through the tube-output model
        ``photons per cell = fluence(E) [1/(mm^2 mAs) at 1 m] * (1000 mm / SDD)^2
        * cell area [mm^2] * mAs per view``.
    """

    air_counts: float | None = None
    mas_per_view: float | None = None


@dataclass(frozen=True)
class DetectorConfig:
    """The detector's response (see the module docstring for the file keys).

    Attributes
    ----------
    type : str
        ``"energy-integrating"`` or ``"photon-counting"``.
    thresholds_kev : tuple of float
        Photon-counting thresholds; bin b counts photons in [t_b, t_{b+1}), the last bin
        everything above its threshold.
    energy_resolution_kev : float
        FWHM of the Gaussian energy response of a photon-counting cell (0 = ideal).
    material : str or None
        Sensor material (chemical formula); None = ideal sensor.
    density_g_cm3, thickness_mm : float
        Sensor density and thickness.
    electronic_noise : float
        Rms of the additive Gaussian noise per reading, counts.
    dark_level : float
        Offset per reading, counts.
    full_scale : float or None
        Saturation level, counts.
    gain_spread, gain_drift : float
        Relative rms of the per-cell gain, and of its change between flat and scan.
    dead_fraction, hot_fraction : float
        Fractions of cells drawn dead / hot from the pattern seed.
    dead_cells, hot_cells : tuple of (row, col)
        Listed cells (row 0 on 2-D scanners).
    blur_fwhm_mm : (float, float)
        FWHM of the Gaussian point-spread function along u and v.
    crosstalk : float
        Fraction of a cell's signal seen by each of its neighbours along u (and v).
    lag : float
        Fraction a of the first-order recursive lag filter along the view axis.
    flat_frames, dark_frames : int
        Readings averaged into the flat and the dark frame.
    pattern_seed : int
        Seed of the detector's fixed pattern.
    aperture_samples : (int, int)
        Sub-rays across each cell's aperture along u and v (the tracer's cell samples);
        with the focal-spot samples they are averaged in intensity, which gives the
        exponential edge-gradient effect.
    """

    type: str = "energy-integrating"
    thresholds_kev: tuple = ()
    energy_resolution_kev: float = 0.0
    material: str | None = None
    density_g_cm3: float = 0.0
    thickness_mm: float = 0.0
    electronic_noise: float = 0.0
    dark_level: float = 0.0
    full_scale: float | None = None
    gain_spread: float = 0.0
    gain_drift: float = 0.0
    dead_fraction: float = 0.0
    hot_fraction: float = 0.0
    dead_cells: tuple = ()
    hot_cells: tuple = ()
    blur_fwhm_mm: tuple = (0.0, 0.0)
    crosstalk: float = 0.0
    lag: float = 0.0
    flat_frames: int = 20
    dark_frames: int = 20
    pattern_seed: int = 0
    aperture_samples: tuple = (1, 1)

    @property
    def photon_counting(self) -> bool:
        return self.type == "photon-counting"

    @property
    def n_bins(self) -> int:
        """Number of output energy bins (1 for energy-integrating)."""
        return len(self.thresholds_kev) if self.photon_counting else 1


@dataclass(frozen=True)
class ScatterConfig:
    """The scatter model (an approximation; see :mod:`simbench.measure.scatter`).

    Attributes
    ----------
    model : str
        ``"none"``, ``"centre"`` (requested SPR at the central cell of each view) or
        ``"thickness"`` (SPR growing with water-equivalent thickness).
    spr_at_centre : float
        Centre model: scatter-to-primary ratio at the central cell, before the grid.
    max_spr : float
        Thickness model: SPR reached behind very thick objects.
    thickness_scale_mm : float
        Thickness model: water-equivalent thickness over which the SPR grows.
    kernel_fwhm_mm : float
        FWHM of the Gaussian scatter kernel on the detector.
    grid_transmission : float
        Fraction of scatter that passes the anti-scatter grid (1 = no grid).
    """

    model: str = "none"
    spr_at_centre: float = 0.0
    max_spr: float = 0.0
    thickness_scale_mm: float = 1.0
    kernel_fwhm_mm: float = 100.0
    grid_transmission: float = 1.0


@dataclass(frozen=True)
class Physics:
    """All measurement settings of a scanner."""

    source: SourceConfig
    exposure: ExposureConfig
    detector: DetectorConfig = field(default_factory=DetectorConfig)
    scatter: ScatterConfig = field(default_factory=ScatterConfig)


# --------------------------------------------------------------------------------------------
# Range checks
# --------------------------------------------------------------------------------------------


def _check_range(value: float, where: Where, lo: float, hi: float, unit: str = "", *,
                 lo_open: bool = False, what: str = "", why_small: str = "",
                 why_large: str = "") -> float:
    """``value`` if it lies in [lo, hi] (or (lo, hi]), else a one-line InputError."""
    u = f" {unit}" if unit else ""
    small = value <= lo if lo_open else value < lo
    if small or value > hi:
        why = why_small if small else why_large
        span = f"above {lo:g} and up to {hi:g}{u}" if lo_open else f"{lo:g} to {hi:g}{u}"
        raise InputError(where, f"{value:g}{u} is too {'small' if small else 'large'}"
                         + (f": {why}" if why else ""), span + (f" {what}" if what else ""))
    return value


def _number(section: Section, key: str, default: Any, lo: float, hi: float, unit: str = "",
            **kw) -> Any:
    """A number of the section within its physical range (default if absent)."""
    if not section.has(key):
        return default
    return _check_range(section.number(key), section.at(key), lo, hi, unit, **kw)


def _length(section: Section, key: str, default: Any, lo: float, hi: float, **kw) -> Any:
    """A length (mm) of the section within its physical range (default if absent)."""
    if not section.has(key):
        return default
    return _check_range(section.length(key), section.at(key), lo, hi, "mm", **kw)


def _pair(section: Section, key: str, default: tuple, parse_one) -> tuple:
    """One value (used for u and v) or a list of two."""
    if not section.has(key):
        return default
    value = section.raw(key)
    where = section.at(key)
    if isinstance(value, list):
        if len(value) != 2:
            raise InputError(where, f"expected one value or a list of 2, got {len(value)} values",
                             "one value or [u, v]")
        marks = getattr(value, "item_marks", [(None, None)] * 2)
        return tuple(parse_one(v, where.child(f"[{i}]", *marks[i])) for i, v in enumerate(value))
    one = parse_one(value, where)
    return (one, one)


def _length_pair(section: Section, key: str, lo: float, hi: float) -> tuple:
    """One length or [u, v], each within [lo, hi] mm; (0, 0) if absent."""
    return _pair(section, key, (0.0, 0.0), lambda v, w: _check_range(
        parse_length(v, w, section.length_unit), w, lo, hi, "mm"))


def _samples(section: Section, key: str) -> tuple:
    lo, hi = SAMPLES_RANGE
    return _pair(section, key, (1, 1), lambda v, w: check_integer(v, w, minimum=lo, maximum=hi))


# --------------------------------------------------------------------------------------------
# Parsers
# --------------------------------------------------------------------------------------------


def parse_source(section: Section) -> SourceConfig:
    """Read the ``source`` section.

    Raises
    ------
    InputError
        No or several of ``energy`` / ``kvp`` / ``spectrum_file``; energy outside the
        attenuation tables; kVp, anode angle or bin width outside the tube model's range;
        a filter thickness, focal spot or sample count outside its range (module table);
        tube filtration that passes less than :data:`MIN_FILTER_TRANSMISSION` of the photons.
    """
    section.check_keys(["energy", "kvp", "anode_angle", "filtration", "energy_bin",
                        "spectrum_file", "focal_spot", "focal_spot_samples"])
    given = [k for k in ("energy", "kvp", "spectrum_file") if section.has(k)]
    if len(given) != 1:
        problem = "no source spectrum given" if not given else (
            "give only one of " + ", ".join(given))
        raise InputError(section.where, problem,
                         "exactly one of 'energy' (monochromatic), 'kvp' (tube) or 'spectrum_file'")
    spot = _length_pair(section, "focal_spot", *FOCAL_SPOT_RANGE_MM)
    common = dict(focal_spot_mm=spot, focal_spot_samples=_samples(section, "focal_spot_samples"))
    if given[0] == "energy":
        for key in ("anode_angle", "filtration", "energy_bin"):
            if section.has(key):
                raise section.error(key, f"'{key}' does not apply to a monochromatic source",
                                    "remove it, or give 'kvp' for a tube")
        energy = section.energy("energy")
        lo, hi = VALID_ENERGY_RANGE_KEV
        if not lo <= energy <= hi:
            raise section.error("energy", f"energy {energy:g} keV is outside the attenuation tables",
                                f"an energy from {lo:g} to {hi:g} keV")
        return SourceConfig("monochromatic", energy_kev=energy, **common)

    filtration = []
    for item, where in section.sequence("filtration", default=[]):
        sub = Section(item, where, section.length_unit)
        sub.check_keys(["material", "thickness"], required=["material", "thickness"])
        material = sub.string("material")
        _check_material(material, sub.at("material"))
        thickness = _length(sub, "thickness", None, *FILTER_THICKNESS_RANGE_MM,
                            why_large="thicker than any beam filter")
        filtration.append((material, thickness))
    if given[0] == "spectrum_file":
        for key in ("anode_angle", "energy_bin"):
            if section.has(key):
                raise section.error(key, f"'{key}' does not apply to a spectrum file",
                                    "remove it, or give 'kvp' for the tube model")
        return SourceConfig("file", spectrum_file=section.string("spectrum_file"),
                            filtration=tuple(filtration), **common)

    kvp = section.number("kvp")
    lo, hi = KVP_RANGE
    if not lo <= kvp <= hi:
        raise section.error("kvp", f"tube voltage {kvp:g} kV is outside the tube model's range",
                            f"a kVp from {lo:g} to {hi:g}")
    anode = section.angle("anode_angle", default=SourceConfig.anode_angle_rad)
    lo_deg, hi_deg = ANODE_ANGLE_RANGE_DEG
    if not lo_deg <= anode * 180.0 / math.pi <= hi_deg:
        raise section.error("anode_angle", f"anode angle {anode * 180.0 / math.pi:g} deg is "
                            "outside the tube model's range",
                            f"an angle from {lo_deg:g} to {hi_deg:g} deg, e.g. 12 deg")
    ebin = section.energy("energy_bin", default=1.0)
    lo_bin, hi_bin = ENERGY_BIN_RANGE_KEV
    if not lo_bin <= ebin <= hi_bin:
        raise section.error("energy_bin", f"energy bin {ebin:g} keV is outside the tube "
                            "model's range", f"a width from {lo_bin:g} to {hi_bin:g} keV")
    source = SourceConfig("tube", kvp=kvp, anode_angle_rad=anode, filtration=tuple(filtration),
                          energy_bin_kev=ebin, **common)
    if filtration:
        filter_spectrum(unfiltered_tube_spectrum(source), source.filtration,
                        section.at("filtration"))
    return source


@lru_cache(maxsize=16)
def _tube(kvp: float, anode_angle_deg: float, bin_kev: float):
    from simbench.materials import spectra

    return spectra.tube_spectrum(kvp, anode_angle_deg=anode_angle_deg, bin_kev=bin_kev)


def unfiltered_tube_spectrum(source: SourceConfig):
    """The tube's spectrum before its filtration (kept for reuse: the spectrum is immutable).

    Parameters
    ----------
    source : SourceConfig
        A tube source.

    Returns
    -------
    simbench.materials.Spectrum
    """
    return _tube(float(source.kvp), source.anode_angle_deg, float(source.energy_bin_kev))


def filter_spectrum(spectrum, filtration, where: Where):
    """A spectrum after its filtration, refused if the filtration lets (almost) nothing through.

    Parameters
    ----------
    spectrum : simbench.materials.Spectrum
        The spectrum before filtration.
    filtration : sequence of (material, thickness in mm)
    where : Where
        Place of the ``filtration`` field, named in the error.

    Returns
    -------
    simbench.materials.Spectrum

    Raises
    ------
    InputError
        The filtration passes less than :data:`MIN_FILTER_TRANSMISSION` of the photons.

    Notes
    -----
    Transmission ``T = sum_i phi_i exp(-sum_f mu_f(E_i) t_f) / sum_i phi_i`` (narrow beam).
    """
    from simbench.materials import spectra

    out = spectrum
    for material, thickness_mm in filtration:
        out = spectra.filtered(out, material, thickness_mm)
    if filtration:
        before = spectrum.total_fluence
        passed = out.total_fluence / before if before > 0 else 0.0
        if not passed >= MIN_FILTER_TRANSMISSION:
            raise InputError(where, f"the filtration passes {passed:.3g} of the source's "
                             "photons: no usable beam is left",
                             f"filtration passing at least {MIN_FILTER_TRANSMISSION:g} of them; "
                             "CT filters pass about 0.1 to 0.4")
    return out


def parse_exposure(section: Section) -> ExposureConfig:
    """Read the ``exposure`` section.

    Raises
    ------
    InputError
        Missing exposure, more than one way of giving it, or a value outside its physical
        range (module table).
    """
    section.check_keys(["air_counts", "mas_per_view", "tube_current_ma", "view_time_ms"])
    ways = [k for k in ("air_counts", "mas_per_view", "tube_current_ma") if section.has(k)]
    if len(ways) != 1:
        problem = "no exposure given" if not ways else "give only one of " + ", ".join(ways)
        raise InputError(section.where, problem,
                         "exactly one of 'air_counts', 'mas_per_view', or 'tube_current_ma' "
                         "with 'view_time_ms'")
    if ways[0] in ("air_counts", "mas_per_view") and section.has("view_time_ms"):
        raise section.error("view_time_ms", "'view_time_ms' needs 'tube_current_ma'",
                            "remove it or give 'tube_current_ma'")
    if ways[0] == "air_counts":
        return ExposureConfig(air_counts=_number(
            section, "air_counts", None, *AIR_COUNTS_RANGE, what="photons per cell per view",
            why_small="the unattenuated beam itself would starve",
            why_large="no detector cell counts that many photons in one view"))
    mas_why = "more than any tube gives in one view"
    if ways[0] == "mas_per_view":
        return ExposureConfig(mas_per_view=_number(
            section, "mas_per_view", None, 0.0, MAX_MAS_PER_VIEW, "mAs", lo_open=True,
            why_large=mas_why))
    current = _number(section, "tube_current_ma", None, 0.0, MAX_TUBE_CURRENT_MA, "mA",
                      lo_open=True, why_large="more than any x-ray tube delivers")
    if not section.has("view_time_ms"):
        raise section.error("view_time_ms", "missing required field 'view_time_ms'",
                            "the exposure time of one view in ms, e.g. 1.0")
    time_ms = _number(section, "view_time_ms", None, 0.0, MAX_VIEW_TIME_MS, "ms", lo_open=True)
    mas = current * time_ms / 1000.0
    if mas > MAX_MAS_PER_VIEW:
        raise section.error("view_time_ms", f"{current:g} mA for {time_ms:g} ms is {mas:g} mAs "
                            f"per view, {mas_why}",
                            f"at most {MAX_MAS_PER_VIEW:g} mAs per view (mA x ms / 1000)")
    return ExposureConfig(mas_per_view=mas)


def _cells(section: Section, key: str) -> tuple[float, tuple]:
    """A fraction of cells, or a list of columns / [row, column] pairs."""
    if not section.has(key):
        return 0.0, ()
    value = section.raw(key)
    if not isinstance(value, list):
        return _number(section, key, 0.0, 0.0, MAX_DEFECT_FRACTION, what="of the cells"), ()
    cells = []
    for item, where in section.sequence(key):
        if isinstance(item, list):
            if len(item) != 2:
                raise InputError(where, "expected a column or a [row, column] pair",
                                 "a list such as [17, [0, 40]]")
            cells.append((check_integer(item[0], where, minimum=0),
                          check_integer(item[1], where, minimum=0)))
        else:
            cells.append((0, check_integer(item, where, minimum=0)))
    return 0.0, tuple(cells)


def parse_detector(section: Section) -> DetectorConfig:
    """Read the ``detector`` section.

    Raises
    ------
    InputError
        Unknown type; thresholds with an energy-integrating detector, missing with a
        photon-counting one, more than :data:`MAX_THRESHOLDS`, not strictly increasing;
        a sensor material without density; ``full_scale`` not above ``dark_level``; any
        number outside its physical range (module table).
    """
    section.check_keys([
        "type", "thresholds", "energy_resolution", "material", "density_g_cm3", "thickness",
        "electronic_noise", "dark_level", "full_scale", "gain_spread", "gain_drift",
        "dead_cells", "hot_cells", "blur", "crosstalk", "lag", "flat_frames", "dark_frames",
        "pattern_seed", "aperture_samples"])
    kind = section.string("type", default="energy-integrating",
                          choices=["energy-integrating", "photon-counting"])
    thresholds: list[float] = []
    if kind == "photon-counting":
        if not section.has("thresholds"):
            raise section.error("thresholds", "a photon-counting detector needs thresholds",
                                "a list of 1 to 8 increasing energies in keV, e.g. [20, 50]")
        items = section.sequence("thresholds")
        if not 1 <= len(items) <= MAX_THRESHOLDS:
            raise section.error("thresholds", f"{len(items)} thresholds given",
                                f"1 to {MAX_THRESHOLDS} thresholds")
        for item, where in items:
            energy = _check_range(parse_energy(item, where), where, MIN_THRESHOLD_KEV,
                                  VALID_ENERGY_RANGE_KEV[1], "keV")
            if thresholds and energy <= thresholds[-1]:
                raise InputError(where, f"threshold {energy:g} keV is not above the previous "
                                 f"one ({thresholds[-1]:g} keV)", "strictly increasing thresholds")
            thresholds.append(energy)
        if section.has("electronic_noise"):
            raise section.error("electronic_noise", "a photon-counting detector counts no "
                                "electronic noise", "remove it; give 'energy_resolution' instead")
    else:
        for key in ("thresholds", "energy_resolution"):
            if section.has(key):
                raise section.error(key, f"'{key}' applies to photon-counting detectors only",
                                    "remove it, or set type: photon-counting")
    resolution = 0.0
    if section.has("energy_resolution"):
        value = section.raw("energy_resolution")
        resolution = 0.0 if value in (0, 0.0) else _check_range(
            section.energy("energy_resolution"), section.at("energy_resolution"), 0.0,
            MAX_ENERGY_RESOLUTION_KEV, "keV", what="FWHM")

    material = None
    density = 0.0
    thickness = 0.0
    if section.has("material"):
        material = section.string("material")
        if not section.has("thickness"):
            raise section.error("thickness", "missing the sensor thickness",
                                "a length such as '0.6 mm'")
        thickness = _length(section, "thickness", None, *SENSOR_THICKNESS_RANGE_MM)
        in_catalogue = _in_catalogue(material)
        if section.has("density_g_cm3"):
            density = _number(section, "density_g_cm3", None, *SENSOR_DENSITY_RANGE_G_CM3,
                              "g/cm^3", why_large="denser than osmium, the densest element")
        elif material in SENSOR_DENSITY_G_CM3:
            density = SENSOR_DENSITY_G_CM3[material]
        elif not in_catalogue:
            raise section.error("density_g_cm3", f"no density known for sensor '{material}'",
                                "a density in g/cm^3, or one of "
                                + ", ".join(SENSOR_DENSITY_G_CM3))
        if not in_catalogue:
            _check_formula(material, section.at("material"))
    else:
        for key in ("thickness", "density_g_cm3"):
            if section.has(key):
                raise section.error(key, f"'{key}' needs a sensor 'material'",
                                    "add 'material', or remove it for an ideal sensor")

    dead_fraction, dead_cells = _cells(section, "dead_cells")
    hot_fraction, hot_cells = _cells(section, "hot_cells")
    dark_level = _number(section, "dark_level", 0.0, 0.0, MAX_DARK_LEVEL, "counts")
    full_scale = _number(section, "full_scale", None, 0.0, MAX_FULL_SCALE, "counts",
                         lo_open=True)
    if full_scale is not None and full_scale <= dark_level:
        raise section.error("full_scale", f"full scale {full_scale:g} counts is not above the "
                            f"dark level {dark_level:g} counts: every reading would be clamped "
                            "at or below the dark level (a fully starved scan)",
                            f"a full_scale above {dark_level:g} counts")
    if (hot_fraction or hot_cells) and full_scale is None:
        raise section.error("hot_cells", "hot cells read full scale, but no 'full_scale' is given",
                            "add 'full_scale' in counts")
    frames_lo, frames_hi = FRAMES_RANGE
    return DetectorConfig(
        type=kind,
        thresholds_kev=tuple(thresholds),
        energy_resolution_kev=resolution,
        material=material,
        density_g_cm3=density,
        thickness_mm=thickness,
        electronic_noise=_number(section, "electronic_noise", 0.0, 0.0, MAX_ELECTRONIC_NOISE,
                                 "counts", what="rms"),
        dark_level=dark_level,
        full_scale=full_scale,
        gain_spread=_number(section, "gain_spread", 0.0, 0.0, MAX_GAIN_SPREAD,
                            what="relative rms"),
        gain_drift=_number(section, "gain_drift", 0.0, 0.0, MAX_GAIN_SPREAD, what="relative rms"),
        dead_fraction=dead_fraction,
        hot_fraction=hot_fraction,
        dead_cells=dead_cells,
        hot_cells=hot_cells,
        blur_fwhm_mm=_length_pair(section, "blur", 0.0, MAX_BLUR_MM),
        crosstalk=_number(section, "crosstalk", 0.0, 0.0, MAX_CROSSTALK),
        lag=_number(section, "lag", 0.0, 0.0, MAX_LAG),
        flat_frames=section.integer("flat_frames", default=20, minimum=frames_lo,
                                    maximum=frames_hi),
        dark_frames=section.integer("dark_frames", default=20, minimum=frames_lo,
                                    maximum=frames_hi),
        pattern_seed=section.integer("pattern_seed", default=0, minimum=0,
                                     maximum=MAX_PATTERN_SEED),
        aperture_samples=_samples(section, "aperture_samples"),
    )


def _check_material(name: str, where: Where) -> None:
    """A filter material must be in the catalogue."""
    from simbench.materials import get_material

    try:
        get_material(name)
    except KeyError:
        raise InputError(where, f"unknown filter material '{name}'",
                         "a catalogue material such as aluminium, copper or water") from None


def _in_catalogue(name: str) -> bool:
    from simbench.materials import get_material

    try:
        get_material(name)
    except KeyError:
        return False
    return True


def _check_formula(formula: str, where: Where) -> None:
    import xraylib

    try:
        xraylib.CompoundParser(formula)
    except ValueError:
        raise InputError(where, f"'{formula}' is not a chemical formula",
                         "a formula such as CsI, Gd2O2S or CdTe") from None


def parse_scatter(section: Section) -> ScatterConfig:
    """Read the ``scatter`` section.

    Raises
    ------
    InputError
        Unknown model, missing or out-of-range model settings (module table).
    """
    section.check_keys(["model", "spr_at_centre", "max_spr", "thickness_scale", "kernel_width",
                        "grid_transmission"])
    model = section.string("model", default="none", choices=["none", "centre", "thickness"])
    needs = {"none": [], "centre": ["spr_at_centre"], "thickness": ["max_spr", "thickness_scale"]}
    for key in ("spr_at_centre", "max_spr", "thickness_scale"):
        if key in needs[model]:
            if not section.has(key):
                raise section.error(key, f"scatter model '{model}' needs '{key}'", "add it")
        elif section.has(key):
            raise section.error(key, f"'{key}' does not apply to scatter model '{model}'",
                                "remove it")
    spr_why = "beyond the scatter-to-primary ratios of real scans"
    return ScatterConfig(
        model=model,
        spr_at_centre=_number(section, "spr_at_centre", 0.0, 0.0, MAX_SPR, why_large=spr_why),
        max_spr=_number(section, "max_spr", 0.0, 0.0, MAX_SPR, why_large=spr_why),
        thickness_scale_mm=_length(section, "thickness_scale", 1.0, *THICKNESS_SCALE_RANGE_MM),
        kernel_fwhm_mm=_length(section, "kernel_width", ScatterConfig.kernel_fwhm_mm,
                               *KERNEL_WIDTH_RANGE_MM, what="FWHM"),
        grid_transmission=_number(section, "grid_transmission", 1.0, 0.0, 1.0,
                                  what="of the scatter"),
    )


def parse_physics(section: Section) -> Physics:
    """Read ``source``, ``exposure``, ``detector`` and ``scatter`` from a scanner mapping.

    Only these four keys are looked at; the caller checks the others.
    """
    detector = section.section("detector", default=None)
    scatter = section.section("scatter", default=None)
    physics = Physics(
        source=parse_source(section.section("source")),
        exposure=parse_exposure(section.section("exposure")),
        detector=DetectorConfig() if detector is None else parse_detector(detector),
        scatter=ScatterConfig() if scatter is None else parse_scatter(scatter),
    )
    check_physics(physics, section)
    return physics


def _exposure_key(physics: Physics, section: Section) -> tuple[Section, str]:
    """The exposure section and the key that sets the exposure."""
    exposure = section.section("exposure")
    for key in ("air_counts", "mas_per_view", "tube_current_ma"):
        if exposure.has(key):
            return exposure, key
    return exposure, "air_counts"  # pragma: no cover - parse_exposure requires one


def check_physics(physics: Physics, section: Section) -> None:
    """Checks across sections: an mAs exposure needs a tube; thresholds below the top energy.

    Parameters
    ----------
    physics : Physics
    section : Section
        The scanner mapping holding the ``source``, ``exposure`` and ``detector`` sections.
    """
    src, det = physics.source, physics.detector
    if physics.exposure.mas_per_view is not None and src.kind != "tube":
        exposure, key = _exposure_key(physics, section)
        what = ("a monochromatic source" if src.kind == "monochromatic"
                else "a spectrum file (relative fluence)")
        raise exposure.error(key, f"{what} has no tube output per mAs",
                             f"give 'air_counts' for {what.split(' (')[0]}")
    top = src.kvp if src.kind == "tube" else src.energy_kev if src.kind == "monochromatic" \
        else None
    if det.photon_counting and top is not None:
        items = section.section("detector").sequence("thresholds")
        for energy, (_, where) in zip(det.thresholds_kev, items):
            if energy >= top:
                raise InputError(where, f"threshold {energy:g} keV is not below the source's "
                                 f"highest energy {top:g} keV: its bin would count no photons",
                                 f"thresholds below {top:g} keV")


def _sdd_mm(geometry) -> float | None:
    """Source-detector distance of a geometry (first view of free poses); None if parallel."""
    if geometry.parallel:
        return None
    if math.isfinite(geometry.sdd_mm):
        return float(geometry.sdd_mm)
    import numpy as np

    p = geometry.explicit
    return float(np.linalg.norm(p.detector_centre[0] - p.source[0]))


def check_beam(physics: Physics, section: Section, geometry, spectrum) -> None:
    """Checks that need the geometry and the source spectrum, when a scanner file is read.

    Parameters
    ----------
    physics : Physics
    section : Section
        The scanner mapping (for the places of the fields).
    geometry : simbench.geometry.ScannerGeometry
    spectrum : simbench.materials.Spectrum or SpectrumArrays
        The source spectrum, filtration applied.

    Raises
    ------
    InputError
        An mAs exposure on a parallel beam (no source-detector distance) or giving a number
        of detected photons per cell per view in air outside :data:`AIR_COUNTS_RANGE`; a
        sensor that absorbs none of the spectrum; a photon-counting bin that gets less than
        1 photon per cell per view in air; a listed dead or hot cell off the detector; a
        scatter kernel whose work arrays exceed the memory budget.

    Warns
    -----
    InputWarning
        The open beam reaches ``full_scale`` (air readings saturate).
    """
    import numpy as np

    from simbench.measure import detected_air_photons
    from simbench.measure.detector import response_weights, sensor_efficiency

    exposure, det, sca = physics.exposure, physics.detector, physics.scatter
    energies = np.asarray(spectrum.energies_kev, dtype=np.float64)
    fluence = np.asarray(spectrum.fluence, dtype=np.float64)
    detector = section.section("detector", default=None)
    if det.material is not None and not np.sum(fluence * sensor_efficiency(energies, det)) > 0:
        raise detector.error("thickness", "the sensor absorbs none of the source's photons",
                             "a thicker or denser sensor")
    pitch = (geometry.pitch_u_mm, geometry.pitch_v_mm)
    sdd = _sdd_mm(geometry)
    if exposure.mas_per_view is not None:
        exp_section, key = _exposure_key(physics, section)
        if sdd is None:
            raise exp_section.error(key, "an mAs exposure needs a source-detector distance, "
                                    "and a parallel beam has none",
                                    "give 'air_counts' for a parallel beam")
        detected = detected_air_photons(physics, energies, fluence, pitch, sdd)
        total = float(detected.sum())
        lo, hi = AIR_COUNTS_RANGE
        if not lo <= total <= hi:
            per_mas = total / exposure.mas_per_view
            raise exp_section.error(
                key, f"{exposure.mas_per_view:g} mAs per view gives {total:.3g} detected photons "
                f"per cell per view in air",
                f"an exposure giving {lo:g} to {hi:g} photons per cell per view, here "
                f"{lo / per_mas:.3g} to {min(hi / per_mas, MAX_MAS_PER_VIEW):.3g} mAs per view")
    else:
        detected = detected_air_photons(physics, energies, fluence, pitch, sdd)
    weights, _ = response_weights(detected, energies, det)
    air = weights.sum(axis=1)
    if det.photon_counting:
        items = detector.sequence("thresholds")
        for b, (count, (_, where)) in enumerate(zip(air, items)):
            if not count >= 1.0:
                raise InputError(where, f"the bin from {det.thresholds_kev[b]:g} keV gets "
                                 f"{count:.3g} photons per cell per view in air: it would starve",
                                 "thresholds whose bins get at least 1 photon per cell per view "
                                 "in air: lower thresholds, or a larger exposure")
    n_rows = 1 if geometry.dimension == 2 else geometry.n_rows
    for key, cells in (("dead_cells", det.dead_cells), ("hot_cells", det.hot_cells)):
        if not cells:
            continue
        for (row, col), (_, where) in zip(cells, detector.sequence(key)):
            if row >= n_rows or col >= geometry.n_cols:
                raise InputError(where, f"cell [{row}, {col}] is not on the detector",
                                 f"rows 0 to {n_rows - 1}, columns 0 to {geometry.n_cols - 1}")
    if sca.model != "none":
        from simbench.budget import check_bytes
        from simbench.measure.scatter import kernel_work_bytes

        shape = (geometry.n_cols,) if geometry.dimension == 2 else (n_rows, geometry.n_cols)
        need = kernel_work_bytes(shape, sca.kernel_fwhm_mm, pitch)
        scatter = section.section("scatter")
        check_bytes(need, scatter.at("kernel_width") if scatter.has("kernel_width")
                    else scatter.where, f"the scatter kernel of {sca.kernel_fwhm_mm:g} mm over "
                    f"cells of {pitch[0]:g} mm", "a narrower kernel_width")
    if det.full_scale is not None:
        brightest = float(air[1] if not det.photon_counting else air.max()) + det.dark_level
        if brightest >= det.full_scale:
            warn_input(detector.at("full_scale"),
                       f"the open beam reads about {brightest:.3g} counts (dark level "
                       f"included), at or above full_scale {det.full_scale:g}: air readings "
                       "saturate and the projections behind thin objects read low")


def describe(physics: Physics) -> dict[str, Any]:
    """Every setting as plain values, for metadata and reports."""
    from dataclasses import asdict

    return asdict(physics)
