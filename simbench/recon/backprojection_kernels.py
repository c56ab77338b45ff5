"""Voxel-driven backprojection kernels (numba) for the analytic reconstructions.

Every kernel gathers: each output pixel (voxel column) is owned by one thread, which adds the
views in their order, so results do not depend on the number of threads. The filtered
projections arrive already multiplied by every factor that depends only on the view and the
detector cell (redundancy, cosine and quadrature weights); the kernels add only what depends
on the voxel: the detector position it projects to (linear interpolation) and, for divergent
beams, the distance weight.

Filtered projections are zero-padded: column index 0 and the last two columns (and rows, in
3-D) are zeros, so a position clamped to the padded range reads zeros and no per-voxel
branch is needed. Positions are given in padded index units: ``pos = (coordinate - first
cell centre) / pitch + 1``.

Geometry modes: 0 parallel beam, 1 flat detector, 2 equiangular curved detector. For a voxel
at r and a view with origin o (detector centre for parallel beams, source otherwise), central
direction w and column axis u (both horizontal): ``a = (r - o) . w``, ``b = (r - o) . u``;

* parallel: column coordinate ``b``, row coordinate ``z - o_z``, weight 1;
* flat: column ``SDD b / a``, row ``SDD (z - o_z) / a``, weight ``1 / a^2``;
* curved: column (arc length) ``SDD atan2(b, a)``, row ``SDD (z - o_z) / L``, weight
  ``1 / L^2`` with ``L^2 = a^2 + b^2``.

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

_FIXED = 4294967296.0  # 2**32: fixed-point scale of detector row positions
_INV_FIXED = 1.0 / _FIXED
_FRACTION = np.uint64(0xFFFFFFFF)

#: voxel columns per side of the square tiles one thread works on in 3-D
TILE = 8


@njit(cache=True, error_model="numpy")
def _column(mode, x, y, ox, oy, wx, wy, ux, uy, sdd):
    """Column coordinate (mm), magnification along z and distance weight of one voxel column."""
    a = (x - ox) * wx + (y - oy) * wy
    b = (x - ox) * ux + (y - oy) * uy
    if mode == PARALLEL:
        return b, 1.0, 1.0
    if mode == FLAT:
        inv_a = 1.0 / a
        return sdd * b * inv_a, sdd * inv_a, inv_a * inv_a
    dist2 = a * a + b * b
    return sdd * math.atan2(b, a), sdd / math.sqrt(dist2), 1.0 / dist2


@njit(parallel=True, cache=True, error_model="numpy")
def backproject_2d(filtered, mode, ox, oy, wx, wy, ux, uy, sdd, col0, inv_pitch, xs, ys, out):
    """Add the backprojection of 2-D filtered projections into an image.

    Parameters
    ----------
    filtered : float32 (V, C + 3)
        Weighted, filtered projections, zero-padded (column 0 and the last two are 0).
    mode : int
        0 parallel, 1 flat, 2 curved.
    ox, oy, wx, wy, ux, uy : float64 (V,)
        Per view: origin (detector centre for parallel, else source), central direction w
        and column axis u (x and y components), mm and unit vectors.
    sdd : float
        Source-to-detector distance, mm (unused for parallel beams).
    col0 : float
        Centre of the first detector column, mm (arc length for curved detectors).
    inv_pitch : float
        1 / column pitch, 1/mm.
    xs, ys : float64 (nx,), (ny,)
        Pixel-centre coordinates, mm.
    out : float64 (ny, nx)
        Accumulator (added to).
    """
    for iy in prange(ys.shape[0]):
        _image_row(filtered, mode, ox, oy, wx, wy, ux, uy, sdd, col0, inv_pitch, xs, ys[iy],
                   out[iy])


@njit(cache=True, error_model="numpy")
def _image_row(filtered, mode, ox, oy, wx, wy, ux, uy, sdd, col0, inv_pitch, xs, y, out_row):
    """Backproject every view into one image row (pixels at ``xs``, ``y``).

    Along the row, ``a`` and ``b`` are linear in x. For parallel beams the column position
    is linear too, and the pixels on the detector are resampled in one pass
    (:func:`_resample_row`); for divergent beams each pixel computes its own position.
    """
    n_views = filtered.shape[0]
    top = filtered.shape[1] - 2.0  # largest padded position read (a zero column follows)
    nx = xs.shape[0]
    dx = xs[1] - xs[0] if nx > 1 else 0.0
    acc = np.zeros(nx)
    for i in range(n_views):
        row = filtered[i]
        a0 = (xs[0] - ox[i]) * wx[i] + (y - oy[i]) * wy[i]
        b0 = (xs[0] - ox[i]) * ux[i] + (y - oy[i]) * uy[i]
        da = dx * wx[i]
        db = dx * ux[i]
        if mode == PARALLEL:
            p0 = (b0 - col0) * inv_pitch + 1.0
            dp = db * inv_pitch
            lo, hi = _on_detector(p0, dp, top, nx)
            _resample_row(row, p0, dp, lo, hi, acc)
        elif mode == FLAT:
            for ix in range(nx):
                inv_a = 1.0 / (a0 + ix * da)
                u = sdd * (b0 + ix * db) * inv_a
                acc[ix] += inv_a * inv_a * _interpolate(row, (u - col0) * inv_pitch + 1.0, top)
        else:
            for ix in range(nx):
                a = a0 + ix * da
                b = b0 + ix * db
                u = sdd * math.atan(b / a)  # a > 0: the grid is inside the source orbit
                acc[ix] += _interpolate(row, (u - col0) * inv_pitch + 1.0, top) / (a * a + b * b)
    for ix in range(nx):
        out_row[ix] += acc[ix]


@njit(cache=True, error_model="numpy")
def _interpolate(row, pos, top):
    """Linear interpolation of a zero-padded row at padded position ``pos`` (clamped)."""
    pos = min(max(pos, 0.0), top)
    j = uint64(pos)
    f = pos - float64(j)
    a = float64(row[j])
    return a + f * (float64(row[j + uint64(1)]) - a)


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
        a = float64(row[k])
        acc[ix] += a + f * (float64(row[k + uint64(1)]) - a)
        position += step


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


@njit(parallel=True, cache=True, error_model="numpy")
def backproject_3d(filtered, mode, ox, oy, oz, wx, wy, ux, uy, sdd, col0, inv_pitch_u, row0,
                   inv_pitch_v, xs, ys, z_first, dz, nz, out):
    """Add the backprojection of 3-D filtered projections into a volume.

    Parameters
    ----------
    filtered : float32 (V, C + 3, R + 3)
        Weighted, filtered projections laid out (view, column, row) so that a voxel column
        along z reads contiguous rows; zero-padded in columns and rows (index 0 and the last
        two are 0).
    mode : int
        0 parallel, 1 flat, 2 curved.
    ox, oy, oz, wx, wy, ux, uy : float64 (V,)
        Per view: origin (detector centre for parallel, else source), central direction w
        and column axis u (x and y components; both are horizontal), mm and unit vectors.
    sdd : float
        Source-to-detector distance, mm.
    col0, row0 : float
        Centres of the first column (arc length on curved detectors) and row, mm.
    inv_pitch_u, inv_pitch_v : float
        1 / pitch, 1/mm.
    xs, ys : float64 (nx,), (ny,)
        Voxel-centre coordinates, mm.
    z_first, dz : float
        z of the first slice and the slice spacing, mm.
    nz : int
    out : float64 (nz, ny, nx)
        Accumulator (added to).

    Notes
    -----
    The volume is cut into ``TILE x TILE`` columns of voxels; a thread accumulates a tile
    in float64 over all views (:func:`_tile`), then adds it to ``out``.
    """
    tiles_x = (xs.shape[0] + TILE - 1) // TILE
    tiles_y = (ys.shape[0] + TILE - 1) // TILE
    for t in prange(tiles_x * tiles_y):
        ty = t // tiles_x
        _tile(filtered, mode, ox, oy, oz, wx, wy, ux, uy, sdd, col0, inv_pitch_u, row0,
              inv_pitch_v, xs, ys, z_first, dz, nz, (t - ty * tiles_x) * TILE, ty * TILE, out)


@njit(cache=True, error_model="numpy")
def _tile(filtered, mode, ox, oy, oz, wx, wy, ux, uy, sdd, col0, inv_pitch_u, row0,
          inv_pitch_v, xs, ys, z_first, dz, nz, x_lo, y_lo, out):
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
        mirrored = (centred_rows
                    and abs(z_first + z_last - 2.0 * oz[i]) <= 1e-9 * (abs(dz) * nz + 1.0))
        for iy in range(y_lo, y_hi):
            for ix in range(x_lo, x_hi):
                u, mag, weight = _column(mode, xs[ix], ys[iy], ox[i], oy[i], wx[i], wy[i],
                                         ux[i], uy[i], sdd)
                pos_u = (u - col0) * inv_pitch_u + 1.0
                if not (0.0 <= pos_u < top_u):
                    continue
                v0 = (mag * (z_first - oz[i]) - row0) * inv_pitch_v + 1.0
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
