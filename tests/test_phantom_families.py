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
