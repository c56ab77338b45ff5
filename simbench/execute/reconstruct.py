"""One reconstruction, from a scan folder to a reconstruction folder.

The folder (committed whole by :func:`simbench.folders.commit_folder`, kind
``reconstruction``)::

    OUT/
      image.npy               float32 image, mu in 1/mm: (ny, nx) or (nz, ny, nx)
      reconstruction.json     grid, algorithm (name, stage, origin), options, the scan it
                              came from, wall time, peak memory, versions
      complete.json           written last: size and SHA-256 of every other file
"""

from __future__ import annotations

import math
import os
import time
from pathlib import Path

import numpy as np

import simbench
from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid
from simbench.geometry.poses import Poses

#: the largest default grid along x and y (a larger one must be asked for)
MAX_DEFAULT_PIXELS = 1024


def default_grid(poses: Poses) -> ImageGrid:
    """A grid that covers the scan's field of view at about the detector's sampling.

    2-D: as many pixels across as detector columns (at most :data:`MAX_DEFAULT_PIXELS`),
    spanning the field-of-view diameter. 3-D: the same in x and y, and as many slices as
    rows, each the row pitch at the isocentre (times the magnification's inverse), covering
    the source's travel along z for helical scans.
    """
    from simbench.geometry import field_of_view_radius_mm

    radius = field_of_view_radius_mm(poses)
    if not math.isfinite(radius) or radius <= 0:
        # free poses or an offset detector seen from one side only: half the detector width
        radius = 0.5 * (poses.col_u_mm.max() - poses.col_u_mm.min() + poses.pitch_u_mm)
    n = int(min(MAX_DEFAULT_PIXELS, max(16, poses.n_cols)))
    pixel = 2.0 * radius / n
    if poses.dimension == 2:
        return ImageGrid.square_2d(n, pixel)
    if poses.parallel:
        dz = poses.pitch_v_mm
    else:
        sid = np.linalg.norm(poses.source[:, :2], axis=1).mean()
        sdd = np.linalg.norm((poses.detector_centre - poses.source), axis=1).mean()
        dz = poses.pitch_v_mm * sid / sdd
    z = poses.source[:, 2] if not poses.parallel else poses.detector_centre[:, 2]
    travel = float(z.max() - z.min())
    nz = int(max(1, round(poses.n_rows + travel / dz)))
    return ImageGrid((nz, n, n), (pixel, pixel, dz), (0.0, 0.0, float(z.mean())), 3)


def grid_from_options(poses: Poses, size: str | None, voxel: str | None,
                      centre: str | None) -> ImageGrid:
    """The grid from ``--grid-size N`` or ``NX,NY[,NZ]``, ``--voxel-size MM[,MM,MM]`` and
    ``--grid-centre X,Y[,Z]`` (mm); what is not given comes from :func:`default_grid`."""
    base = default_grid(poses)
    dim = poses.dimension

    def numbers(text: str, option: str, kind, low: float, high: float, counts) -> list:
        where = Where("<command line>", field=option)
        try:
            values = [kind(v) for v in text.replace("x", ",").split(",")]
        except ValueError:
            values = []
        if len(values) not in counts or not all(math.isfinite(v) and low <= v <= high
                                                for v in values):
            how_many = " or ".join(map(str, counts))
            raise InputError(where, f"'{text}' is not valid",
                             f"{how_many} value{'s' if counts != (1,) else ''} (comma-separated) "
                             f"from {low:g} to {high:g}")
        return values

    shape, spacing, middle = list(base.shape), list(base.spacing_mm), list(base.centre_mm)
    if size is not None:
        values = numbers(size, "--grid-size", int, 1, 8192, (1, 2) if dim == 2 else (1, 2, 3))
        if len(values) == 1:
            values = [values[0], values[0]]
        shape[2], shape[1] = values[0], values[1]
        if len(values) == 3:
            shape[0] = values[2]
        if voxel is None:  # keep the field of view covered
            width = base.shape[2] * base.spacing_mm[0]
            spacing[0] = spacing[1] = width / max(shape[1], shape[2])
    if voxel is not None:
        values = numbers(voxel, "--voxel-size", float, 1e-4, 1e4, (1, 3) if dim == 3 else (1,))
        spacing = [values[0], values[0], values[0] if dim == 2 else spacing[2]] \
            if len(values) == 1 else values
        if size is None:  # keep the field of view covered
            width = base.shape[2] * base.spacing_mm[0]
            shape[1] = shape[2] = max(1, int(round(width / spacing[0])))
    if centre is not None:
        values = numbers(centre, "--grid-centre", float, -1e6, 1e6, (2,) if dim == 2 else (2, 3))
        middle = values + [middle[2]] if len(values) == 2 else values
    return ImageGrid(tuple(int(v) for v in shape), tuple(float(v) for v in spacing),
                     tuple(float(v) for v in middle), dim)


def check_grid_inside_orbit(poses: Poses, grid: ImageGrid, where: Where) -> None:
    """Refuse, for a divergent beam, a grid whose corners reach the source's path: voxels at or
    beyond the source are seen from behind it, and no method can reconstruct them.

    The reach is the largest distance of a voxel centre of the grid from the z axis; the
    orbit's radius the smallest distance of a source position from that axis.
    """
    if poses.parallel:
        return
    xs, ys = grid.axis_mm("x"), grid.axis_mm("y")
    reach = math.hypot(max(abs(xs[0]), abs(xs[-1])), max(abs(ys[0]), abs(ys[-1])))
    orbit = float(np.min(np.hypot(poses.source[:, 0], poses.source[:, 1])))
    if reach >= orbit:
        raise InputError(where, f"the grid reaches {reach:.6g} mm from the axis, at or beyond "
                         f"the source's path ({orbit:.6g} mm from it)",
                         "a smaller grid or voxel size, inside the source's path")


def check_reconstruction_cost(acquisition, grid: ImageGrid) -> None:
    """Refuse a reconstruction of ``acquisition`` on ``grid`` over the memory budget
    (:func:`check_reconstruction_memory`)."""
    arrays = [a for a in (acquisition.projections, acquisition.counts) if a is not None]
    check_reconstruction_memory(float(max((a.size for a in arrays), default=0)), grid)


def check_reconstruction_memory(readings: float, grid: ImageGrid) -> None:
    """Refuse a reconstruction whose image and working copies exceed the memory budget.

    The estimate: the image in float64 four times over (iterative methods hold the image,
    a gradient, a search direction and a scratch copy) plus the projections in float64
    three times over (data, residual, filtered copy).
    """
    from simbench.budget import check_bytes

    voxels = float(np.prod(grid.shape))
    check_bytes(32.0 * voxels + 24.0 * readings, Where("<command line>", field="--grid-size"),
                f"reconstructing a {' x '.join(map(str, grid.shape))} grid from "
                f"{int(readings)} readings", "a smaller grid (--grid-size, --voxel-size)")


def run_reconstruction(scan_folder: Path, reconstructor, options: dict, out: Path, *,
                       grid: ImageGrid | None = None, grid_options=(None, None, None),
                       checksums: bool = True) -> str:
    """Reconstruct a scan folder with one reconstructor and commit the result folder.

    Parameters
    ----------
    scan_folder : Path
        Written by ``simbench scan`` (verified against its marker).
    reconstructor : simbench.recon.Reconstructor
    options : dict
        Option values as given (text from the command line is converted and checked).
    out : Path
        The reconstruction folder.
    grid : ImageGrid, optional
        Default: from ``grid_options`` (size, voxel, centre) and the scan's geometry.
    checksums : bool
        Verify the scan folder's checksums before reading it.

    Returns
    -------
    str
        A one-line summary.
    """
    from simbench.atomic import write_json
    from simbench.folders import commit_folder
    from simbench.recon.contract import Acquisition

    checked = reconstructor.check_options(options)
    acquisition = Acquisition.from_folder(scan_folder, checksums=checksums)
    if reconstructor.stage not in acquisition.stages:
        raise InputError(Where(str(scan_folder)), f"the scan has no {reconstructor.stage} data "
                         f"for '{reconstructor.name}'", "a scan folder written by simbench scan")
    grid = grid or grid_from_options(acquisition.poses, *grid_options)
    check_reconstruction_cost(acquisition, grid)
    with commit_folder(out, "reconstruction") as staging:
        image, seconds, peak = timed_reconstruction(reconstructor, acquisition, grid, checked)
        np.save(staging / "image.npy", image, allow_pickle=False)
        write_json(staging / "reconstruction.json", {
            "what": "reconstructed image, mu in 1/mm, float32",
            "layout": "(ny, nx)" if grid.dimension == 2 else "(nz, ny, nx)",
            "grid": {"shape": list(grid.shape), "spacing_mm": list(grid.spacing_mm),
                     "centre_mm": list(grid.centre_mm), "dimension": grid.dimension},
            "algorithm": {"name": reconstructor.name, "stage": reconstructor.stage,
                          "origin": reconstructor.origin, "summary": reconstructor.summary},
            "options": checked,
            "scan": {"folder": str(scan_folder),
                     "reference_energy_kev": acquisition.metadata.get("truth", {}).get(
                         "reference_energy_kev")},
            "wall_time_s": round(seconds, 4),
            "peak_memory_bytes": int(peak),
            "simbench_version": simbench.__version__,
            "caution": simbench.CAUTION,
        })
    return (f"wrote {out}/ (image.npy {tuple(image.shape)}, reconstruction.json, complete.json) "
            f"— {reconstructor.name} in {seconds:.2f} s, mu range {image.min():.4g} to "
            f"{image.max():.4g} /mm")


def timed_reconstruction(reconstructor, acquisition, grid: ImageGrid, options: dict
                         ) -> tuple[np.ndarray, float, int]:
    """Run a reconstructor; return its image, wall time (s) and peak memory (bytes).

    The peak memory is the largest rise of the process's resident set above its level at the
    start, sampled every 5 ms by a watcher thread (``/proc/self/statm``): it counts numpy's
    and numba's allocations alike, which a Python allocation tracer would not, and it is
    this call's own peak, not the process's lifetime high. Short spikes between two samples
    can be missed; where ``/proc`` is absent it is 0.
    """
    import threading

    page = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096
    start = _resident_bytes(page)
    peak = [start]
    done = threading.Event()

    def watch() -> None:
        while not done.wait(0.005):
            peak[0] = max(peak[0], _resident_bytes(page))

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    started = time.perf_counter()
    try:
        image = reconstructor.run(acquisition, grid, options)
    finally:
        seconds = time.perf_counter() - started
        done.set()
        watcher.join()
    peak[0] = max(peak[0], _resident_bytes(page))
    return image, seconds, int(max(0, peak[0] - start))


def _resident_bytes(page: int) -> int:
    try:
        with open("/proc/self/statm", "rb") as handle:
            return int(handle.read().split()[1]) * page
    except (OSError, ValueError, IndexError):
        return 0
