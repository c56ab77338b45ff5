"""Export a run, scan, reconstruction or dataset folder into an export folder, committed whole.

:func:`choose` turns the user's choice (truth, measured data, algorithms, doses,
realizations, samples) into the :class:`~simbench.export.source.Item` s to write, refusing
in one line what the folder or the format cannot give; :func:`export` checks the cost, then writes every
item with the array-level writers (:mod:`~simbench.export.nxtomo`,
:mod:`~simbench.export.tiff`, :mod:`~simbench.export.dicom`) into a folder committed by
:func:`simbench.folders.commit_folder` (kind ``export``), with ``README.txt`` (the caution,
what is where) and ``export.json`` (every file, its source and its SHA-256 in the source
folder, units, rescale values and UIDs). The export folder's layout mirrors the source's.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import simbench
from simbench.errors import InputError, Where

FORMATS = ("nxtomo", "tiff", "dicom")
#: what each format holds
HOLDS = {"nxtomo": "projections", "tiff": "images and projections", "dicom": "images"}
DATA_CHOICES = ("counts", "line-integrals")
#: the Python package each format needs
PACKAGES = {"nxtomo": "h5py", "tiff": "tifffile", "dicom": "pydicom"}


@dataclass(frozen=True)
class Choice:
    """What to export, as given on the command line (None: the default)."""

    truth: bool = False
    measured: bool = False
    algorithms: tuple = ()
    doses: tuple = ()
    realizations: tuple = ()
    samples: tuple = ()
    data: str | None = None
    hu_step: float | None = None


def _cli(field: str) -> Where:
    return Where("<command line>", field=field)


def check_format(fmt: str) -> None:
    """Refuse an unknown format, or one whose Python package is missing, in one line."""
    import importlib.util

    if fmt not in FORMATS:
        raise InputError(_cli("--format"), f"unknown format '{fmt}'", ", ".join(FORMATS))
    package = PACKAGES[fmt]
    if importlib.util.find_spec(package) is None:
        raise InputError(_cli("--format"), f"the {fmt} format needs the Python package "
                         f"{package}, which is not installed",
                         f"pip install {package} (or pip install 'simbench[export]')")


def choose(source, fmt: str, choice: Choice) -> list:
    """The items of ``source`` to export in ``fmt``.

    Without ``truth``, ``measured`` or ``algorithms``, everything the format holds: nxtomo
    the truth line integrals and every measurement; tiff and dicom the truth and every
    reconstruction (tiff also writes measured projections when asked with ``measured``).

    Raises
    ------
    InputError
        A choice the format or the folder cannot give; names the option and what is valid.
    """
    explicit = choice.truth or choice.measured or bool(choice.algorithms)
    truth = choice.truth or not explicit
    measured = choice.measured or (not explicit and fmt == "nxtomo")
    algorithms = list(choice.algorithms) if choice.algorithms else (
        [] if explicit or fmt == "nxtomo" else list(source.algorithms))
    if fmt == "nxtomo" and choice.algorithms:
        raise InputError(_cli("--algorithm"), "NXtomo files hold projections, not "
                         "reconstructed images", "--format tiff or dicom for reconstructions")
    if fmt == "dicom" and choice.measured:
        raise InputError(_cli("--measured"), "DICOM CT images hold images, not projections",
                         "--format nxtomo or tiff for projections")
    if fmt == "dicom" and choice.data is not None:
        raise InputError(_cli("--data"), "applies to projections, which DICOM does not hold",
                         "--data with --format nxtomo or tiff")
    if fmt != "dicom" and choice.hu_step is not None:
        raise InputError(_cli("--hu-step"), "applies to DICOM images only",
                         "--hu-step with --format dicom")
    if "all" in algorithms:
        algorithms = list(source.algorithms)
    for name in algorithms:
        if name not in source.algorithms:
            raise InputError(_cli("--algorithm"), f"'{name}' is not in this {source.kind}",
                             ", ".join(source.algorithms + ["all"]) if source.algorithms
                             else f"nothing: this {source.kind} holds no reconstructions")
    doses = _doses(source, choice.doses)
    realizations = _indices(source, choice.realizations, source.realizations,
                            "--realization", "realization",
                            "has no noise realizations to choose from")
    samples = _indices(source, choice.samples, source.samples, "--sample", "sample",
                       "has no samples (only datasets do)")
    data = choice.data
    if data is not None and data not in DATA_CHOICES:
        raise InputError(_cli("--data"), f"unknown data '{data}'", ", ".join(DATA_CHOICES))
    if data == "counts" and not source.counts_kept:
        why = {"run": " (a run keeps them only when an algorithm reads counts)",
               "dataset": " (a dataset keeps them when its spec stores counts)"}
        raise InputError(_cli("--data"), f"this {source.kind} kept no raw counts"
                         f"{why.get(source.kind, '')}", "--data line-integrals")

    images = fmt in ("tiff", "dicom")
    picked = []
    for item in source.items:
        if item.dose and item.dose not in doses or \
                item.realization is not None and item.realization not in realizations or \
                item.sample is not None and item.sample not in samples:
            continue
        role = item.role
        if role.startswith("truth") and truth:
            if role == "truth image" and images or role == "truth labels" and fmt == "tiff" \
                    or role == "truth line integrals" and fmt in ("nxtomo", "tiff"):
                picked.append(item)
        elif role == "reconstruction" and item.algorithm in algorithms and images:
            picked.append(item)
        elif role == "measured" and measured and fmt in ("nxtomo", "tiff"):
            picked.append(item)
    if not picked and source.kind == "scan" and images and not measured:
        raise InputError(Where(str(source.folder)), "a scan folder holds projections, not "
                         "images", "reconstruct it first (simbench reconstruct), or export its "
                         "projections with --format nxtomo or tiff --measured")
    if not picked:
        what = "truth" if truth else "measurements" if measured else "reconstructions"
        raise InputError(Where(str(source.folder)), f"this {source.kind} folder holds no "
                         f"{what} that {fmt} can hold ({HOLDS[fmt]})",
                         "--format nxtomo for projections, tiff or dicom for images" if
                         fmt != "nxtomo" else "--format tiff or dicom for images")
    return picked


def _doses(source, given) -> set:
    if not given:
        return set(source.doses)
    if not source.doses:
        raise InputError(_cli("--dose"), f"a {source.kind} folder holds one measurement",
                         "no --dose")
    out = set()
    for text in given:
        label = text if str(text).startswith("dose-") else None
        if label is None:
            try:
                label = f"dose-{float(text):g}"
            except ValueError:
                label = str(text)
        if label not in source.doses:
            raise InputError(_cli("--dose"), f"dose '{text}' is not in this {source.kind}",
                             ", ".join(f"{v:g}" for v in source.doses.values()))
        out.add(label)
    return out


def _indices(source, given, count: int, option: str, what: str, none: str) -> set:
    """Whole numbers from 0 to ``count - 1`` given with ``option`` (all of them by default)."""
    if not given:
        return set(range(count))
    if not count:
        raise InputError(_cli(option), f"a {source.kind} folder {none}", f"no {option}")
    out = set()
    for text in given:
        try:
            index = int(str(text))
        except ValueError:
            index = -1
        if not 0 <= index < count:
            raise InputError(_cli(option), f"{what} '{text}' is not in this {source.kind}",
                             f"a whole number from 0 to {count - 1}")
        out.add(index)
    return out


# ------------------------------------------------------------------------------------------
# Cost
# ------------------------------------------------------------------------------------------


def check_cost(source, items: list, out: Path) -> None:
    """Refuse, before any work, an export whose memory or disk need is too large.

    Memory: one image slice in float64 four times (HU, rounding) or one block of views
    (NXtomo, 64 MiB, twice). Disk: the exported arrays at their source size, plus a page of
    DICOM header per slice, against the free space where the folder is built.
    """
    from simbench.budget import check_bytes, check_disk
    from simbench.export.nxtomo import BYTES_PER_BLOCK

    sizes = {rel: source.size(rel) for item in items for rel in item.files.values()}
    slice_bytes = 0.0
    if source.grid is not None:
        slice_bytes = 4.0 * 8.0 * source.grid.shape[1] * source.grid.shape[2]
    check_bytes(max(slice_bytes, 2.0 * BYTES_PER_BLOCK), Where(str(source.folder)),
                "exporting one slice or block of views", "a smaller image or detector")
    need = float(sum(sizes.values())) + 2048.0 * (source.grid.shape[0] * len(items)
                                                  if source.grid is not None else len(items))
    check_disk(need, out, _cli("-o"), "the export", "fewer items (--algorithm, --dose, "
               "--realization)")


# ------------------------------------------------------------------------------------------
# Writing
# ------------------------------------------------------------------------------------------


def export(source_path: str | Path, fmt: str, out: str | Path, choice: Choice = Choice(),
           *, say=print) -> dict:
    """Export a folder's truth, reconstructions or measurements into ``out`` in ``fmt``.

    Parameters
    ----------
    source_path : str or Path
        A run, scan, reconstruction or dataset folder written by simbench.
    fmt : str
        ``nxtomo``, ``tiff`` or ``dicom``.
    out : str or Path
        The export folder (committed whole; an existing export folder is replaced).
    choice : Choice
        What to export (see :func:`choose`).
    say : callable
        Receives the one-line summary.

    Returns
    -------
    dict
        The content of ``export.json``.
    """
    from simbench.export.source import open_source

    check_format(fmt)
    if choice.hu_step is not None and not (np.isfinite(choice.hu_step)
                                           and 0.0 < choice.hu_step <= 1000.0):
        raise InputError(_cli("--hu-step"), f"{choice.hu_step:g} HU is out of range",
                         "a step above 0 and at most 1000 HU, e.g. 1 or 0.25")
    source = open_source(source_path)
    try:
        return _export(source, fmt, Path(out), choice, say)
    finally:
        if source.dataset is not None:
            source.dataset.close()


def _export(source, fmt: str, out: Path, choice: Choice, say) -> dict:
    from simbench.folders import commit_folder

    items = choose(source, fmt, choice)
    if out.resolve() == source.folder.resolve() or source.folder.resolve() in \
            out.resolve().parents:
        raise InputError(_cli("-o"), "the export folder cannot be inside the folder it exports",
                         "a path outside the source folder")
    check_cost(source, items, out)
    if fmt == "nxtomo":
        poses = source.poses()
        if np.any(~np.isfinite(poses.angles_rad)):
            raise InputError(Where(str(source.folder), field="geometry"), "NXtomo needs a "
                             "rotation angle per view, and this scan's geometry is a list of "
                             "poses", "--format tiff for its projections")
    started = time.perf_counter()
    record = {"format": fmt, "source": {"folder": str(source.folder), "kind": source.kind,
                                        "digest_sha256": source.digest},
              "simbench_version": simbench.__version__, "caution": simbench.CAUTION,
              "items": []}
    with commit_folder(out, "export") as staging:
        for item in items:
            entry = {"name": item.name, "role": item.role, "algorithm": item.algorithm,
                     "dose": item.dose, "realization": item.realization,
                     "sample": item.sample,
                     "source_files": {rel: source.sha256(rel) for rel in item.files.values()}}
            entry.update(_WRITERS[fmt](source, item, staging, choice))
            record["items"].append(entry)
        record.update(_format_record(source, fmt))
        from simbench.atomic import write_json

        write_json(staging / "export.json", record)
        (staging / "README.txt").write_text(_readme(source, fmt, record), encoding="utf-8")
    n_files = sum(len(e["files"]) for e in record["items"])
    say(f"wrote {out}/ ({len(items)} item(s), {n_files} {fmt} file(s), export.json, README.txt)"
        f" from the {source.kind} {source.folder} in {time.perf_counter() - started:.1f} s")
    return record


def _target(staging: Path, name: str, suffix: str = "") -> Path:
    path = staging / (name + suffix)
    path.parent.mkdir(parents=True, exist_ok=True)
    return path


def _write_nxtomo(source, item, staging: Path, choice: Choice) -> dict:
    from simbench.export.nxtomo import write_nxtomo

    poses = source.poses()
    measured = item.role == "measured"
    data = choice.data or ("counts" if source.counts_kept else "line-integrals")
    counts = measured and data == "counts"
    _require_frames(source, item, counts)
    arrays = {k: source.load(item.files[k]) for k in
              (("counts", "flat", "dark") if counts else ("projections",))}
    projections = arrays["counts" if counts else "projections"]
    expected = poses.projection_shape
    if tuple(projections.shape) != tuple(expected):
        raise InputError(Where(str(source.folder / item.files["projections"])),
                         f"shape {tuple(projections.shape)} does not match the geometry "
                         f"{tuple(expected)}", f"a complete {source.kind} folder")
    monochromatic = item.role == "truth line integrals"
    label = item.title if measured else "exact line integrals at the reference energy"
    kind = "raw counts with one flat and one dark frame" if counts else \
        "line integrals -ln(I/I0)"
    notes = f"data: {kind} ({label})"
    title = " ".join(p for p in (source.names.get("scenario") or source.names.get("phantom"),
                                 "-", label) if p)
    path = _target(staging, item.name, ".nxs")
    info = write_nxtomo(path, projections, poses, flat=arrays.get("flat"),
                        dark=arrays.get("dark"), signal="counts" if counts else "line integrals",
                        title=title, sample_name=source.names.get("phantom") or "phantom",
                        source_name=source.names.get("scanner") or "simbench",
                        start_time=_iso(source.written),
                        energy_kev=source.energy_kev if monochromatic else None,
                        frames_averaged=source.frames_averaged if counts else None,
                        notes=notes)
    return {"files": [path.relative_to(staging).as_posix()],
            "data": "counts" if counts else "line integrals", **info}


def _write_tiff(source, item, staging: Path, choice: Choice) -> dict:
    from simbench.export.tiff import write_tiff_stack

    files, layouts = [], {}
    if "image" in item.files:
        image = _image(source, item)
        grid = source.grid
        path = _target(staging, item.name, ".tif")
        info = write_tiff_stack(path, image, grid.spacing_mm,
                                description=f"simbench {item.role}: {item.title}")
        files.append(path.relative_to(staging).as_posix())
        layouts[files[-1]] = info
        return {"files": files, "layout": layouts,
                "units": "labels" if item.role == "truth labels" else "mu, 1/mm"}
    poses = source.poses()
    # projections: the detector pitch; the views are no length (a 2-D sinogram's rows, a
    # stack's pages), written with spacing 1
    spacing = (poses.pitch_u_mm, 1.0) if poses.dimension == 2 else \
        (poses.pitch_u_mm, poses.pitch_v_mm, 1.0)
    data = choice.data or "line-integrals"
    names = ("counts", "flat", "dark") if item.role == "measured" and data == "counts" else \
        ("projections",)
    _require_frames(source, item, len(names) == 3)
    for key in names:
        array = source.load(item.files[key])
        stem = item.name if item.role != "measured" else f"{item.name}/{key}"
        path = _target(staging, stem, ".tif")
        info = write_tiff_stack(path, array, spacing, description=f"simbench {item.role}: "
                                f"{key} {item.title}")
        files.append(path.relative_to(staging).as_posix())
        layouts[files[-1]] = info
    return {"files": files, "layout": layouts,
            "units": "counts" if names[0] == "counts" else "line integrals, dimensionless"}


def _write_dicom(source, item, staging: Path, choice: Choice) -> dict:
    from simbench.export.dicom import SeriesIdentity, synthetic_uid, write_dicom_series

    image = _image(source, item)
    digest = source.digest
    step = 1.0 if choice.hu_step is None else float(choice.hu_step)
    sha = source.sha256(item.files["image"])
    # one study (one phantom) per run, scan or reconstruction, one per sample of a dataset
    patient = digest if item.sample is None else f"{digest}:{item.sample}"
    study = synthetic_uid("simbench export", "study", patient)
    number = 1 + [i.name for i in source.items if "image" in i.files and
                  i.role != "truth labels"].index(item.name)
    date, clock = _dicom_datetime(source.written)
    names = source.names
    description = ("truth" if item.role == "truth image" else item.title)
    identity = SeriesIdentity(
        study_uid=study,
        series_uid=synthetic_uid("simbench export", "series", digest, item.name, sha,
                                 repr(step), str(choice.hu_step is not None)),
        frame_of_reference_uid=synthetic_uid("simbench export", "frame of reference", patient),
        patient_id=f"SIMBENCH-{digest[:12]}" + ("" if item.sample is None
                                                else f"-{item.sample}"),
        series_number=number,
        series_description=_text(description),
        study_description=_text(" ".join(p for p in (names.get("scenario"), names.get("phantom"))
                                         if p) or f"simbench {source.kind}"),
        date=date, time=clock, manufacturer_model=_text(names.get("scanner", "")),
        kernel=_text(item.algorithm))
    folder = _target(staging, item.name)
    folder.mkdir(exist_ok=True)
    sid = sdd = None
    if source.kind in ("run", "dataset"):
        try:
            from simbench.export.nxtomo import geometry_numbers

            numbers = geometry_numbers(source.poses())
            sid, sdd = numbers["sid_mm"], numbers["sdd_mm"]
        except InputError:
            pass  # distances are optional (DICOM type 3)
    info = write_dicom_series(folder, image, source.grid, mu_water=source.mu_water,
                              mu_air=source.mu_air, identity=identity, hu_step=step,
                              step_given=choice.hu_step is not None, sid_mm=sid, sdd_mm=sdd)
    rel = folder.relative_to(staging).as_posix()
    return {"files": [f"{rel}/{name}" for name in info["files"]],
            "rescale_slope": info["rescale_slope"],
            "rescale_intercept": info["rescale_intercept"],
            "hu_range_of_float_image": [round(v, 3) for v in info["hu_range"]],
            "study_instance_uid": identity.study_uid,
            "series_instance_uid": identity.series_uid,
            "frame_of_reference_uid": identity.frame_of_reference_uid,
            "series_number": number}


def _require_frames(source, item, counts: bool) -> None:
    """Refuse raw counts for an item that lacks its counts, flat or dark array."""
    missing = [k for k in ("counts", "flat", "dark") if counts and k not in item.files]
    if missing:
        raise InputError(_cli("--data"), f"{item.title} of this {source.kind} has no "
                         f"{', '.join(missing)}", "--data line-integrals")


_WRITERS = {"nxtomo": _write_nxtomo, "tiff": _write_tiff, "dicom": _write_dicom}


def _image(source, item) -> np.ndarray:
    image = source.load(item.files["image"])
    if tuple(image.shape) != tuple(source.grid.image_shape):
        raise InputError(Where(str(source.folder / item.files["image"])),
                         f"shape {tuple(image.shape)} does not match the grid "
                         f"{tuple(source.grid.image_shape)}", f"a complete {source.kind} folder")
    return image


def _text(value: str) -> str:
    """Text fit for a DICOM string: no backslash (the value separator) or control characters."""
    return "".join(" " if ch == "\\" or ord(ch) < 32 else ch for ch in str(value)).strip()


def _dicom_datetime(written: str) -> tuple[str, str]:
    """``(YYYYMMDD, HHMMSS)`` from an ISO 8601 time, or empty strings."""
    from datetime import datetime

    try:
        moment = datetime.strptime(written, "%Y-%m-%dT%H:%M:%S%z")
    except ValueError:
        return "", ""
    return moment.strftime("%Y%m%d"), moment.strftime("%H%M%S")


def _iso(written: str) -> str | None:
    """``2026-12-02T06:52:59+00:00`` from the marker's ``...+0000`` form, or None."""
    from datetime import datetime

    try:
        return datetime.strptime(written, "%Y-%m-%dT%H:%M:%S%z").isoformat()
    except ValueError:
        return None


def _format_record(source, fmt: str) -> dict:
    out: dict = {"reference_energy_kev": source.energy_kev}
    if fmt == "dicom":
        out["hu"] = {"definition": "HU = 1000 (mu - mu_water) / (mu_water - mu_air)",
                     "mu_water_per_mm": source.mu_water, "mu_air_per_mm": source.mu_air,
                     "stored": "HU = RescaleSlope * stored + RescaleIntercept"}
        out["patient_frame"] = "DICOM patient coordinates = simbench world frame (mm)"
    if source.grid is not None and fmt != "nxtomo":
        g = source.grid
        out["grid"] = {"shape": list(g.shape), "spacing_mm": list(g.spacing_mm),
                       "centre_mm": list(g.centre_mm), "dimension": g.dimension}
    return out


def _readme(source, fmt: str, record: dict) -> str:
    lines = [f"simbench export ({fmt}) of the {source.kind} folder {source.folder}", "",
             simbench.CAUTION, ""]
    guide = {
        "nxtomo": "Each .nxs file is a NeXus HDF5 file with one NXtomo entry (/entry): "
                  "data (frame, row, column) with image_key (0 projection, 1 flat, 2 dark), "
                  "rotation_angle in degrees, distances and pixel sizes in mm. NXtomo "
                  "describes parallel-beam rotation; fan- and cone-beam files carry the exact "
                  "geometry in /entry/instrument/geometry.",
        "tiff": "Each .tif file is a stack whose pages are the array's slices (images: z; "
                "projections: views) with the exact stored values: mu in 1/mm for images, "
                "line integrals or counts for projections, ROI numbers for labels. Pixel "
                "spacing is in the resolution tags (and the ImageJ description, unit mm).",
        "dicom": "Each folder is one DICOM CT series, one file per slice in increasing z. "
                 "HU = RescaleSlope * stored + RescaleIntercept; patient coordinates are "
                 "simbench's world frame (mm). Identifiers are synthetic.",
    }[fmt]
    lines += [guide, "", "Contents:"]
    for entry in record["items"]:
        shown = entry["files"] if len(entry["files"]) <= 3 else \
            [entry["files"][0], "...", entry["files"][-1]]
        lines.append(f"  {entry['role']}: {entry['name']} -> {', '.join(shown)}")
    lines += ["", "export.json lists every file with the SHA-256 of the array it came from. "
              "The fields, units and axis mappings are described in simbench's docs/export.md.",
              ""]
    return "\n".join(lines)
