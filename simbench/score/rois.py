"""Statistics in regions of interest: mean, bias, noise, CT numbers (HU), CNR, uniformity, cupping.

A region is given either as a ROI label of the phantom's label map (an int k > 0 with
``labels``, the integer map made by :func:`simbench.phantom.label_map`: 0 background, k the
k-th ROI, named ``phantom.roi_names[k - 1]``) or as a boolean mask on the image's grid
(:func:`disc_mask` and :func:`annulus_mask` make masks from positions in mm). A label map made
with ``supersample > 1`` keeps only pixels wholly inside each ROI, so partial volume at the
ROI's rim does not enter its statistics.

Standard deviations are sample standard deviations (``ddof = 1``).

References
----------
ICRU Report 87, "Radiation dose and image-quality assessment in computed tomography",
J. ICRU 12(1) (2012) (CT number, noise, uniformity and contrast-to-noise in CT image quality).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from simbench.geometry.grid import ImageGrid
from simbench.score import checks


def _hu_scale(mu_water, mu_air, function: str) -> tuple[float, float]:
    """(mu_water, mu_air) checked: 0 <= mu_air < mu_water."""
    water = checks.positive(mu_water, function, "mu_water")
    air = checks.finite(mu_air, function, "mu_air")
    if not 0.0 <= air < water:
        raise checks.fail(function, "mu_air", f"got {air!r} with mu_water {water!r}",
                          "0 <= mu_air < mu_water (both in 1/mm at the stated energy)")
    return water, air


def hounsfield(mu, mu_water, mu_air):
    """CT numbers in Hounsfield units from linear attenuation coefficients.

    Parameters
    ----------
    mu : float or array
        Linear attenuation coefficients, 1/mm.
    mu_water, mu_air : float
        mu of water and of air at the same (stated) energy, 1/mm; ``0 <= mu_air < mu_water``.

    Returns
    -------
    float or float64 array
        CT numbers in HU (water 0, air -1000).

    Notes
    -----
    ``HU = 1000 (mu - mu_water) / (mu_water - mu_air)``. The scale is linear, so a difference
    of mu values ``d_mu`` is ``1000 d_mu / (mu_water - mu_air)`` HU, and a standard deviation
    scales the same way.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (definition of the CT number).

    Examples
    --------
    >>> hounsfield(0.0, mu_water=0.02, mu_air=0.0)
    -1000.0
    """
    water, air = _hu_scale(mu_water, mu_air, "hounsfield")
    values = np.asarray(mu, dtype=np.float64)
    out = 1000.0 * (values - water) / (water - air)
    return float(out) if out.ndim == 0 else out


def disc_mask(grid: ImageGrid, centre_mm, radius_mm: float) -> np.ndarray:
    """Pixels whose centres lie within a circle of the x-y plane.

    Parameters
    ----------
    grid : ImageGrid
    centre_mm : (x, y)
        Centre of the circle, mm.
    radius_mm : float
        Radius, mm (> 0).

    Returns
    -------
    bool array, ``grid.image_shape``
        True where ``(x - cx)^2 + (y - cy)^2 <= r^2``; a 3-D grid repeats the disc on every
        slice (a cylinder along z).
    """
    return _ring(grid, centre_mm, 0.0, radius_mm, "disc_mask", "radius_mm")


def annulus_mask(grid: ImageGrid, centre_mm, inner_mm: float, outer_mm: float) -> np.ndarray:
    """Pixels whose centres lie in a ring ``inner <= r <= outer`` of the x-y plane.

    Parameters
    ----------
    grid : ImageGrid
    centre_mm : (x, y)
        Centre of the ring, mm.
    inner_mm, outer_mm : float
        Inner and outer radius, mm, ``0 <= inner < outer``.

    Returns
    -------
    bool array, ``grid.image_shape``
        A 3-D grid repeats the ring on every slice.
    """
    return _ring(grid, centre_mm, inner_mm, outer_mm, "annulus_mask", "outer_mm")


def _ring(grid, centre_mm, inner_mm, outer_mm, function: str, outer_field: str) -> np.ndarray:
    if not isinstance(grid, ImageGrid):
        raise checks.fail(function, "grid", f"got {type(grid).__name__}",
                          "a simbench.geometry.grid.ImageGrid")
    centre = checks.point(centre_mm, function, "centre_mm")
    outer = checks.positive(outer_mm, function, outer_field)
    inner = checks.finite(inner_mm, function, "inner_mm")
    if not 0.0 <= inner < outer:
        raise checks.fail(function, "inner_mm", f"got {inner!r} with outer_mm {outer!r}",
                          "0 <= inner_mm < outer_mm")
    r = checks.planar_radius_mm(grid, centre)
    ring = (r >= inner) & (r <= outer)
    if grid.dimension == 2:
        return ring
    return np.broadcast_to(ring, grid.image_shape).copy()


@dataclass(frozen=True)
class RoiStatistics:
    """Statistics of one ROI.

    Attributes
    ----------
    label : int
        The ROI's label (0 for a region given as a mask).
    pixels : int
        Number of pixels in the ROI.
    mean, std : float
        Mean and sample standard deviation of the image in the ROI (image unit, e.g. 1/mm).
    truth_mean : float or None
        Mean of the truth in the ROI (None without a truth).
    bias : float or None
        ``mean - truth_mean`` (image unit).
    mean_hu, std_hu, bias_hu : float or None
        The same in HU (None unless ``mu_water`` and ``mu_air`` were given).
    """

    label: int
    pixels: int
    mean: float
    std: float
    truth_mean: float | None = None
    bias: float | None = None
    mean_hu: float | None = None
    std_hu: float | None = None
    bias_hu: float | None = None

    def as_dict(self) -> dict:
        """The fields as a plain dict (for JSON)."""
        return dataclasses.asdict(self)


def _std(values: np.ndarray) -> float:
    return float(np.std(values, ddof=1)) if values.size > 1 else math.nan


def roi_statistics(image, labels, truth=None, mu_water=None, mu_air=None
                   ) -> dict[int, RoiStatistics]:
    """Mean, noise, bias and CT numbers of every ROI of a label map.

    Parameters
    ----------
    image : array (ny, nx) or (nz, ny, nx)
        The image, mu in 1/mm (or any unit; HU needs 1/mm).
    labels : int array, same shape
        ROI label map: 0 background, k > 0 the k-th ROI.
    truth : array, same shape, optional
        The exact truth; gives ``truth_mean`` and ``bias``.
    mu_water, mu_air : float, optional
        mu of water and air at the stated energy, 1/mm; both or neither. With them, the
        ``*_hu`` fields are filled.

    Returns
    -------
    dict {label: RoiStatistics}
        One entry per label > 0 present in the map, in increasing order.

    Notes
    -----
    Over the N pixels of ROI k: ``mean = (1/N) sum x_i``,
    ``std = sqrt(sum (x_i - mean)^2 / (N - 1))`` (NaN for a one-pixel ROI),
    ``bias = mean - mean(truth)``; in HU (linear scale, see :func:`hounsfield`)
    ``mean_hu = 1000 (mean - mu_water) / (mu_water - mu_air)``,
    ``std_hu = 1000 std / (mu_water - mu_air)``, ``bias_hu = 1000 bias / (mu_water - mu_air)``.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (CT number accuracy and image noise).
    """
    function = "roi_statistics"
    img = checks.real_array(image, function, "image")
    lab = checks.label_array(labels, img.shape, function)
    ref = None
    if truth is not None:
        ref = checks.real_array(truth, function, "truth")
        checks.same_shape(img, ref, function, "image", "truth")
    if (mu_water is None) != (mu_air is None):
        raise checks.fail(function, "mu_air" if mu_air is None else "mu_water", "is missing",
                          "both mu_water and mu_air (for HU) or neither")
    scale = None
    if mu_water is not None:
        water, air = _hu_scale(mu_water, mu_air, function)
        scale = 1000.0 / (water - air)
    flat_labels = lab.ravel()
    keep = flat_labels > 0
    if not keep.any():
        return {}
    present, inverse = np.unique(flat_labels[keep], return_inverse=True)
    counts = np.bincount(inverse)
    values = img.ravel()[keep]
    means = np.bincount(inverse, values) / counts
    deviations = values - means[inverse]
    sums = np.bincount(inverse, deviations * deviations)
    with np.errstate(invalid="ignore", divide="ignore"):
        stds = np.where(counts > 1, np.sqrt(sums / np.maximum(counts - 1, 1)), np.nan)
    truth_means = None
    if ref is not None:
        truth_means = np.bincount(inverse, ref.ravel()[keep]) / counts
    out = {}
    for i, label in enumerate(present.tolist()):
        fields = dict(label=int(label), pixels=int(counts[i]), mean=float(means[i]),
                      std=float(stds[i]))
        if truth_means is not None:
            fields.update(truth_mean=float(truth_means[i]),
                          bias=float(means[i] - truth_means[i]))
        if scale is not None:
            fields.update(mean_hu=float((means[i] - water) * scale), std_hu=float(stds[i] * scale))
            if truth_means is not None:
                fields.update(bias_hu=float((means[i] - truth_means[i]) * scale))
        out[int(label)] = RoiStatistics(**fields)
    return out


def cnr(image, roi, background, labels=None) -> float:
    """Contrast-to-noise ratio of a ROI against a background region.

    Parameters
    ----------
    image : array (ny, nx) or (nz, ny, nx)
    roi, background : int or bool array
        Each a ROI label (with ``labels``) or a boolean mask on the image's grid. The
        background needs at least two pixels.
    labels : int array, optional
        The ROI label map, needed when a region is given as a label.

    Returns
    -------
    float
        CNR (dimensionless, the same in any linear unit such as 1/mm or HU); ``inf`` when the
        background has no spread but the means differ, NaN when neither.

    Notes
    -----
    ``CNR = |mean_roi - mean_bg| / std_bg``, with ``std_bg`` the sample standard deviation
    of the background pixels. It is a single-image figure: the background spread contains
    noise and any structure (streaks, cupping) in the background region.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (contrast-to-noise ratio).
    """
    function = "cnr"
    img = checks.real_array(image, function, "image")
    inside = checks.region(roi, labels, img.shape, function, "roi")
    outside = checks.region(background, labels, img.shape, function, "background")
    bg = img[outside]
    if bg.size < 2:
        raise checks.fail(function, "background", "has one pixel, so no spread",
                          "a background region of at least two pixels")
    contrast = abs(float(img[inside].mean()) - float(bg.mean()))
    spread = float(np.std(bg, ddof=1))
    if spread == 0.0:
        return math.inf if contrast > 0 else math.nan
    return contrast / spread


def _region_means(image, centre, periphery, labels, function: str):
    img = checks.real_array(image, function, "image")
    middle = checks.region(centre, labels, img.shape, function, "centre")
    if isinstance(periphery, np.ndarray) and periphery.dtype == np.bool_:
        periphery = [periphery]  # one mask, not a list of them
    try:
        regions = list(periphery)
    except TypeError:
        regions = [periphery]
    if not regions:
        raise checks.fail(function, "periphery", "is empty",
                          "one or more ROI labels or boolean masks")
    outer = [float(img[checks.region(r, labels, img.shape, function, f"periphery[{i}]")].mean())
             for i, r in enumerate(regions)]
    return float(img[middle].mean()), np.array(outer)


def uniformity(image, centre, periphery, mu_water, mu_air, labels=None) -> float:
    """Largest CT-number difference between peripheral ROIs and the central ROI, in HU.

    Parameters
    ----------
    image : array (ny, nx) or (nz, ny, nx)
        A uniform (e.g. water) object's image, mu in 1/mm.
    centre : int or bool array
        The central ROI (a label with ``labels``, or a mask).
    periphery : sequence of int or bool arrays
        The peripheral ROIs (commonly four, at 3, 6, 9 and 12 o'clock, near the edge).
    mu_water, mu_air : float
        mu of water and air at the stated energy, 1/mm.
    labels : int array, optional
        The ROI label map, needed when regions are given as labels.

    Returns
    -------
    float
        ``max_p |HU_p - HU_centre|`` in HU, with ``HU_p`` the mean CT number of peripheral ROI
        p and ``HU_centre`` that of the central ROI.

    Notes
    -----
    Mean CT numbers from :func:`hounsfield` of the ROI means (the scale is linear, so the
    difference is ``1000 (mean_p - mean_c) / (mu_water - mu_air)``). Beam hardening (cupping
    or capping), scatter and calibration errors make it grow; a perfect uniform image gives 0.

    References
    ----------
    ICRU Report 87, J. ICRU 12(1) (2012) (uniformity of CT numbers, central against
    peripheral ROIs); IEC 61223-3-5 (2004), CT acceptance tests, uniformity (recalled from
    memory).
    """
    function = "uniformity"
    water, air = _hu_scale(mu_water, mu_air, function)
    middle, outer = _region_means(image, centre, periphery, labels, function)
    return float(np.max(np.abs(outer - middle)) * 1000.0 / (water - air))


def cupping(image, centre, periphery, labels=None) -> float:
    """Cupping: how much lower the centre of a uniform object is than its periphery, in %.

    Parameters
    ----------
    image : array (ny, nx) or (nz, ny, nx)
        A uniform object's image, mu in 1/mm (a linear attenuation scale, not HU).
    centre : int or bool array
        The central ROI (a label with ``labels``, or a mask).
    periphery : sequence of int or bool arrays
        The peripheral ROIs; their means are averaged with equal weight.
    labels : int array, optional
        The ROI label map, needed when regions are given as labels.

    Returns
    -------
    float
        ``100 (mu_periphery - mu_centre) / mu_periphery``: positive for a cup (centre darker,
        the beam-hardening signature), negative for a cap.

    Notes
    -----
    ``mu_periphery = (1/P) sum_p mean_p`` over the P peripheral ROIs, ``mu_centre`` the mean of
    the central ROI. On the mu scale, not HU, since water's CT number is 0 by definition.

    References
    ----------
    R. A. Brooks and G. Di Chiro, "Beam hardening in x-ray reconstructive tomography",
    Phys. Med. Biol. 21(3), 390-398 (1976) (the cupping of uniform objects; recalled from
    memory). The percentage form is common practice.
    """
    function = "cupping"
    middle, outer = _region_means(image, centre, periphery, labels, function)
    edge = float(outer.mean())
    if not edge > 0:
        raise checks.fail(function, "periphery", f"has mean {edge:.6g}, not > 0",
                          "an image on the mu scale (1/mm) with attenuating periphery ROIs")
    return 100.0 * (edge - middle) / edge
