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
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from simbench.errors import InputError, Where
from simbench.materials.attenuation import VALID_ENERGY_RANGE_KEV
from simbench.materials.spectra import KVP_RANGE
from simbench.spec import Section, check_integer, parse_energy, parse_length

#: anode angles (degrees) and spectrum bin widths (keV) the tube-spectrum model accepts
ANODE_ANGLE_RANGE_DEG = (5.0, 30.0)
ENERGY_BIN_RANGE_KEV = (0.1, 2.0)

#: the most photon-counting thresholds (energy bins) a detector may have
MAX_THRESHOLDS = 8

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
    max_spr : float
    thickness_scale_mm : float
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
# Parsers
# --------------------------------------------------------------------------------------------


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


def parse_source(section: Section) -> SourceConfig:
    """Read the ``source`` section.

    Raises
    ------
    InputError
        No or several of ``energy`` / ``kvp`` / ``spectrum_file``; energy outside the
        attenuation tables; kVp outside the tube model's range; negative filter thickness.
    """
    section.check_keys(["energy", "kvp", "anode_angle", "filtration", "energy_bin",
                        "spectrum_file", "focal_spot", "focal_spot_samples"])
    given = [k for k in ("energy", "kvp", "spectrum_file") if section.has(k)]
    if len(given) != 1:
        problem = "no source spectrum given" if not given else (
            "give only one of " + ", ".join(given))
        raise InputError(section.where, problem,
                         "exactly one of 'energy' (monochromatic), 'kvp' (tube) or 'spectrum_file'")
    spot = _pair(section, "focal_spot", (0.0, 0.0),
                 lambda v, w: parse_length(v, w, section.length_unit, nonnegative=True))
    samples = _pair(section, "focal_spot_samples", (1, 1),
                    lambda v, w: check_integer(v, w, minimum=1, maximum=64))
    common = dict(focal_spot_mm=spot, focal_spot_samples=samples)
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
        thickness = sub.length("thickness", nonnegative=True)
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
    return SourceConfig("tube", kvp=kvp, anode_angle_rad=anode, filtration=tuple(filtration),
                        energy_bin_kev=ebin, **common)


def parse_exposure(section: Section) -> ExposureConfig:
    """Read the ``exposure`` section.

    Raises
    ------
    InputError
        Zero, negative or missing exposure, or more than one way of giving it.
    """
    section.check_keys(["air_counts", "mas_per_view", "tube_current_ma", "view_time_ms"])
    ways = [k for k in ("air_counts", "mas_per_view", "tube_current_ma") if section.has(k)]
    if len(ways) != 1:
        problem = "no exposure given" if not ways else "give only one of " + ", ".join(ways)
        raise InputError(section.where, problem,
                         "exactly one of 'air_counts', 'mas_per_view', or 'tube_current_ma' "
                         "with 'view_time_ms'")
    if ways[0] == "air_counts":
        if section.has("view_time_ms"):
            raise section.error("view_time_ms", "'view_time_ms' needs 'tube_current_ma'",
                                "remove it or give 'tube_current_ma'")
        return ExposureConfig(air_counts=section.number("air_counts", minimum=0.0,
                                                         exclusive_minimum=True))
    if ways[0] == "mas_per_view":
        if section.has("view_time_ms"):
            raise section.error("view_time_ms", "'view_time_ms' needs 'tube_current_ma'",
                                "remove it or give 'tube_current_ma'")
        return ExposureConfig(mas_per_view=section.number("mas_per_view", minimum=0.0,
                                                           exclusive_minimum=True))
    current = section.number("tube_current_ma", minimum=0.0, exclusive_minimum=True)
    if not section.has("view_time_ms"):
        raise section.error("view_time_ms", "missing required field 'view_time_ms'",
                            "the exposure time of one view in ms, e.g. 1.0")
    time_ms = section.number("view_time_ms", minimum=0.0, exclusive_minimum=True)
    return ExposureConfig(mas_per_view=current * time_ms / 1000.0)


def _cells(section: Section, key: str) -> tuple[float, tuple]:
    """A fraction of cells, or a list of columns / [row, column] pairs."""
    if not section.has(key):
        return 0.0, ()
    value = section.raw(key)
    if not isinstance(value, list):
        return section.number(key, minimum=0.0, maximum=0.5), ()
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
        negative thickness; a sensor material without density; fractions out of range.
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
            energy = parse_energy(item, where)
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
        resolution = 0.0 if value in (0, 0.0) else section.energy("energy_resolution")

    material = None
    density = 0.0
    thickness = 0.0
    if section.has("material"):
        material = section.string("material")
        thickness = section.length("thickness", nonnegative=True) if section.has("thickness") \
            else None
        if thickness is None:
            raise section.error("thickness", "missing the sensor thickness",
                                "a length such as '0.6 mm'")
        if thickness == 0:
            raise section.error("thickness", "sensor thickness must be > 0",
                                "a positive length such as '0.6 mm'")
        in_catalogue = _in_catalogue(material)
        if section.has("density_g_cm3"):
            density = section.number("density_g_cm3", minimum=0.0, exclusive_minimum=True)
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
    full_scale = None
    if section.has("full_scale"):
        full_scale = section.number("full_scale", minimum=0.0, exclusive_minimum=True)
    if (hot_fraction or hot_cells) and full_scale is None:
        raise section.error("hot_cells", "hot cells read full scale, but no 'full_scale' is given",
                            "add 'full_scale' in counts")
    blur = _pair(section, "blur", (0.0, 0.0),
                 lambda v, w: parse_length(v, w, section.length_unit, nonnegative=True))
    return DetectorConfig(
        type=kind,
        thresholds_kev=tuple(thresholds),
        energy_resolution_kev=resolution,
        material=material,
        density_g_cm3=density,
        thickness_mm=thickness,
        electronic_noise=section.number("electronic_noise", default=0.0, minimum=0.0),
        dark_level=section.number("dark_level", default=0.0, minimum=0.0),
        full_scale=full_scale,
        gain_spread=section.number("gain_spread", default=0.0, minimum=0.0, maximum=0.5),
        gain_drift=section.number("gain_drift", default=0.0, minimum=0.0, maximum=0.5),
        dead_fraction=dead_fraction,
        hot_fraction=hot_fraction,
        dead_cells=dead_cells,
        hot_cells=hot_cells,
        blur_fwhm_mm=blur,
        crosstalk=section.number("crosstalk", default=0.0, minimum=0.0, maximum=0.25),
        lag=section.number("lag", default=0.0, minimum=0.0, maximum=0.9),
        flat_frames=section.integer("flat_frames", default=20, minimum=1),
        dark_frames=section.integer("dark_frames", default=20, minimum=1),
        pattern_seed=section.integer("pattern_seed", default=0, minimum=0),
        aperture_samples=_pair(section, "aperture_samples", (1, 1),
                               lambda v, w: check_integer(v, w, minimum=1, maximum=64)),
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
        Unknown model, missing or out-of-range model settings.
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
    kernel_default = ScatterConfig.kernel_fwhm_mm
    return ScatterConfig(
        model=model,
        spr_at_centre=section.number("spr_at_centre", default=0.0, minimum=0.0, maximum=100.0),
        max_spr=section.number("max_spr", default=0.0, minimum=0.0, maximum=100.0),
        thickness_scale_mm=section.length("thickness_scale", default=1.0, positive=True),
        kernel_fwhm_mm=section.length("kernel_width", default=kernel_default, positive=True),
        grid_transmission=section.number("grid_transmission", default=1.0, minimum=0.0,
                                         maximum=1.0),
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


def check_physics(physics: Physics, section: Section) -> None:
    """Checks across sections: an mAs exposure needs a tube; thresholds below the kVp.

    Parameters
    ----------
    physics : Physics
    section : Section
        The scanner mapping holding the ``source``, ``exposure`` and ``detector`` sections.
    """
    src, det = physics.source, physics.detector
    if physics.exposure.mas_per_view is not None and src.kind == "monochromatic":
        exposure = section.section("exposure")
        key = "mas_per_view" if exposure.has("mas_per_view") else "tube_current_ma"
        raise exposure.error(key, "a monochromatic source has no tube output per mAs",
                             "give 'air_counts' for a monochromatic source")
    top = src.kvp if src.kind == "tube" else src.energy_kev if src.kind == "monochromatic" \
        else None
    if det.photon_counting and top is not None and det.thresholds_kev[0] >= top:
        raise section.section("detector").error(
            "thresholds", f"the lowest threshold {det.thresholds_kev[0]:g} keV is not below the "
            f"source's highest energy {top:g} keV", f"thresholds below {top:g} keV")


def describe(physics: Physics) -> dict[str, Any]:
    """Every setting as plain values, for metadata and reports."""
    from dataclasses import asdict

    return asdict(physics)
