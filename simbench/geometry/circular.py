"""Circular (and helical) scanner geometries compiled to the pose form.

Conventions (ARCHITECTURE.md): view angle phi, central ray direction
``d(phi) = (-sin phi, cos phi, 0)``, column axis ``u(phi) = (cos phi, sin phi, 0)``, row axis
``v = +z``. At phi = 0 the source is at -y, the detector at +y and columns run along +x.
Divergent beams put the source at ``-SID * d(phi)`` and the flat detector centre at
``(SDD - SID) * d(phi)``; a helical scan adds the same z shift to both. Cell centres along u are
``u_j = (j - (n_cols - 1)/2) * pitch_u + offset_u`` (arc length on a curved detector), and
likewise along v.

All functions take keyword arguments in mm and radians and raise
:class:`~simbench.errors.InputError` naming the argument when a value is not valid.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry import limits as L
from simbench.geometry.poses import Poses

SHORT = "short"
_ARGS = "<arguments>"


def _fail(field: str, problem: str, valid: str) -> InputError:
    return InputError(Where(_ARGS, field=field), problem, valid)


def _positive_int(value: Any, field: str, maximum: int = L.MAX_CELLS) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not (
            1 <= value <= maximum):
        raise _fail(field, f"must be a whole number from 1 to {maximum:,}, got {value!r}",
                    f"an integer from 1 to {maximum:,}")
    return int(value)


def _finite(value: Any, field: str, *, positive: bool = False, length: bool = True) -> float:
    """A finite number; a length (``length``) within the ranges of :mod:`limits`: a positive
    one from 1e-5 to 1e5 mm, any other within +-1e5 mm."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise _fail(field, f"expected a number, got {value!r}", "a finite number") from None
    if not math.isfinite(number):
        raise _fail(field, f"must be finite, got {value!r}", "a finite number")
    if positive and number <= 0:
        raise _fail(field, f"must be > 0, got {value!r}", "a positive number")
    if length:
        where = Where(_ARGS, field=field)
        return L.check_length(number, where) if positive else L.check_shift(number, where)
    return number


def cell_centres_mm(n_cells: int, pitch_mm: float, offset_mm: float = 0.0) -> np.ndarray:
    """Centres of a row of detector cells.

    Parameters
    ----------
    n_cells : int
        Number of cells.
    pitch_mm : float
        Cell pitch in mm (arc length for a curved detector).
    offset_mm : float
        Shift of the whole row in mm (e.g. a quarter-cell offset is ``pitch_mm / 4``).

    Returns
    -------
    float64 (n_cells,)
        ``(j - (n_cells - 1) / 2) * pitch_mm + offset_mm`` for ``j = 0 .. n_cells - 1``.
    """
    n_cells = _positive_int(n_cells, "n_cells")
    pitch_mm = _finite(pitch_mm, "pitch_mm", positive=True)
    offset_mm = _finite(offset_mm, "offset_mm")
    return (np.arange(n_cells, dtype=np.float64) - (n_cells - 1) / 2.0) * pitch_mm + offset_mm


def view_angles_rad(n_views: int, arc_rad: float, start_angle_rad: float = 0.0,
                    clockwise: bool = False, include_arc_end: bool = False) -> np.ndarray:
    """View angles of a circular scan.

    Parameters
    ----------
    n_views : int
        Number of views.
    arc_rad : float
        Angle covered by the scan in radians (> 0).
    start_angle_rad : float
        Angle phi of the first view.
    clockwise : bool
        Rotate clockwise seen from +z (phi decreasing) instead of counterclockwise.
    include_arc_end : bool
        Put the last view at the end of the arc (step ``arc / (n_views - 1)``) rather than
        one step before it (step ``arc / n_views``, the usual choice for a full turn, where the
        end coincides with the start).

    Returns
    -------
    float64 (n_views,)
        ``start + s * i * step`` with ``s = -1`` for clockwise rotation, else ``+1``.
    """
    n_views = _positive_int(n_views, "n_views", L.MAX_VIEWS)
    arc_rad = _finite(arc_rad, "arc_rad", positive=True, length=False)
    start_angle_rad = _finite(start_angle_rad, "start_angle_rad", length=False)
    if include_arc_end and n_views > 1:
        step = arc_rad / (n_views - 1)
    else:
        step = arc_rad / n_views
    sign = -1.0 if clockwise else 1.0
    return start_angle_rad + sign * step * np.arange(n_views, dtype=np.float64)


def fan_angle_rad(*, n_cols: int, pitch_u_mm: float, sdd_mm: float, curved: bool = False,
                  offset_u_mm: float = 0.0) -> float:
    """Full fan angle of a divergent beam, measured at the outer edges of the end cells.

    Parameters
    ----------
    n_cols : int
    pitch_u_mm : float
        Column pitch at the detector in mm (arc length on a curved detector).
    sdd_mm : float
        Source-to-detector distance in mm.
    curved : bool
        Equiangular curved detector (cells on a circle of radius SDD about the source).
    offset_u_mm : float
        Column offset in mm.

    Returns
    -------
    float
        ``2 * max(|gamma_first|, |gamma_last|)`` in radians, where the edge fan angles are
        ``gamma = atan(u_edge / SDD)`` (flat) or ``u_edge / SDD`` (curved). For a centred flat
        detector of width W this is ``2 * atan(W / (2 SDD))``; an offset detector counts its
        longer side, which is what a short scan must cover.
    """
    col = cell_centres_mm(n_cols, pitch_u_mm, offset_u_mm)
    sdd_mm = _finite(sdd_mm, "sdd_mm", positive=True)
    edges = np.array([col[0] - pitch_u_mm / 2.0, col[-1] + pitch_u_mm / 2.0])
    gamma = edges / sdd_mm if curved else np.arctan(edges / sdd_mm)
    return float(2.0 * np.max(np.abs(gamma)))


def short_scan_arc_rad(*, n_cols: int, pitch_u_mm: float, sdd_mm: float, curved: bool = False,
                       offset_u_mm: float = 0.0) -> float:
    """The short-scan arc: 180 degrees plus the full fan angle (radians).

    Notes
    -----
    A divergent-beam scan over ``pi + 2 * gamma_max`` measures every line through the field of
    view at least once (Parker's condition).

    References
    ----------
    D. L. Parker, "Optimal short scan convolution reconstruction for fan beam CT",
    Med. Phys. 9(2), 254-257 (1982).
    """
    return math.pi + fan_angle_rad(n_cols=n_cols, pitch_u_mm=pitch_u_mm, sdd_mm=sdd_mm,
                                   curved=curved, offset_u_mm=offset_u_mm)


def _angles(angles_rad, n_views, arc_rad, short_arc_rad, start_angle_rad, clockwise,
            include_arc_end, max_arc_rad) -> np.ndarray:
    if angles_rad is not None:
        angles = np.asarray(angles_rad, dtype=np.float64)
        if angles.ndim != 1 or angles.shape[0] < 1:
            raise _fail("angles_rad", f"expected a 1-D array of >= 1 angles, got shape {angles.shape}",
                        "a 1-D array of view angles in radians")
        if not np.all(np.isfinite(angles)):
            raise _fail("angles_rad", "contains NaN or inf", "finite angles in radians")
        if angles.shape[0] > L.MAX_VIEWS:
            raise _fail("angles_rad", f"{angles.shape[0]:,} angles", f"at most {L.MAX_VIEWS:,}")
        if n_views is not None and int(n_views) != angles.shape[0]:
            raise _fail("n_views", f"{n_views} views but {angles.shape[0]} angles given",
                        "leave n_views out or give as many angles")
        return angles.copy()
    if n_views is None:
        raise _fail("n_views", "missing", "the number of views (or angles_rad)")
    if isinstance(arc_rad, str):
        if arc_rad != SHORT:
            raise _fail("arc_rad", f"'{arc_rad}' is not known", "an angle in radians or 'short'")
        if short_arc_rad is None:
            raise _fail("arc_rad", "a short scan is not defined for this geometry",
                        "an angle in radians")
        arc_rad = short_arc_rad
    arc_rad = _finite(arc_rad, "arc_rad", positive=True, length=False)
    if max_arc_rad is not None and arc_rad > max_arc_rad * (1 + 1e-12):
        raise _fail("arc_rad", f"must be <= 2 pi, got {arc_rad:g}",
                    "an arc of at most one turn (use a helical scan for more)")
    return view_angles_rad(n_views, arc_rad, start_angle_rad, clockwise, include_arc_end)


def _frame(angles: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    c, s = np.cos(angles), np.sin(angles)
    zero = np.zeros_like(angles)
    d = np.stack([-s, c, zero], axis=1) + 0.0
    u = np.stack([c, s, zero], axis=1)
    v = np.zeros_like(d)
    v[:, 2] = 1.0
    return d, u, v


def parallel_poses(*, n_cols: int, pitch_u_mm: float, n_views: int | None = None,
                   arc_rad: float | str = math.pi, start_angle_rad: float = 0.0,
                   clockwise: bool = False, include_arc_end: bool = False,
                   offset_u_mm: float = 0.0, n_rows: int = 1, pitch_v_mm: float | None = None,
                   offset_v_mm: float = 0.0, dimension: int | None = None,
                   angles_rad=None) -> Poses:
    """A parallel-beam scan (2-D, or 3-D with several rows stacked along z).

    Parameters
    ----------
    n_cols : int
        Detector columns.
    pitch_u_mm : float
        Column pitch in mm (equal at the detector and the isocentre for parallel beams).
    n_views : int
        Number of views (may be left out when ``angles_rad`` is given).
    arc_rad : float or ``"short"``
        Angle covered, radians (default pi; ``"short"`` is pi for a parallel beam).
    start_angle_rad : float
        Angle of the first view.
    clockwise, include_arc_end : bool
        See :func:`view_angles_rad`.
    offset_u_mm, offset_v_mm : float
        Shift of the cell grid along u and v in mm.
    n_rows : int
        Rows (1 for 2-D).
    pitch_v_mm : float, optional
        Row pitch in mm; default ``pitch_u_mm``. In 2-D it is only the nominal cell height
        (aperture); the rays stay at z = 0.
    dimension : {2, 3}, optional
        Default 2 if ``n_rows == 1`` else 3.
    angles_rad : array (V,), optional
        Explicit view angles instead of ``n_views`` / ``arc_rad``.

    Returns
    -------
    Poses
        ``parallel=True``; ``direction = d(phi)``, the detector centre on the rotation axis.

    Notes
    -----
    The ray through column coordinate t is the line ``{t * u(phi) + s * d(phi)}``, so the
    projection is ``p(phi, t) = integral f(t u + s d) ds``, the Radon transform with
    theta = phi.

    Examples
    --------
    >>> p = parallel_poses(n_cols=4, pitch_u_mm=1.0, n_views=2)
    >>> p.col_u_mm.tolist(), p.projection_shape
    ([-1.5, -0.5, 0.5, 1.5], (2, 4))
    """
    n_rows = _positive_int(n_rows, "n_rows")
    dimension = _dimension(dimension, n_rows)
    pitch_u_mm = _finite(pitch_u_mm, "pitch_u_mm", positive=True)
    pitch_v_mm = pitch_u_mm if pitch_v_mm is None else _finite(pitch_v_mm, "pitch_v_mm",
                                                               positive=True)
    _check_memory(n_views, angles_rad, n_cols, n_rows)
    col = cell_centres_mm(n_cols, pitch_u_mm, _finite(offset_u_mm, "offset_u_mm"))
    row = _rows(dimension, n_rows, pitch_v_mm, offset_v_mm)
    angles = _angles(angles_rad, n_views, arc_rad, math.pi, start_angle_rad, clockwise,
                     include_arc_end, 2 * math.pi)
    d, u, v = _frame(angles)
    return Poses(parallel=True, source=np.zeros_like(d), direction=d,
                 detector_centre=np.zeros_like(d), u_axis=u, v_axis=v, curved=False,
                 col_u_mm=col, row_v_mm=row, pitch_u_mm=pitch_u_mm, pitch_v_mm=pitch_v_mm,
                 angles_rad=angles, dimension=dimension)


def _check_memory(n_views, angles_rad, n_cols, n_rows) -> None:
    """The pose and cell arrays' memory against the budget, before they are built."""
    views = _positive_int(n_views, "n_views", L.MAX_VIEWS) if angles_rad is None else \
        int(np.size(angles_rad))
    L.check_pose_memory(views, _positive_int(n_cols, "n_cols"), _positive_int(n_rows, "n_rows"),
                        Where(_ARGS, field="n_views"), Where(_ARGS, field="n_cols"),
                        Where(_ARGS, field="n_rows"))


def _dimension(dimension, n_rows) -> int:
    if dimension is None:
        return 2 if n_rows == 1 else 3
    if dimension not in (2, 3):
        raise _fail("dimension", f"must be 2 or 3, got {dimension!r}", "2 or 3")
    if dimension == 2 and n_rows != 1:
        raise _fail("n_rows", f"a 2-D scanner has one row, got {n_rows}", "n_rows = 1 or dimension 3")
    return int(dimension)


def _rows(dimension, n_rows, pitch_v_mm, offset_v_mm) -> np.ndarray:
    offset_v_mm = _finite(offset_v_mm, "offset_v_mm")
    if dimension == 2:
        if offset_v_mm != 0.0:
            raise _fail("offset_v_mm", "a 2-D scanner has its one row at z = 0",
                        "offset_v_mm = 0 or dimension 3")
        return np.zeros(1)
    return cell_centres_mm(n_rows, pitch_v_mm, offset_v_mm)


def _divergent(*, sid_mm, sdd_mm, n_cols, pitch_u_mm, n_rows, pitch_v_mm, curved, offset_u_mm,
               offset_v_mm, n_views, arc_rad, start_angle_rad, clockwise, include_arc_end,
               angles_rad, dimension, table_feed_per_turn_mm=0.0, start_z_mm=0.0,
               max_arc_rad=2 * math.pi) -> Poses:
    sid_mm = _finite(sid_mm, "sid_mm", positive=True)
    sdd_mm = _finite(sdd_mm, "sdd_mm", positive=True)
    if sdd_mm <= sid_mm:
        raise _fail("sdd_mm", f"SDD ({sdd_mm:g} mm) must be greater than SID ({sid_mm:g} mm)",
                    "a source-to-detector distance larger than the source-to-isocentre distance")
    pitch_u_mm = _finite(pitch_u_mm, "pitch_u_mm", positive=True)
    pitch_v_mm = pitch_u_mm if pitch_v_mm is None else _finite(pitch_v_mm, "pitch_v_mm",
                                                               positive=True)
    _check_memory(n_views, angles_rad, n_cols, n_rows)
    offset_u_mm = _finite(offset_u_mm, "offset_u_mm")
    col = cell_centres_mm(n_cols, pitch_u_mm, offset_u_mm)
    row = _rows(dimension, n_rows, pitch_v_mm, offset_v_mm)
    short = None
    if table_feed_per_turn_mm == 0.0:
        short = short_scan_arc_rad(n_cols=n_cols, pitch_u_mm=pitch_u_mm, sdd_mm=sdd_mm,
                                   curved=bool(curved), offset_u_mm=offset_u_mm)
    angles = _angles(angles_rad, n_views, arc_rad, short, start_angle_rad, clockwise,
                     include_arc_end, max_arc_rad)
    d, u, v = _frame(angles)
    source = -sid_mm * d + 0.0  # + 0.0 turns -0.0 into 0.0 (tidier printing, same values)
    centre = (sdd_mm - sid_mm) * d + 0.0
    feed = _finite(table_feed_per_turn_mm, "table_feed_per_turn_mm")
    start_z_mm = _finite(start_z_mm, "start_z_mm")
    if feed != 0.0 or start_z_mm != 0.0:
        z = start_z_mm + feed * np.abs(angles - angles[0]) / (2.0 * math.pi)
        source[:, 2] += z
        centre[:, 2] += z
    return Poses(parallel=False, source=source, direction=d, detector_centre=centre, u_axis=u,
                 v_axis=v, curved=bool(curved), col_u_mm=col, row_v_mm=row,
                 pitch_u_mm=pitch_u_mm, pitch_v_mm=pitch_v_mm, angles_rad=angles,
                 dimension=dimension)


def fan_poses(*, sid_mm: float, sdd_mm: float, n_cols: int, pitch_u_mm: float,
              n_views: int | None = None, arc_rad: float | str = 2 * math.pi,
              start_angle_rad: float = 0.0, clockwise: bool = False,
              include_arc_end: bool = False, curved: bool = False, offset_u_mm: float = 0.0,
              pitch_v_mm: float | None = None, angles_rad=None) -> Poses:
    """A 2-D fan-beam scan (one row at z = 0; projections shaped (V, C)).

    Parameters
    ----------
    sid_mm, sdd_mm : float
        Source-to-isocentre and source-to-detector distances in mm (SDD > SID).
    n_cols : int
    pitch_u_mm : float
        Column pitch at the detector in mm (arc length on a curved detector).
    n_views : int
        Number of views (may be left out when ``angles_rad`` is given).
    arc_rad : float or ``"short"``
        Angle covered in radians (default 2 pi); ``"short"`` is pi plus the full fan angle
        (:func:`short_scan_arc_rad`).
    start_angle_rad : float
    clockwise, include_arc_end : bool
        See :func:`view_angles_rad`.
    curved : bool
        Equiangular detector: cells on the circle of radius SDD about the source, column j at
        fan angle ``gamma_j = u_j / SDD``.
    offset_u_mm : float
        Column offset in mm, e.g. ``pitch_u_mm / 4`` (quarter-cell offset) or about half the
        detector width for an offset (half-fan) detector.
    pitch_v_mm : float, optional
        Nominal cell height (aperture only), default ``pitch_u_mm``.
    angles_rad : array (V,), optional
        Explicit view angles.

    Returns
    -------
    Poses
        Source ``-SID d(phi)``, detector centre ``(SDD - SID) d(phi)``.

    Examples
    --------
    >>> p = fan_poses(sid_mm=500.0, sdd_mm=1000.0, n_cols=3, pitch_u_mm=1.0, n_views=4)
    >>> p.source[0].tolist(), p.detector_centre[0].tolist()
    ([0.0, -500.0, 0.0], [0.0, 500.0, 0.0])
    """
    return _divergent(sid_mm=sid_mm, sdd_mm=sdd_mm, n_cols=n_cols, pitch_u_mm=pitch_u_mm,
                      n_rows=1, pitch_v_mm=pitch_v_mm, curved=curved, offset_u_mm=offset_u_mm,
                      offset_v_mm=0.0, n_views=n_views, arc_rad=arc_rad,
                      start_angle_rad=start_angle_rad, clockwise=clockwise,
                      include_arc_end=include_arc_end, angles_rad=angles_rad, dimension=2)


def cone_poses(*, sid_mm: float, sdd_mm: float, n_cols: int, n_rows: int, pitch_u_mm: float,
               pitch_v_mm: float, n_views: int | None = None, arc_rad: float | str = 2 * math.pi,
               start_angle_rad: float = 0.0, clockwise: bool = False,
               include_arc_end: bool = False, curved: bool = False, offset_u_mm: float = 0.0,
               offset_v_mm: float = 0.0, table_feed_per_turn_mm: float = 0.0,
               start_z_mm: float = 0.0, angles_rad=None) -> Poses:
    """A cone-beam scan on a circle, or on a helix when ``table_feed_per_turn_mm`` is not 0.

    Parameters
    ----------
    sid_mm, sdd_mm : float
        Source-to-isocentre and source-to-detector distances in mm (SDD > SID).
    n_cols, n_rows : int
    pitch_u_mm, pitch_v_mm : float
        Column pitch (arc length on a curved detector) and row pitch at the detector, mm.
    n_views : int
        Number of views (may be left out when ``angles_rad`` is given).
    arc_rad : float or ``"short"``
        Angle covered in radians (default 2 pi; at most 2 pi for a circular scan, any length
        for a helix); ``"short"`` is pi plus the full fan angle (circular scans only).
    start_angle_rad : float
    clockwise, include_arc_end : bool
        See :func:`view_angles_rad`.
    curved : bool
        Cylindrical equiangular detector (axis along z through the source).
    offset_u_mm, offset_v_mm : float
        Shift of the cell grid along u and v in mm.
    table_feed_per_turn_mm : float
        Helical scan: the source and detector move by this much along +z per turn of rotation
        (negative for the other way). The helical pitch of the trade is this feed divided by
        the detector height at the isocentre, ``n_rows * pitch_v_mm * SID / SDD``.
    start_z_mm : float
        z of the source and detector centre at the first view.
    angles_rad : array (V,), optional
        Explicit view angles.

    Returns
    -------
    Poses
        Source ``-SID d(phi) + z_i e_z``, detector centre ``(SDD - SID) d(phi) + z_i e_z`` with
        ``z_i = start_z + feed * |phi_i - phi_0| / (2 pi)``.
    """
    n_rows = _positive_int(n_rows, "n_rows")
    feed = _finite(table_feed_per_turn_mm, "table_feed_per_turn_mm")
    return _divergent(sid_mm=sid_mm, sdd_mm=sdd_mm, n_cols=n_cols, pitch_u_mm=pitch_u_mm,
                      n_rows=n_rows, pitch_v_mm=pitch_v_mm, curved=curved,
                      offset_u_mm=offset_u_mm, offset_v_mm=offset_v_mm, n_views=n_views,
                      arc_rad=arc_rad, start_angle_rad=start_angle_rad, clockwise=clockwise,
                      include_arc_end=include_arc_end, angles_rad=angles_rad, dimension=3,
                      table_feed_per_turn_mm=feed, start_z_mm=start_z_mm,
                      max_arc_rad=None if feed != 0.0 else 2 * math.pi)
