"""Datasets: many samples with their exact truth, written in shards that are whole or absent.

``simbench generate SPEC -o DATASET`` writes::

    DATASET/
      dataset.json        the resolved spec and its fingerprint, the grid, geometry, reference
                          energy and HU scale, the array keys; "state": "in progress" until
                          the last shard and the manifest are written, then "complete" with the
                          SHA-256 of the manifest and of every shard's marker
      manifest.jsonl      one JSON line per sample, in index order: its shard, its drawn
                          phantom parameters, its seeds and the dtype, shape and SHA-256 of
                          every array
      README.md           what the dataset is, how to load it, the caution
      shards/shard-00000/ one committed folder per shard (simbench.folders, kind
        samples.h5        "dataset-shard"): the arrays of its samples (HDF5, chunked and
        samples.jsonl     compressed), their manifest lines, the shard's identity, and
        shard.json        complete.json, written last
        complete.json

Sample ``i`` is a pure function of (spec, i): its phantom comes from
``family.sample(seed, i)`` and its noise from ``rng_for(seed, "dataset", name, "sample", i,
"dose", d, "views", v0)``, so the same spec gives the same bits whatever the executor, the
number of workers or the order the shards finish in. Shard ``k`` holds samples
``k * samples_per_shard`` up to the next shard's first.

A rerun into the same folder resumes: shards whose marker, sizes and identity match are kept,
damaged or partial ones are removed and made again, and one line says what was done. A spec
whose fingerprint differs from the one the folder was started with is refused (``--start-over``
deletes the old dataset first). Only the number of samples may change between runs: sample
``i`` does not depend on how many there are.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import simbench
from simbench.errors import InputError, Where

FORMAT = "simbench dataset"
FORMAT_VERSION = 1
RECORD = "dataset.json"
MANIFEST = "manifest.jsonl"
README = "README.md"
SHARDS = "shards"
SHARD_KIND = "dataset-shard"
SHARD_FILE = "samples.h5"
SHARD_RECORDS = "samples.jsonl"
SHARD_INFO = "shard.json"


def shard_name(shard: int) -> str:
    """The folder name of shard ``shard``: ``shard-00012``."""
    return f"shard-{shard:05d}"


def sample_group(index: int) -> str:
    """The HDF5 group of sample ``index`` in its shard file: ``sample-0000123``."""
    return f"sample-{index:07d}"


def dose_label(dose: float) -> str:
    """``dose-1``, ``dose-0.25``: the suffix of per-dose array keys."""
    from simbench.execute.run import dose_label as label

    return label(dose)


def sample_identity(name: str, index: int, dose: float) -> tuple:
    """The identity of sample ``index``'s measurement at ``dose`` (its random stream's key)."""
    return ("dataset", name, "sample", int(index), "dose", f"{dose:g}")


def array_sha256(array: np.ndarray) -> str:
    """SHA-256 of an array's bytes in C order (dtype and shape are recorded beside it)."""
    return hashlib.sha256(np.ascontiguousarray(array).tobytes()).hexdigest()


def file_sha256(path: Path) -> str:
    """SHA-256 of a file (:func:`simbench.folders.file_sha256`)."""
    from simbench.folders import file_sha256 as sha

    return sha(path)


# ------------------------------------------------------------------------------------------
# The plan: everything fixed before any work
# ------------------------------------------------------------------------------------------


class DatasetPlan:
    """What a dataset will hold, resolved, fingerprinted and costed before any work.

    Parameters
    ----------
    spec : simbench.execute.dataset_spec.DatasetSpec
    out : Path
        The dataset folder.
    workers : int
        Samples made at once on this machine (the memory check multiplies by it).

    Attributes
    ----------
    grid : ImageGrid
    reference_energy_kev, mu_water, mu_air : float
    keys : dict
        Every array key of a sample with its dtype and shape.
    shards : list of (int, int, int)
        (shard number, first sample, one past the last sample).
    resolved : dict
        The resolved spec, as ``dataset.json`` records it.
    fingerprint : str
        SHA-256 of the resolved spec without the number of samples and the description.
    """

    def __init__(self, spec, out: Path, *, workers: int = 1):
        from simbench.execute.reconstruct import (check_grid_inside_orbit,
                                                  check_reconstruction_memory, grid_from_options)

        self.spec, self.out = spec, Path(out)
        self.poses = spec.scanner.geometry.poses()
        g = spec.grid
        self.grid = grid_from_options(self.poses, g["size"], g["voxel_size"], g["centre"])
        check_grid_inside_orbit(self.poses, self.grid, spec.at("grid"))
        phantom, _ = spec.family.sample(spec.seed, 0)
        self.materials_example = [m.name for m in phantom.materials]
        self.reference_energy_kev = self._reference_energy(phantom)
        from simbench.materials import get_material, mu_table

        water_air = mu_table([get_material("water"), get_material("air")],
                             [self.reference_energy_kev])[:, 0]
        self.mu_water, self.mu_air = (float(v) for v in water_air)
        self.keys = self._keys()
        self._check_memory(phantom, workers)
        if spec.reconstruction is not None:
            check_reconstruction_memory(float(np.prod(self.poses.projection_shape)), self.grid)
        per = spec.samples_per_shard
        self.shards = [(k, k * per, min(spec.samples, (k + 1) * per))
                       for k in range(-(-spec.samples // per))]
        self.resolved = self._resolved()
        stable = {k: v for k, v in self.resolved.items() if k not in ("samples", "description")}
        self.fingerprint = hashlib.sha256(json.dumps(stable, sort_keys=True, default=_plain)
                                          .encode()).hexdigest()

    def _reference_energy(self, phantom) -> float:
        """The spec's energy, or the effective energy in water of the detected air spectrum
        (measured noise-free on one view, as a run does)."""
        if self.spec.reference_energy_kev is not None:
            return float(self.spec.reference_energy_kev)
        from simbench.execute.run import one_view_plan, detected_effective_energy_kev
        from simbench.execute.scan import ScanPlan, scan_arrays

        probe = one_view_plan(ScanPlan(phantom, self.spec.scanner, self.out, None))
        _, state = scan_arrays(probe, seed=0, noise=False, identity=("reference",), keep=(),
                               reference_energy_kev=60.0)
        weights = np.sum(state.metadata["signal_weights_per_bin"], axis=0)
        return detected_effective_energy_kev(state.metadata["energies_kev"], weights)

    def _keys(self) -> dict:
        spec, shape = self.spec, list(self.poses.projection_shape)
        n_bins = spec.scanner.physics.detector.n_bins
        measured = ([n_bins] if n_bins > 1 else []) + shape
        frame = ([n_bins] if n_bins > 1 else []) + shape[1:]
        image = list(self.grid.image_shape)
        keys = {}
        if "truth_image" in spec.store:
            keys["truth_image"] = ("float32", image)
        if "labels" in spec.store:
            keys["labels"] = ("int32", image)
        if "line_integrals" in spec.store:
            keys["line_integrals"] = ("float64", shape)
        if "path_lengths" in spec.store:
            keys["path_lengths"] = ("float64", ["n_materials"] + shape)
        for dose in spec.doses:
            d = dose_label(dose)
            if "projections" in spec.store:
                keys[f"projections/{d}"] = ("float32", measured)
            if "counts" in spec.store:
                keys[f"counts/{d}"] = ("float32", measured)
                keys[f"flat/{d}"] = ("float32", frame)
                keys[f"dark/{d}"] = ("float32", frame)
            if spec.reconstruction is not None:
                keys[f"reconstruction/{d}"] = ("float32", image)
        return keys

    def sample_bytes(self, n_materials: int) -> float:
        """The bytes of one sample's stored arrays."""
        total = 0.0
        for dtype, shape in self.keys.values():
            n = float(np.prod([n_materials if s == "n_materials" else s for s in shape]))
            total += n * np.dtype(dtype).itemsize
        return total

    def _check_memory(self, phantom, workers: int) -> None:
        """Refuse a sample that would not fit the memory budget (times ``workers``)."""
        from simbench.budget import check_bytes, format_bytes
        from simbench.execute.scan import ScanPlan

        spec = self.spec
        scan = ScanPlan(phantom, spec.scanner, self.out, None)  # checks one block's cost
        readings = float(np.prod(self.poses.projection_shape)) * scan.n_out
        n_sub = (1 if scan.spot is None else len(scan.spot)) * \
            (1 if scan.cells is None else len(scan.cells))
        cells = self.poses.n_rows * self.poses.n_cols
        block = float(min(scan.step, self.poses.n_views)) * cells * (
            8.0 * scan.n_materials * n_sub + 160.0)
        voxels = float(np.prod(self.grid.shape))
        # per sample: the stored arrays, the measured arrays of one dose in float32 (counts
        # and projections), the truth line integrals, one block of the measurement chain,
        # the rasterizer's float64 image and the path lengths kept across doses
        kept = 8.0 * scan.n_materials * n_sub * readings if len(spec.doses) > 1 else 0.0
        need = (self.sample_bytes(scan.n_materials) + 8.0 * readings + 8.0 * readings + block
                + 16.0 * voxels + kept)
        self.trace_kept = kept > 0
        check_bytes(need * max(1, workers), spec.at("samples"),
                    f"one sample ({format_bytes(self.sample_bytes(scan.n_materials))} of arrays)"
                    + (f" in each of {workers} workers" if workers > 1 else ""),
                    "a smaller grid, fewer views or detector cells, fewer doses or arrays "
                    "stored, or fewer --workers")

    def _resolved(self) -> dict:
        from simbench.measure.config import describe

        spec = self.spec
        family_file = Path(spec.family.source)
        return {
            "name": spec.name,
            "description": spec.description,
            "phantom": {"as_written": spec.family_ref, "name": spec.family.name,
                        "file": str(family_file), "random": bool(spec.family.is_random),
                        "sha256": file_sha256(family_file) if family_file.is_file() else None},
            "scanner": {"as_written": spec.scanner_ref, "name": spec.scanner.name,
                        "geometry": spec.scanner.geometry.resolved(),
                        "physics": describe(spec.scanner.physics)},
            "grid": {"shape": list(self.grid.shape), "spacing_mm": list(self.grid.spacing_mm),
                     "centre_mm": list(self.grid.centre_mm), "dimension": self.grid.dimension},
            "reference_energy_kev": self.reference_energy_kev,
            "reference_energy_from": "the dataset spec" if spec.reference_energy_kev is not None
            else "the effective energy in water of the detected spectrum",
            "hu_scale": {"mu_water_per_mm": self.mu_water, "mu_air_per_mm": self.mu_air},
            "doses": list(spec.doses),
            "samples": spec.samples,
            "seed": spec.seed,
            "noise": spec.noise,
            "store": list(spec.store),
            "reconstruction": None if spec.reconstruction is None else
            {"use": spec.reconstruction[0], "options": spec.reconstruction[1]},
            "samples_per_shard": spec.samples_per_shard,
            "compression": {"method": spec.compression, "level": spec.compression_level},
            "arrays": {k: {"dtype": d, "shape": s} for k, (d, s) in self.keys.items()},
            "format": {"name": FORMAT, "version": FORMAT_VERSION},
        }


# ------------------------------------------------------------------------------------------
# One sample, one shard (what a worker runs)
# ------------------------------------------------------------------------------------------


def make_sample(plan: DatasetPlan, index: int) -> tuple[dict, dict]:
    """Compute sample ``index``: its arrays and its manifest record (without checksums).

    Returns
    -------
    arrays : dict of str to ndarray
        Keys as in ``plan.keys``.
    record : dict
        Index, phantom name and drawn parameters, ROI names, seeds and streams, starved
        readings per dose.
    """
    from simbench.execute.scan import ScanPlan, TraceCache, scan_arrays
    from simbench.phantom import rasterize
    from simbench.phantom.rasterize import label_map

    spec = plan.spec
    phantom, parameters = spec.family.sample(spec.seed, index)
    arrays: dict = {}
    if "truth_image" in spec.store:
        arrays["truth_image"] = rasterize(phantom, plan.grid,
                                          plan.reference_energy_kev).astype(np.float32)
    if "labels" in spec.store:
        arrays["labels"] = label_map(phantom, plan.grid).astype(np.int32)
    reconstructor = options = None
    if spec.reconstruction is not None:
        from simbench.recon.registry import find_reconstructor

        reconstructor = find_reconstructor(spec.reconstruction[0], allow_code=spec.allow_code)
        options = reconstructor.check_options(spec.reconstruction[1])
    measured = [name for name in ("projections", "counts") if name in spec.store]
    keep = set(measured)
    if "counts" in spec.store:
        keep |= {"flat", "dark"}
    if reconstructor is not None:
        keep |= {"projections"} if reconstructor.stage == "projections" else \
            {"counts", "flat", "dark"}
    cache = None
    streams = {}
    starved = {}
    for n, dose in enumerate(spec.doses):
        scan = ScanPlan(phantom, spec.scanner, plan.out, None, dose)
        if cache is None:
            cache = TraceCache(scan, keep=plan.trace_kept)
        else:  # same geometry, other exposure: share the traced blocks
            shared = TraceCache(scan, keep=cache.keep)
            shared.blocks = cache.blocks
            cache = shared
        truth = {"line_integrals", "path_lengths"} & set(spec.store) if n == 0 else set()
        identity = sample_identity(spec.name, index, dose)
        out, state = scan_arrays(scan, seed=spec.seed, noise=spec.noise, identity=identity,
                                 keep=tuple(sorted(keep | truth)),
                                 reference_energy_kev=plan.reference_energy_kev, lengths=cache)
        d = dose_label(dose)
        streams[d] = list(identity)
        starved[d] = int(state.starved)
        for name in truth:
            arrays[name] = out.pop(name)
        if reconstructor is not None:
            from simbench.recon.contract import Acquisition

            acquisition = Acquisition(plan.poses, metadata={
                "measurement": state.metadata,
                "truth": {"reference_energy_kev": plan.reference_energy_kev},
                "physics": state.metadata.get("physics")},
                source=f"{plan.out} sample {index}", **{k: out.get(k) for k in
                                                         ("projections", "counts", "flat",
                                                          "dark")})
            image = np.asarray(reconstructor.run(acquisition, plan.grid, options),
                               dtype=np.float32)
            if not np.isfinite(image).all():
                raise InputError(spec.at("reconstruction"), f"the reconstruction of sample "
                                 f"{index} at {d} is not finite; nothing was written",
                                 "options within their documented ranges")
            arrays[f"reconstruction/{d}"] = image
        for name in measured:
            arrays[f"{name}/{d}"] = out[name]
        if "counts" in spec.store:
            arrays[f"flat/{d}"], arrays[f"dark/{d}"] = out["flat"], out["dark"]
        del out
    record = {
        "index": int(index),
        "phantom": {"name": phantom.name, "parameters": parameters,
                    "materials": [m.name for m in phantom.materials],
                    "roi_names": list(phantom.roi_names)},
        "seeds": {"root_seed": int(spec.seed),
                  "phantom_stream": ["phantom", spec.family.name, int(index)],
                  "noise_streams": streams if spec.noise else {},
                  "block_stream": "rng_for(root_seed, *noise stream, 'views', first view of "
                                  "the block)"},
        "starved_readings": starved,
    }
    return arrays, record


@dataclass(frozen=True)
class ShardTask:
    """One shard to make: what a worker receives (picklable)."""

    plan: DatasetPlan
    shard: int
    first: int
    stop: int

    def __str__(self) -> str:
        return str(self.plan.out / SHARDS / shard_name(self.shard))


def write_shard(task: ShardTask) -> int:
    """Make every sample of a shard and commit the shard folder whole; return its sample count.

    Runs in a worker: the dataset folder must be visible at the same path (a shared file
    system for a cluster).
    """
    from simbench.folders import commit_folder

    plan = task.plan
    if not (plan.out / RECORD).is_file():
        import socket

        raise InputError(Where(str(plan.out)), f"the worker on {socket.gethostname()} cannot "
                         "see the dataset folder", "an output folder on a file system every "
                         "worker shares, at the same path")
    import h5py

    final = plan.out / SHARDS / shard_name(task.shard)
    with commit_folder(final, SHARD_KIND, say=lambda _: None) as staging:
        lines = []
        with h5py.File(staging / SHARD_FILE, "w", track_order=True) as handle:
            for index in range(task.first, task.stop):
                arrays, record = make_sample(plan, index)
                group = handle.create_group(sample_group(index))
                record["shard"], record["group"] = shard_name(task.shard), sample_group(index)
                record["arrays"] = {}
                for key in sorted(arrays):
                    array = np.ascontiguousarray(arrays[key])
                    _write_array(group, key, array, plan.spec)
                    record["arrays"][key] = {"dtype": str(array.dtype),
                                             "shape": list(array.shape),
                                             "sha256": array_sha256(array)}
                del arrays
                lines.append(json.dumps(record, sort_keys=True, default=_plain))
        (staging / SHARD_RECORDS).write_text("\n".join(lines) + "\n", encoding="utf-8")
        (staging / SHARD_INFO).write_text(json.dumps(_shard_identity(plan, task.shard,
                                                                     task.first, task.stop),
                                                     indent=2, sort_keys=True) + "\n",
                                          encoding="utf-8")
    return task.stop - task.first


#: the largest chunk of a stored array: whole slices or views along the first axis up to this
CHUNK_BYTES = 2**20


def chunk_shape(shape: tuple, itemsize: int) -> tuple:
    """HDF5 chunks of an array: whole slices (or views) along its first axis, as many as fit
    in :data:`CHUNK_BYTES` (at least one), so that one slice or view reads one chunk."""
    if len(shape) < 2:
        return tuple(max(1, n) for n in shape)
    per = itemsize * int(np.prod(shape[1:]))
    return (max(1, min(shape[0], CHUNK_BYTES // max(1, per))),) + tuple(shape[1:])


def _write_array(group, key: str, array: np.ndarray, spec) -> None:
    options: dict = {}
    if spec.compression != "none" and array.size > 1:
        options = {"chunks": chunk_shape(array.shape, array.itemsize), "shuffle": True,
                   "compression": spec.compression}
        if spec.compression == "gzip":
            options["compression_opts"] = spec.compression_level
    group.create_dataset(key, data=array, track_times=False, **options)


def _shard_identity(plan: DatasetPlan, shard: int, first: int, stop: int) -> dict:
    return {"format": FORMAT, "dataset": plan.spec.name, "fingerprint": plan.fingerprint,
            "shard": shard, "samples": [first, stop]}


def _plain(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot write {type(value).__name__} to JSON")


# ------------------------------------------------------------------------------------------
# Generating, resuming
# ------------------------------------------------------------------------------------------


def generate(plan: DatasetPlan, executor, *, start_over: bool = False, progress: bool = True,
             say=print) -> dict:
    """Write (or resume) the dataset of ``plan`` with ``executor``.

    Parameters
    ----------
    plan : DatasetPlan
    executor : simbench.execute.executors.InProcess or DaskExecutor
    start_over : bool
        Delete a dataset of another spec found in the folder instead of refusing.
    progress : bool
        A progress bar with the expected time left, on standard error.
    say : callable
        Receives the closing lines (what was reused, written and removed).

    Returns
    -------
    dict
        Counts: ``reused``, ``written``, ``removed`` shards, samples written, seconds.
    """
    from simbench.folders import locked

    out = plan.out
    started = time.perf_counter()
    where = Where("<command line>", field="-o")
    if out.exists() and (not out.is_dir() or out.is_symlink()):
        raise InputError(where, f"'{out}' exists and is not a folder",
                         "a new path, or a dataset folder written by simbench generate")
    out.parent.mkdir(parents=True, exist_ok=True)
    with locked(out, where):
        _claim(plan, start_over, where)
        reused, removed = _inspect_shards(plan)
        todo = [ShardTask(plan, k, a, b) for k, a, b in plan.shards if shard_name(k) not in reused]
        samples_todo = sum(t.stop - t.first for t in todo)
        _warn_if_disk_short(plan, samples_todo)
        bar = _bar(samples_todo, plan.spec.name, progress)
        try:
            for task, count in executor.map_unordered(write_shard, todo, label=str):
                bar.update(count)
        finally:
            bar.close()
        _finish(plan, time.perf_counter() - started)
    reused_samples = sum(b - a for k, a, b in plan.shards if shard_name(k) in reused)
    parts = []
    if reused:
        parts.append(f"reused {_count(len(reused), 'shard')} "
                     f"({_count(reused_samples, 'sample')})")
    parts.append(f"wrote {len(todo) if reused else _count(len(todo), 'shard')} "
                 f"({_count(samples_todo, 'sample')}) {executor.description}")
    parts.extend(f"removed {n} {what}" for what, n in removed.items() if n)
    seconds = time.perf_counter() - started
    say(", ".join(parts))
    say(f"wrote {out}/ — {_count(plan.spec.samples, 'sample')} in "
        f"{_count(len(plan.shards), 'shard')} ({_folder_size(out / SHARDS) / 2**20:.1f} MiB) "
        f"in {seconds:.1f} s; check it with 'simbench verify {out}'")
    return {"reused": len(reused), "written": len(todo), "removed": dict(removed),
            "samples_written": samples_todo, "seconds": seconds}


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}{'' if n == 1 else 's'}"


def _warn_if_disk_short(plan: DatasetPlan, samples: int) -> None:
    """Warn (one line) when the samples still to make, uncompressed, exceed the free disk
    (compression usually makes them much smaller, so this is not refused)."""
    from simbench.budget import format_bytes
    from simbench.errors import warn_input

    from simbench.budget import free_disk_bytes

    need = samples * plan.sample_bytes(len(plan.materials_example))
    free, _ = free_disk_bytes(plan.out)
    if free is not None and need > free:
        warn_input(plan.spec.at("samples"), f"{samples} samples are {format_bytes(need)} "
                   f"before compression and '{plan.out}' has {format_bytes(free)} free; if "
                   "the disk fills, the shard being written is removed and a rerun resumes")


def _claim(plan: DatasetPlan, start_over: bool, where: Where) -> None:
    """Make ``plan.out`` this plan's dataset (new, resumed, or started over), marked in
    progress, before any shard is written."""
    from simbench.atomic import write_json

    out = plan.out
    existing = read_record(out) if (out / RECORD).is_file() else None
    if existing is None and out.is_dir() and any(out.iterdir()):
        raise InputError(where, f"'{out}' is a folder that simbench generate did not write (no "
                         f"valid {RECORD}); refusing to write into it",
                         "a new path, or a dataset folder written by simbench generate")
    if existing is not None and existing.get("fingerprint") != plan.fingerprint:
        resolved = json.loads(json.dumps(plan.resolved, default=_plain))
        changed = [k for k, v in resolved.items()
                   if k not in ("samples", "description") and existing.get("spec", {}).get(k) != v]
        if not start_over:
            raise InputError(where, f"'{out}' holds a dataset made from another spec (changed: "
                             f"{', '.join(changed) or 'the phantom or scanner files'}); "
                             "refusing to mix samples", "the same spec, another output folder, "
                             "or --start-over to delete that dataset and make this one")
        for name in (RECORD, MANIFEST, README):
            (out / name).unlink(missing_ok=True)
        shutil.rmtree(out / SHARDS, ignore_errors=True)
        from simbench.folders import note

        note(f"deleted the dataset in '{out}' (made from another spec), as --start-over asks")
    out.mkdir(parents=True, exist_ok=True)
    write_json(out / RECORD, _record(plan, "in progress"))
    (out / SHARDS).mkdir(exist_ok=True)


def _inspect_shards(plan: DatasetPlan) -> tuple[set, dict]:
    """Keep the committed shards of this plan; remove partial, damaged and surplus ones."""
    from simbench.folders import verify_folder

    shards = plan.out / SHARDS
    planned = {shard_name(k): (k, a, b) for k, a, b in plan.shards}
    reused: set = set()
    removed = {"partial": 0, "damaged": 0, "beyond the samples asked for": 0,
               "made for the old sample count": 0}
    for path in sorted(shards.iterdir()):
        name = path.name
        if name.startswith("."):  # staging or aside folders, lock files of killed runs
            if ".partial-" in name or ".old-" in name:
                removed["partial"] += 1
            _remove(path)
            continue
        if name not in planned:
            removed["beyond the samples asked for" if name.startswith("shard-") else
                    "damaged"] += 1
            _remove(path)
            continue
        k, a, b = planned[name]
        try:
            verify_folder(path, SHARD_KIND, checksums=False)
            info = json.loads((path / SHARD_INFO).read_text(encoding="utf-8"))
        except (InputError, OSError, ValueError):
            info = None
        expected = _shard_identity(plan, k, a, b)
        if info == expected:
            reused.add(name)
            continue
        resized = isinstance(info, dict) and dict(info, samples=expected["samples"]) == expected
        removed["made for the old sample count" if resized else "damaged"] += 1
        _remove(path)
    return reused, removed


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        path.unlink(missing_ok=True)


def _finish(plan: DatasetPlan, seconds: float) -> None:
    """Write the manifest from the shards' records, the README, then the record (last)."""
    from simbench.atomic import atomic_path, write_json

    out = plan.out
    with atomic_path(out / MANIFEST, ".jsonl") as tmp:
        with open(tmp, "w", encoding="utf-8") as manifest:
            for k, a, b in plan.shards:
                text = (out / SHARDS / shard_name(k) / SHARD_RECORDS).read_text(encoding="utf-8")
                manifest.write(text)
    shards = {}
    for k, a, b in plan.shards:
        marker = out / SHARDS / shard_name(k) / "complete.json"
        shards[shard_name(k)] = {"samples": [a, b], "marker_sha256": file_sha256(marker)}
    with atomic_path(out / README, ".md") as tmp:
        tmp.write_text(readme_text(plan), encoding="utf-8")
    record = _record(plan, "complete")
    record.update(manifest_sha256=file_sha256(out / MANIFEST), shards=shards,
                  last_run_seconds=round(seconds, 3))
    write_json(out / RECORD, record)


def _record(plan: DatasetPlan, state: str) -> dict:
    return {"format": FORMAT, "version": FORMAT_VERSION, "state": state,
            "fingerprint": plan.fingerprint, "spec": plan.resolved,
            "geometry": plan.poses.to_record(),
            "simbench_version": simbench.__version__, "caution": simbench.CAUTION}


def read_record(folder: Path) -> dict:
    """The ``dataset.json`` of a dataset folder; one line of error if it is not one."""
    path = Path(folder) / RECORD
    if not Path(folder).is_dir():
        raise InputError(Where(str(folder)), "not a dataset folder (no such folder)"
                         if not Path(folder).exists() else "not a dataset folder (a file)",
                         "a folder written by simbench generate")
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(Where(str(folder)), f"not a dataset folder (no {RECORD})",
                         "a folder written by simbench generate") from None
    except (OSError, ValueError) as exc:
        raise InputError(Where(str(path)), f"unreadable: {' '.join(str(exc).split())}",
                         "a dataset folder written by simbench generate") from None
    if not isinstance(record, dict) or record.get("format") != FORMAT:
        raise InputError(Where(str(path)), "not a simbench dataset record",
                         "a dataset folder written by simbench generate")
    return record


def readme_text(plan: DatasetPlan) -> str:
    """The README of a dataset folder."""
    spec = plan.spec
    keys = "\n".join(f"- `{k}`: {d}, shape {s}" for k, (d, s) in plan.keys.items())
    return f"""# Dataset {spec.name}

{simbench.CAUTION}

{spec.description}

Made by simbench {simbench.__version__} from the spec `{spec.source}`: {spec.samples} samples
of the phantom family `{spec.family.name}` scanned by `{spec.scanner.name}`, root seed
{spec.seed}, doses {', '.join(f'{d:g}' for d in spec.doses)}, truth at
{plan.reference_energy_kev:g} keV (HU: mu_water {plan.mu_water:.6g} /mm, mu_air
{plan.mu_air:.6g} /mm).

Arrays of each sample (mu in 1/mm, line integrals dimensionless, lengths in mm):

{keys}

Load it in Python:

```python
from simbench.datasets import open_dataset
ds = open_dataset("{plan.out.name}")
sample = ds[0]            # dict of NumPy arrays
info = ds.sample_info(0)  # parameters, seeds, grid, geometry, reference energy
```

Check it with `simbench verify {plan.out.name}`. `dataset.json` holds every setting;
`manifest.jsonl` one line per sample with the SHA-256 of each array.
"""


def _bar(total: int, name: str, show: bool):
    from tqdm import tqdm

    return tqdm(total=total, unit="sample", desc=name, leave=False, dynamic_ncols=True,
                disable=not show or total == 0)


def _folder_size(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


# ------------------------------------------------------------------------------------------
# Verifying
# ------------------------------------------------------------------------------------------


def verify_dataset(folder: str | Path) -> tuple[list[str], str]:
    """Recheck every checksum of a dataset; return the problems found and a summary.

    Checks, in order: ``dataset.json`` says complete; the manifest's SHA-256; every shard
    listed is a whole, unaltered committed folder (every file's SHA-256 against its marker,
    the marker's against ``dataset.json``); every array of every sample against its SHA-256
    in the manifest; no shard is present that is not listed.

    Returns
    -------
    problems : list of str
        One line each, naming the shard, sample and array; empty if the dataset is whole.
    summary : str

    Raises
    ------
    InputError
        ``folder`` is not a dataset folder.
    """
    import h5py

    from simbench.folders import verify_folder

    folder = Path(folder)
    record = read_record(folder)
    problems: list[str] = []
    if record.get("state") != "complete":
        problems.append(f"{folder / RECORD}: the dataset is incomplete (generation was "
                        "interrupted); run simbench generate again to finish it")
        return problems, f"{folder}: incomplete"
    manifest = folder / MANIFEST
    if not manifest.is_file():
        return [f"{manifest}: missing"], f"{folder}: 1 problem found"
    if file_sha256(manifest) != record.get("manifest_sha256"):
        problems.append(f"{manifest}: SHA-256 differs from {RECORD} (altered after writing)")
    shards = record.get("shards", {})
    whole = set()
    for name, entry in sorted(shards.items()):
        path = folder / SHARDS / name
        try:
            verify_folder(path, SHARD_KIND, checksums=True)
        except InputError as error:
            problems.append(f"shard {name}: {error}")
            continue
        if file_sha256(path / "complete.json") != entry.get("marker_sha256"):
            problems.append(f"shard {name}: {path / 'complete.json'}: differs from {RECORD} "
                            "(the shard was rewritten after the dataset was finished)")
        whole.add(name)  # its files match its marker: its arrays can be checked
    present = {p.name for p in (folder / SHARDS).iterdir()} if (folder / SHARDS).is_dir() else set()
    for name in sorted(present - set(shards)):
        problems.append(f"{folder / SHARDS / name}: not part of the dataset (not in {RECORD})")
    n = 0
    handles: dict = {}
    try:
        with open(manifest, encoding="utf-8") as lines:
            for number, line in enumerate(lines, 1):
                try:
                    entry = json.loads(line)
                    shard, group = entry["shard"], entry["group"]
                except (ValueError, KeyError, TypeError):
                    problems.append(f"{manifest}:{number}: not a sample record")
                    continue
                n += 1
                if shard not in whole:
                    continue  # already named above
                try:
                    handle = handles.get(shard) or handles.setdefault(shard, h5py.File(
                        folder / SHARDS / shard / SHARD_FILE, "r", locking=False))
                    for key, expected in sorted(entry["arrays"].items()):
                        array = handle[group][key][()]
                        if (array_sha256(array) != expected["sha256"]
                                or str(array.dtype) != expected["dtype"]
                                or list(array.shape) != expected["shape"]):
                            problems.append(f"shard {shard}: sample {entry['index']}: {key}: "
                                            "SHA-256 differs from the manifest")
                except Exception as exc:  # noqa: BLE001 - any damage is a finding, named
                    problems.append(f"shard {shard}: sample {entry.get('index')}: cannot be "
                                    f"read ({' '.join(str(exc).split())[:120]})")
    finally:
        for handle in handles.values():
            handle.close()
    expected_samples = record.get("spec", {}).get("samples")
    if n != expected_samples:
        problems.append(f"{manifest}: {n} samples, {RECORD} says {expected_samples}")
    summary = (f"{folder}: {n} samples in {len(shards)} shards, every checksum matches"
               if not problems else f"{folder}: {len(problems)} problem"
               f"{'s' if len(problems) != 1 else ''} found")
    return problems, summary
