"""Spatial resolution: the task transfer function (TTF) from a circular insert's edge, and the
modulation transfer function (MTF) from a wire (a point-like object).

Both return a :class:`TransferFunction` normalized to 1 at zero frequency, with the
frequencies (cycles/mm) at which it first falls to 50 % and to 10 %.

The TTF is measured on the object the user cares about, at its own contrast and in its own
noise, so it describes a non-linear reconstruction (iterative, regularized) where a single
MTF does not; the wire MTF is the classic system figure for linear reconstructions.

References
----------
S. Richard, D. B. Husarik, G. Yadava, S. N. Murphy and E. Samei, "Towards task-based
assessment of CT performance: system and object MTF across different reconstruction
algorithms", Med. Phys. 39(7), 4115-4122 (2012).
ICRU Report 87, "Radiation dose and image-quality assessment in computed tomography",
J. ICRU 12(1) (2012).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import fft, special

from simbench.geometry.grid import ImageGrid
from simbench.score import checks
from simbench.score.noise import radial_average

#: default radial bin of the edge-spread function, as a fraction of a pixel
BIN_FRACTION = 0.1
#: the transfer function is sampled at least this finely, in cycles per pixel
FREQUENCY_STEP_PER_PIXEL = 0.01
#: wire MTF: frequencies where the wire's own transform is below this are not reported
WIRE_TRANSFORM_FLOOR = 0.1
#: LSF windows on offer
WINDOWS = (None, "hann")


@dataclass(frozen=True)
class TransferFunction:
    """A radial transfer function (TTF or MTF), 1 at zero frequency.

    Attributes
    ----------
    kind : str
        ``"TTF"`` or ``"MTF"``.
    frequencies_per_mm : float64 (K,)
        Spatial frequencies, cycles/mm, ascending from 0.
    values : float64 (K,)
        The transfer function at those frequencies.
    f50_per_mm, f10_per_mm : float
        The frequencies where it first falls to 0.5 and to 0.1 (linear interpolation between
        samples); NaN when it does not fall that far within ``frequencies_per_mm``.
    esf_radius_mm, esf : float64 (B,) or None
        TTF only: the radial edge-spread function (mean pixel value against distance from the
        insert's centre, bin centres in mm).
    contrast : float or None
        TTF only: the edge's contrast, insert minus background (image unit), from the ends
        of the ESF. A TTF is only as good as this is large against the noise.
    """

    kind: str
    frequencies_per_mm: np.ndarray
    values: np.ndarray
    f50_per_mm: float
    f10_per_mm: float
    esf_radius_mm: np.ndarray | None = None
    esf: np.ndarray | None = None
    contrast: float | None = None

    def at(self, frequencies_per_mm) -> np.ndarray:
        """The transfer function at other frequencies (linear interpolation, 0 beyond the end)."""
        return np.interp(np.abs(np.asarray(frequencies_per_mm, np.float64)),
                         self.frequencies_per_mm, self.values, right=0.0)


def frequency_at(frequencies_per_mm, values, level: float) -> float:
    """The frequency where a falling transfer function first reaches ``level``.

    Parameters
    ----------
    frequencies_per_mm : array (K,)
        Ascending frequencies, cycles/mm.
    values : array (K,)
        The transfer function there (1 at zero frequency).
    level : float
        The level, e.g. 0.5 or 0.1 (0 < level < 1).

    Returns
    -------
    float
        ``f`` with ``T(f) = level`` by linear interpolation between the last sample above and
        the first sample at or below ``level``; NaN if no sample falls that low.
    """
    function = "frequency_at"
    f = checks.real_array(frequencies_per_mm, function, "frequencies_per_mm", ndims=(1,))
    t = checks.real_array(values, function, "values", ndims=(1,))
    if f.shape != t.shape:
        raise checks.fail(function, "values", f"{t.size} values for {f.size} frequencies",
                          "one value per frequency")
    level = checks.positive(level, function, "level")
    if not level < 1:
        raise checks.fail(function, "level", f"got {level}", "0 < level < 1")
    return _crossing(f, t, level)


def _crossing(f: np.ndarray, t: np.ndarray, level: float) -> float:
    below = np.flatnonzero(t <= level)
    if below.size == 0:
        return math.nan
    i = int(below[0])
    if i == 0:
        return float(f[0])
    t0, t1 = t[i - 1], t[i]
    return float(f[i - 1] + (f[i] - f[i - 1]) * (t0 - level) / (t0 - t1))


def _transfer(kind, f, t, **extra) -> TransferFunction:
    return TransferFunction(kind, f, t, _crossing(f, t, 0.5), _crossing(f, t, 0.1), **extra)


def ttf_circular_insert(image, grid: ImageGrid, centre_mm, radius_mm: float,
                        half_width_mm: float | None = None, bin_fraction: float = BIN_FRACTION,
                        window: str | None = None) -> TransferFunction:
    """Task transfer function from the edge of a circular insert (Richard et al. 2012).

    Parameters
    ----------
    image : array (ny, nx)
        The image (one axial slice), any linear unit.
    grid : ImageGrid
        The image's grid (a 3-D grid's x-y plane for a slice of it).
    centre_mm : (x, y)
        Centre of the insert, mm (from the phantom).
    radius_mm : float
        Radius of the insert, mm.
    half_width_mm : float, optional
        The edge-spread function is taken from ``radius - w`` to ``radius + w`` (clipped at 0);
        default ``w = radius``, a region twice the insert's diameter. It must reach the
        plateaus on both sides of the blurred edge and stay clear of other objects; the circle
        of radius ``radius + w`` must lie in the image.
    bin_fraction : float
        Radial bin width as a fraction of the smaller pixel spacing (default 0.1: the edge is
        oversampled ten times, since pixel centres fall at all distances from the centre).
    window : {None, "hann"}
        Optional Hann window over the line-spread function, centred on the edge, to damp the
        noise of its tails; it also changes the TTF slightly (leave it off for noise-free
        images).

    Returns
    -------
    TransferFunction
        ``kind="TTF"``, from 0 to ``1 / min(dx, dy)`` cycles/mm (twice the grid's Nyquist
        frequency: the oversampled edge resolves beyond it), with the ESF and the contrast.

    Notes
    -----
    1. Radial edge-spread function: with ``r_i`` the distance of pixel i's centre from the
       insert's centre, ``ESF(r_b)`` is the mean of the pixels with ``r_i`` in bin b (width
       ``bin_fraction * min(dx, dy)``); empty bins are filled by linear interpolation.
    2. Line-spread function ``LSF = d ESF / dr`` (finite difference between bins), optionally
       times a Hann window.
    3. ``TTF(f) = |F[LSF](f)| / |F[LSF](0)|``, the discrete Fourier transform of the LSF
       zero-padded so that frequencies are at most 0.01 cycles/pixel apart.

    The radial profile of a blurred disc equals a blurred straight edge up to terms of order
    (blur / radius)^2, so the insert should be several blur widths in radius. For an
    isotropic Gaussian blur of standard deviation sigma, ``TTF(f) = exp(-2 pi^2 sigma^2
    f^2)``. The TTF of a non-linear reconstruction depends on the insert's contrast and the
    noise: state both with it.

    References
    ----------
    S. Richard et al., Med. Phys. 39(7), 4115-4122 (2012), section II.B (TTF from the radial
    ESF of circular inserts).
    ICRU Report 87, J. ICRU 12(1) (2012) (edge methods and the TTF).
    """
    function = "ttf_circular_insert"
    img = checks.real_array(image, function, "image", ndims=(2,))
    checks.plane_grid(grid, img, function)
    centre = checks.point(centre_mm, function, "centre_mm")
    radius = checks.positive(radius_mm, function, "radius_mm")
    width = radius if half_width_mm is None else checks.positive(half_width_mm, function,
                                                                 "half_width_mm")
    fraction = checks.positive(bin_fraction, function, "bin_fraction")
    if fraction > 1:
        raise checks.fail(function, "bin_fraction", f"got {fraction}",
                          "0 < bin_fraction <= 1 (a fraction of a pixel)")
    if window not in WINDOWS:
        raise checks.fail(function, "window", f"got {window!r}", "None or 'hann'")
    dx, dy = float(grid.spacing_mm[0]), float(grid.spacing_mm[1])
    xmin, xmax, ymin, ymax = grid.extent_mm()
    reach = radius + width
    if (centre[0] - reach < xmin or centre[0] + reach > xmax or centre[1] - reach < ymin
            or centre[1] + reach > ymax):
        raise checks.fail(function, "half_width_mm", f"the circle of radius {reach:.6g} mm "
                          f"about {centre} mm leaves the image",
                          "an insert, and a region about its edge, inside the image")
    step = fraction * min(dx, dy)
    r_lo = max(0.0, radius - width)
    n_bins = int(math.ceil((reach - r_lo) / step))
    if n_bins < 8:
        raise checks.fail(function, "half_width_mm", f"gives {n_bins} radial bins",
                          "a region several bins wide about the edge")
    r = checks.planar_radius_mm(grid, centre).ravel()
    index = np.floor((r - r_lo) / step).astype(np.int64)
    keep = (r >= r_lo) & (index < n_bins)
    index, values = index[keep], img.ravel()[keep]
    counts = np.bincount(index, minlength=n_bins)
    sums = np.bincount(index, values, minlength=n_bins)
    centres = r_lo + (np.arange(n_bins) + 0.5) * step
    filled = counts > 0
    if filled.sum() < 2 or not (centres[filled].min() < radius < centres[filled].max()):
        raise checks.fail(function, "radius_mm", "too few pixels on both sides of the edge",
                          "an insert several pixels across, inside the image")
    esf = np.interp(centres, centres[filled], sums[filled] / counts[filled])
    lsf = np.diff(esf) / step
    if window == "hann":
        # centred on the edge, reaching the ends of the shorter side
        offset = (centres[:-1] + step / 2) - radius
        reach_w = min(radius - r_lo, reach - radius)
        lsf = lsf * np.where(np.abs(offset) < reach_w,
                             0.5 * (1 + np.cos(np.pi * offset / reach_w)), 0.0)
    n_fft = fft.next_fast_len(max(2 * lsf.size,
                                  int(math.ceil(1.0 / (FREQUENCY_STEP_PER_PIXEL * fraction)))))
    spectrum = np.abs(fft.rfft(lsf, n_fft))
    if not spectrum[0] > 0:
        raise checks.fail(function, "image", "shows no edge at the insert (zero contrast)",
                          "an insert whose value differs from its surroundings")
    freqs = fft.rfftfreq(n_fft, step)
    inside = freqs <= 1.0 / min(dx, dy) * (1 + 1e-12)
    ends = max(1, n_bins // 10)
    contrast = float(esf[:ends].mean() - esf[-ends:].mean())
    return _transfer("TTF", freqs[inside], spectrum[inside] / spectrum[0],
                     esf_radius_mm=centres, esf=esf, contrast=contrast)


def _disc_transform(diameter_mm: float, f: np.ndarray) -> np.ndarray:
    """``2 J1(pi d f) / (pi d f)``: the Fourier transform of a disc of diameter d, 1 at f = 0."""
    x = np.pi * diameter_mm * np.asarray(f, np.float64)
    out = np.ones_like(x)
    nonzero = x != 0
    out[nonzero] = 2.0 * special.j1(x[nonzero]) / x[nonzero]
    return out


def mtf_wire(image, grid: ImageGrid, centre_mm, half_size_mm: float | None = None,
             wire_diameter_mm: float | None = None) -> TransferFunction:
    """Modulation transfer function from the image of a wire (a point-like object).

    Parameters
    ----------
    image : array (ny, nx)
        The image (one axial slice), any linear unit.
    grid : ImageGrid
        The image's grid (a 3-D grid's x-y plane for a slice of it).
    centre_mm : (x, y)
        Position of the wire, mm. The square ROI is centred on the nearest pixel.
    half_size_mm : float, optional
        Half the ROI's side, mm; default 16 pixels (a 33 x 33 ROI). It must hold the whole
        point-spread function and nothing else.
    wire_diameter_mm : float, optional
        The wire's diameter: its own transform ``2 J1(pi d f) / (pi d f)`` is divided out, and
        frequencies where that falls below 0.1 are not reported. Default: treat the wire as
        a point.

    Returns
    -------
    TransferFunction
        ``kind="MTF"``, from 0 to the lower Nyquist frequency ``min(1/(2 dx), 1/(2 dy))``.

    Notes
    -----
    ``PSF = ROI - b``, with b the mean of the ROI's outermost ring of pixels (the background);
    ``MTF(f) = radial mean of |DFT(PSF)| / |DFT(PSF)(0)|``, the 2-D transform zero-padded to
    at least 4 times the ROI and averaged over rings of ``|f|`` (see
    :func:`simbench.score.noise.radial_average`). A wire samples the point-spread function
    at the pixel rate, so a PSF narrower than about two pixels aliases and the MTF near the
    Nyquist frequency reads high; the edge methods oversample and do not.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (MTF from a wire or bead).
    """
    function = "mtf_wire"
    img = checks.real_array(image, function, "image", ndims=(2,))
    checks.plane_grid(grid, img, function)
    cx, cy = checks.point(centre_mm, function, "centre_mm")
    dx, dy = float(grid.spacing_mm[0]), float(grid.spacing_mm[1])
    half = 16.0 * max(dx, dy) if half_size_mm is None else checks.positive(
        half_size_mm, function, "half_size_mm")
    diameter = None if wire_diameter_mm is None else checks.positive(
        wire_diameter_mm, function, "wire_diameter_mm")
    ix = int(round((cx - grid.centre_mm[0]) / dx + (img.shape[1] - 1) / 2.0))
    iy = int(round((cy - grid.centre_mm[1]) / dy + (img.shape[0] - 1) / 2.0))
    hx, hy = int(round(half / dx)), int(round(half / dy))
    if min(hx, hy) < 2:
        raise checks.fail(function, "half_size_mm", f"gives a ROI of {2 * hx + 1} x "
                          f"{2 * hy + 1} pixels", "a ROI at least 5 pixels wide")
    if iy - hy < 0 or ix - hx < 0 or iy + hy >= img.shape[0] or ix + hx >= img.shape[1]:
        raise checks.fail(function, "centre_mm", f"a ROI of half size {half:.6g} mm at "
                          f"{(cx, cy)} mm leaves the image", "a wire and its ROI inside the image")
    roi = img[iy - hy:iy + hy + 1, ix - hx:ix + hx + 1]
    border = np.concatenate([roi[0], roi[-1], roi[1:-1, 0], roi[1:-1, -1]])
    psf = roi - border.mean()
    total = float(psf.sum())
    if not abs(total) > 0:
        raise checks.fail(function, "image", "shows no wire above the background at "
                          f"{(cx, cy)} mm", "the position of a point-like object")
    ny, nx = fft.next_fast_len(max(4 * psf.shape[0], 128)), fft.next_fast_len(
        max(4 * psf.shape[1], 128))
    spectrum = np.abs(fft.fft2(psf, (ny, nx), workers=1)) / abs(total)
    fx, fy = fft.fftfreq(nx, dx), fft.fftfreq(ny, dy)
    f_max = min(0.5 / dx, 0.5 / dy)
    f, mtf = radial_average(spectrum, fx, fy, max(1 / (nx * dx), 1 / (ny * dy)), f_max)
    f[0], mtf[0] = 0.0, 1.0  # normalized at zero frequency (the innermost ring sits there)
    if diameter is not None:
        own = _disc_transform(diameter, f)
        keep = np.cumprod(own >= WIRE_TRANSFORM_FLOOR).astype(bool)
        f, mtf = f[keep], mtf[keep] / own[keep]
    return _transfer("MTF", f, mtf)
