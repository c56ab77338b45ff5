"""What a phantom expands to is counted before it is expanded, and refused when too large.

Counts below are arithmetic on the test's own documents (a group of ten copies of a group of
ten copies ... has 10^k objects at level k); the limits are the documented constants of
simbench/phantom/expansion.py (docs/phantom-language.md, "Limits").
"""

from __future__ import annotations

import numpy as np
import pytest

from simbench import budget
from simbench.errors import InputError
from simbench.phantom import parse_phantom_text
from simbench.phantom.expansion import MAX_NESTING, MAX_OBJECTS, MAX_VERTICES

CIRCLE = "{shape: circle, radius: 0.1, mu: 1 /mm}"


def refused(text: str, *, line: int | None, field: str, words: tuple = ()) -> str:
    with pytest.raises(InputError) as info:
        parse_phantom_text(text, "bad.yaml")
    message = str(info.value)
    assert "\n" not in message
    if line is not None:
        assert message.startswith(f"bad.yaml:{line}:"), message
    assert f": {field}: " in message, message
    for word in words:
        assert word in message, message
    return message


def alias_bomb(levels: int) -> str:
    """Level k is a group of ten aliases of level k - 1: 10^k circles, in a few hundred bytes."""
    lines = ["name: bomb", "dimension: 2", "objects:", f"  - group: &a0 {{objects: [{CIRCLE}]}}"]
    for k in range(1, levels):
        copies = ", ".join([f"{{group: *a{k - 1}}}"] * 10)
        lines.append(f"  - group: &a{k} {{objects: [{copies}]}}")
    return "\n".join(lines) + "\n"


def test_alias_bomb_is_refused_at_the_first_group_over_the_limit():
    text = alias_bomb(10)
    assert len(text) < 3000
    # level k holds 10^k circles; the document 1 + 10 + ... + 10^9 = 1,111,111,111 (arithmetic).
    # The first level over 100,000 is level 6 (10^6), written on line 4 + 6 = 10.
    refused(text, line=10, field="objects[6].group.objects",
            words=("1,000,000 objects", "1,111,111,111", f"limit of {MAX_OBJECTS:,}"))


def test_array_of_arrays_is_refused_at_the_outer_count():
    text = ("name: t\ndimension: 2\nobjects:\n  - array:\n      count: 100000\n      step: [1, 0]\n"
            f"      object: {{array: {{count: 100000, step: [0, 1], object: {CIRCLE}}}}}\n")
    # 100,000 x 100,000 = 10^10 objects (arithmetic); the outer count is on line 5
    refused(text, line=5, field="objects[0].array.count",
            words=("100,000 copies of 100,000 objects", "10,000,000,000"))


def test_entries_each_under_the_limit_are_refused_together():
    half = MAX_OBJECTS // 2 + 1
    entry = f"  - array: {{count: {half}, step: [0.001, 0], object: {CIRCLE}}}\n"
    # the place of a list is where its first entry starts (line 4)
    refused("name: t\ndimension: 2\nobjects:\n" + entry * 2, line=4, field="objects",
            words=(f"{2 * half:,} objects in all",))


def test_exactly_the_limit_is_a_valid_phantom():
    text = (f"name: t\ndimension: 2\nobjects:\n  - array: {{count: {MAX_OBJECTS}, "
            f"step: [0.001, 0], object: {{shape: circle, radius: 0.1, mu: 1 /mm, name: c}}}}\n")
    phantom = parse_phantom_text(text)
    assert phantom.objects.count == MAX_OBJECTS
    assert phantom.object_names[-1] == f"c {MAX_OBJECTS}"
    # copy k at (k - (n - 1)/2) * step (docs/phantom-language.md, array)
    assert phantom.objects.centre[-1, 0] == pytest.approx((MAX_OBJECTS - 1) / 2 * 0.001)


def test_polygon_vertices_are_counted_through_copies():
    many = ", ".join(f"[{np.cos(t):.6f}, {np.sin(t):.6f}]"
                     for t in np.linspace(0, 2 * np.pi, 20, endpoint=False))
    copies = MAX_VERTICES // 20 + 1  # 20 vertices each: just over the vertex limit
    assert copies <= MAX_OBJECTS
    text = (f"name: t\ndimension: 2\nobjects:\n  - ring: {{radius: 50, count: {copies}, "
            f"object: {{shape: polygon, vertices: [{many}], mu: 1 /mm}}}}\n")
    refused(text, line=4, field="objects[0].ring.count",
            words=(f"{copies * 20:,} polygon vertices", f"limit of {MAX_VERTICES:,}"))


def test_one_polygon_with_too_many_vertices(monkeypatch):
    # the limit is lowered for the test: YAML text of 10,000 vertices takes seconds to read
    from simbench.phantom import language

    monkeypatch.setattr(language, "MAX_POLYGON_VERTICES", 10)
    vertices = ", ".join(f"[{np.cos(t):.9f}, {np.sin(t):.9f}]"
                         for t in np.linspace(0, 2 * np.pi, 11, endpoint=False))
    refused(f"name: t\ndimension: 2\nobjects:\n  - {{shape: polygon, vertices: [{vertices}], "
            "mu: 1 /mm}\n", line=4, field="objects[0].vertices",
            words=("11 vertices", "at most 10"))


def alias_chain(levels: int) -> str:
    """Entry k is a group holding entry k - 1 (by alias): entry k nests k groups deep."""
    lines = ["name: t", "dimension: 2", "objects:", f"  - &a0 {CIRCLE}"]
    lines += [f"  - &a{k} {{group: {{objects: [*a{k - 1}]}}}}" for k in range(1, levels + 1)]
    return "\n".join(lines) + "\n"


def test_nesting_up_to_the_limit_is_read():
    phantom = parse_phantom_text(alias_chain(MAX_NESTING))
    assert phantom.objects.count == MAX_NESTING + 1  # entries 0..MAX_NESTING, one circle each


def test_nesting_beyond_the_limit_is_refused_through_aliases():
    # entry MAX_NESTING + 1 (line 4 + MAX_NESTING + 1) holds a group MAX_NESTING deep, written
    # where its anchor stands (line 4 + MAX_NESTING)
    refused(alias_chain(MAX_NESTING + 1), line=4 + MAX_NESTING,
            field=f"objects[{MAX_NESTING + 1}].group.objects[0]", words=("nest more than",))


def test_thousand_deep_alias_chain_is_refused_quickly():
    refused(alias_chain(1000), line=4 + MAX_NESTING,
            field=f"objects[{MAX_NESTING + 1}].group.objects[0]", words=("nest more than",))


@pytest.fixture
def small_budget():
    budget.set_memory_budget(2**20)  # 1 MiB, the smallest budget the command line accepts
    yield
    budget.set_memory_budget(None)


def test_memory_budget_is_checked_before_expanding(small_budget):
    # 5000 objects x BYTES_PER_OBJECT (1000 B) = about 4.8 MiB > 1 MiB
    refused("name: t\ndimension: 2\nobjects:\n"
            f"  - ring: {{radius: 10, count: 5000, object: {CIRCLE}}}\n", line=4,
            field="objects[0].ring.count", words=("5,000 copies of 1 object", "memory",
                                                  "over the budget", "--memory-budget"))


def test_small_phantom_fits_a_small_budget(small_budget):
    assert parse_phantom_text("name: t\ndimension: 2\nobjects:\n"
                              f"  - ring: {{radius: 10, count: 50, object: {CIRCLE}}}\n"
                              ).objects.count == 50


def test_aliased_entries_compile_like_written_out_copies():
    shared = ("name: t\ndimension: 3\nobjects:\n"
              "  - &g {group: {centre: [5, 0, 0], rotate: [z: 30], objects: [\n"
              "      {shape: box, size: [1, 2, 3], mu: 1 /mm, roi: true, name: b},\n"
              "      {ring: {radius: 4, count: 3, turn_copies: true, object: "
              "{shape: sphere, radius: 1, material: water, name: s}}}]}}\n"
              "  - {ring: {radius: 20, count: 2, object: *g}}\n")
    written = ("name: t\ndimension: 3\nobjects:\n"
               "  - {group: {centre: [5, 0, 0], rotate: [z: 30], objects: [\n"
               "      {shape: box, size: [1, 2, 3], mu: 1 /mm, roi: true, name: b},\n"
               "      {ring: {radius: 4, count: 3, turn_copies: true, object: "
               "{shape: sphere, radius: 1, material: water, name: s}}}]}}\n"
               "  - {ring: {radius: 20, count: 2, object: {group: {centre: [5, 0, 0], "
               "rotate: [z: 30], objects: [\n"
               "      {shape: box, size: [1, 2, 3], mu: 1 /mm, roi: true, name: b},\n"
               "      {ring: {radius: 4, count: 3, turn_copies: true, object: "
               "{shape: sphere, radius: 1, material: water, name: s}}}]}}}}\n")
    a, b = parse_phantom_text(shared), parse_phantom_text(written)
    assert a.objects.count == b.objects.count == 12  # (1 box + 3 spheres) x (1 + 2 copies)
    for name in ("shape", "centre", "rotation", "half_sizes", "material", "roi_label"):
        np.testing.assert_array_equal(getattr(a.objects, name), getattr(b.objects, name))
    assert a.object_names == b.object_names
    assert a.object_names[4:8] == ("b 1", "s 1 1", "s 1 2", "s 1 3")
