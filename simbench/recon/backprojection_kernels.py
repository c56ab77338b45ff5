"""Voxel-driven backprojection kernels (numba) for the analytic reconstructions.

Every kernel gathers: each output pixel (voxel column) is owned by one thread, which adds the
views in their order, so results do not depend on the number of threads. One parallel loop
(:func:`_blocks`) serves 2-D and 3-D, so numba compiles one parallel kernel. The filtered
projections arrive already multiplied by every factor that depends only on the view and the
detector cell (redundancy, cosine and quadrature weights); the kernels add only what depends
on the voxel: the detector position it projects to (linear interpolation) and, for divergent
beams, the distance weight.

Filtered projections are zero-padded: column index 0 and the last two columns (and rows, in
3-D) are zeros, so a position clamped to the padded range reads zeros and no per-voxel
branch is needed. Positions are given in padded index units: ``pos = (coordinate - first
cell centre) / pitch + 1``.

The geometry travels packed: ``views`` (V, 7) holds per view the origin (detector centre for
parallel beams, source otherwise), the central direction w and the column axis u (x and y
components; both are horizontal): ``ox, oy, oz, wx, wy, ux, uy``; ``detector`` holds
``sdd, col0, 1 / pitch_u, row0, 1 / pitch_v`` (mm, 1/mm; first column and row centres, the
column as arc length on curved detectors).

Geometry modes: 0 parallel beam, 1 flat detector, 2 equiangular curved detector. For a voxel
at r and a view with origin o (detector centre for parallel beams, source otherwise), central
direction w and column axis u (both horizontal): ``a = (r - o) . w``, ``b = (r - o) . u``;

* parallel: column coordinate ``b``, row coordinate ``z - o_z``, weight 1;
* flat: column ``SDD b / a``, row ``SDD (z - o_z) / a``, weight ``1 / a^2``;
* curved: column (arc length) ``SDD atan(b / a)`` (a > 0 inside the source orbit), row
  ``SDD (z - o_z) / L``, weight ``1 / L^2`` with ``L^2 = a^2 + b^2``.

References
----------
L. A. Feldkamp, L. C. Davis and J. W. Kress, "Practical cone-beam algorithm",
J. Opt. Soc. Am. A 1(6), 612-619 (1984).
A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging* (1988), ch. 3.
"""

from __future__ import annotations

import math

import numpy as np
from numba import float64, int64, njit, prange, uint64

PARALLEL = 0
FLAT = 1
CURVED = 2

_FIXED = 4294967296.0  # 2**32: fixed-point scale of detector positions
_INV_FIXED = 1.0 / _FIXED
_FRACTION = np.uint64(0xFFFFFFFF)

#: image rows one thread works on together in 2-D (a view's data serves them all in cache)
ROWS = 16
#: voxel columns per side of the square tiles one thread works on in 3-D
TILE = 8

_NO_ROWS = np.zeros((0, 0))
_NO_VOLUME = np.zeros((0, 0, 0), np.float32)


def backproject_2d(filtered, mode, views, detector, xs, ys, out):
    """Add the backprojection of 2-D filtered projections into an image.

    Parameters
    ----------
    filtered : float64 (V, C + 3)
        Weighted, filtered projections, zero-padded (column 0 and the last two are 0).
    mode : int
        0 parallel, 1 flat, 2 curved.
    views : float64 (V, 7)
        ``ox, oy, oz, wx, wy, ux, uy`` per view (module docstring).
    detector : float64 (5,)
        ``sdd, col0, 1 / pitch_u, row0, 1 / pitch_v`` (the last two unused in 2-D).
    xs, ys : float64 (nx,), (ny,)
        Pixel-centre coordinates, mm (equally spaced).
    out : float64 (ny, nx)
        Accumulator (added to).
    """
    n_blocks = (ys.shape[0] + ROWS - 1) // ROWS
    _blocks(n_blocks, False, filtered, _NO_VOLUME, mode, views, detector, xs, ys, 0.0, 0.0,
            out, np.zeros((0, 0, 0)))


def backproject_3d(filtered, mode, views, detector, xs, ys, z_first, dz, out):
    """Add the backprojection of 3-D filtered projections into a volume.

    Parameters
    ----------
    filtered : float32 (V, C + 3, R + 3)
        Weighted, filtered projections laid out (view, column, row) so that a voxel column
        along z reads contiguous rows; zero-padded in columns and rows (index 0 and the last
        two are 0).
    mode : int
        0 parallel, 1 flat, 2 curved.
    views : float64 (V, 7)
        ``ox, oy, oz, wx, wy, ux, uy`` per view (module docstring).
    detector : float64 (5,)
        ``sdd, col0, 1 / pitch_u, row0, 1 / pitch_v``.
    xs, ys : float64 (nx,), (ny,)
        Voxel-centre coordinates, mm.
    z_first, dz : float
        z of the first slice and the slice spacing, mm.
    out : float64 (nz, ny, nx)
        Accumulator (added to).

    Notes
    -----
    The volume is cut into ``TILE x TILE`` columns of voxels; a thread accumulates a tile
    in float64 over all views (:func:`_tile`), then adds it to ``out``.
    """
    tiles = ((xs.shape[0] + TILE - 1) // TILE) * ((ys.shape[0] + TILE - 1) // TILE)
    _blocks(tiles, True, _NO_ROWS, filtered, mode, views, detector, xs, ys, z_first, dz,
            np.zeros((0, 0)), out)


@njit(parallel=True, cache=True, error_model="numpy")
def _blocks(n_blocks, three_d, rows, volume, mode, views, detector, xs, ys, z_first, dz,
            image, image_3d):
    """The one parallel loop: blocks of image rows (2-D) or tiles of voxel columns (3-D)."""
    tiles_x = (xs.shape[0] + TILE - 1) // TILE
    for block in prange(n_blocks):
        if three_d:
            ty = block // tiles_x
            _tile(volume, mode, views, detector, xs, ys, z_first, dz,
                  (block - ty * tiles_x) * TILE, ty * TILE, image_3d)
        else:
            _image_rows(rows, mode, views, detector, xs, ys, block * ROWS, image)


@njit(cache=True, error_model="numpy")
def _image_rows(filtered, mode, views, detector, xs, ys, first, out):
    """Backproject every view into ``ROWS`` image rows from row ``first``.

    The views are the outer loop, so that a view's filtered row stays in cache while it
    serves every image row of the block. Along an image row, ``a`` and ``b`` are linear in
    x. For parallel beams the column position is linear too, and the pixels on the detector
    are resampled in one pass, two views at a time (:func:`_resample_row_pair`); for
    divergent beams each pixel computes its own position.
    """
    n_views = filtered.shape[0]
    nx = xs.shape[0]
    last = min(first + ROWS, ys.shape[0])
    dx = xs[1] - xs[0] if nx > 1 else 0.0
    sdd, col0, inv_pitch = detector[0], detector[1], detector[2]
    top = filtered.shape[1] - 2.0  # largest padded position read (a zero column follows)
    acc = np.zeros((last - first, nx))
    for i in range(0, n_views, 2 if mode == PARALLEL else 1):
        for iy in range(first, last):
            row_acc = acc[iy - first]
            y = ys[iy]
            if mode == PARALLEL:
                lo, hi, p0, dp = _parallel_range(views[i], col0, inv_pitch, xs[0], dx, y, top,
                                                 nx)
                if i + 1 == n_views:
                    _resample_row(filtered[i], p0, dp, lo, hi, row_acc)
                    continue
                lo_b, hi_b, pb, db = _parallel_range(views[i + 1], col0, inv_pitch, xs[0], dx,
                                                     y, top, nx)
                both_lo, both_hi = max(lo, lo_b), min(hi, hi_b)
                if both_lo < both_hi:
                    _resample_row_pair(filtered[i], p0, dp, filtered[i + 1], pb, db, both_lo,
                                       both_hi, row_acc)
                else:
                    both_lo = both_hi = hi
                _resample_row(filtered[i], p0, dp, lo, both_lo, row_acc)
                _resample_row(filtered[i], p0, dp, both_hi, hi, row_acc)
                _resample_row(filtered[i + 1], pb, db, lo_b, min(both_lo, hi_b), row_acc)
                _resample_row(filtered[i + 1], pb, db, max(both_hi, lo_b), hi_b, row_acc)
                continue
            row = filtered[i]
            ox, oy, wx, wy, ux, uy = (views[i, 0], views[i, 1], views[i, 3], views[i, 4],
                                      views[i, 5], views[i, 6])
            a0 = (xs[0] - ox) * wx + (y - oy) * wy
            b0 = (xs[0] - ox) * ux + (y - oy) * uy
            da = dx * wx
            db = dx * ux
            if mode == FLAT:
                for ix in range(nx):
                    inv_a = 1.0 / (a0 + ix * da)
                    u = sdd * (b0 + ix * db) * inv_a
                    row_acc[ix] += inv_a * inv_a * _interpolate(row, (u - col0) * inv_pitch
                                                                + 1.0, top)
            else:
                for ix in range(nx):
                    a = a0 + ix * da
                    b = b0 + ix * db
                    u = sdd * math.atan(b / a)  # a > 0: the grid is inside the source orbit
                    row_acc[ix] += (_interpolate(row, (u - col0) * inv_pitch + 1.0, top)
                                    / (a * a + b * b))
    for iy in range(first, last):
        for ix in range(nx):
            out[iy, ix] += acc[iy - first, ix]


@njit(cache=True, error_model="numpy")
def _parallel_range(view, col0, inv_pitch, x0, dx, y, top, nx):
    """Pixels ``lo <= ix < hi`` of an image row that fall on the detector in a parallel
    view, and their padded column positions ``p0 + ix dp``."""
    p0 = ((x0 - view[0]) * view[5] + (y - view[1]) * view[6] - col0) * inv_pitch + 1.0
    dp = dx * view[5] * inv_pitch
    lo, hi = _on_detector(p0, dp, top, nx)
    return lo, hi, p0, dp


@njit(cache=True, error_model="numpy")
def _interpolate(row, pos, top):
    """Linear interpolation of a zero-padded row at padded position ``pos`` (clamped)."""
    pos = min(max(pos, 0.0), top)
    j = uint64(pos)
    f = pos - float64(j)
    a = row[j]
    return a + f * (row[j + uint64(1)] - a)


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _resample_row(row, p0, dp, lo, hi, acc):
    """``acc[ix] += row(p0 + ix dp)`` for ``lo <= ix < hi`` (positions in fixed point, as
    :func:`_resample_add`, but the step may be negative)."""
    position = int64((p0 + lo * dp) * _FIXED + 0.5)
    step = int64(dp * _FIXED + (0.5 if dp >= 0.0 else -0.5))
    zero = int64(0)
    for ix in range(uint64(lo), uint64(hi)):
        fixed = uint64(max(position, zero))
        k = fixed >> uint64(32)
        f = float64(int64(fixed & _FRACTION)) * _INV_FIXED
        a = row[k]
        acc[ix] += a + f * (row[k + uint64(1)] - a)
        position += step


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _resample_row_pair(row_a, pa, da, row_b, pb, db, lo, hi, acc):
    """As :func:`_resample_row` for two views at once (one load and store of ``acc``)."""
    position_a = int64((pa + lo * da) * _FIXED + 0.5)
    step_a = int64(da * _FIXED + (0.5 if da >= 0.0 else -0.5))
    position_b = int64((pb + lo * db) * _FIXED + 0.5)
    step_b = int64(db * _FIXED + (0.5 if db >= 0.0 else -0.5))
    zero = int64(0)
    for ix in range(uint64(lo), uint64(hi)):
        fixed_a = uint64(max(position_a, zero))
        k = fixed_a >> uint64(32)
        f = float64(int64(fixed_a & _FRACTION)) * _INV_FIXED
        a = row_a[k]
        fixed_b = uint64(max(position_b, zero))
        m = fixed_b >> uint64(32)
        g = float64(int64(fixed_b & _FRACTION)) * _INV_FIXED
        b = row_b[m]
        acc[ix] += (a + f * (row_a[k + uint64(1)] - a)) + (b + g * (row_b[m + uint64(1)] - b))
        position_a += step_a
        position_b += step_b


@njit(cache=True, error_model="numpy")
def _on_detector(p0, dp, top, n):
    """Indices ``lo <= i < hi`` (within ``0..n``) whose position ``p0 + i dp`` is in
    [0, top)."""
    if dp > 0.0:
        lo = math.ceil(-p0 / dp)
        hi = math.ceil((top - p0) / dp)
    elif dp < 0.0:
        lo = math.floor((top - p0) / dp) + 1.0
        hi = math.floor(-p0 / dp) + 1.0
    elif 0.0 <= p0 < top:
        return 0, n
    else:
        return 0, 0
    lo = int(min(max(lo, 0.0), float(n)))
    hi = int(min(max(hi, 0.0), float(n)))
    return lo, max(lo, hi)


@njit(cache=True, error_model="numpy")
def _tile(filtered, mode, views, detector, xs, ys, z_first, dz, x_lo, y_lo, out):
    """Backproject every view into the tile of voxel columns starting at (x_lo, y_lo).

    Along a column the row position is linear in z, ``v(iz) = v0 + iz dv``; the slices whose
    position lies on the padded detector are found once per column and view, the two
    detector columns around the voxel column are blended into one weighted line
    (:func:`_blend`) and the line is resampled at the slices (:func:`_resample_add`).
    Slices mirrored about the orbit plane project to rows mirrored about the detector's
    middle (position ``mirror - v``) when the rows are centred: one row position then
    serves two voxels (:func:`_resample_add_mirrored`).
    """
    n_views = filtered.shape[0]
    nz = out.shape[0]
    sdd, col0, inv_pitch_u, row0, inv_pitch_v = (detector[0], detector[1], detector[2],
                                                 detector[3], detector[4])
    top_u = filtered.shape[1] - 2.0
    top_v = filtered.shape[2] - 2.0
    n_lines = filtered.shape[2]
    x_hi = min(x_lo + TILE, xs.shape[0])
    y_hi = min(y_lo + TILE, ys.shape[0])
    z_last = z_first + (nz - 1) * dz
    half = nz // 2
    middle = nz % 2 == 1
    mirror = int(round(2.0 - 2.0 * row0 * inv_pitch_v))
    centred_rows = abs(2.0 - 2.0 * row0 * inv_pitch_v - top_v) <= 1e-9 * top_v
    acc = np.zeros((TILE * TILE, nz))
    line = np.zeros(n_lines)
    for i in range(n_views):
        ox, oy, oz, wx, wy, ux, uy = (views[i, 0], views[i, 1], views[i, 2], views[i, 3],
                                      views[i, 4], views[i, 5], views[i, 6])
        mirrored = (centred_rows
                    and abs(z_first + z_last - 2.0 * oz) <= 1e-9 * (abs(dz) * nz + 1.0))
        for iy in range(y_lo, y_hi):
            for ix in range(x_lo, x_hi):
                a = (xs[ix] - ox) * wx + (ys[iy] - oy) * wy
                b = (xs[ix] - ox) * ux + (ys[iy] - oy) * uy
                if mode == PARALLEL:
                    u, mag, weight = b, 1.0, 1.0
                elif mode == FLAT:
                    mag = sdd / a
                    u, weight = b * mag, 1.0 / (a * a)
                else:
                    dist2 = a * a + b * b
                    u, mag, weight = sdd * math.atan(b / a), sdd / math.sqrt(dist2), 1.0 / dist2
                pos_u = (u - col0) * inv_pitch_u + 1.0
                if not (0.0 <= pos_u < top_u):
                    continue
                v0 = (mag * (z_first - oz) - row0) * inv_pitch_v + 1.0
                dv = mag * dz * inv_pitch_v
                lo, hi = _on_detector(v0, dv, top_v, nz)
                if lo >= hi:
                    continue
                j = int(pos_u)
                fu = pos_u - j
                column = acc[(iy - y_lo) * TILE + (ix - x_lo)]
                k_top = min(int(v0 + (hi - 1) * dv) + 2, n_lines)
                upper = max(lo, nz - half)
                if mirrored and upper < hi:
                    _blend(filtered[i, j], filtered[i, j + 1], weight * (1.0 - fu),
                           weight * fu, max(mirror - k_top, 0), k_top, line)
                    _resample_add_mirrored(line, v0, dv, upper, hi, mirror, nz, column)
                    if middle and lo <= half < hi:
                        _resample_add(line, v0, dv, half, half + 1, column)
                else:
                    _blend(filtered[i, j], filtered[i, j + 1], weight * (1.0 - fu),
                           weight * fu, int(v0 + lo * dv), k_top, line)
                    _resample_add(line, v0, dv, lo, hi, column)
    for iy in range(y_lo, y_hi):
        for ix in range(x_lo, x_hi):
            column = acc[(iy - y_lo) * TILE + (ix - x_lo)]
            for iz in range(nz):
                out[iz, iy, ix] += column[iz]


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _blend(line0, line1, w0, w1, k_lo, k_hi, line):
    """``line[k] = w0 line0[k] + w1 line1[k]`` for ``k_lo <= k < k_hi`` (interpolation
    between two detector columns, weighted). Indices are unsigned: no negative-index
    wrap-around test in the loop."""
    for k in range(uint64(k_lo), uint64(k_hi)):
        line[k] = w0 * line0[k] + w1 * line1[k]


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _resample_add(line, v0, dv, lo, hi, column):
    """``column[iz] += line(v0 + iz dv)`` for ``lo <= iz < hi``, linear interpolation.

    The position runs in fixed point with 32 fractional bits (row index by a shift, the
    fraction by one conversion: much cheaper than converting a float to an index on every
    voxel); its error stays below ``hi * 2**-32`` rows.
    """
    v = max(v0 + lo * dv, 0.0)
    position = uint64(v * _FIXED + 0.5)
    step = uint64(dv * _FIXED + 0.5)
    for iz in range(uint64(lo), uint64(hi)):
        k = position >> uint64(32)
        f = float64(int64(position & _FRACTION)) * _INV_FIXED
        a = line[k]
        column[iz] += a + f * (line[k + uint64(1)] - a)
        position += step


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def _resample_add_mirrored(line, v0, dv, lo, hi, mirror, nz, column):
    """As :func:`_resample_add` for ``lo <= iz < hi``, and for each such slice also its
    mirror ``nz - 1 - iz``, whose position is ``mirror - v``: the same fraction, read from
    the other end (``line[m - k] + f (line[m - k - 1] - line[m - k])``)."""
    v = max(v0 + lo * dv, 0.0)
    position = uint64(v * _FIXED + 0.5)
    step = uint64(dv * _FIXED + 0.5)
    m = uint64(mirror)
    last = uint64(nz - 1)
    for iz in range(uint64(lo), uint64(hi)):
        k = position >> uint64(32)
        f = float64(int64(position & _FRACTION)) * _INV_FIXED
        a = line[k]
        column[iz] += a + f * (line[k + uint64(1)] - a)
        b = line[m - k]
        column[last - iz] += b + f * (line[m - k - uint64(1)] - b)
        position += step
