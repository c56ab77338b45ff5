"""Plane polygons of the phantom language: simplicity check and area (pure math)."""

from __future__ import annotations

import numpy as np


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


def _orient(p, q, r) -> float:
    return (q[0] - p[0]) * (r[1] - p[1]) - (q[1] - p[1]) * (r[0] - p[0])


def _on_segment(p, q, r) -> bool:
    """r is collinear with p-q and lies within its bounding box."""
    return (min(p[0], q[0]) <= r[0] <= max(p[0], q[0])
            and min(p[1], q[1]) <= r[1] <= max(p[1], q[1]))


def _segments_touch(p1, p2, p3, p4) -> bool:
    d1, d2 = _orient(p3, p4, p1), _orient(p3, p4, p2)
    d3, d4 = _orient(p1, p2, p3), _orient(p1, p2, p4)
    if ((d1 > 0 > d2) or (d1 < 0 < d2)) and ((d3 > 0 > d4) or (d3 < 0 < d4)):
        return True
    return ((d1 == 0 and _on_segment(p3, p4, p1)) or (d2 == 0 and _on_segment(p3, p4, p2))
            or (d3 == 0 and _on_segment(p1, p2, p3)) or (d4 == 0 and _on_segment(p1, p2, p4)))


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
    Every pair of edges is tested with exact orientation predicates, O(n^2); phantom polygons
    have few vertices.
    """
    n = len(vertices)
    if n < 3:
        return f"a polygon needs at least 3 vertices, got {n}"
    pts = [tuple(map(float, v)) for v in vertices]
    for i in range(n):
        if pts[i] == pts[(i + 1) % n]:
            return f"vertices {i + 1} and {(i + 1) % n + 1} coincide"
    for i in range(n):
        a1, a2 = pts[i], pts[(i + 1) % n]
        for j in range(i + 1, n):
            b1, b2 = pts[j], pts[(j + 1) % n]
            if j == i + 1 or (i == 0 and j == n - 1):
                # neighbours share one vertex: they must not fold back onto each other
                shared = a2 if j == i + 1 else a1
                other_a = a1 if j == i + 1 else a2
                other_b = b2 if j == i + 1 else b1
                if (_orient(other_a, shared, other_b) == 0
                        and np.dot(np.subtract(other_a, shared), np.subtract(other_b, shared)) > 0):
                    return (f"edges {i + 1}-{(i + 1) % n + 1} and {j + 1}-{(j + 1) % n + 1} "
                            "fold back onto each other")
                continue
            if _segments_touch(a1, a2, b1, b2):
                return (f"edges {i + 1}-{(i + 1) % n + 1} and {j + 1}-{(j + 1) % n + 1} "
                        "cross or touch (the polygon intersects itself)")
    if shoelace_area(np.asarray(pts)) == 0.0:
        return "the polygon has zero area"
    return ""
