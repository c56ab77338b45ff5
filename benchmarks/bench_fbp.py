"""Analytic reconstruction benchmarks: parallel-beam FBP of a 512 x 512 image from 720 views
against scikit-image's ``iradon`` on the same sinogram in the same run (speed and error to the
truth), FDK throughput at 256^3 from 360 views of 384 x 288 cells against a direct numpy
backprojection in the same run, and the time numba takes to compile the reconstruction
kernels into an empty cache.

Every figure is printed with the CPU numba compiled for. Each speed is the best of ``ROUNDS``
runs after a first call that compiles (or loads) the kernels; wall-clock and process CPU
times are both given, since other processes on a shared machine slow the wall clock.

Run: ``python -m pytest benchmarks/bench_fbp.py --benchmark-only -s``
"""

from __future__ import annotations

import time

import numba
import numpy as np
import pytest
from support import compile_in_empty_cache, cpu
from scipy.ndimage import map_coordinates

from simbench.data import shipped_files
from simbench.geometry import ImageGrid
from simbench.geometry.circular import cone_poses, parallel_poses
from simbench.materials import mu_table
from simbench.phantom import load_phantom, rasterize
from simbench.recon.analytic import fbp, fdk
from simbench.trace import line_integrals, trace

N, N_VIEWS, PIXEL_MM = 512, 720, 0.5
#: timed runs of each of our calls (the best counts); scikit-image runs once (seconds)
ROUNDS = 3
ENERGY_KEV = 60.0



def best_of(call, rounds=ROUNDS) -> tuple[float, float]:
    """Best wall-clock and best process CPU seconds of ``rounds`` calls."""
    wall, cpu_s = [], []
    for _ in range(rounds):
        start, start_cpu = time.perf_counter(), time.process_time()
        call()
        wall.append(time.perf_counter() - start)
        cpu_s.append(time.process_time() - start_cpu)
    return min(wall), min(cpu_s)


def test_parallel_fbp_vs_iradon(benchmark):
    skimage_transform = pytest.importorskip("skimage.transform")
    phantom = load_phantom(shipped_files("phantoms")["shepp-logan"])
    # an odd number of columns puts scikit-image's detector centre (index C // 2) on ours
    n_cols = int(np.ceil(N * np.sqrt(2))) | 1
    poses = parallel_poses(n_cols=n_cols, pitch_u_mm=PIXEL_MM, n_views=N_VIEWS)
    sino = line_integrals(trace(phantom, poses), mu_table(phantom.materials, [ENERGY_KEV])[:, 0])
    # scikit-image puts the centre of an even-sized image on pixel n // 2, half a pixel off
    # our grid convention: reconstruct on its pixel centres, so that both images sample the
    # same points and are scored against the same truth
    half = PIXEL_MM / 2
    grid = ImageGrid.square_2d(N, PIXEL_MM, (-half, -half))
    fbp(poses, sino, grid)  # compile (or load) outside the timing

    start, start_cpu = time.perf_counter(), time.process_time()
    theirs = skimage_transform.iradon(sino.T, theta=-np.degrees(poses.angles_rad),
                                      output_size=N, filter_name="ramp",
                                      circle=False) / PIXEL_MM
    iradon_s, iradon_cpu_s = time.perf_counter() - start, time.process_time() - start_cpu

    ours = benchmark.pedantic(fbp, args=(poses, sino, grid), rounds=ROUNDS, iterations=1)
    seconds = benchmark.stats.stats.min
    _, cpu_s = best_of(lambda: fbp(poses, sino, grid), rounds=1)

    truth = rasterize(phantom, grid, ENERGY_KEV)
    x = grid.axis_mm("x")
    inside = np.hypot(*np.meshgrid(x, x)) < 0.45 * N * PIXEL_MM
    rmse = float(np.sqrt(np.mean((ours - truth)[inside] ** 2)))
    rmse_theirs = float(np.sqrt(np.mean((theirs - truth)[inside] ** 2)))
    assert rmse <= rmse_theirs * (1 + 1e-4)  # the same method: equal up to float32 rounding
    benchmark.extra_info.update(cpu=cpu(), iradon_s=iradon_s, iradon_cpu_s=iradon_cpu_s,
                                cpu_s=cpu_s, speedup_vs_iradon=iradon_s / seconds,
                                rmse_per_mm=rmse, iradon_rmse_per_mm=rmse_theirs)
    print(f"\nparallel FBP {N}x{N}, {N_VIEWS} views: {seconds:.3f} s ({cpu_s:.2f} s CPU); "
          f"scikit-image iradon {iradon_s:.2f} s ({iradon_cpu_s:.2f} s CPU); speed-up "
          f"{iradon_s / seconds:.1f} x (CPU time {iradon_cpu_s / cpu_s:.1f} x); RMSE to truth "
          f"{rmse:.3e} /mm vs iradon {rmse_theirs:.3e} /mm {cpu()}")


def _direct_backprojection(filtered, poses, grid, views):
    """The FDK sum over a few views in numpy (scipy's linear interpolation), for scale."""
    sdd = float(np.linalg.norm(poses.detector_centre[0] - poses.source[0]))
    z, y, x = np.meshgrid(grid.axis_mm("z"), grid.axis_mm("y"), grid.axis_mm("x"),
                          indexing="ij")
    out = np.zeros(z.shape)
    for i in views:
        s = poses.source[i]
        a = (x - s[0]) * poses.direction[i, 0] + (y - s[1]) * poses.direction[i, 1]
        b = (x - s[0]) * poses.u_axis[i, 0] + (y - s[1]) * poses.u_axis[i, 1]
        cu = (sdd * b / a - poses.col_u_mm[0]) / poses.pitch_u_mm
        cv = (sdd * (z - s[2]) / a - poses.row_v_mm[0]) / poses.pitch_v_mm
        out += map_coordinates(filtered[i], [cv, cu], order=1, mode="constant") / a**2
    return out


def test_fdk_throughput(benchmark):
    # flat panel 384 x 288 cells of 1 mm, magnification 1.5; a 256^3 grid of 0.55 mm voxels
    # (141 mm) projects onto the panel in every view, so every voxel-view pair is an update
    poses = cone_poses(sid_mm=600.0, sdd_mm=900.0, n_cols=384, n_rows=288, pitch_u_mm=1.0,
                       pitch_v_mm=1.0, n_views=360)
    grid = ImageGrid((256, 256, 256), (0.55, 0.55, 0.55))
    rng = np.random.default_rng(0)
    sino = rng.random(poses.projection_shape, dtype=np.float32)
    fdk(poses, sino, ImageGrid((2, 8, 8), (1.0, 1.0, 1.0)))  # compile outside the timing
    updates = float(np.prod(grid.shape)) * poses.n_views

    views = np.array([0, 45])
    start, start_cpu = time.perf_counter(), time.process_time()
    _direct_backprojection(sino, poses, grid, views)
    numpy_rate = np.prod(grid.shape) * len(views) / (time.perf_counter() - start)
    numpy_cpu_rate = np.prod(grid.shape) * len(views) / (time.process_time() - start_cpu)

    benchmark.pedantic(fdk, args=(poses, sino, grid), rounds=ROUNDS, iterations=1)
    seconds = benchmark.stats.stats.min
    _, cpu_s = best_of(lambda: fdk(poses, sino, grid), rounds=1)
    rate, cpu_rate = updates / seconds, updates / cpu_s * numba.get_num_threads()
    benchmark.extra_info.update(cpu=cpu(), voxel_updates_per_s=rate,
                                voxel_updates_per_cpu_s_times_threads=cpu_rate,
                                numpy_voxel_updates_per_s=numpy_rate,
                                ratio_vs_numpy=rate / numpy_rate)
    print(f"\nFDK 256^3 from 360 views of 384 x 288: {seconds:.2f} s = {rate:.3g} voxel updates/s "
          f"({cpu_s:.2f} s CPU: {cpu_rate:.3g} /s if every thread had its own core); numpy "
          f"direct backprojection {numpy_rate:.3g} /s ({numpy_cpu_rate:.3g} /s CPU); ratio "
          f"{rate / numpy_rate:.0f} x {cpu()}")


COMPILE_SETUP = """
import numpy as np
from simbench.geometry import ImageGrid
from simbench.geometry.circular import cone_poses, fan_poses, parallel_poses
from simbench.recon.analytic import fbp, fdk

scans = [
    (parallel_poses(n_cols=16, pitch_u_mm=1.0, n_views=4), ImageGrid.square_2d(8, 1.0)),
    (fan_poses(sid_mm=50.0, sdd_mm=100.0, n_cols=16, pitch_u_mm=1.0, n_views=4),
     ImageGrid.square_2d(8, 1.0)),
    (cone_poses(sid_mm=50.0, sdd_mm=100.0, n_cols=8, n_rows=6, pitch_u_mm=1.0,
                pitch_v_mm=1.0, n_views=3), ImageGrid((4, 5, 6), (1.0, 1.0, 1.0))),
]
"""
COMPILE_WORK = """
for poses, grid in scans:
    (fdk if poses.dimension == 3 else fbp)(poses, np.ones(poses.projection_shape), grid)
"""


def test_compile_time_into_an_empty_cache(benchmark):
    # a fresh process with an empty NUMBA_CACHE_DIR compiles every reconstruction kernel once
    wall_s, cpu_s = benchmark.pedantic(compile_in_empty_cache, args=(COMPILE_SETUP, COMPILE_WORK), rounds=1, iterations=1)
    benchmark.extra_info.update(cpu=cpu(), compile_s=wall_s, compile_cpu_s=cpu_s)
    print(f"\nreconstruction kernels compiled into an empty cache in {wall_s:.1f} s "
          f"({cpu_s:.1f} s of CPU time) {cpu()}")
