"""Reruns take over finished work: after an interruption (SIGKILL) and after a complete run.

Check values: the project's rule that the same seed gives the same bits (a resumed or reused
run must equal one made in one go, array for array), and the run's own item counts.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from simbench.cli import main

SCENARIO = """\
name: reuse
phantom: water-ellipse-inserts
scanner:
  name: small fan
  geometry: {type: fan, sid: 575 mm, sdd: 1050 mm, detector_shape: curved, columns: 160,
             column_pitch: 4 mm, views: 120, arc: 360 deg}
  source: {kvp: 120, filtration: [{material: aluminium, thickness: 3 mm}]}
  exposure: {air_counts: 2.0e4}
  detector: {material: Gd2O2S, thickness: 1.4 mm}
grid: {size: 96, voxel_size: 3.5 mm}
seed: 11
realizations: 3
doses: [1.0, 0.5]
algorithms:
  - {name: fbp-hann, use: fbp, options: {filter: hann}}
  - {name: sirt, use: sirt, options: {iterations: 30}}
metrics: [rmse, ssim, rois, time]
rois: {background: water, noise: [water]}
"""


def _arrays(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): np.load(p) for p in sorted(folder.rglob("*.npy"))}


def _scores(folder: Path) -> dict:
    metrics = json.loads((folder / "metrics.json").read_text())
    for algorithm in metrics["algorithms"].values():
        for dose in algorithm["doses"].values():
            dose.pop("time", None)
            for key in [k for k in dose.get("metrics", {}) if k.startswith(("wall", "peak"))]:
                dose["metrics"].pop(key)
    return {k: v for k, v in metrics.items() if k not in ("run",)}


def _same(a: Path, b: Path) -> None:
    left, right = _arrays(a), _arrays(b)
    assert left.keys() == right.keys()
    for name in left:
        assert np.array_equal(left[name], right[name]), name


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reuse")
    (folder / "s.yaml").write_text(SCENARIO)
    assert main(["run", str(folder / "s.yaml"), "-o", str(folder / "whole"), "--quiet"]) == 0
    return folder


def test_a_rerun_takes_over_everything_and_says_so(reference, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet"]) == 0
    said = capsys.readouterr().out
    assert ("reused from the previous run in the output folder: truth 1 of 1, measurements "
            "6 of 6, reconstructions 12 of 12") in said
    _same(out, reference / "whole")
    metrics = json.loads((out / "metrics.json").read_text())
    assert len(metrics["run"]["reused"]["previous"]) == 1 + 6 + 12
    from simbench.folders import verify_folder

    verify_folder(out, "run")


def test_a_changed_option_redoes_only_that_algorithm(reference, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet"]) == 0
    changed = tmp_path / "changed.yaml"
    changed.write_text(SCENARIO.replace("iterations: 30", "iterations: 31"))
    capsys.readouterr()
    assert main(["run", str(changed), "-o", str(out), "--quiet"]) == 0
    said = capsys.readouterr().out
    assert "truth 1 of 1, measurements 6 of 6, reconstructions 6 of 12" in said
    before, after = _arrays(reference / "whole"), _arrays(out)
    assert all(np.array_equal(before[k], after[k]) for k in after if "sirt" not in k)
    assert not np.array_equal(before["recon/sirt/dose-1/realization-0.npy"],
                              after["recon/sirt/dose-1/realization-0.npy"])


def test_fresh_makes_everything_again(reference, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet", "--fresh"]) == 0
    assert "reused" not in capsys.readouterr().out
    assert json.loads((out / "metrics.json").read_text())["run"]["reused"]["previous"] == []


@pytest.mark.parametrize("signum", [signal.SIGKILL, signal.SIGINT], ids=["kill-9", "ctrl-c"])
def test_a_run_stopped_half_way_resumes_to_the_same_bits(reference, tmp_path, capsys, signum):
    out = tmp_path / "out"
    child = subprocess.Popen([sys.executable, "-m", "simbench.cli", "run",
                              str(reference / "s.yaml"), "-o", str(out), "--quiet"],
                             start_new_session=True, stdout=subprocess.DEVNULL,
                             stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 300
    try:  # kill once a few reconstructions are recorded, well before the end
        while time.monotonic() < deadline and child.poll() is None:
            ledgers = list(tmp_path.glob(".out.partial-*/items.json"))
            try:
                items = json.loads(ledgers[0].read_text())["items"] if ledgers else {}
            except (OSError, ValueError):
                items = {}
            if sum(name.startswith("recon/") for name in items) >= 3:
                break
            time.sleep(0.05)
    finally:
        if signum == signal.SIGKILL:
            os.killpg(child.pid, signal.SIGKILL)
        else:  # Ctrl-C: the run unwinds, and keeps its finished work for the next run
            child.send_signal(signum)
        code = child.wait(timeout=120)
    assert code == (-9 if signum == signal.SIGKILL else 130)
    assert not out.exists(), "a stopped run must not leave a folder that looks complete"
    partial = list(tmp_path.glob(".out.partial-*"))
    assert len(partial) == 1
    # damage one finished reconstruction: it must be made again, not taken over
    ledger = json.loads((partial[0] / "items.json").read_text())["items"]
    damaged = next(name for name in sorted(ledger) if name.startswith("recon/"))
    path = partial[0] / next(iter(ledger[damaged]["files"]))
    data = bytearray(path.read_bytes())
    data[-1] ^= 0xFF
    path.write_bytes(bytes(data))
    capsys.readouterr()
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet"]) == 0
    captured = capsys.readouterr()
    assert "resuming from '.out.partial-" in captured.err
    assert "reused from the interrupted run's work: truth 1 of 1" in captured.out
    reused = json.loads((out / "metrics.json").read_text())["run"]["reused"]["interrupted"]
    assert damaged not in reused and len(reused) >= 3
    assert not list(tmp_path.glob(".out.partial-*"))
    _same(out, reference / "whole")
    assert _scores(out) == _scores(reference / "whole")


def test_plug_in_reconstructions_are_always_made_again(tmp_path, capsys):
    plugin = tmp_path / "mine.py"
    plugin.write_text("import numpy as np\n\n\ndef zeros(acquisition, grid):\n"
                      "    return np.zeros(grid.image_shape, np.float32)\n")
    text = SCENARIO.replace("  - {name: sirt, use: sirt, options: {iterations: 30}}\n",
                            f"  - {{name: mine, use: '{plugin}:zeros'}}\n")
    text = text.replace("realizations: 3", "realizations: 1").replace("doses: [1.0, 0.5]",
                                                                      "doses: [1.0]")
    (tmp_path / "s.yaml").write_text(text)
    args = ["run", str(tmp_path / "s.yaml"), "-o", str(tmp_path / "out"), "--quiet",
            "--allow-code"]
    assert main(args) == 0
    capsys.readouterr()
    assert main(args) == 0
    assert "measurements 1 of 1, reconstructions 1 of 2" in capsys.readouterr().out


def test_two_worker_processes_give_the_same_bits(reference, tmp_path, capsys):
    # the project's rule: same seed, same bits, whatever runs the tasks (ARCHITECTURE.md)
    out = tmp_path / "out"
    assert main(["run", str(reference / "s.yaml"), "-o", str(out), "--quiet",
                 "--workers", "2"]) == 0
    assert "running on 2 local worker processes" in capsys.readouterr().out
    _same(out, reference / "whole")
    assert _scores(out) == _scores(reference / "whole")


@pytest.mark.parametrize("count, extra", [("zero", []), ("200", ["--memory-budget", "1 GiB"])],
                         ids=["not a number", "over the memory budget"])
def test_a_bad_worker_count_is_one_line(reference, tmp_path, capsys, count, extra):
    assert main(["run", str(reference / "s.yaml"), "-o", str(tmp_path / "out"), "--quiet",
                 "--workers", count, *extra]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--workers" in err[0] and "(valid:" in err[0]
    assert not (tmp_path / "out").exists()
