"""Shared test options: the long fuzzing run is skipped unless ``--fuzz-long`` is given."""

from __future__ import annotations

import pytest


def pytest_addoption(parser):
    parser.addoption("--fuzz-long", action="store_true", default=False,
                     help="also run the long fuzzing run (tests marked fuzz_long)")


def pytest_collection_modifyitems(config, items):
    if config.getoption("--fuzz-long"):
        return
    skip = pytest.mark.skip(reason="the long fuzzing run needs --fuzz-long")
    for item in items:
        if "fuzz_long" in item.keywords:
            item.add_marker(skip)
