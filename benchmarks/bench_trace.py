"""Tracer benchmarks: analytic cone beam (ray x object pairs per second) and 2-D Siddon vs
scikit-image's ``radon`` on the same image in the same run.

Run: ``python -m pytest benchmarks/bench_trace.py --benchmark-only``
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from trace_builders import (  # noqa: E402
    divergent_poses, obj, parallel_poses, phantom_of, rot_z, voxel_phantom,
)

from simbench.geometry.rays import cell_rays  # noqa: E402
from simbench.trace import trace  # noqa: E402


def cone_beam_phantom():
    """A water cylinder holding 21 inserts at several z (demo data, invented sizes)."""
    items = [obj("cylinder", half_sizes=(100.0, 100.0, 90.0), material=0)]
    for z in (-50.0, 0.0, 50.0):
        for i, ang in enumerate(np.radians([0, 72, 144, 216, 288])):
            c = (60 * np.cos(ang), 60 * np.sin(ang), z)
            if i % 2 == 0:
                items.append(obj("ellipsoid", centre=c, half_sizes=(12.0, 12.0, 12.0),
                                 material=1 + i % 3))
            else:
                items.append(obj("cylinder", centre=c, half_sizes=(10.0, 10.0, 15.0),
                                 material=1 + i % 3, rotation=rot_z(ang)))
    items.append(obj("box", centre=(0.0, 0.0, 0.0), half_sizes=(15.0, 25.0, 10.0),
                     rotation=rot_z(0.3), material=1))
    items.append(obj("cone", centre=(0.0, 20.0, -55.0), half_sizes=(0, 0, 20.0),
                     radii=(5.0, 15.0), material=2))
    items.append(obj("cone", centre=(0.0, -20.0, 55.0), half_sizes=(0, 0, 20.0),
                     radii=(12.0, 0.0), material=3))
    items.append(obj("ellipsoid", centre=(0.0, 30.0, 20.0), half_sizes=(8.0, 5.0, 6.0),
                     mode="add", material=3))
    items.append(obj("cylinder", centre=(25.0, -30.0, 0.0), half_sizes=(4.0, 4.0, 80.0),
                     material=2))
    return phantom_of(items, n_materials=4)


@pytest.fixture(scope="module")
def cone_setup():
    phantom = cone_beam_phantom()
    poses = divergent_poses(np.linspace(0, 2 * np.pi, 360, endpoint=False), 500.0, 1000.0,
                            256, 1.8, n_rows=256, pitch_v=1.8)
    trace(phantom, poses, views=np.arange(2))  # compile outside the timing
    return phantom, poses


def test_cone_beam_analytic(benchmark, cone_setup):
    phantom, poses = cone_setup
    n_rays = poses.n_views * poses.n_rows * poses.n_cols
    n_obj = phantom.objects.count

    # reference in the same process: numpy closed-form chord of one sphere for all rays,
    # given the rays (ray building not timed), reported as pairs per second
    rays = cell_rays(poses)
    t = time.perf_counter()
    w = -rays[..., :3]
    along = (w * rays[..., 3:6]).sum(-1)
    dist2 = (w * w).sum(-1) - along ** 2
    _ = 2.0 * np.sqrt(np.maximum(100.0 ** 2 - dist2, 0.0))
    ref_pairs_per_s = n_rays / (time.perf_counter() - t)
    del rays, w, along, dist2, _

    result = benchmark.pedantic(trace, args=(phantom, poses), rounds=3, iterations=1)
    assert result.shape == (4, 360, 256, 256)
    seconds = benchmark.stats.stats.min
    pairs_per_s = n_rays * n_obj / seconds
    benchmark.extra_info["objects"] = n_obj
    benchmark.extra_info["rays"] = n_rays
    benchmark.extra_info["ray_object_pairs_per_s"] = pairs_per_s
    benchmark.extra_info["numpy_one_sphere_pairs_per_s"] = ref_pairs_per_s
    benchmark.extra_info["ratio_vs_numpy_one_sphere"] = pairs_per_s / ref_pairs_per_s
    print(f"\nanalytic cone beam: {n_rays} rays x {n_obj} objects in {seconds:.3f} s = "
          f"{pairs_per_s:.3g} pairs/s ({pairs_per_s / ref_pairs_per_s:.2f} x numpy one-sphere "
          f"closed form at {ref_pairs_per_s:.3g} pairs/s)")


def test_siddon_2d_vs_radon(benchmark):
    skimage_transform = pytest.importorskip("skimage.transform")
    n = 512
    y, x = np.mgrid[-1:1:n * 1j, -1:1:n * 1j]
    image = np.exp(-((x - 0.1) ** 2 + y ** 2) / 0.2) * (x * x + y * y < 0.9)
    angles_deg = np.arange(720) * 0.5
    phantom = voxel_phantom(image, (1.0, 1.0, 1.0), kind="mu", dimension=2)
    n_cols = int(np.ceil(n * np.sqrt(2))) + 1
    poses = parallel_poses(np.radians(angles_deg), n_cols, 1.0)
    trace(phantom, poses, views=np.arange(2))  # compile outside the timing

    t = time.perf_counter()
    skimage_transform.radon(image, theta=angles_deg, circle=False)
    radon_s = time.perf_counter() - t

    benchmark.pedantic(trace, args=(phantom, poses), rounds=3, iterations=1)
    seconds = benchmark.stats.stats.min
    benchmark.extra_info["radon_s"] = radon_s
    benchmark.extra_info["speedup_vs_radon"] = radon_s / seconds
    print(f"\nSiddon 2-D {n}x{n}, 720 views: {seconds:.3f} s; skimage radon {radon_s:.3f} s; "
          f"speed-up {radon_s / seconds:.2f} x")
