"""Reading per-view poses from a ``.npy`` or ``.csv`` file (the file I/O of the pose form).

``.npy``: a float array of shape (V, 12), columns source (or direction) x y z, detector centre
x y z, u axis x y z, v axis x y z (the layout of :func:`simbench.geometry.explicit.pose_table`).

``.csv``: a header line naming the columns, then one view per line. Names are the field and
the axis joined by ``_``: ``source_x, source_y, source_z`` (or ``direction_x ...`` for a
parallel beam), ``detector_centre_x ...``, ``u_axis_x ...``, ``v_axis_x ...``, in any order.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.explicit import DIVERGENT_FIELDS, PARALLEL_FIELDS

SUFFIXES = (".npy", ".csv")


def pose_columns(parallel: bool) -> list[str]:
    """The 12 column names of a pose file, in ``.npy`` column order."""
    fields = PARALLEL_FIELDS if parallel else DIVERGENT_FIELDS
    return [f"{name}_{axis}" for name in fields for axis in "xyz"]


def read_pose_file(path: str | Path, where: Where, parallel: bool):
    """Read a pose file.

    Parameters
    ----------
    path : str or Path
        The ``.npy`` or ``.csv`` file.
    where : Where
        Place of the field that named the file (for a missing or unreadable file).
    parallel : bool
        Parallel beam (a ``direction`` column set) or divergent (``source``).

    Returns
    -------
    arrays : dict of str -> float64 (V, 3)
        ``source`` or ``direction``, ``detector_centre``, ``u_axis``, ``v_axis``.
    place : callable (view, field) -> Where
        The place of one view's field in the file (line number for ``.csv``).

    Raises
    ------
    InputError
        Missing file, unknown suffix, wrong shape or columns, values that are not numbers.
    """
    path = Path(path)
    source = str(path)
    fields = PARALLEL_FIELDS if parallel else DIVERGENT_FIELDS
    if path.suffix.lower() not in SUFFIXES:
        raise InputError(where, f"pose file '{path.name}' has an unknown type",
                         "a .npy or .csv file")
    if not path.is_file():
        raise InputError(where, f"pose file '{path}' not found",
                         "the path of an existing .npy or .csv file, relative to the scanner file")
    if path.suffix.lower() == ".npy":
        try:
            table = np.load(path, allow_pickle=False)
        except (OSError, ValueError) as exc:
            raise InputError(Where(source), f"cannot read pose file: {exc}".splitlines()[0],
                             "a .npy file saved by numpy.save") from None
        if table.ndim != 2 or table.shape[1] != 12 or table.shape[0] < 1 or \
                not np.issubdtype(table.dtype, np.number):
            raise InputError(Where(source), f"pose array has shape {table.shape} and type "
                             f"{table.dtype}", "a numeric array of shape (views, 12): "
                             + ", ".join(pose_columns(parallel)))

        def place(view: int, field: str) -> Where:
            return Where(source, field=f"row {view}: {field}")

        table = table.astype(np.float64)
    else:
        table, place = _read_csv(path, parallel)
    arrays = {name: table[:, 3 * i:3 * i + 3] for i, name in enumerate(fields)}
    return arrays, place


def _read_csv(path: Path, parallel: bool):
    source = str(path)
    wanted = pose_columns(parallel)
    try:
        with path.open(newline="", encoding="utf-8") as handle:
            lines = list(csv.reader(handle))
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(Where(source), f"cannot read pose file: {exc}", "a UTF-8 CSV file") from None
    if not lines:
        raise InputError(Where(source, 1), "pose file is empty",
                         "a header line " + ",".join(wanted) + " then one view per line")
    header = [name.strip() for name in lines[0]]
    missing = [name for name in wanted if name not in header]
    unknown = [name for name in header if name not in wanted]
    if missing or unknown:
        problem = (f"missing column '{missing[0]}'" if missing else f"unknown column '{unknown[0]}'")
        raise InputError(Where(source, 1, None, "header"), problem,
                         "the columns " + ", ".join(wanted))
    order = [header.index(name) for name in wanted]
    rows = []
    for number, line in enumerate(lines[1:], start=2):
        if not line or all(not cell.strip() for cell in line):
            continue
        if len(line) != len(header):
            raise InputError(Where(source, number), f"{len(line)} values for {len(header)} columns",
                             f"{len(header)} comma-separated numbers")
        try:
            values = [float(line[k]) for k in order]
        except ValueError:
            raise InputError(Where(source, number), "a value is not a number",
                             "comma-separated numbers") from None
        rows.append((number, values))
    if not rows:
        raise InputError(Where(source, 2), "pose file has no views", "one view per line")
    line_of = [number for number, _ in rows]
    table = np.array([values for _, values in rows], dtype=np.float64)

    def place(view: int, field: str) -> Where:
        return Where(source, line_of[view], None, field)

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
