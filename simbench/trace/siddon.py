"""Siddon's method for voxel phantoms (numba): exact path length of a ray in every voxel.

Voxels are half-open boxes ``[lo, hi)`` along each axis: a ray running exactly in a plane of
voxel faces is counted in the voxels on the + side of that plane. The ray is clipped to the
grid box, then walked voxel by voxel in the incremental form of
Jacobs et al.: at each step the nearest of the next x, y (and z) plane crossings ends the
current segment. Plane positions are recomputed from their index (``lo + k * spacing``) at
every step, so no error accumulates along the ray.

References
----------
R. L. Siddon, "Fast calculation of the exact radiological path for a three-dimensional CT
array", Med. Phys. 12(2), 252-255 (1985).
F. Jacobs, E. Sundermann, B. De Sutter, M. Christiaens, I. Lemahieu, "A fast algorithm to
calculate the exact radiological path through a pixel or voxel space", J. Comput. Inf.
Technol. 6(1), 89-94 (1998).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from simbench.geometry.rays import detector_ray


@njit(cache=True, error_model="numpy", forceinline=True)
def _first_plane(lo, spacing, index, direction, origin):
    """Parameter of the next plane crossed along one axis from voxel ``index``."""
    if direction > 0.0:
        return (lo + (index + 1) * spacing - origin) / direction
    if direction < 0.0:
        return (lo + index * spacing - origin) / direction
    return np.inf


@njit(cache=True, error_model="numpy", _nrt=False, forceinline=True)
def siddon_ray(ox, oy, oz, dx, dy, dz, t_min, t_max, lo, spacing, use_z,
               material_volume, mu_volume, use_mu, acc):
    """Accumulate one ray's voxel path lengths into ``acc``.

    Parameters
    ----------
    ox, oy, oz, dx, dy, dz, t_min, t_max : float
        The ray (unit direction) and its parameter range, mm.
    lo : float64 (3,)
        Lower grid corner (x, y, z), mm.
    spacing : float64 (3,)
        Voxel size (dx, dy, dz), mm.
    use_z : bool
        False for 2-D volumes (one slice, unbounded along z).
    material_volume : int32 (nz, ny, nx)
        Material index per voxel (-1 vacuum); used when ``use_mu`` is False.
    mu_volume : float64 (nz, ny, nx)
        mu per voxel in 1/mm; used when ``use_mu`` is True (accumulated into ``acc[0]``).
    acc : float64 (M,)
    """
    if use_mu:
        nz, ny, nx = mu_volume.shape
    else:
        nz, ny, nx = material_volume.shape
    t0 = t_min
    t1 = t_max
    o = (ox, oy, oz)
    d = (dx, dy, dz)
    nn = (nx, ny, nz)
    n_axes = 3 if use_z else 2
    for a in range(n_axes):
        hi = lo[a] + nn[a] * spacing[a]
        if d[a] != 0.0:
            s0 = (lo[a] - o[a]) / d[a]
            s1 = (hi - o[a]) / d[a]
            if s0 > s1:
                s0, s1 = s1, s0
            if s0 > t0:
                t0 = s0
            if s1 < t1:
                t1 = s1
        elif o[a] < lo[a] or o[a] >= hi:
            # a ray in a plane of voxel faces belongs to the voxels on its + side
            # (half-open voxels [lo, hi)); the grid's upper face is outside
            return
    if not t1 > t0:
        return
    # voxel of the entry point (clamped against rounding on the grid faces)
    px = ox + t0 * dx
    py = oy + t0 * dy
    ix = min(max(int(math.floor((px - lo[0]) / spacing[0])), 0), nx - 1)
    iy = min(max(int(math.floor((py - lo[1]) / spacing[1])), 0), ny - 1)
    iz = 0
    if use_z:
        pz = oz + t0 * dz
        iz = min(max(int(math.floor((pz - lo[2]) / spacing[2])), 0), nz - 1)
    sx = 1 if dx > 0.0 else -1
    sy = 1 if dy > 0.0 else -1
    sz = 1 if dz > 0.0 else -1
    tnx = _first_plane(lo[0], spacing[0], ix, dx, ox)
    tny = _first_plane(lo[1], spacing[1], iy, dy, oy)
    tnz = _first_plane(lo[2], spacing[2], iz, dz, oz) if use_z else np.inf
    tc = t0
    while True:
        tn = tnx
        axis = 0
        if tny < tn:
            tn = tny
            axis = 1
        if tnz < tn:
            tn = tnz
            axis = 2
        end = tn if tn < t1 else t1
        seg = end - tc
        if seg > 0.0:
            if use_mu:
                acc[0] += seg * mu_volume[iz, iy, ix]
            else:
                m = material_volume[iz, iy, ix]
                if m >= 0:
                    acc[m] += seg
            tc = end
        if tn >= t1:
            break
        if axis == 0:
            ix += sx
            if ix < 0 or ix >= nx:
                break
            tnx = _first_plane(lo[0], spacing[0], ix, dx, ox)
        elif axis == 1:
            iy += sy
            if iy < 0 or iy >= ny:
                break
            tny = _first_plane(lo[1], spacing[1], iy, dy, oy)
        else:
            iz += sz
            if iz < 0 or iz >= nz:
                break
            tnz = _first_plane(lo[2], spacing[2], iz, dz, oz)


@njit(cache=True, error_model="numpy", forceinline=True)
def _trace_voxels_block(blk, n_blocks, parallel, curved, source, direction, detector_centre,
                        u_axis, v_axis, views, out_view0, col_u, row_v, cell_du, cell_dv, spot_u,
                        spot_v, lo, spacing, use_z, material_volume, mu_volume, use_mu, out):
    """Trace the tasks ``blk, blk + n_blocks, ...`` of a chunk (one parallel block)."""
    n_rows = row_v.shape[0]
    n_cols = col_u.shape[0]
    n_cell = cell_du.shape[0]
    n_spot = spot_u.shape[0]
    n_mat = out.shape[0]
    n_tasks = views.shape[0] * n_spot * n_rows
    acc = np.zeros(n_mat)
    for task in range(blk, n_tasks, n_blocks):
        i = task // (n_spot * n_rows)
        rem = task - i * (n_spot * n_rows)
        f = rem // n_rows
        r = rem - f * n_rows
        view = views[i]
        for j in range(n_cols):
            for s in range(n_cell):
                for m in range(n_mat):
                    acc[m] = 0.0
                ox, oy, oz, dx, dy, dz, t_min, t_max = detector_ray(
                    parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                    view, col_u[j] + cell_du[s], row_v[r] + cell_dv[s], spot_u[f], spot_v[f])
                siddon_ray(ox, oy, oz, dx, dy, dz, t_min, t_max, lo, spacing, use_z,
                           material_volume, mu_volume, use_mu, acc)
                col = f * n_cell + s
                for m in range(n_mat):
                    out[m, out_view0 + i, r, j, col] = acc[m]


@njit(parallel=True, cache=True, error_model="numpy")
def trace_voxels_chunk(parallel, curved, source, direction, detector_centre, u_axis, v_axis,
                       views, out_view0, col_u, row_v, cell_du, cell_dv, spot_u, spot_v,
                       lo, spacing, use_z, material_volume, mu_volume, use_mu, n_blocks, out):
    """Trace a chunk of views through a voxel volume; writes
    ``out[m, out_view0 + i, row, col, f * S + s]``.

    The body of the parallel loop is its own function, and the per-ray helpers are inlined by
    LLVM without reference counting, as in :mod:`simbench.trace.analytic` (compile time).
    """
    n_tasks = views.shape[0] * spot_u.shape[0] * row_v.shape[0]
    n_blocks = max(1, min(n_tasks, n_blocks))
    for blk in prange(n_blocks):
        # (the index as int64: a prange index is unsigned inside the parallel loop)
        _trace_voxels_block(np.int64(blk), n_blocks, parallel, curved, source, direction,
                            detector_centre, u_axis, v_axis, views, out_view0, col_u, row_v,
                            cell_du, cell_dv, spot_u, spot_v, lo, spacing, use_z,
                            material_volume, mu_volume, use_mu, out)
