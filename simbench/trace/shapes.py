"""Exact intersection of a ray with one primitive, in the primitive's local frame (numba).

Every function takes a ray ``o + t * d`` already expressed in the object's local frame
(``local = rotation @ (world - centre)``). Because the world-to-local map is a rotation and a
translation, the direction stays a unit vector and ``t`` keeps its world meaning (mm along the
ray). The caller shifts the origin to the point of the ray nearest the object's centre before
calling, so the quadratics below are well conditioned however far away the ray starts.

Convex shapes return ``(t_in, t_out)``; a miss returns ``t_in >= t_out``. The polygon prism
writes several intervals into caller-owned buffers. All arithmetic is float64 without fastmath.

LLVM inlines these functions into the tracer's kernels (``forceinline``); the polygon, which
takes arrays, is compiled without reference counting (see :mod:`simbench.trace.analytic`).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

_MISS = (np.inf, -np.inf)


@njit(cache=True, error_model="numpy", forceinline=True)
def _quadratic_roots(a, b_half, c):
    """Real roots (r0 <= r1) of ``a t^2 + 2 b_half t + c = 0``, stable form; ok=False if none.

    Notes
    -----
    With ``disc = b_half^2 - a c`` and ``q = -(b_half + sign(b_half) sqrt(disc))`` the roots are
    ``q / a`` and ``c / q`` (no cancellation between ``b_half`` and the square root).
    """
    disc = b_half * b_half - a * c
    if disc < 0.0:
        return False, 0.0, 0.0
    sq = math.sqrt(disc)
    q = -(b_half + math.copysign(sq, b_half))
    if q == 0.0:
        # b_half == 0 and disc == 0: a double root at t = 0 (tangent)
        return True, 0.0, 0.0
    r0 = q / a
    r1 = c / q
    if r0 > r1:
        r0, r1 = r1, r0
    return True, r0, r1


@njit(cache=True, error_model="numpy", forceinline=True)
def ellipsoid_interval(ox, oy, oz, dx, dy, dz, inv_a, inv_b, inv_c):
    """Chord of ``(x/a)^2 + (y/b)^2 + (z/c)^2 <= 1``, given the inverse semi-axes ``1/a``...

    Notes
    -----
    In the scaled frame ``x' = x / a`` ... the surface is the unit sphere; with ``o'``, ``d'``
    the scaled origin and direction (``d'`` not renormalised, so ``t`` stays in mm),
    ``|d'|^2 t^2 + 2 (o'.d') t + |o'|^2 - 1 = 0``.
    """
    sx, sy, sz = ox * inv_a, oy * inv_b, oz * inv_c
    ex, ey, ez = dx * inv_a, dy * inv_b, dz * inv_c
    qa = ex * ex + ey * ey + ez * ez
    qb = sx * ex + sy * ey + sz * ez
    qc = sx * sx + sy * sy + sz * sz - 1.0
    ok, r0, r1 = _quadratic_roots(qa, qb, qc)
    if not ok:
        return _MISS
    return r0, r1


@njit(cache=True, error_model="numpy", forceinline=True)
def ellipse_prism_interval(ox, oy, dx, dy, inv_a, inv_b):
    """Chord of the infinite elliptic prism ``(x/a)^2 + (y/b)^2 <= 1`` (any z), given the
    inverse semi-axes."""
    sx, sy = ox * inv_a, oy * inv_b
    ex, ey = dx * inv_a, dy * inv_b
    qa = ex * ex + ey * ey
    qc = sx * sx + sy * sy - 1.0
    if qa == 0.0:
        # ray along the prism axis: inside everywhere or nowhere
        if qc <= 0.0:
            return -np.inf, np.inf
        return _MISS
    qb = sx * ex + sy * ey
    ok, r0, r1 = _quadratic_roots(qa, qb, qc)
    if not ok:
        return _MISS
    return r0, r1


@njit(cache=True, error_model="numpy", forceinline=True)
def _slab(o, d, h, t0, t1):
    """Clip ``[t0, t1]`` to the slab ``|o + t d| <= h``."""
    if d != 0.0:
        inv_d = 1.0 / d
        s0 = (-h - o) * inv_d
        s1 = (h - o) * inv_d
        if s0 > s1:
            s0, s1 = s1, s0
        if s0 > t0:
            t0 = s0
        if s1 < t1:
            t1 = s1
    elif o < -h or o > h:
        return np.inf, -np.inf
    return t0, t1


@njit(cache=True, error_model="numpy", forceinline=True)
def box_interval(ox, oy, oz, dx, dy, dz, a, b, c):
    """Chord of ``|x| <= a, |y| <= b, |z| <= c`` by slab clipping (Kay and Kajiya)."""
    t0, t1 = _slab(ox, dx, a, -np.inf, np.inf)
    t0, t1 = _slab(oy, dy, b, t0, t1)
    t0, t1 = _slab(oz, dz, c, t0, t1)
    return t0, t1


@njit(cache=True, error_model="numpy", forceinline=True)
def rectangle_prism_interval(ox, oy, dx, dy, a, b):
    """Chord of the infinite prism ``|x| <= a, |y| <= b`` (any z)."""
    t0, t1 = _slab(ox, dx, a, -np.inf, np.inf)
    t0, t1 = _slab(oy, dy, b, t0, t1)
    return t0, t1


@njit(cache=True, error_model="numpy", forceinline=True)
def cylinder_interval(ox, oy, oz, dx, dy, dz, inv_a, inv_b, c):
    """Chord of the finite elliptic cylinder ``(x/a)^2 + (y/b)^2 <= 1, |z| <= c``, given
    ``1/a``, ``1/b`` and the half height ``c``."""
    t0, t1 = ellipse_prism_interval(ox, oy, dx, dy, inv_a, inv_b)
    if t0 >= t1:
        return _MISS
    return _slab(oz, dz, c, t0, t1)


@njit(cache=True, error_model="numpy", forceinline=True)
def cone_interval(ox, oy, oz, dx, dy, dz, r_low, r_high, c):
    """Chord of the truncated cone ``x^2 + y^2 <= r(z)^2, |z| <= c`` with both caps.

    Notes
    -----
    ``r(z) = m z + q`` with ``m = (r_high - r_low) / (2c)`` and ``q = (r_low + r_high) / 2``.
    On the ray, ``f(t) = x^2 + y^2 - (m z + q)^2`` is a quadratic ``A t^2 + 2 B t + C``;
    the solid is the part of ``f <= 0`` inside the slab ``|z| <= c`` (where ``r(z) >= 0``,
    so only one nappe of the double cone is inside the slab). The solid is convex, so
    the answer is one interval: the slab interval cut by the one or two pieces of
    ``f <= 0`` (``A < 0``: two half lines, the one on the other nappe meets the slab in at
    most the apex point).
    """
    s0, s1 = _slab(oz, dz, c, -np.inf, np.inf)
    if s0 >= s1:
        return _MISS
    m = (r_high - r_low) / (2.0 * c)
    q = 0.5 * (r_low + r_high)
    rz = m * oz + q
    mdz = m * dz
    qa = dx * dx + dy * dy - mdz * mdz
    qb = ox * dx + oy * dy - mdz * rz
    qc = ox * ox + oy * oy - rz * rz
    if qa == 0.0:
        # f is linear: 2 B t + C <= 0
        if qb == 0.0:
            if qc <= 0.0:
                return s0, s1
            return _MISS
        root = -qc / (2.0 * qb)
        if qb > 0.0:
            return s0, min(s1, root)
        return max(s0, root), s1
    ok, r0, r1 = _quadratic_roots(qa, qb, qc)
    if qa > 0.0:
        if not ok:
            return _MISS
        return max(s0, r0), min(s1, r1)
    if not ok:
        # A < 0 and no real root: f < 0 on the whole line
        return s0, s1
    # A < 0: f <= 0 on (-inf, r0] and [r1, inf); keep the longer clipped piece
    a0, a1 = s0, min(s1, r0)
    b0, b1 = max(s0, r1), s1
    if a1 - a0 >= b1 - b0:
        return a0, a1
    return b0, b1


@njit(cache=True, error_model="numpy", _nrt=False, forceinline=True)
def polygon_prism_intervals(ox, oy, dx, dy, poly_xy, start, count, crossings,
                            out_t0, out_t1, n_out):
    """Intervals of the ray inside an infinite polygon prism (simple polygon, any winding).

    Parameters
    ----------
    ox, oy, dx, dy : float
        Local-frame origin and direction components in the polygon plane.
    poly_xy : float64 (P, 2)
        All polygon vertices; this polygon is ``poly_xy[start:start+count]``.
    crossings : float64 (>= count,)
        Scratch for the crossing parameters.
    out_t0, out_t1 : float64 arrays
        Interval buffers; intervals are written from index ``n_out``.

    Returns
    -------
    int
        The new number of intervals in the buffers.

    Notes
    -----
    The signed distance of vertex ``p`` to the ray's line is ``s = (p - o) x d``. An edge is
    crossed when its end points lie on different sides with the half-open rule ``s > 0``
    versus ``s <= 0``; a vertex exactly on the line then counts once when the line passes
    through it and zero or two times (at the same t) when the line only touches it, and an
    edge lying along the line is never crossed. The sorted crossing parameters pair up into
    inside intervals (the crossing-number rule of point-in-polygon tests).
    """
    dd = dx * dx + dy * dy
    if dd == 0.0:
        # ray along the prism axis: point-in-polygon of (ox, oy) by the same crossing rule
        inside = False
        px = poly_xy[start + count - 1, 0]
        py = poly_xy[start + count - 1, 1]
        for i in range(count):
            qx = poly_xy[start + i, 0]
            qy = poly_xy[start + i, 1]
            if (qy > oy) != (py > oy):
                xc = px + (oy - py) * (qx - px) / (qy - py)
                if ox < xc:
                    inside = not inside
            px, py = qx, qy
        if inside:
            out_t0[n_out] = -np.inf
            out_t1[n_out] = np.inf
            return n_out + 1
        return n_out
    n = 0
    px = poly_xy[start + count - 1, 0] - ox
    py = poly_xy[start + count - 1, 1] - oy
    sp = px * dy - py * dx
    for i in range(count):
        qx = poly_xy[start + i, 0] - ox
        qy = poly_xy[start + i, 1] - oy
        sq = qx * dy - qy * dx
        if (sp > 0.0) != (sq > 0.0):
            w = sp / (sp - sq)
            cx = px + w * (qx - px)
            cy = py + w * (qy - py)
            crossings[n] = (cx * dx + cy * dy) / dd
            n += 1
        px, py, sp = qx, qy, sq
    # insertion sort (few crossings)
    for i in range(1, n):
        v = crossings[i]
        j = i - 1
        while j >= 0 and crossings[j] > v:
            crossings[j + 1] = crossings[j]
            j -= 1
        crossings[j + 1] = v
    for i in range(0, n - 1, 2):
        if crossings[i + 1] > crossings[i]:
            out_t0[n_out] = crossings[i]
            out_t1[n_out] = crossings[i + 1]
            n_out += 1
    return n_out
