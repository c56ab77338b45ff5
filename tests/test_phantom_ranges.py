"""Every number of the phantom language has a documented range, checked where it is written.

The ranges are the constants of simbench/phantom/ranges.py (docs/phantom-language.md,
"Ranges"): sizes 1e-5 to 1e5 mm, coordinates within 1e5 mm, placed objects within 1e6 mm,
angles within one turn, |mu| <= 1e5 /mm, densities up to 30 g/cm3 (osmium, the densest
element, is 22.59 g/cm3: fact of the trade), bar widths within the size range, labels 0 to
65535. Each refusal is one line with the line, column and field of the value.
"""

from __future__ import annotations

import numpy as np
import pytest

from simbench.errors import InputError
from simbench.phantom import load_phantom, parse_phantom_text

HEAD2 = "name: t\ndimension: 2\nobjects:\n"   # objects start on line 4
HEAD3 = "name: t\ndimension: 3\nobjects:\n"


def refused(text: str, *, line: int, field: str, words: tuple = ()) -> str:
    with pytest.raises(InputError) as info:
        parse_phantom_text(text, "bad.yaml")
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(f"bad.yaml:{line}:"), message
    assert f": {field}: " in message, message
    for word in words:
        assert word in message, message
    return message


@pytest.mark.parametrize("entry, field, words", [
    ("{shape: circle, radius: 1.0e308, mu: 1 /mm}", "radius", ("larger than 100 m",)),
    ("{shape: circle, radius: 1.0e-6, mu: 1 /mm}", "radius", ("smaller than 10 nm",)),
    ("{shape: circle, radius: '200 m', mu: 1 /mm}", "radius", ("larger than 100 m",)),
    ("{shape: circle, radius: 1, centre: [1.0e308, 0], mu: 1 /mm}", "centre[0]", ("100 m",)),
    ("{shape: ellipse, semi_axes: [1, 1.0e9], mu: 1 /mm}", "semi_axes[1]", ("100 m",)),
    ("{shape: rectangle, size: [1.0e-300, 1], mu: 1 /mm}", "size[0]", ("10 nm",)),
    ("{shape: circle, radius: 1, angle: 1.0e300, mu: 1 /mm}", "angle", ("more than a turn",)),
    ("{shape: circle, radius: 1, angle: 361, mu: 1 /mm}", "angle", ("-360 to 360",)),
    ("{shape: circle, radius: 1, mu: 1.0e308 /mm}", "mu", ("beyond any material",)),
    ("{shape: circle, radius: 1, mu: -0.01 /mm}", "mu", ("negative", "mode: add")),
    ("{shape: circle, radius: 1, mu: 1 /mm, name: \"a\\x00b\"}", "name", ("control character",)),
    ("{shape: polygon, vertices: [[0, 0], [1.0e300, 0], [0, 1]], mu: 1 /mm}", "vertices[1][0]",
     ("100 m",)),
    ("{shape: polygon, vertices: [[0, 0], [1.0e-9, 0], [0, 1.0e-9]], mu: 1 /mm}", "vertices",
     ("across",)),
    ("{bars: {line_pairs_per_mm: 1.0e300, count: 3, length: 2, mu: 1 /mm}}",
     "bars.line_pairs_per_mm", ("5e-06 to 50000 lp/mm",)),
    ("{bars: {line_pairs_per_mm: 1, count: 3, length: 1.0e300, mu: 1 /mm}}", "bars.length",
     ("100 m",)),
    ("{ring: {radius: 1.0e300, count: 3, object: {shape: circle, radius: 1, mu: 1 /mm}}}",
     "ring.radius", ("100 m",)),
    ("{ring: {radius: 5, count: 3, start_angle: -720, object: {shape: circle, radius: 1, "
     "mu: 1 /mm}}}", "ring.start_angle", ("more than a turn",)),
    ("{array: {count: 3, step: [1.0e308, 0], object: {shape: circle, radius: 1, mu: 1 /mm}}}",
     "array.step[0]", ("step",)),
    ("{group: {centre: [0, -1.0e6], objects: [{shape: circle, radius: 1, mu: 1 /mm}]}}",
     "group.centre[1]", ("100 m",)),
])
def test_two_d_values_out_of_range(entry, field, words):
    refused(HEAD2 + f"  - {entry}\n", line=4, field=f"objects[0].{field}", words=words)


@pytest.mark.parametrize("entry, field, words", [
    ("{shape: sphere, radius: 1, rotate: [z: 400], mu: 1 /mm}", "rotate[0].z",
     ("more than a turn",)),
    ("{shape: box, size: [1, 2, 1.0e300], mu: 1 /mm}", "size[2]", ("100 m",)),
    ("{shape: cylinder, radius: 1, height: 2, axis: [1.0e308, 1.0e308, 0], mu: 1 /mm}",
     "axis[0]", ("axis component",)),
    ("{shape: cone, base_radius: 1.0e-320, top_radius: 0, height: 1, mu: 1 /mm}",
     "base_radius", ("10 nm",)),
    ("{bars: {line_pairs_per_mm: 1, count: 3, length: 2, thickness: 0.000001, mu: 1 /mm}}",
     "bars.thickness", ("10 nm",)),
])
def test_three_d_values_out_of_range(entry, field, words):
    refused(HEAD3 + f"  - {entry}\n", line=4, field=f"objects[0].{field}", words=words)


@pytest.mark.parametrize("entry", [
    "{shape: circle, radius: 1.0e-5, mu: 1 /mm}",            # the smallest size
    "{shape: circle, radius: '100 m', centre: [0, 0], mu: 1 /mm}",  # the largest size
    "{shape: circle, radius: 1, centre: [-1.0e5, 1.0e5], mu: 1 /mm}",  # the farthest coordinate
    "{shape: circle, radius: 1, angle: -360, mu: 1 /mm}",     # a whole turn back
    "{shape: circle, radius: 1, mu: 1.0e5 /mm}",              # the largest mu
    "{shape: circle, radius: 1, mu: -1.0e5 /mm, mode: add}",  # add objects may subtract
    "{bars: {line_pairs_per_mm: 50000, count: 3, length: 1, mu: 1 /mm}}",  # bars 1e-5 mm wide
    "{shape: circle, radius: 1, mu: 1 /mm, name: 'écrou ☃ 試料'}",  # any language
])
def test_values_at_the_ends_of_their_ranges_are_accepted(entry):
    assert parse_phantom_text(HEAD2 + f"  - {entry}\n").objects.count >= 1


def test_negative_mu_is_refused_for_bars_that_replace():
    refused(HEAD2 + "  - {bars: {line_pairs_per_mm: 1, count: 3, length: 2, mu: -1 /mm}}\n",
            line=4, field="objects[0].bars.mu", words=("negative",))


def test_placed_object_beyond_one_kilometre_is_refused_at_the_object():
    # 21 copies 1e5 mm apart reach (21 - 1) / 2 * 1e5 = 1e6 mm, plus the radius 1 mm
    text = HEAD2 + ("  - array:\n      count: 21\n      step: [1.0e5, 0]\n"
                    "      object: {shape: circle, radius: 1, mu: 1 /mm}\n")
    refused(text, line=7, field="objects[0].array.object", words=("1e+06 mm", "reaches"))


@pytest.mark.parametrize("material, field, words", [
    ("{formula: H2O, density: 1.0e300}", "density", ("at most 30 g/cm3",)),
    ("{formula: H2O, density: 31}", "density", ("at most 30",)),
    ("{formula: H2O, density: 0}", "density", ("greater than 0",)),
    ("{mass_fractions: {H: 1.0e300}, density: 1}", "mass_fractions.H", ("at most 1",)),
])
def test_custom_material_numbers_out_of_range(material, field, words):
    refused(f"name: t\ndimension: 2\nmaterials:\n  gel: {material}\nobjects:\n"
            "  - {shape: circle, radius: 1, material: gel}\n", line=4,
            field=f"materials.gel.{field}", words=words)


def test_osmium_density_is_accepted():
    # osmium, 22.59 g/cm3, the densest element (fact of the trade)
    phantom = parse_phantom_text("name: t\ndimension: 2\nmaterials:\n  os: {formula: Os, "
                                 "density: 22.59}\nobjects:\n  - {shape: circle, radius: 1, "
                                 "material: os}\n")
    assert phantom.materials[0].density_g_cm3 == pytest.approx(22.59)


@pytest.mark.parametrize("top, field, words", [
    ("name: t\ndimension: 2\ndescription: [1, 2]\n", "description", ("expected text",)),
    ("name: \"\\x07\"\ndimension: 2\n", "name", ("control character",)),
    ("name: '  '\ndimension: 2\n", "name", ("empty",)),
])
def test_top_level_text(top, field, words):
    text = top + "objects:\n  - {shape: circle, radius: 1, mu: 1 /mm}\n"
    with pytest.raises(InputError) as info:
        parse_phantom_text(text, "bad.yaml")
    assert f"bad.yaml:" in str(info.value) and f" {field}: " in str(info.value)
    for word in words:
        assert word in str(info.value)


def test_description_may_span_lines():
    text = ("name: t\ndimension: 2\ndescription: |\n  first line\n  second line\n"
            "objects:\n  - {shape: circle, radius: 1, mu: 1 /mm}\n")
    assert parse_phantom_text(text).objects.count == 1


VOX = "name: v\ndimension: 2\nvoxels:\n  file: v.npy\n  voxel_size: {size}\n{extra}"


def load_voxels(tmp_path, volume, size="1", extra="  mu_unit: /mm\n"):
    np.save(tmp_path / "v.npy", volume)
    path = tmp_path / "bad.yaml"
    path.write_text(VOX.format(size=size, extra=extra))
    return load_phantom(path)


@pytest.mark.parametrize("size, field, words", [
    ("1.0e300", "voxels.voxel_size", ("100 m",)),
    ("[1, 1.0e-9]", "voxels.voxel_size[1]", ("10 nm",)),
    # 40 x 40 voxels of 100 m: corners at hypot(2e6, 2e6) = 2.8e6 mm from the centre
    ("1.0e5", "voxels.voxel_size", ("reaches",)),
])
def test_voxel_sizes_out_of_range(tmp_path, size, field, words):
    with pytest.raises(InputError) as info:
        load_voxels(tmp_path, np.zeros((40, 40)), size)
    message = str(info.value)
    assert f":5:" in message and f" {field}: " in message, message
    for word in words:
        assert word in message, message


def test_mu_volume_beyond_any_material(tmp_path):
    volume = np.zeros((3, 3))
    volume[2, 1] = 1e300
    with pytest.raises(InputError) as info:
        load_voxels(tmp_path, volume)
    assert "voxels.file" in str(info.value) and "(2, 1)" in str(info.value)


@pytest.mark.parametrize("value", [-1, 65536, 2**62])
def test_labels_out_of_range(tmp_path, value):
    volume = np.zeros((3, 3), np.int64)
    volume[1, 1] = value
    with pytest.raises(InputError) as info:
        load_voxels(tmp_path, volume, extra="  labels: {1: water}\n")
    assert "voxels.file" in str(info.value) and "0 to 65535" in str(info.value)


def test_label_table_key_out_of_range(tmp_path):
    with pytest.raises(InputError) as info:
        load_voxels(tmp_path, np.ones((3, 3), np.uint16), extra="  labels: {70000: water}\n")
    assert "voxels.labels.70000" in str(info.value) and "<= 65535" in str(info.value)


def test_largest_label_is_accepted(tmp_path):
    volume = np.zeros((3, 3), np.uint16)
    volume[0, 0] = 65535
    phantom = load_voxels(tmp_path, volume, extra="  labels: {65535: water}\n")
    assert phantom.voxels.values[0, 0, 0] == 65535
