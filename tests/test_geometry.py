"""Scanner geometries: conventions, cell positions, arcs, field of view, user poses, file errors.

Reference values are closed forms of the geometry (stated beside each check), the frame
conventions of ARCHITECTURE.md, and scikit-image's Radon transform as an outside reference for
the parallel-beam convention.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from simbench.errors import InputError
from simbench.geometry import (ScannerGeometry, cell_subsamples, cone_poses, fan_angle_rad,
                               fan_poses, field_of_view_radius_mm, focal_spot_points,
                               parallel_poses, parse_geometry, pose_table, poses_from_arrays,
                               view_angles_rad)
from simbench.geometry.pose_file import pose_columns
from simbench.geometry.rays import cell_rays
from simbench.spec import Section, parse_yaml_text

SID, SDD = 500.0, 900.0


def geometry_from_text(text: str, source: str = "scanner.yaml") -> ScannerGeometry:
    root = Section.root(parse_yaml_text(text, source), source)
    return parse_geometry(root.section("geometry"))


def end_points(rays: np.ndarray) -> np.ndarray:
    """Detector end point of each divergent ray: origin + t_max * direction."""
    return rays[..., 0:3] + rays[..., 7:8] * rays[..., 3:6]


# --------------------------------------------------------------------------------------------
# Frame conventions (ARCHITECTURE.md: d = (-sin phi, cos phi, 0), u = (cos phi, sin phi, 0))
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("curved", [False, True])
def test_source_and_detector_at_0_and_90_degrees(curved):
    p = fan_poses(sid_mm=SID, sdd_mm=SDD, n_cols=8, pitch_u_mm=1.0, curved=curved,
                  angles_rad=[0.0, math.pi / 2])
    # phi = 0: source at -y, detector centre at +y, columns along +x (ARCHITECTURE.md)
    np.testing.assert_allclose(p.source[0], [0, -SID, 0], atol=1e-12)
    np.testing.assert_allclose(p.detector_centre[0], [0, SDD - SID, 0], atol=1e-12)
    np.testing.assert_allclose(p.u_axis[0], [1, 0, 0], atol=1e-15)
    np.testing.assert_allclose(p.v_axis[0], [0, 0, 1], atol=1e-15)
    np.testing.assert_allclose(p.direction[0], [0, 1, 0], atol=1e-15)
    # phi = 90 deg: d = (-1, 0, 0), so the source is at +x and columns run along +y
    np.testing.assert_allclose(p.source[1], [SID, 0, 0], atol=1e-12)
    np.testing.assert_allclose(p.detector_centre[1], [-(SDD - SID), 0, 0], atol=1e-12)
    np.testing.assert_allclose(p.u_axis[1], [0, 1, 0], atol=1e-15)
    assert p.projection_shape == (2, 8) and p.dimension == 2


def test_view_angles_direction_arc_and_start():
    # full turn, end excluded: step = arc / views (common practice)
    np.testing.assert_allclose(view_angles_rad(4, 2 * math.pi), [0, math.pi / 2, math.pi,
                                                                  3 * math.pi / 2])
    np.testing.assert_allclose(view_angles_rad(3, math.pi, 0.1, clockwise=True),
                               [0.1, 0.1 - math.pi / 3, 0.1 - 2 * math.pi / 3])
    np.testing.assert_allclose(view_angles_rad(3, math.pi, include_arc_end=True),
                               [0, math.pi / 2, math.pi])


# --------------------------------------------------------------------------------------------
# Cell centres
# --------------------------------------------------------------------------------------------


def test_flat_cell_centres_follow_the_closed_form():
    n_cols, n_rows, pu, pv, ou, ov = 7, 4, 0.8, 1.1, 0.3, -0.45
    p = cone_poses(sid_mm=SID, sdd_mm=SDD, n_cols=n_cols, n_rows=n_rows, pitch_u_mm=pu,
                   pitch_v_mm=pv, offset_u_mm=ou, offset_v_mm=ov, n_views=5)
    # u_j = (j - (n_cols - 1)/2) * pitch_u + offset_u (ARCHITECTURE.md)
    expected_u = (np.arange(n_cols) - (n_cols - 1) / 2) * pu + ou
    expected_v = (np.arange(n_rows) - (n_rows - 1) / 2) * pv + ov
    np.testing.assert_allclose(p.col_u_mm, expected_u, rtol=0, atol=1e-12)
    np.testing.assert_allclose(p.row_v_mm, expected_v, rtol=0, atol=1e-12)
    ends = end_points(cell_rays(p))
    for i in range(p.n_views):
        want = (p.detector_centre[i][None, None, :]
                + expected_u[None, :, None] * p.u_axis[i] + expected_v[:, None, None] * p.v_axis[i])
        np.testing.assert_allclose(ends[i], want, atol=1e-9)
        np.testing.assert_allclose(cell_rays(p)[i, ..., 0:3], np.broadcast_to(p.source[i], want.shape),
                                   atol=1e-12)


def test_curved_cells_lie_on_the_circle_about_the_source_and_are_equiangular():
    pitch = 1.3
    p = cone_poses(sid_mm=SID, sdd_mm=SDD, n_cols=41, n_rows=3, pitch_u_mm=pitch, pitch_v_mm=1.0,
                   curved=True, n_views=6)
    rays = cell_rays(p)
    ends = end_points(rays)
    centre_row = ends[:, 1]  # row 1 has v = 0
    radius = np.linalg.norm(centre_row - p.source[:, None, :], axis=-1)
    np.testing.assert_allclose(radius, SDD, rtol=1e-12)  # equiangular arc of radius SDD
    # angle between neighbouring rays = arc-length pitch / SDD (equiangular detector)
    d = rays[:, 1, :, 3:6]
    step = np.arccos(np.clip(np.einsum("vjk,vjk->vj", d[:, 1:], d[:, :-1]), -1, 1))
    # rtol: arccos of a dot product near 1 loses digits (common practice)
    np.testing.assert_allclose(step, pitch / SDD, rtol=1e-6)
    # the fan angle turns toward +u: the last column leans to +u
    assert np.all(np.einsum("vk,vk->v", d[:, -1], p.u_axis) > 0)


# --------------------------------------------------------------------------------------------
# Short scan, offsets, field of view
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("curved", [False, True])
def test_short_scan_arc_is_180_plus_fan_angle(curved):
    n, pitch = 600, 1.0
    half_width = n * pitch / 2
    # full fan angle: 2 atan(W / 2 SDD) flat, W / SDD curved (closed form of the geometry)
    fan = 2 * (half_width / SDD if curved else math.atan(half_width / SDD))
    assert fan_angle_rad(n_cols=n, pitch_u_mm=pitch, sdd_mm=SDD, curved=curved) == \
        pytest.approx(fan, rel=1e-14)
    g = geometry_from_text(f"""geometry:
  type: fan
  sid: {SID}
  sdd: {SDD}
  detector_shape: {'curved' if curved else 'flat'}
  columns: {n}
  column_pitch: {pitch}
  views: 100
  arc: short
  include_arc_end: true
""")
    assert g.arc_rad == pytest.approx(math.pi + fan, rel=1e-14)
    angles = g.poses().angles_rad
    assert angles[-1] - angles[0] == pytest.approx(math.pi + fan, rel=1e-12)
    assert parallel_poses(n_cols=4, pitch_u_mm=1, n_views=4, arc_rad="short").angles_rad[-1] \
        == pytest.approx(3 * math.pi / 4)  # parallel short scan = 180 deg


@pytest.mark.parametrize("curved", [False, True])
def test_field_of_view_radius_closed_form(curved):
    n, pitch = 400, 1.0
    half = n * pitch / 2
    p = fan_poses(sid_mm=SID, sdd_mm=SDD, n_cols=n, pitch_u_mm=pitch, n_views=36, curved=curved)
    gamma = half / SDD if curved else math.atan(half / SDD)
    # FOV radius = SID sin(half fan angle) (closed form of the geometry)
    assert field_of_view_radius_mm(p) == pytest.approx(SID * math.sin(gamma), rel=1e-12)
    # parallel beam: half the detector width
    assert field_of_view_radius_mm(parallel_poses(n_cols=n, pitch_u_mm=pitch, n_views=9)) == \
        pytest.approx(half, rel=1e-12)


def test_offset_detector_shifts_cells_and_half_fan_field_of_view():
    n, pitch = 200, 1.0
    offset = 80.0  # half-fan: the detector covers u in [-20, 180] mm
    p = fan_poses(sid_mm=SID, sdd_mm=SDD, n_cols=n, pitch_u_mm=pitch, n_views=12,
                  offset_u_mm=offset)
    centred = fan_poses(sid_mm=SID, sdd_mm=SDD, n_cols=n, pitch_u_mm=pitch, n_views=12)
    np.testing.assert_allclose(p.col_u_mm - centred.col_u_mm, offset, atol=1e-12)
    ends = end_points(cell_rays(p))[:, 0]
    np.testing.assert_allclose(np.einsum("vjk,vk->vj", ends - p.detector_centre[:, None], p.u_axis),
                               np.broadcast_to(p.col_u_mm, (12, n)), atol=1e-9)
    near, far = 20.0, 180.0
    # every view sees the circle up to the near edge, a full turn up to the far edge
    # (closed form: SID sin(atan(edge / SDD)))
    assert field_of_view_radius_mm(p) == pytest.approx(SID * math.sin(math.atan(near / SDD)))
    assert field_of_view_radius_mm(p, every_view=False) == \
        pytest.approx(SID * math.sin(math.atan(far / SDD)))
    # the short scan covers the longer side: 180 + 2 atan(far / SDD)
    assert fan_angle_rad(n_cols=n, pitch_u_mm=pitch, sdd_mm=SDD, offset_u_mm=offset) == \
        pytest.approx(2 * math.atan(far / SDD))


def test_row_offset_and_quarter_cell_offset_from_file():
    g = geometry_from_text("""geometry:
  type: cone
  sid: 500 mm
  sdd: 90 cm
  columns: 4
  column_pitch: 0.5 mm
  column_offset: 0.25 cells
  rows: 2
  row_pitch: 1 mm
  row_offset: 2 mm
  views: 3
""")
    p = g.poses()
    assert g.sdd_mm == 900.0  # 90 cm (unit definition)
    np.testing.assert_allclose(p.col_u_mm, [-0.625, -0.125, 0.375, 0.875])  # u_j + pitch / 4
    np.testing.assert_allclose(p.row_v_mm, [1.5, 2.5])  # (i - 1/2) x 1 mm + 2 mm (closed form)


def test_helical_z_shift_per_view():
    feed = 12.0
    p = cone_poses(sid_mm=SID, sdd_mm=SDD, n_cols=4, n_rows=2, pitch_u_mm=1, pitch_v_mm=1,
                   n_views=8, arc_rad=4 * math.pi, table_feed_per_turn_mm=feed, start_z_mm=-5)
    # z = start + feed * (turned angle) / 2 pi: 4 pi over 8 views -> feed / 4 per view
    np.testing.assert_allclose(p.source[:, 2], -5 + feed * np.arange(8) / 4)
    np.testing.assert_allclose(p.detector_centre[:, 2], p.source[:, 2])
    g = geometry_from_text("""geometry:
  type: helical
  sid: 500
  sdd: 900
  columns: 4
  column_pitch: 1
  rows: 2
  row_pitch: 1
  views: 8
  arc: 720
  direction: clockwise
  table_feed_per_turn: 12 mm
""")
    q = g.poses()
    np.testing.assert_allclose(q.source[:, 2], feed * np.arange(8) / 4)
    assert np.all(np.diff(q.angles_rad) < 0)  # clockwise: phi decreases (ARCHITECTURE.md)


# --------------------------------------------------------------------------------------------
# Parallel beam = Radon transform
# --------------------------------------------------------------------------------------------


def test_parallel_rays_follow_the_radon_convention():
    p = parallel_poses(n_cols=9, pitch_u_mm=2.0, n_views=7, arc_rad=2 * math.pi)
    every = cell_rays(p)[:, 0]
    for i, phi in enumerate(p.angles_rad):
        rays = every[i]
        u = np.array([math.cos(phi), math.sin(phi), 0.0])
        d = np.array([-math.sin(phi), math.cos(phi), 0.0])
        # the ray of column t is the line {t u + s d} (Radon: p(theta, t) = int f(t u + s d) ds)
        np.testing.assert_allclose(rays[:, 3:6], np.broadcast_to(d, (9, 3)), atol=1e-15)
        np.testing.assert_allclose(rays[:, 0:3] @ u, p.col_u_mm, atol=1e-12)
        np.testing.assert_allclose(rays[:, 0:3] @ d, 0.0, atol=1e-12)
        assert np.all(np.isinf(rays[:, 6])) and np.all(rays[:, 6] < 0) and np.all(rays[:, 7] > 0)


def test_parallel_beam_matches_scikit_image_radon_of_an_off_centre_disc():
    skimage = pytest.importorskip("skimage.transform")
    n, radius, cx, cy = 129, 6.0, 25.0, -14.0
    y, x = np.mgrid[0:n, 0:n] - (n - 1) / 2
    image = ((x - cx) ** 2 + (y - cy) ** 2 <= radius**2).astype(float)  # row index grows with +y
    degrees = [0.0, 35.0, 90.0, 160.0, 250.0]
    p = parallel_poses(n_cols=n, pitch_u_mm=1.0, angles_rad=np.radians(degrees))
    rays = cell_rays(p)[:, 0]
    # chord of a disc: 2 sqrt(r^2 - dist^2) along each of our rays (closed form)
    closest = rays[..., 0:2] - np.array([cx, cy])
    along = np.einsum("vjk,vjk->vj", closest, rays[..., 3:5])
    dist2 = np.sum(closest**2, axis=-1) - along**2
    ours = 2 * np.sqrt(np.clip(radius**2 - dist2, 0, None))
    # scikit-image's radon takes row 0 as the top of the picture (-y), hence the flip
    theirs = skimage.radon(image[::-1], theta=degrees, circle=False).T
    t_theirs = np.arange(theirs.shape[1]) - theirs.shape[1] // 2
    for k in range(len(degrees)):
        centroid_ours = np.sum(ours[k] * p.col_u_mm) / ours[k].sum()
        centroid_theirs = np.sum(theirs[k] * t_theirs) / theirs[k].sum()
        # both centroids equal the projected disc centre c . u(theta) (Radon centroid property)
        expected = cx * math.cos(math.radians(degrees[k])) + cy * math.sin(math.radians(degrees[k]))
        # the ray of column t passes at distance |t - c.u| from the disc centre, so ours is the
        # closed-form Radon transform of the disc, 2 sqrt(r^2 - (t - c.u)^2)
        np.testing.assert_allclose(dist2[k], (p.col_u_mm - expected) ** 2, atol=1e-9)
        assert centroid_ours == pytest.approx(expected, abs=0.05)  # sampled at 1 mm
        assert centroid_theirs == pytest.approx(expected, abs=0.3)  # pixelated disc


# --------------------------------------------------------------------------------------------
# User poses
# --------------------------------------------------------------------------------------------


def _fan_for_round_trip(curved=False):
    return fan_poses(sid_mm=SID, sdd_mm=SDD, n_cols=16, pitch_u_mm=1.5, n_views=9, curved=curved,
                     offset_u_mm=0.375, start_angle_rad=0.2)


@pytest.mark.parametrize("curved", [False, True])
def test_pose_form_round_trip_gives_identical_rays(curved):
    fan = _fan_for_round_trip(curved)
    table = pose_table(fan)
    again = poses_from_arrays(source=table[:, 0:3], detector_centre=table[:, 3:6],
                              u_axis=table[:, 6:9], v_axis=table[:, 9:12], n_cols=16,
                              pitch_u_mm=1.5, offset_u_mm=0.375, curved=curved, dimension=2)
    np.testing.assert_allclose(cell_rays(again), cell_rays(fan), rtol=0, atol=1e-12)
    assert np.all(np.isnan(again.angles_rad))


@pytest.mark.parametrize("suffix", [".npy", ".csv"])
def test_pose_file_round_trip(tmp_path, suffix):
    fan = _fan_for_round_trip()
    from simbench.geometry.pose_file import write_pose_file

    write_pose_file(fan, tmp_path / f"orbit{suffix}")
    scanner = tmp_path / "scanner.yaml"
    scanner.write_text(f"""geometry:
  type: poses
  dimension: 2
  columns: 16
  column_pitch: 1.5
  column_offset: 0.375 mm
  pose_file: orbit{suffix}
""")
    g = geometry_from_text(scanner.read_text(), str(scanner))
    np.testing.assert_allclose(cell_rays(g.poses()), cell_rays(fan), rtol=0, atol=1e-12)


def test_inline_poses_parallel_and_axis_normalisation():
    g = geometry_from_text("""geometry:
  type: poses
  beam: parallel
  columns: 3
  column_pitch: 1
  rows: 2
  row_pitch: 1
  poses:
    - {direction: [0, 1, 0], detector_centre: [0, 0, 0], u_axis: [1, 0, 0], v_axis: [0, 0, 1]}
    - {direction: [-0.7071, 0.7071, 0], detector_centre: [0, 0, 1 cm],
       u_axis: [0.7071, 0.7071, 0], v_axis: [0, 0.0005, 1]}
""")
    p = g.poses()
    assert p.parallel and p.projection_shape == (2, 2, 3)
    # axes given to 4 digits are made exactly unit and orthogonal (to float64 rounding)
    np.testing.assert_allclose(np.linalg.norm(p.u_axis, axis=1), 1.0, rtol=1e-15)
    np.testing.assert_allclose(np.einsum("ij,ij->i", p.u_axis, p.v_axis), 0.0, atol=1e-15)
    assert p.detector_centre[1, 2] == 10.0  # 1 cm (unit definition)


def test_helpers_for_sub_rays():
    s = cell_subsamples(3, 2, 0.9, 2.0)
    # midpoint rule: offsets ((i + 1/2) / n - 1/2) * pitch, u fastest
    np.testing.assert_allclose(s[:, 0], np.tile([-0.3, 0.0, 0.3], 2), atol=1e-15)
    np.testing.assert_allclose(s[:, 1], np.repeat([-0.5, 0.5], 3), atol=1e-15)
    # same midpoint rule over a 1.2 mm spot in 4 samples: +-0.15, +-0.45 mm
    f = focal_spot_points(0.0, 1.2, 1, 4)
    np.testing.assert_allclose(f, np.c_[np.zeros(4), [-0.45, -0.15, 0.15, 0.45]], atol=1e-15)
    with pytest.raises(InputError):
        cell_subsamples(0, 1, 1.0, 1.0)


# --------------------------------------------------------------------------------------------
# Shipped scanner files
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name,shape", [("parallel-bench-2d", (360, 512)),
                                        ("fan-clinical", (1000, 880)),
                                        ("cone-flat-panel", (360, 240, 400))])
def test_shipped_scanner_files(name, shape):
    from importlib.resources import files

    from simbench.scanner import load_scanner

    scanner = load_scanner(files("simbench") / "data" / "scanners" / f"{name}.yaml")
    # shapes (views, [rows,] columns) as written in the shipped scanner files
    assert scanner.geometry.poses().projection_shape == shape
    assert scanner.physics is not None


# --------------------------------------------------------------------------------------------
# Bad input: one line with file, line, column, field and what is valid
# --------------------------------------------------------------------------------------------

FAN = """geometry:
  type: fan
  sid: 500
  sdd: 900
  columns: 100
  column_pitch: 1
  views: 360
"""


def _with(text: str, key: str, value: str) -> str:
    if re.search(rf"^  {key}:", text, flags=re.M):
        return re.sub(rf"^  {key}:.*$", f"  {key}: {value}", text, flags=re.M)
    return text + f"  {key}: {value}\n"


# (label, text, expected line counted by hand in the text, field, words of the problem)
BAD = [
    ("sdd <= sid", _with(FAN, "sdd", "400"), 4, "geometry.sdd", "greater than SID"),
    ("sdd == sid", _with(FAN, "sdd", "500"), 4, "geometry.sdd", "greater than SID"),
    ("zero views", _with(FAN, "views", "0"), 7, "geometry.views", ">= 1"),
    ("negative views", _with(FAN, "views", "-5"), 7, "geometry.views", ">= 1"),
    ("fractional views", _with(FAN, "views", "10.5"), 7, "geometry.views", "whole number"),
    ("zero pitch", _with(FAN, "column_pitch", "0"), 6, "geometry.column_pitch", "> 0"),
    ("negative pitch", _with(FAN, "column_pitch", "-1 mm"), 6, "geometry.column_pitch", "> 0"),
    ("missing field", FAN.replace("  sid: 500\n", ""), None, "geometry.sid", "missing"),
    ("unknown field", _with(FAN, "sdd_mm", "900"), 8, "geometry.sdd_mm", "unknown field"),
    ("field of another type", _with(FAN, "rows", "4"), 8, "geometry.rows", "does not apply"),
    ("curved parallel", "geometry:\n  type: parallel\n  columns: 4\n  column_pitch: 1\n"
     "  views: 4\n  detector_shape: curved\n", 6, "geometry.detector_shape", "flat detector"),
    ("nan", _with(FAN, "sid", ".nan"), 3, "geometry.sid", "finite"),
    ("inf", _with(FAN, "sdd", "inf mm"), 4, "geometry.sdd", "finite"),
    ("unknown type", _with(FAN, "type", "spiral"), 2, "geometry.type", "not known"),
    ("arc over a turn", _with(FAN, "arc", "400"), 8, "geometry.arc", "at most 360"),
    ("zero arc", _with(FAN, "arc", "0"), 8, "geometry.arc", "> 0"),
    ("bad offset unit", _with(FAN, "column_offset", "2 pixels"), 8, "geometry.column_offset",
     "length or a number of cells"),
    ("bad direction", _with(FAN, "direction", "left"), 8, "geometry.direction", "not known"),
    ("rows in 2-D parallel", "geometry:\n  type: parallel\n  dimension: 2\n  columns: 4\n"
     "  column_pitch: 1\n  views: 4\n  rows: 8\n", 7, "geometry.rows", "one row"),
    ("helical short", "geometry:\n  type: helical\n  sid: 500\n  sdd: 900\n  columns: 4\n"
     "  column_pitch: 1\n  rows: 2\n  row_pitch: 1\n  views: 4\n  table_feed_per_turn: 10\n"
     "  arc: short\n", 11, "geometry.arc", "helical"),
]


@pytest.mark.parametrize("label,text,line,field,problem", BAD, ids=[b[0] for b in BAD])
def test_bad_geometry_is_one_located_line(label, text, line, field, problem):
    with pytest.raises(InputError) as info:
        geometry_from_text(text, "bad-scanner.yaml")
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith("bad-scanner.yaml:")
    assert field in message and problem in message and "(valid:" in message
    if line is not None:
        assert message.startswith(f"bad-scanner.yaml:{line}:")


POSES = """geometry:
  type: poses
  columns: 4
  column_pitch: 1
  poses:
    - source: [0, -500, 0]
      detector_centre: [0, 400, 0]
      u_axis: {u}
      v_axis: {v}
"""


@pytest.mark.parametrize("u,v,line,problem", [
    ("[1, 0]", "[0, 0, 1]", 8, "list of 3"),
    ("[0.8, 0, 0]", "[0, 0, 1]", 8, "not a unit vector"),
    ("[1, 0, 0]", "[0.1, 0, 0.995]", 9, "not orthogonal"),
    ("[1, 0, .nan]", "[0, 0, 1]", 8, "finite"),
])
def test_bad_inline_poses(u, v, line, problem):
    with pytest.raises(InputError) as info:
        geometry_from_text(POSES.format(u=u, v=v), "c-arm.yaml")
    message = str(info.value)
    assert message.startswith(f"c-arm.yaml:{line}:") and problem in message, message


def test_bad_pose_files(tmp_path):
    scanner = tmp_path / "scanner.yaml"
    base = "geometry:\n  type: poses\n  columns: 4\n  column_pitch: 1\n  pose_file: {}\n"
    with pytest.raises(InputError, match=r"scanner.yaml:5:\d+: geometry.pose_file: pose file .*"
                                         r"not found"):
        geometry_from_text(base.format("missing.npy"), str(scanner))
    np.save(tmp_path / "wrong.npy", np.zeros((5, 9)))
    with pytest.raises(InputError, match=r"wrong.npy: pose array has shape \(5, 9\)"):
        geometry_from_text(base.format("wrong.npy"), str(scanner))
    table = pose_table(_fan_for_round_trip())
    table[3, 6:9] *= 1.5  # u axis of view 3 no longer unit
    np.save(tmp_path / "stretched.npy", table)
    with pytest.raises(InputError, match=r"stretched.npy: row 3: u_axis: is not a unit vector"):
        geometry_from_text(base.format("stretched.npy"), str(scanner))
    header = ",".join(pose_columns(False))
    rows = [[f"{x:.17g}" for x in r] for r in pose_table(_fan_for_round_trip())]
    rows[3][1] = "oops"  # view 3 is on line 5 (line 1 is the header)
    (tmp_path / "bad.csv").write_text("\n".join([header] + [",".join(r) for r in rows]) + "\n")
    column = len(rows[3][0]) + 2  # after the first value and its comma, 1-based
    with pytest.raises(InputError, match=rf"bad.csv:5:{column}: source_y: 'oops' is not a number"):
        geometry_from_text(base.format("bad.csv"), str(scanner))
    (tmp_path / "cols.csv").write_text("source_x,source_y\n1,2\n")
    with pytest.raises(InputError, match=r"cols.csv:1: header: missing column 'source_z'"):
        geometry_from_text(base.format("cols.csv"), str(scanner))


@pytest.mark.parametrize("kwargs,field", [
    (dict(sid_mm=500.0, sdd_mm=400.0), "sdd_mm"),
    (dict(sid_mm=500.0, sdd_mm=900.0, n_views=0), "n_views"),
    (dict(sid_mm=500.0, sdd_mm=900.0, pitch_u_mm=0.0), "pitch_u_mm"),
    (dict(sid_mm=math.nan, sdd_mm=900.0), "sid_mm"),
])
def test_bad_keyword_arguments(kwargs, field):
    args = dict(n_cols=4, pitch_u_mm=1.0, n_views=3) | kwargs
    with pytest.raises(InputError, match=field):
        fan_poses(**args)


# --------------------------------------------------------------------------------------------
# Figure and documentation
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("make", [
    lambda: parallel_poses(n_cols=16, pitch_u_mm=2.0, n_views=8),
    lambda: cone_poses(sid_mm=SID, sdd_mm=SDD, n_cols=16, n_rows=8, pitch_u_mm=2.0,
                       pitch_v_mm=2.0, n_views=8, curved=True),
])
def test_draw_geometry_writes_a_png_atomically(tmp_path, make):
    from simbench.report.geometry_figure import draw_geometry

    out = draw_geometry(make(), tmp_path / "sub" / "geometry.png", views=[0, 3])
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    assert [p.name for p in out.parent.iterdir()] == ["geometry.png"]


def test_documentation_example_parses():
    from pathlib import Path

    text = (Path(__file__).parent.parent / "docs" / "geometry.md").read_text()
    block = re.findall(r"```yaml\n(.*?)```", text, re.S)[0]
    p = geometry_from_text(block).poses()
    assert p.projection_shape == (2, 192, 256)  # as written in docs/geometry.md
    # the second view is phi = 10 deg: direction d = (-sin 10, cos 10, 0) (ARCHITECTURE.md),
    # to the 4-5 decimals the documentation writes its pose coordinates with (atol 1e-4)
    np.testing.assert_allclose(p.direction[1], [-math.sin(math.radians(10)),
                                                math.cos(math.radians(10)), 0], atol=1e-4)


def test_detector_missing_the_axis_warns():
    from simbench.errors import InputWarning

    with pytest.warns(InputWarning, match=r"scanner.yaml:8:\d+: geometry.column_offset: .*"
                                          r"rotation axis"):
        geometry_from_text(_with(FAN, "column_offset", "60 mm"))


@pytest.mark.parametrize("text", [
    FAN,
    _with(_with(FAN, "detector_shape", "curved"), "arc", "short"),
    "geometry:\n  type: helical\n  sid: 500\n  sdd: 900\n  columns: 4\n  column_pitch: 1\n"
    "  rows: 2\n  row_pitch: 1\n  views: 12\n  arc: 700\n  table_feed_per_turn: -10\n"
    "  start_z: 3\n  direction: clockwise\n  start_angle: 17\n  row_offset: 0.5 cells\n",
    "geometry:\n  type: parallel\n  columns: 5\n  column_pitch: 1 cm\n  rows: 3\n  views: 7\n",
    POSES.format(u="[1, 0, 0]", v="[0, 0, 1]"),
])
def test_resolved_settings_read_back_to_the_same_rays(text):
    import yaml

    g = geometry_from_text(text)
    again = geometry_from_text(yaml.safe_dump({"geometry": g.resolved()}, sort_keys=False))
    # resolved settings are written as decimals: rays agree to rounding (common practice)
    np.testing.assert_allclose(cell_rays(again.poses()), cell_rays(g.poses()), rtol=1e-12,
                               atol=1e-9)


@settings(max_examples=25, deadline=None)
@given(phi=st.floats(-7.0, 7.0), curved=st.booleans(), offset=st.floats(-3.0, 3.0),
       sid=st.floats(100.0, 800.0), extra=st.floats(1.0, 800.0))
def test_views_are_rotations_of_view_zero_about_z(phi, curved, offset, sid, extra):
    p = cone_poses(sid_mm=sid, sdd_mm=sid + extra, n_cols=5, n_rows=3, pitch_u_mm=1.7,
                   pitch_v_mm=0.9, curved=curved, offset_u_mm=offset, angles_rad=[0.0, phi])
    rays = cell_rays(p)
    c, s = math.cos(phi), math.sin(phi)
    rotation = np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])  # rotation by phi about +z
    # tolerances: float64 rounding at positions of up to ~1600 mm (common practice)
    np.testing.assert_allclose(rays[0, ..., 0:3] @ rotation.T, rays[1, ..., 0:3], atol=1e-9)
    np.testing.assert_allclose(rays[0, ..., 3:6] @ rotation.T, rays[1, ..., 3:6], atol=1e-12)
    np.testing.assert_allclose(rays[0, ..., 7], rays[1, ..., 7], rtol=1e-12)
