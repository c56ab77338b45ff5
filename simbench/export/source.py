"""What can be exported from a folder: run, scan, reconstruction and dataset folders.

:func:`open_source` reads a folder written by ``simbench run``, ``simbench scan``,
``simbench reconstruct`` or ``simbench generate``, refuses it in one line unless it is complete
(its marker is valid and every file present at its recorded size,
:func:`simbench.folders.verify_folder`; a dataset through :mod:`simbench.datasets`), and lists
the arrays it holds as :class:`Item` s. Every array is read through :meth:`Source.load`, which
compares its SHA-256 with the folder's marker (a dataset's manifest) first, so a damaged array
is never exported.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from simbench.errors import InputError, Where

#: the folder kinds that can be exported (besides datasets, which have their own record)
KINDS = ("run", "scan", "reconstruction")
#: how a dataset array is named in :attr:`Item.files`: ``dataset:<sample>:<key>``
DATASET_PREFIX = "dataset:"


@dataclass(frozen=True)
class Item:
    """One exportable thing: an image, or a set of projections with its frames.

    Attributes
    ----------
    role : str
        ``"truth image"``, ``"truth labels"``, ``"truth line integrals"``,
        ``"reconstruction"`` or ``"measured"``.
    name : str
        Its path in the export folder without suffix, e.g. ``recon/fbp/dose-1/realization-0``.
    files : dict
        ``{array name: path relative to the source folder}``: ``image`` for images;
        ``projections`` and, where kept, ``counts``, ``flat``, ``dark`` for measurements.
    algorithm, dose : str
        The algorithm's name and the dose label (``dose-1``), or "".
    realization : int or None
    sample : int or None
        The sample's index in a dataset.
    """

    role: str
    name: str
    files: dict
    algorithm: str = ""
    dose: str = ""
    realization: int | None = None
    sample: int | None = None

    @property
    def title(self) -> str:
        """A short human description, e.g. ``fbp, dose-1, realization 0``."""
        parts = [] if self.sample is None else [f"sample {self.sample}"]
        parts.append(self.algorithm or self.role)
        if self.dose:
            parts.append(self.dose)
        if self.realization is not None:
            parts.append(f"realization {self.realization}")
        return ", ".join(parts)


@dataclass
class Source:
    """A checked folder and everything in it that can be exported.

    Attributes
    ----------
    folder : Path
    kind : str
        ``run``, ``scan`` or ``reconstruction``.
    marker : dict
        The folder's ``complete.json``.
    items : list of Item
        Everything exportable, in a fixed order (truth first, then algorithms, doses and
        realizations as the folder lists them).
    grid : ImageGrid or None
        Where the image voxels sit (runs and reconstructions).
    energy_kev, mu_water, mu_air : float or None
        Reference energy and the attenuation of water and air there (1/mm).
    doses : dict
        ``{label: dose factor}``.
    realizations : int
    algorithms : list of str
    names : dict
        ``scenario``, ``phantom``, ``scanner`` (may be empty).
    counts_kept : bool
        The measured folders hold raw counts with flat and dark frames.
    samples : int
        Number of samples (datasets; 0 otherwise).
    dataset : Dataset or None
        The open dataset (:func:`simbench.datasets.open_dataset`).
    """

    folder: Path
    kind: str
    marker: dict
    items: list = field(default_factory=list)
    grid: object = None
    energy_kev: float | None = None
    mu_water: float | None = None
    mu_air: float | None = None
    doses: dict = field(default_factory=dict)
    realizations: int = 0
    algorithms: list = field(default_factory=list)
    names: dict = field(default_factory=dict)
    counts_kept: bool = False
    frames_averaged: dict = field(default_factory=dict)
    samples: int = 0
    dataset: object = None
    _poses: object = None
    _geometry_reader: object = None

    @property
    def digest(self) -> str:
        """SHA-256 of the folder's file list with every file's SHA-256: the folder's identity
        (the same data gives the same digest, whenever and wherever it was written)."""
        if self.dataset is not None:  # the manifest holds every array's SHA-256
            from simbench.execute.dataset import MANIFEST

            return hashlib.sha256((self.folder / MANIFEST).read_bytes()).hexdigest()
        text = json.dumps(self.marker.get("files", {}), sort_keys=True)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    @property
    def written(self) -> str:
        """When the folder was committed (ISO 8601, from its marker), or ""."""
        return str(self.marker.get("written") or "")

    def sha256(self, rel: str) -> str:
        """The SHA-256 of a file (of a dataset array) as the marker (manifest) records it."""
        if rel.startswith(DATASET_PREFIX):
            index, key = _dataset_ref(rel)
            return str(self.dataset.sample_info(index)["arrays"][key]["sha256"])
        return str(self.marker["files"][rel]["sha256"])

    def size(self, rel: str) -> int:
        """Bytes of a file (of a dataset array, uncompressed)."""
        if rel.startswith(DATASET_PREFIX):
            index, key = _dataset_ref(rel)
            entry = self.dataset.sample_info(index)["arrays"][key]
            return int(np.dtype(entry["dtype"]).itemsize * np.prod(entry["shape"]))
        return int(self.marker["files"][rel]["bytes"])

    def poses(self):
        """The scan geometry (:class:`~simbench.geometry.poses.Poses`), read on first use."""
        if self._poses is None:
            self._poses = self._geometry_reader()
        return self._poses

    def load(self, rel: str) -> np.ndarray:
        """An array of the folder, memory-mapped, after its SHA-256 matches the marker.

        Raises
        ------
        InputError
            The file differs from the marker, is not a readable ``.npy`` array, or holds NaN
            or inf.
        """
        from simbench.folders import file_sha256

        if rel.startswith(DATASET_PREFIX):
            index, key = _dataset_ref(rel)
            array = self.dataset.get(index, [key])[key]  # compared with the manifest
            _check_finite(array, Where(str(self.folder), field=f"sample {index}: {key}"))
            return array
        path = self.folder / rel
        if rel not in self.marker.get("files", {}):
            raise InputError(Where(str(path)), "not listed in the folder's complete.json",
                             f"a complete {self.kind} folder; write it again")
        if file_sha256(path) != self.sha256(rel):
            raise InputError(Where(str(path)), "SHA-256 differs from complete.json (altered or "
                             "damaged)", f"a complete {self.kind} folder; write it again")
        try:
            array = np.load(path, mmap_mode="r", allow_pickle=False)
        except (OSError, ValueError) as exc:
            raise InputError(Where(str(path)), f"not a readable array: {exc}".splitlines()[0],
                             f"a complete {self.kind} folder; write it again") from None
        _check_finite(array, Where(str(path)))
        return array


def _check_finite(array: np.ndarray, where: Where) -> None:
    """Refuse an array holding NaN or inf (read in blocks: it may be a memory map)."""
    if array.dtype.kind != "f":
        return
    if array.ndim == 0:
        array = array.reshape(1)
    step = max(1, (16 * 2**20) // max(1, array[:1].nbytes))
    for i in range(0, array.shape[0], step):
        if not np.isfinite(array[i:i + step]).all():
            raise InputError(where, "holds NaN or inf values", "finite values; write the "
                             "folder again")


def _dataset_ref(rel: str) -> tuple[int, str]:
    index, key = rel[len(DATASET_PREFIX):].split(":", 1)
    return int(index), key


# ------------------------------------------------------------------------------------------
# Opening folders
# ------------------------------------------------------------------------------------------


def open_source(folder: str | Path) -> Source:
    """Read and check a run, scan or reconstruction folder for export.

    Parameters
    ----------
    folder : str or Path

    Returns
    -------
    Source

    Raises
    ------
    InputError
        Not a folder simbench wrote, incomplete or altered, of a kind that cannot be exported,
        or with a record that does not describe its arrays.
    """
    from simbench.folders import MARKER, verify_folder

    folder = Path(folder)
    where = Where(str(folder))
    valid = "a run, scan, reconstruction or dataset folder written by simbench"
    if not folder.is_dir():
        raise InputError(where, "no such folder" if not folder.exists() else "not a folder",
                         valid)
    from simbench.execute.dataset import MANIFEST

    if (folder / MANIFEST).exists():
        return _read_dataset(folder)
    try:
        kind = json.loads((folder / MARKER).read_text(encoding="utf-8")).get("kind")
    except FileNotFoundError:
        raise InputError(where, f"not a complete simbench folder ({MARKER} is missing: an "
                         "interrupted run, or a folder simbench did not write)", valid) from None
    except (OSError, ValueError, AttributeError):
        raise InputError(Where(str(folder / MARKER)), "not a simbench marker", valid) from None
    if kind not in KINDS:
        raise InputError(where, f"this is a folder of kind '{kind}', which cannot be exported",
                         valid)
    marker = verify_folder(folder, kind, checksums=False)  # sizes now, checksums per array read
    source = Source(folder, kind, marker)
    {"run": _read_run, "scan": _read_scan, "reconstruction": _read_reconstruction}[kind](source)
    return source


def _read_dataset(folder: Path) -> Source:
    """A dataset written by ``simbench generate``, through its loader (every array read is
    compared with its SHA-256 in the manifest)."""
    from simbench.datasets import open_dataset
    from simbench.geometry.poses import Poses

    dataset = open_dataset(folder, verify=True)
    source = Source(folder, "dataset", {}, dataset=dataset, samples=len(dataset))
    shared = dataset.shared
    path = folder / "dataset.json"
    source.grid = _grid(shared, path, "grid")
    source.energy_kev = _positive(shared, path, "reference_energy_kev")
    source.mu_water = _positive(shared, path, "hu_scale", "mu_water_per_mm")
    source.mu_air = _positive(shared, path, "hu_scale", "mu_air_per_mm")
    source.doses = {f"dose-{float(d):g}": float(d) for d in shared.get("doses", [])}
    try:
        source._poses = Poses.from_record(shared["geometry"])
    except (KeyError, TypeError, ValueError):
        raise InputError(Where(str(path), field="geometry"), "not a valid geometry record",
                         "a dataset written by this version of simbench") from None
    reconstruction = (dataset.record.get("spec") or {}).get("reconstruction") or {}
    algorithm = str(reconstruction.get("use") or "reconstruction")
    source.algorithms = [algorithm] if any(k.startswith("reconstruction/")
                                           for k in dataset.keys) else []
    source.names = {"scenario": str(shared.get("dataset", "")), "phantom": "",
                    "scanner": str(shared.get("scanner", ""))}
    source.counts_kept = all(any(k.startswith(f"{n}/") for k in dataset.keys)
                             for n in ("counts", "flat", "dark"))
    truth = (("truth image", "truth/image", "image", "truth_image"),
             ("truth labels", "truth/labels", "image", "labels"),
             ("truth line integrals", "truth/line_integrals", "projections", "line_integrals"))
    items = []
    for i in range(len(dataset)):
        keys = dataset.sample_info(i)["arrays"]
        ref = f"{DATASET_PREFIX}{i}:"
        top = f"sample-{i:05d}/"
        for role, name, kind, key in truth:
            if key in keys:
                items.append(Item(role, top + name, {kind: ref + key}, sample=i))
        for dose in source.doses:
            if f"reconstruction/{dose}" in keys:
                items.append(Item("reconstruction", f"{top}recon/{algorithm}/{dose}",
                                  {"image": f"{ref}reconstruction/{dose}"}, algorithm, dose,
                                  sample=i))
        for dose in source.doses:
            arrays = {n: f"{ref}{n}/{dose}" for n in ("projections", "counts", "flat", "dark")
                      if f"{n}/{dose}" in keys}
            if "projections" in arrays:
                items.append(Item("measured", f"{top}measured/{dose}", arrays, "", dose,
                                  sample=i))
    source.items = items
    return source


def _record(source: Source, name: str) -> dict:
    path = source.folder / name
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(Where(str(path)), f"unreadable: {exc}".splitlines()[0],
                         f"a complete {source.kind} folder; write it again") from None
    if not isinstance(record, dict):
        raise InputError(Where(str(path)), "not a JSON object", f"a complete {source.kind} folder")
    return record


def _field(record: dict, path: Path, *keys, kind=None):
    """``record[k1][k2]...`` or a one-line error naming the field."""
    value = record
    for key in keys:
        if not isinstance(value, dict) or key not in value:
            raise InputError(Where(str(path), field=".".join(keys)), "missing",
                             "a complete folder written by this version of simbench")
        value = value[key]
    if kind is not None and not isinstance(value, kind):
        raise InputError(Where(str(path), field=".".join(keys)), f"unexpected value {value!r}",
                         "a complete folder written by this version of simbench")
    return value


def _grid(record: dict, path: Path, *keys):
    from simbench.geometry.grid import ImageGrid

    g = _field(record, path, *keys, kind=dict)
    try:
        shape = tuple(int(v) for v in g["shape"])
        spacing = tuple(float(v) for v in g["spacing_mm"])
        centre = tuple(float(v) for v in g["centre_mm"])
        dimension = int(g["dimension"])
        ok = len(shape) == 3 and len(spacing) == 3 and len(centre) == 3 and \
            dimension in (2, 3) and min(shape) >= 1 and min(spacing) > 0 and \
            all(np.isfinite(spacing + centre)) and (dimension == 3 or shape[0] == 1)
    except (KeyError, TypeError, ValueError):
        ok = False
    if not ok:
        raise InputError(Where(str(path), field=".".join(keys)), "not a valid image grid",
                         "a complete folder written by this version of simbench")
    return ImageGrid(shape, spacing, centre, dimension)


def _positive(record: dict, path: Path, *keys) -> float:
    value = _field(record, path, *keys)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or \
            not np.isfinite(value) or value < 0:
        raise InputError(Where(str(path), field=".".join(keys)), f"unexpected value {value!r}",
                         "a complete folder written by this version of simbench")
    return float(value)


def _read_run(source: Source) -> None:
    folder = source.folder
    path = folder / "metrics.json"
    metrics = _record(source, "metrics.json")
    source.grid = _grid(metrics, path, "grid")
    source.energy_kev = _positive(metrics, path, "reference_energy_kev")
    source.mu_water = _positive(metrics, path, "hu_scale", "mu_water_per_mm")
    source.mu_air = _positive(metrics, path, "hu_scale", "mu_air_per_mm")
    if not source.mu_water > source.mu_air:
        raise InputError(Where(str(path), field="hu_scale"), "mu of water is not above mu of "
                         "air", "a complete folder written by this version of simbench")
    labels = _field(metrics, path, "doses", kind=list)
    factors = _field(metrics, path, "dose_factors", kind=list)
    source.doses = {str(a): float(b) for a, b in zip(labels, factors)}
    source.realizations = int(_positive(metrics, path, "realizations"))
    source.algorithms = sorted(_field(metrics, path, "algorithms", kind=dict))
    source.names = {"scenario": str(_field(metrics, path, "scenario", "name")),
                    "phantom": str(_field(metrics, path, "phantom", "name")),
                    "scanner": str(_field(metrics, path, "scanner", "name"))}
    files = source.marker["files"]
    first = f"measured/{labels[0]}/realization-0/measured/" if labels else ""
    source.counts_kept = all(f"{first}{n}.npy" in files for n in ("counts", "flat", "dark"))
    items = [Item("truth image", "truth/image", {"image": "truth/image.npy"}),
             Item("truth labels", "truth/labels", {"image": "truth/labels.npy"}),
             Item("truth line integrals", "truth/line_integrals",
                  {"projections": "truth/line_integrals.npy"})]
    for name in source.algorithms:
        for dose in source.doses:
            for r in range(source.realizations):
                items.append(Item("reconstruction", f"recon/{name}/{dose}/realization-{r}",
                                  {"image": f"recon/{name}/{dose}/realization-{r}.npy"},
                                  name, dose, r))
    for dose in source.doses:
        for r in range(source.realizations):
            base = f"measured/{dose}/realization-{r}/measured/"
            arrays = {"projections": base + "projections.npy"}
            if source.counts_kept:
                arrays.update({n: f"{base}{n}.npy" for n in ("counts", "flat", "dark")})
            items.append(Item("measured", f"measured/{dose}/realization-{r}", arrays, "",
                              dose, r))
    for item in items:
        for rel in item.files.values():
            if rel not in files:
                raise InputError(Where(str(folder / rel)), "missing from the run (not listed in "
                                 "complete.json)", "a complete run folder; run it again")
    source.items = items
    source._geometry_reader = lambda: _resolved_poses(folder)


def _resolved_poses(folder: Path):
    from simbench.geometry import parse_geometry
    from simbench.spec import Section, load_yaml

    path = folder / "scenario.resolved.yaml"
    document = load_yaml(path, "resolved scenario")
    section = Section.root(document, str(path))
    return parse_geometry(section.section("scanner_geometry")).poses()


def _read_scan(source: Source) -> None:
    from simbench.geometry.poses import Poses

    path = source.folder / "scan.json"
    record = _record(source, "scan.json")
    geometry = _field(record, path, "geometry", kind=dict)
    try:
        poses = Poses.from_record(geometry)
    except (KeyError, TypeError, ValueError):
        raise InputError(Where(str(path), field="geometry"), "not a valid geometry record",
                         "a complete scan folder written by this version of simbench") from None
    source._poses = poses
    truth = record.get("truth") if isinstance(record.get("truth"), dict) else {}
    energy = truth.get("reference_energy_kev")
    source.energy_kev = float(energy) if isinstance(energy, (int, float)) else None
    source.names = {"scenario": "", "phantom": str(record.get("phantom", {}).get("name", "")),
                    "scanner": str(record.get("scanner", {}).get("name", ""))}
    detector = record.get("physics", {}).get("detector", {}) \
        if isinstance(record.get("physics"), dict) else {}
    source.frames_averaged = {k: int(detector[f"{k}_frames"]) for k in ("flat", "dark")
                              if isinstance(detector.get(f"{k}_frames"), int)}
    files = source.marker["files"]
    source.counts_kept = all(f"measured/{n}.npy" in files for n in ("counts", "flat", "dark"))
    arrays = {"projections": "measured/projections.npy"}
    if source.counts_kept:
        arrays.update({n: f"measured/{n}.npy" for n in ("counts", "flat", "dark")})
    source.items = [Item("truth line integrals", "truth/line_integrals",
                         {"projections": "truth/line_integrals.npy"}),
                    Item("measured", "measured", arrays)]


def _read_reconstruction(source: Source) -> None:
    from simbench.materials import get_material, mu_table

    path = source.folder / "reconstruction.json"
    record = _record(source, "reconstruction.json")
    source.grid = _grid(record, path, "grid")
    source.energy_kev = _positive(record, path, "scan", "reference_energy_kev")
    water_air = mu_table([get_material("water"), get_material("air")], [source.energy_kev])
    source.mu_water, source.mu_air = (float(v) for v in water_air[:, 0])
    name = str(_field(record, path, "algorithm", "name"))
    source.algorithms = [name]
    source.names = {"scenario": "", "phantom": "", "scanner": ""}
    source.items = [Item("reconstruction", "image", {"image": "image.npy"}, name)]
