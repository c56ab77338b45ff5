"""Scenario files: one experiment (phantom, scanner, grid, algorithms, doses, realizations,
metrics, ROIs, tolerances) in one YAML file; see :mod:`simbench.scenario.spec`."""

from simbench.scenario.spec import Scenario, load_scenario

__all__ = ["Scenario", "load_scenario"]
