"""Scatter: a convolution-kernel approximation of the scattered photons reaching the detector.

This is an *approximation* meant to produce realistic low-frequency scatter (cupping, streaks
between dense objects, lowered contrast), not a transport simulation. The scattered signal of a
view is a broad Gaussian kernel ``G`` (FWHM on the detector, normalised to unit sum) applied to a
*scatter source* ``s`` built from each ray's expected primary ``P`` and its unattenuated value
``P_air``. Scatter comes only from the photons an object takes out of the beam: a ray that
crosses nothing has ``P = P_air`` and a source of exactly zero, so the open beam beside the
object adds no scatter of its own (the kernel's tail still carries the object's scatter a
little way past its shadow).

``centre`` model
    ``s = P ln(P_air / P)`` and ``S = k_v (G * s)``. For a ray of optical depth
    ``tau = ln(P_air / P)`` the source is ``P_air tau exp(-tau)``: the photons scattered once
    along the ray (in proportion to ``tau``) that then leave the object about as attenuated as
    the primary. This is the weighting of the projection data by which Ohnesorge et al. (1999)
    build the scatter of a CT view from a spatially invariant scatter kernel (the
    ``(P / P_air)^alpha ln(P_air / P)^beta`` amplitude of Star-Lack et al. 2009 with
    ``alpha = beta = 1``). The factor ``k_v`` is chosen per view so that the scatter-to-primary
    ratio at the central cell (mean of the central one or two columns, and rows),
    ``S_c / P_c``, is the requested ``spr_at_centre`` (before the anti-scatter grid). It is
    capped so that the view's scatter never exceeds the photons its object removes,
    ``k_v sum(s) <= sum(P_air - P)``: a request beyond that (a thin object asked for a large
    SPR, or an object that misses the central ray) gets the most the object can scatter, and
    the views where that happened are counted in the measurement's record. A view whose rays
    cross nothing gets no scatter.
``thickness`` model
    ``s = P SPR_max (1 - exp(-t_w / t_0))`` and ``S = G * s``, with the water-equivalent
    thickness ``t_w = ln(P_air / P) / mu_water(E_eff)`` of each ray (``E_eff``: the
    signal-weighted mean energy of the unattenuated beam). Behind a uniform slab
    ``S / P = SPR_max (1 - exp(-t_w / t_0))``: the ratio grows with thickness and saturates,
    as measured scatter fractions do; the open beam (``t_w = 0``) has no source.

An anti-scatter grid multiplies S by its scatter transmission. The scatter of each energy bin
(or signal moment) follows the primary of that bin: the scatter spectrum is taken equal to the
local primary spectrum (Compton energy loss ignored).

References
----------
L. A. Love and R. A. Kruger, "Scatter estimation for a digital radiographic system using
convolution filtering", Med. Phys. 14, 178-185 (1987).
B. Ohnesorge, T. Flohr and K. Klingenbeck-Regn, "Efficient object scatter correction algorithm
for third and fourth generation CT scanners", Eur. Radiol. 9, 563-569 (1999).
J. Star-Lack et al., "Efficient scatter correction using asymmetric kernels", Proc. SPIE 7258
(2009).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

from simbench.measure.config import ScatterConfig
from simbench.measure.detector import FWHM_PER_SIGMA


def _radius_cells(fwhm_mm: float, pitch_mm: float) -> int:
    """Half-width in cells of the Gaussian kernel truncated at 3 sigma."""
    return int(3.0 * fwhm_mm / FWHM_PER_SIGMA / pitch_mm + 0.5)


def kernel_work_bytes(cell_shape: tuple[int, ...], fwhm_mm: float,
                      pitch_mm: tuple[float, float]) -> float:
    """Bytes of the work arrays that the scatter kernel needs for one projection.

    Parameters
    ----------
    cell_shape : (C,) or (R, C)
        Cells of one projection.
    fwhm_mm : float
        Kernel FWHM on the detector.
    pitch_mm : (float, float)
        Cell pitch along u and v.

    Returns
    -------
    float
        64 bytes (padded input, complex transforms and output) per cell of the largest
        padded array, the projection widened by twice the kernel's length along one axis.
    """
    worst = 0.0
    for i in range(len(cell_shape)):
        axis = len(cell_shape) - 1 - i  # u is the last axis, v the one before
        padded = [float(n) for n in cell_shape]
        padded[axis] += 4.0 * _radius_cells(fwhm_mm, pitch_mm[i]) + 1.0
        worst = max(worst, math.prod(padded))
    return 64.0 * worst


def _kernel(values: np.ndarray, fwhm_mm: float, pitch_mm: tuple[float, float],
            cell_axes: tuple[int, ...]) -> np.ndarray:
    """The broad Gaussian scatter kernel along each cell axis, truncated at 3 sigma.

    The same taps and edge rule as ``scipy.ndimage.gaussian_filter1d(mode="nearest",
    truncate=3.0)`` (edge cells repeated outward), computed by FFT convolution a few
    projections at a time: a kernel of tens of cells applied directly cost seconds per
    cone-beam scan, and one FFT over a whole scan would need gigabytes.
    """
    values = np.asarray(values, dtype=np.float64)
    axes = sorted(a % values.ndim for a in cell_axes)
    if axes != list(range(values.ndim - len(axes), values.ndim)):
        raise ValueError("the cell axes must be the last axes")
    kernels = []
    for i, axis in enumerate(cell_axes):
        sigma = fwhm_mm / FWHM_PER_SIGMA / pitch_mm[i]
        radius = _radius_cells(fwhm_mm, pitch_mm[i])
        if radius >= 1:
            x = np.arange(-radius, radius + 1)
            taps = np.exp(-0.5 * (x / sigma) ** 2)
            kernels.append((axis % values.ndim - values.ndim, taps / taps.sum()))
    if not kernels:
        return values.copy()
    lead = values.shape[:values.ndim - len(axes)]
    stack = values.reshape((-1,) + values.shape[len(lead):])
    out = np.empty_like(stack)
    per_item = kernel_work_bytes(stack.shape[1:], fwhm_mm, pitch_mm)
    step = max(1, int(64e6 // max(per_item, 1)))
    for start in range(0, stack.shape[0], step):
        part = stack[start:start + step]
        for axis, taps in kernels:
            pad = [(0, 0)] * part.ndim
            pad[axis] = (taps.size // 2, taps.size // 2)
            shape = [1] * part.ndim
            shape[axis] = taps.size
            part = signal.fftconvolve(np.pad(part, pad, mode="edge"), taps.reshape(shape),
                                      mode="valid", axes=part.ndim + axis)
        out[start:start + step] = part
    return out.reshape(values.shape)


def _centre(values: np.ndarray, cell_axes: tuple[int, ...]) -> np.ndarray:
    """Mean over the central one or two cells along each cell axis (axes kept)."""
    out = values
    for axis in cell_axes:
        n = out.shape[axis]
        out = np.take(out, range((n - 1) // 2, n // 2 + 1), axis=axis).mean(axis=axis,
                                                                             keepdims=True)
    return out


def spr_at_central_cell(scatter: np.ndarray, primary: np.ndarray,
                        cell_axes: tuple[int, ...]) -> np.ndarray:
    """Scatter-to-primary ratio at the central cell of each view.

    Parameters
    ----------
    scatter, primary : float64 (V, [R,] C)
        Expected scattered and primary signals.
    cell_axes : tuple of int
        Negative axes of u (and v).

    Returns
    -------
    float64 (V,)
        ``S_c / P_c``, each the mean over the central one or two cells along every cell axis
        (0 where the central primary is 0).
    """
    s = _centre(np.asarray(scatter, dtype=np.float64), cell_axes).reshape(-1)
    p = _centre(np.asarray(primary, dtype=np.float64), cell_axes).reshape(-1)
    out = np.zeros_like(s)
    np.divide(s, p, out=out, where=p > 0)
    return out


def scatter_source(primary: np.ndarray, signal: np.ndarray, air_signal: float,
                   config: ScatterConfig, mu_water_per_mm: float) -> np.ndarray:
    """Scatter source of every ray and output row (before the kernel and the scaling).

    Parameters
    ----------
    primary : float64 (B, V, [R,] C)
        Expected primary of each output row.
    signal : float64 (V, [R,] C)
        The primary signal (energy-integrating signal, or the sum of the photon-counting bins).
    air_signal : float
        ``signal`` with no object.
    config : ScatterConfig
        ``centre`` or ``thickness``.
    mu_water_per_mm : float
        Water's attenuation at the effective energy (thickness model).

    Returns
    -------
    float64, primary's shape
        ``P ln(P_air / P)`` (centre) or ``P SPR_max (1 - exp(-t_w / t_0))`` (thickness); zero
        where the ray crosses nothing and where its primary is zero.

    Notes
    -----
    The optical depth ``tau = ln(P_air / P)`` is taken from the signal, one value per ray,
    and floored at 0 (rounding may leave an open ray a hair above ``P_air``).
    """
    sig = np.asarray(signal, dtype=np.float64)
    lit = sig > 0
    tau = np.ones_like(sig)
    np.divide(air_signal, sig, out=tau, where=lit)
    np.log(tau, out=tau)
    np.maximum(tau, 0.0, out=tau)
    if config.model == "centre":
        weight = tau
    else:
        weight = config.max_spr * -np.expm1(-(tau / mu_water_per_mm) / config.thickness_scale_mm)
    weight[~lit] = 0.0
    return primary * weight[None]


def scatter_signal(primary: np.ndarray, signal_rows: np.ndarray, air_signal: float,
                   config: ScatterConfig, pitch_mm: tuple[float, float],
                   cell_axes: tuple[int, ...],
                   mu_water_per_mm: float) -> tuple[np.ndarray, dict]:
    """Expected scattered signal added to the primary.

    Parameters
    ----------
    primary : float64 (B, V, [R,] C)
        Expected primary of each output row (energy bin or signal moment).
    signal_rows : float64 (B,)
        The signal that defines the SPR is ``sum_b signal_rows[b] * primary[b]``: the
        energy-integrating signal row (``[0, 1, 0]``), or the sum of the photon-counting bins
        (ones).
    air_signal : float
        That signal with no object.
    config : ScatterConfig
    pitch_mm : (float, float)
        Cell pitch along u and v.
    cell_axes : tuple of int
        Negative axes of u (and v), counted from the end (the same in ``primary`` and in
        the signal).
    mu_water_per_mm : float
        Water's attenuation at the effective energy (thickness model).

    Returns
    -------
    scatter : float64, primary's shape
        ``S`` of each output row, after the anti-scatter grid.
    record : dict
        ``views_short_of_requested_spr``: views of the ``centre`` model whose requested SPR
        would need more scatter than the object removes (capped, see the module notes).

    Notes
    -----
    See the module docstring for the two models' formulas. The kernel is linear, so the
    blurred signal is the same combination of the blurred rows.
    """
    if config.model == "none":
        return np.zeros_like(primary), {}
    if any(a >= 0 for a in cell_axes):
        raise ValueError("cell_axes must be negative (counted from the end)")
    rows = np.asarray(signal_rows, dtype=np.float64)
    sig = np.tensordot(rows, primary, axes=1)
    source = scatter_source(primary, sig, air_signal, config, mu_water_per_mm)
    scatter = _kernel(source, config.kernel_fwhm_mm, pitch_mm, cell_axes)
    record = {}
    if config.model == "centre":
        cells = tuple(range(sig.ndim - len(cell_axes), sig.ndim))
        blurred_centre = _centre(np.tensordot(rows, scatter, axes=1), cell_axes)
        wanted = np.full(blurred_centre.shape, np.inf)
        np.divide(config.spr_at_centre * _centre(sig, cell_axes), blurred_centre,
                  out=wanted, where=blurred_centre > 0)
        total_source = np.tensordot(rows, source, axes=1).sum(axis=cells, keepdims=True)
        removed = np.maximum(air_signal - sig, 0.0).sum(axis=cells, keepdims=True)
        most = np.zeros_like(total_source)
        np.divide(removed, total_source, out=most, where=total_source > 0)
        scale = np.minimum(wanted, most)  # 0 where the view's rays cross nothing
        if config.spr_at_centre > 0:
            record["views_short_of_requested_spr"] = int(np.count_nonzero(
                (wanted > most) & (total_source > 0)))
        scatter *= scale[None]
    if config.grid_transmission != 1.0:
        scatter *= config.grid_transmission
    return scatter, record
