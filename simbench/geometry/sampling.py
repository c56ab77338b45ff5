"""Sub-ray sampling of a detector cell aperture and of a focal spot (midpoint rule).

A finite cell or focal spot is integrated by tracing several rays and averaging: the
midpoint rule puts ``n`` equal-weight samples at the centres of ``n`` equal parts of each
side. The offsets returned here are added to a cell centre (detector coordinates u, v) or to
the focal spot centre (``spot_u_mm, spot_v_mm`` of :func:`simbench.geometry.rays.detector_ray`).
"""

from __future__ import annotations

import math

import numpy as np

from simbench.errors import InputError, Where


def _count(value, field: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise InputError(Where("<arguments>", field=field),
                         f"must be a whole number >= 1, got {value!r}", "an integer >= 1")
    return int(value)


def _size(value, field: str, *, positive: bool) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not math.isfinite(number) or number < 0 or (positive and number == 0):
        valid = "a positive length in mm" if positive else "a length >= 0 in mm"
        raise InputError(Where("<arguments>", field=field), f"invalid size {value!r}", valid)
    return number


def _midpoint_grid(n_u: int, n_v: int, size_u: float, size_v: float) -> np.ndarray:
    du = ((np.arange(n_u) + 0.5) / n_u - 0.5) * size_u
    dv = ((np.arange(n_v) + 0.5) / n_v - 0.5) * size_v
    out = np.empty((n_v * n_u, 2))
    out[:, 0] = np.tile(du, n_v)
    out[:, 1] = np.repeat(dv, n_u)
    return out


def cell_subsamples(n_u: int, n_v: int, pitch_u_mm: float, pitch_v_mm: float) -> np.ndarray:
    """Offsets of sub-ray end points within one detector cell.

    Parameters
    ----------
    n_u, n_v : int
        Samples along u and v (>= 1).
    pitch_u_mm, pitch_v_mm : float
        Cell aperture in mm (taken equal to the pitch: a cell with no dead gap).

    Returns
    -------
    float64 (n_u * n_v, 2)
        ``(du, dv)`` per sample, u fastest. Each sample has weight ``1 / (n_u n_v)``.

    Notes
    -----
    Midpoint rule: ``du_i = ((i + 1/2) / n_u - 1/2) * pitch_u``; the samples are symmetric
    about the cell centre and integrate polynomials of degree 1 exactly.

    Examples
    --------
    >>> cell_subsamples(2, 1, 1.0, 1.0).tolist()
    [[-0.25, 0.0], [0.25, 0.0]]
    """
    return _midpoint_grid(_count(n_u, "n_u"), _count(n_v, "n_v"),
                          _size(pitch_u_mm, "pitch_u_mm", positive=True),
                          _size(pitch_v_mm, "pitch_v_mm", positive=True))


def focal_spot_points(size_u_mm: float, size_v_mm: float, n_u: int, n_v: int) -> np.ndarray:
    """Emission points of a uniform rectangular focal spot, about its centre.

    Parameters
    ----------
    size_u_mm, size_v_mm : float
        Effective (projected) spot size along the detector u and v axes in mm (>= 0; 0 is a
        point source along that axis).
    n_u, n_v : int
        Samples along u and v (>= 1).

    Returns
    -------
    float64 (n_u * n_v, 2)
        ``(spot_u, spot_v)`` per point, u fastest, equal weights ``1 / (n_u n_v)``.

    Notes
    -----
    Same midpoint rule as :func:`cell_subsamples` over the spot rectangle.
    """
    return _midpoint_grid(_count(n_u, "n_u"), _count(n_v, "n_v"),
                          _size(size_u_mm, "size_u_mm", positive=False),
                          _size(size_v_mm, "size_v_mm", positive=False))
