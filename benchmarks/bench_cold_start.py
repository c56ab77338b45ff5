"""Cold and warm start: the quickstart run with an empty numba cache against a filled one,
and the start-up of small commands against a bare Python.

Each run is a fresh process (``python -m simbench.cli``), as on a CI runner:

- **cold**: ``NUMBA_CACHE_DIR`` is a new empty folder, so every kernel the run needs is
  compiled (what a fresh install or a CI job without a kept cache pays);
- **warm**: the same command again with that folder now filled (what every later run pays).

The measure is the ratio cold / warm of wall time, with the CPU time (user + sys of the child)
and the run's own split by stage (``metrics.json``, ``run.timings_s``) printed beside it, and
the CPU numba compiles for. Small commands (``--help``, ``list``) are timed against
``python -c pass`` in the same way. Timings on a shared machine are noisy; the load average is
printed too. See docs/performance.md for the figures and how a CI service keeps the cache.

Run: ``python -m pytest benchmarks/bench_cold_start.py --benchmark-only -s``
(about two minutes on 2 cores). ``SIMBENCH_COLD_SCENARIO`` picks another shipped scenario.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest
from support import cpu as cpu_line

SCENARIO = os.environ.get("SIMBENCH_COLD_SCENARIO", "quickstart")
#: warm runs of the scenario (the best counts)
WARM_ROUNDS = 2
#: runs of each small command (the best counts)
SMALL_ROUNDS = 5


def cpu() -> str:
    """The CPU numba compiles for and its threads, with the machine's cores and load."""
    load = ", ".join(f"{x:.1f}" for x in os.getloadavg())
    return f"{cpu_line()} [{os.cpu_count()} cores, load {load}]"


def run_child(args: list[str], env: dict) -> tuple[float, float, subprocess.CompletedProcess]:
    """Run ``python args`` in a child process; its wall time and CPU time (user + sys), s."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    # (run outside the source tree, so that ``-m`` finds the installed simbench, or the one
    # PYTHONPATH names, and not a checkout in the working directory)
    done = subprocess.run([sys.executable, *args], env=env, capture_output=True, text=True,
                          cwd=tempfile.gettempdir())
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu_s = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    assert done.returncode == 0, done.stderr[-2000:]
    return wall, cpu_s, done


def child_env(cache_dir: Path) -> dict:
    env = dict(os.environ)
    env["NUMBA_CACHE_DIR"] = str(cache_dir)
    env.pop("NUMBA_DISABLE_JIT", None)
    return env


def run_scenario(out: Path, env: dict) -> tuple[float, float, dict]:
    wall, cpu_s, _ = run_child(["-m", "simbench.cli", "run", SCENARIO, "-o", str(out),
                                "--quiet"], env)
    metrics = json.loads((out / "metrics.json").read_text())
    return wall, cpu_s, metrics["run"]["timings_s"]


def stages(timings: dict, wall: float) -> str:
    """The run's stages, and the rest of the wall time (start-up, imports, plan, truth image
    and labels, the reference-energy probe: where most of a cold start's compilation falls)."""
    rest = wall - sum(timings.values())
    return ", ".join(f"{k} {v:.1f}" for k, v in timings.items()) + f", other {rest:.1f}"


def test_cold_vs_warm_run(benchmark, tmp_path):
    cache = tmp_path / "numba-cache"
    cache.mkdir()
    env = child_env(cache)
    result = {}

    def cold():
        result["cold"] = run_scenario(tmp_path / "cold", env)

    benchmark.pedantic(cold, rounds=1, iterations=1)
    warm = [run_scenario(tmp_path / f"warm-{i}", env) for i in range(WARM_ROUNDS)]
    cold_wall, cold_cpu, cold_stages = result["cold"]
    warm_wall, warm_cpu, warm_stages = min(warm, key=lambda w: w[0])
    benchmark.extra_info.update({
        "scenario": SCENARIO, "cpu": cpu(),
        "cold_wall_s": cold_wall, "cold_cpu_s": cold_cpu, "cold_stages_s": cold_stages,
        "warm_wall_s": warm_wall, "warm_cpu_s": warm_cpu, "warm_stages_s": warm_stages,
        "cold_over_warm_wall": cold_wall / warm_wall,
        "cold_over_warm_cpu": cold_cpu / warm_cpu,
    })
    print(f"\n{SCENARIO} {cpu()}\n"
          f"  cold: wall {cold_wall:.1f} s, cpu {cold_cpu:.1f} s; "
          f"stages {stages(cold_stages, cold_wall)}\n"
          f"  warm: wall {warm_wall:.1f} s, cpu {warm_cpu:.1f} s; "
          f"stages {stages(warm_stages, warm_wall)} (best of {WARM_ROUNDS})\n"
          f"  cold / warm = {cold_wall / warm_wall:.2f} (wall), {cold_cpu / warm_cpu:.2f} (cpu)")


def test_cold_start_with_and_without_the_compile_helper(benchmark, tmp_path):
    """Two cold runs, each with its own empty cache: with the compile helper (the default on
    two or more CPUs, simbench/execute/warm.py) and without it (SIMBENCH_COMPILE_HELPER=0)."""
    result = {}

    def cold(name: str, helper: str) -> tuple:
        cache = tmp_path / f"cache-{name}"
        cache.mkdir()
        env = child_env(cache)
        env["SIMBENCH_COMPILE_HELPER"] = helper
        return run_scenario(tmp_path / name, env)

    def both():
        result["without"] = cold("without", "0")
        result["with"] = cold("with", "1")

    benchmark.pedantic(both, rounds=1, iterations=1)
    (w_wall, w_cpu, w_st), (h_wall, h_cpu, h_st) = result["without"], result["with"]
    benchmark.extra_info.update({"scenario": SCENARIO, "cpu": cpu(),
                                 "without_helper_wall_s": w_wall, "with_helper_wall_s": h_wall,
                                 "with_over_without_wall": h_wall / w_wall})
    print(f"\n{SCENARIO} {cpu()}\n"
          f"  cold without the compile helper: wall {w_wall:.1f} s, cpu {w_cpu:.1f} s; "
          f"stages {stages(w_st, w_wall)}\n"
          f"  cold with the compile helper:    wall {h_wall:.1f} s, cpu {h_cpu:.1f} s "
          f"(the helper process's CPU included); stages {stages(h_st, h_wall)}\n"
          f"  with / without = {h_wall / w_wall:.2f} (wall)")


@pytest.mark.parametrize("command", [["--help"], ["list"]], ids=["help", "list"])
def test_small_command_start(benchmark, command):
    env = child_env(Path(tempfile.gettempdir()) / "simbench-bench-start-cache")

    def best(args):
        runs = [run_child(args, env)[:2] for _ in range(SMALL_ROUNDS)]
        return min(runs, key=lambda r: r[0])

    bare_wall, bare_cpu = best(["-c", "pass"])
    result = {}

    def once():
        result["run"] = best(["-m", "simbench.cli", *command])

    benchmark.pedantic(once, rounds=1, iterations=1)
    wall, cpu_s = result["run"]
    benchmark.extra_info.update({
        "command": " ".join(command), "cpu": cpu(), "wall_s": wall, "cpu_s": cpu_s,
        "bare_python_wall_s": bare_wall, "over_bare_python_wall": wall / bare_wall,
    })
    print(f"\nsimbench {' '.join(command)} {cpu()}: wall {wall:.2f} s, cpu {cpu_s:.2f} s; "
          f"bare python {bare_wall:.2f} s; ratio {wall / bare_wall:.1f} (best of "
          f"{SMALL_ROUNDS})")
