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


def compile_in_empty_cache(script: str) -> tuple[float, float]:
    """Run ``script`` in a fresh Python with an empty ``NUMBA_CACHE_DIR``; the script prints
    its compile wall and CPU seconds as its last two words, which are returned."""
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True,
                              text=True, check=True)
        wall, cpu_s = (float(v) for v in done.stdout.split()[-2:])
        return wall, cpu_s
