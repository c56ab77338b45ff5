"""Measurement physics vs tracing, in the same run.

Applying the full physics (60 energy bins, 5 materials, compound Poisson counting, sensor,
blur, cross-talk, lag, gain, electronic noise, log preprocessing) to a 720-view x 888-column
fan-beam sinogram must cost less than tracing that sinogram. Both are timed here, each as the
best of ``ROUNDS`` runs after a first call that compiles the kernels (and fills the caches of
material data, mu and the sensor's mu_en/mu, as any first realization of a scan does); the
ratio ``measure / trace`` is stored in ``extra_info``.

Run: ``python -m pytest benchmarks/bench_measure.py --benchmark-only``
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from simbench.geometry.circular import fan_poses
from simbench.measure import SpectrumArrays, measure
from simbench.measure.config import DetectorConfig, ExposureConfig, Physics, SourceConfig
from simbench.measure.noise import rng_for
from simbench.phantom.loader import parse_phantom_text
from simbench.trace import trace

# A body-sized 2-D phantom of 16 objects in 5 materials (demo data, invented layout).
PHANTOM = """
name: bench-body
dimension: 2
units: mm
objects:
  - {name: body, shape: ellipse, semi_axes: [170, 120], material: water}
  - {name: fat left, shape: ellipse, centre: [-120, 0], semi_axes: [30, 60], material: adipose}
  - {name: fat right, shape: ellipse, centre: [120, 0], semi_axes: [30, 60], material: adipose}
  - {name: lung left, shape: ellipse, centre: [-60, 30], semi_axes: [45, 60], material: lung}
  - {name: lung right, shape: ellipse, centre: [60, 30], semi_axes: [45, 60], material: lung}
  - {name: spine, shape: circle, centre: [0, -80], radius: 18, material: cortical-bone}
  - {name: sternum, shape: rectangle, centre: [0, 100], size: [40, 12], material: cortical-bone}
  - {name: rib 1, shape: circle, centre: [-140, -50], radius: 8, material: cortical-bone}
  - {name: rib 2, shape: circle, centre: [140, -50], radius: 8, material: cortical-bone}
  - {name: rib 3, shape: circle, centre: [-150, 40], radius: 7, material: cortical-bone}
  - {name: rib 4, shape: circle, centre: [150, 40], radius: 7, material: cortical-bone}
  - {name: aorta, shape: circle, centre: [20, -45], radius: 14, material: iodine-10mg/ml}
  - {name: heart, shape: ellipse, centre: [10, 10], semi_axes: [40, 35], material: iodine-10mg/ml}
  - {name: vessel 1, shape: circle, centre: [-40, -20], radius: 5, material: iodine-10mg/ml}
  - {name: vessel 2, shape: circle, centre: [50, -20], radius: 5, material: iodine-10mg/ml}
  - {name: cord, shape: circle, centre: [0, -80], radius: 7, material: water}
"""

N_VIEWS, N_COLS, N_ENERGIES = 720, 888, 60
#: timed runs of each of trace and measure (compiled before; the best run counts)
ROUNDS = 5


@pytest.fixture(scope="module")
def setup():
    phantom = parse_phantom_text(PHANTOM, "bench-body.yaml")
    poses = fan_poses(sid_mm=575.0, sdd_mm=1050.0, n_cols=N_COLS, pitch_u_mm=1.0,
                      n_views=N_VIEWS, curved=True)
    trace(phantom, poses, views=np.arange(2))  # compile outside the timing
    times = []
    for _ in range(ROUNDS):
        start = time.perf_counter()
        lengths = trace(phantom, poses)
        times.append(time.perf_counter() - start)
    from simbench.materials import spectra

    tube = spectra.tube_spectrum(120.0, filtration=(("aluminium", 2.5),), bin_kev=1.9)
    keep = tube.fluence > 0
    energies, fluence = tube.energies_kev[keep][-N_ENERGIES:], tube.fluence[keep][-N_ENERGIES:]
    assert energies.size == N_ENERGIES
    return phantom, poses, lengths, min(times), SpectrumArrays(energies, fluence)


def test_measure_vs_trace(benchmark, setup):
    phantom, poses, lengths, trace_s, spectrum = setup
    assert len(phantom.materials) == 5
    physics = Physics(
        SourceConfig("file"),
        ExposureConfig(mas_per_view=0.2),
        DetectorConfig(material="Gd2O2S", thickness_mm=1.4, electronic_noise=2.0,
                       dark_level=50.0, gain_spread=0.01, gain_drift=0.001,
                       blur_fwhm_mm=(1.2, 0.0), crosstalk=0.02, lag=0.02),
    )
    measure(lengths[:, :2], phantom.materials, physics, poses=None, pitch_mm=(1.0, 1.0),
            sdd_mm=1050.0, spectrum=spectrum)  # compile outside the timing
    result = benchmark.pedantic(
        lambda: measure(lengths, phantom.materials, physics, poses=poses, spectrum=spectrum,
                        rng=rng_for(1, "bench")), rounds=ROUNDS, iterations=1)
    measure_s = benchmark.stats.stats.min
    benchmark.extra_info.update({
        "sinogram": f"{N_VIEWS} x {N_COLS} fan beam, {len(phantom.materials)} materials",
        "energy_bins": int(spectrum.energies_kev.size),
        "trace_seconds": trace_s,
        "measure_seconds": measure_s,
        "measure_over_trace": measure_s / trace_s,
    })
    print(f"\ntrace {trace_s:.4f} s, measure {measure_s:.4f} s (best of {ROUNDS} each), "
          f"measure / trace = {measure_s / trace_s:.2f}")
    assert result.projections.shape == (N_VIEWS, N_COLS)
    assert np.all(np.isfinite(result.projections))
