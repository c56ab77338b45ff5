"""Rasterizing phantoms: areas and volumes against closed forms, composition, labels.

Sub-sampling error bound used below: with s sub-samples per axis on pixels of width d, only
sub-cells (width h = d / s) crossed by the boundary can be misclassified, so the area error is
at most about perimeter * h (each crossed sub-cell contributes at most h^2 and a curve of
length P crosses at most ~P / h + O(1) of them per row/column direction).
"""

from __future__ import annotations

import math

import numba
import numpy as np
import pytest

from simbench.geometry.grid import ImageGrid
from simbench.phantom import (label_map, load_phantom, parse_phantom_text, rasterize,
                              shipped_phantom_path)
from simbench.phantom.polygon import shoelace_area
from simbench.phantom.rasterize import material_mu


def two_d(objects: str):
    return parse_phantom_text(f"name: t\ndimension: 2\nobjects:\n{objects}")


def test_disc_area_is_pi_r_squared():
    p = two_d("  - {shape: circle, centre: [1.3, -2.1], radius: 30, mu: 1 /mm}\n")
    d, s = 0.7, 4
    image = rasterize(p, ImageGrid.square_2d(110, d), 60.0, supersample=s)
    area = image.sum() * d * d
    # pi r^2 (closed form), within perimeter x h (bound in the module docstring)
    assert abs(area - math.pi * 30 ** 2) <= 2 * math.pi * 30 * d / s
    assert image.min() >= 0.0 and image.max() == 1.0


def test_rotated_ellipse_area_is_pi_a_b():
    p = two_d("  - {shape: ellipse, centre: [5, 3], semi_axes: [40, 15], angle: 33, mu: 0.5 /mm}\n")
    d, s = 0.8, 4
    image = rasterize(p, ImageGrid.square_2d(128, d), 60.0, supersample=s)
    area = image.sum() / 0.5 * d * d
    perimeter = math.pi * (3 * (40 + 15) - math.sqrt((3 * 40 + 15) * (40 + 3 * 15)))  # Ramanujan
    assert abs(area - math.pi * 40 * 15) <= perimeter * d / s


def test_sub_sampling_converges_to_the_area():
    p = two_d("  - {shape: ellipse, semi_axes: [20, 11], angle: 17, mu: 1 /mm}\n")
    grid = ImageGrid.square_2d(64, 1.0)
    errors = [abs(rasterize(p, grid, 60.0, supersample=s).sum() - math.pi * 20 * 11)
              for s in (1, 8)]
    assert errors[1] < errors[0]
    # bound of the module docstring: perimeter (at most 2 pi a for a <= 20) x h = 1/8 mm
    assert errors[1] <= 2 * math.pi * 20 / 8


def test_non_convex_polygon_area_is_the_shoelace_area():
    verts = np.array([[0, 0], [30, 0], [30, 10], [10, 10], [10, 25], [0, 25]], float)  # L shape
    text = "[" + ", ".join(f"[{x:g}, {y:g}]" for x, y in verts) + "]"
    p = two_d(f"  - {{shape: polygon, centre: [-12, -9], angle: 20, vertices: {text}, mu: 1 /mm}}\n")
    d, s = 0.5, 4
    image = rasterize(p, ImageGrid.square_2d(96, d), 60.0, supersample=s)
    perimeter = 30 + 10 + 20 + 15 + 10 + 25
    assert shoelace_area(verts) == 450.0  # 30 x 10 + 10 x 15 (L shape, by hand)
    assert abs(image.sum() * d * d - 450.0) <= perimeter * d / s
    # the notch of the L is empty: local point (20, 20) turned by 20 deg, plus the centre
    c, sn = math.cos(math.radians(20)), math.sin(math.radians(20))
    x, y = -12 + c * 20 - sn * 20, -9 + sn * 20 + c * 20
    ix, iy = int(round(x / d + 47.5)), int(round(y / d + 47.5))
    assert image[iy, ix] == 0.0


def test_replace_and_add_at_pixel_level():
    # pixels of 1 mm centred on integers +- 0.5; the squares cover whole pixels only
    base = "  - {shape: rectangle, centre: [-2, 0], size: [8, 8], mu: 0.01 /mm}\n"
    top = "  - {shape: rectangle, centre: [2, 0], size: [8, 8], mu: 0.03 /mm, mode: MODE}\n"
    grid = ImageGrid((1, 16, 16), (1.0, 1.0, 1.0), (0.5, 0.5, 0.0), 2)
    xs, ys = grid.axis_mm("x"), grid.axis_mm("y")
    overlap = (np.abs(xs) < 2)[None, :] & (np.abs(ys) < 4)[:, None]
    only_base = ((xs > -6) & (xs < -2))[None, :] & (np.abs(ys) < 4)[:, None]
    replaced = rasterize(two_d(base + top.replace("MODE", "replace")), grid, 60.0)
    added = rasterize(two_d(base + top.replace("MODE", "add")), grid, 60.0)
    np.testing.assert_array_equal(replaced[overlap], 0.03)  # later object replaces
    np.testing.assert_allclose(added[overlap], 0.04, rtol=1e-15)  # 0.01 + 0.03
    np.testing.assert_array_equal(replaced[only_base], 0.01)
    np.testing.assert_array_equal(added[only_base], 0.01)


def test_add_on_vacuum_and_after_a_later_replace():
    # rule: mu = mu(last replace) + sum of add objects after it
    p = two_d("  - {shape: circle, radius: 10, mu: 0.01 /mm, mode: add}\n"
              "  - {shape: circle, radius: 5, mu: 0.02 /mm}\n"
              "  - {shape: circle, radius: 2, mu: 0.005 /mm, mode: add}\n")
    grid = ImageGrid.square_2d(1, 0.01)  # one tiny pixel at the origin
    assert rasterize(p, grid, 60.0)[0, 0] == pytest.approx(0.025)  # 0.02 + 0.005 by the rule
    off = ImageGrid.square_2d(1, 0.01, centre_mm=(7.0, 0.0))
    assert rasterize(p, off, 60.0)[0, 0] == pytest.approx(0.01)  # vacuum + 0.01 by the rule


def test_sphere_and_cone_volumes():
    p = parse_phantom_text(
        "name: t\ndimension: 3\nobjects:\n"
        "  - {shape: sphere, centre: [-10, 0, 0], radius: 7, mu: 1 /mm}\n"
        "  - {shape: cone, centre: [10, 0, 0], base_radius: 6, top_radius: 2, height: 12,"
        " axis: [0, 1, 1], mu: 2 /mm}\n")
    d, s = 0.6, 3
    grid = ImageGrid((40, 40, 70), (d, d, d), (0.0, 0.0, 0.0), 3)
    image = rasterize(p, grid, 60.0, supersample=s)
    xs = grid.axis_mm("x")
    sphere = image[:, :, xs < 0].sum() * d ** 3
    cone = image[:, :, xs > 0].sum() / 2 * d ** 3
    # 4/3 pi r^3 and pi h / 3 (r0^2 + r0 r1 + r1^2) (closed forms); bound: surface * h
    assert abs(sphere - 4 / 3 * math.pi * 7 ** 3) <= 4 * math.pi * 7 ** 2 * d / s
    cone_volume = math.pi * 12 / 3 * (36 + 12 + 4)
    cone_surface = math.pi * (36 + 4) + math.pi * 8 * math.hypot(4, 12)
    assert abs(cone - cone_volume) <= cone_surface * d / s


def test_shepp_logan_values_at_known_points():
    p = load_phantom(shipped_phantom_path("shepp-logan"))
    # Kak & Slaney Table 3.1 sums x 0.02 /mm: origin in a + b -> (2 - 0.98) x 0.02;
    # (0, 35 mm) in a + b + e -> (2 - 0.98 + 0.01) x 0.02; (0, 90 mm) in a only -> 2 x 0.02
    for (x, y), expected in (((0, 0), 0.0204), ((0, 35), 0.0206), ((0, 90), 0.04),
                             ((0, 100), 0.0)):
        grid = ImageGrid.square_2d(1, 1e-3, centre_mm=(x, y))
        # abs: float64 rounding of the sums (common practice)
        assert rasterize(p, grid, 60.0, supersample=1)[0, 0] == pytest.approx(expected, abs=1e-12)


def test_catalogue_water_at_60_kev():
    p = two_d("  - {shape: circle, radius: 50, material: water}\n")
    value = rasterize(p, ImageGrid.square_2d(1, 1.0), 60.0)[0, 0]
    # NIST XCOM, water, 60 keV, total with coherent: 0.2059 cm^2/g (recalled from memory);
    # 1 %: the spread between cross-section compilations (common practice)
    assert value == pytest.approx(0.02059, rel=0.01)


def test_label_map_rule_and_full_pixel_option():
    p = two_d("  - {name: body, shape: circle, radius: 40, mu: 0.02 /mm, roi: true}\n"
              "  - {name: hole, shape: circle, radius: 10, mu: 0.0 /mm}\n"
              "  - {name: spot, shape: circle, centre: [20, 0], radius: 5, mu: 0.01 /mm,"
              " mode: add, roi: true}\n")
    grid = ImageGrid.square_2d(100, 1.0)
    labels = label_map(p, grid)
    assert labels.dtype == np.int32
    xs = grid.axis_mm("x")
    iy = 50  # y = 0.5 mm
    row = labels[iy]
    assert row[np.argmin(np.abs(xs - 0.5))] == 0       # non-ROI replace object displaces
    assert row[np.argmin(np.abs(xs - 20.5))] == 2      # add ROI on top
    assert row[np.argmin(np.abs(xs - 30.5))] == 1      # body
    assert row[np.argmin(np.abs(xs + 45.5))] == 0      # outside
    assert p.roi_names == ("body", "spot")
    strict = label_map(p, grid, supersample=4)
    assert np.all((strict == labels) | (strict == 0))  # full-pixel labels are a subset
    assert (strict == 2).sum() < (labels == 2).sum()


def test_voxel_phantom_resamples_to_itself_on_its_own_grid(tmp_path):
    rng = np.random.default_rng(3)
    volume = rng.integers(0, 3, size=(6, 8)).astype(np.int16)
    np.save(tmp_path / "v.npy", volume)
    (tmp_path / "v.yaml").write_text(
        "name: v\ndimension: 2\nvoxels: {file: v.npy, voxel_size: 2, centre: [1, -1],"
        " labels: {1: water, 2: g}}\nmaterials:\n  g: {formula: H2O, density: 2.0}\n")
    p = load_phantom(tmp_path / "v.yaml")
    grid = ImageGrid((1, 6, 8), (2.0, 2.0, 2.0), (1.0, -1.0, 0.0), 2)
    image = rasterize(p, grid, 60.0, supersample=2)
    mu = material_mu(p.materials, 60.0)
    expected = np.choose(volume, [0.0, mu[p.voxels.label_material[1]],
                                  mu[p.voxels.label_material[2]]])
    # every sub-sample lies in the pixel's own voxel: its value exactly (float64 rounding)
    np.testing.assert_allclose(image, expected, rtol=1e-12)
    # a grid of half-size pixels sees every voxel value 2 x 2 times
    fine = rasterize(p, ImageGrid((1, 12, 16), (1.0, 1.0, 1.0), (1.0, -1.0, 0.0), 2), 60.0)
    np.testing.assert_allclose(fine, np.kron(expected, np.ones((2, 2))), rtol=1e-12)
    assert not label_map(p, grid).any()


def test_same_bits_with_one_or_two_threads():
    p = load_phantom(shipped_phantom_path("resolution"))
    grid = ImageGrid.square_2d(96, 2.0)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = rasterize(p, grid, 60.0)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        two = rasterize(p, grid, 60.0)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(one, two)


def test_bad_arguments_raise_value_error():
    p = two_d("  - {shape: circle, radius: 1, mu: 1 /mm}\n")
    with pytest.raises(ValueError):
        rasterize(p, ImageGrid.square_2d(4, 1.0), 60.0, supersample=0)
    with pytest.raises(ValueError):
        rasterize(p, ImageGrid.square_2d(4, 1.0), float("nan"))


def test_draw_phantom_writes_a_png(tmp_path):
    from simbench.report.drawing import draw_phantom

    out = draw_phantom(load_phantom(shipped_phantom_path("cone-beam-3d")), tmp_path / "c.png",
                       pixels=64)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    assert [f.name for f in tmp_path.iterdir()] == ["c.png"]  # no temporary file left


def _scattered_circles(n: int, seed: int = 5):
    """n overlapping circles over a 100 mm square, half of them ROIs, with their arrays."""
    rng = np.random.default_rng(seed)
    centres = rng.uniform(-50, 50, (n, 2))
    radii = rng.uniform(0.5, 6.0, n)
    mus = rng.uniform(0.1, 1.0, n)
    lines = [f"  - {{shape: circle, centre: [{x:.17g}, {y:.17g}], radius: {r:.17g}, "
             f"mu: {m:.17g} /mm"
             f"{', roi: true' if k % 2 else ''}}}\n"
             for k, ((x, y), r, m) in enumerate(zip(centres, radii, mus))]
    return two_d("".join(lines)), centres, radii, mus


def test_scattered_objects_match_pointwise_membership():
    # with one sample per pixel the value and label are those of the pixel centre: the last
    # circle (x-cx)^2 + (y-cy)^2 <= r^2 containing it (closed-form membership, computed here
    # with numpy independently of the kernels' per-row selection of objects)
    p, centres, radii, mus = _scattered_circles(300)
    grid = ImageGrid((1, 90, 110), (1.1, 1.1, 1.1), (0.3, -0.2, 0.0), 2)
    x, y = np.meshgrid(grid.axis_mm("x"), grid.axis_mm("y"))
    value = np.zeros_like(x)
    label = np.zeros(x.shape, np.int32)
    roi_number = 0
    for k, ((cx, cy), r, m) in enumerate(zip(centres, radii, mus)):
        inside = (x - cx) ** 2 + (y - cy) ** 2 <= r * r
        value[inside] = m
        if k % 2:
            roi_number += 1
        label[inside] = roi_number if k % 2 else 0
    np.testing.assert_array_equal(rasterize(p, grid, 60.0, supersample=1), value)
    np.testing.assert_array_equal(label_map(p, grid, supersample=1), label)


def test_scattered_objects_in_three_d_match_pointwise_membership():
    rng = np.random.default_rng(8)
    centres = rng.uniform(-20, 20, (120, 3))
    radii = rng.uniform(0.5, 4.0, 120)
    p = parse_phantom_text("name: t\ndimension: 3\nobjects:\n" + "".join(
        f"  - {{shape: sphere, centre: [{x:.17g}, {y:.17g}, {z:.17g}], radius: {r:.17g}, "
        f"mu: {k + 1} /mm, "
        "roi: true}\n" for k, ((x, y, z), r) in enumerate(zip(centres, radii))))
    grid = ImageGrid((20, 24, 22), (2.0, 2.0, 2.0), (0.0, 0.0, 0.0), 3)
    z, y, x = np.meshgrid(grid.axis_mm("z"), grid.axis_mm("y"), grid.axis_mm("x"),
                          indexing="ij")
    value = np.zeros_like(x)
    for k, ((cx, cy, cz), r) in enumerate(zip(centres, radii)):
        value[(x - cx) ** 2 + (y - cy) ** 2 + (z - cz) ** 2 <= r * r] = k + 1  # sphere test
    np.testing.assert_array_equal(rasterize(p, grid, 60.0, supersample=1), value)
    np.testing.assert_array_equal(label_map(p, grid), value.astype(np.int32))
