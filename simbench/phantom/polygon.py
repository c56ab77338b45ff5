"""Plane polygons of the phantom language: simplicity check and area (pure math)."""

from __future__ import annotations

import numpy as np
from numba import njit


def shoelace_area(vertices: np.ndarray) -> float:
    """Signed area of a polygon (positive when counter-clockwise).

    Parameters
    ----------
    vertices : ndarray (n, 2)
        Vertices in order, mm; the last connects back to the first.

    Returns
    -------
    float
        Signed area in mm^2.

    Notes
    -----
    Shoelace (Gauss) formula ``A = 1/2 sum_i (x_i y_{i+1} - x_{i+1} y_i)``.
    """
    x, y = vertices[:, 0], vertices[:, 1]
    return 0.5 * float(np.dot(x, np.roll(y, -1)) - np.dot(np.roll(x, -1), y))


@njit(cache=True)
def _orient(px, py, qx, qy, rx, ry) -> float:
    return (qx - px) * (ry - py) - (qy - py) * (rx - px)


@njit(cache=True)
def _on_segment(px, py, qx, qy, rx, ry) -> bool:
    """r is collinear with p-q and lies within its bounding box."""
    return min(px, qx) <= rx <= max(px, qx) and min(py, qy) <= ry <= max(py, qy)


@njit(cache=True)
def _segments_touch(x1, y1, x2, y2, x3, y3, x4, y4) -> bool:
    d1, d2 = _orient(x3, y3, x4, y4, x1, y1), _orient(x3, y3, x4, y4, x2, y2)
    d3, d4 = _orient(x1, y1, x2, y2, x3, y3), _orient(x1, y1, x2, y2, x4, y4)
    if ((d1 > 0 > d2) or (d1 < 0 < d2)) and ((d3 > 0 > d4) or (d3 < 0 < d4)):
        return True
    return ((d1 == 0 and _on_segment(x3, y3, x4, y4, x1, y1))
            or (d2 == 0 and _on_segment(x3, y3, x4, y4, x2, y2))
            or (d3 == 0 and _on_segment(x1, y1, x2, y2, x3, y3))
            or (d4 == 0 and _on_segment(x1, y1, x2, y2, x4, y4)))


@njit(cache=True)
def _first_bad_edge_pair(x, y):
    """(kind, i, j) of the first pair of edges i < j, in order, that fold back (kind 1) or cross
    or touch (kind 2); (0, -1, -1) for none. Edge i runs from vertex i to vertex i + 1 (mod n)."""
    n = x.shape[0]
    x_lo, x_hi = np.empty(n), np.empty(n)
    y_lo, y_hi = np.empty(n), np.empty(n)
    for i in range(n):
        i2 = i + 1 if i + 1 < n else 0
        x_lo[i], x_hi[i] = min(x[i], x[i2]), max(x[i], x[i2])
        y_lo[i], y_hi[i] = min(y[i], y[i2]), max(y[i], y[i2])
    for i in range(n):
        i2 = i + 1 if i + 1 < n else 0
        for j in range(i + 1, n):
            j2 = j + 1 if j + 1 < n else 0
            if not (j == i + 1 or (i == 0 and j == n - 1)) and (
                    x_hi[j] < x_lo[i] or x_lo[j] > x_hi[i] or y_hi[j] < y_lo[i]
                    or y_lo[j] > y_hi[i]):
                continue  # edges whose bounding boxes are apart cannot touch
            if j == i + 1 or (i == 0 and j == n - 1):
                # neighbours share one vertex: they must not fold back onto each other
                if j == i + 1:
                    sx, sy, ax, ay, bx, by = x[i2], y[i2], x[i], y[i], x[j2], y[j2]
                else:
                    sx, sy, ax, ay, bx, by = x[i], y[i], x[i2], y[i2], x[j], y[j]
                if (_orient(ax, ay, sx, sy, bx, by) == 0
                        and (ax - sx) * (bx - sx) + (ay - sy) * (by - sy) > 0):
                    return 1, i, j
                continue
            if _segments_touch(x[i], y[i], x[i2], y[i2], x[j], y[j], x[j2], y[j2]):
                return 2, i, j
    return 0, -1, -1


def polygon_problem(vertices: np.ndarray) -> str:
    """Why a polygon is not simple, or ``""`` if it is.

    Parameters
    ----------
    vertices : ndarray (n, 2)

    Returns
    -------
    str
        Empty for a simple polygon (at least 3 vertices, no repeated consecutive vertex, no two
        edges that cross or touch except neighbours at their shared vertex, non-zero area);
        else a short description naming the offending edges (1-based vertex numbers).

    Notes
    -----
    Every pair of edges whose bounding boxes meet is tested with orientation predicates (sign
    of a 2x2 determinant in float64); the pairs are visited in a numba loop, O(n^2), and the
    first offending pair in order is reported.
    """
    n = len(vertices)
    if n < 3:
        return f"a polygon needs at least 3 vertices, got {n}"
    pts = np.ascontiguousarray(vertices, dtype=np.float64)
    same = np.flatnonzero(np.all(pts == np.roll(pts, -1, axis=0), axis=1))
    if same.size:
        i = int(same[0])
        return f"vertices {i + 1} and {(i + 1) % n + 1} coincide"
    kind, i, j = _first_bad_edge_pair(pts[:, 0].copy(), pts[:, 1].copy())
    if kind:
        edges = f"edges {i + 1}-{(i + 1) % n + 1} and {j + 1}-{(j + 1) % n + 1}"
        return edges + (" fold back onto each other" if kind == 1 else
                        " cross or touch (the polygon intersects itself)")
    if shoelace_area(pts) == 0.0:
        return "the polygon has zero area"
    return ""
