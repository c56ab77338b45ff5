"""Numba kernels: point membership of each primitive, and per-pixel composition.

Membership tests work in the object's local frame (``local = rotation @ (p - centre)``) with
the shape codes of :mod:`simbench.phantom.compiled`. Boundaries count as inside (``<=``); they
have zero area, so sub-sampled areas do not depend on that choice.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from simbench.phantom.compiled import (BOX, CONE, CYLINDER, ELLIPSE_2D, ELLIPSOID, POLYGON_2D,
                                       RECTANGLE_2D)


@njit(cache=True)
def inside_ellipsoid(x, y, z, a, b, c):
    """(x/a)^2 + (y/b)^2 + (z/c)^2 <= 1."""
    return (x / a) ** 2 + (y / b) ** 2 + (z / c) ** 2 <= 1.0


@njit(cache=True)
def inside_ellipse(x, y, a, b):
    """(x/a)^2 + (y/b)^2 <= 1 (any z)."""
    return (x / a) ** 2 + (y / b) ** 2 <= 1.0


@njit(cache=True)
def inside_box(x, y, z, a, b, c):
    """|x| <= a, |y| <= b, |z| <= c."""
    return abs(x) <= a and abs(y) <= b and abs(z) <= c


@njit(cache=True)
def inside_rectangle(x, y, a, b):
    """|x| <= a, |y| <= b (any z)."""
    return abs(x) <= a and abs(y) <= b


@njit(cache=True)
def inside_cylinder(x, y, z, a, b, c):
    """(x/a)^2 + (y/b)^2 <= 1 and |z| <= c."""
    return abs(z) <= c and (x / a) ** 2 + (y / b) ** 2 <= 1.0


@njit(cache=True)
def inside_cone(x, y, z, c, r0, r1):
    """|z| <= c and x^2 + y^2 <= r(z)^2 with r(z) = r0 + (r1 - r0) (z + c) / (2c)."""
    if abs(z) > c:
        return False
    r = r0 + (r1 - r0) * (z + c) / (2.0 * c)
    return x * x + y * y <= r * r


@njit(cache=True)
def inside_polygon(x, y, poly_xy, start, count):
    """Even-odd (crossing number) test: a ray toward +x crosses the boundary an odd number of
    times. Correct for any simple polygon, convex or not, either winding."""
    inside = False
    j = start + count - 1
    for i in range(start, start + count):
        xi, yi = poly_xy[i, 0], poly_xy[i, 1]
        xj, yj = poly_xy[j, 0], poly_xy[j, 1]
        if (yi > y) != (yj > y):
            x_cross = xi + (y - yi) * (xj - xi) / (yj - yi)
            if x < x_cross:
                inside = not inside
        j = i
    return inside


@njit(cache=True)
def contains(k, px, py, pz, shape, centre, rotation, half, params, poly_start, poly_count,
             poly_xy, bound):
    """Whether world point (px, py, pz) lies in primitive k."""
    dx = px - centre[k, 0]
    dy = py - centre[k, 1]
    dz = pz - centre[k, 2]
    code = shape[k]
    prism = code == ELLIPSE_2D or code == RECTANGLE_2D or code == POLYGON_2D
    r2 = dx * dx + dy * dy
    if not prism:
        r2 += dz * dz
    if r2 > bound[k] * bound[k]:
        return False
    rot = rotation[k]
    x = rot[0, 0] * dx + rot[0, 1] * dy + rot[0, 2] * dz
    y = rot[1, 0] * dx + rot[1, 1] * dy + rot[1, 2] * dz
    z = rot[2, 0] * dx + rot[2, 1] * dy + rot[2, 2] * dz
    if code == ELLIPSOID:
        return inside_ellipsoid(x, y, z, half[k, 0], half[k, 1], half[k, 2])
    if code == ELLIPSE_2D:
        return inside_ellipse(x, y, half[k, 0], half[k, 1])
    if code == BOX:
        return inside_box(x, y, z, half[k, 0], half[k, 1], half[k, 2])
    if code == RECTANGLE_2D:
        return inside_rectangle(x, y, half[k, 0], half[k, 1])
    if code == CYLINDER:
        return inside_cylinder(x, y, z, half[k, 0], half[k, 1], half[k, 2])
    if code == CONE:
        return inside_cone(x, y, z, half[k, 2], params[k, 0], params[k, 1])
    if code == POLYGON_2D:
        return inside_polygon(x, y, poly_xy, poly_start[k], poly_count[k])
    return False


@njit(cache=True)
def _cell_state(k, cx, cy, cz, hx, hy, hz, shape, centre, rotation, half, params, poly_start,
                poly_count, poly_xy, bound):
    """-1: the cell (centre c, half widths h) is wholly outside primitive k; +1: wholly inside
    (convex shapes with all 8 corners inside); 0: undecided."""
    dx = cx - centre[k, 0]
    dy = cy - centre[k, 1]
    dz = cz - centre[k, 2]
    code = shape[k]
    prism = code == ELLIPSE_2D or code == RECTANGLE_2D or code == POLYGON_2D
    if prism:
        dist = np.sqrt(dx * dx + dy * dy)
        reach = np.sqrt(hx * hx + hy * hy)
    else:
        dist = np.sqrt(dx * dx + dy * dy + dz * dz)
        reach = np.sqrt(hx * hx + hy * hy + hz * hz)
    if dist > bound[k] + reach:
        return -1
    if code == POLYGON_2D:
        return 0
    for corner in range(8):
        sx = hx if corner & 1 else -hx
        sy = hy if corner & 2 else -hy
        sz = hz if corner & 4 else -hz
        if not contains(k, cx + sx, cy + sy, cz + sz, shape, centre, rotation, half, params,
                        poly_start, poly_count, poly_xy, bound):
            return 0
    return 1


@njit(cache=True)
def _compose(px, py, pz, cand, n_cand, shape, centre, rotation, half, params, mode, mu,
             poly_start, poly_count, poly_xy, bound):
    value = 0.0
    for i in range(n_cand):
        k = cand[i]
        if contains(k, px, py, pz, shape, centre, rotation, half, params, poly_start,
                    poly_count, poly_xy, bound):
            if mode[k] == 0:
                value = mu[k]
            else:
                value += mu[k]
    return value


@njit(parallel=True, cache=True)
def rasterize_objects(xs, ys, zs, offx, offy, offz, hx, hy, hz, shape, centre, rotation, half,
                      params, mode, mu, poly_start, poly_count, poly_xy, bound, out):
    """Mean composed mu over sub-samples of every cell of a regular grid.

    Parameters
    ----------
    xs, ys, zs : float64 (nx,), (ny,), (nz,)
        Cell centres, mm.
    offx, offy, offz : float64 (sx,), (sy,), (sz,)
        Sub-sample offsets from the cell centre, mm.
    hx, hy, hz : float
        Half widths of the cell, mm (for whole-cell decisions).
    mu : float64 (K,)
        mu of every primitive, 1/mm.
    out : float64 (nz, ny, nx)
        Result.

    Notes
    -----
    Per row of cells, only primitives whose bounding sphere reaches the row's band are
    considered; per cell, primitives whose bounding sphere misses the cell are skipped, and a
    convex primitive containing all 8 corners contains the whole cell; when no primitive is
    left undecided the cell is uniform and its centre value is exact.
    """
    nz, ny, nx = out.shape
    n_obj = shape.shape[0]
    n_sub = offx.shape[0] * offy.shape[0] * offz.shape[0]
    reach_prism = np.sqrt(hx * hx + hy * hy)
    reach_solid = np.sqrt(hx * hx + hy * hy + hz * hz)
    for row in prange(nz * ny):
        iz = row // ny
        iy = row % ny
        # the objects whose bounding sphere reaches this row's band of cells, in painting
        # order: a cell's distance to a centre is at least its y (and z) distance, so no
        # object that _cell_state could keep is left out
        row_obj = np.empty(n_obj, np.int64)
        n_row = 0
        for k in range(n_obj):
            code = shape[k]
            if code == ELLIPSE_2D or code == RECTANGLE_2D or code == POLYGON_2D:
                if abs(ys[iy] - centre[k, 1]) <= bound[k] + reach_prism:
                    row_obj[n_row] = k
                    n_row += 1
            elif (abs(ys[iy] - centre[k, 1]) <= bound[k] + reach_solid
                  and abs(zs[iz] - centre[k, 2]) <= bound[k] + reach_solid):
                row_obj[n_row] = k
                n_row += 1
        cand = np.empty(n_row, np.int64)  # one scratch list per row of cells
        for ix in range(nx):
            cx, cy, cz = xs[ix], ys[iy], zs[iz]
            n_cand = np.int64(0)  # (not the literal 0: _compose would compile twice)
            undecided = False
            for i in range(n_row):
                k = row_obj[i]
                state = _cell_state(k, cx, cy, cz, hx, hy, hz, shape, centre, rotation, half,
                                    params, poly_start, poly_count, poly_xy, bound)
                if state >= 0:
                    cand[n_cand] = k
                    n_cand += 1
                    if state == 0:
                        undecided = True
            if not undecided:
                out[iz, iy, ix] = _compose(cx, cy, cz, cand, n_cand, shape, centre, rotation,
                                           half, params, mode, mu, poly_start, poly_count,
                                           poly_xy, bound)
                continue
            acc = 0.0
            for a in range(offz.shape[0]):
                for b in range(offy.shape[0]):
                    for c in range(offx.shape[0]):
                        acc += _compose(cx + offx[c], cy + offy[b], cz + offz[a], cand, n_cand,
                                        shape, centre, rotation, half, params, mode, mu,
                                        poly_start, poly_count, poly_xy, bound)
            out[iz, iy, ix] = acc / n_sub


@njit(cache=True)
def _label_at(px, py, pz, cand, n_cand, shape, centre, rotation, half, params, mode, roi,
              poly_start, poly_count, poly_xy, bound):
    label = 0
    for i in range(n_cand):
        k = cand[i]
        if contains(k, px, py, pz, shape, centre, rotation, half, params, poly_start,
                    poly_count, poly_xy, bound):
            if mode[k] == 0:
                label = roi[k]
            elif roi[k] > 0:
                label = roi[k]
    return label


@njit(parallel=True, cache=True)
def label_objects(xs, ys, zs, offx, offy, offz, shape, centre, rotation, half, params, mode,
                  roi, poly_start, poly_count, poly_xy, bound, out):
    """ROI label of every cell: the label shared by all its sub-samples, else 0.

    At a point, painting in order, a ``replace`` object sets the label to its own (0 if it is
    not a ROI) and an ``add`` object that is a ROI sets it to its own.
    """
    nz, ny, nx = out.shape
    n_obj = shape.shape[0]
    spread_y = np.max(np.abs(offy))
    spread_z = np.max(np.abs(offz))
    for row in prange(nz * ny):
        iz = row // ny
        iy = row % ny
        # objects that can contain a sub-sample of this row (contains() refuses points
        # farther than the bounding radius), in painting order
        cand = np.empty(n_obj, np.int64)
        n_cand = np.int64(0)  # (not the literal 0: _label_at would compile twice)
        for k in range(n_obj):
            code = shape[k]
            prism = code == ELLIPSE_2D or code == RECTANGLE_2D or code == POLYGON_2D
            if abs(ys[iy] - centre[k, 1]) <= bound[k] + spread_y and (
                    prism or abs(zs[iz] - centre[k, 2]) <= bound[k] + spread_z):
                cand[n_cand] = k
                n_cand += 1
        for ix in range(nx):
            first = -1
            for a in range(offz.shape[0]):
                for b in range(offy.shape[0]):
                    for c in range(offx.shape[0]):
                        lab = _label_at(xs[ix] + offx[c], ys[iy] + offy[b], zs[iz] + offz[a],
                                        cand, n_cand, shape, centre, rotation, half, params,
                                        mode, roi, poly_start, poly_count, poly_xy, bound)
                        if first == -1:
                            first = lab
                        elif lab != first:
                            first = 0
            out[iz, iy, ix] = first


@njit(parallel=True, cache=True)
def resample_nearest(xs, ys, zs, offx, offy, offz, volume, origin, spacing, out):
    """Mean over sub-samples of the voxel value that contains each sub-sample (0 outside).

    ``origin`` is the outer corner of voxel (0, 0, 0) (x, y, z), ``spacing`` (dx, dy, dz).
    """
    nz, ny, nx = out.shape
    vz, vy, vx = volume.shape
    n_sub = offx.shape[0] * offy.shape[0] * offz.shape[0]
    for flat in prange(nz * ny * nx):
        iz = flat // (ny * nx)
        iy = (flat // nx) % ny
        ix = flat % nx
        acc = 0.0
        for a in range(offz.shape[0]):
            kz = int(np.floor((zs[iz] + offz[a] - origin[2]) / spacing[2]))
            if kz < 0 or kz >= vz:
                continue
            for b in range(offy.shape[0]):
                ky = int(np.floor((ys[iy] + offy[b] - origin[1]) / spacing[1]))
                if ky < 0 or ky >= vy:
                    continue
                for c in range(offx.shape[0]):
                    kx = int(np.floor((xs[ix] + offx[c] - origin[0]) / spacing[0]))
                    if kx < 0 or kx >= vx:
                        continue
                    acc += volume[kz, ky, kx]
        out[iz, iy, ix] = acc / n_sub
