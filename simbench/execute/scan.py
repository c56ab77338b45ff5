"""One scan, from files to a folder: trace, measure, write.

The folder follows ARCHITECTURE.md's run layout::

    OUT/
      truth/line_integrals.npy   exact monochromatic line integrals at the reference energy
      truth/path_lengths.npy     per-material path lengths, mm (n_materials, *projection shape)
      measured/counts.npy        raw readings (dark level included)
      measured/flat.npy          air frame (averaged over its readings)
      measured/dark.npy          dark frame (averaged over its readings)
      measured/projections.npy   ln((flat - dark) / (counts - dark)), starvation floor applied
      scan.json                  every setting: phantom, geometry, physics, seed, versions

Every file is written atomically and ``scan.json`` last, so a folder with ``scan.json`` is
complete.
"""

from __future__ import annotations

import time
import warnings
from pathlib import Path

import numpy as np

import simbench
from simbench.errors import InputError, InputWarning, Where


def edge_columns(path_lengths: np.ndarray) -> np.ndarray:
    """The largest path length in the first and last detector column of each view, shaped
    (materials, views, 2): what :func:`warn_if_truncated` needs of a block of views."""
    lengths = np.asarray(path_lengths)
    return lengths[..., [0, -1]].reshape(lengths.shape[0], lengths.shape[1], -1, 2).max(axis=2)


def warn_if_truncated(path_lengths, scanner_source, *, sub_rays: bool = False) -> float:
    """Warn (one line) when edge cells of the detector see the object; return the fraction
    of views in which they do (:func:`simbench.trace.edge_truncation`). ``path_lengths`` may
    be the whole array or the output of :func:`edge_columns`."""
    from simbench.trace import edge_truncation

    fraction = edge_truncation(path_lengths, sub_rays=sub_rays)
    if fraction > 0:
        warnings.warn(f"{scanner_source}: geometry: the detector does not cover the object in "
                      f"{100 * fraction:.1f} % of views (edge cells see it); projections are "
                      "truncated", InputWarning, stacklevel=2)
    return fraction


#: detector readings traced and measured at a time. Fixed, not taken from the machine's
#: memory: a scan's random streams are drawn block by block, so the blocks must be the same
#: on every machine for the same seed to give the same bits.
READINGS_PER_BLOCK = 2_000_000


def views_per_block(poses) -> int:
    """Views of one block of a scan (from the detector size alone)."""
    return max(1, READINGS_PER_BLOCK // (poses.n_rows * poses.n_cols))


def available_memory_bytes() -> int | None:
    """Memory the system can give this process now (``MemAvailable``), or None if unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def check_scan_memory(n_rays: int, n_sub: int, n_materials: int, source: str) -> None:
    """Refuse, with one line, a block of a scan that would not fit in memory.

    The estimate, measured on the shipped scanners, is 8 bytes per material and sub-ray for
    the path lengths plus about 160 bytes per detector reading for the measurement chain.
    """
    need = n_rays * (8 * n_materials * n_sub + 160)
    have = available_memory_bytes()
    if have is not None and need > 0.8 * have:
        raise InputError(Where(source, field="geometry"),
                         f"one block of this scan needs about {need / 2**30:.1f} GiB of memory "
                         f"and {have / 2**30:.1f} GiB are available",
                         "fewer rows or columns, or fewer focal-spot and aperture samples")


def scan_identity(phantom, scanner, realization: int = 0) -> tuple:
    """The identity from which a scan's random stream is derived (never execution order)."""
    return ("scan", phantom.name, scanner.name, "realization", int(realization))


def run_scan(phantom, scanner, out: Path, *, seed: int = 0, noise: bool = True,
             realization: int = 0, reference_energy_kev: float | None = None,
             block_views: int | None = None) -> str:
    """Trace ``phantom`` through ``scanner``, apply its physics and write the scan to ``out``.

    Parameters
    ----------
    phantom : simbench.phantom.Phantom
    scanner : simbench.scanner.Scanner
        Must have a physics section.
    out : Path
        Output folder (created).
    seed : int
        Root seed; block b's stream is ``rng_for(seed, *scan_identity(...), "views", v0)``
        with v0 its first view.
    noise : bool
        False for expected values (no counting or electronic noise).
    realization : int
        Realization number (part of the identity).
    reference_energy_kev : float, optional
        Energy of the exact line integrals written as truth. Default: the source energy of
        a monochromatic source, else the mean energy of the detected air spectrum (rounded to
        0.1 keV), which is recorded in ``scan.json``.
    block_views : int, optional
        Views per block (default :func:`views_per_block`; other values change the noise
        draws, not the expected values).

    Returns
    -------
    str
        A one-paragraph summary for the terminal.

    Notes
    -----
    The scan streams through memory in blocks of views: each block is traced, measured and
    written into memory-mapped outputs, so memory stays near one block's worth whatever the
    number of views. The flat and dark frames are those of the first block; the detector
    lag carries over from block to block. The outputs are renamed into place only when
    every block is done, and ``scan.json`` is written last.
    """
    import contextlib

    from simbench.atomic import atomic_path, write_json
    from simbench.geometry import cell_subsamples, focal_spot_points
    from simbench.materials import mu_table
    from simbench.measure import describe, measure, rng_for
    from simbench.trace import line_integrals, trace

    if seed < 0:
        raise InputError(Where("<command line>", field="--seed"), f"seed must be >= 0, got {seed}",
                         "a non-negative integer")
    if out.exists() and not out.is_dir():
        raise InputError(Where("<command line>", field="-o"), f"'{out}' exists and is not a folder",
                         "a folder path")
    physics = scanner.physics
    poses = scanner.geometry.poses()
    src = physics.source
    spot = cells = None
    if not poses.parallel and (src.focal_spot_samples[0] * src.focal_spot_samples[1] > 1):
        spot = focal_spot_points(src.focal_spot_mm[0], src.focal_spot_mm[1],
                                 src.focal_spot_samples[0], src.focal_spot_samples[1])
    n_u, n_v = physics.detector.aperture_samples
    if poses.dimension == 2:
        n_v = 1  # a 2-D scanner's rays stay in its plane
    if n_u * n_v > 1:
        cells = cell_subsamples(n_u, n_v, poses.pitch_u_mm, poses.pitch_v_mm)
    subrays = spot is not None or cells is not None
    n_sub = (1 if spot is None else len(spot)) * (1 if cells is None else len(cells))
    step = block_views or views_per_block(poses)
    n_mat = len(phantom.materials)
    check_scan_memory(min(step, poses.n_views) * poses.n_rows * poses.n_cols, n_sub, n_mat,
                      str(scanner.source))
    spectrum = scanner.spectrum()
    identity = scan_identity(phantom, scanner, realization)
    n_out = physics.detector.n_bins
    lag_state = np.full((n_out, poses.n_rows * poses.n_cols), np.nan)
    shape = poses.projection_shape
    edges = np.zeros((n_mat, poses.n_views, 2))
    calibration = metadata = mu_ref = reference_kev = None
    starved = 0
    timings = {"trace": 0.0, "measure": 0.0}
    out.mkdir(parents=True, exist_ok=True)
    with contextlib.ExitStack() as stack:
        files: dict = {}

        def output(name: str, folder: str, dtype, full_shape) -> np.ndarray:
            if name not in files:
                tmp = stack.enter_context(atomic_path(out / folder / f"{name}.npy", ".npy"))
                files[name] = np.lib.format.open_memmap(tmp, mode="w+", dtype=dtype,
                                                        shape=tuple(full_shape))
            return files[name]

        for v0 in range(0, poses.n_views, step):
            views = np.arange(v0, min(poses.n_views, v0 + step))
            started = time.perf_counter()
            lengths = trace(phantom, poses, cell_samples=cells, spot_samples=spot, views=views)
            timings["trace"] += time.perf_counter() - started
            centre = lengths.mean(axis=-1) if subrays else lengths
            edges[:, views] = edge_columns(centre)
            started = time.perf_counter()
            result = measure(lengths, phantom.materials, physics, poses=poses.select(views),
                             subrays=subrays, spectrum=spectrum,
                             rng=rng_for(seed, *identity, "views", int(v0)), noise=noise,
                             calibration=calibration, lag_state=lag_state, dtype=np.float64)
            timings["measure"] += time.perf_counter() - started
            if calibration is None:
                # kept in float64: later blocks normalise with exactly the first one's frames
                calibration = (result.flat, result.dark)
                metadata = result.metadata
                if reference_energy_kev is None:
                    reference_energy_kev = (
                        src.energy_kev if src.kind == "monochromatic"
                        else round(float(metadata["mean_detected_energy_kev"]), 1))
                reference_kev = float(reference_energy_kev)
                mu_ref = mu_table(phantom.materials, [reference_kev])[:, 0]
            starved += int(result.metadata["starvation"]["starved_cells"])
            view_axis = 0 if result.counts.ndim == len(shape) else 1
            for name in ("counts", "projections"):
                block = np.asarray(getattr(result, name))
                full = list(block.shape)
                full[view_axis] = poses.n_views
                target = output(name, "measured", np.float32, full)  # ARCHITECTURE dtypes
                target[(slice(None),) * view_axis + (views,)] = block
            output("path_lengths", "truth", np.float64, (n_mat,) + shape)[:, views] = centre
            output("line_integrals", "truth", np.float64, shape)[views] = \
                line_integrals(centre, mu_ref)
        for array in files.values():
            array.flush()
        files.clear()
        for name in ("flat", "dark"):
            tmp = stack.enter_context(atomic_path(out / "measured" / f"{name}.npy", ".npy"))
            frame = np.asarray(calibration[0 if name == "flat" else 1], dtype=np.float32)
            np.save(tmp, frame, allow_pickle=False)
    warn_if_truncated(edges, scanner.source)

    readings = int(np.prod(shape)) * n_out
    metadata["starvation"] = dict(metadata["starvation"], starved_cells=starved,
                                  starved_fraction=starved / readings)
    metadata["blocks"] = {"views_per_block": int(step),
                          "count": -(-poses.n_views // step),
                          "note": "flat and dark from the first block; lag carried over"}
    record = {
        "phantom": {"name": phantom.name, "file": str(phantom.source),
                    "materials": [m.name for m in phantom.materials]},
        "scanner": {"name": scanner.name, "file": str(scanner.source)},
        "geometry": poses.to_record(),
        "physics": describe(physics),
        "measurement": metadata,
        "truth": {"reference_energy_kev": reference_kev,
                  "mu_per_mm": {m.name: float(v) for m, v in zip(phantom.materials, mu_ref)},
                  "path_lengths": "averaged over the focal-spot and aperture sub-rays" if subrays else
                  "through the cell centre"},
        "seed": {"root_seed": int(seed), "identity": list(identity),
                 "block_stream": "rng_for(root_seed, *identity, 'views', first view of the block)",
                 "noise": bool(noise)},
        "layout": "(n_views, n_cols)" if poses.dimension == 2 else "(n_views, n_rows, n_cols)",
        "timings_s": {k: round(v, 3) for k, v in timings.items()},
        "simbench_version": simbench.__version__,
        "caution": simbench.CAUTION,
    }
    write_json(out / "scan.json", record)
    return (f"wrote {out}/ (measured/counts, flat, dark, projections; truth/line_integrals at "
            f"{reference_kev:.1f} keV; scan.json) — projections {tuple(shape)}, starved "
            f"readings {starved}, trace {timings['trace']:.2f} s, physics "
            f"{timings['measure']:.2f} s")
