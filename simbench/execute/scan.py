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
      complete.json              written last: size and SHA-256 of every other file

The folder is whole or absent: it is built beside its final place and committed by a rename
(:mod:`simbench.folders`), and readers refuse a folder whose ``complete.json`` is missing or
does not match (:func:`simbench.folders.verify_folder`).
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


def check_scan_cost(poses, n_sub: int, n_materials: int, n_out: int, step: int,
                    source: str, out: Path) -> None:
    """Refuse, with one line, a scan whose block would not fit the memory budget or whose
    outputs would not fit on the disk, before anything is traced.

    The memory estimate, measured on the shipped scanners, is 8 bytes per material and sub-ray
    for the path lengths plus about 160 bytes per detector reading for the measurement chain.
    The outputs are float32 counts and projections per energy bin and float64 path lengths and
    line integrals; the folder is built beside an existing one before replacing it, so both
    must fit.
    """
    from simbench.budget import check_bytes, check_disk

    cells = poses.n_rows * poses.n_cols
    where = Where(source, field="geometry")
    check_bytes(float(min(step, poses.n_views)) * cells * (8.0 * n_materials * n_sub + 160.0),
                where, f"one block of this scan ({min(step, poses.n_views)} views of {cells} "
                f"cells, {n_sub} sub-rays, {n_materials} materials)",
                "fewer rows or columns, or fewer focal-spot and aperture samples")
    output_bytes = float(poses.n_views) * cells * (8.0 * n_out + 8.0 * (n_materials + 1))
    check_disk(output_bytes, out, where, "the scan's outputs", "fewer views, rows or columns")


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
        Output folder, committed whole (:func:`simbench.folders.commit_folder`): after any
        interruption it holds the complete old scan or the complete new one.
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
    lag carries over from block to block. Every block is checked finite before it is
    written. The folder is built beside ``out`` and committed by a rename when every file,
    ``scan.json`` and the marker ``complete.json`` (written last) are done.
    """
    from simbench.folders import commit_folder

    if seed < 0:
        raise InputError(Where("<command line>", field="--seed"), f"seed must be >= 0, got {seed}",
                         "a non-negative integer")
    plan = ScanPlan(phantom, scanner, out, block_views)
    with commit_folder(out, "scan") as staging:
        state = scan_into(staging, plan, seed=seed, noise=noise,
                          identity=scan_identity(phantom, scanner, realization),
                          reference_energy_kev=reference_energy_kev)
        warn_if_truncated(state.edges, scanner.source)
        from simbench.atomic import write_json

        write_json(staging / "scan.json", scan_record(plan, state))
    return (f"wrote {out}/ (measured/counts, flat, dark, projections; truth/line_integrals at "
            f"{state.reference_kev:.1f} keV; scan.json; complete.json) — projections "
            f"{tuple(plan.shape)}, starved readings {state.starved}, trace "
            f"{state.timings['trace']:.2f} s, physics {state.timings['measure']:.2f} s")


# ------------------------------------------------------------------------------------------
# The stages of a scan
# ------------------------------------------------------------------------------------------


def scan_into(folder: Path, plan: "ScanPlan", *, seed: int, noise: bool, identity: tuple,
              reference_energy_kev: float | None = None, write_truth: bool = True,
              lengths: "TraceCache | None" = None) -> "ScanState":
    """Measure one scan block by block into ``folder`` (the caller commits it).

    Parameters
    ----------
    folder : Path
        Where ``measured/`` (and ``truth/`` if ``write_truth``) are written; a staging folder.
    plan : ScanPlan
    seed : int
    noise : bool
    identity : tuple
        The scan's identity: its random streams are ``rng_for(seed, *identity, "views", v0)``.
    reference_energy_kev : float, optional
        Energy of the truth line integrals (see :func:`run_scan`).
    write_truth : bool
        Write ``truth/path_lengths.npy`` and ``truth/line_integrals.npy``.
    lengths : TraceCache, optional
        Path lengths of every block, traced once and shared by the scans of one run (doses,
        realizations); default: traced here.

    Returns
    -------
    ScanState
        Timings, starvation count, frames and measurement metadata of the first block.
    """
    with _ScanOutputs(folder, plan, write_truth) as outputs:
        return _scan_blocks(plan, outputs, lengths, seed=seed, noise=noise, identity=identity,
                            reference_energy_kev=reference_energy_kev)


#: every array a scan makes, by the name :func:`scan_arrays` returns it under
SCAN_ARRAYS = ("counts", "projections", "flat", "dark", "line_integrals", "path_lengths")


def scan_arrays(plan: "ScanPlan", *, seed: int, noise: bool, identity: tuple,
                keep: tuple = ("counts", "projections", "flat", "dark", "line_integrals"),
                reference_energy_kev: float | None = None,
                lengths: "TraceCache | None" = None) -> tuple[dict, "ScanState"]:
    """Measure one scan block by block into arrays in memory (no folder).

    The same scan as :func:`scan_into`, bit for bit, for callers that store the arrays
    elsewhere (a dataset shard): only the arrays named in ``keep`` are held.

    Parameters
    ----------
    plan : ScanPlan
    seed, noise, identity, reference_energy_kev, lengths
        As for :func:`scan_into`.
    keep : tuple of str
        Names from :data:`SCAN_ARRAYS`: ``counts`` and ``projections`` (float32, the
        projection layout), ``flat`` and ``dark`` (float32 frames), ``line_integrals``
        (float64, at the reference energy) and ``path_lengths`` (float64, per material).

    Returns
    -------
    arrays : dict of str to ndarray
        The arrays named in ``keep``.
    state : ScanState
    """
    unknown = set(keep) - set(SCAN_ARRAYS)
    if unknown:
        raise ValueError(f"unknown scan arrays {sorted(unknown)}; valid: {SCAN_ARRAYS}")
    outputs = _MemoryOutputs(plan, keep)
    state = _scan_blocks(plan, outputs, lengths, seed=seed, noise=noise, identity=identity,
                         reference_energy_kev=reference_energy_kev)
    return outputs.arrays, state


def _scan_blocks(plan: "ScanPlan", outputs, lengths: "TraceCache | None", *, seed: int,
                 noise: bool, identity: tuple, reference_energy_kev: float | None
                 ) -> "ScanState":
    lengths = lengths or TraceCache(plan, keep=False)
    state = ScanState(plan, seed=seed, noise=noise, identity=identity,
                      reference_energy_kev=reference_energy_kev)
    for views in plan.blocks():
        _scan_block(plan, state, views, outputs, lengths)
    outputs.write_frames(state.calibration)
    return state


class TraceCache:
    """The path lengths of a scan's blocks: traced on first use, and kept for later scans of
    the same plan when ``keep`` (the blocks of one run fit the memory budget)."""

    def __init__(self, plan: "ScanPlan", *, keep: bool):
        self.plan, self.keep, self.blocks, self.seconds = plan, keep, {}, 0.0

    def get(self, views: np.ndarray) -> np.ndarray:
        from simbench.trace import trace

        key = int(views[0])
        if key in self.blocks:
            return self.blocks[key]
        started = time.perf_counter()
        lengths = trace(self.plan.phantom, self.plan.poses, cell_samples=self.plan.cells,
                        spot_samples=self.plan.spot, views=views)
        self.seconds += time.perf_counter() - started
        if self.keep:
            self.blocks[key] = lengths
        return lengths


class ScanPlan:
    """What a scan will do, fixed before any work: poses, sub-rays, blocks, cost checked.

    ``dose`` is a factor on the scanner's exposure (air counts or mAs).
    """

    def __init__(self, phantom, scanner, out: Path, block_views: int | None,
                 dose: float = 1.0):
        import dataclasses

        from simbench.geometry import cell_subsamples, focal_spot_points

        self.phantom, self.scanner = phantom, scanner
        if out.exists() and not out.is_dir():
            raise InputError(Where("<command line>", field="-o"),
                             f"'{out}' exists and is not a folder", "a folder path")
        physics = self.physics = scanner.physics
        if dose != 1.0:
            exposure = physics.exposure
            exposure = dataclasses.replace(
                exposure, **({"air_counts": exposure.air_counts * dose}
                             if exposure.air_counts is not None else
                             {"mas_per_view": exposure.mas_per_view * dose}))
            physics = self.physics = dataclasses.replace(physics, exposure=exposure)
        self.dose = float(dose)
        poses = self.poses = scanner.geometry.poses()
        src = physics.source
        self.spot = self.cells = None
        if not poses.parallel and (src.focal_spot_samples[0] * src.focal_spot_samples[1] > 1):
            self.spot = focal_spot_points(src.focal_spot_mm[0], src.focal_spot_mm[1],
                                          src.focal_spot_samples[0], src.focal_spot_samples[1])
        n_u, n_v = physics.detector.aperture_samples
        if poses.dimension == 2:
            n_v = 1  # a 2-D scanner's rays stay in its plane
        if n_u * n_v > 1:
            self.cells = cell_subsamples(n_u, n_v, poses.pitch_u_mm, poses.pitch_v_mm)
        self.subrays = self.spot is not None or self.cells is not None
        n_sub = (1 if self.spot is None else len(self.spot)) * \
            (1 if self.cells is None else len(self.cells))
        self.step = block_views or views_per_block(poses)
        self.n_materials = len(phantom.materials)
        self.n_out = physics.detector.n_bins
        self.shape = poses.projection_shape
        check_scan_cost(poses, n_sub, self.n_materials, self.n_out, self.step,
                        str(scanner.source), out)
        self.spectrum = scanner.spectrum()

    def blocks(self):
        for v0 in range(0, self.poses.n_views, self.step):
            yield np.arange(v0, min(self.poses.n_views, v0 + self.step))


class ScanState:
    """What carries over from block to block: frames, lag, truth energy, counts, timings."""

    def __init__(self, plan: ScanPlan, *, seed: int, noise: bool, identity: tuple,
                 reference_energy_kev: float | None):
        self.seed, self.noise, self.identity = seed, noise, identity
        self.reference_kev = None if reference_energy_kev is None else float(reference_energy_kev)
        cells = plan.poses.n_rows * plan.poses.n_cols
        self.lag_state = np.full((plan.n_out, cells), np.nan)
        self.edges = np.zeros((plan.n_materials, plan.poses.n_views, 2))
        self.calibration = self.metadata = self.mu_ref = None
        self.starved = 0
        self.timings = {"trace": 0.0, "measure": 0.0}


class _ScanOutputs:
    """The scan's arrays, memory-mapped in the staging folder and filled block by block."""

    def __init__(self, staging: Path, plan: ScanPlan, write_truth: bool = True):
        self.staging, self.plan, self.files = staging, plan, {}
        self.write_truth = write_truth

    def __enter__(self) -> "_ScanOutputs":
        return self

    def __exit__(self, *exc) -> None:
        for array in self.files.values():
            array.flush()
        self.files.clear()

    def array(self, name: str, folder: str, dtype, shape) -> np.ndarray:
        if name not in self.files:
            path = self.staging / folder / f"{name}.npy"
            path.parent.mkdir(parents=True, exist_ok=True)
            self.files[name] = np.lib.format.open_memmap(path, mode="w+", dtype=dtype,
                                                         shape=tuple(shape))
        return self.files[name]

    def write_frames(self, calibration) -> None:
        for name, frame in (("flat", calibration[0]), ("dark", calibration[1])):
            path = self.staging / "measured" / f"{name}.npy"
            np.save(path, np.asarray(frame, dtype=np.float32), allow_pickle=False)

    def wants(self, name: str) -> bool:
        return self.write_truth or name not in ("path_lengths", "line_integrals")


class _MemoryOutputs:
    """The scan's arrays in memory, only those asked for (:func:`scan_arrays`)."""

    def __init__(self, plan: ScanPlan, keep):
        self.plan, self.keep, self.arrays = plan, frozenset(keep), {}

    def wants(self, name: str) -> bool:
        return name in self.keep

    def array(self, name: str, folder: str, dtype, shape) -> np.ndarray:
        if name not in self.arrays:
            self.arrays[name] = np.empty(tuple(shape), dtype=dtype)
        return self.arrays[name]

    def write_frames(self, calibration) -> None:
        for name, frame in (("flat", calibration[0]), ("dark", calibration[1])):
            if name in self.keep:
                self.arrays[name] = np.asarray(frame, dtype=np.float32)


def _scan_block(plan: ScanPlan, state: ScanState, views: np.ndarray,
                outputs: _ScanOutputs, cache: TraceCache) -> None:
    """Trace (or take the traced), measure, check and write one block of views."""
    from simbench.materials import mu_table
    from simbench.measure import measure, rng_for
    from simbench.trace import line_integrals

    before = cache.seconds
    lengths = cache.get(views)
    state.timings["trace"] += cache.seconds - before
    centre = lengths.mean(axis=-1) if plan.subrays else lengths
    state.edges[:, views] = edge_columns(centre)
    started = time.perf_counter()
    result = measure(lengths, plan.phantom.materials, plan.physics,
                     poses=plan.poses.select(views), subrays=plan.subrays,
                     spectrum=plan.spectrum,
                     rng=rng_for(state.seed, *state.identity, "views", int(views[0])),
                     noise=state.noise, calibration=state.calibration,
                     lag_state=state.lag_state, dtype=np.float64)
    state.timings["measure"] += time.perf_counter() - started
    if state.calibration is None:
        # kept in float64: later blocks normalise with exactly the first one's frames
        state.calibration = (result.flat, result.dark)
        state.metadata = result.metadata
        if state.reference_kev is None:
            src = plan.physics.source
            state.reference_kev = float(
                src.energy_kev if src.kind == "monochromatic"
                else round(float(state.metadata["mean_detected_energy_kev"]), 1))
        state.mu_ref = mu_table(plan.phantom.materials, [state.reference_kev])[:, 0]
        _check_finite(state.calibration[0], "flat", plan.scanner.source, "exposure", views)
        _check_finite(state.calibration[1], "dark", plan.scanner.source, "detector", views)
    state.starved += int(result.metadata["starvation"]["starved_cells"])
    truth = line_integrals(centre, state.mu_ref)
    _check_finite(centre, "path lengths", plan.phantom.source, "objects", views)
    _check_finite(truth, "line integrals", plan.phantom.source, "materials", views)
    view_axis = 0 if result.counts.ndim == len(plan.shape) else 1
    for name in ("counts", "projections"):
        block = np.asarray(getattr(result, name))
        _check_finite(block, name, plan.scanner.source, "exposure", views)
        if not outputs.wants(name):
            continue
        full = list(block.shape)
        full[view_axis] = plan.poses.n_views
        target = outputs.array(name, "measured", np.float32, full)  # ARCHITECTURE dtypes
        block32 = block.astype(np.float32)
        _check_finite(block32, f"{name} (in float32)", plan.scanner.source, "exposure", views)
        target[(slice(None),) * view_axis + (views,)] = block32
    if outputs.wants("path_lengths"):
        outputs.array("path_lengths", "truth", np.float64,
                      (plan.n_materials,) + plan.shape)[:, views] = centre
    if outputs.wants("line_integrals"):
        outputs.array("line_integrals", "truth", np.float64, plan.shape)[views] = truth


def _check_finite(values: np.ndarray, what: str, source, field: str, views: np.ndarray) -> None:
    """Refuse to write a non-finite result; name the input section that caused it."""
    if not np.isfinite(values).all():
        raise InputError(Where(str(source), field=field),
                         f"the scan's {what} are not finite in views {int(views[0])} to "
                         f"{int(views[-1])}; nothing was written",
                         "physically sensible values (see docs/physics.md for each field's range)")


def scan_record(plan: ScanPlan, state: ScanState) -> dict:
    """Everything ``scan.json`` says: settings, geometry, physics, truth, seeds, timings."""
    from simbench.measure import describe

    phantom, scanner = plan.phantom, plan.scanner
    readings = int(np.prod(plan.shape)) * plan.n_out
    metadata = dict(state.metadata)
    metadata["starvation"] = dict(metadata["starvation"], starved_cells=state.starved,
                                  starved_fraction=state.starved / readings)
    metadata["blocks"] = {"views_per_block": int(plan.step),
                          "count": -(-plan.poses.n_views // plan.step),
                          "note": "flat and dark from the first block; lag carried over"}
    return {
        "phantom": {"name": phantom.name, "file": str(phantom.source),
                    "materials": [m.name for m in phantom.materials]},
        "scanner": {"name": scanner.name, "file": str(scanner.source)},
        "geometry": plan.poses.to_record(),
        "physics": describe(plan.physics),
        "measurement": metadata,
        "dose_factor": plan.dose,
        "truth": {"reference_energy_kev": state.reference_kev,
                  "mu_per_mm": {m.name: float(v) for m, v in zip(phantom.materials, state.mu_ref)},
                  "path_lengths": "averaged over the focal-spot and aperture sub-rays"
                  if plan.subrays else "through the cell centre"},
        "seed": {"root_seed": int(state.seed), "identity": list(state.identity),
                 "block_stream": "rng_for(root_seed, *identity, 'views', first view of the block)",
                 "noise": bool(state.noise)},
        "layout": "(n_views, n_cols)" if plan.poses.dimension == 2 else "(n_views, n_rows, n_cols)",
        "timings_s": {k: round(v, 3) for k, v in state.timings.items()},
        "simbench_version": simbench.__version__,
        "caution": simbench.CAUTION,
    }
