"""One scenario, end to end: trace once, measure per dose and realization, reconstruct with
every algorithm, score against the exact truth, report.

The run folder (committed whole by :func:`simbench.folders.commit_folder`, kind ``run``)::

    OUT/
      scenario.resolved.yaml       every setting with its default filled in, seeds, versions
      truth/image.npy              mu (1/mm) at the reference energy on the grid, float32
      truth/labels.npy             ROI labels (0 outside every ROI), int32
      truth/line_integrals.npy     exact line integrals at the reference energy, float64
      measured/dose-<d>/realization-<r>/{projections,counts,flat,dark}.npy
      recon/<algorithm>/dose-<d>/realization-<r>.npy    float32 images
      metrics.json                 {algorithms: {name: {doses: {d: {metrics, rois, curves,
                                   seeds}}}}, run: {...}}
      report.html, figures/        the human report
      items.json                   the ledger of finished items (what a rerun takes over)
      complete.json                written last

Random streams come from the identity ``("run", scenario name, "dose", d, "realization",
r)`` and the root seed, never from the order of execution: the same seed gives the same
bits whatever runs first, and whatever executor runs the tasks (one :class:`RunTask` per
dose and realization, :mod:`simbench.execute.executors`). A rerun takes over finished items
whose inputs are unchanged (:mod:`simbench.execute.reuse`).
"""

from __future__ import annotations

import contextlib
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import simbench
from simbench.errors import InputError, Where

STAGES = ("truth", "trace", "measure", "reconstruct", "score", "report")


def dose_label(dose: float) -> str:
    """The folder name of a dose level: ``dose-1``, ``dose-0.25``."""
    return f"dose-{dose:g}"


def run_identity(scenario, dose: float, realization: int) -> tuple:
    """The identity of one measurement of a run (its random stream's key)."""
    return ("run", scenario.name, "dose", f"{dose:g}", "realization", int(realization))


def resolve_algorithms(scenario, allow_code: bool) -> list:
    """Every algorithm of a scenario as a checked reconstructor, before any work.

    Returns
    -------
    list of (AlgorithmSpec, Reconstructor, checked options)
    """
    from simbench.recon.external import external_reconstructor
    from simbench.recon.registry import find_reconstructor

    out = []
    for spec in scenario.algorithms:
        if spec.command is not None:
            if not allow_code:
                raise InputError(spec.where.child("command"),
                                 f"'{spec.name}' runs the program '{spec.command}', and "
                                 "programs named in a file run only when allowed",
                                 "pass --allow-code on the command line if you trust this file")
            reconstructor = external_reconstructor(spec.name, spec.command, stage=spec.stage,
                                                   time_limit_s=spec.time_limit_s)
        else:
            reconstructor = find_reconstructor(spec.use or spec.name, allow_code=allow_code,
                                               where=spec.where.child("use" if spec.use
                                                                      else "name"))
        checked = reconstructor.check_options(spec.options, spec.where.child("options"))
        out.append((spec, reconstructor, checked))
    return out


def detected_effective_energy_kev(energies_kev, weights, material: str = "water") -> float:
    """Effective energy of a detected spectrum: the monoenergetic beam with the same first
    half-value layer in ``material``, the layer weighted by the detector's signal.

    Notes
    -----
    Solves ``sum_E w(E) exp(-mu(E) t) = sum_E w(E) / 2`` for the half-value layer ``t``, then
    ``mu(E_eff) = ln 2 / t`` (the usual definition of effective energy, with the detector's
    signal weights in place of air kerma).
    """
    from scipy.optimize import brentq

    from simbench.materials import get_material, mu_table
    from simbench.materials.attenuation import VALID_ENERGY_RANGE_KEV

    energies = np.asarray(energies_kev, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    keep = w > 0
    energies, w = energies[keep], w[keep]
    spec = get_material(material)
    mu = mu_table([spec], energies)[0]
    half = lambda t: float(w @ np.exp(-mu * t)) / w.sum() - 0.5  # noqa: E731
    hvl = brentq(half, 0.0, 50.0 * np.log(2.0) / mu.min())
    target = np.log(2.0) / hvl
    lo, hi = VALID_ENERGY_RANGE_KEV
    grid = np.geomspace(max(lo, energies.min()), min(hi, energies.max()), 801)
    values = mu_table([spec], grid)[0]
    index = int(np.argmin(np.abs(values - target)))
    return float(round(grid[index], 1))


class RunPlan:
    """Everything a run will do, checked and estimated before any work."""

    def __init__(self, scenario, out: Path, *, allow_code: bool):
        from simbench.execute.reconstruct import (check_grid_inside_orbit,
                                                  check_reconstruction_memory, grid_from_options)
        from simbench.execute.scan import ScanPlan

        self.scenario, self.out = scenario, out
        self.algorithms = resolve_algorithms(scenario, allow_code)
        self.scans = {dose: ScanPlan(scenario.phantom, scenario.scanner, out, None, dose)
                      for dose in scenario.doses}
        first = self.scans[scenario.doses[0]]
        self.poses = first.poses
        g = scenario.grid
        self.grid = grid_from_options(self.poses, g["size"], g["voxel_size"], g["centre"])
        check_grid_inside_orbit(self.poses, self.grid,
                                scenario.wheres.get("grid", Where(scenario.source)))
        check_reconstruction_memory(float(np.prod(self.poses.projection_shape)), self.grid)
        from simbench.budget import check_bytes

        # the reconstructions of one algorithm and dose are held for scoring (noise spectra
        # need every realization), with the truth and labels
        voxels = float(np.prod(self.grid.shape))
        check_bytes(voxels * 8.0 * (scenario.realizations + 4),
                    scenario.wheres.get("realizations", Where(scenario.source)),
                    f"{scenario.realizations} realizations of a "
                    f"{' x '.join(map(str, self.grid.shape))} image", "fewer realizations or a "
                    "smaller grid")
        self.allow_code = allow_code
        self.needs_counts = any(rec.stage == "counts" for _, rec, _ in self.algorithms)
        self.first = (dose_label(scenario.doses[0]), 0)
        self.total_steps = len(scenario.doses) * scenario.realizations * (
            1 + len(self.algorithms))


    def item_keys(self) -> dict:
        """Every item of the run by ledger name, with the key of everything its bits depend
        on (None: never reused). See :mod:`simbench.execute.reuse`."""
        from simbench.execute.reuse import fingerprint

        scenario, first = self.scenario, self.scans[self.scenario.doses[0]]
        base = fingerprint(simbench.__version__, scenario.phantom, self.poses, first.spot,
                           first.cells, first.spectrum, scenario.scanner.physics)
        g = self.grid
        truth = fingerprint("truth", base, g.shape, g.spacing_mm, g.centre_mm,
                            scenario.reference_energy_kev)
        keys: dict = {"truth": truth}
        for dose in scenario.doses:
            for r in range(scenario.realizations):
                name = f"{dose_label(dose)}/realization-{r}"
                measured = keys[f"measured/{name}"] = fingerprint(
                    "measured", base, self.scans[dose].physics, scenario.seed,
                    run_identity(scenario, dose, r), self.needs_counts)
                for spec, rec, options in self.algorithms:
                    keys[f"recon/{spec.name}/{name}"] = fingerprint(
                        "recon", measured, truth, spec.name, rec.name, rec.stage, options
                    ) if rec.origin == "built-in" else None
        return keys


def run_scenario(scenario, out: Path, *, allow_code: bool = False, progress: bool = True,
                 say=print, reuse: bool = True, workers: int | None = None,
                 scheduler: str | None = None) -> dict:
    """Run a scenario into the folder ``out`` (committed whole).

    Parameters
    ----------
    scenario : simbench.scenario.Scenario
    out : Path
    allow_code : bool
        Allow module paths and external programs named in the scenario file.
    progress : bool
        Show a progress bar on standard error.
    say : callable
        Receives the closing summary lines.
    reuse : bool
        Take over the finished items (truth, measurements, built-in reconstructions) of an
        interrupted run into ``out``, or of the complete run already there, whose inputs are
        the same (:mod:`simbench.execute.reuse`); False makes everything again.
    workers, scheduler : optional
        Run the measurements and reconstructions on local worker processes or on a Dask
        cluster (:func:`simbench.execute.executors.open_executor`); default in this process.
        The bits are the same either way.

    Returns
    -------
    dict
        The content of ``metrics.json``.
    """
    from simbench.execute import warm
    from simbench.execute.executors import open_executor
    from simbench.execute.reuse import LEDGER, Ledger
    from simbench.folders import commit_folder

    plan = RunPlan(scenario, out, allow_code=allow_code)
    if (workers or scheduler) and not Path(str(scenario.source)).is_file():
        raise InputError(Where("<command line>", field="--workers"), "a scenario that is not "
                         "read from a file cannot be sent to worker processes",
                         "a scenario file, or no --workers/--scheduler")
    _import_in_background("matplotlib.pyplot")  # the report needs it; the run has CPU to spare
    started = time.perf_counter()
    timings = dict.fromkeys(STAGES, 0.0)
    helper = warm.start(scenario.source)  # compiles on the idle core when the cache is cold
    with contextlib.ExitStack() as stack:
        stack.callback(warm.stop, helper)
        staging = stack.enter_context(commit_folder(out, "run",
                                                    resume=LEDGER if reuse else None))
        executor = stack.enter_context(open_executor(workers, scheduler))
        if workers or scheduler:
            say(f"running {executor.description}")
        keys = plan.item_keys() if reuse else dict.fromkeys(plan.item_keys())
        ledger = Ledger(staging, keys, previous=out if reuse else None)
        reused = ledger.summary()
        if reused:
            say(reused)
        with _progress(plan, progress) as bar:
            t0 = time.perf_counter()
            truth = _write_truth(staging, plan, timings, ledger)
            timings["truth"] = time.perf_counter() - t0
            _measure_and_reconstruct(staging, plan, truth, timings, bar, ledger, executor)
        results = _score(staging, plan, truth, timings, ledger)
        metrics = _metrics_record(plan, truth, results, timings, started)
        metrics["run"]["reused"] = {source: names for source, names in ledger.taken.items()}
        from simbench.atomic import write_json

        write_json(staging / "metrics.json", metrics)
        _write_resolved(staging, plan, truth)
        t0 = time.perf_counter()
        from simbench.report.run_report import write_report

        write_report(staging, metrics)
        timings["report"] = time.perf_counter() - t0
        metrics["run"]["timings_s"] = {k: round(v, 3) for k, v in timings.items()}
        metrics["run"]["wall_time_s"] = round(time.perf_counter() - started, 3)
        write_json(staging / "metrics.json", metrics)
    say(f"wrote {out}/ — {len(plan.algorithms)} algorithm(s) x {len(scenario.doses)} dose(s) x "
        f"{scenario.realizations} realization(s) in {metrics['run']['wall_time_s']:.1f} s")
    say(f"report: {out / 'report.html'}")
    return metrics


def _import_in_background(module: str) -> None:
    """Import a module in a daemon thread (its import costs seconds; the run waits on numba
    kernels meanwhile, and a later import in the main thread just finds it loaded)."""
    import importlib
    import threading

    def load() -> None:
        try:
            import matplotlib

            matplotlib.use("Agg")
            importlib.import_module(module)
        except Exception:  # noqa: BLE001 - the report's own import will say what is wrong
            pass

    threading.Thread(target=load, daemon=True, name=f"import {module}").start()


class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def set_postfix_str(self, text: str) -> None:
        pass


class _progress:
    """A tqdm progress bar over the run's steps (or nothing)."""

    def __init__(self, plan: RunPlan, show: bool):
        self.plan, self.show, self.bar = plan, show, None

    def __enter__(self):
        if not self.show:
            return _NoBar()
        from tqdm import tqdm

        self.bar = tqdm(total=self.plan.total_steps, unit="step", desc=self.plan.scenario.name,
                        leave=False, dynamic_ncols=True)
        return self.bar

    def __exit__(self, *exc) -> None:
        if self.bar is not None:
            self.bar.close()


class _Truth:
    """The truth of a run: image, labels, reference energy, HU scale, field of view."""


def _write_truth(staging: Path, plan: RunPlan, timings: dict, ledger) -> _Truth:
    from simbench.execute.scan import scan_into
    from simbench.materials import get_material, mu_table
    from simbench.phantom import rasterize
    from simbench.phantom.rasterize import label_map

    scenario = plan.scenario
    truth = _Truth()
    first = plan.scans[scenario.doses[0]]
    from simbench.geometry import field_of_view_radius_mm

    radius = field_of_view_radius_mm(plan.poses)
    x, y = np.meshgrid(plan.grid.axis_mm("x"), plan.grid.axis_mm("y"))
    fov = np.hypot(x, y) <= (radius if np.isfinite(radius) and radius > 0 else np.inf)
    truth.fov = np.broadcast_to(fov, plan.grid.image_shape) if plan.grid.dimension == 3 else fov
    folder = staging / "truth"
    known = ledger.get("truth")
    truth.reused = known is not None
    if truth.reused:
        truth.energy, truth.mu_water, truth.mu_air = (known[k] for k in
                                                      ("energy_kev", "mu_water", "mu_air"))
        truth.image = np.load(folder / "image.npy")
        truth.labels = np.load(folder / "labels.npy")
        return truth
    # the first measurement writes the exact line integrals of a truth made afresh
    ledger.drop("measured/{}/realization-{}".format(*plan.first))
    # the reference energy: given, or the effective energy in water of the detected spectrum,
    # which needs the first measurement's spectrum weights (measured noise-free, not written)
    import tempfile

    if scenario.reference_energy_kev is not None:
        truth.energy = float(scenario.reference_energy_kev)
    else:
        with tempfile.TemporaryDirectory(dir=staging) as tmp:
            state = scan_into(Path(tmp), one_view_plan(first), seed=0, noise=False,
                              identity=("reference",), reference_energy_kev=60.0,
                              write_truth=False)
            weights = state.metadata["signal_weights_per_bin"]
            energies = state.metadata["energies_kev"]
        truth.energy = detected_effective_energy_kev(energies, np.sum(weights, axis=0))
    materials = [get_material("water"), get_material("air")]
    truth.mu_water, truth.mu_air = (float(v) for v in mu_table(materials, [truth.energy])[:, 0])
    # scored as written (float32): the metrics can be recomputed from the folder alone, and a
    # rerun that takes the truth over scores the same bits
    truth.image = rasterize(scenario.phantom, plan.grid, truth.energy).astype(np.float32)
    truth.labels = label_map(scenario.phantom, plan.grid).astype(np.int32)
    folder.mkdir(exist_ok=True)
    np.save(folder / "image.npy", truth.image)
    np.save(folder / "labels.npy", truth.labels)
    return truth


def one_view_plan(plan):
    """A plan of the first view only (the reference-energy probe)."""
    import copy

    probe = copy.copy(plan)
    probe.poses = plan.poses.select([0])
    probe.shape = probe.poses.projection_shape
    probe.step = 1
    return probe


@dataclass(frozen=True)
class RunTask:
    """One measurement of a run and the reconstructions made from it: the unit of work sent to
    an executor (:mod:`simbench.execute.executors`). Small and picklable: a worker process
    rebuilds the plan from the scenario file, and refuses if its keys differ from the run's
    (the file was edited during the run)."""

    token: str
    scenario_file: str
    allow_code: bool
    staging: str
    dose: float
    realization: int
    measure: bool                # False: the measurement is taken over, only reconstruct
    write_truth: bool            # also write the exact line integrals (the first measurement)
    algorithms: tuple            # names of the algorithms to run on it
    reference_energy_kev: float
    measured_key: str | None
    metadata: dict | None        # the taken-over measurement's metadata

    @property
    def label(self) -> str:
        return f"{dose_label(self.dose)}/realization-{self.realization}"


#: plans of the runs in this process, by token (a worker process rebuilds its own)
_PLANS: dict = {}
#: this process's traced path lengths: (plan token, TraceCache)
_TRACED: dict = {}


def _plan_for(task: RunTask) -> RunPlan:
    plan = _PLANS.get(task.token)
    if plan is None:
        from simbench.scenario import load_scenario

        _PLANS.clear()
        plan = RunPlan(load_scenario(task.scenario_file), Path(task.staging),
                       allow_code=task.allow_code)
        if plan.item_keys().get(f"measured/{task.label}") != task.measured_key:
            raise InputError(Where(task.scenario_file), "the scenario file changed while the "
                             "run was going on", "run it again once the file is final")
        _PLANS[task.token] = plan
    return plan


def _trace_cache(plan: RunPlan, token: str, dose: float):
    """The path lengths of this plan, traced once per process and shared by every dose."""
    from simbench.budget import memory_budget_bytes
    from simbench.execute.scan import TraceCache

    scan = plan.scans[dose]
    if _TRACED.get("token") != token:
        first = plan.scans[plan.scenario.doses[0]]
        n_sub = (1 if first.spot is None else len(first.spot)) * \
            (1 if first.cells is None else len(first.cells))
        traced_bytes = 8.0 * first.n_materials * n_sub * float(np.prod(first.shape))
        _TRACED.clear()
        _TRACED.update(token=token, blocks={},
                       keep=traced_bytes < 0.25 * memory_budget_bytes()[0])
    cache = TraceCache(scan, keep=_TRACED["keep"])
    cache.blocks = _TRACED["blocks"]  # same geometry for every dose: share the traced blocks
    return cache


def run_task(task: RunTask) -> dict:
    """Measure (unless taken over) and reconstruct one realization of one dose.

    Writes ``measured/<dose>/<realization>/`` and ``recon/<algorithm>/<dose>/<realization>.npy``
    in the staging folder, and returns what the run's ledger records: the measurement's
    metadata and timings, and each reconstruction's wall time and peak memory.
    """
    from simbench.atomic import as_json_values
    from simbench.execute.reconstruct import timed_reconstruction
    from simbench.execute.scan import scan_into
    from simbench.recon.contract import Acquisition

    plan = _plan_for(task)
    scenario, staging = plan.scenario, Path(task.staging)
    folder = staging / "measured" / dose_label(task.dose) / f"realization-{task.realization}"
    out: dict = {"timings": {"trace": 0.0, "measure": 0.0}, "recon": {}}
    if task.measure:
        shutil.rmtree(folder, ignore_errors=True)  # a retried task starts clean
        folder.mkdir(parents=True)
        t0 = time.perf_counter()
        state = scan_into(folder, plan.scans[task.dose], seed=scenario.seed, noise=True,
                          identity=run_identity(scenario, task.dose, task.realization),
                          reference_energy_kev=task.reference_energy_kev,
                          write_truth=task.write_truth,
                          lengths=_trace_cache(plan, task.token, task.dose))
        out["timings"] = {"trace": state.timings["trace"],
                          "measure": time.perf_counter() - t0 - state.timings["trace"]}
        if task.write_truth:
            (folder / "truth" / "path_lengths.npy").unlink()
        if not plan.needs_counts:
            for name in ("counts", "flat", "dark"):
                (folder / "measured" / f"{name}.npy").unlink()
        metadata = out["metadata"] = as_json_values(state.metadata)
    else:
        metadata = task.metadata
    arrays = {name: np.load(folder / "measured" / f"{name}.npy", mmap_mode="r")
              if (folder / "measured" / f"{name}.npy").exists() else None
              for name in ("projections", "counts", "flat", "dark")}
    record = {"measurement": metadata, "truth": {
        "reference_energy_kev": task.reference_energy_kev}, "physics": metadata.get("physics")}
    acquisition = Acquisition(plan.poses, metadata=record, source=str(folder), **arrays)
    for spec, reconstructor, options in plan.algorithms:
        if spec.name not in task.algorithms:
            continue
        image, seconds, peak = timed_reconstruction(reconstructor, acquisition, plan.grid,
                                                    options)
        target = staging / "recon" / spec.name / dose_label(task.dose)
        target.mkdir(parents=True, exist_ok=True)
        np.save(target / f"realization-{task.realization}.npy", image)
        out["recon"][spec.name] = {"seconds": seconds, "peak_bytes": peak}
    return out


def _tasks(staging: Path, plan: RunPlan, truth: _Truth, ledger, token: str) -> list:
    scenario = plan.scenario
    keys = plan.item_keys()
    tasks = []
    for dose in scenario.doses:
        for r in range(scenario.realizations):
            label = f"{dose_label(dose)}/realization-{r}"
            known = ledger.get(f"measured/{label}")
            todo = tuple(spec.name for spec, _, _ in plan.algorithms
                         if ledger.get(f"recon/{spec.name}/{label}") is None)
            if known is not None and not todo:
                continue
            first = (dose_label(dose), r) == plan.first
            tasks.append(RunTask(token, str(Path(scenario.source).resolve()), plan.allow_code,
                                 str(staging.resolve()),
                                 dose, r, known is None, first and not truth.reused, todo,
                                 truth.energy, keys[f"measured/{label}"],
                                 None if known is None else known["metadata"]))
    return tasks


def _measure_and_reconstruct(staging: Path, plan: RunPlan, truth: _Truth, timings: dict,
                             bar, ledger, executor) -> None:
    """Run every task not taken over, on the executor, and record each in the ledger."""
    import secrets

    token = secrets.token_hex(8)
    _PLANS[token] = plan
    tasks = _tasks(staging, plan, truth, ledger, token)
    steps = {t.label: (1 if t.measure else 0) + len(t.algorithms) for t in tasks}
    bar.update(plan.total_steps - sum(steps.values()))  # taken over
    truth_values = {"energy_kev": truth.energy, "mu_water": truth.mu_water,
                    "mu_air": truth.mu_air}
    try:
        for task, result in executor.map_unordered(run_task, tasks,
                                                   label=lambda t: f"{plan.scenario.source}: "
                                                   f"{t.label}"):
            folder = staging / "measured" / dose_label(task.dose) / \
                f"realization-{task.realization}"
            for stage in ("trace", "measure"):
                timings[stage] += result["timings"][stage]
            if task.write_truth:
                (folder / "truth" / "line_integrals.npy").rename(
                    staging / "truth" / "line_integrals.npy")
                shutil.rmtree(folder / "truth")
                ledger.record("truth", [staging / "truth" / f"{name}.npy" for name in
                                        ("image", "labels", "line_integrals")], truth_values)
            if task.measure:
                ledger.record(f"measured/{task.label}", sorted(folder.rglob("*.npy")),
                              {"metadata": result["metadata"]})
            for name, values in result["recon"].items():
                timings["reconstruct"] += values["seconds"]
                path = staging / "recon" / name / dose_label(task.dose) / \
                    f"realization-{task.realization}.npy"
                ledger.record(f"recon/{name}/{task.label}", [path], values)
            bar.update(steps[task.label])
            bar.set_postfix_str(task.label)
    finally:
        _PLANS.pop(token, None)
        _TRACED.clear()


def _score(staging: Path, plan: RunPlan, truth: _Truth, timings: dict, ledger) -> dict:
    """Score every algorithm at every dose from the images in the staging folder."""
    from simbench.scenario.scoring import ScoringContext, score_realizations

    scenario = plan.scenario
    t0 = time.perf_counter()
    context = ScoringContext(truth.image, truth.labels, plan.grid, scenario.phantom,
                             scenario.rois, truth.mu_water, truth.mu_air, truth.fov,
                             scenario.detectability_task)
    results: dict = {spec.name: {} for spec, _, _ in plan.algorithms}
    for dose in scenario.doses:
        seeds = [{"realization": r, "root_seed": scenario.seed,
                  "identity": list(run_identity(scenario, dose, r))}
                 for r in range(scenario.realizations)]
        for spec, _, _ in plan.algorithms:
            images, walls, peaks, reproj = [], [], [], []
            for r in range(scenario.realizations):
                label = f"{dose_label(dose)}/realization-{r}"
                image = np.load(staging / "recon" / spec.name / dose_label(dose) /
                                f"realization-{r}.npy")
                values = ledger.values_of(f"recon/{spec.name}/{label}")
                images.append(image)
                walls.append(values.get("seconds", np.nan))
                peaks.append(values.get("peak_bytes", np.nan))
                if "projection_error" in scenario.metrics:
                    reproj.append(_reprojection_rmse(plan, image, staging))
            results[spec.name][dose_label(dose)] = dict(
                score_realizations(images, context, scenario.metrics, wall_times=walls,
                                   peak_bytes=peaks, reprojection_errors=reproj),
                seeds=seeds)
    timings["score"] += time.perf_counter() - t0
    return results


def _reprojection_rmse(plan: RunPlan, image: np.ndarray, staging: Path) -> float:
    from simbench.recon.projectors import projector
    from simbench.score.streaks import projection_rmse

    if not hasattr(plan, "_projector"):
        plan._projector = projector(plan.poses, plan.grid)
        plan._exact = np.load(staging / "truth" / "line_integrals.npy", mmap_mode="r")
    return float(projection_rmse(plan._projector.forward(image), np.asarray(plan._exact)))


def _metrics_record(plan: RunPlan, truth: _Truth, results: dict, timings: dict,
                    started: float) -> dict:
    scenario = plan.scenario
    return {
        "format_version": 1,
        "scenario": {"name": scenario.name, "file": scenario.source,
                     "description": scenario.description},
        "phantom": {"name": scenario.phantom.name, "roi_names": list(scenario.phantom.roi_names)},
        "scanner": {"name": scenario.scanner.name},
        "reference_energy_kev": truth.energy,
        "hu_scale": {"mu_water_per_mm": truth.mu_water, "mu_air_per_mm": truth.mu_air},
        "grid": {"shape": list(plan.grid.shape), "spacing_mm": list(plan.grid.spacing_mm),
                 "centre_mm": list(plan.grid.centre_mm), "dimension": plan.grid.dimension},
        "doses": [dose_label(d) for d in scenario.doses],
        "dose_factors": list(scenario.doses),
        "realizations": scenario.realizations,
        "seed": scenario.seed,
        "rois": scenario.rois,
        "algorithms": {spec.name: {"reconstructor": rec.name, "origin": rec.origin,
                                   "stage": rec.stage, "options": options,
                                   "doses": results[spec.name]}
                       for spec, rec, options in plan.algorithms},
        "run": {"simbench_version": simbench.__version__,
                "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                "timings_s": {k: round(v, 3) for k, v in timings.items()},
                "wall_time_s": round(time.perf_counter() - started, 3)},
        "caution": simbench.CAUTION,
    }


def _write_resolved(staging: Path, plan: RunPlan, truth: _Truth) -> None:
    import importlib.metadata

    import yaml

    scenario = plan.scenario
    versions = {}
    for package in ("numpy", "scipy", "numba", "xraylib", "pyyaml", "matplotlib"):
        try:
            versions[package] = importlib.metadata.version(package)
        except importlib.metadata.PackageNotFoundError:
            versions[package] = "not installed"
    resolved = {
        "name": scenario.name,
        "description": scenario.description,
        "phantom": scenario.phantom_ref if scenario.phantom_ref != "inline" else
        str(scenario.phantom.source),
        "phantom_name": scenario.phantom.name,
        "scanner": scenario.scanner_ref if scenario.scanner_ref != "inline" else
        str(scenario.scanner.source),
        "scanner_name": scenario.scanner.name,
        "scanner_geometry": scenario.scanner.geometry.resolved(),
        "grid": {"size": list(plan.grid.shape[::-1][:plan.grid.dimension]),
                 "voxel_size": [f"{v!r} mm" for v in plan.grid.spacing_mm],
                 "centre": [f"{v!r} mm" for v in plan.grid.centre_mm]},
        "reference_energy": f"{truth.energy!r} keV",
        "reference_energy_from": "the scenario file" if scenario.reference_energy_kev
        is not None else "the effective energy in water of the detected spectrum",
        "seed": scenario.seed,
        "realizations": scenario.realizations,
        "doses": list(scenario.doses),
        "algorithms": [{"name": spec.name, "use": rec.name, "stage": rec.stage,
                        "origin": rec.origin, "options": options}
                       | ({"command": spec.command, "time_limit": f"{spec.time_limit_s:g} s"}
                          if spec.command else {})
                       for spec, rec, options in plan.algorithms],
        "metrics": list(scenario.metrics),
        "rois": scenario.rois,
        "detectability_task": "the edge insert's disc and measured contrast"
        if scenario.detectability_task is None else
        {"diameter": f"{scenario.detectability_task[0]!r} mm",
         "contrast": f"{scenario.detectability_task[1]!r} HU"},
        "tolerances": {k: (f"{v * 100:g} %" if rel else v)
                       for k, (v, rel) in scenario.tolerances.items()},
        "versions": {"simbench": simbench.__version__, **versions},
    }
    text = yaml.safe_dump(resolved, sort_keys=False, allow_unicode=True)
    (staging / "scenario.resolved.yaml").write_text(
        "# every setting of this run, defaults filled in\n" + text, encoding="utf-8")
