"""What the benchmarks share: the CPU line printed beside every figure, and the compile time of
a script's kernels in a fresh process with an empty numba cache."""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile

import llvmlite.binding as llvm
import numba


def cpu() -> str:
    """The CPU numba compiles for, and the threads it runs."""
    name = numba.config.CPU_NAME or llvm.get_host_cpu_name()
    return f"[numba {numba.__version__} for {name}, {numba.get_num_threads()} threads]"


def compile_in_empty_cache(setup: str, work: str) -> tuple[float, float]:
    """Compile time of ``work`` in a fresh Python with an empty ``NUMBA_CACHE_DIR``.

    ``setup`` (imports, inputs) runs once; ``work`` runs twice. The first call compiles every
    kernel it reaches, the second finds them compiled: their difference in wall and CPU
    seconds is the compile time, returned.
    """
    import textwrap

    script = "\n".join([
        "import time", textwrap.dedent(setup),
        "def _work():", textwrap.indent(textwrap.dedent(work), "    "),
        "wall, cpu = [], []",
        "for _ in range(2):",
        "    start, start_cpu = time.perf_counter(), time.process_time()",
        "    _work()",
        "    wall.append(time.perf_counter() - start)",
        "    cpu.append(time.process_time() - start_cpu)",
        "print(wall[0] - wall[1], cpu[0] - cpu[1])"])
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True,
                              text=True, check=True)
        wall, cpu_s = (float(v) for v in done.stdout.split()[-2:])
        return wall, cpu_s
