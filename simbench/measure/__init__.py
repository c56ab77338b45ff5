"""Measurement physics: from exact path lengths to raw counts, flat and dark frames, projections.

One entry point, :func:`measure`::

    path lengths L[m, view, (row,) col(, sub-ray)]      (simbench.trace)
      -> expected signal   sum_E W_b(E) exp(-sum_m mu_m(E) L_m), averaged over sub-rays
      -> + scatter          (simbench.measure.scatter, optional approximation)
      -> counting noise     Poisson / compound Poisson (simbench.measure.noise)
      -> detector           blur, cross-talk, lag, gain, dark, electronic noise, defects
      -> raw counts, flat and dark frames
      -> projections        ln((flat - dark) / (counts - dark)), starvation floor recorded

See :mod:`simbench.measure.detector` for the order and the formulas of the detector chain,
:mod:`simbench.measure.config` for the scanner-file keys.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from simbench.errors import InputError, Where, warn_input
from simbench.measure.calibration import DEFAULT_FLOOR_COUNTS, log_normalize
from simbench.measure.config import (
    DetectorConfig,
    ExposureConfig,
    Physics,
    ScatterConfig,
    SourceConfig,
    check_beam,
    describe,
    filter_spectrum,
    parse_detector,
    parse_exposure,
    parse_physics,
    parse_scatter,
    parse_source,
    unfiltered_tube_spectrum,
)
from simbench.measure.detector import (
    apply_psf,
    apply_readout,
    detector_pattern,
    response_weights,
    sensor_efficiency,
)
from simbench.measure.forward import expected_per_energy, expected_signal
from simbench.measure.noise import (
    compound_counts,
    poisson_counts,
    rng_for,
    start_standard_normals,
)
from simbench.measure.scatter import scatter_signal, spr_at_central_cell

__all__ = [
    "DetectorConfig", "ExposureConfig", "Measurement", "Physics", "ScatterConfig",
    "SourceConfig", "SpectrumArrays", "check_beam", "detected_air_photons", "filter_spectrum",
    "log_normalize", "measure", "parse_detector", "parse_exposure", "parse_physics",
    "parse_scatter", "parse_source", "rng_for", "source_spectrum",
]


@dataclass(frozen=True)
class SpectrumArrays:
    """A source spectrum as plain arrays.

    Attributes
    ----------
    energies_kev : float64 (E,)
        Bin centres.
    fluence : float64 (E,)
        Photons per mm^2 per mAs at 1 m in each bin (or relative fluence when only
        ``air_counts`` exposures are used).
    """

    energies_kev: np.ndarray
    fluence: np.ndarray


@dataclass(frozen=True, eq=False)
class Measurement:
    """What the scanner measured.

    Attributes
    ----------
    counts : array (V, [R,] C), or (B, V, [R,] C) for B photon-counting bins
        Raw readings of the scan (dark level included).
    flat, dark : array ([R,] C) or (B, [R,] C)
        Air and dark frames, each averaged over its stated number of readings.
    projections : array, counts' shape
        ``ln((flat - dark) / (counts - dark))`` with the starvation floor.
    metadata : dict
        Every physics setting, the effective beam figures and the starvation record.
    """

    counts: np.ndarray
    flat: np.ndarray
    dark: np.ndarray
    projections: np.ndarray
    metadata: dict = field(default_factory=dict)


def source_spectrum(source: SourceConfig, spectrum=None, *, need_absolute: bool = False):
    """The spectrum a scan uses.

    Parameters
    ----------
    source : SourceConfig
    spectrum : simbench.materials.spectra.Spectrum or SpectrumArrays, optional
        A spectrum given by the caller, used as it is (filtration already applied; for a
        ``spectrum_file`` source, :meth:`simbench.scanner.Scanner.spectrum` reads the file
        and applies the filtration). Anything with ``energies_kev`` and ``fluence`` arrays
        will do; an ``absolute`` attribute that is False refuses mAs exposures.
    need_absolute : bool
        Whether the fluence must be absolute (mAs exposures).

    Returns
    -------
    Spectrum or SpectrumArrays
        ``spectrum`` itself, or the source's monochromatic line or tube spectrum.
    """
    if spectrum is None:
        if source.kind == "file":
            raise ValueError("a spectrum-file source needs its spectrum (Scanner.spectrum())")
        from simbench.materials import spectra

        if source.kind == "monochromatic":
            spectrum = spectra.monochromatic(source.energy_kev)
        else:
            spectrum = filter_spectrum(unfiltered_tube_spectrum(source), source.filtration,
                                       Where("scanner", field="source.filtration"))
    if need_absolute and not getattr(spectrum, "absolute", True):
        what = ("a monochromatic source has no tube output per mAs"
                if source.kind == "monochromatic" else
                "an mAs exposure needs a spectrum in photons per mm^2 per mAs at 1 m, but the "
                "given spectrum is relative")
        raise InputError(Where("scanner", field="exposure"), what, "give 'air_counts'")
    return spectrum


def _geometry(path_lengths, poses, pitch_mm, sdd_mm, subrays):
    if poses is not None:
        shape = tuple(poses.projection_shape)
        if path_lengths.shape[1:] == shape:
            subrays = False
        elif path_lengths.shape[1:-1] == shape:
            subrays = True
        else:
            raise ValueError(f"path_lengths shaped {path_lengths.shape} do not match the poses' "
                             f"projection shape {shape} (with n_materials first, sub-rays last)")
        pitch_mm = (poses.pitch_u_mm, poses.pitch_v_mm)
        if not poses.parallel and sdd_mm is None:
            sdd_mm = float(np.linalg.norm(poses.detector_centre[0] - poses.source[0]))
    else:
        shape = path_lengths.shape[1:-1] if subrays else path_lengths.shape[1:]
    if len(shape) not in (2, 3):
        raise ValueError(f"projection shape {shape} is neither (views, cols) nor "
                         "(views, rows, cols)")
    if pitch_mm is None:
        pitch_mm = (1.0, 1.0)
    return shape, bool(subrays), tuple(float(p) for p in pitch_mm), sdd_mm


def detected_air_photons(physics: Physics, energies_kev: np.ndarray, fluence: np.ndarray,
                         pitch_mm: tuple[float, float], sdd_mm: float | None) -> np.ndarray:
    """Expected detected photons per cell per view with no object, per energy bin.

    Parameters
    ----------
    physics : Physics
    energies_kev, fluence : float64 (E,)
        The source spectrum (photons per mm^2 per mAs at 1 m for mAs exposures).
    pitch_mm : (float, float)
        Cell pitch along u and v, mm (cell area of mAs exposures).
    sdd_mm : float or None
        Source-detector distance, mm (mAs exposures; None for parallel beams).

    Returns
    -------
    float64 (E,)

    Raises
    ------
    InputError
        An mAs exposure without a source-detector distance; a sensor that absorbs none of
        the spectrum.

    Notes
    -----
    ``n(E) = fluence(E) (1000 / SDD)^2 A_cell mAs eta(E)`` (mAs exposure, inverse-square law
    from the tube output at 1 m), or ``fluence(E) eta(E)`` scaled to sum to ``air_counts``;
    ``eta`` is the sensor's absorbed fraction (:func:`simbench.measure.detector.sensor_efficiency`).
    """
    exposure, det = physics.exposure, physics.detector
    eta = sensor_efficiency(energies_kev, det)
    absorbed = np.asarray(fluence, dtype=np.float64) * eta
    if not absorbed.sum() > 0:
        raise InputError(Where("scanner", field="detector.thickness"),
                         "the sensor absorbs none of the source's photons",
                         "a thicker or denser sensor")
    if exposure.air_counts is not None:
        return absorbed * (exposure.air_counts / absorbed.sum())
    if sdd_mm is None:
        raise InputError(Where("scanner", field="exposure"),
                         "an mAs exposure needs a source-detector distance, and a parallel "
                         "beam has none", "give 'air_counts' for a parallel beam")
    return absorbed * ((1000.0 / sdd_mm) ** 2 * pitch_mm[0] * pitch_mm[1]
                       * exposure.mas_per_view)


def _add_scatter(primary: np.ndarray, air: np.ndarray, config: ScatterConfig,
                 det: DetectorConfig, pitch: tuple[float, float], cell_axes: tuple[int, ...],
                 mean_energy_kev: float) -> tuple[np.ndarray, dict]:
    """Primary plus scatter of every output row, and the scatter record for the metadata.

    The record's ``spr_at_central_cell`` is the quantity the ``centre`` model is asked for:
    the scatter-to-primary ratio of the expected signals at the central cell (mean of the
    central one or two cells along u and v), after the anti-scatter grid, averaged over the
    views measured here.
    """
    from simbench.materials import get_material, mu_table

    mu_water = float(mu_table([get_material("water")], [mean_energy_kev])[0, 0])
    rows = np.ones(primary.shape[0]) if det.photon_counting else np.array([0.0, 1.0, 0.0])
    air_signal = float(rows @ air)
    scat, record = scatter_signal(primary, rows, air_signal, config, pitch, cell_axes, mu_water)
    signal = np.tensordot(rows, primary, axes=1)
    per_view = spr_at_central_cell(np.tensordot(rows, scat, axes=1), signal, cell_axes)
    info: dict[str, Any] = {
        "model": config.model,
        "spr_at_central_cell": float(per_view.mean()),
        "spr_at_central_cell_range": [float(per_view.min()), float(per_view.max())],
        "spr_definition": "scatter-to-primary ratio of the expected signals at the central "
                          "cell (mean of the central one or two cells along u and v), after "
                          "the anti-scatter grid, mean over the views",
        "grid_transmission": config.grid_transmission,
    }
    if config.model == "centre":
        short = record.get("views_short_of_requested_spr", 0)
        info["spr_at_centre_requested"] = config.spr_at_centre
        info["views_short_of_requested_spr"] = short
        if short:
            warn_input(Where("scanner", field="scatter.spr_at_centre"),
                       f"a scatter-to-primary ratio of {config.spr_at_centre:g} at the central "
                       "cell needs more scattered photons than the object removes in some "
                       "views (a thin object, or one off the central ray); those views get "
                       "the most the object can scatter (scan.json: measurement.scatter)")
    else:
        centre_signal = spr_at_central_cell(signal, np.full_like(signal, air_signal), cell_axes)
        thickness = -np.log(np.clip(centre_signal, 1e-300, 1.0)) / mu_water
        info["mu_water_per_mm"] = mu_water
        info["water_equivalent_thickness_at_central_cell_mm"] = float(thickness.mean())
    return primary + scat, info


def measure(path_lengths: np.ndarray, materials: Sequence | np.ndarray, physics: Physics, *,
            poses=None, pitch_mm: tuple[float, float] | None = None, sdd_mm: float | None = None,
            subrays: bool = False, spectrum: SpectrumArrays | None = None,
            rng: np.random.Generator | int | None = 0, noise: bool = True,
            starvation_floor: float = DEFAULT_FLOOR_COUNTS, dtype=np.float32,
            calibration: tuple[np.ndarray, np.ndarray] | None = None,
            lag_state: np.ndarray | None = None) -> Measurement:
    """Simulate a scan's raw counts, flat and dark frames and projections.

    Parameters
    ----------
    path_lengths : float64 (M, V, [R,] C[, S])
        Path lengths in mm per material along each ray (:func:`simbench.trace.trace`),
        sub-rays last (averaged in intensity).
    materials : sequence of MaterialSpec (M), or float64 (M, E)
        The phantom's materials, or their mu in 1/mm on the spectrum's energies.
    physics : Physics
        Source, exposure, detector and scatter settings.
    poses : Poses, optional
        Gives the projection shape, the cell pitch and the SDD (divergent beams).
    pitch_mm : (float, float), optional
        Cell pitch along u and v when no poses are given (mm; for blur, scatter and the cell
        area of mAs exposures).
    sdd_mm : float, optional
        Source-detector distance for mAs exposures without poses.
    subrays : bool
        Without poses: whether ``path_lengths`` has a trailing sub-ray axis.
    spectrum : Spectrum or SpectrumArrays, optional
        The spectrum to use, filtration applied (required for ``spectrum_file`` sources,
        see :meth:`simbench.scanner.Scanner.spectrum`; otherwise made from
        ``physics.source``).
    rng : numpy.random.Generator or int
        Random stream of this realization (see :func:`rng_for`), or a root seed.
    noise : bool
        False: noise-free mode (expected values, no counting or electronic noise).
    starvation_floor : float
        Floor of ``counts - dark`` before the logarithm, counts.
    dtype : numpy dtype
        Dtype of the returned arrays (float32 for large runs; float64 for exact checks).
    calibration : (flat, dark), optional
        For a scan measured in blocks of views: the flat and dark frames of the first block
        (as it returned them), used for every later block instead of new ones.
    lag_state : float64 (n_outputs, cells), optional
        For a scan measured in blocks of views: the detector's lagged signal before this
        block (NaN before the first), updated in place (see
        :func:`simbench.measure.detector.apply_readout`).

    Returns
    -------
    Measurement

    Notes
    -----
    Expected detected photons per cell per view with no object, per energy bin:
    ``n(E) = fluence(E) (1000 / SDD)^2 A_cell mAs eta(E)`` (mAs exposure), or ``fluence(E)
    eta(E)`` scaled to sum to ``air_counts``. The scan then follows
    :mod:`simbench.measure.detector`; projections follow
    :func:`simbench.measure.calibration.log_normalize`.

    Examples
    --------
    >>> from simbench.measure.config import ExposureConfig, Physics, SourceConfig
    >>> phys = Physics(SourceConfig("monochromatic", energy_kev=60.0),
    ...                ExposureConfig(air_counts=1e4))
    >>> L = np.full((1, 4, 8), 20.0)                 # 20 mm of one material, 4 views, 8 cells
    >>> m = measure(L, np.array([[0.02]]), phys, noise=False, dtype=np.float64)
    >>> round(float(m.projections[0, 0]), 12)
    0.4
    """
    lengths = np.asarray(path_lengths, dtype=np.float64)
    if lengths.ndim < 3:
        raise ValueError("path_lengths must be shaped (n_materials, views, [rows,] cols[, sub-rays])")
    shape, subrays, pitch, sdd = _geometry(lengths, poses, pitch_mm, sdd_mm, subrays)
    src, exposure, det, sca = physics.source, physics.exposure, physics.detector, physics.scatter
    if isinstance(rng, (int, np.integer)):
        rng = rng_for(int(rng), "measure")

    spec = source_spectrum(src, spectrum, need_absolute=exposure.mas_per_view is not None)
    energies, fluence = spec.energies_kev, spec.fluence
    if isinstance(materials, np.ndarray):
        mu = np.asarray(materials, dtype=np.float64)
    else:
        from simbench.materials import mu_table

        mu = mu_table(list(materials), energies)
    if mu.shape != (lengths.shape[0], energies.size):
        raise ValueError(f"mu must be shaped ({lengths.shape[0]}, {energies.size}), got {mu.shape}")

    detected = detected_air_photons(physics, energies, fluence, pitch, sdd)
    weights, beam = response_weights(detected, energies, det)
    if det.photon_counting:
        for b, value in enumerate(beam["air_counts_per_bin"]):
            if not value > 0:
                raise InputError(Where("scanner", field="detector.thresholds"),
                                 f"threshold {det.thresholds_kev[b]:g} keV gets no photons from "
                                 f"a spectrum ending at {energies.max():g} keV",
                                 "thresholds below the source's highest energy")

    streams = rng.spawn(5) if noise else [None] * 5
    # The normal deviates of an energy-integrating scan (counting noise, electronic noise) are
    # drawn by numpy in a background thread while the forward kernel runs; they are the values
    # of each stream alone, whatever the timing.
    wait_normals = None
    if noise and not det.photon_counting and energies.size != 1:
        wait_normals = start_standard_normals(
            (streams[0], (int(np.prod(shape)),)),
            *([(streams[2], (1,) + tuple(shape))] if det.electronic_noise > 0 else []),
            dtype=np.float32)

    # energies that reach no output (zero fluence, or outside every bin) are skipped
    keep = np.any(weights != 0, axis=0)
    # expected primary of every output row: (B', V, [R,] C); NaN or infinite path lengths
    # raise ValueError here (checked inside the kernel's pass)
    primary = expected_signal(lengths, mu[:, keep], weights[:, keep], subrays)
    air = weights.sum(axis=1)
    two_d = len(shape) == 2
    cell_axes = (-1,) if two_d else (-1, -2)

    # signal-weighted (energy integrating) or count-weighted mean energy of the air beam
    beam_weight = weights[1] if not det.photon_counting else detected
    mean_energy = float(np.sum(beam_weight * energies) / np.sum(beam_weight))
    scatter_info = {}
    if sca.model != "none":
        total, scatter_info = _add_scatter(primary, air, sca, det, pitch, cell_axes, mean_energy)
    else:
        total = primary

    z_readout = []  # readout normal deviates of the scan when drawn with the counting noise
    flat_shape = shape[1:]

    # counting noise -> signal (B, V, [R,] C) and flat signal (B, [R,] C)
    air_cells = np.broadcast_to(air.reshape((-1,) + (1,) * len(flat_shape)),
                                (air.size,) + flat_shape)
    if det.photon_counting:
        if noise:
            scan = poisson_counts(total, streams[0])
            flat = poisson_counts(np.array(air_cells), streams[1], det.flat_frames)
        else:
            scan, flat = total.copy(), np.array(air_cells, dtype=np.float64)
    else:
        if not noise:
            scan, flat = total[1:2].copy(), np.array(air_cells[1:2], dtype=np.float64)
        elif energies.size == 1:
            scale = weights[1, 0] / weights[0, 0]
            scan = poisson_counts(total[0:1], streams[0]) * scale
            flat = poisson_counts(np.array(air_cells[0:1]), streams[1], det.flat_frames) * scale
        else:
            rel = weights[1, keep] / weights[0, keep]

            def exact_scan(cells):
                n = expected_per_energy(lengths, mu[:, keep], detected[keep], cells, subrays)
                ratio = total[0].reshape(-1)[cells] / primary[0].reshape(-1)[cells]
                return n * ratio[:, None], rel

            def exact_flat(cells):
                return np.broadcast_to(detected[keep], (cells.size, rel.size)), rel

            z_count, *z_readout = wait_normals()
            scan = compound_counts(total[0], total[1], total[2], streams[0], exact_scan,
                                   normals=z_count)[None]
            flat = compound_counts(np.array(air_cells[0]), np.array(air_cells[1]),
                                   np.array(air_cells[2]), streams[1], exact_flat,
                                   det.flat_frames)[None]

    # detector: PSF, lag, gain, readout, defects
    scan = apply_psf(scan, det, pitch, cell_axes)
    flat = apply_psf(flat, det, pitch, cell_axes)
    scan = np.ascontiguousarray(scan, dtype=np.float64)
    n_rows = 1 if two_d else shape[1]
    pattern = detector_pattern(det, n_rows, shape[-1])
    cells_shape = (shape[-1],) if two_d else (n_rows, shape[-1])
    gain = pattern.gain.reshape(cells_shape)
    drift = pattern.drift.reshape(cells_shape)
    dead = pattern.dead.reshape(cells_shape)
    hot = pattern.hot.reshape(cells_shape)
    sigma = det.electronic_noise
    noisy_readout = noise and sigma > 0
    # lag, gain with drift, dark level, electronic noise, saturation and hot cells in one pass
    # over the scan (in place: scan is a fresh array here, from the counting noise or a copy)
    apply_readout(scan.reshape(scan.shape[0], shape[0], -1), lag=det.lag,
                  gain=(gain * drift * ~dead).reshape(-1), dark_level=det.dark_level,
                  electronic_noise=sigma,
                  normals=((z_readout[0] if z_readout else streams[2].standard_normal(scan.shape))
                           if noisy_readout else None),
                  full_scale=det.full_scale, hot=hot.reshape(-1), lag_state=lag_state)
    flat = flat * (gain * ~dead)
    flat += det.dark_level
    dark = np.full(flat.shape, det.dark_level, dtype=np.float64)
    if noisy_readout:
        flat += sigma / np.sqrt(det.flat_frames) * streams[3].standard_normal(flat.shape)
        dark += sigma / np.sqrt(det.dark_frames) * streams[4].standard_normal(dark.shape)
    if det.full_scale is not None:
        flat = np.minimum(flat, det.full_scale)
        flat[..., hot] = det.full_scale

    if calibration is not None:
        # the frames of the first block: one flat and one dark for the whole scan
        flat, dark = (np.asarray(a, dtype=np.float64) for a in calibration)
        if not det.photon_counting:
            flat, dark = flat[None], dark[None]
    projections, starvation = log_normalize(scan, flat, dark, view_axis=1,
                                            floor=starvation_floor, dtype=dtype)
    if not det.photon_counting:
        scan, flat, dark, projections = scan[0], flat[0], dark[0], projections[0]
    metadata: dict[str, Any] = {
        "physics": describe(physics),
        "noise": bool(noise),
        "energies_kev": energies.tolist(),
        "detected_air_photons_per_bin": detected.tolist(),
        # what each output row's expected signal weighs per energy bin (air beam): the
        # photon-equivalent signal of an energy-integrating detector, the counts of each
        # threshold bin of a photon-counting one; a beam-hardening correction needs exactly this
        "signal_weights_per_bin": (weights[:, :] if det.photon_counting
                                   else weights[1:2]).tolist(),
        "air_photons": float(detected.sum()),
        "mean_detected_energy_kev": mean_energy,
        "sdd_mm": sdd,
        "pitch_mm": list(pitch),
        "sub_rays": int(lengths.shape[-1]) if subrays else 1,
        "dead_cells": int(pattern.dead.sum()),
        "hot_cells": int(pattern.hot.sum()),
        "starvation": starvation,
        "scatter": scatter_info,
        "dtype": np.dtype(dtype).name,
        **{k: v for k, v in beam.items()},
    }
    return Measurement(scan.astype(dtype, copy=False), flat.astype(dtype, copy=False),
                       dark.astype(dtype, copy=False), projections, metadata)
