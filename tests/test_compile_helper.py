"""The compile helper of a cold run: started only when useful, never outliving the run.

Check values: facts of the project's design (docs/performance.md): the helper compiles on a
second CPU while the run compiles its own kernels, and leaves nothing behind.
"""

from __future__ import annotations

import subprocess
import sys

from simbench.execute import warm


def test_switched_off_by_the_environment(monkeypatch):
    monkeypatch.setenv("SIMBENCH_COMPILE_HELPER", "0")
    assert warm.needed() is False


def test_not_started_without_a_scenario_file(tmp_path):
    assert warm.start(tmp_path / "nowhere.yaml") is None


def test_stop_ends_a_running_helper():
    helper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    warm.stop(helper)
    assert helper.poll() is not None
    warm.stop(None)  # nothing started: nothing to do


def test_the_helper_compiles_a_scenario_without_output(tmp_path, capfd):
    # run in-process on warm kernels: it must succeed quietly and write nothing
    from simbench.data import shipped_files

    before = set(tmp_path.iterdir())
    assert warm._main([str(shipped_files("scenarios")["quickstart"])]) == 0
    assert warm._main([str(tmp_path / "missing.yaml")]) == 1
    assert set(tmp_path.iterdir()) == before
    out, err = capfd.readouterr()
    assert out == "" and err == ""


def test_a_run_stops_its_helper(tmp_path, monkeypatch):
    started = []

    def fake_start(source):
        started.append(subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"]))
        return started[-1]

    monkeypatch.setattr(warm, "start", fake_start)
    from simbench.cli import main

    scenario = tmp_path / "s.yaml"
    scenario.write_text("""\
name: tiny
phantom: water-cylinder
scanner: parallel-bench-2d
grid: {size: 32, voxel_size: 8 mm}
algorithms: [{name: fbp}]
metrics: [rmse]
""")
    assert main(["run", str(scenario), "-o", str(tmp_path / "out"), "--quiet"]) == 0
    assert started and started[0].poll() is not None
