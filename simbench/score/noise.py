"""Noise: the noise power spectrum (NPS) from realizations, its radial average, noise magnitude.

The NPS tells how the noise variance is spread over spatial frequency: two images with the same
standard deviation but different NPS (fine grain against blotchy noise) hide different objects.
Its integral over frequency is the pixel variance.

References
----------
ICRU Report 54, "Medical imaging - the assessment of image quality" (1995) (the NPS, its
normalization and its estimate from ensembles of images).
ICRU Report 87, "Radiation dose and image-quality assessment in computed tomography",
J. ICRU 12(1) (2012) (the NPS in CT, detrending, radial averaging).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import fft

from simbench.geometry.grid import ImageGrid
from simbench.score import checks

#: ways to remove the deterministic part of each ROI before the NPS
DETRENDS = ("mean", "plane", "ensemble")
#: the smallest NPS ROI side, pixels
MIN_ROI_PIXELS = 4


@dataclass(frozen=True)
class NoisePowerSpectrum:
    """A 2-D noise power spectrum and its radial average.

    Attributes
    ----------
    nps : float64 (ny, nx)
        NPS in (image unit)^2 mm^2, zero frequency at the centre (``fft.fftshift`` order).
    fx_per_mm, fy_per_mm : float64 (nx,), (ny,)
        Frequencies of the columns and rows of ``nps``, cycles/mm, ascending.
    radial_frequencies_per_mm, radial_nps : float64 (K,)
        Radial average: the mean of ``nps`` over rings of ``|f|``, and the mean ``|f|`` in
        each ring, up to the lower Nyquist frequency of the two axes.
    variance : float
        The NPS's integral over frequency, ``sum(nps) dfx dfy`` (image unit squared): the
        variance of the detrended ROIs.
    realizations : int
        Number of ROIs averaged.
    spacing_mm : (dx, dy)
        Pixel spacing, mm.
    detrend : str
        How each ROI was detrended (one of ``DETRENDS``).
    """

    nps: np.ndarray
    fx_per_mm: np.ndarray
    fy_per_mm: np.ndarray
    radial_frequencies_per_mm: np.ndarray
    radial_nps: np.ndarray
    variance: float
    realizations: int
    spacing_mm: tuple
    detrend: str


def radial_average(values, fx_per_mm, fy_per_mm, bin_width_per_mm: float | None = None,
                   max_frequency_per_mm: float | None = None):
    """Average a 2-D spectrum over rings of equal radial frequency.

    Parameters
    ----------
    values : array (ny, nx)
        The spectrum, on any arrangement of frequencies (shifted or not).
    fx_per_mm, fy_per_mm : array (nx,), (ny,)
        The frequency of each column and row, cycles/mm.
    bin_width_per_mm : float, optional
        Ring width; default the coarser of the two frequency spacings.
    max_frequency_per_mm : float, optional
        Rings beyond it are dropped; default the lower of the two largest ``|f|`` along the axes.

    Returns
    -------
    frequencies, averages : float64 (K,)
        For every non-empty ring k (``|f|`` within half a width of ``k * width``), the mean
        ``|f|`` of its samples and the mean of ``values`` over them.

    Notes
    -----
    Ring k holds the samples with ``round(|f| / width) = k``. Reporting each ring at the mean
    ``|f|`` of its samples, not at its nominal centre, removes most of the bias of the
    innermost rings, whose few samples do not sit at the centre.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (radial averaging of the NPS and MTF).
    """
    function = "radial_average"
    spectrum = checks.real_array(values, function, "values", ndims=(2,))
    fx = checks.real_array(fx_per_mm, function, "fx_per_mm", ndims=(1,))
    fy = checks.real_array(fy_per_mm, function, "fy_per_mm", ndims=(1,))
    if spectrum.shape != (fy.size, fx.size):
        raise checks.fail(function, "values", f"shape {spectrum.shape} does not match "
                          f"{fy.size} row and {fx.size} column frequencies",
                          "values shaped (len(fy_per_mm), len(fx_per_mm))")
    return _radial_average(spectrum, fx, fy, bin_width_per_mm, max_frequency_per_mm)


def _spacing(frequencies: np.ndarray) -> float:
    steps = np.diff(np.sort(np.unique(frequencies)))
    return float(steps.min()) if steps.size else math.inf


def _radial_average(spectrum, fx, fy, width=None, f_max=None):
    if width is None:
        width = max(_spacing(fx), _spacing(fy))
        if not math.isfinite(width):
            width = 1.0
    if f_max is None:
        f_max = min(float(np.abs(fx).max()), float(np.abs(fy).max()))
    radius = np.hypot(fx[None, :], fy[:, None]).ravel()
    ring = np.rint(radius / width).astype(np.int64)
    keep = radius <= f_max * (1 + 1e-12)
    ring, radius, vals = ring[keep], radius[keep], spectrum.ravel()[keep]
    counts = np.bincount(ring)
    filled = counts > 0
    mean_f = np.bincount(ring, radius)[filled] / counts[filled]
    mean_v = np.bincount(ring, vals)[filled] / counts[filled]
    return mean_f, mean_v


def square_roi(grid: ImageGrid, centre_mm, size_px: int) -> tuple[slice, slice]:
    """The (rows, columns) slices of a square ROI of the x-y plane centred near a point.

    Parameters
    ----------
    grid : ImageGrid
    centre_mm : (x, y)
        Where the ROI should be centred, mm; the ROI starts at the pixel that puts its centre
        nearest this point.
    size_px : int
        Side of the ROI in pixels (>= 4).

    Returns
    -------
    (slice, slice)
        Index ``image[..., rows, cols]`` to cut the ROI from a 2-D or 3-D image.
    """
    function = "square_roi"
    if not isinstance(grid, ImageGrid):
        raise checks.fail(function, "grid", f"got {type(grid).__name__}",
                          "a simbench.geometry.grid.ImageGrid")
    cx, cy = checks.point(centre_mm, function, "centre_mm")
    if not isinstance(size_px, (int, np.integer)) or size_px < MIN_ROI_PIXELS:
        raise checks.fail(function, "size_px", f"got {size_px!r}",
                          f"an integer >= {MIN_ROI_PIXELS}")
    out = []
    for axis, c, n in (("y", cy, grid.shape[1]), ("x", cx, grid.shape[2])):
        d, o = grid.spacing_mm["xyz".index(axis)], grid.centre_mm["xyz".index(axis)]
        # pixel i sits at (i - (n-1)/2) d + o; the ROI's centre is at start + (size-1)/2
        start = int(round((c - o) / d + (n - 1) / 2.0 - (size_px - 1) / 2.0))
        if start < 0 or start + size_px > n:
            raise checks.fail(function, "centre_mm", f"a {size_px}-pixel ROI at {(cx, cy)} mm "
                              f"leaves the grid along {axis}", "a ROI inside the image")
        out.append(slice(start, start + size_px))
    return out[0], out[1]


def _detrended(rois: np.ndarray, detrend: str) -> np.ndarray:
    """Each ROI minus its deterministic part (and always minus its own mean)."""
    data = rois
    if detrend == "ensemble":
        data = data - data.mean(axis=0, keepdims=True)
    if detrend == "plane":
        n, ny, nx = data.shape
        y, x = np.meshgrid(np.arange(ny) - (ny - 1) / 2.0, np.arange(nx) - (nx - 1) / 2.0,
                           indexing="ij")
        design = np.column_stack([np.ones(ny * nx), x.ravel(), y.ravel()])
        coef, *_ = np.linalg.lstsq(design, data.reshape(n, -1).T, rcond=None)
        return data - (design @ coef).T.reshape(n, ny, nx)
    return data - data.mean(axis=(1, 2), keepdims=True)


def noise_power_spectrum(rois, spacing_mm, detrend: str = "mean") -> NoisePowerSpectrum:
    """The 2-D noise power spectrum from ROIs of several noise realizations, and its radial mean.

    Parameters
    ----------
    rois : array (n, ny, nx)
        n ROIs of the same size (from several realizations, and/or several places of one
        uniform region), in any linear unit (1/mm or HU). :func:`square_roi` cuts them.
    spacing_mm : (dx, dy)
        Pixel spacing along x (columns) and y (rows), mm.
    detrend : {"mean", "plane", "ensemble"}
        What is removed from each ROI before its transform: ``"mean"`` its own mean;
        ``"plane"`` its least-squares plane ``a + b x + c y`` (slow trends such as cupping);
        ``"ensemble"`` the pixel-wise mean over the n ROIs (any deterministic structure:
        edges, streaks, cupping; needs the ROIs of the same place in n >= 2 realizations)
        and then its own mean, with the result scaled by ``n / (n - 1)`` for the degree of
        freedom the ensemble mean removes.

    Returns
    -------
    NoisePowerSpectrum

    Notes
    -----
    ``NPS(fx, fy) = (dx dy / (Nx Ny)) < |DFT(roi - trend)(fx, fy)|^2 >`` averaged over the
    ROIs, at ``fx = k / (Nx dx)``, ``fy = l / (Ny dy)``. By Parseval's theorem,
    ``sum NPS dfx dfy`` (``dfx = 1 / (Nx dx)``, ``dfy = 1 / (Ny dy)``) equals the mean
    squared detrended pixel value, the pixel variance. White noise of variance s^2 has the
    flat spectrum ``NPS = s^2 dx dy``. Mean subtraction leaves ``NPS(0, 0) = 0``.

    References
    ----------
    ICRU Report 54 (1995), the NPS of a digital image and its normalization.
    ICRU Report 87, J. ICRU 12(1) (2012), the NPS in CT.
    """
    function = "noise_power_spectrum"
    data = checks.real_array(rois, function, "rois", ndims=(3,))
    n, ny, nx = data.shape
    if min(ny, nx) < MIN_ROI_PIXELS:
        raise checks.fail(function, "rois", f"ROIs of {ny} x {nx} pixels",
                          f"ROIs at least {MIN_ROI_PIXELS} x {MIN_ROI_PIXELS} pixels")
    try:
        dx, dy = (checks.positive(s, function, "spacing_mm") for s in spacing_mm)
    except TypeError:
        raise checks.fail(function, "spacing_mm", f"got {spacing_mm!r}",
                          "(dx, dy) in mm") from None
    if detrend not in DETRENDS:
        raise checks.fail(function, "detrend", f"got {detrend!r}", ", ".join(DETRENDS))
    if detrend == "ensemble" and n < 2:
        raise checks.fail(function, "rois", "one ROI has no ensemble to subtract",
                          "n >= 2 realizations of the same ROI, or detrend='mean'")
    residual = _detrended(data, detrend)
    power = np.abs(fft.fft2(residual, workers=1)) ** 2
    nps = power.mean(axis=0) * (dx * dy / (nx * ny))
    if detrend == "ensemble":
        nps *= n / (n - 1.0)
    nps = fft.fftshift(nps)
    fx = fft.fftshift(fft.fftfreq(nx, dx))
    fy = fft.fftshift(fft.fftfreq(ny, dy))
    f_max = min(0.5 / dx, 0.5 / dy)
    radial_f, radial = _radial_average(nps, fx, fy, max(1 / (nx * dx), 1 / (ny * dy)), f_max)
    variance = float(nps.sum() / (nx * dx * ny * dy))
    return NoisePowerSpectrum(nps, fx, fy, radial_f, radial, variance, n, (dx, dy), detrend)


def noise_std(image, mask=None) -> float:
    """Noise magnitude of one image: the standard deviation of its pixels in a region.

    Parameters
    ----------
    image : array (ny, nx) or (nz, ny, nx)
    mask : bool array of the same shape, optional
        The region (a uniform part of the object); default all pixels.

    Returns
    -------
    float
        Sample standard deviation (``ddof = 1``), image unit.

    Notes
    -----
    ``std = sqrt(sum (x_i - mean)^2 / (N - 1))``. Any structure in the region (cupping,
    streaks) adds to it; :func:`ensemble_noise_std` measures noise alone.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (image noise as the standard deviation in a ROI).
    """
    function = "noise_std"
    img = checks.real_array(image, function, "image")
    values = img if mask is None else img[checks.boolean_mask(mask, img.shape, function)]
    if values.size < 2:
        raise checks.fail(function, "mask", "has one pixel", "a region of at least two pixels")
    return float(np.std(values, ddof=1))


def ensemble_noise_std(realizations, mask=None) -> float:
    """Noise magnitude from realizations: the root mean pixel variance across realizations.

    Parameters
    ----------
    realizations : array (n, ny, nx) or (n, nz, ny, nx)
        n >= 2 images of the same object with independent noise.
    mask : bool array of one image's shape, optional
        Pixels to average over; default all.

    Returns
    -------
    float
        ``sqrt( mean over pixels of var_i )``, image unit.

    Notes
    -----
    ``var_i = sum_r (x_ri - xbar_i)^2 / (n - 1)``, the sample variance of pixel i over the n
    realizations; the deterministic image (edges, streaks, cupping) cancels in it, so this
    is the noise alone, even where the object is not uniform.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (noise from repeated scans).
    """
    function = "ensemble_noise_std"
    data = checks.real_array(realizations, function, "realizations", ndims=(3, 4))
    if data.shape[0] < 2:
        raise checks.fail(function, "realizations", "holds one image",
                          "n >= 2 realizations stacked along the first axis")
    variance = np.var(data, axis=0, ddof=1)
    if mask is not None:
        variance = variance[checks.boolean_mask(mask, data.shape[1:], function)]
    return float(math.sqrt(variance.mean()))
