"""External commands as reconstructors: code in any language, through an exchange folder.

simbench writes the acquisition and the grid into a fresh folder as ``.npy`` arrays and one
``request.json``, runs the command with a time limit, and reads back the image it wrote. A
program needs nothing but a reader and a writer of ``.npy`` files (a few dozen lines in C;
``examples/parallel_fbp.c`` is one). The layout, ``format_version`` 1::

    EXCHANGE/
      request.json             format_version, stage, grid, options, output, arrays (below),
                               geometry (every pose array) and the scan's physics record
      projections.npy          float32 (V, C) or (V, R, C): line integrals   [stage projections]
      counts.npy, flat.npy, dark.npy   float32 raw readings and frames      [stage counts]
      geometry/
        parallel.npy           int64 (1,): 1 parallel beam, 0 divergent
        curved.npy             int64 (1,): 1 equiangular curved detector, 0 flat
        source_mm.npy          float64 (V, 3) focal spot per view (zeros for parallel)
        direction.npy          float64 (V, 3) ray direction (parallel) or source to detector
        detector_centre_mm.npy float64 (V, 3)
        u_axis.npy, v_axis.npy float64 (V, 3) unit column and row axes
        col_u_mm.npy           float64 (C,) cell centres along u (arc length if curved)
        row_v_mm.npy           float64 (R,) cell centres along v
        angles_rad.npy         float64 (V,) view angle phi (NaN for free poses)
      grid/
        shape.npy              int64 (3,) nz, ny, nx
        spacing_mm.npy         float64 (3,) dx, dy, dz
        centre_mm.npy          float64 (3,) cx, cy, cz
      image.npy                WRITTEN BY THE PROGRAM: float32 or float64, (ny, nx) for a
                               2-D grid, (nz, ny, nx) for 3-D; mu in 1/mm

Frames and conventions are those of ``docs/geometry.md``: world x, y, z in mm, voxel (iz, iy,
ix) centred at ``((ix - (nx-1)/2) dx + cx, (iy - (ny-1)/2) dy + cy, (iz - (nz-1)/2) dz + cz)``.

The command is run as given, with the exchange folder's path in place of ``{exchange}`` in
its arguments, or appended as the last argument when no argument says ``{exchange}``. It runs
in its own process group, with standard input closed; when the time limit passes, the whole
group is killed. A non-zero exit, a timeout, a missing image, a wrong shape or dtype and
NaN or inf each end in one line naming the command; the exchange folder is always removed.
"""

from __future__ import annotations

import json
import os
import shlex
import signal
import subprocess
import tempfile
from pathlib import Path
from typing import Sequence

import numpy as np

from simbench.errors import InputError, Where
from simbench.geometry.grid import ImageGrid
from simbench.recon.contract import Acquisition, Reconstructor, check_image

FORMAT_VERSION = 1
#: default time limit of an external command, seconds
DEFAULT_TIME_LIMIT_S = 3600.0


def write_exchange(folder: Path, acquisition: Acquisition, grid: ImageGrid, stage: str,
                   options: dict) -> dict:
    """Write the exchange folder for one reconstruction; returns ``request.json``'s content."""
    poses = acquisition.poses
    arrays = {}
    stage_arrays = ("projections",) if stage == "projections" else ("counts", "flat", "dark")
    for name in stage_arrays:
        np.save(folder / f"{name}.npy", np.ascontiguousarray(getattr(acquisition, name),
                                                             dtype=np.float32))
        arrays[name] = f"{name}.npy"
    geometry = folder / "geometry"
    geometry.mkdir()
    pose_arrays = {
        "parallel": np.array([int(poses.parallel)], dtype=np.int64),
        "curved": np.array([int(poses.curved)], dtype=np.int64),
        "source_mm": poses.source, "direction": poses.direction,
        "detector_centre_mm": poses.detector_centre, "u_axis": poses.u_axis,
        "v_axis": poses.v_axis, "col_u_mm": poses.col_u_mm, "row_v_mm": poses.row_v_mm,
        "angles_rad": poses.angles_rad,
    }
    for name, value in pose_arrays.items():
        np.save(geometry / f"{name}.npy", np.ascontiguousarray(value))
        arrays[f"geometry/{name}"] = f"geometry/{name}.npy"
    (folder / "grid").mkdir()
    for name, value in (("shape", np.asarray(grid.shape, dtype=np.int64)),
                        ("spacing_mm", np.asarray(grid.spacing_mm, dtype=np.float64)),
                        ("centre_mm", np.asarray(grid.centre_mm, dtype=np.float64))):
        np.save(folder / "grid" / f"{name}.npy", value)
        arrays[f"grid/{name}"] = f"grid/{name}.npy"
    request = {
        "format_version": FORMAT_VERSION,
        "stage": stage,
        "grid": {"shape": list(grid.shape), "spacing_mm": list(grid.spacing_mm),
                 "centre_mm": list(grid.centre_mm), "dimension": grid.dimension,
                 "image_shape": list(grid.image_shape)},
        "options": {k: v for k, v in options.items()},
        "output": "image.npy",
        "arrays": arrays,
        "geometry": poses.to_record(),
        "physics": {k: acquisition.metadata.get(k) for k in ("physics", "measurement", "truth")
                    if k in acquisition.metadata},
    }
    (folder / "request.json").write_text(json.dumps(request, indent=1, sort_keys=True),
                                         encoding="utf-8")
    return request


def run_command(command: Sequence[str], acquisition: Acquisition, grid: ImageGrid, *,
                stage: str, options: dict, name: str,
                time_limit_s: float = DEFAULT_TIME_LIMIT_S) -> np.ndarray:
    """Run an external reconstructor through an exchange folder; return its checked image.

    Parameters
    ----------
    command : sequence of str
        The program and its arguments; ``{exchange}`` is replaced by the exchange folder.
    acquisition : Acquisition
    grid : ImageGrid
    stage : str
        ``"projections"`` or ``"counts"``: which arrays are written.
    options : dict
        Passed to the program in ``request.json``.
    name : str
        The reconstructor's name, for messages.
    time_limit_s : float

    Returns
    -------
    float32 ndarray, ``grid.image_shape``
    """
    where = Where(f"command '{name}'")
    with tempfile.TemporaryDirectory(prefix="simbench-exchange-") as tmp:
        folder = Path(tmp)
        write_exchange(folder, acquisition.for_stage(stage), grid, stage, options)
        argv = [a.replace("{exchange}", str(folder)) for a in command]
        if not any("{exchange}" in a for a in command):
            argv.append(str(folder))
        try:
            process = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                       stderr=subprocess.PIPE, start_new_session=True)
        except OSError as exc:
            raise InputError(where, f"cannot start '{argv[0]}': {exc.strerror or exc}",
                             "a program that exists and can be executed") from None
        try:
            _, stderr = process.communicate(timeout=time_limit_s)
        except subprocess.TimeoutExpired:
            _kill_group(process)
            raise InputError(where, f"did not finish within {time_limit_s:g} s and was stopped",
                             "a faster program, or a longer time limit") from None
        except BaseException:
            _kill_group(process)
            raise
        last = _last_line(stderr)
        if process.returncode != 0:
            raise InputError(where, f"exited with code {process.returncode}"
                             + (f": {last}" if last else ""), "a program that exits with 0 "
                             "after writing image.npy")
        path = folder / "image.npy"
        if not path.is_file():
            raise InputError(where, "wrote no image.npy in the exchange folder"
                             + (f" (it said: {last})" if last else ""),
                             f"a float32 or float64 .npy shaped {tuple(grid.image_shape)}")
        try:
            image = np.load(path, allow_pickle=False)
        except (ValueError, OSError, EOFError) as exc:
            raise InputError(where, f"wrote an unreadable image.npy: {exc}".splitlines()[0],
                             "a .npy file written by numpy or the .npy format") from None
        if image.dtype not in (np.float32, np.float64):
            raise InputError(where, f"wrote image.npy of dtype {image.dtype}",
                             "float32 or float64")
        return check_image(image, grid, name, label="command")


def _kill_group(process: subprocess.Popen) -> None:
    try:
        os.killpg(process.pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass
    process.wait()


def _last_line(stderr: bytes) -> str:
    lines = [line.strip() for line in stderr.decode("utf-8", "replace").splitlines()
             if line.strip()]
    return lines[-1][:200] if lines else ""


def external_reconstructor(name: str, command: str | Sequence[str], *,
                           stage: str = "projections",
                           time_limit_s: float = DEFAULT_TIME_LIMIT_S) -> Reconstructor:
    """A :class:`Reconstructor` that runs ``command`` through an exchange folder.

    Parameters
    ----------
    name : str
    command : str or sequence of str
        A command line (split like a shell, no shell involved) or its words.
    stage : str
    time_limit_s : float

    Notes
    -----
    An external command declares no options: whatever options are given reach it, as
    written, in ``request.json``.
    """
    words = shlex.split(command) if isinstance(command, str) else list(command)
    if not words:
        raise InputError(Where(f"command '{name}'"), "the command is empty",
                         "a program and its arguments")

    def run(acquisition: Acquisition, grid: ImageGrid, **options) -> np.ndarray:
        return run_command(words, acquisition, grid, stage=stage, options=options, name=name,
                           time_limit_s=time_limit_s)

    return _PassThrough(name=name, function=run, stage=stage, options=(),
                        summary="external command: " + shlex.join(words),
                        origin="external command")


class _PassThrough(Reconstructor):
    """An external reconstructor: options are not declared, so they pass through unchecked."""

    def check_options(self, given: dict, where: Where | None = None) -> dict:
        return dict(given)
