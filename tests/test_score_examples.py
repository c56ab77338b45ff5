"""The Examples blocks in the metrics' docstrings run as written."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["pixels", "rois", "resolution", "noise", "detectability", "streaks", "statistics"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    module = importlib.import_module(f"simbench.score.{name}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
