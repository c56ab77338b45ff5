"""User-given poses: per-view source (or ray direction), detector centre and detector axes.

Any trajectory (C-arm, bench-top rotation stage with wobble, tomosynthesis, ...) can be
written as one pose per view. :func:`poses_from_arrays` checks the arrays and returns the
pose form; the scanner-file reader and the pose-file reader place each error at its line.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.circular import cell_centres_mm
from simbench.geometry.limits import MAX_LENGTH_MM
from simbench.geometry.poses import Poses

#: Relative tolerance on unit length and orthogonality of the detector axes; within it the
#: axes are normalised (and v made orthogonal to u), beyond it the pose is refused.
AXIS_TOLERANCE = 1e-3

#: Field names of one pose, in the column order of pose files.
DIVERGENT_FIELDS = ("source", "detector_centre", "u_axis", "v_axis")
PARALLEL_FIELDS = ("direction", "detector_centre", "u_axis", "v_axis")

Place = Callable[[int, str], Where]


def _default_place(view: int, field: str) -> Where:
    return Where("<arguments>", field=f"{field}[{view}]")


def _vectors(value, field: str, n_views: int | None, place: Place) -> np.ndarray:
    array = np.asarray(value, dtype=np.float64)
    if array.ndim != 2 or array.shape[1] != 3 or array.shape[0] < 1 or (
            n_views is not None and array.shape[0] != n_views):
        want = f"({n_views}, 3)" if n_views is not None else "(V, 3) with V >= 1"
        raise InputError(Where(place(0, field).source, field=field),
                         f"expected an array of shape {want}, got shape {array.shape}",
                         "one 3-vector (x, y, z) in mm per view")
    bad = np.flatnonzero(~np.all(np.isfinite(array), axis=1))
    if bad.size:
        raise InputError(place(int(bad[0]), field), "contains NaN or inf", "finite numbers")
    bad = np.flatnonzero(np.any(np.abs(array) > MAX_LENGTH_MM, axis=1))
    if bad.size and field in ("source", "detector_centre"):  # axes meet the unit check
        i = int(bad[0])
        raise InputError(place(i, field), f"{array[i].tolist()} reaches beyond 100 m",
                         f"coordinates within +-{MAX_LENGTH_MM:g} mm (100 m)")
    return array.copy()


def _unit(array: np.ndarray, field: str, place: Place, tolerance: float) -> np.ndarray:
    norm = np.linalg.norm(array, axis=1)
    bad = np.flatnonzero(np.abs(norm - 1.0) > tolerance)
    if bad.size:
        i = int(bad[0])
        raise InputError(place(i, field), f"is not a unit vector (length {norm[i]:.6g})",
                         f"a vector of length 1 within {tolerance:g}")
    return array / norm[:, None]


def poses_from_arrays(*, detector_centre, u_axis, v_axis, n_cols: int, pitch_u_mm: float,
                      source=None, direction=None, n_rows: int = 1,
                      pitch_v_mm: float | None = None, offset_u_mm: float = 0.0,
                      offset_v_mm: float = 0.0, curved: bool = False, dimension: int = 3,
                      tolerance: float = AXIS_TOLERANCE, place: Place | None = None) -> Poses:
    """The pose form from explicit per-view arrays.

    Parameters
    ----------
    detector_centre : array (V, 3)
        Detector centre per view in mm (world frame).
    u_axis, v_axis : array (V, 3)
        Column and row axes per view; unit and orthogonal within ``tolerance`` (they are then
        normalised, and v is made exactly orthogonal to u).
    n_cols : int
    pitch_u_mm : float
        Column pitch in mm (arc length on a curved detector).
    source : array (V, 3), optional
        Focal spot centre per view in mm: a divergent beam. Give this or ``direction``.
    direction : array (V, 3), optional
        Unit ray direction per view: a parallel beam.
    n_rows : int
    pitch_v_mm : float, optional
        Default ``pitch_u_mm``.
    offset_u_mm, offset_v_mm : float
        Shift of the cell grid on the detector in mm.
    curved : bool
        Equiangular cylindrical detector (divergent beams only); the central ray
        ``detector_centre - source`` must then be orthogonal to u and v.
    dimension : {2, 3}
        2 for a 2-D scanner: one row, every position and axis in the plane z = 0 with
        ``v_axis = +z``.
    tolerance : float
        Tolerance of the axis checks.
    place : callable (view, field) -> Where, optional
        Where to report a problem with one view's field (used by the file readers).

    Returns
    -------
    Poses
        ``angles_rad`` is NaN (no view angle is defined for free poses).

    Raises
    ------
    InputError
        Wrong shapes, NaN/inf, a coordinate beyond +-1e5 mm (100 m), axes not unit or not
        orthogonal, source on the detector plane, ray direction in the detector plane.
    """
    place = place or _default_place
    parallel = direction is not None
    if parallel == (source is not None):
        raise InputError(Where(place(0, "source").source, field="source"),
                         "give either source (divergent beam) or direction (parallel beam)",
                         "exactly one of source, direction")
    if parallel and curved:
        raise InputError(Where(place(0, "detector_shape").source, field="detector_shape"),
                         "a curved detector needs a divergent beam", "flat")
    centre = _vectors(detector_centre, "detector_centre", None, place)
    n_views = centre.shape[0]
    u = _unit(_vectors(u_axis, "u_axis", n_views, place), "u_axis", place, tolerance)
    v = _unit(_vectors(v_axis, "v_axis", n_views, place), "v_axis", place, tolerance)
    dot = np.einsum("ij,ij->i", u, v)
    bad = np.flatnonzero(np.abs(dot) > tolerance)
    if bad.size:
        i = int(bad[0])
        raise InputError(place(i, "v_axis"), f"is not orthogonal to u_axis (u.v = {dot[i]:.6g})",
                         f"axes with |u.v| <= {tolerance:g}")
    v = v - dot[:, None] * u
    v /= np.linalg.norm(v, axis=1)[:, None]
    normal = np.cross(u, v)
    if parallel:
        ray = _unit(_vectors(direction, "direction", n_views, place), "direction", place,
                    tolerance)
        src = np.zeros_like(centre)
        field = "direction"
    else:
        src = _vectors(source, "source", n_views, place)
        w = centre - src
        length = np.linalg.norm(w, axis=1)
        bad = np.flatnonzero(length <= 1e-9 * (1.0 + np.linalg.norm(centre, axis=1)))
        if bad.size:
            raise InputError(place(int(bad[0]), "source"), "coincides with the detector centre",
                             "a source away from the detector")
        ray = w / length[:, None]
        field = "source"
        if curved:
            col = cell_centres_mm(n_cols, pitch_u_mm, offset_u_mm)
            edge = float(np.max(np.abs(col))) + 0.5 * float(pitch_u_mm)
            bad = np.flatnonzero(edge / length >= 0.5 * np.pi)
            if bad.size:
                i = int(bad[0])
                raise InputError(place(i, "detector_centre"),
                                 f"the curved detector's outer cells are {edge:.6g} mm of arc "
                                 f"from its centre, {np.degrees(edge / length[i]):.6g} deg at "
                                 f"{length[i]:.6g} mm from the source",
                                 "a fan angle under 180 deg: the detector farther from the "
                                 "source, or fewer or narrower cells")
            off = np.maximum(np.abs(np.einsum("ij,ij->i", ray, u)),
                             np.abs(np.einsum("ij,ij->i", ray, v)))
            bad = np.flatnonzero(off > tolerance)
            if bad.size:
                raise InputError(place(int(bad[0]), "u_axis"),
                                 "a curved detector needs u and v orthogonal to the central "
                                 "ray (detector_centre - source)",
                                 "axes perpendicular to the central ray, or a flat detector")
    cosine = np.abs(np.einsum("ij,ij->i", ray, normal))
    bad = np.flatnonzero(cosine < 1e-6)
    if bad.size:
        raise InputError(place(int(bad[0]), field), "the central ray lies in the detector plane",
                         "a ray that crosses the detector plane")
    if dimension not in (2, 3):
        raise InputError(Where(place(0, "dimension").source, field="dimension"),
                         f"must be 2 or 3, got {dimension!r}", "2 or 3")
    if dimension == 2:
        if n_rows != 1 or offset_v_mm != 0.0:
            raise InputError(Where(place(0, "rows").source, field="rows"),
                             "a 2-D scanner has one row at z = 0", "rows 1 and no row offset")
        checks = [("detector_centre", centre[:, 2]), ("u_axis", u[:, 2]),
                  ("v_axis", 1.0 - v[:, 2]), (field, (ray if parallel else src)[:, 2])]
        for name, values in checks:
            bad = np.flatnonzero(np.abs(values) > tolerance)
            if bad.size:
                raise InputError(place(int(bad[0]), name), "leaves the plane z = 0 of a 2-D "
                                 "scanner", "z = 0 for positions and u, v = (0, 0, 1)")
        u[:, 2] = 0.0
        u /= np.linalg.norm(u, axis=1)[:, None]
        v[:] = (0.0, 0.0, 1.0)
        centre[:, 2] = 0.0
        if parallel:
            ray[:, 2] = 0.0
            ray /= np.linalg.norm(ray, axis=1)[:, None]
        else:
            src[:, 2] = 0.0
            ray = centre - src
            ray /= np.linalg.norm(ray, axis=1)[:, None]
    pitch_v = pitch_u_mm if pitch_v_mm is None else pitch_v_mm
    col = cell_centres_mm(n_cols, pitch_u_mm, offset_u_mm)
    row = np.zeros(1) if dimension == 2 else cell_centres_mm(n_rows, pitch_v, offset_v_mm)
    return Poses(parallel=parallel, source=src, direction=ray, detector_centre=centre,
                 u_axis=u, v_axis=v, curved=bool(curved), col_u_mm=col, row_v_mm=row,
                 pitch_u_mm=float(pitch_u_mm), pitch_v_mm=float(pitch_v),
                 angles_rad=np.full(n_views, np.nan), dimension=int(dimension))


def pose_table(poses: Poses) -> np.ndarray:
    """The per-view pose arrays as one table, the layout of ``.npy`` pose files.

    Returns
    -------
    float64 (V, 12)
        Columns: source (or direction for a parallel beam) x, y, z; detector centre x, y, z;
        u axis x, y, z; v axis x, y, z.
    """
    first = poses.direction if poses.parallel else poses.source
    return np.concatenate([first, poses.detector_centre, poses.u_axis, poses.v_axis], axis=1)
