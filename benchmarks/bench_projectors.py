"""Projector benchmarks: Joseph's forward projector and its transpose on a 512 x 512 image
and 720 parallel views, against scikit-image's ``radon`` (forward) and unfiltered ``iradon``
(back projection) on the same image in the same run, beside the Siddon tracer; and the time
numba takes to compile the projector kernels into an empty cache.

Every figure is printed with the CPU numba compiled for. Each speed is the best of
``ROUNDS`` runs after a first call that compiles (or loads) the kernels.

Run: ``python -m pytest benchmarks/bench_projectors.py --benchmark-only -s``
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import pytest
from support import compile_in_empty_cache, cpu

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from trace_builders import voxel_phantom  # noqa: E402

from simbench.geometry import ImageGrid, parallel_poses  # noqa: E402
from simbench.recon.projectors import projector  # noqa: E402
from simbench.trace import trace  # noqa: E402

N, N_VIEWS = 512, 720
#: timed runs of each of our calls (the best counts); scikit-image runs once (seconds)
ROUNDS = 3



@pytest.fixture(scope="module")
def setup():
    y, x = np.mgrid[-1:1:N * 1j, -1:1:N * 1j]
    image = np.exp(-((x - 0.1) ** 2 + y ** 2) / 0.2) * (x * x + y * y < 0.9)
    angles_deg = np.arange(N_VIEWS) * 0.5
    # scikit-image's radon with circle=False pads to the diagonal: ceil(N sqrt 2) columns
    n_cols = int(np.ceil(N * np.sqrt(2)))
    poses = parallel_poses(n_cols=n_cols, pitch_u_mm=1.0,
                           angles_rad=np.radians(-angles_deg))  # radon's theta is -phi
    A = projector(poses, ImageGrid.square_2d(N, 1.0))
    sinogram = A.forward(image)  # compile outside the timing
    A.back(sinogram)
    return image, angles_deg, poses, A, sinogram


def best_of(call, rounds=ROUNDS) -> float:
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return min(times)


def test_forward_vs_radon(benchmark, setup):
    skimage_transform = pytest.importorskip("skimage.transform")
    image, angles_deg, poses, A, _ = setup
    start = time.perf_counter()
    skimage_transform.radon(image, theta=angles_deg, circle=False)
    radon_s = time.perf_counter() - start

    phantom = voxel_phantom(image, (1.0, 1.0, 1.0), kind="mu", dimension=2)
    trace(phantom, poses, views=np.arange(2))  # compile outside the timing
    siddon_s = best_of(lambda: trace(phantom, poses))

    benchmark.pedantic(A.forward, args=(image,), rounds=ROUNDS, iterations=1)
    seconds = benchmark.stats.stats.min
    benchmark.extra_info.update(cpu=cpu(), radon_s=radon_s, siddon_s=siddon_s,
                                speedup_vs_radon=radon_s / seconds,
                                speedup_vs_siddon=siddon_s / seconds)
    print(f"\nJoseph forward {N}x{N}, {N_VIEWS} views: {seconds:.3f} s; scikit-image radon "
          f"{radon_s:.3f} s; speed-up {radon_s / seconds:.1f} x; Siddon trace {siddon_s:.3f} s "
          f"({siddon_s / seconds:.2f} x Joseph) {cpu()}")


def test_back_vs_unfiltered_iradon(benchmark, setup):
    skimage_transform = pytest.importorskip("skimage.transform")
    image, angles_deg, _, A, sinogram = setup
    start = time.perf_counter()
    skimage_transform.iradon(sinogram.T, theta=angles_deg, output_size=N, filter_name=None,
                             circle=False)
    iradon_s = time.perf_counter() - start
    forward_s = best_of(lambda: A.forward(image))

    benchmark.pedantic(A.back, args=(sinogram,), rounds=ROUNDS, iterations=1)
    seconds = benchmark.stats.stats.min
    benchmark.extra_info.update(cpu=cpu(), iradon_s=iradon_s, forward_s=forward_s,
                                speedup_vs_iradon=iradon_s / seconds,
                                back_over_forward=seconds / forward_s)
    print(f"\nexact transpose (back) {N}x{N}, {N_VIEWS} views: {seconds:.3f} s; scikit-image "
          f"unfiltered iradon {iradon_s:.3f} s; speed-up {iradon_s / seconds:.1f} x; "
          f"back / forward {seconds / forward_s:.2f} {cpu()}")


COMPILE_SETUP = """
import numpy as np
from simbench.geometry import ImageGrid, cone_poses, fan_poses
from simbench.recon.projectors import projector

A = projector(fan_poses(sid_mm=50.0, sdd_mm=100.0, n_cols=16, pitch_u_mm=1.0, n_views=4),
              ImageGrid.square_2d(8, 1.0))
B = projector(cone_poses(sid_mm=50.0, sdd_mm=100.0, n_cols=8, n_rows=6, pitch_u_mm=1.0,
                         pitch_v_mm=1.0, n_views=3),
              ImageGrid((4, 5, 6), (1.0, 1.0, 1.0), (0.0, 0.0, 0.0), 3))
"""
COMPILE_WORK = """
for P in (A, B):
    P.back(P.forward(np.ones(P.image_shape)))
"""


def test_compile_time_into_an_empty_cache(benchmark):
    # a fresh process with an empty NUMBA_CACHE_DIR compiles every projector kernel once
    wall_s, cpu_s = benchmark.pedantic(compile_in_empty_cache, args=(COMPILE_SETUP, COMPILE_WORK), rounds=1, iterations=1)
    benchmark.extra_info.update(cpu=cpu(), compile_s=wall_s, compile_cpu_s=cpu_s)
    print(f"\nprojector kernels compiled into an empty cache in {wall_s:.1f} s "
          f"({cpu_s:.1f} s of CPU time) {cpu()}")
