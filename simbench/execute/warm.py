"""Compile kernels in a second process while the run compiles its own: a faster cold start.

On a fresh install (or a CI runner without a kept numba cache) a run compiles every kernel it
uses, one after the other, on one core: the tracer and the measurement first (the reference
energy probe), then the phantom's rasterizer and labels, then the reconstructors. numba's
compiler is single-threaded, so the second core idles meanwhile. :func:`start` launches
``python -m simbench.execute.warm SCENARIO``, which compiles the phantom and reconstruction
kernels of that scenario on tiny inputs with the same argument types, and writes them to
numba's cache; when the run reaches those kernels it loads them from the cache instead of
compiling them (or, if it gets there first, compiles them itself: nothing waits on the
helper). The helper writes nothing else, prints nothing, and is stopped when the run ends.

It is started only when the kernels are not cached yet and at least two CPUs are available.
Set ``SIMBENCH_COMPILE_HELPER=0`` to never start it.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path


def _cached(*dispatchers) -> bool:
    """True when every one of these numba kernels has an index in numba's cache."""
    try:
        return all(Path(d._cache._cache_file._index_path).is_file() for d in dispatchers)
    except AttributeError:  # another numba version: assume cached, start nothing
        return True


def needed() -> bool:
    """Whether a compile helper would save time: kernels not cached, a second CPU free."""
    if os.environ.get("SIMBENCH_COMPILE_HELPER", "1").strip() == "0":
        return False
    if len(os.sched_getaffinity(0)) < 2:
        return False
    from simbench.phantom import kernels
    from simbench.recon import backprojection_kernels

    return not _cached(kernels.rasterize_objects, kernels.label_objects,
                       backprojection_kernels._blocks)


def start(scenario_file: str | Path) -> subprocess.Popen | None:
    """Start the compile helper for a scenario file, or return None when it is not needed."""
    path = Path(scenario_file)
    if not path.is_file() or not needed():
        return None
    try:
        return subprocess.Popen([sys.executable, "-m", "simbench.execute.warm", str(path)],
                                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
    except OSError:
        return None


def stop(helper: subprocess.Popen | None) -> None:
    """Stop the helper (it may still be compiling kernels this run did not need)."""
    if helper is None or helper.poll() is not None:
        return
    helper.terminate()
    try:
        helper.wait(timeout=5)
    except subprocess.TimeoutExpired:
        helper.kill()
        helper.wait()


def compile_for(scenario_file: str | Path) -> None:
    """Compile the phantom and built-in reconstruction kernels of a scenario, on tiny inputs.

    The argument types are those of the real run (the same phantom arrays, the same
    geometry and projection dtypes); only the sizes differ, which numba does not key on.
    """
    import numpy as np

    from simbench.geometry.grid import ImageGrid
    from simbench.phantom import rasterize
    from simbench.phantom.rasterize import label_map
    from simbench.recon.contract import Acquisition
    from simbench.recon.registry import find_reconstructor
    from simbench.scenario import load_scenario

    scenario = load_scenario(scenario_file)
    poses = scenario.scanner.geometry.poses()
    three_d = poses.dimension == 3
    grid = ImageGrid((4, 8, 8) if three_d else (1, 8, 8), (1.0, 1.0, 1.0), (0.0, 0.0, 0.0),
                     3 if three_d else 2)
    rasterize(scenario.phantom, grid, 60.0)
    label_map(scenario.phantom, grid)
    shape = poses.projection_shape
    ones = np.ones(shape, np.float32)
    frame = np.ones(shape[1:], np.float32)
    acquisition = Acquisition(poses, projections=ones * 0.1, counts=ones, flat=frame * 2.0,
                              dark=frame * 0.0, metadata={})
    for spec in scenario.algorithms:
        try:
            reconstructor = find_reconstructor(spec.use or spec.name, allow_code=False)
            options = reconstructor.check_options(spec.options)
        except Exception:  # noqa: BLE001 - plug-ins are left to the run
            continue
        if spec.command is not None or reconstructor.origin != "built-in":
            continue
        for key in ("water_correction",):
            if key in options:
                options[key] = False
        for key in ("iterations", "subsets"):
            if key in options:
                options[key] = 1
        try:
            reconstructor.function(acquisition, grid, **options)
        except Exception:  # noqa: BLE001 - an optimization only; the run reports real errors
            continue


def _main(argv: list[str]) -> int:
    try:
        compile_for(argv[0])
    except BaseException:  # noqa: BLE001 - never a message from a helper nobody asked for
        return 1
    return 0


if __name__ == "__main__":  # pragma: no cover - run as a process by start()
    sys.exit(_main(sys.argv[1:]))
