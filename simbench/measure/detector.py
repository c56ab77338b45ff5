"""Detector response: sensor efficiency, energy weighting, fixed pattern, blur, lag, readout.

The chain applied to a scan, in this order (the flat frame goes through the same chain without
the lag, which leaves a constant signal unchanged, and without the gain drift):

1. **Sensor.** A photon of energy E is absorbed with probability
   ``eta(E) = 1 - exp(-mu_sensor(E) * t)`` (mu of the sensor compound from
   :mod:`simbench.materials`; an ideal sensor has eta = 1).
2. **Energy response.** An energy-integrating cell adds the energy each absorbed photon
   deposits, ``w(E) = E * mu_en(E) / mu(E)`` (local-deposition approximation with the
   mass energy-absorption coefficient; E for an ideal sensor). Its signal is expressed in
   *photon-equivalent counts*: deposited energy divided by the mean deposited energy per
   detected photon of the unattenuated beam, so that the flat reads the air counts. A
   photon-counting cell sorts photons into bins [t_b, t_{b+1}) of measured energy, the
   measured energy being E blurred by a Gaussian of the stated FWHM (energy resolution).
3. **Counting noise** (:mod:`simbench.measure.noise`): Poisson per bin, compound Poisson for
   energy integration, whose relative variance carries the Swank factor
   ``I = M1^2 / (M0 * M2)``.
4. **Point-spread function**: a Gaussian of FWHM ``blur`` (mm) and nearest-neighbour
   cross-talk (kernel ``[c, 1 - 2c, c]``) along u and v (``scipy.ndimage``, edges repeated).
   Applied after counting noise, so neighbouring cells' noise becomes correlated, as with
   scintillator light spread and charge sharing.
5. **Lag**: a first-order recursive filter along the view axis,
   ``y[0] = x[0]``, ``y[v] = (1 - a) x[v] + a y[v - 1]``: a fraction a of the signal of each
   view is read in the next one, decaying geometrically (the detector starts in the steady
   state of the first view).
6. **Gain**: per-cell gain ``g = (1 + gain_spread * z1)`` in flat and scan alike (removed by the
   flat-field correction), times ``(1 + gain_drift * z2)`` in the scan only: the change of
   gain between the flat acquisition and the scan, which the correction cannot remove and
   which shows as rings.
7. **Readout**: plus the dark level and Gaussian electronic noise per reading (its rms divided
   by sqrt(frames) in averaged flat and dark frames); saturation at ``full_scale``.
8. **Defects**: dead cells read the dark frame's level with no signal; hot cells read
   ``full_scale`` whenever the beam is on.

The fixed pattern (gains, drift, dead and hot cells) comes from the detector's own
``pattern_seed``, so it is the same in every realization of a scan.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numba import njit, prange
from scipy import ndimage, special

from simbench.measure.config import DetectorConfig
from simbench.measure.noise import rng_for

FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def sensor_material(detector: DetectorConfig):
    """The sensor as a :class:`~simbench.materials.MaterialSpec` (None for an ideal sensor).

    A catalogue name is used as it is (with the stated density if one is given); otherwise the
    name is read as a chemical formula.
    """
    if detector.material is None:
        return None
    from dataclasses import replace

    from simbench.materials import custom_material, get_material

    from simbench.measure.config import SENSOR_DENSITY_G_CM3

    try:
        spec = get_material(detector.material)
    except KeyError:
        density = detector.density_g_cm3 or SENSOR_DENSITY_G_CM3.get(detector.material, 0.0)
        return custom_material(detector.material, formula=detector.material,
                               density_g_cm3=density)
    if detector.density_g_cm3 > 0:
        spec = replace(spec, density_g_cm3=detector.density_g_cm3)
    return spec


def sensor_efficiency(energies_kev: np.ndarray, detector: DetectorConfig) -> np.ndarray:
    """Absorbed fraction ``1 - exp(-mu_sensor(E) t)`` of the sensor (ones if ideal).

    Parameters
    ----------
    energies_kev : float64 (E,)
    detector : DetectorConfig

    Returns
    -------
    float64 (E,)

    Notes
    -----
    ``mu_sensor`` is the total attenuation coefficient (with coherent scattering) from
    :func:`simbench.materials.mu_table`: the probability that the photon interacts at all.
    """
    energies = np.asarray(energies_kev, dtype=np.float64)
    spec = sensor_material(detector)
    if spec is None:
        return np.ones_like(energies)
    from simbench.materials import mu_table

    mu = mu_table([spec], energies)[0]
    return -np.expm1(-mu * detector.thickness_mm)


def deposited_energy_kev(energies_kev: np.ndarray, detector: DetectorConfig) -> np.ndarray:
    """Mean energy deposited per interacting photon, ``E * mu_en(E) / mu(E)`` (E if ideal).

    Parameters
    ----------
    energies_kev : float64 (E,)
    detector : DetectorConfig

    Returns
    -------
    float64 (E,), keV

    Notes
    -----
    Local-deposition approximation: the photon's energy is kept except what leaves as
    fluorescence and scattered photons, in the proportion of the mass energy-absorption to the
    mass attenuation coefficient (:func:`simbench.materials.mass_energy_absorption_cm2_g`).
    The spread of deposited energies of one incident energy is not modelled.
    """
    energies = np.asarray(energies_kev, dtype=np.float64)
    if detector.material is None:
        return energies.copy()
    return energies * _absorbed_fraction(detector.material, detector.density_g_cm3,
                                         energies.tobytes())


@lru_cache(maxsize=32)
def _absorbed_fraction(material: str, density_g_cm3: float, energies_bytes: bytes) -> np.ndarray:
    """``mu_en / mu`` of the sensor on the given energies (read-only, kept for reuse).

    Cached: every realization of a scan needs the same values, and their computation calls
    xraylib's own threaded routines, which would compete with the measurement's kernels.
    """
    from simbench.materials import mass_attenuation_cm2_g, mass_energy_absorption_cm2_g

    energies = np.frombuffer(energies_bytes, dtype=np.float64)
    spec = sensor_material(DetectorConfig(material=material, density_g_cm3=density_g_cm3))
    ratio = mass_energy_absorption_cm2_g(spec, energies) / mass_attenuation_cm2_g(spec, energies)
    ratio.setflags(write=False)
    return ratio


def swank_factor(photons: np.ndarray, weight: np.ndarray) -> float:
    """Swank factor ``I = M1^2 / (M0 * M2)`` of a weighted photon count.

    Parameters
    ----------
    photons : float64 (E,)
        Expected photons per energy bin.
    weight : float64 (E,)
        Signal per photon.

    Returns
    -------
    float
        In (0, 1]; 1 for a single energy.

    References
    ----------
    R. K. Swank, J. Appl. Phys. 44, 4199 (1973).
    """
    m0 = float(np.sum(photons))
    m1 = float(np.sum(photons * weight))
    m2 = float(np.sum(photons * weight * weight))
    return m1 * m1 / (m0 * m2)


def bin_response(energies_kev: np.ndarray, detector: DetectorConfig) -> np.ndarray:
    """Probability that a photon of energy E is counted in each photon-counting bin.

    Parameters
    ----------
    energies_kev : float64 (E,)
    detector : DetectorConfig (photon counting)

    Returns
    -------
    float64 (B, E)

    Notes
    -----
    With measured energy ``E' ~ N(E, sigma)``, ``sigma = FWHM / 2.3548``, bin b counts
    ``P(t_b <= E' < t_{b+1}) = Phi((t_{b+1} - E) / sigma) - Phi((t_b - E) / sigma)``
    (``t_{B+1} = inf``); an ideal response (FWHM 0) is the indicator of the bin.
    """
    energies = np.asarray(energies_kev, dtype=np.float64)
    edges = np.append(np.asarray(detector.thresholds_kev, dtype=np.float64), np.inf)
    sigma = detector.energy_resolution_kev / FWHM_PER_SIGMA
    if sigma > 0:
        cdf = special.ndtr((edges[:, None] - energies[None, :]) / sigma)
        return cdf[1:] - cdf[:-1]
    above = (energies[None, :] >= edges[:, None]).astype(np.float64)
    return above[:-1] - above[1:]


def response_weights(detected_photons: np.ndarray, energies_kev: np.ndarray,
                     detector: DetectorConfig) -> tuple[np.ndarray, dict]:
    """Forward-model weights W (B, E) of the detector's output rows.

    Parameters
    ----------
    detected_photons : float64 (E,)
        Expected absorbed photons per cell per view and energy bin with no object.
    energies_kev : float64 (E,)
    detector : DetectorConfig

    Returns
    -------
    weights : float64 (B, E)
        Energy-integrating: three rows (photons M0, signal M1, signal variance M2) with the
        signal in photon-equivalent counts. Photon counting: one row per threshold bin.
    info : dict
        ``mean_deposited_kev`` and ``swank_factor`` of the unattenuated beam
        (energy integrating), or the expected air counts per bin (photon counting).
    """
    n = np.asarray(detected_photons, dtype=np.float64)
    if detector.photon_counting:
        w = bin_response(energies_kev, detector) * n[None, :]
        return w, {"air_counts_per_bin": w.sum(axis=1).tolist()}
    deposit = deposited_energy_kev(energies_kev, detector)
    norm = float(np.sum(n * deposit) / np.sum(n))
    rel = deposit / norm
    w = np.stack([n, n * rel, n * rel * rel])
    return w, {"mean_deposited_kev": norm, "swank_factor": swank_factor(n, deposit)}


# --------------------------------------------------------------------------------------------
# Fixed pattern
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DetectorPattern:
    """Per-cell fixed pattern of a detector, arrays shaped (n_rows, n_cols).

    Attributes
    ----------
    gain : float64
        Gain in flat and scan.
    drift : float64
        Extra gain factor of the scan (1 where there is no drift).
    dead, hot : bool
    """

    gain: np.ndarray
    drift: np.ndarray
    dead: np.ndarray
    hot: np.ndarray


def _mark(mask: np.ndarray, cells, fraction: float, rng: np.random.Generator, what: str) -> None:
    n_rows, n_cols = mask.shape
    for row, col in cells:
        if row >= n_rows or col >= n_cols:
            from simbench.errors import InputError

            raise InputError("detector", f"{what} cell [{row}, {col}] is outside the detector",
                             f"rows 0..{n_rows - 1}, columns 0..{n_cols - 1}")
        mask[row, col] = True
    if fraction > 0:
        mask |= rng.random(mask.shape) < fraction


def detector_pattern(detector: DetectorConfig, n_rows: int, n_cols: int) -> DetectorPattern:
    """Draw the detector's fixed pattern from its ``pattern_seed``.

    Parameters
    ----------
    detector : DetectorConfig
    n_rows, n_cols : int
        Detector size (1 row for 2-D scanners).

    Returns
    -------
    DetectorPattern
    """
    rng = rng_for(detector.pattern_seed, "detector pattern")
    shape = (n_rows, n_cols)
    z = rng.standard_normal((4,) + shape)
    gain = 1.0 + detector.gain_spread * z[0]
    drift = 1.0 + detector.gain_drift * z[1]
    dead = np.zeros(shape, dtype=bool)
    hot = np.zeros(shape, dtype=bool)
    _mark(dead, detector.dead_cells, detector.dead_fraction, rng, "dead")
    _mark(hot, detector.hot_cells, detector.hot_fraction, rng, "hot")
    hot &= ~dead
    return DetectorPattern(np.clip(gain, 0.0, None), np.clip(drift, 0.0, None), dead, hot)


# --------------------------------------------------------------------------------------------
# Spatial and temporal response
# --------------------------------------------------------------------------------------------


def _gaussian_weights(sigma: float, truncate: float = 4.0) -> np.ndarray:
    """Normalised Gaussian taps of ``scipy.ndimage.gaussian_filter1d`` (same radius rule)."""
    radius = int(truncate * float(sigma) + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    phi = np.exp(-0.5 / (sigma * sigma) * x * x)
    return phi / phi.sum()


@njit(parallel=True, cache=True)
def _rows_psf_kernel(x, taps, c, out):  # pragma: no cover - compiled
    """Symmetric FIR ``taps`` then ``[c, 1 - 2c, c]`` along the last axis of (N, C) rows.

    Edge cells repeated outward ('nearest') before each of the two filters, as
    ``scipy.ndimage`` does; rows in parallel, each with its own fixed order.
    """
    n_rows, n = x.shape
    radius = (taps.shape[0] - 1) // 2
    centre = 1.0 - 2.0 * c
    n_taps = taps.shape[0]
    for r in prange(n_rows):
        row = x[r]
        tmp = np.empty(n)
        # edges (indices clamped), then the interior with no clamping (vectorisable)
        lo = min(radius, n)
        hi = max(n - radius, lo)
        for part in range(2):
            for j in range(0, lo) if part == 0 else range(hi, n):
                t = 0.0
                for k in range(n_taps):
                    i = min(max(j + k - radius, 0), n - 1)
                    t += taps[k] * row[i]
                tmp[j] = t
        # (slices indexed from 0, so that the loops carry no negative-index checks)
        inner = tmp[lo:hi]
        n_inner = hi - lo
        for k in range(n_taps):
            w = taps[k]
            src = row[lo - radius + k:lo - radius + k + n_inner]
            if k == 0:
                for i in range(n_inner):
                    inner[i] = w * src[i]
            else:
                for i in range(n_inner):
                    inner[i] += w * src[i]
        dst = out[r]
        if c == 0.0:
            for j in range(n):
                dst[j] = tmp[j]
        elif n == 1:
            dst[0] = tmp[0]
        else:
            dst[0] = c * tmp[0] + centre * tmp[0] + c * tmp[1]
            left = tmp[0:n - 2]
            mid = tmp[1:n - 1]
            right = tmp[2:n]
            dst_mid = dst[1:n - 1]
            for i in range(n - 2):
                dst_mid[i] = c * left[i] + centre * mid[i] + c * right[i]
            dst[n - 1] = c * tmp[n - 2] + centre * tmp[n - 1] + c * tmp[n - 1]


def apply_psf(values: np.ndarray, detector: DetectorConfig, pitch_mm: tuple[float, float],
              cell_axes: tuple[int, ...]) -> np.ndarray:
    """Gaussian blur and nearest-neighbour cross-talk along the detector axes.

    Parameters
    ----------
    values : float64 array
    detector : DetectorConfig
    pitch_mm : (float, float)
        Cell pitch along u and v.
    cell_axes : tuple of int
        Axis of u (columns), then of v (rows) if the detector has rows.

    Returns
    -------
    float64 array, same shape (a new array if anything was applied)

    Notes
    -----
    Gaussian of ``sigma = FWHM / (2 sqrt(2 ln 2)) / pitch`` cells, then the kernel
    ``[c, 1 - 2c, c]``; both preserve the total signal away from the edges (edge cells are
    repeated outward). Along the last (contiguous) axis both filters run in one parallel pass
    with the taps and edge rule of ``scipy.ndimage.gaussian_filter1d`` / ``convolve1d``
    (truncated at 4 sigma); other axes use ``scipy.ndimage`` itself.
    """
    out = values
    for i, axis in enumerate(cell_axes):
        fwhm = detector.blur_fwhm_mm[i]
        c = float(detector.crosstalk)
        if not (fwhm > 0 or c > 0):
            continue
        last = axis in (-1, out.ndim - 1)
        if last and out.ndim >= 1 and out.shape[-1] > 0:
            taps = (_gaussian_weights(fwhm / FWHM_PER_SIGMA / pitch_mm[i]) if fwhm > 0
                    else np.ones(1))
            src = np.ascontiguousarray(out, dtype=np.float64)
            rows = src.reshape(-1, src.shape[-1])
            res = np.empty_like(rows)
            _rows_psf_kernel(rows, taps, c, res)
            out = res.reshape(src.shape)
            continue
        if fwhm > 0:
            sigma = fwhm / FWHM_PER_SIGMA / pitch_mm[i]
            out = ndimage.gaussian_filter1d(out, sigma, axis=axis, mode="nearest", truncate=4.0)
        if c > 0:
            out = ndimage.convolve1d(out, np.array([c, 1.0 - 2.0 * c, c]), axis=axis,
                                     mode="nearest")
    return out


@njit(parallel=True, cache=True)
def _lag_kernel(y, lag):  # pragma: no cover - compiled
    """In place along axis 0 of a (V, N) array; columns in parallel, views in order."""
    n_views, n = y.shape
    keep = 1.0 - lag
    n_chunks = (n + 1023) // 1024
    for c in prange(n_chunks):
        stop = min(n, (c + 1) * 1024)
        for v in range(1, n_views):
            for j in range(c * 1024, stop):
                y[v, j] = keep * y[v, j] + lag * y[v - 1, j]


def apply_lag(values: np.ndarray, lag: float, view_axis: int, *,
              in_place: bool = False) -> np.ndarray:
    """First-order recursive lag along the view axis.

    Parameters
    ----------
    values : float64 array
    lag : float
        Fraction a in [0, 1) of a view's signal read in the next view.
    view_axis : int
    in_place : bool
        Overwrite ``values`` (a C-contiguous float64 array) instead of returning a new array.

    Returns
    -------
    float64 array, same shape

    Notes
    -----
    ``y[0] = x[0]``, ``y[v] = (1 - a) x[v] + a y[v - 1]`` (first-order IIR filter, run view
    after view; each cell's recursion is independent of the others, so the result does not
    depend on the number of threads); a constant signal is unchanged.
    """
    if lag <= 0:
        return values
    if in_place and not (isinstance(values, np.ndarray) and values.dtype == np.float64
                         and values.flags.c_contiguous):
        raise ValueError("in-place lag needs a C-contiguous float64 array")
    y = values if in_place else np.array(values, dtype=np.float64)
    moved = np.moveaxis(y, view_axis, 0)
    if moved.flags.c_contiguous:
        _lag_kernel(moved.reshape(moved.shape[0], -1), float(lag))
        return y
    work = np.ascontiguousarray(moved)
    _lag_kernel(work.reshape(work.shape[0], -1), float(lag))
    moved[...] = work
    return y


@njit(parallel=True, cache=True)
def _readout_kernel(scan, lag, gain, offset, sigma, normals, full_scale, hot,
                    state):  # pragma: no cover - compiled
    """In place on (B, V, N): lag along V, then gain, offset, noise, saturation, hot cells.

    Columns in parallel (chunks of 512 cells of each output row), views in order; every value
    has a fixed formula and order, so the result does not depend on the number of threads.
    ``normals`` is (B, V, N) standard normal deviates (float64 or float32), or shaped
    (1, 1, 0) for no electronic noise.
    ``state`` is (B, N), or empty: the lagged signal of the view before the first one (NaN
    where there is none), replaced by that of the last view.
    """
    n_out, n_views, n = scan.shape
    keep = 1.0 - lag
    noisy = normals.shape[2] > 0
    carry = state.shape[0] > 0
    n_chunks = (n + 511) // 512
    for task in prange(n_out * n_chunks):
        b = task // n_chunks
        start = (task % n_chunks) * 512
        stop = min(n, start + 512)
        m = stop - start
        prev = np.empty(m)
        has_prev = np.zeros(m, dtype=np.bool_)
        if carry:
            for i in range(m):
                prev[i] = state[b, start + i]
                has_prev[i] = not math.isnan(prev[i])
        g = gain[start:stop]
        h = hot[start:stop]
        # (slices indexed from 0, so that the loop carries no negative-index checks)
        for v in range(n_views):
            row = scan[b, v, start:stop]
            # (an empty slice of the same type when there is no noise: it is never read)
            z = normals[b, v, start:stop] if noisy else normals[0, 0, 0:0]
            for i in range(m):
                x = row[i]
                if lag > 0.0 and (v > 0 or has_prev[i]):
                    x = keep * x + lag * prev[i]
                prev[i] = x
                y = x * g[i] + offset
                if noisy:
                    y += sigma * z[i]
                if y > full_scale:
                    y = full_scale
                if h[i]:
                    y = full_scale
                row[i] = y
        if carry and n_views > 0:
            for i in range(m):
                state[b, start + i] = prev[i]


def apply_readout(scan: np.ndarray, *, lag: float, gain: np.ndarray, dark_level: float,
                  electronic_noise: float = 0.0, normals: np.ndarray | None = None,
                  full_scale: float | None = None, hot: np.ndarray | None = None,
                  lag_state: np.ndarray | None = None) -> np.ndarray:
    """Lag, gain, dark level, electronic noise, saturation and hot cells of a scan, in place.

    Parameters
    ----------
    scan : C-contiguous float64 (B, V, N)
        Signal of B output rows, V views and N cells (rows x columns flattened); overwritten.
    lag : float
        Fraction a in [0, 1) of a view's signal read in the next view.
    gain : float64 (N,)
        Gain of every cell (0 for dead cells).
    dark_level : float
        Offset added to every reading, counts.
    electronic_noise : float
        rms of the electronic noise of a reading, counts.
    normals : float64 or float32 (B, V, N), optional
        One standard normal deviate per reading (no electronic noise without them).
    full_scale : float, optional
        Saturation level; hot cells read it.
    hot : bool (N,), optional
        Hot cells (only with ``full_scale``).
    lag_state : C-contiguous float64 (B, N), optional
        For a scan read in blocks of views: the lagged signal of the view before this block
        (NaN for none, as before the first block), replaced in place by that of this
        block's last view, so that blocks read one after the other equal one whole read.

    Returns
    -------
    scan

    Notes
    -----
    One pass, per cell and view ``v``: ``y[v] = (1 - a) x[v] + a y[v - 1]`` (``y[0] = x[0]``,
    as :func:`apply_lag`), then ``min(y[v] g + dark + noise, full_scale)``, or ``full_scale``
    for a hot cell, with ``noise = electronic_noise * normals``: the same formulas, in the
    same order, as the separate steps.
    """
    if not (scan.dtype == np.float64 and scan.flags.c_contiguous and scan.ndim == 3):
        raise ValueError("apply_readout needs a C-contiguous float64 (B, V, N) array")
    n = scan.shape[2]
    gain = np.ascontiguousarray(gain, dtype=np.float64).reshape(n)
    noisy = normals is not None and electronic_noise > 0
    if noisy:
        normals = np.ascontiguousarray(normals)
        if normals.dtype != np.float32:
            normals = normals.astype(np.float64, copy=False)
        normals = normals.reshape(scan.shape)
    else:
        # never read; float32 like the normals of an energy-integrating scan, so that noisy
        # and noise-free scans share one compiled kernel
        normals = np.empty((1, 1, 0), dtype=np.float32)
    top = np.inf if full_scale is None else float(full_scale)
    hot_arr = (np.zeros(n, dtype=np.bool_) if hot is None or full_scale is None
               else np.ascontiguousarray(hot, dtype=np.bool_).reshape(n))
    if lag_state is None:
        state = np.empty((0, 0))
    else:
        state = lag_state
        if not (state.dtype == np.float64 and state.flags.c_contiguous
                and state.shape == (scan.shape[0], n)):
            raise ValueError(f"lag_state must be a C-contiguous float64 array shaped "
                             f"({scan.shape[0]}, {n})")
    _readout_kernel(scan, float(lag) if lag > 0 else 0.0, gain, float(dark_level),
                    float(electronic_noise), normals, top, hot_arr, state)
    return scan
