"""The documented range of every number of a scanner's ``geometry`` section, and the memory
estimate of the pose arrays, checked before anything is built.

The ranges are written out in docs/geometry.md ("Ranges and limits"); the reasons are beside
each constant. The lengths share the phantom language's range (10 nm to 100 m), so anything
a phantom can hold, a scanner can be sized to see.
"""

from __future__ import annotations

from simbench.budget import check_bytes
from simbench.errors import Where
from simbench.spec import (MAX_LENGTH_MM, MIN_LENGTH_MM, Section, check_span,
                           check_within)

#: Most views of one scan: a helical scan of 500 turns at 2000 views per turn.
MAX_VIEWS = 1_000_000
#: Most detector columns, and most rows: beyond the largest panels and line detectors
#: (a few thousand to about 15 000 cells; recalled from memory).
MAX_CELLS = 100_000
#: Smallest pitch, SID or SDD, mm: 10 nm, the phantom language's smallest size
#: (simbench.spec.MIN_LENGTH_MM).
#: Largest pitch, SID, SDD, |offset|, |table feed|, |start z|, detector width and |position|
#: of an explicit pose, mm: 100 m, the phantom language's largest length
#: (simbench.spec.MAX_LENGTH_MM).
#: Largest |start_angle|, degrees: one turn reaches every orientation.
MAX_START_ANGLE_DEG = 360.0
#: Longest helical arc, degrees: 1000 turns.
MAX_HELICAL_ARC_DEG = 360.0 * 1000
#: Bytes held per view while a geometry is checked and compiled to poses (the pose arrays,
#: the view angles and the field-of-view probe rays): the peak measured with tracemalloc is
#: about 300 B per view for 2e5-view parallel and helical scans; doubled for margin.
BYTES_PER_VIEW = 600
#: Bytes held per detector column or row (cell centres and their copies).
BYTES_PER_CELL = 32

LENGTH_VALID = (f"a length from {MIN_LENGTH_MM:g} mm (10 nm) to {MAX_LENGTH_MM:g} mm (100 m), "
                "such as 0.8, '0.8 mm' or '104 cm'")
SHIFT_VALID = f"a length within +-{MAX_LENGTH_MM:g} mm (100 m)"


def check_length(mm: float, where: Where) -> float:
    """A positive length (already in mm) within [MIN_LENGTH_MM, MAX_LENGTH_MM]."""
    return check_span(mm, where, LENGTH_VALID)


def check_shift(mm: float, where: Where, what: str = "length") -> float:
    """A signed length (already in mm) within +-MAX_LENGTH_MM."""
    return check_within(mm, where, what, SHIFT_VALID)


def length(section: Section, key: str, default: float | None = None) -> float:
    """A positive length in mm within the length range (``default`` when absent, if given)."""
    if default is not None and not section.has(key):
        return default
    return check_length(section.length(key, positive=True), section.at(key))


def shift(section: Section, key: str) -> float:
    """A signed length in mm within +-MAX_LENGTH_MM (0 when absent)."""
    if not section.has(key):
        return 0.0
    return check_shift(section.length(key), section.at(key))


def pose_bytes(n_views: int, n_cols: int, n_rows: int) -> float:
    """Estimated bytes held while a geometry of this size is checked and compiled to poses."""
    return float(n_views) * BYTES_PER_VIEW + float(n_cols + n_rows) * BYTES_PER_CELL


def check_pose_memory(n_views: int, n_cols: int, n_rows: int, where_views: Where,
                      where_cols: Where, where_rows: Where) -> None:
    """Refuse, before building them, pose and cell arrays over the memory budget.

    The message names the field that drives the estimate: ``views`` when the per-view arrays
    dominate, else ``columns`` or ``rows``.
    """
    view_part = float(n_views) * BYTES_PER_VIEW
    cell_part = float(n_cols + n_rows) * BYTES_PER_CELL
    if view_part >= cell_part:
        where, what, valid = where_views, f"the pose arrays of {n_views:,} views", "fewer views"
    elif n_cols >= n_rows:
        where, what, valid = where_cols, f"the cell arrays of {n_cols:,} columns", "fewer columns"
    else:
        where, what, valid = where_rows, f"the cell arrays of {n_rows:,} rows", "fewer rows"
    check_bytes(view_part + cell_part, where, what, valid)
