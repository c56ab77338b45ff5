"""Every bad phantom input is one InputError line naming file, line, column and field.

The line numbers below are those of the YAML texts written by each test (counted by hand).
"""

from __future__ import annotations

import numpy as np
import pytest

from simbench.errors import InputError
from simbench.phantom import load_phantom


def fails(tmp_path, text: str, *, line: int | None, field: str, words: tuple = ()) -> str:
    """Write ``text`` as a phantom file, load it, and check the error's one line."""
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        load_phantom(path)
    message = str(info.value)
    assert "\n" not in message
    assert "bad.yaml" in message
    if line is not None:
        assert f"bad.yaml:{line}:" in message, message
    assert field in message, message
    for word in words:
        assert word in message, message
    return message


HEAD2 = "name: t\ndimension: 2\nobjects:\n"   # objects start on line 4
HEAD3 = "name: t\ndimension: 3\nobjects:\n"


def test_yaml_syntax_error(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: circle\n    radius: 3: 4\n    mu: 1 /mm\n", line=5,
          field="", words=("YAML syntax error", "mapping values"))


def test_unknown_shape_suggests_close_name(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: circel\n    radius: 3\n    mu: 1 /mm\n", line=4,
          field="objects[0].shape", words=("circel", "'circle'", "polygon"))


def test_missing_field(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: circle\n    mu: 1 /mm\n", line=4,
          field="objects[0].radius", words=("missing",))


def test_missing_top_level_field(tmp_path):
    fails(tmp_path, "name: t\nobjects: []\n", line=1, field="dimension", words=("missing",))


def test_unknown_field(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: circle\n    radius: 3\n    colour: red\n    mu: 1 /mm\n",
          line=6, field="objects[0].colour", words=("unknown field",))


def test_unknown_field_in_a_pattern(tmp_path):
    fails(tmp_path, HEAD2 + "  - ring:\n      radius: 10\n      count: 3\n      spokes: 2\n"
          "      object: {shape: circle, radius: 1, mu: 1 /mm}\n", line=7,
          field="objects[0].ring.spokes", words=("unknown field",))


@pytest.mark.parametrize("value", ["0", "-3", "'-2 cm'"])
def test_zero_or_negative_size(tmp_path, value):
    fails(tmp_path, HEAD2 + f"  - shape: circle\n    radius: {value}\n    mu: 1 /mm\n", line=5,
          field="objects[0].radius", words=("must be > 0",))


def test_negative_size_in_a_list(tmp_path):
    fails(tmp_path, HEAD3 + "  - shape: box\n    size: [1, -2, 3]\n    mu: 1 /mm\n", line=5,
          field="objects[0].size[1]", words=("must be > 0",))


def test_mu_without_units(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: circle\n    radius: 3\n    mu: 0.02\n", line=6,
          field="objects[0].mu", words=("no units", "/mm"))


def test_unknown_material_suggests_close_names(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: circle\n    radius: 3\n    material: watr\n", line=6,
          field="objects[0].material", words=("unknown material 'watr'", "'water'"))


def test_three_d_shape_in_two_d_phantom(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: sphere\n    radius: 3\n    mu: 1 /mm\n", line=4,
          field="objects[0].shape", words=("3-D", "circle"))


def test_two_d_shape_in_three_d_phantom(tmp_path):
    fails(tmp_path, HEAD3 + "  - shape: circle\n    radius: 3\n    mu: 1 /mm\n", line=4,
          field="objects[0].shape", words=("2-D", "sphere"))


@pytest.mark.parametrize("field, value, line", [
    ("radius", ".nan", 5), ("radius", ".inf", 5), ("radius", "'inf mm'", 5),
    ("mu", "'nan /mm'", 6), ("centre", "[0, .nan]", 7), ("angle", ".inf", 8)])
def test_nan_or_inf(tmp_path, field, value, line):
    values = {"radius": "3", "mu": "1 /mm", "centre": "[0, 0]", "angle": "0"}
    values[field] = value
    text = HEAD2 + "  - shape: circle\n" + "".join(
        f"    {k}: {values[k]}\n" for k in ("radius", "mu", "centre", "angle"))
    fails(tmp_path, text, line=line, field=f"objects[0].{field}", words=("finite",))


def test_nan_in_bars_frequency(tmp_path):
    fails(tmp_path, HEAD2 + "  - bars: {line_pairs_per_mm: .nan, count: 3, length: 5,"
          " mu: 1 /mm}\n", line=4, field="objects[0].bars.line_pairs_per_mm", words=("finite",))


def test_missing_phantom_file(tmp_path):
    with pytest.raises(InputError) as info:
        load_phantom(tmp_path / "nowhere.yaml")
    assert "nowhere.yaml" in str(info.value) and "not found" in str(info.value)
    assert "\n" not in str(info.value)


def test_self_intersecting_polygon(tmp_path):
    fails(tmp_path, HEAD2 + "  - shape: polygon\n    vertices: [[0, 0], [10, 10], [10, 0], [0, 10]]\n"
          "    mu: 1 /mm\n", line=5, field="objects[0].vertices", words=("intersects itself",))


def test_material_and_mu_together(tmp_path):
    fails(tmp_path, HEAD2 + "  - {shape: circle, radius: 3, mu: 1 /mm, material: water}\n",
          line=4, field="objects[0].material", words=("exactly one",))


def test_bad_custom_material(tmp_path):
    fails(tmp_path, "name: t\ndimension: 2\nmaterials:\n  gel: {formula: Xq2, density: 1}\n"
          "objects:\n  - {shape: circle, radius: 3, material: gel}\n", line=4,
          field="materials.gel.formula", words=("Xq2",))


VOX = "name: v\ndimension: 2\nvoxels:\n  file: {file}\n  voxel_size: 1\n{extra}"


def test_missing_npy(tmp_path):
    fails(tmp_path, VOX.format(file="absent.npy", extra="  mu_unit: /mm\n"), line=4,
          field="voxels.file", words=("not found",))


def test_wrong_npy_dtype_for_labels(tmp_path):
    np.save(tmp_path / "v.npy", np.zeros((3, 3), np.float32))
    fails(tmp_path, VOX.format(file="v.npy", extra="  labels: {1: water}\n"), line=4,
          field="voxels.file", words=("integers", "float32"))


def test_wrong_npy_dtype_for_mu(tmp_path):
    np.save(tmp_path / "v.npy", np.zeros((3, 3), np.int16))
    fails(tmp_path, VOX.format(file="v.npy", extra="  mu_unit: /mm\n"), line=4,
          field="voxels.file", words=("floating-point",))


def test_wrong_npy_shape(tmp_path):
    np.save(tmp_path / "v.npy", np.zeros((2, 3, 3), np.float64))
    fails(tmp_path, VOX.format(file="v.npy", extra="  mu_unit: /mm\n"), line=4,
          field="voxels.file", words=("(2, 3, 3)", "(ny, nx)"))


def test_nan_in_mu_volume(tmp_path):
    volume = np.zeros((3, 3))
    volume[1, 2] = np.nan
    np.save(tmp_path / "v.npy", volume)
    fails(tmp_path, VOX.format(file="v.npy", extra="  mu_unit: /mm\n"), line=4,
          field="voxels.file", words=("NaN", "(1, 2)"))


def test_labels_without_a_material(tmp_path):
    volume = np.zeros((3, 3), np.int32)
    volume[0, 0], volume[1, 1] = 1, 3
    np.save(tmp_path / "v.npy", volume)
    fails(tmp_path, VOX.format(file="v.npy", extra="  labels: {1: water}\n"), line=6,
          field="voxels.labels", words=("label 3", "no material"))


def test_unknown_material_in_label_table(tmp_path):
    np.save(tmp_path / "v.npy", np.ones((3, 3), np.int32))
    fails(tmp_path, VOX.format(file="v.npy", extra="  labels: {1: bone}\n"), line=6,
          field="voxels.labels.1", words=("unknown material 'bone'",))
