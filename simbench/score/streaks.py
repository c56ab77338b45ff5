"""Artifacts: a streak index around dense inserts, and the error of the line integrals.

Metal and photon starvation leave streaks that radiate from the dense object; against the exact
truth they are the structure of the difference image near it. The projection-domain error
tells whether an error was already in the data (calibration, beam hardening, scatter, the
starvation floor) or was made by the reconstruction.
"""

from __future__ import annotations

import math

import numpy as np

from simbench.score import checks


def streak_index(image, truth, region, reference=None, labels=None) -> float:
    """Streak index: the spread of the difference image in a region around a dense insert.

    Parameters
    ----------
    image, truth : array (ny, nx) or (nz, ny, nx)
        The image and the exact truth on the same grid, same unit (1/mm or HU).
    region : int or bool array
        Where streaks are measured: a boolean mask (commonly an annulus around the dense
        insert, :func:`simbench.score.rois.annulus_mask`, leaving out the insert's partial-volume
        rim) or a ROI label with ``labels``.
    reference : int or bool array, optional
        A region of the same noise away from the dense insert. With it, the noise's share is
        taken out (see Notes). Without it the index holds noise and streaks together.
    labels : int array, optional
        The ROI label map, needed when a region is given as a label.

    Returns
    -------
    float
        The index in the image's unit; 0 for an image equal to the truth there.

    Notes
    -----
    With ``e = image - truth`` and ``s(R)`` the sample standard deviation of e over the
    pixels of region R: ``index = s(region)`` without a reference, and
    ``index = sqrt(max(s(region)^2 - s(reference)^2, 0))`` with one. Streaks are errors that
    change along the region (with angle around the insert), so they raise s(region); a
    uniform offset (a bias) does not. Noise raises both terms equally and cancels in the
    second form, which is the "artifact index" of metal-artifact studies (common practice;
    recalled from memory, no single source checked).
    """
    function = "streak_index"
    img = checks.real_array(image, function, "image")
    ref = checks.real_array(truth, function, "truth")
    checks.same_shape(img, ref, function, "image", "truth")
    error = img - ref
    inside = checks.region(region, labels, img.shape, function, "region")
    if inside.sum() < 2:
        raise checks.fail(function, "region", "has one pixel", "a region of at least two pixels")
    spread = float(np.var(error[inside], ddof=1))
    if reference is None:
        return math.sqrt(spread)
    calm = checks.region(reference, labels, img.shape, function, "reference")
    if calm.sum() < 2:
        raise checks.fail(function, "reference", "has one pixel",
                          "a region of at least two pixels")
    return math.sqrt(max(spread - float(np.var(error[calm], ddof=1)), 0.0))


def projection_rmse(measured, exact, per_view: bool = False):
    """RMSE of measured line integrals against the exact ones.

    Parameters
    ----------
    measured, exact : array (n_views, n_cols) or (n_views, n_rows, n_cols)
        Line integrals (dimensionless, ``integral mu dl``): the preprocessed measurement and
        the exact line integrals at the reference energy.
    per_view : bool
        False (default): one number over all rays. True: one per view.

    Returns
    -------
    float, or float64 (n_views,)
        ``sqrt( mean (measured - exact)^2 )`` over all rays, or over the rays of each view.

    Notes
    -----
    ``RMSE = sqrt( (1/N) sum_rays (p_measured - p_exact)^2 )``. Noise, beam hardening,
    scatter and the starvation floor all enter; the per-view curve shows where along the
    orbit they do (views through metal, the long axis of an ellipse).

    References
    ----------
    Z. Wang and A. C. Bovik, IEEE Signal Process. Mag. 26(1), 98-117 (2009) (the MSE), here
    applied to line integrals.
    """
    function = "projection_rmse"
    got = checks.real_array(measured, function, "measured")
    want = checks.real_array(exact, function, "exact")
    checks.same_shape(got, want, function, "measured", "exact")
    squared = (got - want) ** 2
    if per_view:
        return np.sqrt(squared.reshape(squared.shape[0], -1).mean(axis=1))
    return math.sqrt(float(squared.mean()))
