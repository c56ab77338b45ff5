"""pytest fixtures and assertions: a lab's own tests run a scenario against its code.

Installed with simbench and loaded by pytest through the ``pytest11`` entry point ``simbench``
(or ``-p simbench.pytest_plugin``). A test reads::

    from simbench.pytest_plugin import assert_metric

    def my_fbp(acquisition, grid):
        ...                                   # the lab's reconstructor
        return image

    def test_my_fbp(simbench_run):
        result = simbench_run("tests/bench.yaml", {"mine": my_fbp})
        assert_metric(result, "mine", "rmse", below=0.003)
        assert_metric(result, "mine", "bias_hu", roi="water", below=5, above=-5)

What it gives:

``simbench_run`` (fixture)
    A callable ``(scenario, algorithms=None, *, options=None, realizations=None, seed=None,
    folder=None) -> RunResults`` that runs a scenario into a temporary folder (or ``folder``)
    and returns its results: ``result.metric(algorithm, name, dose=..., roi=...)`` is the
    estimate over the realizations (``.mean``, ``.low``, ``.high``, ``.n``, ``.values``).
:func:`assert_metric`
    A bound on one metric with a message that says the value, its interval and the bound.
:func:`assert_no_regression`
    The ``simbench check`` rule against a committed baseline file.

Importing this module costs nothing: simbench's modules load on first use.
"""

from __future__ import annotations

import itertools
import re
import sys
import types
from pathlib import Path
from typing import Any, Callable

import pytest

#: where callables that no module path reaches (lambdas, closures) are put for the registry
_HOLDER = "simbench_test_reconstructors"
_COUNTER = itertools.count()


@pytest.fixture
def simbench_run(tmp_path_factory) -> Callable:
    """Run a scenario, optionally with your own reconstructors, into a temporary folder.

    Returns
    -------
    callable
        ``run(scenario, algorithms=None, *, options=None, realizations=None, seed=None,
        folder=None)`` -> :class:`simbench.scenario.regression.RunResults`; see
        :func:`run_scenario_for_test`.
    """

    def run(scenario, algorithms=None, *, options=None, realizations=None, seed=None,
            folder=None):
        target = Path(folder) if folder is not None else \
            tmp_path_factory.mktemp("simbench-run") / "run"
        return run_scenario_for_test(scenario, algorithms, options=options,
                                     realizations=realizations, seed=seed, folder=target)

    return run


def run_scenario_for_test(scenario: Any, algorithms: dict | None, *, folder: str | Path,
                          options: dict | None = None, realizations: int | None = None,
                          seed: int | None = None):
    """Run a scenario with the given reconstructors and return its results.

    Parameters
    ----------
    scenario : str, Path, dict or Scenario
        A scenario file, a shipped scenario name, a mapping written as a scenario file would
        be (relative paths from the working folder), or a loaded scenario.
    algorithms : dict, optional
        Algorithm name -> a reconstructor: a function ``(acquisition, grid, **options) ->
        image`` (declared with :func:`simbench.recon.reconstructor` or plain), a built-in or
        installed name, or a ``module:function`` path. Given, these replace the scenario's
        algorithms; include ``{"fbp": "fbp"}`` to keep a reference beside your own.
    folder : str or Path
        The run folder to write (committed whole).
    options : dict, optional
        Algorithm name -> its options.
    realizations, seed : int, optional
        Override the scenario's (fewer realizations make a quicker test).

    Returns
    -------
    simbench.scenario.regression.RunResults
    """
    import dataclasses

    from simbench.errors import InputError, Where
    from simbench.execute.run import run_scenario
    from simbench.scenario.regression import RunResults
    from simbench.scenario.spec import MAX_REALIZATIONS, MAX_SEED, AlgorithmSpec

    loaded = _load(scenario)
    where = Where("<simbench_run>")
    changes: dict = {}
    if options and algorithms is None:
        raise InputError(where.child("options"), "options were given without algorithms",
                         "options keyed by names of 'algorithms' (the scenario file holds the "
                         "options of its own algorithms)")
    if algorithms is not None:
        if not isinstance(algorithms, dict) or not algorithms:
            raise InputError(where.child("algorithms"), f"got {type(algorithms).__name__}",
                             "a mapping of algorithm names to reconstructors")
        options = options or {}
        unknown = sorted(set(options) - set(algorithms))
        if unknown:
            raise InputError(where.child("options"), f"options for {unknown} name no algorithm",
                             "options keyed by names of 'algorithms'")
        specs = []
        for name, target in algorithms.items():
            name = str(name)
            if not name.strip() or "/" in name or name.startswith(".") or len(name) > 100:
                raise InputError(where.child("algorithms"), f"'{name}' cannot name an algorithm",
                                 "1 to 100 characters, no '/', not starting with '.'")
            specs.append(AlgorithmSpec(name, _reference(name, target, where), dict(
                options.get(name, {})), None, "projections", 3600.0,
                where.child(f"algorithms.{name}")))
        changes["algorithms"] = tuple(specs)
    if realizations is not None:
        if isinstance(realizations, bool) or not isinstance(realizations, int) \
                or not 1 <= realizations <= MAX_REALIZATIONS:
            raise InputError(where.child("realizations"), f"got {realizations!r}",
                             f"a whole number from 1 to {MAX_REALIZATIONS}")
        changes["realizations"] = realizations
    if seed is not None:
        if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed <= MAX_SEED:
            raise InputError(where.child("seed"), f"got {seed!r}", "a whole number from 0 to "
                             "2^63 - 1")
        changes["seed"] = seed
    if changes:
        loaded = dataclasses.replace(loaded, **changes)
    run_scenario(loaded, Path(folder), allow_code=True, progress=False, say=lambda text: None)
    return RunResults(folder)


def assert_metric(result, algorithm: str, name: str, *, below: float | None = None,
                  above: float | None = None, dose: Any = None, roi: str | None = None,
                  strict: bool = False):
    """Assert that a metric lies within bounds.

    Parameters
    ----------
    result : simbench.scenario.regression.RunResults
        What :func:`simbench_run` returned.
    algorithm, name : str
        The algorithm's name in the run and the metric (``rmse``, ``ssim``...; ROI statistics
        ``mean_hu``, ``bias_hu``, ``std_hu``, ``cnr`` with ``roi``).
    below, above : float, optional
        The metric must be below ``below`` and above ``above`` (at least one), in its unit.
    dose : str or float, optional
        ``'dose-0.25'`` or ``0.25``; may be left out when the run has one dose.
    roi : str, optional
        The ROI of a ROI statistic.
    strict : bool
        False: the mean over the realizations must lie within the bounds. True: its whole
        95 % interval must (a claim that the noise cannot explain away).

    Returns
    -------
    MetricEstimate
        The estimate, for further checks.

    Raises
    ------
    AssertionError
        With the value, its interval and the bound.
    """
    __tracebackhide__ = True
    if below is None and above is None:
        raise TypeError("assert_metric needs below=, above= or both")
    estimate = result.metric(algorithm, name, dose=dose, roi=roi)
    from simbench.scenario.regression import metric_label

    label = f"{algorithm} at {result.dose_label(dose)}: {metric_label(name, roi)}"
    unit = f" {estimate.unit}" if estimate.unit else ""
    high = estimate.high if strict else estimate.mean
    low = estimate.low if strict else estimate.mean
    what = "its 95 % interval" if strict else "the mean over the realizations"
    problems = []
    if below is not None and not high < below:
        problems.append(f"not below {below:g}{unit}")
    if above is not None and not low > above:
        problems.append(f"not above {above:g}{unit}")
    if problems:
        raise AssertionError(f"simbench: {label} = {estimate.describe()} is "
                             f"{' and '.join(problems)} ({what} was tested; run folder "
                             f"{result.folder})")
    return estimate


def assert_no_regression(result, baseline: str | Path) -> None:
    """Assert that a run does not regress against a baseline file (the ``simbench check``
    rule, docs/ci.md).

    Parameters
    ----------
    result : simbench.scenario.regression.RunResults
    baseline : str or Path
        A file written by ``simbench baseline``.

    Raises
    ------
    AssertionError
        Listing every metric that regressed or is missing, with the numbers.
    """
    __tracebackhide__ = True
    from simbench.scenario.regression import check_results, read_baseline

    report = check_results(result, read_baseline(baseline))
    failed = [o for o in report.outcomes if o.failed]
    if failed:
        lines = [f"{o.status}: {o.label}: {o.details()}" for o in failed]
        raise AssertionError(f"simbench: {len(failed)} regression(s) against {baseline}:\n"
                             + "\n".join(lines))


# ------------------------------------------------------------------------------------------
# Helpers
# ------------------------------------------------------------------------------------------


def _load(scenario: Any):
    from simbench.errors import InputError, Where
    from simbench.scenario import Scenario, load_scenario

    if isinstance(scenario, Scenario):
        return scenario
    if isinstance(scenario, dict):
        import yaml

        from simbench.scenario.spec import read_scenario
        from simbench.spec import parse_yaml_text

        document = parse_yaml_text(yaml.safe_dump(scenario, sort_keys=False), "<scenario>")
        return read_scenario(document, "<scenario>", Path.cwd())
    if isinstance(scenario, (str, Path)):
        path = Path(scenario)
        if not path.exists() and path.parent == Path("."):
            from simbench.data import shipped_files

            stem = path.name[:-5] if path.name.endswith(".yaml") else path.name
            path = shipped_files("scenarios").get(stem, path)
        return load_scenario(path)
    raise InputError(Where("<simbench_run>", field="scenario"),
                     f"got {type(scenario).__name__}",
                     "a scenario file, a shipped scenario name, a mapping or a Scenario")


def _reference(name: str, target: Any, where) -> str:
    """How the registry will find ``target``: a name or path as given; a function by its
    module path, or through a holder module when no module path reaches it."""
    from simbench.errors import InputError

    if isinstance(target, str):
        return target
    if not callable(target) and not hasattr(target, "function"):
        raise InputError(where.child(f"algorithms.{name}"), f"a {type(target).__name__} is not "
                         "a reconstructor", "a function (acquisition, grid, **options) -> image, "
                         "a reconstructor name, or a module:function path")
    module = getattr(target, "__module__", None)
    function = getattr(target, "__name__", "")
    if module and re.fullmatch(r"[A-Za-z_]\w*", function) \
            and getattr(sys.modules.get(module), function, None) is target:
        return f"{module}:{function}"
    holder = sys.modules.get(_HOLDER)
    if holder is None:
        holder = types.ModuleType(_HOLDER, "reconstructors handed to simbench_run directly")
        sys.modules[_HOLDER] = holder
    attribute = re.sub(r"\W", "_", name)
    if not re.match(r"[A-Za-z_]", attribute):
        attribute = "_" + attribute
    attribute = f"{attribute}_{next(_COUNTER)}"
    setattr(holder, attribute, target)
    return f"{_HOLDER}:{attribute}"
