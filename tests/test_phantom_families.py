"""Phantom families: plain files as families of one, drawn samples, determinism, bad input.

Expected values are closed forms (the mean of a uniform, truncated normal or discrete uniform
distribution; geometric non-overlap and containment) or facts of the trade named beside them.
"""

from __future__ import annotations

import numpy as np
import pytest

from simbench.phantom import load_phantom, shipped_phantom_path
from simbench.phantom.families import load_family


def test_plain_phantom_is_a_family_of_one():
    family = load_family("shepp-logan")
    assert not family.is_random and family.dimension == 2 and family.name == "shepp-logan"
    reference = load_phantom(shipped_phantom_path("shepp-logan"))
    for index in (0, 5):
        phantom, parameters = family.sample(3, index)
        assert parameters == {}
        assert phantom.object_names == reference.object_names
        np.testing.assert_array_equal(phantom.objects.centre, reference.objects.centre)


def test_plain_phantom_by_path(tmp_path):
    path = tmp_path / "one.yaml"
    path.write_text("name: one\ndimension: 2\nobjects:\n"
                    "  - {shape: circle, radius: 10, material: water, roi: true, name: w}\n")
    family = load_family(path)
    phantom, parameters = family.sample(0, 0)
    assert (family.name, family.source, parameters) == ("one", str(path), {})
    assert phantom.roi_names == ("w",)


# -- helpers ---------------------------------------------------------------------------------

import json
import math
import subprocess
import sys
import warnings

from scipy import stats

from simbench.errors import InputError, Where
from simbench.phantom import placement
from simbench.phantom.distributions import read_draw
from simbench.phantom.placement import ellipse_clearance
from simbench.spec import check_number, parse_yaml_text

DEMO = "random-inserts"


def family_from_text(tmp_path, text, name="f.yaml"):
    path = tmp_path / name
    path.write_text(text)
    return load_family(path)


def fingerprint(phantom, parameters) -> str:
    """Every array of the compiled phantom and the parameters, as one comparable text."""
    o = phantom.objects
    arrays = [o.shape, o.centre, o.rotation, o.half_sizes, o.material, o.roi_label]
    return json.dumps([parameters, list(phantom.roi_names),
                       [m.name for m in phantom.materials],
                       [m.density_g_cm3 for m in phantom.materials],
                       [a.tobytes().hex() for a in arrays]])


# -- distributions ---------------------------------------------------------------------------


def draws(text: str, n: int = 20000, **kwargs):
    node = parse_yaml_text(f"v: {text}")["v"]
    draw = read_draw(node, Where("t"), lambda v, w: check_number(v, w), **kwargs)
    rng = np.random.default_rng(12)
    return np.array([draw.draw(rng) for _ in range(n)], dtype=float)


def test_uniform_mean_and_bounds():
    x = draws("{uniform: [2, 10]}")
    # closed form: mean (a+b)/2 = 6, sd (b-a)/sqrt(12); 5 standard errors
    assert abs(x.mean() - 6.0) < 5 * (8 / math.sqrt(12)) / math.sqrt(x.size)
    assert x.min() >= 2 and x.max() <= 10


def test_log_uniform_mean():
    x = draws("{log_uniform: [1, 100]}")
    # closed form: mean of a log-uniform on [a, b] is (b - a) / ln(b / a)
    mean = 99 / math.log(100)
    sd = math.sqrt((100**2 - 1) / (2 * math.log(100)) - mean**2)  # E[x^2] = (b^2-a^2)/(2 ln(b/a))
    assert abs(x.mean() - mean) < 5 * sd / math.sqrt(x.size)


def test_truncated_normal_mean():
    x = draws("{normal: [0, 1], within: [-0.5, 2]}", n=3000)  # scipy's inverse is slow
    # closed form: mean of a normal cut to [a, b] is (phi(a) - phi(b)) / (Phi(b) - Phi(a))
    # (pdf and cdf from scipy.stats.norm)
    a, b = -0.5, 2.0
    mean = (stats.norm.pdf(a) - stats.norm.pdf(b)) / (stats.norm.cdf(b) - stats.norm.cdf(a))
    assert abs(x.mean() - mean) < 5 * 1.0 / math.sqrt(x.size)
    assert x.min() >= a and x.max() <= b


def test_integers_and_weighted_choice():
    k = draws("{integers: [3, 6]}", integer=True)
    # closed form: discrete uniform on 3..6 has mean 4.5 and variance (4^2 - 1)/12
    assert set(np.unique(k)) == {3, 4, 5, 6}
    assert abs(k.mean() - 4.5) < 5 * math.sqrt(15 / 12) / math.sqrt(k.size)
    c = draws("{choice: [1, 2], weights: [3, 1]}")
    # the weights 3:1 give the first choice a probability of 0.75 (binomial standard error)
    assert abs(np.mean(c == 1) - 0.75) < 5 * math.sqrt(0.75 * 0.25 / c.size)


def test_ellipse_clearance_against_dense_outline():
    # reference: the smallest distance to 100 001 points of the outline (their spacing, at
    # most 2*pi*120/1e5 = 8e-3 mm, puts the reference within about 1e-5 mm, the sagitta)
    rng = np.random.default_rng(5)
    for a, b in [(120, 15), (40, 60), (30, 30)]:
        t = np.linspace(0, 2 * np.pi, 100001)
        pts = (2 * rng.random((80, 2)) - 1) * [a, b]
        pts[:5, 1] = 0.0  # on the major or minor axis: closed forms in the code
        pts[5:10, 0] = 0.0
        inside = (pts[:, 0] / a) ** 2 + (pts[:, 1] / b) ** 2 <= 1
        got = ellipse_clearance(pts[:, 0], pts[:, 1], a, b)
        ref = np.array([np.hypot(a * np.cos(t) - x, b * np.sin(t) - y).min() for x, y in pts])
        np.testing.assert_allclose(got[inside], ref[inside], atol=2e-5)
        assert np.all(got[~inside] < 0)


# -- samples ---------------------------------------------------------------------------------


def test_demo_family_samples_are_apart_and_inside_the_body():
    family = load_family(DEMO)
    assert family.is_random and family.dimension == 2
    for index in range(12):
        phantom, parameters = family.sample(7, index)
        json.dumps(parameters)  # serialisable
        body = parameters["body"]
        a, b = (h - body["fat_layer_mm"] for h in body["half_sizes_mm"])
        assert 140 <= body["half_sizes_mm"][0] <= 190 and 100 <= body["half_sizes_mm"][1] <= 135
        objs = parameters["objects"]
        low = [o for o in objs if o["name"].startswith("low")]
        high = [o for o in objs if o["name"].startswith("high")]
        assert 3 <= len(low) <= 6 and 1 <= len(high) <= 3
        centres = np.array([o["centre_mm"] for o in objs])
        radii = np.array([max(o["half_sizes_mm"]) for o in objs])  # circles and ellipses
        # containment, checked on 720 points of each object's circle against the implicit
        # equation of the inner body ellipse
        t = np.linspace(0, 2 * np.pi, 720, endpoint=False)
        for c, r in zip(centres, radii):
            x, y = c[0] + r * np.cos(t), c[1] + r * np.sin(t)
            assert np.all((x / a) ** 2 + (y / b) ** 2 <= 1 + 1e-12)
        # apart by the gap (5 mm), and clear of the fixed 10 mm centre disc
        d = np.hypot(*(centres[:, None, :] - centres[None, :, :]).transpose(2, 0, 1))
        need = radii[:, None] + radii[None, :] + 5.0
        off = ~np.eye(len(radii), dtype=bool)
        assert np.all(d[off] >= need[off] - 1e-9)
        assert np.all(np.hypot(centres[:, 0], centres[:, 1]) >= radii + 10.0 + 5.0 - 1e-9)
        # every drawn object is a ROI named as the file asks
        assert phantom.roi_names == ("centre water",) + tuple(o["name"] for o in objs)


def test_sample_does_not_depend_on_order():
    family = load_family(DEMO)
    forward = {i: fingerprint(*family.sample(11, i)) for i in (1, 3, 5)}
    backward = {i: fingerprint(*family.sample(11, i)) for i in (5, 3, 1)}
    assert forward == backward
    assert len(set(forward.values())) == 3
    assert fingerprint(*family.sample(12, 1)) != forward[1]


def test_sample_is_the_same_in_another_process():
    family = load_family("random-spheres-3d")
    here = fingerprint(*family.sample(4, 2))
    code = ("import sys; sys.path.insert(0, %r); from test_phantom_families import fingerprint;"
            "from simbench.phantom.families import load_family;"
            "print(fingerprint(*load_family('random-spheres-3d').sample(4, 2)))"
            % str(__import__("pathlib").Path(__file__).parent))
    there = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                           check=True).stdout.strip()
    assert there == here


def test_3d_family_rotations_are_proper():
    phantom, parameters = load_family("random-spheres-3d").sample(0, 3)
    for o in parameters["objects"]:
        r = np.array(o["rotation"])
        np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-12)  # orthonormal
        assert np.linalg.det(r) == pytest.approx(1.0)  # a rotation, not a reflection
    assert phantom.dimension == 3 and len(phantom.roi_names) == len(parameters["objects"])


def test_load_phantom_of_a_family_is_sample_zero_of_seed_zero():
    family = load_family(DEMO)
    assert fingerprint(load_phantom(shipped_phantom_path(DEMO)), {}) == fingerprint(
        family.sample(0, 0)[0], {})


# -- bad input -------------------------------------------------------------------------------

BODY = """name: f
dimension: 2
random:
  body: {shape: circle, radius: 100, material: water}
  objects:
    - {count: %s, radius: %s, material: muscle%s}
"""


@pytest.mark.parametrize("count, radius, extra, field, fragment", [
    ("3", "{gauss: [1, 2]}", "", "radius", "unknown distribution 'gauss'"),
    ("3", "{uniform: [12, 4]}", "", "radius.uniform", "low 12 is above high 4"),
    ("3", "{uniform: ['4 kg', 8]}", "", "radius.uniform[0]", "unknown length unit 'kg'"),
    ("3", "{normal: [8, 2]}", "", "radius.within", "missing required field"),
    ("{uniform: [1, 3]}", "5", "", "count.uniform", "cannot be used here"),
    ("3", "5", ", shape: hexagon", "shape", "unknown shape 'hexagon'"),
    ("3", "5", ", avoid: [spine]", "avoid[0]", "no fixed object is named 'spine'"),
    # 40 discs of radius >= 15 mm (grown by half a 2 mm gap) cover 41 % of ... no: 40 * pi *
    # 16^2 / (pi * 100^2) = 102 % of the disc, beyond any random placement
    ("40", "{uniform: [15, 20]}", ", gap: 2", "count", "covers 102 %"),
    ("1", "120", "", "radius", "cannot fit in its region"),
])
def test_bad_random_section_is_one_located_line(tmp_path, count, radius, extra, field,
                                                fragment):
    if "shape" not in extra:
        extra += ", shape: circle"
    with pytest.raises(InputError) as caught:
        family_from_text(tmp_path, BODY % (count, radius, extra))
    text = str(caught.value)
    assert "\n" not in text and text.startswith(str(tmp_path / "f.yaml") + ":6:")
    assert f"random.objects[0].{field}" in text and fragment in text


def test_unknown_drawn_material_is_located(tmp_path):
    text = BODY.replace("muscle", "{choice: [muscle, unobtainium]}") % ("3", "5", ", shape: circle")
    with pytest.raises(InputError, match=r"f.yaml:6:\d+: random.objects\[0\].material.choice\[1\]"
                       ": unknown material 'unobtainium'"):
        family_from_text(tmp_path, text)


def test_random_section_with_voxels_is_refused(tmp_path):
    text = ("name: f\ndimension: 2\nvoxels: {labels: x.npy, voxel_size: 1, materials: {}}\n"
            "random: {objects: []}\n")
    with pytest.raises(InputError, match=r"f.yaml:4:9: random: a voxel phantom"):
        family_from_text(tmp_path, text)


def test_drawn_counts_are_costed_before_drawing(tmp_path):
    sets = "\n".join(f"    - {{count: 10000, shape: circle, radius: 0.001, material: water,"
                     f" apart: false, region: {{shape: circle, radius: 100}}}}"
                     for _ in range(11))
    with pytest.raises(InputError, match=r"objects\[10\]\.count: the phantom may hold 110,000"):
        family_from_text(tmp_path, f"name: f\ndimension: 2\nrandom:\n  objects:\n{sets}\n")


def test_bad_luck_ends_in_a_clear_error(tmp_path, monkeypatch):
    # feasible by the coverage bound at the smallest draw (1 disc), hopeless at the largest
    # (30 discs of 30 mm in a 100 mm disc), and given only one batch of candidates
    monkeypatch.setattr(placement, "MAX_ATTEMPTS", placement.BATCH)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        family = family_from_text(tmp_path, BODY % ("{integers: [1, 30]}", "30",
                                                    ", shape: circle"))
    assert any("some samples may" in str(w.message) for w in caught)
    for index in range(20):
        try:
            family.sample(0, index)
        except InputError as error:
            assert f"sample {index} of seed 0" in str(error) and "found no place" in str(error)
            assert "random.objects[0].count" in str(error)
            break
    else:
        pytest.fail("30 discs of 30 mm were placed in a 100 mm disc")


def test_seed_and_index_must_be_whole_numbers():
    family = load_family("shepp-logan")
    with pytest.raises(ValueError, match="index"):
        family.sample(0, -1)
