"""Scenario files: one YAML file describing a whole experiment.

A scenario names a phantom and a scanner (shipped name, path relative to the scenario file, or
written inline), the reconstruction grid, the reference energy of the truth, the algorithms to
score with their options, the dose levels, the number of noise realizations, the root seed, the
metrics and the ROIs they use, and optionally tolerances for regression checks. Every error
names the scenario file, line, column and field, like every other input.

Keys (docs/scenarios.md has the full description)::

    name: quickstart                      # required; part of every random stream's identity
    description: ...                      # optional text
    phantom: water-ellipse-inserts        # shipped name, path, or an inline phantom mapping
    scanner: fan-clinical                 # shipped name, path, or an inline scanner mapping
    grid:                                 # optional; default covers the field of view
      size: 256                           # pixels across (or [nx, ny] / [nx, ny, nz])
      voxel_size: 1.5 mm                  # (or [dx, dy, dz])
      centre: [0, 0]                      # mm
    reference_energy: effective           # 'effective' (default): effective energy of the
                                          # detected spectrum in water; or an energy (keV)
    seed: 2026                            # root seed, 0 to 2^63 - 1 (default 0)
    realizations: 4                       # noise realizations per dose (1 to 1000)
    doses: [1.0, 0.25]                    # factors on the scanner's exposure (default [1])
    algorithms:                           # at least one
      - name: fbp                         # the label in results; unique
        use: fbp                          # the reconstructor (default: name); a module or file
                                          # path needs --allow-code
        options: {filter: hann}
      - name: my-c-code
        command: ./my_fbp {exchange}      # an external program (needs --allow-code)
        stage: projections
        time_limit: 600 s
    metrics: [rmse, ssim, rois, ttf, nps] # default: every metric the phantom allows
    rois:
      background: water body              # the ROI that CNR is measured against
      edge: bone insert                   # the insert whose edge gives the TTF
      noise: [centre]                     # ROIs whose noise power spectrum is measured
    detectability_task:                   # optional; default: the edge insert's own disc
      diameter: 5 mm                      # the disc to detect (0.1 to 500 mm)
      contrast: 10 HU                     # its contrast against the background (0.1 to 1e5 HU)
    tolerances:                           # optional, for 'simbench check'
      rmse: 5 %                           # relative, or an absolute value in the metric's unit
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from simbench.errors import InputError, Where
from simbench.spec import Section, load_yaml

TOP_KEYS = ("name", "description", "phantom", "scanner", "grid", "reference_energy", "seed",
            "realizations", "doses", "algorithms", "metrics", "rois", "detectability_task",
            "tolerances")
TASK_KEYS = ("diameter", "contrast")
#: the range of a detectability task's disc diameter (mm) and contrast (HU)
TASK_DIAMETER_MM = (0.1, 500.0)
TASK_CONTRAST_HU = (0.1, 1e5)
ALGORITHM_KEYS = ("name", "use", "options", "command", "stage", "time_limit")
GRID_KEYS = ("size", "voxel_size", "centre")
ROI_KEYS = ("background", "edge", "noise", "centre", "periphery")

#: the most realizations and dose levels a scenario may ask for
MAX_REALIZATIONS = 1000
MAX_DOSES = 50
#: dose factors allowed (a factor on the scanner's exposure)
DOSE_RANGE = (1e-4, 1e4)
MAX_SEED = 2**63 - 1

#: every metric a scenario may ask for, by the name used in files and results
METRICS = ("rmse", "nrmse", "mae", "psnr", "ssim", "rois", "uniformity", "ttf", "nps",
           "detectability", "streaks", "projection_error", "time")


@dataclass(frozen=True)
class AlgorithmSpec:
    """One algorithm of a scenario, as written (checked against the registry when run)."""

    name: str
    use: str | None
    options: dict
    command: str | None
    stage: str
    time_limit_s: float
    where: Where


@dataclass(frozen=True)
class Scenario:
    """A parsed, validated scenario file.

    Attributes
    ----------
    name, description : str
    phantom, scanner : Phantom, Scanner
        Loaded and validated.
    phantom_ref, scanner_ref : str
        As written (a name or path; ``inline`` for an inline mapping).
    grid : dict
        ``size``, ``voxel_size``, ``centre`` as written (None where absent).
    reference_energy_kev : float or None
        None: the effective energy in water of the detected spectrum.
    seed, realizations : int
    doses : tuple of float
    algorithms : tuple of AlgorithmSpec
    metrics : tuple of str
    rois : dict
    tolerances : dict
        metric name -> (value, relative?)
    source : str
    detectability_task : tuple or None
        (disc diameter in mm, contrast in HU) of the d' task; None: the edge insert's disc
        and its measured contrast.
    """

    name: str
    description: str
    phantom: Any
    scanner: Any
    phantom_ref: str
    scanner_ref: str
    grid: dict
    reference_energy_kev: float | None
    seed: int
    realizations: int
    doses: tuple
    algorithms: tuple
    metrics: tuple
    rois: dict
    tolerances: dict
    source: str
    wheres: dict = field(default_factory=dict, compare=False, repr=False)
    detectability_task: tuple | None = None


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario file (and the phantom and scanner it names).

    Raises
    ------
    InputError
        One line naming the file, line, column and field of the first problem.
    """
    path = Path(path)
    return read_scenario(load_yaml(path, "scenario file"), str(path), path.parent)


def read_header(document: Any, source: str, what: str, keys: tuple, required: tuple
                ) -> tuple[Section, str, str]:
    """The top level of a scenario or dataset spec: its keys checked, its name and description.

    Returns
    -------
    (Section, str, str)
        The top-level section, the name (1 to 200 characters) and the description ("" if
        absent).
    """
    if document is None:
        raise InputError(Where(source, 1, 1), f"the {what} is empty",
                         "a mapping with " + ", ".join(required[:-1]) + f" and {required[-1]}")
    top = Section.root(document, source)
    top.check_keys(keys, required=required)
    name = top.string("name")
    if not name.strip() or len(name) > 200:
        raise top.error("name", "the name must be 1 to 200 characters", "a short name")
    return top, name, top.string("description", "")


def read_scenario(document: Any, source: str, directory: Path) -> Scenario:
    """Turn a located YAML document into a :class:`Scenario`."""
    top, name, description = read_header(document, source, "scenario file", TOP_KEYS,
                                         ("name", "phantom", "scanner", "algorithms"))
    phantom, phantom_ref = _phantom(top, directory)
    scanner, scanner_ref = read_scanner(top, directory)
    check_dimensions(top, phantom, scanner)
    realizations = top.integer("realizations", 1, minimum=1, maximum=MAX_REALIZATIONS)
    seed = top.integer("seed", 0, minimum=0, maximum=MAX_SEED)
    doses = read_doses(top)
    reference = read_reference_energy(top)
    algorithms = _algorithms(top)
    metrics = _metrics(top)
    rois = _rois(top, phantom)
    tolerances = _tolerances(top, metrics)
    task = _task(top)
    grid = read_grid(top, scanner)
    wheres = {key: top.at(key) for key in TOP_KEYS}
    return Scenario(name, description, phantom, scanner, phantom_ref, scanner_ref, grid,
                    reference, seed, realizations, doses, algorithms, metrics, rois, tolerances,
                    source, wheres, task)


# ------------------------------------------------------------------------------------------
# Parts
# ------------------------------------------------------------------------------------------


def resolve_file(value: str, kind: str, directory: Path) -> Path:
    """A shipped name or a path (relative to ``directory``) of a phantom or scanner file."""
    from simbench.data import shipped_files

    path = Path(value)
    if not path.is_absolute():
        candidate = directory / path
        if candidate.exists():
            return candidate
    if path.exists():
        return path
    stem = path.name[:-5] if path.name.endswith(".yaml") else path.name
    files = shipped_files(kind)
    if path.parent == Path(".") and stem in files:
        return files[stem]
    return directory / path if not path.is_absolute() else path


def _phantom(top: Section, directory: Path):
    from simbench.phantom import load_phantom
    from simbench.phantom.language import read_document

    value = top.raw("phantom")
    if isinstance(value, dict):
        return read_document(value, top.where.source, directory), "inline"
    if not isinstance(value, str) or not value.strip():
        raise top.error("phantom", "expected a phantom name, path or mapping",
                        "a shipped phantom name (simbench list), a file path, or the phantom "
                        "written inline")
    path = resolve_file(value, "phantoms", directory)
    if not path.exists():
        raise top.error("phantom", f"no phantom '{value}' (not a shipped name, and no file "
                        f"'{path}')", "a shipped phantom name (simbench list) or a file path")
    return load_phantom(path), value


def read_scanner(top: Section, directory: Path):
    """The ``scanner`` key: a shipped name, a path or the file inline; (Scanner, reference)."""
    from simbench.scanner import _read, load_scanner

    value = top.raw("scanner")
    if isinstance(value, dict):
        scanner = _read(value, top.where.source)
    elif isinstance(value, str) and value.strip():
        path = resolve_file(value, "scanners", directory)
        if not path.exists():
            raise top.error("scanner", f"no scanner '{value}' (not a shipped name, and no file "
                            f"'{path}')", "a shipped scanner name (simbench list) or a file path")
        scanner = load_scanner(path)
    else:
        raise top.error("scanner", "expected a scanner name, path or mapping",
                        "a shipped scanner name (simbench list), a file path, or the scanner "
                        "written inline")
    if scanner.physics is None:
        raise top.error("scanner", f"the scanner '{scanner.name}' has no source section, so it "
                        "cannot scan", "a scanner with source and exposure sections")
    return scanner, (value if isinstance(value, str) else "inline")


def check_dimensions(top: Section, phantom, scanner) -> None:
    """Refuse a 2-D phantom with a 3-D scanner and the other way round."""
    if phantom.dimension == 3 and scanner.geometry.dimension == 2:
        raise top.error("scanner", f"a 2-D scanner cannot scan the 3-D phantom '{phantom.name}'",
                        "a scanner with rows (cone, helical, stacked parallel)")


def read_doses(top: Section) -> tuple:
    """The ``doses`` key: factors on the scanner's exposure (default ``(1.0,)``)."""
    if not top.has("doses"):
        return (1.0,)
    items = top.sequence("doses")
    if not items or len(items) > MAX_DOSES:
        raise top.error("doses", f"expected 1 to {MAX_DOSES} dose factors",
                        "a list such as [1.0, 0.25]")
    from simbench.spec import check_number

    lo, hi = DOSE_RANGE
    values = tuple(check_number(item, where, minimum=lo, maximum=hi) for item, where in items)
    if len(set(values)) != len(values):
        raise top.error("doses", "a dose factor is listed twice", "distinct factors")
    return values


def read_reference_energy(top: Section) -> float | None:
    """The ``reference_energy`` key in keV, or None for the effective energy."""
    value = top.raw("reference_energy", "effective")
    if value == "effective":
        return None
    from simbench.materials.attenuation import VALID_ENERGY_RANGE_KEV

    energy = top.energy("reference_energy")
    lo, hi = VALID_ENERGY_RANGE_KEV
    if not lo <= energy <= hi:
        raise top.error("reference_energy", f"{energy:g} keV is outside the attenuation tables",
                        f"'effective', or an energy from {lo:g} to {hi:g} keV")
    return energy


def _algorithms(top: Section) -> tuple:
    items = top.sequence("algorithms")
    if not items:
        raise top.error("algorithms", "no algorithms", "a list of at least one algorithm")
    out, names = [], set()
    for item, where in items:
        s = Section(item, where)
        s.check_keys(ALGORITHM_KEYS, required=("name",))
        name = s.string("name")
        if not name.strip() or "/" in name or name.startswith(".") or len(name) > 100:
            raise s.error("name", f"'{name}' cannot name a results folder",
                          "1 to 100 characters, no '/', not starting with '.'")
        if name in names:
            raise s.error("name", f"the algorithm name '{name}' is used twice", "unique names")
        names.add(name)
        if s.has("use") and s.has("command"):
            raise s.error("command", "give 'use' or 'command', not both",
                          "use: a reconstructor name, or command: a program")
        options = {}
        if s.has("options"):
            section = s.section("options")
            for key in section.keys():
                value = section.raw(key)
                if isinstance(value, (dict, list)) or value is None:
                    raise section.error(key, "an option value must be a plain value",
                                        "a number, text, or true/false")
                options[str(key)] = value
        stage = s.string("stage", "projections", choices=("projections", "counts"))
        limit = 3600.0
        if s.has("time_limit"):
            from simbench.spec import check_number

            limit = check_number(s.raw("time_limit"), s.at("time_limit"), minimum=0.1,
                                 maximum=7 * 86400.0, unit="s")
        command = s.string("command") if s.has("command") else None
        out.append(AlgorithmSpec(name, s.string("use") if s.has("use") else None, options,
                                 command, stage, limit, where))
    return tuple(out)


def _metrics(top: Section) -> tuple:
    if not top.has("metrics"):
        return METRICS
    items = top.sequence("metrics")
    names = []
    for item, where in items:
        if item not in METRICS:
            raise InputError(where, f"unknown metric {item!r}", "one of " + ", ".join(METRICS))
        names.append(item)
    if not names:
        raise top.error("metrics", "no metrics", "one or more of " + ", ".join(METRICS))
    return tuple(dict.fromkeys(names))


def _rois(top: Section, phantom) -> dict:
    known = list(getattr(phantom, "roi_names", ()))
    out: dict = {}
    if not top.has("rois"):
        return out
    s = top.section("rois")
    s.check_keys(ROI_KEYS)
    for key in s.keys():
        value = s.raw(key)
        names = value if isinstance(value, list) else [value]
        for name in names:
            if name not in known:
                raise s.error(key, f"the phantom '{phantom.name}' has no ROI {name!r}",
                              ("one of " + ", ".join(repr(k) for k in known)) if known else
                              "a phantom with objects flagged 'roi: true'")
        out[key] = list(names) if isinstance(value, list) else value
    return out


def _task(top: Section) -> tuple | None:
    if not top.has("detectability_task"):
        return None
    s = top.section("detectability_task")
    s.check_keys(TASK_KEYS, required=TASK_KEYS)
    diameter = s.length("diameter", positive=True)
    low, high = TASK_DIAMETER_MM
    if not low <= diameter <= high:
        raise s.error("diameter", f"{diameter:g} mm is out of range", f"{low:g} to {high:g} mm")
    value = s.raw("contrast")
    text = str(value).strip()
    number = text[:-2].strip() if text.upper().endswith("HU") else text
    try:
        contrast = abs(float(number))
    except ValueError:
        contrast = math.nan
    low, high = TASK_CONTRAST_HU
    if not low <= contrast <= high:  # NaN fails too
        raise s.error("contrast", f"'{value}' is not a contrast in HU",
                      f"{low:g} to {high:g} HU (its sign does not matter), e.g. '10 HU'")
    return diameter, contrast


def _tolerances(top: Section, metrics: tuple) -> dict:
    out: dict = {}
    if not top.has("tolerances"):
        return out
    from simbench.scenario.scoring import METRIC_INFO

    s = top.section("tolerances")
    for key in s.keys():
        if key not in METRIC_INFO:
            raise s.error(key, f"unknown metric {key!r}", "one of " + ", ".join(METRIC_INFO))
        value = s.raw(key)
        text = str(value).strip()
        relative = text.endswith("%")
        number_text = text[:-1].strip() if relative else text
        try:
            number = float(number_text)
        except ValueError:
            number = math.nan
        if not math.isfinite(number) or number < 0 or (relative and number > 1000):
            raise s.error(key, f"'{value}' is not a tolerance",
                          "a non-negative number in the metric's unit, or a percentage such as "
                          "'5 %'")
        out[str(key)] = (number / 100.0 if relative else number, relative)
    return out


def read_grid(top: Section, scanner) -> dict:
    """The ``grid`` key, as the text options that ``grid_from_options`` reads."""
    out = {"size": None, "voxel_size": None, "centre": None}
    if not top.has("grid"):
        return out
    s = top.section("grid")
    s.check_keys(GRID_KEYS)
    dimension = scanner.geometry.dimension
    if s.has("size"):
        value = s.raw("size")
        values = value if isinstance(value, list) else [value]
        if len(values) not in ((1, 2) if dimension == 2 else (1, 2, 3)):
            raise s.error("size", f"expected 1 to {dimension} sizes", "a number of pixels, or "
                          "[nx, ny]" + (", [nx, ny, nz]" if dimension == 3 else ""))
        from simbench.spec import check_integer

        out["size"] = ",".join(str(check_integer(v, s.at("size"), minimum=8, maximum=4096))
                               for v in values)
    if s.has("voxel_size"):
        value = s.raw("voxel_size")
        values = value if isinstance(value, list) else [value]
        from simbench.spec import parse_length

        mm = [parse_length(v, s.at("voxel_size"), positive=True) for v in values]
        if any(not 1e-3 <= v <= 100.0 for v in mm) or len(mm) not in (1, 3):
            raise s.error("voxel_size", f"'{value}' is not a voxel size",
                          "one length from 0.001 to 100 mm, or [dx, dy, dz]")
        out["voxel_size"] = ",".join(repr(v) for v in mm)
    if s.has("centre"):
        centre = s.lengths("centre", 2 if dimension == 2 else 3)
        if any(abs(v) > 1e4 for v in centre):
            raise s.error("centre", "the grid centre is more than 10 m away", "a centre in mm")
        out["centre"] = ",".join(repr(v) for v in centre)
    return out
