"""Parsing and compiling the phantom language: shapes, rotations, groups, patterns, materials.

Expected values are closed forms (rotation matrices, positions on a circle, bar widths from the
line-pair frequency) or the published Shepp-Logan table.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from simbench.phantom import (compiled as C, load_phantom, parse_phantom_text,
                              shipped_phantom_names, shipped_phantom_path)


def rz(deg):
    """World-to-local rotation of an object turned by deg about z (closed form, transpose of
    the counter-clockwise rotation)."""
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    return np.array([[c, s, 0], [-s, c, 0], [0, 0, 1]])


def phantom_2d(objects: str, extra: str = "") -> C.Phantom:
    return parse_phantom_text(f"name: t\ndimension: 2\n{extra}objects:\n{objects}")


def phantom_3d(objects: str) -> C.Phantom:
    return parse_phantom_text(f"name: t\ndimension: 3\nobjects:\n{objects}")


# -- 2-D shapes --------------------------------------------------------------------------------


def test_circle_compiles_to_ellipse_code_with_equal_half_sizes():
    p = phantom_2d("  - {shape: circle, centre: [3, -4], radius: 12, mu: 0.02 /mm}\n")
    o = p.objects
    assert o.shape[0] == C.ELLIPSE_2D
    np.testing.assert_array_equal(o.centre[0], [3, -4, 0])
    # a circle is an ellipse with equal half sizes, unbounded along z (compiled.py contract)
    assert tuple(o.half_sizes[0]) == (12.0, 12.0, math.inf)
    np.testing.assert_array_equal(o.rotation[0], np.eye(3))
    assert o.bound_radius[0] == 12.0
    assert o.mode[0] == C.REPLACE


def test_ellipse_angle_gives_transposed_rotation_about_z():
    p = phantom_2d("  - {shape: ellipse, semi_axes: [20, 10], angle: 30, mu: 0.2 /cm}\n")
    np.testing.assert_allclose(p.objects.rotation[0], rz(30), atol=1e-15)
    assert tuple(p.objects.half_sizes[0][:2]) == (20.0, 10.0)
    assert p.materials[0].mu_per_mm == pytest.approx(0.02)  # 0.2 /cm = 0.02 /mm (unit definition)
    # local = R (world - centre): the major axis direction (cos 30, sin 30) maps to local +x
    np.testing.assert_allclose(p.objects.rotation[0] @ [math.cos(math.pi / 6),
                                                        math.sin(math.pi / 6), 0], [1, 0, 0],
                               atol=1e-15)


def test_rectangle_size_is_full_width_and_file_units_apply():
    p = phantom_2d("  - {shape: rectangle, size: [4, 3], mu: 1 /m}\n", "units: cm\n")
    np.testing.assert_array_equal(p.objects.half_sizes[0][:2], [20.0, 15.0])  # 4 cm / 2
    assert p.objects.bound_radius[0] == pytest.approx(25.0)  # hypot(20, 15), 3-4-5 triangle
    assert p.materials[0].mu_per_mm == pytest.approx(1e-3)  # 1 /m = 0.001 /mm (unit definition)


def test_explicit_units_override_file_units():
    p = phantom_2d("  - {shape: circle, radius: 15 mm, centre: [1 cm, 2], mu: 1 /mm}\n",
                   "units: cm\n")
    assert p.objects.half_sizes[0][0] == 15.0
    np.testing.assert_array_equal(p.objects.centre[0][:2], [10.0, 20.0])  # 1 cm, 2 (file cm)


def test_polygon_vertices_are_kept_in_local_coordinates():
    verts = [[0, 0], [30, 0], [30, 10], [10, 10], [10, 25], [0, 25]]  # non-convex L
    p = phantom_2d(f"  - {{shape: polygon, centre: [5, 5], vertices: {verts}, mu: 1 /mm}}\n")
    o = p.objects
    assert o.shape[0] == C.POLYGON_2D
    assert (o.poly_start[0], o.poly_count[0]) == (0, 6)
    np.testing.assert_array_equal(o.poly_xy, np.array(verts, float))
    assert o.bound_radius[0] == pytest.approx(math.hypot(30, 10))  # farthest vertex (30, 10)


# -- 3-D shapes --------------------------------------------------------------------------------


def test_sphere_ellipsoid_box_half_sizes():
    p = phantom_3d(
        "  - {shape: sphere, radius: 5, mu: 1 /mm}\n"
        "  - {shape: ellipsoid, semi_axes: [1, 2, 3], mu: 1 /mm}\n"
        "  - {shape: box, size: [2, 4, 6], mu: 1 /mm}\n")
    o = p.objects
    assert list(o.shape) == [C.ELLIPSOID, C.ELLIPSOID, C.BOX]
    np.testing.assert_array_equal(o.half_sizes, [[5, 5, 5], [1, 2, 3], [1, 2, 3]])
    assert o.bound_radius[2] == pytest.approx(math.sqrt(14))  # half diagonal sqrt(1+4+9)
    assert len(p.materials) == 1  # equal explicit mu share one pseudo-material


def test_rotate_list_is_extrinsic_in_order():
    # rotate: [x: 90, z: 90] -> Q = Rz(90) Rx(90): local x -> world y, local y -> world z,
    # local z -> world x (closed form of the two quarter turns)
    p = phantom_3d("  - {shape: box, size: [2, 4, 6], rotate: [x: 90, z: 90], mu: 1 /mm}\n")
    q = np.array([[0, 0, 1], [1, 0, 0], [0, 1, 0]], float)
    np.testing.assert_allclose(p.objects.rotation[0], q.T, atol=1e-15)


def test_cylinder_axis_maps_local_z_to_the_axis():
    p = phantom_3d(
        "  - {shape: cylinder, radius: 4, height: 10, axis: [1, 0, 0], mu: 1 /mm}\n"
        "  - {shape: cylinder, semi_axes: [4, 2], height: 10, axis: [1, 1, 1], mu: 1 /mm}\n"
        "  - {shape: cylinder, radius: 4, height: 10, axis: [0, 0, -2], mu: 1 /mm}\n")
    o = p.objects
    # half sizes: radius or semi-axes, and half the height (closed form)
    np.testing.assert_array_equal(o.half_sizes[0], [4, 4, 5])
    np.testing.assert_array_equal(o.half_sizes[1], [4, 2, 5])
    for k, axis in enumerate(([1, 0, 0], [1, 1, 1], [0, 0, -1])):
        a = np.array(axis, float) / np.linalg.norm(axis)
        np.testing.assert_allclose(o.rotation[k] @ a, [0, 0, 1], atol=1e-14)
        np.testing.assert_allclose(o.rotation[k] @ o.rotation[k].T, np.eye(3), atol=1e-14)
        assert np.linalg.det(o.rotation[k]) == pytest.approx(1.0)  # proper rotation


def test_cone_radii_and_height():
    p = phantom_3d("  - {shape: cone, base_radius: 6, top_radius: 2, height: 20, mu: 1 /mm}\n")
    o = p.objects
    assert o.shape[0] == C.CONE
    # larger radius and half height; bound: corner of the base rim (closed form)
    np.testing.assert_array_equal(o.half_sizes[0], [6, 6, 10])
    np.testing.assert_array_equal(o.params[0], [6, 2, 0, 0])
    assert o.bound_radius[0] == pytest.approx(math.hypot(6, 10))


# -- groups and patterns ------------------------------------------------------------------------


def test_group_transform_composes_with_child_placement():
    p = phantom_2d(
        "  - group:\n"
        "      centre: [10, 0]\n"
        "      angle: 90\n"
        "      objects:\n"
        "        - {shape: ellipse, centre: [5, 0], semi_axes: [3, 1], angle: 30, mu: 1 /mm}\n")
    # (10, 0) + Rz(90) (5, 0) = (10, 5); angles add: 120 degrees (closed form)
    np.testing.assert_allclose(p.objects.centre[0], [10, 5, 0], atol=1e-12)
    np.testing.assert_allclose(p.objects.rotation[0], rz(120), atol=1e-12)


def test_ring_positions_lie_on_the_circle():
    p = phantom_2d(
        "  - ring:\n"
        "      centre: [1, 2]\n"
        "      radius: 50\n"
        "      count: 8\n"
        "      start_angle: 10\n"
        "      object: {name: rod, shape: circle, radius: 2, mu: 1 /mm, roi: true}\n")
    phi = np.radians(10 + 45 * np.arange(8))  # start + 360 k / N
    expected = np.stack([1 + 50 * np.cos(phi), 2 + 50 * np.sin(phi)], axis=1)
    np.testing.assert_allclose(p.objects.centre[:, :2], expected, atol=1e-12)
    assert p.object_names == tuple(f"rod {k}" for k in range(1, 9))
    assert list(p.objects.roi_label) == list(range(1, 9))
    assert p.roi_names == p.object_names


def test_ring_turn_copies_rotates_each_copy():
    p = phantom_2d(
        "  - ring: {radius: 20, count: 4, turn_copies: true,\n"
        "           object: {shape: rectangle, size: [4, 1], mu: 1 /mm}}\n")
    for k in range(4):
        np.testing.assert_allclose(p.objects.rotation[k], rz(90 * k), atol=1e-12)


def test_array_is_centred_on_its_centre():
    p = phantom_2d(
        "  - array: {centre: [0, 20], count: 5, step: [10, 0],\n"
        "            object: {shape: circle, radius: 1, mu: 1 /mm}}\n")
    np.testing.assert_allclose(p.objects.centre[:, 0], [-20, -10, 0, 10, 20])
    np.testing.assert_allclose(p.objects.centre[:, 1], 20)


def test_bars_width_is_half_a_line_pair():
    p = phantom_2d(
        "  - bars: {name: g, centre: [0, 0], line_pairs_per_mm: 2, count: 4, length: 6,\n"
        "           mu: 1 /mm}\n")
    o = p.objects
    # 2 lp/mm: a line pair is 0.5 mm, bar width = gap = 0.25 mm (definition of lp/mm)
    np.testing.assert_allclose(o.half_sizes[:, 0], 0.125)
    np.testing.assert_allclose(o.half_sizes[:, 1], 3.0)
    np.testing.assert_allclose(o.centre[:, 0], [-0.75, -0.25, 0.25, 0.75])  # one pair apart
    assert set(o.shape) == {C.RECTANGLE_2D}


def test_nested_patterns_multiply():
    p = phantom_2d(
        "  - ring:\n"
        "      radius: 30\n"
        "      count: 3\n"
        "      object:\n"
        "        array: {count: 2, step: [4, 0], object: {name: d, shape: circle, radius: 1, mu: 1 /mm}}\n")
    assert p.objects.count == 6  # 3 ring copies x 2 array copies
    assert p.object_names[:2] == ("d 1 1", "d 1 2")


# -- materials and flags ------------------------------------------------------------------------


def test_materials_catalogue_custom_and_unused():
    p = phantom_2d(
        "  - {shape: circle, radius: 50, material: water}\n"
        "  - {shape: circle, radius: 5, material: gel, mode: add, edge: true}\n",
        "materials:\n"
        "  gel: {formula: C2H4, density: 0.95}\n"
        "  unused: {mass_fractions: {H: 0.111894, O: 0.888106}, density: 1.0}\n")
    names = [m.name for m in p.materials]
    assert names == ["water", "gel"]  # the unused custom material is left out
    assert p.materials[1].kind == "custom"
    assert list(p.objects.mode) == [C.REPLACE, C.ADD]
    assert list(p.objects.edge) == [False, True]


def test_shepp_logan_matches_the_published_table():
    p = load_phantom(shipped_phantom_path("shepp-logan"))
    # Kak & Slaney, Principles of Computerized Tomographic Imaging, Table 3.1 (recalled from
    # memory; ellipse i at y = -0.606, which some reproductions print as -0.605):
    # (x, y, major, minor, angle deg, intensity); scaled here by 100 mm and 0.02 /mm
    table = [(0, 0, .92, .69, 90, 2.0), (0, -.0184, .874, .6624, 90, -.98),
             (.22, 0, .31, .11, 72, -.02), (-.22, 0, .41, .16, 108, -.02),
             (0, .35, .25, .21, 90, .01), (0, .1, .046, .046, 0, .01),
             (0, -.1, .046, .046, 0, .01), (-.08, -.605, .046, .023, 0, .01),
             (0, -.606, .023, .023, 0, .01), (.06, -.605, .046, .023, 90, .01)]
    o = p.objects
    mu = np.array([m.mu_per_mm for m in p.materials])[o.material]
    for k, (x, y, a, b, ang, rho) in enumerate(table):
        np.testing.assert_allclose(o.centre[k, :2], [100 * x, 100 * y], atol=1e-12)
        np.testing.assert_allclose(o.half_sizes[k, :2], [100 * a, 100 * b], atol=1e-12)
        np.testing.assert_allclose(o.rotation[k], rz(ang), atol=1e-12)
        assert mu[k] == pytest.approx(0.02 * rho, abs=1e-15)
        assert o.mode[k] == C.ADD


@pytest.mark.parametrize("name", ["shepp-logan", "water-cylinder", "water-ellipse-inserts",
                                  "resolution", "cone-beam-3d"])
def test_shipped_phantoms_load(name):
    assert name in shipped_phantom_names()
    p = load_phantom(shipped_phantom_path(name))
    assert p.objects.count > 0
    assert np.all(np.isfinite(p.objects.centre))
    if name == "cone-beam-3d":
        assert p.dimension == 3 and p.objects.count >= 20
        assert {C.ELLIPSOID, C.CYLINDER, C.CONE, C.BOX} <= set(p.objects.shape.tolist())
        assert len(set(np.round(p.objects.centre[:, 2], 6))) >= 3  # several z levels
    if name == "water-ellipse-inserts":
        assert len(p.roi_names) >= 6
    if name == "resolution":
        assert p.objects.edge.any()


# -- voxel phantoms -----------------------------------------------------------------------------


def test_voxel_label_phantom(tmp_path):
    labels = np.zeros((4, 6), np.uint8)
    labels[1:3, 2:5] = 2
    labels[0, 0] = 1
    np.save(tmp_path / "labels.npy", labels)
    path = tmp_path / "vox.yaml"
    path.write_text("name: v\ndimension: 2\nvoxels:\n  file: labels.npy\n  voxel_size: 0.5\n"
                    "  centre: [1, 2]\n  labels: {1: water, 2: bone-like}\n"
                    "materials:\n  bone-like: {formula: CaO, density: 1.8}\n")
    p = load_phantom(path)
    v = p.voxels
    # the label array and placement as written, widened to int32 (compiled.py contract)
    assert v.kind == "labels" and v.values.shape == (1, 4, 6) and v.values.dtype == np.int32
    assert v.spacing_mm[:2] == (0.5, 0.5) and v.centre_mm == (1.0, 2.0, 0.0)
    assert [p.materials[i].name for i in v.label_material[1:]] == ["water", "bone-like"]
    assert v.label_material[0] == -1
    assert p.objects.count == 0


def test_voxel_mu_phantom_converts_units(tmp_path):
    mu = np.full((3, 4, 5), 0.2, np.float32)
    np.save(tmp_path / "mu.npy", mu)
    path = tmp_path / "vox.yaml"
    path.write_text("name: v\ndimension: 3\nvoxels: {file: mu.npy, voxel_size: [1, 1, 2],"
                    " mu_unit: /cm}\n")
    p = load_phantom(path)
    # 0.2 /cm = 0.02 /mm (unit definition); rtol: float32 input (common practice)
    np.testing.assert_allclose(p.voxels.values, 0.02, rtol=1e-6)
    assert p.voxels.spacing_mm == (1.0, 1.0, 2.0)
    assert p.materials[0].kind == "mu" and p.materials[0].mu_per_mm == 1.0
