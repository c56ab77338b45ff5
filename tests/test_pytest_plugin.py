"""The pytest plug-in (simbench/pytest_plugin.py): a lab's tests in a few lines.

The plug-in is exercised the way a lab uses it: pytester runs test files written in a lab's
style (and the complete example of docs/ci.md), which pass on a good reconstructor and fail,
with a message naming the value and the bound, on a broken one.
"""

from __future__ import annotations

import shutil
import sys
import textwrap
import tomllib
from importlib import metadata
from pathlib import Path

import pytest

from simbench.errors import InputError
from simbench.pytest_plugin import assert_metric, assert_no_regression, run_scenario_for_test
from simbench.scenario import regression as reg

pytest_plugins = ["pytester"]

ROOT = Path(__file__).resolve().parents[1]

BENCH = """\
name: lab-bench
phantom: water-cylinder
scanner:
  name: small parallel bench
  geometry: {type: parallel, dimension: 2, columns: 256, column_pitch: 1.0 mm, views: 120, arc: 180 deg}
  source: {energy: 60 keV}
  exposure: {air_counts: 2.0e4}
grid: {size: 160, voxel_size: 1.4 mm}
seed: 7
realizations: 3
algorithms:
  - {name: reference, use: fbp}
metrics: [rmse, ssim, rois]
"""


def plugin_args() -> list[str]:
    """Load the plug-in by hand only when its entry point is not installed (a checkout whose
    package metadata predates it); loading it twice would be refused by pytest."""
    installed = any(ep.value == "simbench.pytest_plugin"
                    for ep in metadata.entry_points(group="pytest11"))
    return [] if installed else ["-p", "simbench.pytest_plugin"]


@pytest.fixture(scope="module")
def two_doses(tmp_path_factory):
    folder = tmp_path_factory.mktemp("plugin-run")
    (folder / "bench.yaml").write_text(BENCH.replace("realizations: 3", "realizations: 2\n"
                                                     "doses: [1.0, 0.5]"))
    result = run_scenario_for_test(folder / "bench.yaml", None, folder=folder / "run")
    return folder, result


def test_entry_point_is_declared():
    # pytest finds plug-ins through the 'pytest11' entry-point group (pytest documentation,
    # "Making your plugin installable by others")
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert project["project"]["entry-points"]["pytest11"] == {"simbench": "simbench.pytest_plugin"}


def test_lab_style_test_passes_on_good_and_fails_on_broken(pytester, two_doses):
    # (two_doses: a run in this process first, so that pytester's in-process runs find every
    # module a run needs already imported; it restores sys.modules afterwards, and numpy's
    # extension modules cannot be imported twice in one process)
    pytester.makefile(".yaml", bench=BENCH)
    pytester.makepyfile(test_lab=textwrap.dedent('''
        import numpy as np
        from simbench.pytest_plugin import assert_metric
        from simbench.recon.analytic import fbp


        def good(acquisition, grid):
            return fbp(acquisition.poses, np.asarray(acquisition.projections), grid)


        def broken(acquisition, grid):
            # a calibration slip: every mu 10 % low, i.e. water at about -100 HU
            return 0.9 * good(acquisition, grid)


        def test_good(simbench_run):
            result = simbench_run("bench.yaml", {"mine": good})
            assert_metric(result, "mine", "rmse", below=0.003)
            assert_metric(result, "mine", "bias_hu", roi="centre ROI", below=10, above=-10)


        def test_broken(simbench_run):
            result = simbench_run("bench.yaml", {"mine": broken})
            assert_metric(result, "mine", "bias_hu", roi="centre ROI", below=10, above=-10)
        '''))
    outcome = pytester.runpytest(*plugin_args(), "-q")
    outcome.assert_outcomes(passed=1, failed=1)
    outcome.stdout.fnmatch_lines(["*simbench: mine at dose-1: centre ROI: bias_hu = -1* HU "
                                  "(95 % interval * n = 3) is not above -10 HU*"])


def test_documented_example_passes(pytester, two_doses):
    text = (ROOT / "docs" / "ci.md").read_text()
    section = text[text.index("## From a lab's own pytest suite"):]
    example = section.split("```python\n", 1)[1].split("```", 1)[0]
    pytester.makepyfile(test_our_reconstructor=example)
    outcome = pytester.runpytest(*plugin_args(), "-q")
    outcome.assert_outcomes(passed=1)


# ------------------------------------------------------------------------------------------
# The helpers directly
# ------------------------------------------------------------------------------------------


def test_metric_lookup_by_dose_label_or_factor(two_doses):
    _, result = two_doses
    by_label = result.metric("reference", "rmse", dose="dose-0.5")
    assert result.metric("reference", "rmse", dose=0.5) == by_label
    # half the dose: noise variance doubles (Poisson counting, common practice), RMSE grows
    assert by_label.mean > result.metric("reference", "rmse", dose=1.0).mean
    assert by_label.n == 2 and len(by_label.values) == 2 and by_label.low < by_label.high
    assert float(by_label) == by_label.mean


@pytest.mark.parametrize("call, problem", [
    (lambda r: r.metric("mine", "rmse", dose=1), "no algorithm 'mine'"),
    (lambda r: r.metric("reference", "rmse"), "has 2 doses; say which"),
    (lambda r: r.metric("reference", "psnr", dose=1), "no metric 'psnr'"),
    (lambda r: r.metric("reference", "bias_hu", dose=1, roi="lung"), "no ROI 'lung'"),
    (lambda r: r.metric("reference", "rmse", dose=0.3), "no dose 0.3"),
])
def test_lookup_errors_are_one_line(two_doses, call, problem):
    _, result = two_doses
    with pytest.raises(InputError) as error:
        call(result)
    assert problem in str(error.value) and "\n" not in str(error.value)


def test_assert_metric_bounds_and_strict(two_doses):
    _, result = two_doses
    e = result.metric("reference", "rmse", dose=1)
    assert assert_metric(result, "reference", "rmse", dose=1, below=e.mean * 1.5) == e
    with pytest.raises(AssertionError, match=r"reference at dose-1: rmse = .* is not below"):
        assert_metric(result, "reference", "rmse", dose=1, below=e.mean * 0.5)
    # the mean is inside; the whole interval is not
    assert_metric(result, "reference", "rmse", dose=1, above=(e.low + e.mean) / 2)
    with pytest.raises(AssertionError, match="its 95 % interval was tested"):
        assert_metric(result, "reference", "rmse", dose=1, above=(e.low + e.mean) / 2,
                      strict=True)
    with pytest.raises(TypeError):
        assert_metric(result, "reference", "rmse", dose=1)


def test_assert_no_regression(two_doses, tmp_path):
    folder, result = two_doses
    baseline = tmp_path / "baseline.yaml"
    reg.baseline_command(result.folder, baseline)
    assert_no_regression(result, baseline)
    # a baseline whose first RMSE (one dose) was 10 times lower: the run regressed
    text = baseline.read_text().splitlines()
    index = next(i for i, line in enumerate(text) if line.strip().startswith("rmse:"))
    mean = float(text[index].split("mean: ")[1].split(",")[0])
    text[index] = text[index].replace(f"mean: {mean!r}", f"mean: {mean / 10!r}")
    baseline.write_text("\n".join(text) + "\n")
    with pytest.raises(AssertionError, match=r"1 regression\(s\).*\nregressed: reference / "
                                             r"dose-[\d.]+ / rmse: .*worse by"):
        assert_no_regression(result, baseline)


def test_callables_without_module_path_and_bad_arguments(tmp_path):
    (tmp_path / "bench.yaml").write_text(BENCH.replace("realizations: 3", "realizations: 1"))
    from simbench.recon.analytic import fbp

    result = run_scenario_for_test(
        tmp_path / "bench.yaml",
        {"closure": lambda acquisition, grid: fbp(acquisition.poses, acquisition.projections,
                                                  grid)},
        folder=tmp_path / "run", seed=3)
    assert result.record["seed"] == 3 and result.realizations == 1
    assert result.metric("closure", "rmse").n == 1
    for kwargs, problem in (({"algorithms": {"a/b": "fbp"}}, "cannot name an algorithm"),
                            ({"algorithms": {"x": 3}}, "is not a reconstructor"),
                            ({"algorithms": None, "realizations": 0}, "realizations"),
                            ({"algorithms": {"x": "fbp"}, "options": {"y": {}}}, "name no "
                                                                                   "algorithm")):
        with pytest.raises(InputError, match=problem):
            run_scenario_for_test(tmp_path / "bench.yaml", folder=tmp_path / "never", **kwargs)
    assert not (tmp_path / "never").exists()
    shutil.rmtree(tmp_path / "run")
    assert "simbench_test_reconstructors" in sys.modules
