"""Numba kernels of Joseph's projector and its exact transpose.

Every ray comes from :func:`simbench.geometry.rays.detector_ray`. A ray walks its *driving
axis* a (the axis it crosses most voxel planes of: largest ``|d_a| / spacing_a``) one plane of
voxel centres at a time; at plane k its position along each other axis b is the fractional
voxel index ``f_b(k) = A_b + k * B_b``, where the image is interpolated linearly (bilinearly
in 3-D) between the neighbouring voxel centres, zero outside the grid. The line integral is
``weight * sum_k f(k)`` with ``weight = spacing_a / |d_a|``, the length of ray per plane.

The forward kernel sums along each ray (one ray per loop pass, so its bits never depend on
the thread count). The back kernel is the transpose of the same discrete operator: it spreads
``weight * p`` over the same voxels with the same interpolation weights, computed by the same
inlined functions from the same numbers. To stay free of races, the image is cut into slabs of
whole planes along its outermost axis; each parallel task owns one slab, visits the rays that
reach it (a first pass notes, per ray, the slab-axis voxel range it can touch) in the fixed
order (view, row, column), and writes only inside its slab. Every voxel thus receives its
terms in the same order whatever the number of slabs or threads: same bits.

Each walk runs in three pieces: a head and a tail that check every voxel index against the
window, and a middle where both neighbours along every interpolated axis are proven inside it
(the index is monotone along the ray, so checking the middle's two ends proves it), which
reads and writes without checks. The pieces give each (plane, voxel) term exactly as a fully
checked walk would.

Kernels trust their inputs (checked in :mod:`simbench.recon.projectors`) and use float64
without fastmath.

Note: numba's on-disk cache does not notice edits to inlined helpers in other modules
(``simbench.geometry.rays``); after editing them, delete ``__pycache__``.

References
----------
P. M. Joseph, "An improved algorithm for reprojecting rays through pixel images",
IEEE Trans. Med. Imaging 1(3), 192-196 (1982).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from simbench.geometry.rays import detector_ray

#: Below this step (voxel index per plane) an axis is treated as parallel to the ray when
#: clipping: its index then drifts by < 1e-9 per plane and the in-loop bounds checks decide.
_FLAT_STEP = 1e-9

# The grid reaches the kernels as tuples indexed by axis 0, 1, 2 = x, y, z: ``first`` (centre
# of voxel 0, mm), ``spacing`` (mm), ``n`` (voxels), ``stride`` (flat-index step of the
# (nz, ny, nx) layout); a window of voxel indices is ``lo``, ``hi`` (hi exclusive). Helpers
# that take no arrays are plain numba functions (compiled once, inlined by LLVM); those that
# read or write the image are inlined at numba IR level, where calls with array arguments
# would cost reference counting on every ray.


@njit(cache=True, error_model="numpy")
def _clip_axis(start, step, lo, hi, k_lo, k_hi):
    """Narrow the plane range [k_lo, k_hi] (floats) to planes where the fractional index
    ``start + k * step`` can give weight to a voxel index in [lo, hi).

    Conservative by up to one plane on each side; the walk's bounds checks are exact.
    """
    if abs(step) < _FLAT_STEP:
        if start > lo - 2.0 and start < hi + 1.0:
            return k_lo, k_hi
        return 1.0, 0.0
    k1 = (lo - 1.0 - start) / step
    k2 = (hi - start) / step
    if step < 0.0:
        k1, k2 = k2, k1
    return max(k_lo, np.floor(k1)), min(k_hi, np.ceil(k2))


@njit(cache=True, error_model="numpy")
def ray_setup(ox, oy, oz, dx, dy, dz, t_min, t_max, first, spacing, n_axes, lo, hi):
    """Joseph's walk of one ray, restricted to the voxel window [lo, hi).

    Parameters
    ----------
    ox, oy, oz, dx, dy, dz, t_min, t_max : float
        The ray (unit direction, parameter range in mm) from ``detector_ray``.
    first, spacing : tuple of 3 float
        Centre of voxel 0 and voxel size along x, y, z (mm).
    n_axes : int
        3, or 2 for a 2-D grid (a prism along z: z is neither walked nor interpolated).
    lo, hi : tuple of 3 int
        Window of voxel indices along x, y, z (hi exclusive).

    Returns
    -------
    a, b, c : int
        Driving axis and the two others (c is z, unused, when ``n_axes == 2``).
    start_b, step_b, start_c, step_c : float
        Fractional voxel index along b and c at plane k: ``start + k * step``.
    weight : float
        Ray length per plane, ``spacing_a / |d_a|`` (mm).
    k0, k1 : int
        Planes to visit (none when k1 < k0).
    """
    o = (ox, oy, oz)
    d = (dx, dy, dz)
    a = 0
    best = abs(dx) / spacing[0]
    r = abs(dy) / spacing[1]
    if r > best:
        a = 1
        best = r
    if n_axes == 3:
        r = abs(dz) / spacing[2]
        if r > best:
            a = 2
            best = r
    if not best > 0.0:
        # a ray along z through a 2-D grid (a prism) crosses no plane
        return 0, 1, 2, 0.0, 0.0, 0.0, 0.0, 0.0, 1, 0
    if a == 0:
        b, c = 1, 2
    elif a == 1:
        b, c = 0, 2
    else:
        b, c = 0, 1
    tau = spacing[a] / d[a]
    t0 = (first[a] - o[a]) / d[a]
    start_b = (o[b] + t0 * d[b] - first[b]) / spacing[b]
    step_b = tau * d[b] / spacing[b]
    start_c = 0.0
    step_c = 0.0
    if n_axes == 3:
        start_c = (o[c] + t0 * d[c] - first[c]) / spacing[c]
        step_c = tau * d[c] / spacing[c]
    k_lo = float(lo[a])
    k_hi = float(hi[a] - 1)
    # the ray's own parameter range (a divergent ray runs from the source to the detector)
    t_first, t_last = (t_min, t_max) if tau > 0.0 else (t_max, t_min)
    if abs(t_first) < np.inf:
        k_lo = max(k_lo, np.ceil((t_first - t0) / tau))
    if abs(t_last) < np.inf:
        k_hi = min(k_hi, np.floor((t_last - t0) / tau))
    k_lo, k_hi = _clip_axis(start_b, step_b, lo[b], hi[b], k_lo, k_hi)
    if n_axes == 3:
        k_lo, k_hi = _clip_axis(start_c, step_c, lo[c], hi[c], k_lo, k_hi)
    if k_hi < k_lo:
        return a, b, c, start_b, step_b, start_c, step_c, abs(tau), 1, 0
    return a, b, c, start_b, step_b, start_c, step_c, abs(tau), int(k_lo), int(k_hi)


@njit(cache=True, error_model="numpy")
def _cell(start, step, k):
    """Voxel index i and weight w at plane k along one axis: the position is i + w."""
    f = start + k * step
    i = math.floor(f)
    return i, f - i


@njit(cache=True, error_model="numpy")
def _inner_planes(start, step, lo, hi, k0, k1):
    """Sub-range of planes [k0, k1] where both voxels read along one axis, i and i + 1,
    lie in [lo, hi), so that the walk may skip its bounds checks there.

    The index is monotone in k, so checking it at the two ends proves the whole range;
    when the check fails the range is empty (the checked loop then does all planes).
    """
    if hi - lo < 2 or k1 < k0:
        return 1, 0
    first = float(k0)
    last = float(k1)
    if abs(step) >= _FLAT_STEP:
        x1 = (lo - start) / step
        x2 = (hi - 1.0 - start) / step
        if step < 0.0:
            x1, x2 = x2, x1
        first = max(first, np.ceil(x1) + 1.0)
        last = min(last, np.floor(x2) - 1.0)
    if last < first:
        return 1, 0
    k_first = int(first)
    k_last = int(last)
    i_first = _cell(start, step, k_first)[0]
    i_last = _cell(start, step, k_last)[0]
    if min(i_first, i_last) < lo or max(i_first, i_last) + 1 >= hi:
        return 1, 0
    return k_first, k_last


@njit(cache=True, error_model="numpy")
def walk_segments(lo, hi, n_axes, b, c, start_b, step_b, start_c, step_c, k0, k1):
    """Split planes [k0, k1] into a checked head, an unchecked middle (every voxel read
    along b and c inside the window) and a checked tail.

    Returns
    -------
    tuple of 6 int
        (from, to) of the head, the middle and the tail; empty pieces have to < from.
    """
    i0, i1 = _inner_planes(start_b, step_b, lo[b], hi[b], k0, k1)
    if n_axes == 3 and i0 <= i1:
        i0, i1 = _inner_planes(start_c, step_c, lo[c], hi[c], i0, i1)
    if i1 < i0:
        return k0, k1, 1, 0, 1, 0
    return k0, i0 - 1, i0, i1, i1 + 1, k1


@njit(cache=True, inline="always", error_model="numpy")
def ray_sum(image, stride, lo, hi, n_axes, a, b, c, start_b, step_b, start_c, step_c, k0, k1):
    """Sum of the interpolated image over planes k0..k1 of one ray; voxels outside the
    window [lo, hi) read as 0. ``image`` is flat (nz * ny * nx)."""
    sa, sb, sc = stride[a], stride[b], stride[c]
    lb, hb, lc, hc = lo[b], hi[b], lo[c], hi[c]
    segments = walk_segments(lo, hi, n_axes, b, c, start_b, step_b, start_c, step_c, k0, k1)
    usb = np.uint64(sb)
    usc = np.uint64(sc)
    acc = 0.0
    for piece in range(3):
        first, last = segments[2 * piece], segments[2 * piece + 1]
        if piece == 1:
            # every voxel read lies in the window: no checks
            if n_axes == 2:
                for k in range(first, last + 1):
                    i, w = _cell(start_b, step_b, k)
                    at = np.uint64(k * sa + i * sb)
                    acc += (1.0 - w) * image[at] + w * image[at + usb]
            else:
                for k in range(first, last + 1):
                    i, w = _cell(start_b, step_b, k)
                    j, v = _cell(start_c, step_c, k)
                    at = np.uint64(k * sa + i * sb + j * sc)
                    acc += ((1.0 - v) * ((1.0 - w) * image[at] + w * image[at + usb])
                            + v * ((1.0 - w) * image[at + usc] + w * image[at + usb + usc]))
            continue
        for k in range(first, last + 1):
            i, w = _cell(start_b, step_b, k)
            in0 = i >= lb and i < hb
            in1 = i + 1 >= lb and i + 1 < hb
            j, v = 0, 0.0
            if n_axes == 3:
                j, v = _cell(start_c, step_c, k)
            at = k * sa + i * sb + j * sc
            if j >= lc and j < hc:
                if in0:
                    acc += (1.0 - w) * (1.0 - v) * image[np.uint64(at)]
                if in1:
                    acc += w * (1.0 - v) * image[np.uint64(at + sb)]
            if n_axes == 3 and j + 1 >= lc and j + 1 < hc:
                if in0:
                    acc += (1.0 - w) * v * image[np.uint64(at + sc)]
                if in1:
                    acc += w * v * image[np.uint64(at + sb + sc)]
    return acc


@njit(cache=True, inline="always", error_model="numpy")
def ray_spread(image, value, stride, lo, hi, n_axes, a, b, c, start_b, step_b, start_c,
               step_c, k0, k1):
    """Transpose of :func:`ray_sum`: add ``value`` times each interpolation weight to the
    voxels inside the window [lo, hi)."""
    sa, sb, sc = stride[a], stride[b], stride[c]
    lb, hb, lc, hc = lo[b], hi[b], lo[c], hi[c]
    segments = walk_segments(lo, hi, n_axes, b, c, start_b, step_b, start_c, step_c, k0, k1)
    usb = np.uint64(sb)
    usc = np.uint64(sc)
    for piece in range(3):
        first, last = segments[2 * piece], segments[2 * piece + 1]
        if piece == 1:
            if n_axes == 2:
                for k in range(first, last + 1):
                    i, w = _cell(start_b, step_b, k)
                    at = np.uint64(k * sa + i * sb)
                    image[at] += (1.0 - w) * value
                    image[at + usb] += w * value
            else:
                for k in range(first, last + 1):
                    i, w = _cell(start_b, step_b, k)
                    j, v = _cell(start_c, step_c, k)
                    at = np.uint64(k * sa + i * sb + j * sc)
                    image[at] += (1.0 - w) * (1.0 - v) * value
                    image[at + usb] += w * (1.0 - v) * value
                    image[at + usc] += (1.0 - w) * v * value
                    image[at + usb + usc] += w * v * value
            continue
        for k in range(first, last + 1):
            i, w = _cell(start_b, step_b, k)
            in0 = i >= lb and i < hb
            in1 = i + 1 >= lb and i + 1 < hb
            j, v = 0, 0.0
            if n_axes == 3:
                j, v = _cell(start_c, step_c, k)
            at = k * sa + i * sb + j * sc
            if j >= lc and j < hc:
                if in0:
                    image[np.uint64(at)] += (1.0 - w) * (1.0 - v) * value
                if in1:
                    image[np.uint64(at + sb)] += w * (1.0 - v) * value
            if n_axes == 3 and j + 1 >= lc and j + 1 < hc:
                if in0:
                    image[np.uint64(at + sc)] += (1.0 - w) * v * value
                if in1:
                    image[np.uint64(at + sb + sc)] += w * v * value


@njit(parallel=True, cache=True, error_model="numpy")
def forward_kernel(parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                   col_u, row_v, first, spacing, n, stride, n_axes, image, out):
    """Line integrals of the flat ``image`` along every cell ray into ``out`` (V, R, C)."""
    n_views, n_rows, n_cols = out.shape
    lo = (np.int64(0), np.int64(0), np.int64(0))
    for task in prange(n_views * n_rows):
        view = task // n_rows
        row = task - view * n_rows
        for col in range(n_cols):
            ox, oy, oz, dx, dy, dz, t_min, t_max = detector_ray(
                parallel, curved, source, direction, detector_centre, u_axis, v_axis, view,
                col_u[col], row_v[row], 0.0, 0.0)
            a, b, c, sb, db, sc, dc, weight, k0, k1 = ray_setup(
                ox, oy, oz, dx, dy, dz, t_min, t_max, first, spacing, n_axes, lo, n)
            total = 0.0
            if k0 <= k1:
                total = weight * ray_sum(image, stride, lo, n, n_axes, a, b, c, sb, db, sc,
                                         dc, k0, k1)
            out[view, row, col] = total


@njit(parallel=True, cache=True, error_model="numpy")
def slab_ranges_kernel(parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                       views, col_u, row_v, first, spacing, n, n_axes, slab_axis, lo_out,
                       hi_out):
    """Per ray of the views ``views``: the voxel indices along ``slab_axis`` it can touch,
    [lo_out, hi_out] inclusive (lo_out > hi_out when it misses the grid)."""
    n_rows = row_v.shape[0]
    n_cols = col_u.shape[0]
    lo = (np.int64(0), np.int64(0), np.int64(0))
    last = n[slab_axis] - 1
    for task in prange(views.shape[0] * n_rows):
        i = task // n_rows
        row = task - i * n_rows
        view = views[i]
        for col in range(n_cols):
            ox, oy, oz, dx, dy, dz, t_min, t_max = detector_ray(
                parallel, curved, source, direction, detector_centre, u_axis, v_axis, view,
                col_u[col], row_v[row], 0.0, 0.0)
            a, b, c, sb, db, sc, dc, weight, k0, k1 = ray_setup(
                ox, oy, oz, dx, dy, dz, t_min, t_max, first, spacing, n_axes, lo, n)
            first_index = 1
            last_index = 0
            if k0 <= k1:
                if slab_axis == a:
                    first_index, last_index = k0, k1
                else:
                    # the walk's index floor(start + k * step) is monotone in k: its
                    # extremes are at k0 and k1, and it reads voxels floor and floor + 1
                    start, step = (sb, db) if slab_axis == b else (sc, dc)
                    i0 = _cell(start, step, k0)[0]
                    i1 = _cell(start, step, k1)[0]
                    first_index = max(min(i0, i1), 0)
                    last_index = min(max(i0, i1) + 1, last)
            lo_out[i, row, col] = first_index
            hi_out[i, row, col] = last_index


@njit(parallel=True, cache=True, error_model="numpy")
def back_kernel(parallel, curved, source, direction, detector_centre, u_axis, v_axis, views,
                col_u, row_v, first, spacing, n, stride, n_axes, slab_axis, slab_bounds,
                ray_lo, ray_hi, projections, image):
    """Add the transpose of :func:`forward_kernel` applied to ``projections[views]`` into the
    flat ``image``; task s owns the voxels whose index along ``slab_axis`` lies in
    [slab_bounds[s], slab_bounds[s + 1])."""
    n_rows = row_v.shape[0]
    n_cols = col_u.shape[0]
    for s in prange(slab_bounds.shape[0] - 1):
        slab_lo = slab_bounds[s]
        slab_hi = slab_bounds[s + 1]
        lo = (slab_lo if slab_axis == 0 else 0, slab_lo if slab_axis == 1 else 0,
              slab_lo if slab_axis == 2 else 0)
        hi = (slab_hi if slab_axis == 0 else n[0], slab_hi if slab_axis == 1 else n[1],
              slab_hi if slab_axis == 2 else n[2])
        for i in range(views.shape[0]):
            view = views[i]
            for row in range(n_rows):
                for col in range(n_cols):
                    if ray_hi[i, row, col] < slab_lo or ray_lo[i, row, col] >= slab_hi:
                        continue
                    value = projections[view, row, col]
                    if value == 0.0:
                        continue
                    ox, oy, oz, dx, dy, dz, t_min, t_max = detector_ray(
                        parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                        view, col_u[col], row_v[row], 0.0, 0.0)
                    a, b, c, sb, db, sc, dc, weight, k0, k1 = ray_setup(
                        ox, oy, oz, dx, dy, dz, t_min, t_max, first, spacing, n_axes, lo, hi)
                    if k0 <= k1:
                        ray_spread(image, weight * value, stride, lo, hi, n_axes, a, b, c, sb,
                                   db, sc, dc, k0, k1)
