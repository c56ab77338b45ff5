"""Numba kernels tracing rays through analytic primitives: culling windows and composition.

One kernel call traces a chunk of views. Work is split into (view, focal-spot sample, row)
tasks; each task first lists the objects whose conservative detector window covers its row,
then traces every cell (and cell sample) of the row against those candidates only. Scratch
buffers are allocated once per work block, never per ray.

All kernels use numba's numpy error model (IEEE division, no exception checks) and float64
without fastmath.

How the kernels are compiled (the first trace compiles them; see docs/performance.md):

- The body of the parallel loop is its own serial function (:func:`_trace_objects_block`),
  so numba's parallel passes, whose cost grows much faster than the size of the loop body,
  see only a call. It is inlined by LLVM (``forceinline``) into the parallel loop, where the
  loop's arrays are known not to alias one another.
- The per-ray helpers are inlined by LLVM, not at numba IR level (which costs far more
  compile time), and those that take arrays are compiled without the runtime's reference
  counting (``_nrt=False``: they allocate nothing): counted, every ray would pay several
  atomic increments and decrements, which halves the tracer's speed.

Note: numba's on-disk cache does not notice edits to helpers in other modules
(``shapes.py``, ``simbench.geometry.rays``), whose code is compiled into these kernels;
after editing them, delete ``__pycache__``.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from simbench.geometry.rays import detector_ray
from simbench.phantom.compiled import (
    BOX, CONE, CYLINDER, ELLIPSE_2D, ELLIPSOID, POLYGON_2D, RECTANGLE_2D, REPLACE,
)
from simbench.trace.shapes import (
    box_interval, cone_interval, cylinder_interval, ellipse_prism_interval,
    ellipsoid_interval, polygon_prism_intervals, rectangle_prism_interval,
)

# --------------------------------------------------------------------------------------------
# Culling windows
# --------------------------------------------------------------------------------------------

@njit(cache=True, error_model="numpy")
def _angle_window(x0, y0, radius):
    """Range of ``atan(x / y)`` over the disk of centre (x0, y0) and radius ``radius``.

    Returns (ok, lo, hi, behind): ok is False when the disk reaches ``y <= 0`` (no bound);
    behind is True when the whole disk lies at ``y < 0``.
    """
    if y0 + radius < 0.0:
        return False, 0.0, 0.0, True
    if y0 <= radius:
        return False, 0.0, 0.0, False
    rho = math.sqrt(x0 * x0 + y0 * y0)
    theta = math.atan2(x0, y0)
    beta = math.asin(radius / rho)
    return True, theta - beta, theta + beta, False


@njit(cache=True, error_model="numpy")
def _dot(a, b):
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


@njit(cache=True, error_model="numpy")
def _object_window(parallel, s, d, dc, uu, vv, c, radius, prism):
    """Conservative window (u_lo, u_hi, v_lo, v_hi) of a bounding sphere: parallel or flat.

    For prisms (2-D shapes) the bound is an infinite cylinder of radius ``radius`` about
    the z axis through ``c``; it bounds u only when the geometry keeps u (and the detector
    normal) horizontal, and never bounds v. An empty window (lo > hi) means no ray of
    this view can meet the object.

    Notes
    -----
    Parallel beam: the detector coordinate of the ray through X is affine in X,
    ``u(X) = (X - D) . g_u`` with ``g_u = U - (d.U / d.n) n`` (n the detector normal),
    so over a ball ``u`` spans ``(c - D) . g_u +- R |g_u|``.
    Divergent beam (flat detector): with ``n`` the detector normal, the ray through X has
    ``tan`` of its angle in the (U, n) plane equal to ``(X - S).U / (X - S).n``; over a
    ball this ranges over the tangent angles of the projected disk,
    ``atan2(x0, y0) +- asin(R / rho)``, and ``u = (S - D).U + h tan(angle)`` with
    ``h = (D - S).n``.
    """
    inf = np.inf
    if parallel:
        n0 = uu[1] * vv[2] - uu[2] * vv[1]
        n1 = uu[2] * vv[0] - uu[0] * vv[2]
        n2 = uu[0] * vv[1] - uu[1] * vv[0]
        dn = d[0] * n0 + d[1] * n1 + d[2] * n2
        if abs(dn) < 1e-9:
            return -inf, inf, -inf, inf
        fu = _dot(d, uu) / dn
        fv = _dot(d, vv) / dn
        gu0, gu1, gu2 = uu[0] - fu * n0, uu[1] - fu * n1, uu[2] - fu * n2
        gv0, gv1, gv2 = vv[0] - fv * n0, vv[1] - fv * n1, vv[2] - fv * n2
        e0, e1, e2 = c[0] - dc[0], c[1] - dc[1], c[2] - dc[2]
        uc = e0 * gu0 + e1 * gu1 + e2 * gu2
        vc = e0 * gv0 + e1 * gv1 + e2 * gv2
        if prism:
            if gu2 != 0.0:
                return -inf, inf, -inf, inf
            hu = radius * math.sqrt(gu0 * gu0 + gu1 * gu1)
            return uc - hu, uc + hu, -inf, inf
        hu = radius * math.sqrt(gu0 * gu0 + gu1 * gu1 + gu2 * gu2)
        hv = radius * math.sqrt(gv0 * gv0 + gv1 * gv1 + gv2 * gv2)
        return uc - hu, uc + hu, vc - hv, vc + hv
    # divergent beam, flat detector; s is the emission point (spot offset included)
    n0 = uu[1] * vv[2] - uu[2] * vv[1]
    n1 = uu[2] * vv[0] - uu[0] * vv[2]
    n2 = uu[0] * vv[1] - uu[1] * vv[0]
    h = (dc[0] - s[0]) * n0 + (dc[1] - s[1]) * n1 + (dc[2] - s[2]) * n2
    if h < 0.0:
        n0, n1, n2, h = -n0, -n1, -n2, -h
    if h == 0.0:
        return -inf, inf, -inf, inf
    x0u = (c[0] - s[0]) * uu[0] + (c[1] - s[1]) * uu[1] + (c[2] - s[2]) * uu[2]
    x0v = (c[0] - s[0]) * vv[0] + (c[1] - s[1]) * vv[1] + (c[2] - s[2]) * vv[2]
    y0 = (c[0] - s[0]) * n0 + (c[1] - s[1]) * n1 + (c[2] - s[2]) * n2
    if prism and (uu[2] != 0.0 or n2 != 0.0):
        return -inf, inf, -inf, inf
    ok, alo, ahi, behind = _angle_window(x0u, y0, radius)
    if behind:
        return inf, -inf, inf, -inf
    if not ok:
        return -inf, inf, -inf, inf
    a_u = (s[0] - dc[0]) * uu[0] + (s[1] - dc[1]) * uu[1] + (s[2] - dc[2]) * uu[2]
    u_lo = a_u + h * math.tan(alo)
    u_hi = a_u + h * math.tan(ahi)
    if prism:
        return u_lo, u_hi, -inf, inf
    okv, blo, bhi, _ = _angle_window(x0v, y0, radius)
    if not okv:
        return u_lo, u_hi, -inf, inf
    a_v = (s[0] - dc[0]) * vv[0] + (s[1] - dc[1]) * vv[1] + (s[2] - dc[2]) * vv[2]
    return u_lo, u_hi, a_v + h * math.tan(blo), a_v + h * math.tan(bhi)


@njit(cache=True, error_model="numpy")
def _curved_window(s_centre, spot_u, spot_v, dc, uu, vv, c, radius, prism):
    """Window on an equiangular detector for a ray emitted at ``source + su U + sv V``.

    Notes
    -----
    The detector point at fan angle gamma is ``S + R_d (cos g w + sin g U) + v V`` about the
    central source S. From the emission point, the ray's slope in the (U, w) plane is
    ``r = tan g - k / cos g`` with ``k = su / R_d``; solving, ``g = atan r + asin(k / sqrt(1
    + r^2))``, increasing in r for ``|k|`` small. Along v, ``v = sv + R_d cos g r_v``.
    """
    inf = np.inf
    w0, w1, w2 = dc[0] - s_centre[0], dc[1] - s_centre[1], dc[2] - s_centre[2]
    rd = math.sqrt(w0 * w0 + w1 * w1 + w2 * w2)
    n0, n1, n2 = w0 / rd, w1 / rd, w2 / rd
    if prism and (uu[2] != 0.0 or n2 != 0.0):
        return -inf, inf, -inf, inf
    e0 = s_centre[0] + spot_u * uu[0] + spot_v * vv[0]
    e1 = s_centre[1] + spot_u * uu[1] + spot_v * vv[1]
    e2 = s_centre[2] + spot_u * uu[2] + spot_v * vv[2]
    x0u = (c[0] - e0) * uu[0] + (c[1] - e1) * uu[1] + (c[2] - e2) * uu[2]
    x0v = (c[0] - e0) * vv[0] + (c[1] - e1) * vv[1] + (c[2] - e2) * vv[2]
    y0 = (c[0] - e0) * n0 + (c[1] - e1) * n1 + (c[2] - e2) * n2
    ok, alo, ahi, behind = _angle_window(x0u, y0, radius)
    if behind:
        return inf, -inf, inf, -inf
    if not ok:
        return -inf, inf, -inf, inf
    k = spot_u / rd
    if abs(k) >= 0.5:
        return -inf, inf, -inf, inf
    rlo, rhi = math.tan(alo), math.tan(ahi)
    glo = math.atan(rlo) + math.asin(k / math.sqrt(1.0 + rlo * rlo))
    ghi = math.atan(rhi) + math.asin(k / math.sqrt(1.0 + rhi * rhi))
    if not (-0.5 * math.pi < glo < ghi < 0.5 * math.pi):
        return -inf, inf, -inf, inf
    u_lo, u_hi = rd * glo, rd * ghi
    if prism:
        return u_lo, u_hi, -inf, inf
    okv, blo, bhi, _ = _angle_window(x0v, y0, radius)
    if not okv:
        return u_lo, u_hi, -inf, inf
    cmin = min(math.cos(glo), math.cos(ghi))
    qlo, qhi = math.tan(blo), math.tan(bhi)
    v_lo = spot_v + rd * min(qlo, qlo * cmin)
    v_hi = spot_v + rd * max(qhi, qhi * cmin)
    return u_lo, u_hi, v_lo, v_hi


@njit(cache=True, error_model="numpy")
def culling_windows(parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                    views, spot_u, spot_v, centre, bound_radius, is_prism, out):
    """Fill ``out[i, f, k] = (u_lo, u_hi, v_lo, v_hi)`` for chunk view i, spot f, object k.

    Serial: a few hundred operations per view and object, far below the cost of tracing the
    view's rays, and a parallel loop would cost more to compile than it saves.
    """
    n_views = views.shape[0]
    n_spots = spot_u.shape[0]
    n_obj = centre.shape[0]
    for i in range(n_views):
        view = views[i]
        s = np.empty(3)
        for f in range(n_spots):
            for q in range(3):
                s[q] = source[view, q] + spot_u[f] * u_axis[view, q] + spot_v[f] * v_axis[view, q]
            for k in range(n_obj):
                r = bound_radius[k]
                if curved and not parallel:
                    w = _curved_window(source[view], spot_u[f], spot_v[f], detector_centre[view],
                                       u_axis[view], v_axis[view], centre[k], r, is_prism[k])
                else:
                    w = _object_window(parallel, s, direction[view],
                                       detector_centre[view], u_axis[view], v_axis[view],
                                       centre[k], r, is_prism[k])
                # a small margin against rounding: rays on the boundary touch the bounding
                # sphere, so they can at most graze the object
                if w[0] > w[1]:
                    out[i, f, k, 0] = np.inf
                    out[i, f, k, 1] = -np.inf
                    out[i, f, k, 2] = np.inf
                    out[i, f, k, 3] = -np.inf
                    continue
                margin_u = 1e-9 * (abs(w[0]) + abs(w[1]) + r) + 1e-12
                margin_v = 1e-9 * (abs(w[2]) + abs(w[3]) + r) + 1e-12
                out[i, f, k, 0] = w[0] - margin_u
                out[i, f, k, 1] = w[1] + margin_u
                out[i, f, k, 2] = w[2] - margin_v
                out[i, f, k, 3] = w[3] + margin_v


# --------------------------------------------------------------------------------------------
# One ray through the candidate objects
# --------------------------------------------------------------------------------------------


@njit(cache=True, error_model="numpy", _nrt=False, forceinline=True)
def _covered_insert(cs, ce, ncov, a, b):
    """Insert [a, b] into the sorted disjoint union ``cs[:ncov], ce[:ncov]``; new count."""
    i = 0
    while i < ncov and ce[i] < a:
        i += 1
    j = i
    nb, ne = a, b
    while j < ncov and cs[j] <= b:
        if cs[j] < nb:
            nb = cs[j]
        if ce[j] > ne:
            ne = ce[j]
        j += 1
    merged = j - i
    if merged == 0:
        for p in range(ncov, i, -1):
            cs[p] = cs[p - 1]
            ce[p] = ce[p - 1]
        cs[i] = nb
        ce[i] = ne
        return ncov + 1
    cs[i] = nb
    ce[i] = ne
    shift = merged - 1
    if shift > 0:
        for p in range(i + 1, ncov - shift):
            cs[p] = cs[p + shift]
            ce[p] = ce[p + shift]
    return ncov - shift


@njit(cache=True, error_model="numpy", _nrt=False, forceinline=True)
def trace_ray(ox, oy, oz, dx, dy, dz, t_min, t_max, u, cand, n_cand, win,
              shape, centre, rotation, half_sizes, inv_half, params, mode, material,
              poly_start, poly_count, poly_xy, t0buf, t1buf, kbuf, cs, ce, crossings, acc):
    """Accumulate the path length of one ray in each material into ``acc``.

    Notes
    -----
    Composition (``compiled.py``): at a point, the last replace object containing it and
    the add objects after it contribute. Walking the objects from last to first with the
    union C of the replace intervals already seen, object k contributes
    ``|I_k| - |I_k intersect C|`` to its material; a replace object then joins C.
    """
    # (counters passed to helpers start as np.int64(0), not 0: numba would compile each
    # helper a second time for the literal 0)
    n = np.int64(0)
    for ci in range(n_cand):
        k = cand[ci]
        if u < win[k, 0] or u > win[k, 1]:
            continue
        ex = ox - centre[k, 0]
        ey = oy - centre[k, 1]
        ez = oz - centre[k, 2]
        if (rotation[k, 0, 0] == 1.0 and rotation[k, 1, 1] == 1.0 and rotation[k, 2, 2] == 1.0
                and rotation[k, 0, 1] == 0.0 and rotation[k, 0, 2] == 0.0
                and rotation[k, 1, 0] == 0.0 and rotation[k, 1, 2] == 0.0
                and rotation[k, 2, 0] == 0.0 and rotation[k, 2, 1] == 0.0):
            # exactly the identity: skip the turn (a unit diagonal alone is not enough in
            # floating point: below about 1e-8 rad the cosine rounds to 1 and the sine does not)
            lx = ex
            ly = ey
            lz = ez
            ldx = dx
            ldy = dy
            ldz = dz
        else:
            lx = rotation[k, 0, 0] * ex + rotation[k, 0, 1] * ey + rotation[k, 0, 2] * ez
            ly = rotation[k, 1, 0] * ex + rotation[k, 1, 1] * ey + rotation[k, 1, 2] * ez
            lz = rotation[k, 2, 0] * ex + rotation[k, 2, 1] * ey + rotation[k, 2, 2] * ez
            ldx = rotation[k, 0, 0] * dx + rotation[k, 0, 1] * dy + rotation[k, 0, 2] * dz
            ldy = rotation[k, 1, 0] * dx + rotation[k, 1, 1] * dy + rotation[k, 1, 2] * dz
            ldz = rotation[k, 2, 0] * dx + rotation[k, 2, 1] * dy + rotation[k, 2, 2] * dz
        # move the origin to the point of the ray nearest the centre (well-conditioned roots)
        tc = -(lx * ldx + ly * ldy + lz * ldz)
        lx += tc * ldx
        ly += tc * ldy
        lz += tc * ldz
        code = shape[k]
        if code == POLYGON_2D:
            n_new = polygon_prism_intervals(lx, ly, ldx, ldy, poly_xy, poly_start[k],
                                            poly_count[k], crossings, t0buf, t1buf, n)
            m = n
            for q in range(n, n_new):
                a = max(t0buf[q] + tc, t_min)
                b = min(t1buf[q] + tc, t_max)
                if b > a:
                    t0buf[m] = a
                    t1buf[m] = b
                    kbuf[m] = k
                    m += 1
            n = m
            continue
        if code == ELLIPSOID:
            t0, t1 = ellipsoid_interval(lx, ly, lz, ldx, ldy, ldz, inv_half[k, 0],
                                        inv_half[k, 1], inv_half[k, 2])
        elif code == CYLINDER:
            t0, t1 = cylinder_interval(lx, ly, lz, ldx, ldy, ldz, inv_half[k, 0],
                                       inv_half[k, 1], half_sizes[k, 2])
        elif code == BOX:
            t0, t1 = box_interval(lx, ly, lz, ldx, ldy, ldz, half_sizes[k, 0],
                                  half_sizes[k, 1], half_sizes[k, 2])
        elif code == ELLIPSE_2D:
            t0, t1 = ellipse_prism_interval(lx, ly, ldx, ldy, inv_half[k, 0], inv_half[k, 1])
        elif code == RECTANGLE_2D:
            t0, t1 = rectangle_prism_interval(lx, ly, ldx, ldy, half_sizes[k, 0],
                                              half_sizes[k, 1])
        elif code == CONE:
            t0, t1 = cone_interval(lx, ly, lz, ldx, ldy, ldz, params[k, 0], params[k, 1],
                                   half_sizes[k, 2])
        else:
            continue
        a = max(t0 + tc, t_min)
        b = min(t1 + tc, t_max)
        if b > a:
            t0buf[n] = a
            t1buf[n] = b
            kbuf[n] = k
            n += 1
    ncov = np.int64(0)
    for q in range(n - 1, -1, -1):
        k = kbuf[q]
        a = t0buf[q]
        b = t1buf[q]
        overlap = 0.0
        for p in range(ncov):
            lo = max(a, cs[p])
            hi = min(b, ce[p])
            if hi > lo:
                overlap += hi - lo
        length = (b - a) - overlap
        if length > 0.0:
            acc[material[k]] += length
        if mode[k] == REPLACE:
            ncov = _covered_insert(cs, ce, ncov, a, b)


@njit(cache=True, error_model="numpy", forceinline=True)
def _trace_objects_block(blk, n_blocks, parallel, curved, source, direction, detector_centre,
                         u_axis, v_axis, views, out_view0, col_u, row_v, cell_du, cell_dv,
                         spot_u, spot_v, windows, shape, centre, rotation, half_sizes, inv_half,
                         params, mode, material, poly_start, poly_count, poly_xy, max_intervals,
                         max_poly, dv_max, out):
    """Trace the tasks ``blk, blk + n_blocks, ...`` of a chunk; the number of bad rays."""
    n_rows = row_v.shape[0]
    n_cols = col_u.shape[0]
    n_cell = cell_du.shape[0]
    n_spot = spot_u.shape[0]
    n_obj = shape.shape[0]
    n_mat = out.shape[0]
    n_tasks = views.shape[0] * n_spot * n_rows
    cand = np.empty(n_obj, np.int64)
    t0buf = np.empty(max_intervals)
    t1buf = np.empty(max_intervals)
    kbuf = np.empty(max_intervals, np.int64)
    cs = np.empty(max_intervals + 1)
    ce = np.empty(max_intervals + 1)
    crossings = np.empty(max_poly + 1)
    acc = np.zeros(n_mat)
    n_bad = 0
    for task in range(blk, n_tasks, n_blocks):
        i = task // (n_spot * n_rows)
        rem = task - i * (n_spot * n_rows)
        f = rem // n_rows
        r = rem - f * n_rows
        view = views[i]
        win = windows[i, f]
        v_row = row_v[r]
        n_cand = np.int64(0)  # (not the literal 0: trace_ray would compile twice)
        for k in range(n_obj):
            if win[k, 2] <= v_row + dv_max and win[k, 3] >= v_row - dv_max \
                    and win[k, 0] <= win[k, 1]:
                cand[n_cand] = k
                n_cand += 1
        for j in range(n_cols):
            for s in range(n_cell):
                u = col_u[j] + cell_du[s]
                for m in range(n_mat):
                    acc[m] = 0.0
                if n_cand > 0:
                    ox, oy, oz, dx, dy, dz, t_min, t_max = detector_ray(
                        parallel, curved, source, direction, detector_centre, u_axis,
                        v_axis, view, u, v_row + cell_dv[s], spot_u[f], spot_v[f])
                    trace_ray(ox, oy, oz, dx, dy, dz, t_min, t_max, u, cand, n_cand, win,
                              shape, centre, rotation, half_sizes, inv_half, params,
                              mode, material, poly_start, poly_count, poly_xy, t0buf, t1buf,
                              kbuf, cs, ce, crossings, acc)
                col = f * n_cell + s
                for m in range(n_mat):
                    if not math.isfinite(acc[m]):
                        n_bad += 1
                    out[m, out_view0 + i, r, j, col] = acc[m]
    return n_bad


@njit(parallel=True, cache=True, error_model="numpy")
def trace_objects_chunk(parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                        views, out_view0, col_u, row_v, cell_du, cell_dv, spot_u, spot_v,
                        windows, shape, centre, rotation, half_sizes, inv_half, params, mode,
                        material, poly_start, poly_count, poly_xy, max_intervals, max_poly,
                        n_blocks, out):
    """Trace a chunk of views; writes ``out[m, out_view0 + i, row, col, f * S + s]``.

    Returns the number of rays whose result is not finite (a ray running along the axis
    of an unbounded 2-D prism).
    """
    dv_max = 0.0
    for s in range(cell_dv.shape[0]):
        dv_max = max(dv_max, abs(cell_dv[s]))
    n_tasks = views.shape[0] * spot_u.shape[0] * row_v.shape[0]
    n_blocks = max(1, min(n_tasks, n_blocks))
    bad = np.zeros(n_blocks, np.int64)
    for blk in prange(n_blocks):
        # (the index as int64: numba types a prange index unsigned inside the parallel loop,
        # which would compile the block function a second time, for uint64)
        bad[blk] = _trace_objects_block(
            np.int64(blk), n_blocks, parallel, curved, source, direction, detector_centre, u_axis, v_axis,
            views, out_view0, col_u, row_v, cell_du, cell_dv, spot_u, spot_v, windows, shape,
            centre, rotation, half_sizes, inv_half, params, mode, material, poly_start,
            poly_count, poly_xy, max_intervals, max_poly, dv_max, out)
    return bad.sum()
