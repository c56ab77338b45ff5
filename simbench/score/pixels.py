"""Pixel errors of an image against the exact truth: RMSE, NRMSE, MAE, PSNR and SSIM.

Every function takes the image and the truth on the same grid (2-D ``(ny, nx)`` or 3-D
``(nz, ny, nx)``, mu in 1/mm or any other unit, the same for both) and optionally a boolean
``mask`` of the pixels to score (e.g. the field of view). Sums are taken in float64.

The *data range* that normalizes NRMSE and PSNR and sets the SSIM constants is, unless given,
the truth's ``max - min`` over the scored pixels (the mask when given, else the whole image).
A truth that is constant there has no range: pass ``data_range`` explicitly.

References
----------
Z. Wang and A. C. Bovik, "Mean squared error: love it or leave it?", IEEE Signal Process. Mag.
26(1), 98-117 (2009) (MSE, PSNR).
Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, "Image quality assessment: from error
visibility to structural similarity", IEEE Trans. Image Process. 13(4), 600-612 (2004) (SSIM).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from simbench.score import checks

#: SSIM's Gaussian window: standard deviation in pixels and truncation (Wang et al. 2004:
#: an 11-tap window of sigma 1.5; 3.5 sigma either side gives radius int(3.5 * 1.5 + 0.5) = 5)
SSIM_SIGMA = 1.5
SSIM_TRUNCATE = 3.5
#: SSIM's stabilizing constants C1 = (K1 L)^2, C2 = (K2 L)^2 (Wang et al. 2004)
SSIM_K1 = 0.01
SSIM_K2 = 0.03


def _pair(image, truth, mask, function: str):
    """Float64 image and truth of one shape, and the mask (or None)."""
    img = checks.real_array(image, function, "image")
    ref = checks.real_array(truth, function, "truth")
    checks.same_shape(img, ref, function, "image", "truth")
    if mask is not None:
        mask = checks.boolean_mask(mask, img.shape, function)
    return img, ref, mask


def _scored(values: np.ndarray, mask) -> np.ndarray:
    return values if mask is None else values[mask]


def _data_range(truth: np.ndarray, mask, data_range, function: str) -> float:
    if data_range is not None:
        return checks.positive(data_range, function, "data_range")
    scored = _scored(truth, mask)
    span = float(scored.max() - scored.min())
    if not span > 0:
        raise checks.fail(function, "truth", f"is constant ({float(scored.max()):.6g}) over the "
                          "scored pixels, so it has no data range",
                          "pass data_range=... explicitly")
    return span


def _mse(img: np.ndarray, ref: np.ndarray, mask) -> float:
    diff = _scored(img - ref, mask)
    return float(np.mean(diff * diff))


def rmse(image, truth, mask=None) -> float:
    """Root mean square error of an image against the truth.

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        The image and the exact truth on the same grid, in the same unit (e.g. mu, 1/mm).
    mask : bool array of the same shape, optional
        Pixels to score (e.g. the field of view); default all.

    Returns
    -------
    float
        RMSE in the image's unit.

    Notes
    -----
    ``RMSE = sqrt( (1/N) sum_i (image_i - truth_i)^2 )`` over the N scored pixels.

    References
    ----------
    Z. Wang and A. C. Bovik, IEEE Signal Process. Mag. 26(1), 98-117 (2009).

    Examples
    --------
    >>> rmse([[1.0, 2.0]], [[1.0, 4.0]])
    1.4142135623730951
    """
    img, ref, mask = _pair(image, truth, mask, "rmse")
    return math.sqrt(_mse(img, ref, mask))


def nrmse(image, truth, mask=None, data_range=None) -> float:
    """RMSE normalized by the truth's range (max - min).

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        Same grid, same unit.
    mask : bool array of the same shape, optional
        Pixels to score; default all.
    data_range : float, optional
        The normalizing range; default the truth's ``max - min`` over the scored pixels.

    Returns
    -------
    float
        Dimensionless NRMSE (multiply by 100 for percent).

    Notes
    -----
    ``NRMSE = RMSE / (max(truth) - min(truth))``, the "min-max" normalization. Other
    normalizations (by the mean or the Euclidean norm of the truth) give other numbers; this
    one is stated in every report.

    References
    ----------
    Z. Wang and A. C. Bovik, IEEE Signal Process. Mag. 26(1), 98-117 (2009) (the MSE).
    """
    img, ref, mask = _pair(image, truth, mask, "nrmse")
    span = _data_range(ref, mask, data_range, "nrmse")
    return math.sqrt(_mse(img, ref, mask)) / span


def mae(image, truth, mask=None) -> float:
    """Mean absolute error of an image against the truth.

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        Same grid, same unit.
    mask : bool array of the same shape, optional
        Pixels to score; default all.

    Returns
    -------
    float
        MAE in the image's unit.

    Notes
    -----
    ``MAE = (1/N) sum_i |image_i - truth_i|`` over the N scored pixels. Less sensitive to a
    few large errors (streaks, a misplaced edge) than the RMSE.

    References
    ----------
    Z. Wang and A. C. Bovik, IEEE Signal Process. Mag. 26(1), 98-117 (2009) (the l1 norm as
    the p = 1 Minkowski error).
    """
    img, ref, mask = _pair(image, truth, mask, "mae")
    return float(np.mean(np.abs(_scored(img - ref, mask))))


def psnr(image, truth, mask=None, data_range=None) -> float:
    """Peak signal-to-noise ratio of an image against the truth, in dB.

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        Same grid, same unit.
    mask : bool array of the same shape, optional
        Pixels to score; default all.
    data_range : float, optional
        The peak L; default the truth's ``max - min`` over the scored pixels.

    Returns
    -------
    float
        PSNR in dB; ``inf`` when the image equals the truth on the scored pixels.

    Notes
    -----
    ``PSNR = 10 log10(L^2 / MSE)`` with ``MSE = (1/N) sum_i (image_i - truth_i)^2``. It is a
    logarithmic RMSE relative to L, so it depends on the choice of L: compare PSNRs only
    with the same L (the report states it).

    References
    ----------
    Z. Wang and A. C. Bovik, IEEE Signal Process. Mag. 26(1), 98-117 (2009), eq. (2).
    """
    img, ref, mask = _pair(image, truth, mask, "psnr")
    peak = _data_range(ref, mask, data_range, "psnr")
    mse = _mse(img, ref, mask)
    if mse == 0.0:
        return math.inf
    return 10.0 * math.log10(peak * peak / mse)


def ssim_map(image, truth, data_range=None) -> np.ndarray:
    """The local structural similarity at every pixel (Wang et al. 2004).

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        Same grid, same unit; every axis at least 11 pixels long.
    data_range : float, optional
        The dynamic range L; default the truth's ``max - min``.

    Returns
    -------
    float64 array, the image's shape
        Local SSIM. The outer 5 pixels of each axis are affected by the reflected border;
        :func:`ssim` leaves them out.

    Notes
    -----
    With Gaussian-weighted local statistics (window sigma 1.5 pixels along every axis of the
    image, so a 3-D image gets a 3-D window; truncated at 3.5 sigma; borders reflected)
    ``mu_x = G * x``, ``sigma_x^2 = G * x^2 - mu_x^2``, ``sigma_xy = G * (x y) - mu_x mu_y``
    (population moments, as in the paper):

    ``SSIM = (2 mu_x mu_y + C1)(2 sigma_xy + C2) / ((mu_x^2 + mu_y^2 + C1)(sigma_x^2 +
    sigma_y^2 + C2))``, ``C1 = (0.01 L)^2``, ``C2 = (0.03 L)^2``.

    References
    ----------
    Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, IEEE Trans. Image Process. 13(4),
    600-612 (2004), eqs. (13) and (14) and section III-C.
    """
    img, ref, _ = _pair(image, truth, None, "ssim")
    return _ssim_map(img, ref, _data_range(ref, None, data_range, "ssim"))


def _window_radius() -> int:
    return int(SSIM_TRUNCATE * SSIM_SIGMA + 0.5)


def _ssim_map(img: np.ndarray, ref: np.ndarray, peak: float) -> np.ndarray:
    width = 2 * _window_radius() + 1
    if min(img.shape) < width:
        raise checks.fail("ssim", "image", f"shape {img.shape} has an axis shorter than the "
                          f"{width}-pixel SSIM window", f"every axis at least {width} pixels")

    def smooth(values):
        return ndimage.gaussian_filter(values, SSIM_SIGMA, truncate=SSIM_TRUNCATE,
                                       mode="reflect")

    mu_x, mu_y = smooth(img), smooth(ref)
    var_x = smooth(img * img) - mu_x * mu_x
    var_y = smooth(ref * ref) - mu_y * mu_y
    cov = smooth(img * ref) - mu_x * mu_y
    c1 = (SSIM_K1 * peak) ** 2
    c2 = (SSIM_K2 * peak) ** 2
    return ((2.0 * mu_x * mu_y + c1) * (2.0 * cov + c2)
            / ((mu_x * mu_x + mu_y * mu_y + c1) * (var_x + var_y + c2)))


def ssim(image, truth, mask=None, data_range=None) -> float:
    """Mean structural similarity (SSIM) of an image against the truth (Wang et al. 2004).

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        Same grid, same unit; every axis at least 11 pixels long.
    mask : bool array of the same shape, optional
        Pixels to score; default all. Pixels within 5 of the array's border are never scored
        (their window reaches past the image).
    data_range : float, optional
        The dynamic range L; default the truth's ``max - min`` over the scored pixels.

    Returns
    -------
    float
        Mean SSIM over the scored pixels, at most 1 (1 for an image equal to the truth).

    Notes
    -----
    The mean of :func:`ssim_map` (Gaussian window sigma 1.5 pixels, ``K1 = 0.01``,
    ``K2 = 0.03``) over the scored pixels away from the border. Without a mask this is
    scikit-image's ``structural_similarity(gaussian_weights=True, sigma=1.5,
    use_sample_covariance=False, data_range=L)``.

    References
    ----------
    Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, IEEE Trans. Image Process. 13(4),
    600-612 (2004), eqs. (13), (14) and (17).
    """
    img, ref, mask = _pair(image, truth, mask, "ssim")
    peak = _data_range(ref, mask, data_range, "ssim")
    local = _ssim_map(img, ref, peak)
    pad = _window_radius()
    inner = tuple(slice(pad, n - pad) for n in img.shape)
    if mask is None:
        return float(local[inner].mean(dtype=np.float64))
    inside = mask[inner]
    if not inside.any():
        raise checks.fail("ssim", "mask", f"has no pixels more than {pad} pixels from the "
                          "border", "a mask that reaches into the image's interior")
    return float(local[inner][inside].mean(dtype=np.float64))
