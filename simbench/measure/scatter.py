"""Scatter: a convolution-kernel approximation of the scattered photons reaching the detector.

This is an *approximation* meant to produce realistic low-frequency scatter (cupping, streaks
between dense objects, lowered contrast), not a transport simulation. The scattered signal of a
view is a broad Gaussian kernel ``G`` (FWHM on the detector, normalised to unit sum) applied to a
scatter source built from the expected primary signal ``P`` of that view:

``centre`` model
    ``S = k_v * (G * P)`` with ``k_v`` chosen per view so that the scatter-to-primary ratio
    ``S / P`` at the central cell (mean of the central one or two columns, and rows) is the
    requested ``spr_at_centre``.
``thickness`` model
    ``S = G * (P * SPR_max * (1 - exp(-t_w / t_0)))`` with the water-equivalent thickness
    ``t_w = ln(P_air / P) / mu_water(E_eff)`` of each ray (``E_eff``: the signal-weighted mean
    energy of the unattenuated beam). Behind a uniform slab, ``S / P = SPR_max (1 - exp(-t_w /
    t_0))``: the ratio grows with thickness and saturates, as measured scatter fractions do.

An anti-scatter grid multiplies S by its scatter transmission. The scatter of each energy bin
(or signal moment) follows the primary of that bin: the scatter spectrum is taken equal to the
local primary spectrum (Compton energy loss ignored).

References
----------
L. A. Love and R. A. Kruger, "Scatter estimation for a digital radiographic system using
convolution filtering", Med. Phys. 14, 178-185 (1987).
B. Ohnesorge, T. Flohr and K. Klingenbeck-Regn, "Efficient object scatter correction algorithm
for third and fourth generation CT scanners", Eur. Radiol. 9, 563-569 (1999).
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from simbench.measure.config import ScatterConfig
from simbench.measure.detector import FWHM_PER_SIGMA


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
        radius = int(3.0 * sigma + 0.5)
        if radius >= 1:
            x = np.arange(-radius, radius + 1)
            taps = np.exp(-0.5 * (x / sigma) ** 2)
            kernels.append((axis % values.ndim - values.ndim, taps / taps.sum()))
    if not kernels:
        return values.copy()
    lead = values.shape[:values.ndim - len(axes)]
    stack = values.reshape((-1,) + values.shape[len(lead):])
    out = np.empty_like(stack)
    per_item = stack[0].size * 16 * 4  # complex work arrays of one projection, padded
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


def scatter_signal(primary: np.ndarray, signal: np.ndarray, air_signal: float,
                   config: ScatterConfig, pitch_mm: tuple[float, float],
                   cell_axes: tuple[int, ...], mu_water_per_mm: float) -> np.ndarray:
    """Expected scattered signal added to the primary.

    Parameters
    ----------
    primary : float64 (B, V, [R,] C)
        Expected primary of each output row (energy bin or signal moment).
    signal : float64 (V, [R,] C)
        The primary signal that defines the SPR (energy-integrating signal, or the sum of the
        photon-counting bins).
    air_signal : float
        ``signal`` with no object.
    config : ScatterConfig
    pitch_mm : (float, float)
        Cell pitch along u and v.
    cell_axes : tuple of int
        Axes of u (and v) in ``signal`` (negative axes count from the end in both arrays).
    mu_water_per_mm : float
        Water's attenuation at the effective energy (thickness model).

    Returns
    -------
    float64, primary's shape
    """
    if config.model == "none":
        return np.zeros_like(primary)
    rows = tuple(a if a < 0 else a + 1 for a in cell_axes)  # same axes in ``primary``
    if config.model == "centre":
        blurred = _kernel(primary, config.kernel_fwhm_mm, pitch_mm, rows)
        blurred_signal = _kernel(signal, config.kernel_fwhm_mm, pitch_mm, cell_axes)
        scale = config.spr_at_centre * _centre(signal, cell_axes) / np.maximum(
            _centre(blurred_signal, cell_axes), 1e-300)
        return blurred * scale[None] * config.grid_transmission
    ratio = np.clip(signal / air_signal, 1e-300, None)
    thickness_mm = np.maximum(-np.log(ratio), 0.0) / mu_water_per_mm
    weight = config.max_spr * -np.expm1(-thickness_mm / config.thickness_scale_mm)
    return _kernel(primary * weight[None], config.kernel_fwhm_mm, pitch_mm, rows) \
        * config.grid_transmission
