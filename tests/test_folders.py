"""Output folders whole or absent: the commit protocol, its readers, kills and signals.

The property under test is the protocol's own promise (docs/outputs.md): after any
interruption, the final path holds the complete old folder or the complete new one, checked by
comparing every file's SHA-256 with what a complete run of each wrote; and the next run into the
same place removes what a killed run left.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from simbench.errors import InputError
from simbench.folders import MARKER, commit_folder, verify_folder


def _digest(folder: Path) -> dict:
    """SHA-256 of every file under a folder, by relative path."""
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _arrays(folder: Path) -> dict:
    """Digests of the arrays only: ``complete.json`` and ``scan.json`` hold times of day."""
    return {k: v for k, v in _digest(folder).items() if k.endswith(".npy")}


def _write(final: Path, value: int, n_files: int = 3) -> None:
    with commit_folder(final, "test", say=lambda line: None) as staging:
        for i in range(n_files):
            np.save(staging / f"a{i}.npy", np.full(1000, value, dtype=np.int64))


def _leftovers(parent: Path, name: str) -> list:
    return sorted(p.name for p in parent.iterdir() if p.name.startswith(f".{name}."))


# ------------------------------------------------------------------------------------------
# The protocol in-process
# ------------------------------------------------------------------------------------------


def test_a_committed_folder_verifies_and_a_replaced_one_is_the_new_one(tmp_path):
    final = tmp_path / "out"
    _write(final, 1)
    marker = verify_folder(final, "test")
    assert marker["kind"] == "test" and set(marker["files"]) == {"a0.npy", "a1.npy", "a2.npy"}
    _write(final, 2)
    verify_folder(final, "test")
    assert np.load(final / "a0.npy")[0] == 2
    assert _leftovers(tmp_path, "out") == []


def test_a_failing_block_leaves_the_old_folder_and_no_staging(tmp_path):
    final = tmp_path / "out"
    _write(final, 1)
    before = _digest(final)
    with pytest.raises(RuntimeError):
        with commit_folder(final, "test") as staging:
            np.save(staging / "a0.npy", np.zeros(3))
            raise RuntimeError("stopped half-way")
    assert _digest(final) == before
    assert _leftovers(tmp_path, "out") == []


@pytest.mark.parametrize("change, problem", [
    (lambda f: (f / MARKER).unlink(), "complete.json is missing"),
    (lambda f: (f / "a1.npy").unlink(), "is missing"),
    (lambda f: (f / "extra.txt").write_text("x"), "not listed"),
    (lambda f: (f / "a2.npy").write_bytes((f / "a2.npy").read_bytes()[:-8]), "size differs"),
    (lambda f: (f / "a0.npy").write_bytes((f / "a0.npy").read_bytes()[:-1] + b"\x07"),
     "SHA-256 differs"),
])
def test_readers_refuse_incomplete_or_altered_folders(tmp_path, change, problem):
    final = tmp_path / "out"
    _write(final, 1)
    change(final)
    with pytest.raises(InputError, match=problem) as error:
        verify_folder(final, "test")
    assert "\n" not in str(error.value)


def test_a_folder_of_another_kind_or_of_the_user_is_never_replaced(tmp_path):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "thesis.tex").write_text("years of work")
    with pytest.raises(InputError, match="did not write"):
        _write(mine, 1)
    assert (mine / "thesis.tex").read_text() == "years of work"
    _write(tmp_path / "scan", 1)
    with pytest.raises(InputError, match="not an other folder"):
        with commit_folder(tmp_path / "scan", "other"):
            pass
    a_file = tmp_path / "file"
    a_file.write_text("x")
    with pytest.raises(InputError, match="not a folder"):
        _write(a_file, 1)
    with pytest.raises(InputError, match="is a file, not a folder"):
        _write(a_file / "under-a-file", 1)


def test_two_runs_into_one_folder_never_mix(tmp_path):
    final = tmp_path / "out"
    with commit_folder(final, "test") as staging:
        np.save(staging / "a.npy", np.zeros(2))
        with pytest.raises(InputError, match="another simbench run"):
            with commit_folder(final, "test"):
                pass
    verify_folder(final, "test")


# ------------------------------------------------------------------------------------------
# Kills at every step of the protocol (a child process kills itself there)
# ------------------------------------------------------------------------------------------

def _killed_at(step: str, final: str, exchange: bool) -> None:
    import simbench.folders as folders

    def die(*_args, **_kwargs):
        os.kill(os.getpid(), signal.SIGKILL)

    if not exchange:
        folders._exchange = lambda a, b: False
    real_rename, real_marker, real_swap = os.rename, folders.write_marker, folders._swap_into_place
    renames = []

    def counting_rename(a, b):
        renames.append((a, b))
        if step == "between renames" and len(renames) == 2:
            die()
        return real_rename(a, b)

    if step == "writing":
        def slow(staging: Path):
            np.save(staging / "a0.npy", np.full(1000, 2, dtype=np.int64))
            die()
    else:
        def slow(staging: Path):
            for i in range(3):
                np.save(staging / f"a{i}.npy", np.full(1000, 2, dtype=np.int64))
    if step == "before marker":
        folders.write_marker = die
    if step == "after marker":
        def marker_then_die(*a, **k):
            real_marker(*a, **k)
            die()
        folders.write_marker = marker_then_die
    if step == "between renames":
        folders.os.rename = counting_rename
    if step == "after swap":
        def swap_then_die(*a, **k):
            real_swap(*a, **k)
            die()
        folders._swap_into_place = swap_then_die
    with folders.commit_folder(Path(final), "test", say=lambda line: None) as staging:
        slow(staging)


KILL_POINTS = [(step, exchange) for exchange in (True, False)
               for step in ("writing", "before marker", "after marker", "after swap")
               ] + [("between renames", False)]  # only the fallback swap has two renames


@pytest.mark.parametrize("step, exchange", KILL_POINTS)
def test_sigkill_at_any_step_leaves_the_old_or_the_new_folder(tmp_path, step, exchange):
    final = tmp_path / "out"
    _write(final, 1)
    old = _arrays(final)
    _write(tmp_path / "reference-new", 2)
    new = _arrays(tmp_path / "reference-new")
    child = multiprocessing.get_context("fork").Process(target=_killed_at,
                                                        args=(step, str(final), exchange))
    child.start()
    child.join(30)
    assert child.exitcode == -signal.SIGKILL
    # what a reader of the final path sees right after the kill: whole old or whole new (a
    # kill between the fallback's two renames leaves the old folder aside, which the next
    # run puts back, step 2 of the protocol)
    if final.exists():
        verify_folder(final, "test")
        assert _arrays(final) in (old, new), step
    else:
        assert step == "between renames" and not exchange
    # the next run into the same place cleans up and says so
    said = []
    with commit_folder(final, "test", say=said.append) as staging:
        np.save(staging / "a0.npy", np.full(1000, 3, dtype=np.int64))
    verify_folder(final, "test")
    assert _leftovers(tmp_path, "out") == []
    if step != "after swap":
        assert said, step
    assert all("interrupted run" in line or "restored" in line for line in said)


# ------------------------------------------------------------------------------------------
# A real scan killed while it replaces an existing folder; SIGINT and SIGTERM
# ------------------------------------------------------------------------------------------

# a scan of a few seconds: sub-rays across the focal spot and the cell aperture make the
# tracing slow while the outputs stay small (7 MB)
SLOW_SCANNER = """\
name: slow fan
geometry: {type: fan, sid: 500 mm, sdd: 900 mm, columns: 600, column_pitch: 1 mm,
           views: 1200}
source: {kvp: 90, filtration: [{material: aluminium, thickness: 2 mm}], focal_spot: 1 mm,
         focal_spot_samples: [3, 1]}
exposure: {air_counts: 1.0e5}
detector: {blur: 0.5 mm, lag: 0.01, aperture_samples: [4, 1]}
"""

PHANTOM = """\
name: body
dimension: 2
objects:
  - {shape: ellipse, semi_axes: [120, 90], material: water}
  - {shape: circle, centre: [40, 0], radius: 15, material: cortical-bone}
"""


def _scan_command(tmp_path: Path, out: Path, seed: int) -> list:
    return [sys.executable, "-m", "simbench.cli", "scan", str(tmp_path / "body.yaml"),
            str(tmp_path / "slow.yaml"), "-o", str(out), "--seed", str(seed)]


@pytest.fixture()
def slow_scan(tmp_path):
    (tmp_path / "body.yaml").write_text(PHANTOM)
    (tmp_path / "slow.yaml").write_text(SLOW_SCANNER)
    return tmp_path


def _wait_for_staging(tmp_path: Path, name: str, deadline_s: float = 120) -> float:
    started = time.perf_counter()
    while time.perf_counter() - started < deadline_s:
        if any(n.startswith(f".{name}.partial-") for n in _leftovers(tmp_path, name)):
            return time.perf_counter()
        time.sleep(0.01)
    raise AssertionError("the scan never started writing")


@pytest.mark.slow
def test_scan_killed_while_replacing_a_folder_leaves_old_or_new(slow_scan):
    tmp_path = slow_scan
    out = tmp_path / "scan"
    done = subprocess.run(_scan_command(tmp_path, out, 1), capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    old = _arrays(out)
    # the new scan, timed from its staging folder's appearance to its exit
    child = subprocess.Popen(_scan_command(tmp_path, tmp_path / "new", 2),
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    writing_started = _wait_for_staging(tmp_path, "new")
    assert child.wait() == 0
    writing = time.perf_counter() - writing_started
    new = _arrays(tmp_path / "new")
    outcomes = []
    for fraction in (0.05, 0.4, 0.8, 0.97, 1.1):
        child = subprocess.Popen(_scan_command(tmp_path, out, 2), stdout=subprocess.DEVNULL,
                                 stderr=subprocess.DEVNULL)
        _wait_for_staging(tmp_path, "scan")
        time.sleep(writing * fraction)
        child.kill()
        child.wait()
        verify_folder(out, "scan")
        state = _arrays(out)
        assert state in (old, new), fraction
        outcomes.append("new" if state == new else "old")
        if child.returncode == -signal.SIGKILL and outcomes[-1] == "old":
            # the next run into the place removes what the killed one left, and says so
            assert _leftovers(tmp_path, "scan")
            done = subprocess.run(_scan_command(tmp_path, out, 1), capture_output=True,
                                  text=True)
            assert done.returncode == 0, done.stderr
            assert "left by an interrupted run" in done.stderr
            assert _leftovers(tmp_path, "scan") == []
            assert _arrays(out) == old
        elif outcomes[-1] == "new":  # committed before the kill: write the old seed back
            done = subprocess.run(_scan_command(tmp_path, out, 1), capture_output=True,
                                  text=True)
            assert done.returncode == 0, done.stderr
    assert outcomes[0] == "old", outcomes  # killed early, the old scan stays


@pytest.mark.slow
@pytest.mark.parametrize("signum, code", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_sigint_and_sigterm_end_with_one_line_and_no_temporary_files(slow_scan, signum, code):
    tmp_path = slow_scan
    out = tmp_path / "scan"
    child = subprocess.Popen(_scan_command(tmp_path, out, 1), stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True)
    _wait_for_staging(tmp_path, "scan")  # the scan is writing
    child.send_signal(signum)
    stdout, stderr = child.communicate(timeout=60)
    assert child.returncode == code
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and "stopped by" in lines[0], stderr
    assert not out.exists()
    assert _leftovers(tmp_path, "scan") == []
