"""The ``geometry`` section of a scanner file, parsed into a :class:`ScannerGeometry`.

Keys (lengths: a bare number is in the file's ``units``, default mm, or give a unit such as
``"1040 mm"``; angles are degrees; see docs/geometry.md for the frames and formulas):

=====================  ==========================================================================
key                    meaning
=====================  ==========================================================================
type                   ``parallel``, ``fan`` (2-D), ``cone``, ``helical`` or ``poses``
dimension              2 or 3 (``parallel``: default 2 without ``rows``; ``poses``: default 3;
                       ``fan`` is 2, ``cone`` and ``helical`` are 3)
sid                    source-to-isocentre distance (fan, cone, helical)
sdd                    source-to-detector distance, > sid (fan, cone, helical)
detector_shape         ``flat`` (default) or ``curved`` (equiangular; not for parallel beams)
columns, column_pitch  number of detector columns and their pitch at the detector (arc length
                       on a curved detector)
column_offset          shift of the cells along u: a length or a number of cells,
                       e.g. ``"0.25 cells"`` (quarter-cell offset); default 0
rows, row_pitch        rows and row pitch (3-D); in 2-D ``row_pitch`` is the nominal cell
                       height (aperture only), default the column pitch
row_offset             shift of the cells along v (3-D), a length or ``"<n> cells"``
views                  number of views (circular and helical scans)
arc                    angle covered: degrees (default 180 parallel, 360 otherwise) or ``short``
                       (180 + full fan angle; 180 for parallel beams); helical: any length
include_arc_end        last view at the end of the arc (default false: step = arc / views)
start_angle            angle phi of the first view (default 0)
direction              ``counterclockwise`` (default, phi increasing seen from +z) or
                       ``clockwise``
table_feed_per_turn    helical: z travel of source and detector per turn (may be negative)
start_z                helical: z of source and detector centre at the first view (default 0)
beam                   poses: ``divergent`` (default, a source per view) or ``parallel``
                       (a ray direction per view)
poses                  poses: list of views, each with ``source`` (or ``direction``),
                       ``detector_centre``, ``u_axis``, ``v_axis`` as [x, y, z]
pose_file              poses: ``.npy`` (V, 12) or ``.csv`` with named columns, relative to
                       the scanner file, lengths in mm (see :mod:`simbench.geometry.pose_file`)
=====================  ==========================================================================
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any


from simbench.errors import InputError, Where, warn_input
from simbench.geometry import limits as L
from simbench.geometry.circular import (cone_poses, fan_angle_rad, fan_poses, parallel_poses,
                                        short_scan_arc_rad)
from simbench.geometry.explicit import DIVERGENT_FIELDS, PARALLEL_FIELDS, poses_from_arrays
from simbench.geometry.field_of_view import field_of_view_radius_mm
from simbench.geometry.pose_file import read_pose_file
from simbench.geometry.poses import Poses
from simbench.spec import (LENGTH_UNITS_MM, Section, parse_length, parse_vector, split_quantity,
                           check_number)

TYPES = ("parallel", "fan", "cone", "helical", "poses")
DIRECTIONS = ("counterclockwise", "clockwise")
SHAPES = ("flat", "curved")

_DETECTOR = ("columns", "column_pitch", "column_offset")
_ROWS = ("rows", "row_pitch", "row_offset")
_ORBIT = ("views", "arc", "include_arc_end", "start_angle", "direction")
_DISTANCES = ("sid", "sdd", "detector_shape")

ALLOWED = {
    "parallel": ("type", "dimension", "detector_shape") + _DETECTOR + _ROWS + _ORBIT,
    "fan": ("type", "dimension") + _DISTANCES + _DETECTOR + ("row_pitch",) + _ORBIT,
    "cone": ("type", "dimension") + _DISTANCES + _DETECTOR + _ROWS + _ORBIT,
    "helical": ("type", "dimension") + _DISTANCES + _DETECTOR + _ROWS + _ORBIT
    + ("table_feed_per_turn", "start_z"),
    "poses": ("type", "dimension", "beam", "detector_shape") + _DETECTOR + _ROWS
    + ("poses", "pose_file"),
}
REQUIRED = {
    "parallel": ("columns", "column_pitch", "views"),
    "fan": ("sid", "sdd", "columns", "column_pitch", "views"),
    "cone": ("sid", "sdd", "columns", "column_pitch", "rows", "row_pitch", "views"),
    "helical": ("sid", "sdd", "columns", "column_pitch", "rows", "row_pitch", "views",
                "table_feed_per_turn"),
    "poses": ("columns", "column_pitch"),
}
_ALL_KEYS = sorted({key for keys in ALLOWED.values() for key in keys})


@dataclass(frozen=True, eq=False)
class ScannerGeometry:
    """Parsed, validated geometry settings of a scanner.

    Attributes
    ----------
    kind : str
        ``parallel``, ``fan``, ``cone``, ``helical`` or ``poses``.
    dimension : int
        2 (one row at z = 0, projections (V, C)) or 3.
    n_cols, n_rows : int
    pitch_u_mm, pitch_v_mm : float
        Cell pitch at the detector (arc length along u on a curved detector).
    offset_u_mm, offset_v_mm : float
        Shift of the cell grid along u and v.
    curved : bool
        Equiangular curved detector.
    sid_mm, sdd_mm : float
        Source-to-isocentre and source-to-detector distances (NaN where not defined).
    n_views : int
    arc : float or str
        Arc in radians, or ``"short"`` as written (see :attr:`arc_rad` for the value).
    start_angle_rad : float
    clockwise : bool
    include_arc_end : bool
    table_feed_per_turn_mm, start_z_mm : float
        Helical scans (0 otherwise).
    explicit : Poses or None
        The validated user poses (kind ``poses``).
    pose_file : str
        The pose file as written (kind ``poses`` read from a file), else empty.
    where : Where
        The place of the geometry section (for later messages).
    """

    kind: str
    dimension: int
    n_cols: int
    n_rows: int
    pitch_u_mm: float
    pitch_v_mm: float
    offset_u_mm: float = 0.0
    offset_v_mm: float = 0.0
    curved: bool = False
    sid_mm: float = math.nan
    sdd_mm: float = math.nan
    n_views: int = 0
    arc: Any = 2 * math.pi
    start_angle_rad: float = 0.0
    clockwise: bool = False
    include_arc_end: bool = False
    table_feed_per_turn_mm: float = 0.0
    start_z_mm: float = 0.0
    explicit: Poses | None = None
    pose_file: str = ""
    where: Where = Where()

    @property
    def parallel(self) -> bool:
        """Parallel beam (no source)."""
        if self.explicit is not None:
            return self.explicit.parallel
        return self.kind == "parallel"

    @property
    def fan_angle_rad(self) -> float:
        """Full fan angle of a circular divergent beam (0 for parallel, NaN for free poses)."""
        if self.kind == "parallel":
            return 0.0
        if self.kind == "poses":
            return math.nan
        return fan_angle_rad(n_cols=self.n_cols, pitch_u_mm=self.pitch_u_mm, sdd_mm=self.sdd_mm,
                             curved=self.curved, offset_u_mm=self.offset_u_mm)

    @property
    def arc_rad(self) -> float:
        """The arc in radians (``short`` resolved; NaN for free poses)."""
        if self.kind == "poses":
            return math.nan
        if self.arc == "short":
            if self.kind == "parallel":
                return math.pi
            return short_scan_arc_rad(n_cols=self.n_cols, pitch_u_mm=self.pitch_u_mm,
                                      sdd_mm=self.sdd_mm, curved=self.curved,
                                      offset_u_mm=self.offset_u_mm)
        return float(self.arc)

    @property
    def magnification(self) -> float:
        """SDD / SID (1 for parallel beams, NaN for free poses)."""
        if self.kind == "parallel":
            return 1.0
        return self.sdd_mm / self.sid_mm

    def poses(self) -> Poses:
        """The per-view pose form of this geometry."""
        common = dict(n_cols=self.n_cols, pitch_u_mm=self.pitch_u_mm, n_views=self.n_views,
                      arc_rad=self.arc, start_angle_rad=self.start_angle_rad,
                      clockwise=self.clockwise, include_arc_end=self.include_arc_end,
                      offset_u_mm=self.offset_u_mm)
        if self.kind == "parallel":
            return parallel_poses(**common, n_rows=self.n_rows, pitch_v_mm=self.pitch_v_mm,
                                  offset_v_mm=self.offset_v_mm, dimension=self.dimension)
        if self.kind == "fan":
            return fan_poses(**common, sid_mm=self.sid_mm, sdd_mm=self.sdd_mm,
                             curved=self.curved, pitch_v_mm=self.pitch_v_mm)
        if self.kind in ("cone", "helical"):
            return cone_poses(**common, sid_mm=self.sid_mm, sdd_mm=self.sdd_mm,
                              n_rows=self.n_rows, pitch_v_mm=self.pitch_v_mm,
                              curved=self.curved, offset_v_mm=self.offset_v_mm,
                              table_feed_per_turn_mm=self.table_feed_per_turn_mm,
                              start_z_mm=self.start_z_mm)
        p = self.explicit
        return Poses(p.parallel, p.source.copy(), p.direction.copy(), p.detector_centre.copy(),
                     p.u_axis.copy(), p.v_axis.copy(), p.curved, p.col_u_mm.copy(),
                     p.row_v_mm.copy(), p.pitch_u_mm, p.pitch_v_mm, p.angles_rad.copy(),
                     p.dimension)

    def field_of_view_radius_mm(self) -> float:
        """Radius of the circle about the rotation axis seen by every view (mm)."""
        return field_of_view_radius_mm(self.poses())

    def resolved(self) -> dict:
        """Every setting with its default filled in, as plain YAML-ready values with units."""
        out: dict[str, Any] = {"type": self.kind, "dimension": self.dimension}
        if self.kind in ("fan", "cone", "helical"):
            out.update(sid=f"{_exact(self.sid_mm)} mm", sdd=f"{_exact(self.sdd_mm)} mm")
        out["detector_shape"] = "curved" if self.curved else "flat"
        out.update(columns=self.n_cols, column_pitch=f"{_exact(self.pitch_u_mm)} mm",
                   column_offset=f"{_exact(self.offset_u_mm)} mm")
        if self.dimension == 3:
            out.update(rows=self.n_rows, row_offset=f"{_exact(self.offset_v_mm)} mm")
        out["row_pitch"] = f"{_exact(self.pitch_v_mm)} mm"
        if self.kind == "poses":
            out["beam"] = "parallel" if self.parallel else "divergent"
            if self.pose_file:
                out["pose_file"] = self.pose_file
            else:
                p = self.explicit
                first = "direction" if p.parallel else "source"
                out["poses"] = [{first: (p.direction if p.parallel else p.source)[i].tolist(),
                                 "detector_centre": p.detector_centre[i].tolist(),
                                 "u_axis": p.u_axis[i].tolist(), "v_axis": p.v_axis[i].tolist()}
                                for i in range(p.n_views)]
            return out
        out.update(views=self.n_views, arc=f"{_exact(math.degrees(self.arc_rad))} deg",
                   include_arc_end=self.include_arc_end,
                   start_angle=f"{_exact(math.degrees(self.start_angle_rad))} deg",
                   direction="clockwise" if self.clockwise else "counterclockwise")
        if self.kind == "helical":
            out.update(table_feed_per_turn=f"{_exact(self.table_feed_per_turn_mm)} mm",
                       start_z=f"{_exact(self.start_z_mm)} mm")
        return out


def _exact(value: float) -> str:
    """Shortest text that reads back to the same float."""
    return repr(float(value))


# --------------------------------------------------------------------------------------------
# Reading the section
# --------------------------------------------------------------------------------------------


def _check_keys(section: Section, kind: str) -> None:
    allowed = ALLOWED[kind]
    marks = getattr(section.node, "key_marks", {})
    for key in section.keys():
        if key not in allowed and key in _ALL_KEYS:
            line, column = marks.get(key, (None, None))
            raise InputError(section.where.child(str(key), line, column),
                             f"field '{key}' does not apply to type {kind}",
                             "one of " + ", ".join(allowed))
    section.check_keys(allowed, REQUIRED[kind])


def _offset(section: Section, key: str, pitch_mm: float) -> float:
    """A shift along the detector: a length, or ``"<n> cells"`` times the pitch."""
    value = section.raw(key, 0.0)
    parsed = split_quantity(value)
    if parsed is not None and parsed[1] in ("cell", "cells"):
        mm = check_number(parsed[0], section.at(key)) * pitch_mm
    elif parsed is None or (parsed[1] and parsed[1] not in LENGTH_UNITS_MM):
        raise section.error(key, f"expected a length or a number of cells, got '{value}'",
                            "a length such as '0.3 mm' or a cell count such as '0.25 cells'")
    else:
        mm = parse_length(value, section.at(key), section.length_unit)
    return L.check_shift(mm, section.at(key), "offset")


def _arc(section: Section, kind: str) -> Any:
    default = math.pi if kind == "parallel" else 2 * math.pi
    if not section.has("arc"):
        return default
    value = section.raw("arc")
    if value == "short":
        if kind == "helical":
            raise section.error("arc", "a short scan is not defined for a helical scan",
                                "an arc in degrees, e.g. 720 for two turns")
        return "short"
    arc = section.angle("arc")
    if not arc > 0:
        raise section.error("arc", f"must be > 0 deg, got {value}",
                            "an arc in degrees such as 360, or 'short'")
    if kind != "helical" and arc > 2 * math.pi * (1 + 1e-12):
        raise section.error("arc", f"must be at most 360 deg, got {value}",
                            "an arc of at most 360 deg or 'short' (use type helical for more)")
    if arc > math.radians(L.MAX_HELICAL_ARC_DEG) * (1 + 1e-12):
        raise section.error("arc", f"must be at most {L.MAX_HELICAL_ARC_DEG:g} deg (1000 turns), "
                            f"got {value}", "a helical arc of at most 1000 turns")
    return arc


def _check_width(section: Section, key: str, count: int, pitch_mm: float) -> None:
    """Refuse a detector wider (or taller) than MAX_LENGTH_MM."""
    if count * pitch_mm > L.MAX_LENGTH_MM:
        raise section.error(key, f"{count:,} cells of {pitch_mm:g} mm make a detector "
                            f"{count * pitch_mm:.6g} mm wide, beyond 100 m",
                            f"a detector at most {L.MAX_LENGTH_MM:g} mm (100 m) wide and high")


def _shape(section: Section, kind: str) -> bool:
    shape = section.string("detector_shape", "flat", choices=SHAPES)
    if shape == "curved" and kind == "parallel":
        raise section.error("detector_shape", "a parallel beam needs a flat detector",
                            "flat (curved detectors need type fan, cone, helical or poses)")
    return shape == "curved"


def parse_geometry(section: Section) -> ScannerGeometry:
    """Read and validate the ``geometry`` section of a scanner file.

    Parameters
    ----------
    section : Section
        The ``geometry`` mapping (``Section.root(document, path).section("geometry")``).

    Returns
    -------
    ScannerGeometry

    Raises
    ------
    InputError
        One line naming the file, line, column and field: unknown or missing field, a value of
        the wrong kind, NaN or inf, zero or negative views or pitch, SDD <= SID, a curved
        detector with a parallel beam, an arc over 360 deg (circular scans), pose arrays of the
        wrong shape or with axes that are not unit and orthogonal, a missing pose file.
    """
    kind = section.string("type", choices=TYPES)
    _check_keys(section, kind)
    curved = _shape(section, kind)
    n_cols = section.integer("columns", minimum=1, maximum=L.MAX_CELLS)
    pitch_u = L.length(section, "column_pitch")
    offset_u = _offset(section, "column_offset", pitch_u)
    _check_width(section, "columns", n_cols, pitch_u)

    if kind == "parallel":
        dimension = section.integer("dimension", 3 if section.has("rows") else 2,
                                    minimum=2, maximum=3)
    elif kind == "poses":
        dimension = section.integer("dimension", 3, minimum=2, maximum=3)
    else:
        dimension = 2 if kind == "fan" else 3
        if section.has("dimension") and section.integer("dimension") != dimension:
            raise section.error("dimension", f"a {kind} scanner is {dimension}-D",
                                f"{dimension}, or type cone for a 3-D scanner" if kind == "fan"
                                else f"{dimension}, or type fan for a 2-D scanner")
    if dimension == 2:
        for key in ("rows", "row_offset"):
            if section.has(key) and not (key == "rows" and section.raw(key) == 1):
                raise section.error(key, f"a 2-D scanner has one row at z = 0; '{key}' needs "
                                    "dimension 3", "dimension: 3, or remove this field")
        n_rows = 1
    else:
        n_rows = section.integer("rows", 1, minimum=1, maximum=L.MAX_CELLS)
    pitch_v = L.length(section, "row_pitch", pitch_u)
    offset_v = _offset(section, "row_offset", pitch_v) if dimension == 3 else 0.0
    _check_width(section, "rows", n_rows, pitch_v)
    common = dict(kind=kind, dimension=dimension, n_cols=n_cols, n_rows=n_rows,
                  pitch_u_mm=pitch_u, pitch_v_mm=pitch_v, offset_u_mm=offset_u,
                  offset_v_mm=offset_v, curved=curved, where=section.where)

    if kind == "poses":
        return _parse_poses(section, common)

    sid = sdd = math.nan
    if kind != "parallel":
        sid = L.length(section, "sid")
        sdd = L.length(section, "sdd")
        if sdd <= sid:
            raise section.error("sdd", f"SDD ({sdd:g} mm) must be greater than SID ({sid:g} mm)",
                                "a source-to-detector distance larger than the "
                                "source-to-isocentre distance")
    n_views = section.integer("views", minimum=1, maximum=L.MAX_VIEWS)
    L.check_pose_memory(n_views, n_cols, n_rows, section.at("views"), section.at("columns"),
                        section.at("rows"))
    start_angle = section.angle("start_angle", 0.0)
    if abs(start_angle) > math.radians(L.MAX_START_ANGLE_DEG) * (1 + 1e-12):
        raise section.error("start_angle", f"{math.degrees(start_angle):.6g} deg is more than a "
                            "turn", f"an angle from -{L.MAX_START_ANGLE_DEG:g} to "
                            f"{L.MAX_START_ANGLE_DEG:g} deg")
    geometry = ScannerGeometry(
        **common, sid_mm=sid, sdd_mm=sdd,
        n_views=n_views,
        arc=_arc(section, kind),
        start_angle_rad=start_angle,
        clockwise=section.string("direction", "counterclockwise", choices=DIRECTIONS)
        == "clockwise",
        include_arc_end=section.boolean("include_arc_end", False),
        table_feed_per_turn_mm=L.shift(section, "table_feed_per_turn"),
        start_z_mm=L.shift(section, "start_z"),
    )
    if curved and geometry.fan_angle_rad >= math.pi:
        raise section.error("columns", f"{n_cols:,} cells of {pitch_u:g} mm on a curved detector "
                            f"at SDD {sdd:g} mm span a fan of "
                            f"{math.degrees(geometry.fan_angle_rad):.6g} deg (cells beyond 90 deg "
                            "from the central ray face away from the source)",
                            "a fan angle under 180 deg: fewer or narrower cells, or a larger SDD")
    if kind == "helical" and geometry.table_feed_per_turn_mm == 0.0:
        raise section.error("table_feed_per_turn", "a helical scan needs a table feed",
                            "a non-zero length per turn, or type cone for a circular scan")
    if kind == "helical":
        reach = abs(geometry.start_z_mm) + abs(geometry.table_feed_per_turn_mm) * \
            geometry.arc_rad / (2 * math.pi)
        if reach > L.MAX_LENGTH_MM:
            raise section.error("table_feed_per_turn", f"the helix reaches z = {reach:.6g} mm, "
                                "beyond 100 m", "a feed and arc that stay within "
                                f"{L.MAX_LENGTH_MM:g} mm (100 m) of z = 0")
    try:
        poses = geometry.poses()
    except InputError as exc:  # pragma: no cover - every value is checked above
        raise InputError(section.where, exc.problem, exc.valid) from None
    if field_of_view_radius_mm(poses, every_view=False) == 0.0:
        warn_input(section.at("column_offset") if section.has("column_offset") else section.where,
                   "the detector does not reach the rotation axis: no point is seen from "
                   "every direction (field of view 0)")
    return geometry


def _parse_poses(section: Section, common: dict) -> ScannerGeometry:
    parallel = section.string("beam", "divergent", choices=("divergent", "parallel")) == "parallel"
    fields = PARALLEL_FIELDS if parallel else DIVERGENT_FIELDS
    if parallel and common["curved"]:
        raise section.error("detector_shape", "a parallel beam needs a flat detector",
                            "flat (or beam: divergent for a curved detector)")
    if section.has("poses") == section.has("pose_file"):
        raise InputError(section.where.child("poses"),
                         "give the views either inline ('poses') or in a file ('pose_file')",
                         "exactly one of poses, pose_file")
    pose_file = ""
    if section.has("poses"):
        places: dict[tuple[int, str], Where] = {}
        arrays: dict[str, list] = {name: [] for name in fields}
        views = section.sequence("poses")
        if len(views) > L.MAX_VIEWS:
            raise section.error("poses", f"{len(views):,} views", f"at most {L.MAX_VIEWS:,} views")
        L.check_pose_memory(len(views), common["n_cols"], common["n_rows"], section.at("poses"),
                            section.at("columns"), section.at("rows"))
        for i, (item, where) in enumerate(views):
            view = Section(item, where, section.length_unit)
            view.check_keys(fields, fields)
            for name in fields:
                places[(i, name)] = view.at(name)
                if name in ("source", "detector_centre"):
                    value = view.lengths(name, 3)
                else:
                    value = parse_vector(view.raw(name), view.at(name), 3,
                                         lambda v, w: check_number(v, w))
                arrays[name].append(value)
        if not arrays[fields[0]]:
            raise section.error("poses", "the list of views is empty", "at least one view")

        def place(view: int, field: str) -> Where:
            return places.get((view, field), section.at("poses"))
    else:
        pose_file = section.string("pose_file")
        base = Path(section.where.source).parent if section.where.source and \
            not section.where.source.startswith("<") else Path.cwd()
        arrays, place = read_pose_file(base / pose_file, section.at("pose_file"), parallel,
                                       n_cols=common["n_cols"], n_rows=common["n_rows"])
    explicit = poses_from_arrays(
        detector_centre=arrays["detector_centre"], u_axis=arrays["u_axis"],
        v_axis=arrays["v_axis"], n_cols=common["n_cols"], pitch_u_mm=common["pitch_u_mm"],
        source=None if parallel else arrays["source"],
        direction=arrays["direction"] if parallel else None,
        n_rows=common["n_rows"], pitch_v_mm=common["pitch_v_mm"],
        offset_u_mm=common["offset_u_mm"], offset_v_mm=common["offset_v_mm"],
        curved=common["curved"], dimension=common["dimension"], place=place)
    return ScannerGeometry(**common, n_views=explicit.n_views, arc=math.nan,
                           explicit=explicit, pose_file=pose_file)
