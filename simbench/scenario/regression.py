"""Comparing runs, baselines and regression checks.

Three commands read run folders (``simbench run``) and never change them:

``compare``
    One table across runs and algorithms: a row per run / algorithm / dose, a column per main
    metric, each cell the mean over the realizations with its 95 % interval. Printed, and
    written as CSV and markdown.
``baseline``
    A baseline file (YAML, :data:`FORMAT_VERSION`) from one run: per algorithm, dose and metric
    the mean, the interval, the standard deviation, the number of realizations ``n``, the
    direction in which the metric is better, and a tolerance the user may edit (the scenario's
    tolerances take precedence over :data:`DEFAULT_TOLERANCES`).
``check``
    A run against a baseline. A metric **regresses** only when the realizations show it: the
    whole 95 % interval of the change (Welch's interval for the difference of two means, the
    run's and the baseline's) lies beyond the tolerance on the bad side. Exit code 1 on a
    regression, 0 otherwise; JUnit XML (one testcase per algorithm / dose / metric) and a
    markdown summary.

The rule, for a metric whose mean is ``m`` in the run and ``b`` in the baseline, with sample
standard deviations ``s_m, s_b`` over ``n_m, n_b`` realizations and tolerance ``tau``::

    worsening  d = m - b          (lower is better)
                 = b - m          (higher is better)
                 = |m| - |b|      (closer to zero is better: signed biases, cupping)
    SE         = sqrt(s_m^2 / n_m + s_b^2 / n_b)      (a side with n = 1 adds nothing)
    nu         = Welch-Satterthwaite degrees of freedom
    regressed  when  d - t(0.975, nu) SE > tau
    improved   when  d + t(0.975, nu) SE < -tau

This is the one-sided Welch t-test of "worse by more than the tolerance" at the 2.5 % level,
stated as an interval: unchanged code false-alarms on one metric in at most 2.5 % of runs
when the tolerance is zero, and far less once the tolerance exceeds the standard error
(docs/ci.md has the numbers). A metric pooled over the realizations (the noise of the noise
power spectrum, the TTF of the mean image, d') carries a jackknife standard error over the
realizations (``std / sqrt(n)`` as for a mean) and is compared the same way; with fewer than
3 realizations it has none and is compared as a number, so its tolerance must exceed its
run-to-run spread.

References
----------
B. L. Welch, "The generalization of 'Student's' problem when several different population
variances are involved", Biometrika 34(1-2), 28-35 (1947).
"""

from __future__ import annotations

import csv
import io
import math
import time
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

import simbench
from simbench.errors import InputError, Where, warn_input

#: version of the baseline file's layout
FORMAT_VERSION = 1
#: confidence level of every interval (two-sided); each side of the check is at 2.5 %
LEVEL = 0.95
#: the tolerance text of a metric that is reported but never decides the outcome
NOT_CHECKED = "not checked"

#: default tolerance per metric: (value, relative?) or None for "not checked"; see docs/ci.md
DEFAULT_TOLERANCES: dict[str, tuple[float, bool] | None] = {
    "rmse": (0.05, True), "nrmse": (0.05, True), "mae": (0.05, True),
    "psnr": (0.5, False),              # dB; 0.5 dB is a 5.9 % change of the RMSE
    "ssim": (0.01, False),
    "mean_hu": None,                   # no better direction: reported only
    "bias_hu": (2.0, False), "uniformity_hu": (2.0, False),
    "cupping_percent": (0.2, False),   # percentage points; 2 HU of water is 0.2 %
    "std_hu": (0.05, True), "noise_std_hu": (0.05, True), "cnr": (0.05, True),
    "ttf_f50_per_mm": (0.05, True), "ttf_f10_per_mm": (0.05, True),
    "detectability": (0.05, True), "streak_index_hu": (0.05, True),
    "reprojection_rmse": (0.05, True),
    "wall_time_s": None, "peak_memory_mib": None,   # depend on the machine: reported only
}
#: the columns of the comparison table, in order (those present in at least one run)
MAIN_METRICS = ("rmse", "nrmse", "mae", "psnr", "ssim", "noise_std_hu", "ttf_f50_per_mm",
                "ttf_f10_per_mm", "detectability", "uniformity_hu", "cupping_percent",
                "streak_index_hu", "reprojection_rmse", "wall_time_s")
DIRECTIONS = ("lower", "higher", "zero", "none")

_ENTRY_KEYS = ("mean", "interval", "std", "n", "unit", "better", "tolerance")
_TOP_KEYS = ("format_version", "scenario", "realizations", "level", "made_from", "seed",
             "simbench_version", "created", "scenario_tolerances", "caution", "algorithms")
_ALGORITHM_KEYS = ("reconstructor", "options", "doses")


# ------------------------------------------------------------------------------------------
# Tolerances
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Tolerance:
    """How far a metric may move the bad way before it counts as a regression.

    Attributes
    ----------
    value : float or None
        A fraction of the baseline mean (``relative``) or an amount in the metric's unit;
        None: not checked.
    relative : bool
    """

    value: float | None
    relative: bool = False

    @property
    def checked(self) -> bool:
        return self.value is not None

    def amount(self, baseline_mean: float) -> float:
        """The tolerance in the metric's unit for a baseline mean."""
        if self.value is None:
            return math.inf
        return self.value * abs(baseline_mean) if self.relative else self.value

    def text(self) -> str:
        """As written in files: ``'5 %'``, a number, or ``'not checked'``."""
        if self.value is None:
            return NOT_CHECKED
        return f"{self.value * 100.0:g} %" if self.relative else f"{self.value:g}"

    def as_yaml(self) -> Any:
        return self.value if (self.value is not None and not self.relative) else self.text()


def parse_tolerance(value: Any, where: Where) -> Tolerance:
    """Read a tolerance as written in a scenario or baseline file.

    Parameters
    ----------
    value : str or number
        ``'5 %'`` (relative to the baseline mean, 0 to 1000 %), a non-negative number in the
        metric's unit, or ``'not checked'``.
    where : Where
        Its place, for the message.

    Raises
    ------
    InputError
        Anything else, in one line.

    Examples
    --------
    >>> parse_tolerance("5 %", Where()).value
    0.05
    """
    text = str(value).strip()
    if text == NOT_CHECKED:
        return Tolerance(None)
    relative = text.endswith("%")
    number_text = text[:-1].strip() if relative else text
    number = math.nan
    if not isinstance(value, bool):
        try:
            number = float(number_text)
        except ValueError:
            pass
    if not math.isfinite(number) or number < 0 or (relative and number > 1000):
        raise InputError(where, f"'{value}' is not a tolerance",
                         "a non-negative number in the metric's unit, a percentage such as "
                         f"'5 %', or '{NOT_CHECKED}'")
    return Tolerance(number / 100.0 if relative else number, relative)


def default_tolerance(metric: str) -> Tolerance:
    """The default tolerance of a metric (:data:`DEFAULT_TOLERANCES`; 5 % for one not listed)."""
    entry = DEFAULT_TOLERANCES.get(metric, (0.05, True))
    return Tolerance(None) if entry is None else Tolerance(*entry)


# ------------------------------------------------------------------------------------------
# Reading a run folder
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class MetricEstimate:
    """One metric of one algorithm at one dose, over the realizations of a run.

    Attributes
    ----------
    mean : float
        Mean over the realizations.
    low, high : float
        The Student-t interval of the mean (equal to the mean for a single value).
    std : float
        Sample standard deviation over the realizations (0 for a single value).
    n : int
        Number of values (realizations; 1 for a metric measured once per run).
    unit : str
    better : str
        ``lower``, ``higher``, ``zero`` or ``none``.
    values : tuple of float
        One per realization.
    level : float
        Confidence level of the interval.
    """

    mean: float
    low: float
    high: float
    std: float
    n: int
    unit: str = ""
    better: str = "lower"
    values: tuple = ()
    level: float = LEVEL

    def __float__(self) -> float:
        return float(self.mean)

    @classmethod
    def from_record(cls, record: dict) -> "MetricEstimate":
        """From an estimate of ``metrics.json``."""
        std = record.get("std")
        n = int(record.get("n", 1))
        return cls(mean=float(record["mean"]), low=float(record.get("low", record["mean"])),
                   high=float(record.get("high", record["mean"])),
                   std=float(std) if std is not None and n >= 2 and math.isfinite(std) else 0.0,
                   n=n, unit=str(record.get("unit", "")),
                   better=str(record.get("better", "lower")),
                   values=tuple(float(v) for v in record.get("values", ())),
                   level=float(record.get("level", LEVEL)))

    def describe(self) -> str:
        """``0.00234 1/mm (95 % interval 0.00232 to 0.00235, n = 10)``."""
        unit = f" {self.unit}" if self.unit else ""
        if self.n >= 2:
            return (f"{_g(self.mean)}{unit} ({_g(self.level * 100)} % interval {_g(self.low)} "
                    f"to {_g(self.high)}, n = {self.n})")
        return f"{_g(self.mean)}{unit} (one value)"


def metric_label(metric: str, roi: str | None = None) -> str:
    """How a metric is named in tables and test names: ``rmse`` or ``water: bias_hu``."""
    return metric if roi is None else f"{roi}: {metric}"


class RunResults:
    """The results of a run folder (``simbench run``), verified whole before reading.

    Parameters
    ----------
    folder : str or Path
        A complete run folder.

    Attributes
    ----------
    folder : Path
    record : dict
        The content of ``metrics.json``.
    resolved : dict
        The content of ``scenario.resolved.yaml``.
    """

    def __init__(self, folder: str | Path):
        import json

        import yaml

        from simbench.folders import verify_folder

        self.folder = Path(folder)
        verify_folder(self.folder, "run")
        path = self.folder / "metrics.json"
        try:
            record = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputError(Where(str(path)), f"unreadable: {exc}".splitlines()[0],
                             "a run folder written by simbench run") from None
        version = record.get("format_version") if isinstance(record, dict) else None
        if version != 1 or not isinstance(record.get("algorithms"), dict):
            raise InputError(Where(str(path), field="format_version"),
                             f"metrics.json of format {version!r} (not a format this simbench "
                             "reads)", "a run written by simbench run, format 1")
        self.record = record
        resolved_path = self.folder / "scenario.resolved.yaml"
        try:
            self.resolved = yaml.safe_load(resolved_path.read_text(encoding="utf-8")) or {}
        except (OSError, yaml.YAMLError):
            self.resolved = {}

    @property
    def scenario(self) -> str:
        """The scenario's name."""
        return str(self.record.get("scenario", {}).get("name", ""))

    @property
    def realizations(self) -> int:
        return int(self.record.get("realizations", 1))

    @property
    def algorithms(self) -> list[str]:
        return list(self.record["algorithms"])

    @property
    def doses(self) -> list[str]:
        return list(self.record.get("doses", []))

    def scenario_tolerances(self) -> dict:
        """The scenario's ``tolerances`` as written (metric -> text or number)."""
        value = self.resolved.get("tolerances") if isinstance(self.resolved, dict) else None
        return dict(value) if isinstance(value, dict) else {}

    def estimates(self) -> Iterator[tuple[str, str, str | None, str, MetricEstimate]]:
        """Every scalar result: (algorithm, dose, ROI or None, metric, estimate)."""
        for algorithm, entry in self.record["algorithms"].items():
            for dose, result in entry.get("doses", {}).items():
                for metric, estimate in result.get("metrics", {}).items():
                    yield algorithm, dose, None, metric, MetricEstimate.from_record(estimate)
                for roi, stats in result.get("rois", {}).items():
                    for metric, estimate in stats.items():
                        yield algorithm, dose, roi, metric, MetricEstimate.from_record(estimate)

    def dose_label(self, dose: Any = None) -> str:
        """The dose label (``dose-1``) of a label, a factor, or None for the only dose."""
        doses = self.doses
        where = Where(str(self.folder / "metrics.json"), field="doses")
        if dose is None:
            if len(doses) == 1:
                return doses[0]
            raise InputError(where, f"this run has {len(doses)} doses; say which",
                             "dose= one of " + ", ".join(doses))
        if isinstance(dose, str) and dose in doses:
            return dose
        try:
            label = f"dose-{float(str(dose).removeprefix('dose-')):g}"
        except ValueError:
            label = str(dose)
        if label not in doses:
            raise InputError(where, f"this run has no dose {dose!r}",
                             "one of " + ", ".join(doses))
        return label

    def metric(self, algorithm: str, name: str, dose: Any = None, roi: str | None = None
               ) -> MetricEstimate:
        """One metric's estimate.

        Parameters
        ----------
        algorithm : str
            An algorithm name of the scenario.
        name : str
            A metric name (``rmse``, ``ssim``...; with ``roi``: ``mean_hu``, ``bias_hu``,
            ``std_hu``, ``cnr``).
        dose : str or float, optional
            ``'dose-0.25'`` or ``0.25``; may be left out when the run has one dose.
        roi : str, optional
            A ROI name of the phantom, for ROI statistics.

        Returns
        -------
        MetricEstimate
        """
        where = Where(str(self.folder / "metrics.json"), field="algorithms")
        if algorithm not in self.record["algorithms"]:
            raise InputError(where, f"this run has no algorithm {algorithm!r}",
                             "one of " + ", ".join(map(repr, self.algorithms)))
        label = self.dose_label(dose)
        result = self.record["algorithms"][algorithm]["doses"].get(label, {})
        if roi is not None:
            rois = result.get("rois", {})
            if roi not in rois:
                raise InputError(where.child(f"{algorithm}.rois"), f"no ROI {roi!r} was measured",
                                 "one of " + (", ".join(map(repr, rois)) or "(none: add 'rois' "
                                                                           "to the metrics)"))
            found = rois[roi]
        else:
            found = result.get("metrics", {})
        if name not in found:
            raise InputError(where.child(algorithm), f"no metric {name!r} at {label}"
                             + (f" in ROI {roi!r}" if roi else "") + " (not asked for by the "
                             "scenario, or not finite in any realization)",
                             "one of " + (", ".join(found) or "(none)"))
        return MetricEstimate.from_record(found[name])


# ------------------------------------------------------------------------------------------
# The comparison table
# ------------------------------------------------------------------------------------------


def comparison_rows(runs: list[tuple[str, RunResults]]) -> tuple[list[str], list[dict]]:
    """The comparison table as data.

    Parameters
    ----------
    runs : list of (label, RunResults)

    Returns
    -------
    columns : list of str
        The main metrics present in at least one row, in :data:`MAIN_METRICS` order.
    rows : list of dict
        ``run``, ``scenario``, ``algorithm``, ``dose``, ``realizations`` and, per metric,
        a :class:`MetricEstimate` (absent where not measured).
    """
    rows, present = [], set()
    for label, results in runs:
        for algorithm in results.algorithms:
            doses = results.record["algorithms"][algorithm].get("doses", {})
            for dose in results.doses:
                metrics = doses.get(dose, {}).get("metrics", {})
                row = {"run": label, "scenario": results.scenario, "algorithm": algorithm,
                       "dose": dose, "realizations": results.realizations}
                for name in MAIN_METRICS:
                    if name in metrics:
                        row[name] = MetricEstimate.from_record(metrics[name])
                        present.add(name)
                rows.append(row)
    return [m for m in MAIN_METRICS if m in present], rows


def _cell(estimate: MetricEstimate | None) -> str:
    if estimate is None:
        return "-"
    if estimate.n >= 2:
        return f"{_g(estimate.mean)} [{_g(estimate.low)}, {_g(estimate.high)}]"
    return _g(estimate.mean)


def _header(metric: str, rows: list[dict]) -> str:
    unit = next((row[metric].unit for row in rows if metric in row), "")
    return f"{metric} ({unit})" if unit else metric


def comparison_text(columns: list[str], rows: list[dict]) -> str:
    """The table as aligned plain text."""
    head = ["run", "algorithm", "dose"] + [_header(m, rows) for m in columns]
    body = [[row["run"], row["algorithm"], row["dose"]] + [_cell(row.get(m)) for m in columns]
            for row in rows]
    widths = [max(len(line[i]) for line in [head] + body) for i in range(len(head))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(line, widths)).rstrip()
             for line in [head] + body]
    return "\n".join([lines[0], "  ".join("-" * w for w in widths)] + lines[1:])


def comparison_markdown(columns: list[str], rows: list[dict]) -> str:
    """The table as a markdown page (with the caution)."""
    head = ["run", "algorithm", "dose"] + [_header(m, rows) for m in columns]
    lines = ["# simbench comparison", "",
             f"Means over the realizations with their {_g(LEVEL * 100)} % Student-t interval "
             "[low, high]; one value where a metric is measured once per run.", "",
             "| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for row in rows:
        cells = [row["run"], row["algorithm"], row["dose"]] + [_cell(row.get(m)) for m in columns]
        lines.append("| " + " | ".join(_md(c) for c in cells) + " |")
    lines += ["", f"*{simbench.CAUTION}*", ""]
    return "\n".join(lines)


def comparison_csv(columns: list[str], rows: list[dict]) -> str:
    """The table as CSV: per metric its mean, low and high, at full precision."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    head = ["run", "scenario", "algorithm", "dose", "realizations"]
    for metric in columns:
        head += [metric, f"{metric} low", f"{metric} high"]
    writer.writerow(head)
    for row in rows:
        line = [row["run"], row["scenario"], row["algorithm"], row["dose"], row["realizations"]]
        for metric in columns:
            e = row.get(metric)
            line += ["", "", ""] if e is None else [repr(e.mean), repr(e.low), repr(e.high)]
        writer.writerow(line)
    return out.getvalue()


# ------------------------------------------------------------------------------------------
# The baseline file
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BaselineEntry:
    """One metric of a baseline: the estimate it rests on and its tolerance."""

    algorithm: str
    dose: str
    roi: str | None
    metric: str
    estimate: MetricEstimate
    tolerance: Tolerance


@dataclass
class Baseline:
    """A parsed baseline file."""

    source: str
    scenario: str
    realizations: int
    entries: list
    algorithms: dict = field(default_factory=dict)     # name -> {reconstructor, options}
    scenario_tolerances: dict = field(default_factory=dict)

    @property
    def has_intervals(self) -> bool:
        """Whether the baseline rests on realizations with noise (some metric with n >= 2)."""
        return any(e.estimate.n >= 2 and e.estimate.std > 0 for e in self.entries)


def make_baseline(results: RunResults) -> dict:
    """The content of a baseline file for a run (a plain mapping, ready for YAML).

    The tolerance of each metric is the scenario's (``tolerances:``) where it names the metric,
    else :func:`default_tolerance`.

    Parameters
    ----------
    results : RunResults

    Returns
    -------
    dict
    """
    where = Where(str(results.folder / "scenario.resolved.yaml"), field="tolerances")
    given = {str(k): parse_tolerance(v, where.child(str(k)))
             for k, v in results.scenario_tolerances().items()}
    measured = {metric for _, _, _, metric, _ in results.estimates()}
    for name in sorted(set(given) - measured):
        warn_input(where.child(name), f"the scenario's tolerance for '{name}' matches no metric "
                   "of this run; it is kept but checks nothing")
    algorithms: dict = {}
    for algorithm, dose, roi, metric, estimate in results.estimates():
        record = results.record["algorithms"][algorithm]
        entry = algorithms.setdefault(algorithm, {
            "reconstructor": str(record.get("reconstructor", "")),
            "options": dict(record.get("options", {})), "doses": {}})
        place = entry["doses"].setdefault(dose, {})
        if roi is not None:
            place = place.setdefault("rois", {}).setdefault(roi, {})
        else:
            place = place.setdefault("metrics", {})
        tolerance = given.get(metric, default_tolerance(metric))
        if estimate.better == "none":
            tolerance = Tolerance(None)
        place[metric] = _Flow({
            "mean": estimate.mean, "interval": _FlowList([estimate.low, estimate.high]),
            "std": estimate.std, "n": estimate.n, "unit": estimate.unit,
            "better": estimate.better, "tolerance": tolerance.as_yaml()})
    return {
        "format_version": FORMAT_VERSION,
        "scenario": results.scenario,
        "realizations": results.realizations,
        "level": LEVEL,
        "seed": results.record.get("seed"),
        "made_from": str(results.folder),
        "simbench_version": simbench.__version__,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "scenario_tolerances": {k: v.as_yaml() for k, v in given.items()},
        "caution": simbench.CAUTION,
        "algorithms": algorithms,
    }


_BASELINE_HEADER = """\
# simbench baseline: what 'simbench check' compares a run with.
# Each metric: the mean over n realizations, its {level} % interval, the standard deviation,
# the direction in which it is better, and its tolerance. Edit a tolerance to taste:
#   '5 %' (of the baseline mean), a number in the metric's unit, or 'not checked'.
# A metric regresses when the whole {level} % interval of its change lies beyond the
# tolerance on the bad side (docs/ci.md).
"""


def baseline_yaml(baseline: dict) -> str:
    """The text of a baseline file: one line per metric, so that a change reads as one line."""
    import yaml

    class Dumper(yaml.SafeDumper):
        pass

    def flow_map(dumper, data):
        return dumper.represent_mapping("tag:yaml.org,2002:map", data.items(), flow_style=True)

    def flow_list(dumper, data):
        return dumper.represent_sequence("tag:yaml.org,2002:seq", data, flow_style=True)

    Dumper.add_representer(_Flow, flow_map)
    Dumper.add_representer(_FlowList, flow_list)
    text = yaml.dump(baseline, Dumper=Dumper, sort_keys=False, allow_unicode=True,
                     width=10_000, default_flow_style=False)
    return _BASELINE_HEADER.format(level=_g(LEVEL * 100)) + text


class _Flow(dict):
    """A mapping written on one line."""


class _FlowList(list):
    """A list written on one line."""


def read_baseline(path: str | Path) -> Baseline:
    """Read and check a baseline file; every problem is one line with its place.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Baseline
    """
    from simbench.spec import Section, check_integer, check_number, load_yaml

    path = Path(path)
    document = load_yaml(path, "baseline file")
    source = str(path)
    if document is None:
        raise InputError(Where(source, 1, 1), "the baseline file is empty",
                         "a file written by simbench baseline")
    top = Section.root(document, source)
    top.check_keys(_TOP_KEYS, required=("format_version", "scenario", "algorithms"))
    version = top.raw("format_version")
    if version != FORMAT_VERSION:
        raise top.error("format_version", f"baseline format {version!r} is not one this "
                        "simbench reads", f"format_version: {FORMAT_VERSION} (make the baseline "
                        "again with simbench baseline)")
    scenario = top.string("scenario")
    realizations = top.integer("realizations", 1, minimum=1)
    given = {}
    if top.has("scenario_tolerances") and top.raw("scenario_tolerances") is not None:
        s = top.section("scenario_tolerances")
        given = {k: parse_tolerance(s.raw(k), s.at(k)) for k in s.keys()}
    entries, algorithms = [], {}
    section = top.section("algorithms")
    for algorithm in section.keys():
        a = section.section(algorithm)
        a.check_keys(_ALGORITHM_KEYS, required=("doses",))
        options = a.raw("options", {})
        algorithms[str(algorithm)] = {"reconstructor": a.raw("reconstructor", ""),
                                      "options": dict(options) if isinstance(options, dict)
                                      else {}}
        doses = a.section("doses")
        for dose in doses.keys():
            d = doses.section(dose)
            d.check_keys(("metrics", "rois"))
            groups = []
            if d.has("metrics"):
                groups.append((None, d.section("metrics")))
            if d.has("rois"):
                rois = d.section("rois")
                groups += [(str(roi), rois.section(roi)) for roi in rois.keys()]
            for roi, metrics in groups:
                for metric in metrics.keys():
                    e = metrics.section(metric)
                    e.check_keys(_ENTRY_KEYS, required=("mean", "n", "better", "tolerance"))
                    mean = check_number(e.raw("mean"), e.at("mean"))
                    n = check_integer(e.raw("n"), e.at("n"), minimum=1)
                    std = check_number(e.raw("std", 0.0), e.at("std"), minimum=0.0)
                    low, high = mean, mean
                    if e.has("interval"):
                        items = e.sequence("interval")
                        if len(items) != 2:
                            raise e.error("interval", "expected [low, high]", "two numbers")
                        low, high = (check_number(v, w) for v, w in items)
                    better = e.string("better", choices=DIRECTIONS)
                    tolerance = parse_tolerance(e.raw("tolerance"), e.at("tolerance"))
                    estimate = MetricEstimate(mean, low, high, std, n,
                                              str(e.raw("unit", "") or ""), better)
                    entries.append(BaselineEntry(str(algorithm), str(dose), roi, str(metric),
                                                 estimate, tolerance))
    return Baseline(source, scenario, realizations, entries, algorithms, given)


# ------------------------------------------------------------------------------------------
# The regression rule
# ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Outcome:
    """The verdict on one algorithm / dose / metric.

    Attributes
    ----------
    status : str
        ``passed``, ``improved`` (a pass, beyond the tolerance the good way), ``regressed``,
        ``missing`` (in the baseline, not in the run) or ``not checked``.
    change, change_low, change_high : float
        The worsening ``d`` (positive = worse, in the metric's unit) and its interval.
    allowed : float
        The tolerance in the metric's unit.
    standard_error : float
        Of the difference of means (0 when neither side has an interval).
    """

    algorithm: str
    dose: str
    roi: str | None
    metric: str
    status: str
    baseline: MetricEstimate
    run: MetricEstimate | None
    tolerance: Tolerance
    change: float = math.nan
    change_low: float = math.nan
    change_high: float = math.nan
    allowed: float = math.nan
    standard_error: float = 0.0

    @property
    def failed(self) -> bool:
        return self.status in ("regressed", "missing")

    @property
    def label(self) -> str:
        return f"{self.algorithm} / {self.dose} / {metric_label(self.metric, self.roi)}"

    def details(self) -> str:
        """One line with the numbers."""
        unit = f" {self.baseline.unit}" if self.baseline.unit else ""
        base = f"baseline {self.baseline.describe()}"
        if self.run is None:
            return f"not measured in this run; {base}"
        text = f"run {self.run.describe()}; {base}"
        if self.status == NOT_CHECKED:
            return text + "; not checked"
        worse = "worse" if self.change > 0 else "better"
        allowed = f"{_g(self.allowed)}{unit}"
        if self.tolerance.relative:
            allowed = f"{self.tolerance.text()} ({allowed})"
        text += f"; {worse} by {_g(abs(self.change))}{unit}{_percent(self.change, self.baseline)}"
        text += f", tolerance {allowed}"
        if self.standard_error > 0:
            text += (f"; {_g(LEVEL * 100)} % interval of the worsening {_g(self.change_low)} to "
                     f"{_g(self.change_high)}{unit}")
        return text


def judge(baseline: MetricEstimate, run: MetricEstimate, tolerance: Tolerance,
          level: float = LEVEL) -> tuple[str, float, float, float, float, float]:
    """Decide whether one metric regressed.

    Parameters
    ----------
    baseline, run : MetricEstimate
        Means, sample standard deviations and numbers of realizations of both sides.
    tolerance : Tolerance
    level : float
        Two-sided confidence level of the interval of the change (each side at
        ``(1 - level) / 2``).

    Returns
    -------
    status : str
        ``regressed``, ``improved``, ``passed`` or ``not checked``.
    change, low, high : float
        The worsening (positive = worse) and its interval.
    allowed : float
        The tolerance in the metric's unit.
    standard_error : float

    Notes
    -----
    See the module docstring: Welch's interval for the difference of the two means, oriented
    so that positive is worse, must lie wholly beyond the tolerance. A side with one value
    adds no variance; with none on either side the means are compared as numbers.

    Examples
    --------
    >>> a = MetricEstimate(1.0, 0.98, 1.02, 0.02, 10)
    >>> judge(a, MetricEstimate(1.1, 1.08, 1.12, 0.02, 10), Tolerance(0.05, True))[0]
    'regressed'
    """
    from scipy import stats

    allowed = tolerance.amount(baseline.mean)
    better = baseline.better
    if better == "lower":
        change = run.mean - baseline.mean
    elif better == "higher":
        change = baseline.mean - run.mean
    elif better == "zero":
        change = abs(run.mean) - abs(baseline.mean)
    else:
        change = run.mean - baseline.mean
    terms = [(e.std ** 2 / e.n, e.n - 1) for e in (run, baseline) if e.n >= 2 and e.std > 0]
    variance = sum(v for v, _ in terms)
    if variance > 0:
        dof = variance ** 2 / sum(v ** 2 / k for v, k in terms)
        half = float(stats.t.ppf(0.5 + level / 2.0, dof)) * math.sqrt(variance)
    else:
        half = 0.0
    low, high = change - half, change + half
    if better not in ("lower", "higher", "zero") or not tolerance.checked:
        return NOT_CHECKED, change, low, high, allowed, math.sqrt(variance)
    # a relative margin of 1e-12 keeps a run equal to its own baseline from failing on
    # rounding when the tolerance is zero
    slack = 1e-12 * max(abs(baseline.mean), abs(run.mean))
    if low > allowed + slack:
        status = "regressed"
    elif high < -allowed - slack:
        status = "improved"
    else:
        status = "passed"
    return status, change, low, high, allowed, math.sqrt(variance)


@dataclass
class CheckReport:
    """Every outcome of a check, and notes on what the check could not decide well."""

    run: str
    baseline: str
    scenario: str
    outcomes: list
    notes: list
    realizations: int
    baseline_realizations: int

    def count(self, status: str) -> int:
        return sum(o.status == status for o in self.outcomes)

    @property
    def regressed(self) -> bool:
        return any(o.failed for o in self.outcomes)


def check_results(results: RunResults, baseline: Baseline) -> CheckReport:
    """Check a run against a baseline.

    Parameters
    ----------
    results : RunResults
    baseline : Baseline

    Returns
    -------
    CheckReport

    Raises
    ------
    InputError
        The run is of another scenario, or has fewer than 2 realizations while the baseline
        rests on noisy realizations.
    """
    where = Where(str(results.folder / "metrics.json"), field="scenario.name")
    if results.scenario != baseline.scenario:
        raise InputError(where, f"this run is of scenario '{results.scenario}', the baseline "
                         f"'{baseline.source}' of '{baseline.scenario}'",
                         f"a run of '{baseline.scenario}', or a baseline made from a run of "
                         f"'{results.scenario}'")
    if baseline.has_intervals and results.realizations < 2:
        raise InputError(Where(str(results.folder / "metrics.json"), field="realizations"),
                         f"this run has {results.realizations} realization, and the baseline "
                         f"rests on {baseline.realizations} with noise: one realization cannot "
                         "tell noise from a regression", "a run with 2 or more realizations "
                         "(realizations: in the scenario)")
    found = {(a, d, r, m): e for a, d, r, m, e in results.estimates()}
    outcomes, notes = [], []
    for entry in baseline.entries:
        key = (entry.algorithm, entry.dose, entry.roi, entry.metric)
        run = found.pop(key, None)
        if run is None:
            status = NOT_CHECKED if not entry.tolerance.checked or \
                entry.estimate.better == "none" else "missing"
            outcomes.append(Outcome(entry.algorithm, entry.dose, entry.roi, entry.metric,
                                    status, entry.estimate, None, entry.tolerance))
            continue
        status, change, low, high, allowed, se = judge(entry.estimate, run, entry.tolerance)
        outcomes.append(Outcome(entry.algorithm, entry.dose, entry.roi, entry.metric, status,
                                entry.estimate, run, entry.tolerance, change, low, high,
                                allowed, se))
    if found:
        names = sorted({metric_label(m, r) for _, _, r, m in found})
        notes.append(f"{len(found)} result(s) of this run are not in the baseline and were not "
                     f"checked: {_some(names)}")
    pooled = sorted({metric_label(o.metric, None) for o in outcomes
                     if o.run is not None and o.tolerance.checked and o.baseline.better != "none"
                     and o.run.n < 2 and o.baseline.n < 2 and results.realizations >= 2})
    if pooled:
        notes.append("measured once per run (pooled over the realizations), so compared "
                      f"without an interval: {_some(pooled)}; their tolerance must exceed "
                      "their run-to-run spread")
    tight = [o.label for o in outcomes if o.status in ("passed", "improved", "regressed")
             and o.standard_error > 0 and o.allowed < o.standard_error]
    if tight:
        notes.append(f"{len(tight)} check(s) have a tolerance below the standard error of "
                     f"their change and may false-alarm in up to {_g((1 - LEVEL) / 2 * 100)} "
                     f"% of runs each: {_some(tight)}; widen them or add realizations")
    for name, info in baseline.algorithms.items():
        record = results.record["algorithms"].get(name)
        if record is None:
            continue
        if info.get("options") and dict(record.get("options", {})) != info["options"]:
            notes.append(f"'{name}' ran with options {record.get('options')} (baseline: "
                         f"{info['options']})")
    run_given = {str(k): str(v) for k, v in results.scenario_tolerances().items()}
    base_given = {k: v.text() for k, v in baseline.scenario_tolerances.items()}
    if {k: parse_tolerance(v, where).text() for k, v in run_given.items()} != base_given:
        notes.append("the run's scenario gives other tolerances than those the baseline was "
                     "made with; the baseline's tolerances are used (edit the baseline, or make "
                     "it again, to change them)")
    return CheckReport(str(results.folder), baseline.source, baseline.scenario, outcomes, notes,
                       results.realizations, baseline.realizations)


# ------------------------------------------------------------------------------------------
# What a check writes
# ------------------------------------------------------------------------------------------


def check_text(report: CheckReport) -> str:
    """The printed summary: what regressed and by how much, then the counts."""
    lines = [f"simbench check: run {report.run} ({report.realizations} realization(s)) against "
             f"baseline {report.baseline} ({report.baseline_realizations}), scenario "
             f"'{report.scenario}'"]
    for status, word in (("regressed", "REGRESSED"), ("missing", "MISSING"),
                         ("improved", "improved")):
        for o in report.outcomes:
            if o.status == status:
                lines.append(f"{word}: {o.label}: {o.details()}")
    for note in report.notes:
        lines.append(f"note: {note}")
    lines.append(_counts(report))
    lines.append("result: " + ("REGRESSION (exit 1)" if report.regressed else
                               "no regression (exit 0)"))
    return "\n".join(lines)


def _counts(report: CheckReport) -> str:
    checked = sum(o.status != NOT_CHECKED for o in report.outcomes)
    return (f"{checked} checks: {report.count('passed') + report.count('improved')} passed "
            f"({report.count('improved')} improved beyond tolerance), "
            f"{report.count('regressed')} regressed, {report.count('missing')} missing; "
            f"{report.count(NOT_CHECKED)} reported only (not checked)")


def junit_xml(report: CheckReport) -> ET.ElementTree:
    """The check as JUnit XML: ``testsuites / testsuite`` (one per algorithm and dose) /
    ``testcase`` (one per metric), with ``failure`` for a regression or a missing metric and
    ``skipped`` for a metric that is not checked.

    Notes
    -----
    The common JUnit XML shape that CI servers read. Test-case class names are
    ``scenario.algorithm.dose`` with dots inside each part replaced by ``_`` (readers split
    class names at dots); the test-case name is the metric.
    """
    root = ET.Element("testsuites", name=f"simbench check {report.scenario}")
    suites: dict = {}
    for o in report.outcomes:
        suites.setdefault((o.algorithm, o.dose), []).append(o)
    totals = {"tests": 0, "failures": 0, "skipped": 0}
    stamp = time.strftime("%Y-%m-%dT%H:%M:%S")
    for (algorithm, dose), outcomes in suites.items():
        suite = ET.SubElement(root, "testsuite", name=f"{report.scenario}: {algorithm} at {dose}",
                              timestamp=stamp)
        properties = ET.SubElement(suite, "properties")
        for name, value in (("run", report.run), ("baseline", report.baseline),
                            ("caution", simbench.CAUTION)):
            ET.SubElement(properties, "property", name=name, value=value)
        classname = ".".join(part.replace(".", "_") for part in (report.scenario, algorithm, dose))
        counts = {"tests": 0, "failures": 0, "skipped": 0}
        for o in outcomes:
            case = ET.SubElement(suite, "testcase", classname=classname,
                                 name=metric_label(o.metric, o.roi), time="0")
            counts["tests"] += 1
            if o.failed:
                counts["failures"] += 1
                kind = "regression" if o.status == "regressed" else "missing"
                failure = ET.SubElement(case, "failure", type=kind,
                                        message=f"{o.status}: {o.label}")
                failure.text = o.details()
            elif o.status == NOT_CHECKED:
                counts["skipped"] += 1
                ET.SubElement(case, "skipped", message=f"not checked: {o.details()}")
            else:
                ET.SubElement(case, "system-out").text = f"{o.status}: {o.details()}"
        for key, value in counts.items():
            suite.set(key, str(value))
            totals[key] += value
        suite.set("errors", "0")
        suite.set("time", "0")
    for key, value in totals.items():
        root.set(key, str(value))
    root.set("errors", "0")
    root.set("time", "0")
    ET.indent(root)
    return ET.ElementTree(root)


def check_markdown(report: CheckReport) -> str:
    """The check as a markdown page: the verdict, what regressed, then every check."""
    verdict = "**Regression**" if report.regressed else "**No regression**"
    lines = ["# simbench check", "",
             f"{verdict}: run `{report.run}` against baseline `{report.baseline}` (scenario "
             f"'{_md(report.scenario)}', {report.realizations} realization(s) against "
             f"{report.baseline_realizations}).", "", _counts(report) + ".", ""]
    failed = [o for o in report.outcomes if o.failed]
    if failed:
        lines += ["## Regressions", "", "| check | what changed |", "|---|---|"]
        lines += [f"| {_md(o.label)} | {_md(o.details())} |" for o in failed]
        lines.append("")
    if report.notes:
        lines += ["## Notes", ""] + [f"- {_md(n)}" for n in report.notes] + [""]
    lines += ["## Every check", "",
              "| algorithm | dose | metric | status | run | baseline | tolerance |",
              "|---|---|---|---|---|---|---|"]
    for o in report.outcomes:
        run = _cell(o.run) if o.run is not None else "-"
        lines.append(f"| {_md(o.algorithm)} | {o.dose} | {_md(metric_label(o.metric, o.roi))} | "
                     f"{o.status} | {run} | {_cell(o.baseline)} | {_tolerance(o)} |")
    lines += ["", f"The rule: a metric regresses when the whole {_g(LEVEL * 100)} % interval of "
              "its change (Welch) lies beyond its tolerance on the bad side.", "",
              f"*{simbench.CAUTION}*", ""]
    return "\n".join(lines)


# ------------------------------------------------------------------------------------------
# Commands (wired to the command line by simbench/cli.py)
# ------------------------------------------------------------------------------------------


def compare_command(paths: list, out_prefix: str | None = None) -> str:
    """``simbench compare RUN [RUN ...] [-o PREFIX]``: the comparison table.

    Parameters
    ----------
    paths : list of str or Path
        Run folders (each verified whole before reading).
    out_prefix : str or None
        Write ``PREFIX.csv`` and ``PREFIX.md``; None writes nothing.

    Returns
    -------
    str
        The table as text, and the files written.
    """
    if not paths:
        raise InputError(Where("<command line>", field="RUN"), "no run folders given",
                         "one or more folders written by simbench run")
    runs = [(str(p), RunResults(p)) for p in paths]
    columns, rows = comparison_rows(runs)
    text = comparison_text(columns, rows)
    scenarios = sorted({r.scenario for _, r in runs})
    if len(scenarios) > 1:
        text += "\nnote: the runs are of different scenarios: " + ", ".join(scenarios)
    if out_prefix is not None:
        from simbench.atomic import atomic_path

        prefix = Path(out_prefix)
        if prefix.suffix.lower() in (".csv", ".md"):
            prefix = prefix.with_suffix("")
        if prefix.is_dir():
            raise InputError(Where("<command line>", field="-o"),
                             f"'{out_prefix}' is a folder", "a file name prefix such as "
                             "results/comparison (writes .csv and .md)")
        written = []
        for suffix, content in ((".csv", comparison_csv(columns, rows)),
                                (".md", comparison_markdown(columns, rows))):
            path = prefix.parent / (prefix.name + suffix)
            with atomic_path(path, suffix) as tmp:
                tmp.write_text(content, encoding="utf-8")
            written.append(str(path))
        text += "\nwrote " + " and ".join(written)
    return text


def baseline_command(run: str | Path, file: str | Path) -> str:
    """``simbench baseline RUN -o FILE``: write a baseline file from a run.

    Parameters
    ----------
    run : str or Path
        A run folder.
    file : str or Path
        The baseline to write (``.yaml`` or ``.yml``), atomically.

    Returns
    -------
    str
        What was written.
    """
    from simbench.atomic import atomic_path

    path = _output(file, (".yaml", ".yml"), "-o")
    results = RunResults(run)
    content = make_baseline(results)
    text = baseline_yaml(content)
    with atomic_path(path, path.suffix) as tmp:
        tmp.write_text(text, encoding="utf-8")
    n = sum(1 for _ in results.estimates())
    checked = sum(1 for a in content["algorithms"].values() for d in a["doses"].values()
                  for group in [d.get("metrics", {})] + list(d.get("rois", {}).values())
                  for e in group.values() if e["tolerance"] != NOT_CHECKED)
    return (f"wrote {path}: scenario '{results.scenario}', {len(results.algorithms)} "
            f"algorithm(s) x {len(results.doses)} dose(s), {n} results ({checked} checked), "
            f"resting on {results.realizations} realization(s); review the tolerances, then "
            "commit it")


def check_command(run: str | Path, baseline: str | Path, junit: str | Path | None = None,
                  markdown: str | Path | None = None, *,
                  say: Callable[[str], None] = print) -> int:
    """``simbench check RUN --baseline FILE [--junit FILE] [--markdown FILE]``.

    Parameters
    ----------
    run : str or Path
        A run folder.
    baseline : str or Path
        A baseline file (``simbench baseline``).
    junit, markdown : str or Path, optional
        Where to write the JUnit XML (``.xml``) and the markdown summary (``.md``).
    say : callable
        Receives the printed summary.

    Returns
    -------
    int
        1 when a metric regressed or is missing, else 0. Bad input raises
        :class:`~simbench.errors.InputError` (exit code 2 on the command line).
    """
    from simbench.atomic import atomic_path

    junit_path = _output(junit, (".xml",), "--junit") if junit is not None else None
    markdown_path = _output(markdown, (".md",), "--markdown") if markdown is not None else None
    results = RunResults(run)
    report = check_results(results, read_baseline(baseline))
    if junit_path is not None:
        with atomic_path(junit_path, ".xml") as tmp:
            junit_xml(report).write(tmp, encoding="utf-8", xml_declaration=True)
    if markdown_path is not None:
        with atomic_path(markdown_path, ".md") as tmp:
            tmp.write_text(check_markdown(report), encoding="utf-8")
    text = check_text(report)
    written = [str(p) for p in (junit_path, markdown_path) if p is not None]
    if written:
        text += "\nwrote " + " and ".join(written)
    say(text)
    return 1 if report.regressed else 0


# ------------------------------------------------------------------------------------------
# Helpers
# ------------------------------------------------------------------------------------------


def _output(value: str | Path, suffixes: tuple, option: str) -> Path:
    path = Path(value)
    if path.suffix.lower() not in suffixes:
        raise InputError(Where("<command line>", field=option),
                         f"'{value}' does not end in {' or '.join(suffixes)}",
                         f"a file name ending in {suffixes[0]}")
    if path.is_dir():
        raise InputError(Where("<command line>", field=option), f"'{value}' is a folder",
                         f"a file name ending in {suffixes[0]}")
    return path


def _tolerance(outcome: Outcome) -> str:
    """A tolerance for reading: ``5 %``, ``2 HU``, ``not checked``."""
    unit = outcome.baseline.unit
    if outcome.tolerance.checked and not outcome.tolerance.relative and unit:
        return f"{outcome.tolerance.text()} {unit}"
    return outcome.tolerance.text()


def _g(value: float) -> str:
    """A number in 4 significant digits."""
    if value is None or not math.isfinite(value):
        return str(value)
    return f"{value:.4g}"


def _percent(change: float, baseline: MetricEstimate) -> str:
    # a signed bias near zero makes a percentage meaningless
    if baseline.mean == 0 or not math.isfinite(change) or baseline.better == "zero":
        return ""
    return f" ({_g(abs(change) / abs(baseline.mean) * 100)} %)"


def _md(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def _some(names: list, limit: int = 6) -> str:
    shown = ", ".join(names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")
