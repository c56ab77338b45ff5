"""Properties of the phantom language over random inputs (hypothesis).

Expected values are closed forms: ring positions on a circle, the centred array formula,
the area pi*a*b of an ellipse, and the composition rule of docs/phantom-language.md.
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings, strategies as st

from simbench.geometry.grid import ImageGrid
from simbench.phantom import parse_phantom_text, rasterize

SETTINGS = settings(max_examples=30, deadline=None)
lengths = st.floats(2.0, 40.0)
offsets = st.floats(-30.0, 30.0)
angles = st.floats(0.0, 360.0)


@SETTINGS
@given(radius=st.floats(10.0, 80.0), count=st.integers(1, 12), start=angles,
       cx=offsets, cy=offsets)
def test_ring_copies_lie_on_their_circle(radius, count, start, cx, cy):
    text = (f"name: ring\ndimension: 2\nobjects:\n  - ring:\n      centre: [{cx!r}, {cy!r}]\n"
            f"      radius: {radius!r}\n      count: {count}\n      start_angle: {start!r}\n"
            "      object: {shape: circle, radius: 1, material: water}\n")
    centres = parse_phantom_text(text).objects.centre
    # closed form: copy k at centre + radius (cos p_k, sin p_k), p_k = start + 360 k / count
    p = np.radians(start + 360.0 * np.arange(count) / count)
    want = np.stack([cx + radius * np.cos(p), cy + radius * np.sin(p), 0 * p], axis=1)
    np.testing.assert_allclose(centres, want, atol=1e-9)


@SETTINGS
@given(count=st.integers(1, 9), sx=st.floats(-10.0, 10.0), sy=st.floats(-10.0, 10.0),
       gx=offsets, gy=offsets, turn=angles)
def test_array_inside_a_turned_group(count, sx, sy, gx, gy, turn):
    text = (f"name: array\ndimension: 2\nobjects:\n  - group:\n      centre: [{gx!r}, {gy!r}]\n"
            f"      angle: {turn!r}\n      objects:\n        - array:\n"
            f"            count: {count}\n            step: [{sx!r}, {sy!r}]\n"
            "            object: {shape: circle, radius: 1, material: water}\n")
    centres = parse_phantom_text(text).objects.centre[:, :2]
    # closed form: copy k at (k - (count-1)/2) * step in the group's frame, turned by the
    # group's angle (counter-clockwise) and moved to the group's centre
    k = np.arange(count) - (count - 1) / 2.0
    local = np.stack([k * sx, k * sy], axis=1)
    c, s = math.cos(math.radians(turn)), math.sin(math.radians(turn))
    want = local @ np.array([[c, s], [-s, c]]) + [gx, gy]
    np.testing.assert_allclose(centres, want, atol=1e-9)


@SETTINGS
@given(a=st.floats(8.0, 40.0), b=st.floats(8.0, 40.0), turn=angles)
def test_rasterized_ellipse_area(a, b, turn):
    text = (f"name: e\ndimension: 2\nobjects:\n  - {{shape: ellipse, semi_axes: [{a!r}, {b!r}], "
            f"angle: {turn!r}, mu: 1 /mm}}\n")
    grid = ImageGrid.square_2d(100, 1.0)
    image = rasterize(parse_phantom_text(text), grid, 60.0, supersample=4)
    # closed form: area pi a b (mm^2, mu = 1 /mm, 1 mm pixels). Only the 0.25 mm sub-cells
    # the outline crosses can be misclassified: at most perimeter * sqrt(2) / 0.25 of them,
    # each worth 1/16 mm^2, so |error| <= 0.354 * perimeter (Ramanujan's perimeter formula)
    perimeter = math.pi * (3 * (a + b) - math.sqrt((3 * a + b) * (a + 3 * b)))
    assert abs(image.sum() - math.pi * a * b) <= perimeter * math.sqrt(2) / 0.25 / 16


@SETTINGS
@given(mu_host=st.floats(0.01, 0.05), mu_insert=st.floats(0.0, 0.05), r=st.floats(3.0, 20.0))
def test_replace_sets_and_add_adds_mu(mu_host, mu_insert, r):
    # composition rule: a replace insert sets mu inside it, an add insert adds its mu
    grid = ImageGrid.square_2d(64, 1.0)
    centre = float(grid.axis_mm("x")[32])
    for mode, want in (("replace", mu_insert), ("add", mu_host + mu_insert)):
        text = ("name: c\ndimension: 2\nobjects:\n"
                f"  - {{shape: circle, radius: 30, mu: {mu_host!r} /mm}}\n"
                f"  - {{shape: circle, centre: [{centre!r}, {centre!r}], radius: {r!r}, "
                f"mu: {mu_insert!r} /mm, mode: {mode}}}\n")
        image = rasterize(parse_phantom_text(text), grid, 60.0, supersample=1)
        assert abs(image[32, 32] - want) <= 1e-15 * max(1.0, want)
