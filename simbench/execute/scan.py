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


def warn_if_truncated(path_lengths, scanner_source, *, sub_rays: bool = False) -> float:
    """Warn (one line) when edge cells of the detector see the object; return the fraction
    of views in which they do (:func:`simbench.trace.edge_truncation`)."""
    from simbench.trace import edge_truncation

    fraction = edge_truncation(path_lengths, sub_rays=sub_rays)
    if fraction > 0:
        warnings.warn(f"{scanner_source}: geometry: the detector does not cover the object in "
                      f"{100 * fraction:.1f} % of views (edge cells see it); projections are "
                      "truncated", InputWarning, stacklevel=2)
    return fraction


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
    """Refuse, with one line, a scan that would not fit in memory (instead of being killed).

    The estimate, measured on the shipped scanners, is 8 bytes per material and sub-ray for
    the path lengths plus about 160 bytes per detector reading for the measurement chain.
    """
    need = n_rays * (8 * n_materials * n_sub + 160)
    have = available_memory_bytes()
    if have is not None and need > 0.8 * have:
        raise InputError(Where(source, field="geometry"),
                         f"this scan needs about {need / 2**30:.1f} GiB of memory and "
                         f"{have / 2**30:.1f} GiB are available",
                         "fewer views, rows or columns, or fewer focal-spot and aperture "
                         "samples (or 'simbench trace', which streams through memory)")


def scan_identity(phantom, scanner, realization: int = 0) -> tuple:
    """The identity from which a scan's random stream is derived (never execution order)."""
    return ("scan", phantom.name, scanner.name, "realization", int(realization))


def run_scan(phantom, scanner, out: Path, *, seed: int = 0, noise: bool = True,
             realization: int = 0, reference_energy_kev: float | None = None) -> str:
    """Trace ``phantom`` through ``scanner``, apply its physics and write the scan to ``out``.

    Parameters
    ----------
    phantom : simbench.phantom.Phantom
    scanner : simbench.scanner.Scanner
        Must have a physics section.
    out : Path
        Output folder (created).
    seed : int
        Root seed; the stream is ``rng_for(seed, *scan_identity(...))``.
    noise : bool
        False for expected values (no counting or electronic noise).
    realization : int
        Realization number (part of the identity).
    reference_energy_kev : float, optional
        Energy of the exact line integrals written as truth. Default: the source energy of
        a monochromatic source, else the mean energy of the detected air spectrum (rounded to
        0.1 keV), which is recorded in ``scan.json``.

    Returns
    -------
    str
        A one-paragraph summary for the terminal.
    """
    from simbench.atomic import write_json, write_npy
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
    check_scan_memory(int(np.prod(poses.projection_shape)), n_sub, len(phantom.materials),
                      str(scanner.source))
    started = time.perf_counter()
    lengths = trace(phantom, poses, cell_samples=cells, spot_samples=spot)
    trace_seconds = time.perf_counter() - started
    warn_if_truncated(lengths, scanner.source, sub_rays=subrays)

    rng = rng_for(seed, *scan_identity(phantom, scanner, realization))
    started = time.perf_counter()
    result = measure(lengths, phantom.materials, physics, poses=poses, subrays=subrays,
                     spectrum=scanner.spectrum(), rng=rng, noise=noise)
    measure_seconds = time.perf_counter() - started

    if reference_energy_kev is None:
        reference_energy_kev = (src.energy_kev if src.kind == "monochromatic"
                                else round(float(result.metadata["mean_detected_energy_kev"]), 1))
    reference_kev = float(reference_energy_kev)
    mu_ref = mu_table(phantom.materials, [reference_kev])[:, 0]
    centre_lengths = lengths.mean(axis=-1) if subrays else lengths
    truth = line_integrals(centre_lengths, mu_ref)

    out.mkdir(parents=True, exist_ok=True)
    write_npy(out / "truth" / "path_lengths.npy", centre_lengths)
    write_npy(out / "truth" / "line_integrals.npy", truth)
    for name in ("counts", "flat", "dark", "projections"):
        write_npy(out / "measured" / f"{name}.npy", np.asarray(getattr(result, name)))
    record = {
        "phantom": {"name": phantom.name, "file": str(phantom.source),
                    "materials": [m.name for m in phantom.materials]},
        "scanner": {"name": scanner.name, "file": str(scanner.source)},
        "geometry": poses.to_record(),
        "physics": describe(physics),
        "measurement": result.metadata,
        "truth": {"reference_energy_kev": reference_kev,
                  "mu_per_mm": {m.name: float(v) for m, v in zip(phantom.materials, mu_ref)},
                  "path_lengths": "averaged over the focal-spot and aperture sub-rays" if subrays else
                  "through the cell centre"},
        "seed": {"root_seed": int(seed), "identity": list(scan_identity(phantom, scanner, realization)),
                 "noise": bool(noise)},
        "layout": "(n_views, n_cols)" if poses.dimension == 2 else "(n_views, n_rows, n_cols)",
        "timings_s": {"trace": round(trace_seconds, 3), "measure": round(measure_seconds, 3)},
        "simbench_version": simbench.__version__,
        "caution": simbench.CAUTION,
    }
    write_json(out / "scan.json", record)
    starved = result.metadata.get("starvation", {})
    return (f"wrote {out}/ (measured/counts, flat, dark, projections; truth/line_integrals at "
            f"{reference_kev:.1f} keV; scan.json) — projections {tuple(result.projections.shape)}, "
            f"starved cells {starved.get('cells', 0) if isinstance(starved, dict) else starved}, "
            f"trace {trace_seconds:.2f} s, physics {measure_seconds:.2f} s")
