"""Reading per-view poses from a ``.npy`` or ``.csv`` file (the file I/O of the pose form).

``.npy``: a float array of shape (V, 12), columns source (or direction) x y z, detector centre
x y z, u axis x y z, v axis x y z (the layout of :func:`simbench.geometry.explicit.pose_table`).

``.csv``: a header line naming the columns, then one view per line. Names are the field and
the axis joined by ``_``: ``source_x, source_y, source_z`` (or ``direction_x ...`` for a
parallel beam), ``detector_centre_x ...``, ``u_axis_x ...``, ``v_axis_x ...``, in any order.
Cells are separated by commas (no commas inside cells); blank lines are skipped. The file is
read line by line, so a hostile file costs at most :data:`MAX_LINE_CHARACTERS` per line and
the pose arrays' memory, which is checked against the budget as lines arrive. Every problem
names the line and the column (character) of the offending value.
"""

from __future__ import annotations

import math
from array import array
from pathlib import Path

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.explicit import DIVERGENT_FIELDS, PARALLEL_FIELDS
from simbench.geometry.limits import MAX_VIEWS, check_pose_memory
from simbench.npy_input import read_npy_data, read_npy_header, regular_file_problem

SUFFIXES = (".npy", ".csv")
#: Longest line of a ``.csv`` pose file, bytes: 12 numbers of 25 characters need about 300.
MAX_LINE_CHARACTERS = 4096


def pose_columns(parallel: bool) -> list[str]:
    """The 12 column names of a pose file, in ``.npy`` column order."""
    fields = PARALLEL_FIELDS if parallel else DIVERGENT_FIELDS
    return [f"{name}_{axis}" for name in fields for axis in "xyz"]


def read_pose_file(path: str | Path, where: Where, parallel: bool, *, n_cols: int = 1,
                   n_rows: int = 1):
    """Read a pose file.

    Parameters
    ----------
    path : str or Path
        The ``.npy`` or ``.csv`` file.
    where : Where
        Place of the field that named the file (for a missing, unreadable or oversized file).
    parallel : bool
        Parallel beam (a ``direction`` column set) or divergent (``source``).
    n_cols, n_rows : int
        The detector's cells, for the memory estimate.

    Returns
    -------
    arrays : dict of str -> float64 (V, 3)
        ``source`` or ``direction``, ``detector_centre``, ``u_axis``, ``v_axis``.
    place : callable (view, field) -> Where
        The place of one view's field in the file: for ``.csv`` the line and the column of the
        field's first value, for ``.npy`` the row.

    Raises
    ------
    InputError
        Missing or non-regular file, unknown suffix, wrong shape, dtype or columns, values that
        are not finite numbers, lines over :data:`MAX_LINE_CHARACTERS`, more than
        :data:`~simbench.geometry.limits.MAX_VIEWS` views, or pose arrays over the memory
        budget (checked from the ``.npy`` header before reading, and while ``.csv`` lines are
        read).
    """
    path = Path(path)
    if path.suffix.lower() not in SUFFIXES:
        raise InputError(where, f"pose file '{path.name}' has an unknown type",
                         "a .npy or .csv file")
    problem = regular_file_problem(path)
    if problem:
        raise InputError(where, f"pose file '{path}' {problem}",
                         "the path of an existing .npy or .csv file, relative to the scanner file")
    fields = PARALLEL_FIELDS if parallel else DIVERGENT_FIELDS
    if path.suffix.lower() == ".npy":
        table, place = _read_npy(path, where, parallel, n_cols, n_rows)
    else:
        table, place = _read_csv(path, where, parallel, n_cols, n_rows)
    arrays = {name: table[:, 3 * i:3 * i + 3] for i, name in enumerate(fields)}
    return arrays, place


def _read_npy(path: Path, where: Where, parallel: bool, n_cols: int, n_rows: int):
    source = str(path)
    valid = "a numeric .npy array of shape (views, 12) saved by numpy.save: " + ", ".join(
        pose_columns(parallel))
    header = read_npy_header(path, where, "pose file", valid)
    if len(header.shape) != 2 or header.shape[1] != 12 or header.shape[0] < 1 or \
            header.dtype.kind not in "iuf":
        raise InputError(Where(source), f"pose array has shape {header.shape} and type "
                         f"{header.dtype}", valid)
    n_views = header.shape[0]
    if n_views > MAX_VIEWS:
        raise InputError(where, f"pose file '{path.name}' holds {n_views:,} views",
                         f"at most {MAX_VIEWS:,} views")
    check_pose_memory(n_views, n_cols, n_rows, where, where, where)
    table = read_npy_data(header, where, "pose file", valid).astype(np.float64)

    def place(view: int, field: str) -> Where:
        return Where(source, field=f"row {view}: {field}")

    return table, place


def _cells(line: str) -> list[tuple[str, int]]:
    """The comma-separated cells of a line with the 1-based column where each starts
    (surrounding spaces and one pair of double quotes removed)."""
    out = []
    column = 1
    for raw in line.split(","):
        text = raw.strip()
        start = column + (len(raw) - len(raw.lstrip()))
        if len(text) >= 2 and text[0] == text[-1] == '"':
            text = text[1:-1].strip()
        out.append((text, start))
        column += len(raw) + 1
    return out


def _read_csv(path: Path, where: Where, parallel: bool, n_cols: int, n_rows: int):
    source = str(path)
    wanted = pose_columns(parallel)
    valid_header = "a header line " + ",".join(wanted) + " then one view per line"
    values = array("d")
    line_of = array("q")
    field_column = array("q")
    number = 0
    try:
        with path.open("rb") as handle:
            for number, raw in enumerate(iter(lambda: handle.readline(MAX_LINE_CHARACTERS + 1),
                                              b""), start=1):
                if len(raw) > MAX_LINE_CHARACTERS:
                    raise InputError(Where(source, number, MAX_LINE_CHARACTERS + 1),
                                     f"line longer than {MAX_LINE_CHARACTERS} characters",
                                     "one view of 12 comma-separated numbers per line")
                try:
                    line = raw.decode("utf-8-sig" if number == 1 else "utf-8").rstrip("\r\n")
                except UnicodeDecodeError:
                    raise InputError(Where(source, number), "pose file is not UTF-8 text",
                                     "a UTF-8 CSV file") from None
                if number == 1:
                    header = _cells(line)
                    names = [name for name, _ in header]
                    for name, column in header:
                        if name not in wanted:
                            raise InputError(Where(source, 1, column, "header"),
                                             f"unknown column '{name}'", "the columns "
                                             + ", ".join(wanted))
                    missing = [name for name in wanted if name not in names]
                    if missing:
                        raise InputError(Where(source, 1, None, "header"),
                                         f"missing column '{missing[0]}'",
                                         "the columns " + ", ".join(wanted))
                    if len(set(names)) != len(names):
                        twice = next(n for n in names if names.count(n) > 1)
                        raise InputError(Where(source, 1, None, "header"),
                                         f"column '{twice}' is given twice",
                                         "each of the columns " + ", ".join(wanted) + " once")
                    order = [names.index(name) for name in wanted]
                    continue
                if not line.strip():
                    continue
                cells = _cells(line)
                if len(cells) != len(header):
                    column = cells[len(header)][1] if len(cells) > len(header) else len(line) + 1
                    raise InputError(Where(source, number, column),
                                     f"{len(cells)} values for {len(header)} columns",
                                     f"{len(header)} comma-separated numbers")
                for k in order:
                    text, column = cells[k]
                    try:
                        value = float(text)
                    except ValueError:
                        value = math.nan
                        problem = f"'{text[:40]}' is not a number"
                    else:
                        problem = f"'{text[:40]}' is not a finite number"
                    if not math.isfinite(value):
                        raise InputError(Where(source, number, column, header[k][0]), problem,
                                         "a finite number (lengths in mm)")
                    values.append(value)
                line_of.append(number)
                field_column.extend(cells[order[3 * i]][1] for i in range(4))
                rows = len(line_of)
                if rows > MAX_VIEWS:
                    raise InputError(Where(source, number), f"more than {MAX_VIEWS:,} views",
                                     f"at most {MAX_VIEWS:,} views")
                if rows % 4096 == 0:
                    check_pose_memory(rows, n_cols, n_rows, Where(source, number), where, where)
    except OSError as exc:
        raise InputError(where, f"cannot read pose file '{path}': {exc.strerror}",
                         "a readable UTF-8 CSV file") from None
    if number == 0:
        raise InputError(Where(source, 1), "pose file is empty", valid_header)
    if not line_of:
        raise InputError(Where(source, 2), "pose file has no views", "one view per line")
    check_pose_memory(len(line_of), n_cols, n_rows, Where(source, line_of[-1]), where, where)
    table = np.frombuffer(values, dtype=np.float64).reshape(-1, 12).copy()
    fields = PARALLEL_FIELDS if parallel else DIVERGENT_FIELDS
    columns = np.frombuffer(field_column, dtype=np.int64).reshape(-1, 4)

    def place(view: int, field: str) -> Where:
        column = int(columns[view, fields.index(field)]) if field in fields else None
        return Where(source, line_of[view], column, field)

    return table, place


def write_pose_file(poses, path: str | Path) -> Path:
    """Write the per-view poses of ``poses`` as a ``.npy`` or ``.csv`` pose file (atomically).

    Parameters
    ----------
    poses : Poses
    path : str or Path
        Output file; the suffix picks the format.

    Returns
    -------
    Path
    """
    import os
    import tempfile

    from simbench.geometry.explicit import pose_table

    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in SUFFIXES:
        raise InputError(Where(str(path)), "unknown pose file type", "a .npy or .csv file")
    table = pose_table(poses)
    handle, temp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix, dir=path.parent)
    os.close(handle)
    try:
        if suffix == ".npy":
            np.save(temp, table)
        else:
            np.savetxt(temp, table, delimiter=",", header=",".join(pose_columns(poses.parallel)),
                       comments="", fmt="%.17g")
        os.replace(temp, path)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise
    return path
