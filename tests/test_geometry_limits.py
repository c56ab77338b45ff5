"""Scanner geometry under hostile input: documented ranges, maxima, the memory budget checked
before the pose arrays are built, and pose files that are not what they claim.

The ranges are the constants of simbench/geometry/limits.py (docs/geometry.md, "Ranges and
limits"); the memory estimates are those constants times the counts (arithmetic).
"""

from __future__ import annotations

import math
import os
import warnings

import numpy as np
import pytest

from simbench import budget
from simbench.errors import InputError, InputWarning
from simbench.geometry import (ScannerGeometry, cone_poses, fan_poses, parallel_poses,
                               parse_geometry, pose_table)
from simbench.geometry.limits import BYTES_PER_VIEW, MAX_CELLS, MAX_VIEWS
from simbench.geometry.pose_file import MAX_LINE_CHARACTERS, pose_columns
from simbench.spec import Section, parse_yaml_text


def geometry(text: str, source: str = "s.yaml") -> ScannerGeometry:
    root = Section.root(parse_yaml_text(text, source), source)
    return parse_geometry(root.section("geometry"))


def refused(text: str, *, line: int | None, field: str, words: tuple = (),
            source: str = "s.yaml") -> str:
    with pytest.raises(InputError) as info:
        geometry(text, source)
    message = str(info.value)
    assert "\n" not in message
    if line is not None:
        assert message.startswith(f"{source}:{line}:"), message
    assert f" {field}: " in message, message
    for word in words:
        assert word in message, message
    return message


PARALLEL = "geometry:\n  type: parallel\n  columns: 8\n  column_pitch: 1\n  views: 4\n"
HELICAL = ("geometry:\n  type: helical\n  sid: 500\n  sdd: 1000\n  columns: 8\n"
           "  column_pitch: 1\n  rows: 4\n  row_pitch: 1\n  views: 4\n"
           "  table_feed_per_turn: 10\n")


def with_field(base: str, key: str, value) -> tuple[str, int]:
    """``base`` with ``key: value`` replacing or added as the last line; (text, its line)."""
    lines = [line for line in base.splitlines() if not line.strip().startswith(f"{key}:")]
    lines.append(f"  {key}: {value}")
    return "\n".join(lines) + "\n", len(lines)


@pytest.mark.parametrize("base, key, value, words", [
    (PARALLEL, "views", 10**9, (f"<= {MAX_VIEWS}",)),
    (PARALLEL, "columns", 10**9, (f"<= {MAX_CELLS}",)),
    (HELICAL, "rows", 10**9, (f"<= {MAX_CELLS}",)),
    (PARALLEL, "column_pitch", "1.0e300", ("longer than 100 m",)),
    (PARALLEL, "column_pitch", "1.0e-300", ("shorter than 10 nm",)),
    (HELICAL, "row_pitch", "2 km", ("unknown length unit",)),
    (HELICAL, "sid", "1.0e300", ("longer than 100 m",)),
    (HELICAL, "sdd", "1.0e-9", ("shorter than 10 nm",)),
    (PARALLEL, "column_offset", "1.0e300", ("beyond 100 m",)),
    (PARALLEL, "column_offset", "'1.0e300 cells'", ("beyond 100 m",)),
    (HELICAL, "row_offset", "-2.0e5", ("beyond 100 m",)),
    (PARALLEL, "start_angle", "1.0e300", ("more than a turn",)),
    (HELICAL, "arc", "1.0e300", ("1000 turns",)),
    (HELICAL, "table_feed_per_turn", "1.0e300", ("beyond 100 m",)),
    (HELICAL, "start_z", "-1.0e300", ("beyond 100 m",)),
    # 4 turns (default arc 360 deg is one turn; feed 3e4 mm): start 9e4 + 3e4 = 1.2e5 mm
    (HELICAL + "  start_z: 9.0e4\n", "table_feed_per_turn", "3.0e4", ("reaches z = 120000",)),
    # 100,000 cells of 1.5 mm make a 150 m detector
    (PARALLEL, "column_pitch", 1.5, None),
])
def test_values_out_of_range(base, key, value, words):
    if words is None:  # the detector width case: many columns of a modest pitch
        text, _ = with_field(base, "columns", 100_000)
        text, _ = with_field(text, key, value)
        refused(text, line=None, field="geometry.columns", words=("150000 mm wide",))
        return
    text, line = with_field(base, key, value)
    refused(text, line=line, field=f"geometry.{key}", words=words)


@pytest.mark.parametrize("base, fields", [
    (PARALLEL, {"column_pitch": "1.0e-5", "columns": 1}),        # the smallest pitch
    (PARALLEL, {"column_pitch": "1 m", "columns": 100}),          # a 100 m detector
    (HELICAL, {"sid": "5.0e4", "sdd": "1.0e5"}),                   # the largest SDD
    (PARALLEL, {"start_angle": -360, "column_offset": "-1.0e5"}),  # the ends of their ranges
    (HELICAL, {"arc": 360000, "views": 1000}),                    # 1000 turns
])
def test_values_at_the_ends_of_their_ranges_are_accepted(base, fields):
    text = base
    for key, value in fields.items():
        text, _ = with_field(text, key, value)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)  # an offset detector off the axis warns
        assert geometry(text).n_views >= 1


@pytest.fixture
def small_budget():
    budget.set_memory_budget(2**20)  # 1 MiB, the smallest the command line accepts
    yield
    budget.set_memory_budget(None)


def test_many_views_are_refused_by_the_budget_before_poses_are_built(small_budget):
    # 5000 views x BYTES_PER_VIEW (600 B) = 2.9 MiB > 1 MiB (arithmetic)
    assert 5000 * BYTES_PER_VIEW > 2**20
    text, line = with_field(PARALLEL, "views", 5000)
    refused(text, line=line, field="geometry.views",
            words=("5,000 views", "memory", "over the budget", "fewer views"))


def test_many_columns_are_named_when_cells_dominate(small_budget):
    # 1 view (600 B) against 100,000 columns x 32 B = 3.1 MiB (arithmetic)
    text, _ = with_field(PARALLEL, "views", 1)
    text, _ = with_field(text, "column_pitch", 0.01)
    text, line = with_field(text, "columns", 100_000)
    refused(text, line=line, field="geometry.columns", words=("100,000 columns", "memory"))


def test_inline_poses_are_counted_against_the_budget(small_budget):
    text = ("geometry:\n  type: poses\n  columns: 8\n  column_pitch: 1\n  poses:\n"
            "    - &v {source: [0, -500, 0], detector_centre: [0, 500, 0], u_axis: [1, 0, 0], "
            "v_axis: [0, 0, 1]}\n" + "    - *v\n" * 3000)
    refused(text, line=6, field="geometry.poses", words=("3,001 views", "memory"))


def test_api_refuses_views_over_the_maximum():
    with pytest.raises(InputError, match=r"<arguments>: n_views: must be a whole number from 1"):
        parallel_poses(n_cols=4, pitch_u_mm=1.0, n_views=10**9)


@pytest.mark.parametrize("kwargs, field", [
    (dict(pitch_u_mm=1e300), "pitch_u_mm"),
    (dict(sid_mm=1e300, sdd_mm=2e300), "sid_mm"),
    (dict(offset_u_mm=-1e300), "offset_u_mm"),
    (dict(n_cols=10**6), "n_cols"),
])
def test_api_refuses_values_out_of_range(kwargs, field):
    args = dict(sid_mm=500.0, sdd_mm=900.0, n_cols=4, pitch_u_mm=1.0, n_views=3) | kwargs
    with pytest.raises(InputError, match=rf"<arguments>: {field}: "):
        fan_poses(**args)


def test_api_checks_the_budget(small_budget):
    with pytest.raises(InputError, match=r"n_views: the pose arrays of 10,000 views"):
        cone_poses(sid_mm=500.0, sdd_mm=900.0, n_cols=4, n_rows=2, pitch_u_mm=1.0,
                   pitch_v_mm=1.0, n_views=10_000)


# --------------------------------------------------------------------------------------------
# Pose files
# --------------------------------------------------------------------------------------------

POSE_FILE = "geometry:\n  type: poses\n  columns: 4\n  column_pitch: 1\n  pose_file: {}\n"


def fan_table(n_views: int = 6) -> np.ndarray:
    return pose_table(fan_poses(sid_mm=500.0, sdd_mm=900.0, n_cols=4, pitch_u_mm=1.0,
                                n_views=n_views))


def pose_file_refused(tmp_path, name: str, *, line_in_file=None, column=None, field: str = "",
                      words: tuple = ()) -> str:
    source = str(tmp_path / "s.yaml")
    with pytest.raises(InputError) as info:
        geometry(POSE_FILE.format(name), source)
    message = str(info.value)
    assert "\n" not in message
    if line_in_file is None:  # placed at the scanner's pose_file field
        assert message.startswith(f"{source}:5:14: geometry.pose_file: "), message
    else:
        place = f"{tmp_path / name}:{line_in_file}" + (f":{column}" if column else "")
        assert message.startswith(place + ":"), message
        assert f": {field}: " in message, message
    for word in words:
        assert word in message, message
    return message


def test_pose_file_that_is_a_fifo(tmp_path):
    os.mkfifo(tmp_path / "poses.npy")
    pose_file_refused(tmp_path, "poses.npy", words=("FIFO",))


def test_pose_file_that_is_a_device(tmp_path):
    os.symlink("/dev/zero", tmp_path / "zero.npy")  # reading /dev/zero never ends
    pose_file_refused(tmp_path, "zero.npy", words=("a device",))


def npy_bytes(header: str, data: bytes = b"") -> bytes:
    """A version 1.0 .npy file with a given header text (numpy.lib.format layout)."""
    text = header.encode("latin1")
    text += b" " * (64 - (10 + len(text) + 1) % 64) + b"\n"
    return b"\x93NUMPY\x01\x00" + len(text).to_bytes(2, "little") + text + data


@pytest.mark.parametrize("header, data, words", [
    ("{'descr': '<f8', 'fortran_order': False, 'shape': (10000000000, 12), }", b"\0" * 96,
     ("truncated",)),
    ("{'descr': '|O', 'fortran_order': False, 'shape': (1, 12), }", b"\0" * 96,
     ("not plain numbers",)),
    ("{'descr': '<f8', 'fortran_order': False, 'shape': (1, 12), }", b"\0" * 95,
     ("truncated",)),
    ("[1, 2, 3]", b"", ("not a readable .npy file",)),
])
def test_hostile_pose_npy(tmp_path, header, data, words):
    (tmp_path / "poses.npy").write_bytes(npy_bytes(header, data))
    pose_file_refused(tmp_path, "poses.npy", words=words)


def test_pose_npy_over_the_budget_is_refused_before_reading(tmp_path, small_budget):
    # 5000 x 600 B = 2.9 MiB estimate; zeros would fail the unit-axis check if they were read
    np.save(tmp_path / "poses.npy", np.zeros((5000, 12)))
    pose_file_refused(tmp_path, "poses.npy", words=("5,000 views", "memory"))


def csv_text(table: np.ndarray, parallel: bool = False) -> list[list[str]]:
    return [pose_columns(parallel)] + [[f"{x:.17g}" for x in row] for row in table]


def write_csv(tmp_path, rows: list[list[str]], name: str = "poses.csv") -> None:
    (tmp_path / name).write_text("\n".join(",".join(r) for r in rows) + "\n")


def column_of(row: list[str], k: int) -> int:
    """1-based character column where cell k of a comma-joined row starts."""
    return sum(len(cell) + 1 for cell in row[:k]) + 1


def test_csv_value_that_is_not_finite_names_line_and_column(tmp_path):
    rows = csv_text(fan_table())
    rows[3][4] = "nan"  # view 2 on line 4, column detector_centre_y
    write_csv(tmp_path, rows)
    pose_file_refused(tmp_path, "poses.csv", line_in_file=4, column=column_of(rows[3], 4),
                      field="detector_centre_y", words=("'nan' is not a finite number",))


def test_csv_position_beyond_range_names_the_field_column(tmp_path):
    rows = csv_text(fan_table())
    rows[2][1] = "1e300"  # view 1 on line 3: source_y
    write_csv(tmp_path, rows)
    pose_file_refused(tmp_path, "poses.csv", line_in_file=3, column=column_of(rows[2], 0),
                      field="source", words=("beyond 100 m",))


def test_csv_axis_not_unit_names_the_field_column(tmp_path):
    table = fan_table()
    table[4, 6:9] *= 1.5  # u axis of view 4 (line 6) is no longer unit
    rows = csv_text(table)
    write_csv(tmp_path, rows)
    pose_file_refused(tmp_path, "poses.csv", line_in_file=6, column=column_of(rows[5], 6),
                      field="u_axis", words=("not a unit vector",))


def test_csv_wrong_number_of_values(tmp_path):
    rows = csv_text(fan_table())
    rows[2] = rows[2] + ["7"]
    write_csv(tmp_path, rows)
    with pytest.raises(InputError, match=rf"poses.csv:3:{column_of(rows[2], 12)}: "
                                         r"13 values for 12 columns"):
        geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml"))


def test_csv_unknown_and_repeated_header_columns(tmp_path):
    rows = csv_text(fan_table())
    rows[0][5] = "detector_centre_w"
    write_csv(tmp_path, rows)
    with pytest.raises(InputError, match=rf"poses.csv:1:{column_of(rows[0], 5)}: header: "
                                         r"unknown column 'detector_centre_w'"):
        geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml"))
    rows = csv_text(fan_table())
    rows[0] = rows[0] + ["source_x"]
    rows[1:] = [r + ["0"] for r in rows[1:]]
    write_csv(tmp_path, rows)
    with pytest.raises(InputError, match=r"poses.csv:1: header: column 'source_x' is given twice"):
        geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml"))


def test_csv_line_too_long(tmp_path):
    rows = csv_text(fan_table())
    rows[2][0] = "0" * (MAX_LINE_CHARACTERS + 10)
    write_csv(tmp_path, rows)
    with pytest.raises(InputError, match=rf"poses.csv:3:{MAX_LINE_CHARACTERS + 1}: line longer"):
        geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml"))


def test_csv_that_is_not_utf8(tmp_path):
    rows = csv_text(fan_table())
    (tmp_path / "poses.csv").write_bytes(
        (",".join(rows[0]) + "\n").encode() + b"\xff\xfe\x00garbage\n")
    with pytest.raises(InputError, match=r"poses.csv:2: pose file is not UTF-8 text"):
        geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml"))


def test_csv_with_quoted_cells_and_blank_lines_reads_like_the_npy(tmp_path):
    table = fan_table()
    rows = csv_text(table)
    rows[0] = [f'"{name}"' for name in rows[0]]
    (tmp_path / "poses.csv").write_text("\n".join(",".join(r) for r in rows[:3]) + "\n\n"
                                        + "\n".join(",".join(r) for r in rows[3:]) + "\n")
    np.save(tmp_path / "poses.npy", table)
    from_csv = geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml")).poses()
    from_npy = geometry(POSE_FILE.format("poses.npy"), str(tmp_path / "s.yaml")).poses()
    np.testing.assert_array_equal(from_csv.source, from_npy.source)
    np.testing.assert_array_equal(from_csv.u_axis, from_npy.u_axis)


def test_csv_over_the_budget_is_refused_while_reading(tmp_path):
    write_csv(tmp_path, csv_text(fan_table(5000)))  # 5000 x 600 B = 2.9 MiB estimate
    budget.set_memory_budget(2**20)
    try:
        # checked every 4096 lines: refused at the view on line 4097 (line 1 is the header)
        with pytest.raises(InputError, match=r"poses.csv:4097: the pose arrays of 4,096 views "
                                             r"would need about"):
            geometry(POSE_FILE.format("poses.csv"), str(tmp_path / "s.yaml"))
    finally:
        budget.set_memory_budget(None)


def test_detector_width_uses_cells_times_pitch():
    # 40,000 cells of 2.5 mm = 100,000 mm exactly: the largest detector (arithmetic)
    text, _ = with_field(PARALLEL, "columns", 40_000)
    text, _ = with_field(text, "column_pitch", 2.5)
    assert geometry(text).n_cols == 40_000
    assert math.isclose(40_000 * 2.5, 1e5)


def test_curved_detector_wider_than_half_a_turn_is_refused():
    # 1000 cells of 1 mm at SDD 20 mm: fan angle 1000 / 20 rad = 2864.8 deg (curved detectors:
    # gamma = u / SDD, docs/geometry.md)
    text = ("geometry:\n  type: fan\n  sid: 10\n  sdd: 20\n  detector_shape: curved\n"
            "  columns: 1000\n  column_pitch: 1\n  views: 4\n")
    refused(text, line=6, field="geometry.columns", words=("2864.79 deg", "under 180 deg"))


def test_curved_detector_just_under_half_a_turn_is_accepted():
    # 31 cells of 1 mm at SDD 10 mm: edges at +-15.5 mm, fan 31 / 10 rad = 177.6 deg
    text = ("geometry:\n  type: fan\n  sid: 5\n  sdd: 10\n  detector_shape: curved\n"
            "  columns: 31\n  column_pitch: 1\n  views: 4\n")
    assert math.degrees(geometry(text).fan_angle_rad) == pytest.approx(math.degrees(3.1))


def test_curved_pose_detector_wider_than_half_a_turn_is_refused():
    text = ("geometry:\n  type: poses\n  detector_shape: curved\n  columns: 1000\n"
            "  column_pitch: 1\n  poses:\n    - {source: [0, -10, 0], detector_centre: [0, 10, 0], "
            "u_axis: [1, 0, 0], v_axis: [0, 0, 1]}\n")
    refused(text, line=7, field="geometry.poses[0].detector_centre", words=("1432.39 deg",))
