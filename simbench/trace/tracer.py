"""Tracing a phantom through a scanner's poses: exact per-material path lengths.

The public entry points check their inputs, prepare flat arrays, pick chunk sizes and call
the numba kernels of :mod:`simbench.trace.analytic` (primitives) and
:mod:`simbench.trace.siddon` (voxel phantoms).
"""

from __future__ import annotations

from typing import Iterator

import numba
import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.poses import Poses
from simbench.phantom.compiled import (
    ADD, CONE, CYLINDER, ELLIPSE_2D, ELLIPSOID, POLYGON_2D, PRISM_CODES, REPLACE, Phantom,
    VoxelVolume,
)
from simbench.trace.analytic import culling_windows, trace_objects_chunk
from simbench.trace.siddon import trace_voxels_chunk

#: output bytes per chunk of views that :func:`iter_trace` aims at by default
CHUNK_BYTES = 256 * 2**20


def _n_blocks() -> int:
    """Work blocks per kernel call: several per thread, so uneven rows balance out."""
    return 32 * numba.get_num_threads()


def _simplified_rotations(obj) -> np.ndarray:
    """World-to-local rotations with the needless turns dropped.

    A shape symmetric about its local z axis (sphere, circular cylinder, cone, circle) is
    unchanged by a turn about that axis, so when its axis is the world z axis (or, for a
    sphere, always) its rotation becomes the identity, which the kernel skips.
    """
    rotation = np.array(obj.rotation, dtype=np.float64)
    half = np.asarray(obj.half_sizes, dtype=np.float64)
    round_z = half[:, 0] == half[:, 1]
    about_z = ((obj.shape == CONE)
               | (round_z & np.isin(obj.shape, (ELLIPSOID, CYLINDER, ELLIPSE_2D))))
    axis_is_z = np.all(rotation[:, 2, :] == (0.0, 0.0, 1.0), axis=1)
    sphere = (obj.shape == ELLIPSOID) & round_z & (half[:, 1] == half[:, 2])
    aligned = (np.all(rotation == np.eye(3), axis=(1, 2)) | (about_z & axis_is_z) | sphere)
    rotation[aligned] = np.eye(3)
    return np.ascontiguousarray(rotation)


def _where(field: str) -> Where:
    return Where("trace", None, None, field)


def _samples(value, field: str) -> np.ndarray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != 2 or arr.shape[0] < 1:
        raise InputError(_where(field), f"shape {arr.shape} is not (n, 2)",
                         "an array of n >= 1 offsets (along u, along v) in mm, shaped (n, 2)")
    if not np.all(np.isfinite(arr)):
        raise InputError(_where(field), "contains NaN or infinite offsets",
                         "finite offsets in mm")
    return np.ascontiguousarray(arr)


def _check_inputs(phantom, poses, cell_samples, spot_samples, views):
    if not isinstance(phantom, Phantom):
        raise InputError(_where("phantom"), f"got {type(phantom).__name__}",
                         "a simbench.phantom.compiled.Phantom")
    if not isinstance(poses, Poses):
        raise InputError(_where("poses"), f"got {type(poses).__name__}",
                         "a simbench.geometry.poses.Poses")
    n_mat = len(phantom.materials)
    if n_mat < 1:
        raise InputError(Where(phantom.source, None, None, "materials"),
                         "the phantom has no material", "at least one material")
    cells = np.zeros((1, 2)) if cell_samples is None else _samples(cell_samples, "cell_samples")
    if spot_samples is None:
        spots = np.zeros((1, 2))
    else:
        if poses.parallel:
            raise InputError(_where("spot_samples"),
                             "focal-spot samples were given for a parallel beam",
                             "no spot_samples for parallel beams (fan or cone beams only)")
        spots = _samples(spot_samples, "spot_samples")
    if views is None:
        view_idx = np.arange(poses.n_views, dtype=np.int64)
    else:
        view_idx = np.asarray(views)
        if view_idx.ndim != 1 or not np.issubdtype(view_idx.dtype, np.integer):
            raise InputError(_where("views"), f"got {view_idx.dtype} array of shape "
                             f"{view_idx.shape}", "a 1-D array of view indices")
        view_idx = view_idx.astype(np.int64)
        if view_idx.size and (view_idx.min() < 0 or view_idx.max() >= poses.n_views):
            raise InputError(_where("views"), f"indices {view_idx.min()}..{view_idx.max()} "
                             f"outside the {poses.n_views} views",
                             f"0 <= index < {poses.n_views}")
    if poses.dimension == 2 and poses.n_rows != 1:
        raise InputError(_where("poses"), f"a 2-D scanner with {poses.n_rows} rows",
                         "exactly one detector row for 2-D scanners")
    if phantom.voxels is not None and phantom.objects.count > 0:
        raise InputError(Where(phantom.source, None, None, "objects"),
                         "the phantom has both a voxel volume and analytic objects",
                         "either voxels or objects")
    return n_mat, cells, spots, view_idx


def _check_objects(phantom: Phantom, n_mat: int) -> None:
    obj = phantom.objects
    where = Where(phantom.source, None, None, "objects")
    if obj.count == 0:
        return
    if obj.material.min() < 0 or obj.material.max() >= n_mat:
        raise InputError(where, f"material index {obj.material.max()} outside the "
                         f"{n_mat} materials", f"0 <= material < {n_mat}")
    if not np.all(np.isin(obj.mode, (REPLACE, ADD))):
        raise InputError(where, "unknown composition mode", "replace (0) or add (1)")
    bounded = ~np.isin(obj.shape, PRISM_CODES)
    hs = obj.half_sizes
    if not (np.all(np.isfinite(hs[:, :2])) and np.all(hs[:, :2] > 0)
            and np.all(np.isfinite(hs[bounded, 2])) and np.all(hs[bounded, 2] > 0)):
        raise InputError(where, "a half size is zero, negative or not finite",
                         "positive finite sizes in mm (unbounded z only for 2-D shapes)")
    if not np.all(np.isfinite(obj.bound_radius)) or np.any(obj.bound_radius <= 0):
        raise InputError(where, "a bounding radius is zero, negative or not finite",
                         "positive finite bound_radius in mm")
    cones = obj.shape == CONE
    if np.any(cones) and (np.any(obj.params[cones, :2] < 0)
                          or np.any(obj.params[cones, :2].max(axis=1) <= 0)):
        raise InputError(where, "a cone has a negative radius or both radii zero",
                         "radii >= 0 mm with at least one > 0")
    polys = obj.shape == POLYGON_2D
    if np.any(polys) and np.any(obj.poly_count[polys] < 3):
        raise InputError(where, "a polygon has fewer than 3 vertices", ">= 3 vertices")


def _chunk_views(n_views: int, bytes_per_view: int, chunk_views: int | None) -> int:
    if chunk_views is not None:
        if int(chunk_views) < 1:
            raise InputError(_where("chunk_views"), f"got {chunk_views}", "an integer >= 1")
        return int(chunk_views)
    return int(max(1, min(n_views, CHUNK_BYTES // max(bytes_per_view, 1))))


class _Plan:
    """Arrays prepared once for all chunks of one trace."""

    def __init__(self, phantom: Phantom, poses: Poses, cells, spots, n_mat):
        self.phantom = phantom
        self.poses = poses
        self.n_mat = n_mat
        self.cell_du = np.ascontiguousarray(cells[:, 0])
        self.cell_dv = np.ascontiguousarray(cells[:, 1])
        self.spot_u = np.ascontiguousarray(spots[:, 0])
        self.spot_v = np.ascontiguousarray(spots[:, 1])
        self.n_sub = cells.shape[0] * spots.shape[0]
        self.pose_arrays = tuple(np.ascontiguousarray(a, dtype=np.float64) for a in (
            poses.source, poses.direction, poses.detector_centre, poses.u_axis, poses.v_axis))
        self.col_u = np.ascontiguousarray(poses.col_u_mm, dtype=np.float64)
        self.row_v = np.ascontiguousarray(poses.row_v_mm, dtype=np.float64)
        self.voxels = phantom.voxels
        if self.voxels is None:
            _check_objects(phantom, n_mat)
            obj = phantom.objects
            self.obj = obj
            self.is_prism = np.isin(obj.shape, PRISM_CODES)
            n_poly_iv = np.where(obj.shape == POLYGON_2D, obj.poly_count // 2 + 1, 1)
            self.max_intervals = int(max(1, n_poly_iv.sum()))
            self.max_poly = int(obj.poly_count.max()) if obj.count else 0
            rotation = _simplified_rotations(obj)
            self.obj_arrays = (
                np.ascontiguousarray(obj.shape, dtype=np.int64),
                np.ascontiguousarray(obj.centre, dtype=np.float64),
                rotation,
                np.ascontiguousarray(obj.half_sizes, dtype=np.float64),
                np.ascontiguousarray(1.0 / np.asarray(obj.half_sizes, dtype=np.float64)),
                np.ascontiguousarray(obj.params, dtype=np.float64),
                np.ascontiguousarray(obj.mode, dtype=np.int64),
                np.ascontiguousarray(obj.material, dtype=np.int64),
                np.ascontiguousarray(obj.poly_start, dtype=np.int64),
                np.ascontiguousarray(obj.poly_count, dtype=np.int64),
                np.ascontiguousarray(obj.poly_xy, dtype=np.float64).reshape(-1, 2),
            )
        else:
            self._prepare_voxels(self.voxels, phantom, n_mat)

    def _prepare_voxels(self, vox: VoxelVolume, phantom: Phantom, n_mat: int) -> None:
        where = Where(phantom.source, None, None, "voxels")
        values = np.asarray(vox.values)
        if values.ndim == 2:
            values = values[None]
        if values.ndim != 3 or values.size == 0:
            raise InputError(where, f"volume shaped {values.shape}",
                             "a non-empty (nz, ny, nx) volume")
        spacing = np.asarray(vox.spacing_mm, dtype=np.float64)
        if spacing.shape != (3,) or not np.all(np.isfinite(spacing)) or np.any(spacing <= 0):
            raise InputError(where.child("spacing_mm"), f"got {vox.spacing_mm}",
                             "three positive voxel sizes (dx, dy, dz) in mm")
        centre = np.asarray(vox.centre_mm, dtype=np.float64)
        if centre.shape != (3,) or not np.all(np.isfinite(centre)):
            raise InputError(where.child("centre_mm"), f"got {vox.centre_mm}",
                             "a finite (cx, cy, cz) in mm")
        nz, ny, nx = values.shape
        self.use_z = phantom.dimension != 2
        if not self.use_z and nz != 1:
            raise InputError(where, f"a 2-D phantom with {nz} slices", "one slice")
        n = np.array([nx, ny, nz], dtype=np.float64)
        self.lo = centre - n * spacing / 2.0
        self.spacing = spacing
        if vox.kind == "mu":
            mu = np.ascontiguousarray(values, dtype=np.float64)
            if not np.all(np.isfinite(mu)):
                raise InputError(where, "the mu volume holds NaN or infinite values",
                                 "finite mu in 1/mm")
            self.mu_volume = mu
            self.material_volume = np.zeros((1, 1, 1), np.int32)
            self.use_mu = True
        elif vox.kind == "labels":
            if not np.issubdtype(values.dtype, np.integer):
                raise InputError(where, f"labels of type {values.dtype}", "integer labels")
            table = np.asarray(vox.label_material, dtype=np.int64)
            if values.min() < 0 or values.max() >= table.shape[0]:
                raise InputError(where, f"labels {values.min()}..{values.max()} outside the "
                                 f"table of {table.shape[0]} entries",
                                 f"0 <= label < {table.shape[0]}")
            table = table.copy()
            if table.shape[0]:
                table[0] = -1
            if table.max(initial=-1) >= n_mat or table.min(initial=-1) < -1:
                raise InputError(where, "a label maps to a material outside the phantom's "
                                 f"{n_mat} materials", f"-1 <= material < {n_mat}")
            self.material_volume = np.ascontiguousarray(table[values].astype(np.int32))
            self.mu_volume = np.zeros((1, 1, 1))
            self.use_mu = False
        else:
            raise InputError(where.child("kind"), f"got '{vox.kind}'", "'labels' or 'mu'")

    def run(self, view_idx: np.ndarray, out: np.ndarray, out_view0: int) -> None:
        poses = self.poses
        src, direc, det, uax, vax = self.pose_arrays
        if self.voxels is not None:
            trace_voxels_chunk(poses.parallel, poses.curved, src, direc, det, uax, vax,
                               view_idx, out_view0, self.col_u, self.row_v, self.cell_du,
                               self.cell_dv, self.spot_u, self.spot_v, self.lo, self.spacing,
                               self.use_z, self.material_volume, self.mu_volume, self.use_mu,
                               _n_blocks(), out)
            return
        obj = self.obj
        if obj.count == 0:
            out[:, out_view0:out_view0 + view_idx.shape[0]] = 0.0
            return
        windows = np.empty((view_idx.shape[0], self.spot_u.shape[0], obj.count, 4))
        culling_windows(poses.parallel, poses.curved, src, direc, det, uax, vax, view_idx,
                        self.spot_u, self.spot_v, self.obj_arrays[1],
                        np.ascontiguousarray(obj.bound_radius, dtype=np.float64),
                        self.is_prism, windows)
        n_bad = trace_objects_chunk(poses.parallel, poses.curved, src, direc, det, uax, vax,
                                    view_idx, out_view0, self.col_u, self.row_v, self.cell_du,
                                    self.cell_dv, self.spot_u, self.spot_v, windows,
                                    *self.obj_arrays, self.max_intervals, self.max_poly,
                                    _n_blocks(), out)
        if n_bad:
            raise InputError(Where(self.phantom.source, None, None, "objects"),
                             f"{n_bad} rays run along the axis of a 2-D shape and have "
                             "infinite path length",
                             "a scanner whose rays cross the z axis of 2-D shapes "
                             "(2-D scanners, or cone beams not parallel to z)")


def _shape(poses: Poses, n_mat: int, n_views: int, n_sub: int, sub: bool) -> tuple:
    shape = (n_mat, n_views) + poses.projection_shape[1:]
    return shape + (n_sub,) if sub else shape


def trace(phantom: Phantom, poses: Poses, *, cell_samples=None, spot_samples=None,
          views=None, chunk_views: int | None = None) -> np.ndarray:
    """Exact path length through every material along every detector ray.

    Parameters
    ----------
    phantom : Phantom
        Analytic objects (composed as documented in :mod:`simbench.phantom.compiled`) or a
        voxel volume (Siddon's method).
    poses : Poses
        Per-view source and detector poses.
    cell_samples : array (S, 2), optional
        Sub-ray offsets (du, dv) in mm from each cell centre (e.g. to integrate over the
        cell aperture). Default: one ray through the centre.
    spot_samples : array (F, 2), optional
        Emission-point offsets (along u, along v) in mm from the focal spot centre, for
        divergent beams. Default: the spot centre.
    views : array of int, optional
        Trace only these views (default all), in the given order.
    chunk_views : int, optional
        Views per kernel call (default: chosen from the memory per view).

    Returns
    -------
    ndarray float64
        ``(n_materials, n_views, n_rows, n_cols)`` path lengths in mm, or
        ``(n_materials, n_views, n_cols)`` for 2-D scanners; with ``cell_samples`` or
        ``spot_samples`` a trailing axis of F * S sub-rays (index ``f * S + s``), kept apart so
        that intensities can be averaged after Beer–Lambert. For a mu volume the single
        pseudo-material's "path length" is the line integral of the volume.

    Notes
    -----
    Each ray ``o + t d`` (unit d, t in mm) comes from
    :func:`simbench.geometry.rays.detector_ray`. For analytic objects the chord
    ``[t_in, t_out]`` of each primitive is found exactly in its local frame, clipped to the
    ray's range, and composed: object k adds ``|I_k minus C_k|`` to its material, with
    ``C_k`` the union of the chords of the replace objects painted after it. Only objects
    whose bounding sphere projects onto a detector window containing the cell are tested.

    Examples
    --------
    >>> L = trace(phantom, poses)                       # doctest: +SKIP
    >>> p = line_integrals(L, mu_per_mm)                # doctest: +SKIP
    """
    n_mat, cells, spots, view_idx = _check_inputs(phantom, poses, cell_samples,
                                                  spot_samples, views)
    plan = _Plan(phantom, poses, cells, spots, n_mat)
    n_views = view_idx.shape[0]
    full = np.empty((n_mat, n_views, poses.n_rows, poses.n_cols, plan.n_sub))
    per_view = n_mat * poses.n_rows * poses.n_cols * plan.n_sub * 8
    step = _chunk_views(n_views, per_view, chunk_views)
    for v0 in range(0, n_views, step):
        plan.run(view_idx[v0:v0 + step], full, v0)
    sub = cell_samples is not None or spot_samples is not None
    return full.reshape(_shape(poses, n_mat, n_views, plan.n_sub, sub))


def iter_trace(phantom: Phantom, poses: Poses, *, cell_samples=None, spot_samples=None,
               views=None, chunk_views: int | None = None
               ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Trace chunk by chunk of views, so that large cone-beam runs stream through memory.

    Parameters are those of :func:`trace`.

    Yields
    ------
    view_indices : int64 (n,)
        The views of this chunk.
    path_lengths : ndarray
        Their path lengths, laid out as :func:`trace` returns them with n views.
    """
    n_mat, cells, spots, view_idx = _check_inputs(phantom, poses, cell_samples,
                                                  spot_samples, views)
    plan = _Plan(phantom, poses, cells, spots, n_mat)
    per_view = n_mat * poses.n_rows * poses.n_cols * plan.n_sub * 8
    step = _chunk_views(view_idx.shape[0], per_view, chunk_views)
    sub = cell_samples is not None or spot_samples is not None
    for v0 in range(0, view_idx.shape[0], step):
        chunk = view_idx[v0:v0 + step]
        out = np.empty((n_mat, chunk.shape[0], poses.n_rows, poses.n_cols, plan.n_sub))
        plan.run(chunk, out, 0)
        yield chunk, out.reshape(_shape(poses, n_mat, chunk.shape[0], plan.n_sub, sub))


def line_integrals(path_lengths: np.ndarray, mu_per_mm) -> np.ndarray:
    """Monochromatic line integrals ``p = sum_m mu_m L_m``.

    Parameters
    ----------
    path_lengths : ndarray (M, ...)
        Path lengths in mm from :func:`trace`.
    mu_per_mm : array (M,)
        Attenuation coefficient of each material in 1/mm (may be negative for materials
        of published additive phantoms).

    Returns
    -------
    ndarray float64, shaped ``path_lengths.shape[1:]``
        Dimensionless line integrals (Beer–Lambert: ``I = I0 exp(-p)``).
    """
    lengths = np.asarray(path_lengths, dtype=np.float64)
    mu = np.asarray(mu_per_mm, dtype=np.float64)
    if mu.ndim != 1 or lengths.ndim < 1 or mu.shape[0] != lengths.shape[0]:
        raise InputError(_where("mu_per_mm"), f"shape {mu.shape} does not match "
                         f"{lengths.shape[0] if lengths.ndim else 0} materials",
                         "one mu in 1/mm per material of the path-length array")
    if not np.all(np.isfinite(mu)):
        raise InputError(_where("mu_per_mm"), "contains NaN or infinite values",
                         "finite mu in 1/mm")
    return np.tensordot(mu, lengths, axes=(0, 0))


def edge_truncation(path_lengths: np.ndarray, *, sub_rays: bool = False) -> float:
    """Fraction of views in which the first or last detector column sees the object.

    A non-zero fraction means the detector does not cover the object (truncated
    projections); callers warn the user.

    Parameters
    ----------
    path_lengths : ndarray
        ``(M, V, [R,] C)`` path lengths from :func:`trace`, or with a trailing sub-ray axis
        when ``sub_rays`` is True.
    sub_rays : bool
        The last axis holds sub-rays (``cell_samples`` / ``spot_samples`` were given).

    Returns
    -------
    float
        In [0, 1].
    """
    lengths = np.asarray(path_lengths)
    if sub_rays:
        if lengths.ndim not in (4, 5):
            raise InputError(_where("path_lengths"), f"shape {lengths.shape}",
                             "(materials, views, [rows,] columns, sub-rays)")
        lengths = lengths.any(axis=-1)
    if lengths.ndim not in (3, 4):
        raise InputError(_where("path_lengths"), f"shape {lengths.shape}",
                         "(materials, views, [rows,] columns[, sub-rays])")
    if lengths.shape[1] == 0:
        return 0.0
    edges = np.concatenate([lengths[..., :1], lengths[..., -1:]], axis=-1) != 0
    per_view = edges.reshape(lengths.shape[0], lengths.shape[1], -1).any(axis=(0, 2))
    return float(per_view.mean())
