"""The human report of a run: one self-contained HTML page with its figures.

:func:`write_report` is called by the runner inside the staging folder of a run, after
``metrics.json`` and the images are written and before the folder is committed. It writes
``figures/*.png`` and ``report.html``: every figure embedded as a base64 data URI, the style
inline, no script and nothing fetched from a network (a content security policy in the page
forbids it), so the one file can be mailed or archived and opened in any browser.

The page reads, top to bottom: what was run (scenario, phantom, scanner, grid, energy, doses,
realizations, seed, version, time) and the caution; then one section per dose with the metrics
table of every algorithm (the best mean of each metric marked), the TTF and NPS curves, line
profiles, and per algorithm the truth, reconstruction and difference images with the ROI table;
then the wall time of each stage. Anything absent from the run (a metric not asked for, a
curve that needs more realizations, an image that cannot be read) is said in a line where it
would have been, never a traceback.
"""

from __future__ import annotations

import base64
import html
import re
import string
from pathlib import Path

import numpy as np

import simbench

#: metric key -> label shown in the report (plain English or a term of the trade)
METRIC_LABELS = {
    "rmse": "RMSE", "nrmse": "NRMSE", "mae": "MAE", "psnr": "PSNR", "ssim": "SSIM",
    "uniformity_hu": "uniformity", "cupping_percent": "cupping",
    "ttf_f50_per_mm": "TTF 50 % frequency", "ttf_f10_per_mm": "TTF 10 % frequency",
    "noise_std_hu": "noise (from the NPS)", "detectability": "d' (NPW observer)",
    "streak_index_hu": "streak index", "reprojection_rmse": "reprojection RMSE",
    "wall_time_s": "wall time per reconstruction", "peak_memory_mib": "peak memory",
}

#: metrics in 1/mm shown in HU (a difference of mu scales to HU without offset)
SHOWN_IN_HU = ("rmse", "mae")

BETTER_TEXT = {"lower": "lower", "higher": "higher", "zero": "closer to 0", "none": "—"}

ROI_COLUMNS = (("mean_hu", "mean (HU)"), ("bias_hu", "bias (HU)"), ("std_hu", "noise (HU)"),
               ("cnr", "CNR"))

STAGE_LABELS = {"truth": "truth (reference energy, image, labels)",
                "trace": "trace (path lengths)", "measure": "measure (counts, noise)",
                "reconstruct": "reconstruct", "score": "score", "report": "report"}

STYLE = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; margin: 0 auto;
       max-width: 1320px; padding: 1em 1.5em 3em; color: #1b1b1b; line-height: 1.4; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { border-bottom: 2px solid #ccc; padding-bottom: 0.2em; margin-top: 2em; }
h3 { margin-top: 1.6em; }
.caution { border: 2px solid #b35900; background: #fff4e5; padding: 0.6em 0.9em;
           margin: 1em 0; font-weight: 600; }
table { border-collapse: collapse; margin: 0.6em 0 1em; font-size: 0.92em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right;
         vertical-align: top; }
th { background: #f2f2f2; }
th.label, td.label { text-align: left; }
table.facts th { text-align: left; width: 13em; }
table.facts td { text-align: left; }
td.best { background: #e3f4e3; font-weight: 700; }
.mark { display: inline-block; margin-left: 0.4em; padding: 0 0.35em; border-radius: 0.3em;
        background: #2e7d32; color: #fff; font-size: 0.8em; font-weight: 600; }
.ci { display: block; color: #555; font-size: 0.85em; font-weight: 400; }
code { font-size: 0.85em; color: #555; }
.note { color: #555; font-style: italic; }
img { max-width: 100%; height: auto; display: block; margin: 0.4em 0; }
nav a { margin-right: 1em; }
table.time td:last-child { width: 22em; }
.bar { display: inline-block; height: 0.8em; background: #4a78b5; }
footer { margin-top: 3em; border-top: 1px solid #ccc; padding-top: 0.6em; color: #444; }
"""

PAGE = string.Template("""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy"
      content="default-src 'none'; img-src data:; style-src 'unsafe-inline'">
<title>$title</title>
<style>$style</style>
</head>
<body>
$body
</body>
</html>
""")


def write_report(folder, metrics: dict) -> Path:
    """Write the human report of a run: ``figures/*.png`` and a self-contained ``report.html``.

    Parameters
    ----------
    folder : str or Path
        The run folder (the runner's staging folder): ``truth/``, ``recon/`` and
        ``scenario.resolved.yaml`` are read from it when present.
    metrics : dict
        The content of ``metrics.json`` (format version 1).

    Returns
    -------
    Path
        ``folder / "report.html"``.

    Notes
    -----
    Images are shown for realization 0 on the central slice of a 3-D grid, in HU
    ``1000 (mu - mu_water) / (mu_water - mu_air)`` with the run's reference-energy scale;
    pixels outside the scanner's field of view are blank when the scanner geometry can be read
    back from ``scenario.resolved.yaml``. RMSE and MAE are shown in HU (their 1/mm values times
    ``1000 / (mu_water - mu_air)``). The best mean of each metric is marked where two or more
    algorithms differ on it, in the direction recorded with the metric (``better``).
    """
    folder = Path(folder)
    run = _Run(folder, metrics if isinstance(metrics, dict) else {})
    body = [_header(run)]
    for dose in run.doses:
        body.append(_dose_section(run, dose))
    body.append(_curves(run))
    body.append(_timing_section(run))
    body.append(f'<footer><p class="caution">{_e(simbench.CAUTION)}</p>'
                f"<p>Written by simbench {_e(simbench.__version__)}. The numbers are in "
                f"<code>metrics.json</code> beside this page; the images in "
                f"<code>recon/</code> and <code>truth/</code>.</p></footer>")
    page = PAGE.substitute(title=_e(f"simbench run report: {run.name}"), style=STYLE,
                           body="\n".join(body))
    from simbench.atomic import atomic_path

    path = folder / "report.html"
    with atomic_path(path, ".html") as tmp:
        tmp.write_text(page, encoding="utf-8")
    return path


# ------------------------------------------------------------------------------------------
# What the report reads from the run folder
# ------------------------------------------------------------------------------------------


class _Run:
    """The run's metrics record and the arrays of its folder, read once and leniently."""

    def __init__(self, folder: Path, metrics: dict):
        self.folder, self.m = folder, metrics
        self.figures = folder / "figures"
        self.name = str(_get(metrics, "scenario", "name", default="unnamed scenario"))
        self.resolved = self._resolved()
        algorithms = metrics.get("algorithms")
        self.algorithms = self._in_scenario_order(algorithms if isinstance(algorithms, dict)
                                                  else {})
        from simbench.report.run_figures import algorithm_colours

        self.colours = algorithm_colours(list(self.algorithms))
        doses = metrics.get("doses")
        if not isinstance(doses, list):
            doses = sorted({d for a in self.algorithms.values()
                            for d in (_get(a, "doses", default={}) or {})})
        self.doses = [str(d) for d in doses]
        factors = metrics.get("dose_factors")
        self.factors = dict(zip(self.doses, factors)) if isinstance(factors, list) else {}
        scale = metrics.get("hu_scale") or {}
        self.mu_water = _number(scale.get("mu_water_per_mm"))
        self.mu_air = _number(scale.get("mu_air_per_mm"))
        if self.mu_water is not None and self.mu_air is not None \
                and self.mu_water <= self.mu_air:
            self.mu_water = self.mu_air = None
        self.grid = self._grid()
        self.truth = self._plane(self._load(folder / "truth" / "image.npy"))
        labels = self._plane(self._load(folder / "truth" / "labels.npy"))
        self.labels = labels.astype(np.int64) if labels is not None else None
        roi_names = _get(metrics, "phantom", "roi_names", default=[])
        self.roi_names = [str(n) for n in roi_names] if isinstance(roi_names, list) else []
        self.fov = self._field_of_view()
        self._slug_counter: dict = {}

    # the grid and its central plane
    def _grid(self):
        from simbench.geometry import ImageGrid

        g = self.m.get("grid") or {}
        try:
            shape = tuple(int(v) for v in g["shape"])
            spacing = tuple(float(v) for v in g["spacing_mm"])
            centre = tuple(float(v) for v in g.get("centre_mm", (0.0, 0.0, 0.0)))
            dimension = int(g.get("dimension", 3 if shape[0] > 1 else 2))
            if len(shape) != 3 or len(spacing) != 3 or len(centre) != 3 or min(shape) < 1:
                return None
            return ImageGrid(shape, spacing, centre, dimension)
        except (KeyError, TypeError, ValueError):
            return None

    def slice_text(self) -> str:
        if self.grid is None or self.grid.dimension == 2:
            return ""
        k = self.grid.shape[0] // 2
        return f", central slice z = {self.grid.axis_mm('z')[k]:g} mm"

    def _plane(self, array):
        """The image's central plane (ny, nx), or None if its shape does not fit the grid."""
        if array is None or self.grid is None:
            return None
        nz, ny, nx = self.grid.shape
        if array.shape == (ny, nx):
            return np.asarray(array)
        if array.shape == (nz, ny, nx):
            return np.asarray(array[nz // 2])
        return None

    @staticmethod
    def _load(path: Path):
        if not path.is_file():
            return None
        try:
            return np.load(path, mmap_mode="r", allow_pickle=False)
        except (OSError, ValueError):
            return None

    def reconstruction(self, algorithm: str, dose: str):
        """Realization 0 of an algorithm at a dose, central plane, HU; NaN outside the FOV."""
        array = self._plane(self._load(self.folder / "recon" / algorithm / dose /
                                       "realization-0.npy"))
        if array is None or self.mu_water is None:
            return None
        hu = self.hu(array)
        if self.fov is not None:
            hu[~self.fov] = np.nan
        return hu

    def hu(self, mu):
        from simbench.report.comparison_figure import to_hu

        return to_hu(mu, self.mu_water, self.mu_air)

    def _resolved(self):
        """The run's ``scenario.resolved.yaml`` (located nodes), or None."""
        path = self.folder / "scenario.resolved.yaml"
        if not path.is_file():
            return None
        from simbench.errors import InputError
        from simbench.spec import load_yaml

        try:
            document = load_yaml(path, "resolved scenario")
        except (InputError, OSError, ValueError):
            return None
        return document if isinstance(document, dict) else None

    def _in_scenario_order(self, algorithms: dict) -> dict:
        """Algorithms in the order of the scenario file (metrics.json sorts its keys)."""
        listed = (self.resolved or {}).get("algorithms")
        names = [a.get("name") for a in listed if isinstance(a, dict)] \
            if isinstance(listed, list) else []
        order = [n for n in names if n in algorithms] + [n for n in algorithms
                                                          if n not in names]
        return {n: algorithms[n] for n in order}

    def _field_of_view(self):
        """Pixels of the central plane inside the scanner's field of view, or None (unknown)."""
        if self.grid is None or self.resolved is None:
            return None
        from simbench.errors import InputError
        from simbench.geometry import field_of_view_radius_mm, parse_geometry
        from simbench.spec import Section

        try:
            section = Section.root(self.resolved, str(self.folder / "scenario.resolved.yaml"))
            radius = field_of_view_radius_mm(parse_geometry(
                section.section("scanner_geometry")).poses())
        except (InputError, ValueError):
            return None
        if not np.isfinite(radius) or radius <= 0:
            return None
        x, y = np.meshgrid(self.grid.axis_mm("x"), self.grid.axis_mm("y"))
        return np.hypot(x, y) <= radius

    def slug(self, *parts) -> str:
        """A file name stem from names that may hold any character, unique in this report."""
        stem = "-".join(re.sub(r"[^A-Za-z0-9._-]+", "_", str(p)).strip("._-") or "x"
                        for p in parts)[:80]
        count = self._slug_counter.get(stem, 0)
        self._slug_counter[stem] = count + 1
        return stem if count == 0 else f"{stem}-{count + 1}"

    def dose_record(self, algorithm: str, dose: str) -> dict:
        record = _get(self.algorithms, algorithm, "doses", dose, default={})
        return record if isinstance(record, dict) else {}

    def dose_title(self, dose: str) -> str:
        factor = self.factors.get(dose)
        return f"dose factor {factor:g}" if isinstance(factor, (int, float)) else dose


def _get(mapping, *keys, default=None):
    for key in keys:
        if not isinstance(mapping, dict) or key not in mapping:
            return default
        mapping = mapping[key]
    return mapping


def _number(value):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if np.isfinite(value) else None


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _fmt(value) -> str:
    value = _number(value)
    if value is None:
        return "—"
    if value == 0:
        return "0"
    magnitude = abs(value)
    if 1e-3 <= magnitude < 1e5:
        digits = max(0, 3 - int(np.floor(np.log10(magnitude))))
        return f"{value:.{digits}f}"
    return f"{value:.3e}"


def _fmt_hu(value) -> str:
    """HU to a tenth (finer digits are below any CT number's meaning)."""
    value = _number(value)
    if value is None:
        return "—"
    text = f"{value:.1f}"
    return "0.0" if text == "-0.0" else text


def _image(path: Path | None, alt: str) -> str:
    """An <img> with the PNG embedded as a data URI (or a note when there is no figure)."""
    if path is None or not Path(path).is_file():
        return f'<p class="note">{_e(alt)}: no figure.</p>'
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{data}">'


def _note(text: str) -> str:
    return f'<p class="note">{_e(text)}</p>'


# ------------------------------------------------------------------------------------------
# Header
# ------------------------------------------------------------------------------------------


def _header(run: _Run) -> str:
    m = run.m
    description = _get(m, "scenario", "description", default="") or ""
    rows = [("scenario", run.name), ("scenario file", _get(m, "scenario", "file")),
            ("phantom", _get(m, "phantom", "name")), ("scanner", _get(m, "scanner", "name")),
            ("grid", _grid_text(run)),
            ("reference energy", _unit(m.get("reference_energy_kev"), "keV")),
            ("HU scale", _hu_scale_text(run)),
            ("doses", ", ".join(f"{run.dose_title(d)} ({d})" for d in run.doses) or None),
            ("realizations", m.get("realizations")), ("root seed", m.get("seed")),
            ("algorithms", ", ".join(_algorithm_text(name, record) for name, record
                                     in run.algorithms.items()) or None),
            ("simbench version", _get(m, "run", "simbench_version")),
            ("started", _get(m, "run", "started")),
            ("wall time", _unit(_get(m, "run", "wall_time_s"), "s",
                                "before this report was written"))]
    facts = "".join(f'<tr><th scope="row">{_e(k)}</th><td>{_e(v if v is not None else "—")}'
                    f"</td></tr>" for k, v in rows)
    nav = " ".join(f'<a href="#{_e(_anchor(d))}">{_e(run.dose_title(d))}</a>'
                   for d in run.doses)
    nav += ' <a href="#curves">resolution and noise</a> <a href="#time">time per stage</a>'
    return (f"<header><h1>{_e(run.name)}: run report</h1>"
            + (f"<p>{_e(description)}</p>" if description else "")
            + f'<p class="caution">{_e(simbench.CAUTION)}</p>'
            + f'<table class="facts">{facts}</table><nav>{nav}</nav></header>')


def _anchor(dose: str) -> str:
    return "d-" + re.sub(r"[^A-Za-z0-9_.-]+", "_", dose)


def _unit(value, unit: str, note: str = ""):
    value = _number(value)
    if value is None:
        return None
    return f"{value:g} {unit}" + (f" ({note})" if note else "")


def _grid_text(run: _Run):
    g = run.grid
    if g is None:
        return None
    nz, ny, nx = g.shape
    dx, dy, dz = g.spacing_mm
    if g.dimension == 2:
        return (f"{nx} x {ny} pixels of {dx:g} x {dy:g} mm "
                f"({nx * dx:g} x {ny * dy:g} mm), centre {_point(g.centre_mm[:2])} mm")
    return (f"{nx} x {ny} x {nz} voxels of {dx:g} x {dy:g} x {dz:g} mm, centre "
            f"{_point(g.centre_mm)} mm; images show the central slice")


def _point(values) -> str:
    return "(" + ", ".join(f"{v:g}" for v in values) + ")"


def _hu_scale_text(run: _Run):
    if run.mu_water is None:
        return None
    return (f"mu water {run.mu_water:.5g} /mm, mu air {run.mu_air:.3g} /mm "
            f"(HU = 1000 (mu - mu water) / (mu water - mu air))")


def _algorithm_text(name: str, record) -> str:
    if not isinstance(record, dict):
        return name
    options = record.get("options")
    shown = ", ".join(f"{k}={v}" for k, v in options.items()) if isinstance(options, dict) \
        else ""
    use = record.get("reconstructor")
    parts = [p for p in (f"{use}" if use and use != name else "",
                         f"from {record['stage']}" if record.get("stage") else "", shown) if p]
    return f"{name} ({'; '.join(parts)})" if parts else name


# ------------------------------------------------------------------------------------------
# One dose
# ------------------------------------------------------------------------------------------


def _dose_section(run: _Run, dose: str) -> str:
    title = run.dose_title(dose)
    parts = [f'<section id="{_e(_anchor(dose))}"><h2>{_e(title.capitalize())}</h2>',
             "<h3>Metrics</h3>", _metrics_table(run, dose),
             "<h3>Images</h3>", _comparisons(run, dose),
             "<h3>Line profiles</h3>", _profiles(run, dose),
             "<h3>ROI statistics</h3>"]
    for algorithm in run.algorithms:
        parts.append(f"<h4>{_e(algorithm)}</h4>")
        parts.append(_roi_table(run, algorithm, dose))
    parts.append("</section>")
    return "\n".join(parts)


def _metric_order(names) -> list:
    known = [k for k in METRIC_LABELS if k in names]
    return known + sorted(n for n in names if n not in METRIC_LABELS)


def _shown(run: _Run, key: str, estimate: dict) -> tuple[dict, str]:
    """An estimate as shown (RMSE and MAE in HU) and its unit."""
    unit = str(estimate.get("unit", "") or "")
    if key in SHOWN_IN_HU and unit == "1/mm" and run.mu_water is not None:
        scale = 1000.0 / (run.mu_water - run.mu_air)
        shown = dict(estimate)
        for field in ("mean", "low", "high", "std"):
            if _number(estimate.get(field)) is not None:
                shown[field] = estimate[field] * scale
        if isinstance(estimate.get("values"), list):
            shown["values"] = [v * scale for v in estimate["values"]
                               if _number(v) is not None]
        return shown, "HU"
    return estimate, unit


def _cell(estimate: dict, classes: str = "", mark: str = "", fmt=None) -> str:
    """A table cell: the mean, and below it the interval (or the number of values)."""
    show = fmt or _fmt
    mean = show(estimate.get("mean"))
    n = estimate.get("n")
    low, high = _number(estimate.get("low")), _number(estimate.get("high"))
    level = _number(estimate.get("level")) or 0.95
    if isinstance(n, int) and n >= 2 and low is not None and high is not None:
        detail = f"{100 * level:g} % CI {show(low)} to {show(high)}"
    elif isinstance(n, int) and n == 1:
        detail = "one value, no interval"
    else:
        detail = ""
    values = estimate.get("values")
    title = ""
    if isinstance(values, list) and values:
        title = f' title="{_e("per realization: " + ", ".join(show(v) for v in values))}"'
    css = f' class="{classes}"' if classes else ""
    return (f"<td{css}{title}>{mean}{mark}"
            + (f'<span class="ci">{_e(detail)}</span>' if detail else "") + "</td>")


def _best(estimates: dict, better: str) -> tuple[set, set]:
    """Algorithms with the best mean, and those of them whose interval overlaps another's.

    Nothing is marked when fewer than two algorithms have the metric or all means are equal.
    """
    means = {a: _number(e.get("mean")) for a, e in estimates.items()}
    means = {a: v for a, v in means.items() if v is not None}
    if len(means) < 2 or better not in ("lower", "higher", "zero"):
        return set(), set()
    score = {a: (v if better == "lower" else -v if better == "higher" else abs(v))
             for a, v in means.items()}
    top = min(score.values())
    if all(np.isclose(s, top, rtol=1e-12, atol=0.0) for s in score.values()):
        return set(), set()
    best = {a for a, s in score.items() if np.isclose(s, top, rtol=1e-12, atol=0.0)}
    overlap = set()
    for a in best:
        lo, hi = _interval(estimates[a])
        if lo is None:
            continue
        for other in means:
            if other in best:
                continue
            olo, ohi = _interval(estimates[other])
            if olo is not None and olo <= hi and lo <= ohi:
                overlap.add(a)
    return best, overlap


def _interval(estimate: dict):
    n = estimate.get("n")
    low, high = _number(estimate.get("low")), _number(estimate.get("high"))
    if not isinstance(n, int) or n < 2 or low is None or high is None:
        return None, None
    return low, high


def _metrics_table(run: _Run, dose: str) -> str:
    per_algorithm = {a: run.dose_record(a, dose).get("metrics") for a in run.algorithms}
    per_algorithm = {a: m if isinstance(m, dict) else {} for a, m in per_algorithm.items()}
    names = {k for m in per_algorithm.values() for k, e in m.items() if isinstance(e, dict)}
    if not run.algorithms or not names:
        return _note("No metric was measured at this dose.")
    head = "".join(f'<th scope="col">{_e(a)}</th>' for a in run.algorithms)
    rows = []
    overlap_seen = False
    for key in _metric_order(names):
        estimates, unit, better = {}, "", "none"
        for algorithm, metrics in per_algorithm.items():
            estimate = metrics.get(key)
            if isinstance(estimate, dict):
                estimates[algorithm], unit = _shown(run, key, estimate)
                better = str(estimate.get("better", better))
        best, overlap = _best(estimates, better)
        overlap_seen |= bool(overlap)
        label = METRIC_LABELS.get(key, key)
        cells = []
        for algorithm in run.algorithms:
            if algorithm not in estimates:
                cells.append("<td>—</td>")
                continue
            mark = ""
            if algorithm in best:
                mark = ('<span class="mark" title="best mean at this dose">best</span>'
                        + (" ≈" if algorithm in overlap else ""))
            cells.append(_cell(estimates[algorithm], "best" if algorithm in best else "",
                               mark))
        rows.append(f'<tr><th scope="row" class="label">{_e(label)} <code>{_e(key)}</code>'
                    f'</th><td class="label">{_e(unit) or "—"}</td>'
                    f'<td class="label">{_e(BETTER_TEXT.get(better, better))}</td>'
                    + "".join(cells) + "</tr>")
    notes = ["Each cell: the mean over the realizations and its Student-t confidence "
             "interval; hover for the value of each realization. RMSE and MAE are in HU."]
    if overlap_seen:
        notes.append("≈: the best mean's interval overlaps another algorithm's, so the "
                     "difference may be noise.")
    return (f'<table class="metrics"><thead><tr><th class="label">metric</th>'
            f'<th class="label">unit</th><th class="label">better</th>{head}</tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table>"
            + "".join(_note(n) for n in notes))


def _roi_table(run: _Run, algorithm: str, dose: str) -> str:
    rois = run.dose_record(algorithm, dose).get("rois")
    if not isinstance(rois, dict) or not rois:
        return _note("No ROI statistics at this dose (the scenario's metrics do not list rois, "
                     "or the phantom has no ROI).")
    order = [n for n in run.roi_names if n in rois] + sorted(n for n in rois
                                                            if n not in run.roi_names)
    head = "".join(f'<th scope="col">{_e(label)}</th>' for _, label in ROI_COLUMNS)
    rows = []
    for name in order:
        stats = rois[name] if isinstance(rois[name], dict) else {}
        truth = None
        mean, bias = stats.get("mean_hu"), stats.get("bias_hu")
        if isinstance(mean, dict) and isinstance(bias, dict):
            m, b = _number(mean.get("mean")), _number(bias.get("mean"))
            truth = None if m is None or b is None else m - b
        cells = [_cell(stats[k], fmt=_fmt if k == "cnr" else _fmt_hu)
                 if isinstance(stats.get(k), dict) else "<td>—</td>" for k, _ in ROI_COLUMNS]
        role = _roi_role(run, name)
        rows.append(f'<tr><th scope="row" class="label">{_e(name)}'
                    + (f" <code>{_e(role)}</code>" if role else "")
                    + f"</th><td>{_fmt_hu(truth)}</td>{''.join(cells)}</tr>")
    return (f'<table class="rois"><thead><tr><th class="label">ROI</th>'
            f'<th scope="col">truth (HU)</th>{head}</tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table>"
            + _note("ROI statistics over every realization; CNR against the background ROI."))


def _roi_role(run: _Run, name: str) -> str:
    roles = run.m.get("rois")
    if not isinstance(roles, dict):
        return ""
    found = [role for role, value in roles.items()
             if value == name or (isinstance(value, list) and name in value)]
    return ", ".join(found)


# ------------------------------------------------------------------------------------------
# Figures of one dose
# ------------------------------------------------------------------------------------------


def _curves(run: _Run) -> str:
    """TTF and NPS of every algorithm and dose in one figure (one figure costs less)."""
    from simbench.report.run_figures import DOSE_STYLES, draw_curves

    series = []
    for d, dose in enumerate(run.doses):
        for algorithm in run.algorithms:
            curves = run.dose_record(algorithm, dose).get("curves")
            if isinstance(curves, dict):
                label = algorithm if len(run.doses) == 1 else \
                    f"{algorithm}, {run.dose_title(dose)}"
                series.append({"label": label, "colour": run.colours[algorithm],
                               "linestyle": DOSE_STYLES[d % len(DOSE_STYLES)],
                               "curves": curves})
    parts = ['<section id="curves"><h2>Resolution and noise</h2>']
    path = draw_curves(series, run.figures / f"{run.slug('ttf-nps')}.png",
                       title="TTF and radial NPS")
    if path is None:
        parts.append(_note("No TTF or NPS in this run: the TTF needs an edge ROI, the NPS a "
                           "noise ROI and at least two realizations."))
    else:
        parts.append(_image(path, "TTF and NPS curves"))
        parts.append(_note("Colour: algorithm; line style: dose. TTF of the edge insert from "
                           "the mean image over the realizations; radial NPS from the "
                           "realizations minus their mean, in the noise ROIs; the TTF 50 % and "
                           "10 % levels dotted."))
    parts.append("</section>")
    return "\n".join(parts)


def _difference_window(run: _Run, dose: str) -> float:
    """One difference window (HU) for every algorithm at a dose: about 2.5 noise deviations."""
    noise = []
    background = _get(run.m, "rois", "background")
    for algorithm in run.algorithms:
        record = run.dose_record(algorithm, dose)
        value = _number(_get(record, "metrics", "noise_std_hu", "mean"))
        if value is None and background:
            value = _number(_get(record, "rois", background, "std_hu", "mean"))
        if value is not None:
            noise.append(value)
    need = 2.5 * max(noise) if noise else 50.0
    return float(next((w for w in (50, 100, 150, 200, 300, 500, 1000, 2000) if w >= need),
                      2000))


def _comparisons(run: _Run, dose: str) -> str:
    from simbench.report.run_figures import draw_comparisons

    if run.truth is None or run.mu_water is None:
        return _note("The truth image or the HU scale could not be read: no image comparison.")
    images, missing = {}, []
    for algorithm in run.algorithms:
        image = run.reconstruction(algorithm, dose)
        if image is None:
            missing.append(f"recon/{algorithm}/{dose}/realization-0.npy")
        else:
            images[algorithm] = image
    notes = []
    if missing:
        notes.append("Not readable on this run's grid, so not shown: " + ", ".join(missing)
                     + ".")
    if not images:
        return "".join(_note(n) for n in notes)
    window = _difference_window(run, dose)
    path = draw_comparisons(run.hu(run.truth), images, run.grid.extent_mm(),
                            run.figures / f"{run.slug('images', dose)}.png",
                            title=f"Truth, reconstruction and difference, "
                                  f"{run.dose_title(dose)}, realization 0{run.slice_text()}",
                            difference_window=window)
    fov = ("blank outside the scanner's field of view" if run.fov is not None
           else "the field of view could not be read back, so every pixel is shown")
    notes.insert(0, f"One grey window for truth and reconstructions; differences shown from "
                    f"-{window:g} to +{window:g} HU; {fov}.")
    return (_image(path, f"truth, reconstruction and difference, {run.dose_title(dose)}")
            + "".join(_note(n) for n in notes))


def _profiles(run: _Run, dose: str) -> str:
    from simbench.report.run_figures import draw_profiles

    if run.truth is None or run.mu_water is None:
        return _note("The truth image could not be read: no line profiles.")
    images = {a: run.reconstruction(a, dose) for a in run.algorithms}
    images = {a: i for a, i in images.items() if i is not None}
    if not images:
        return _note("No readable reconstruction at this dose: no line profiles.")
    grid = run.grid
    x, y = grid.axis_mm("x"), grid.axis_mm("y")
    truth = run.hu(run.truth)
    centre_row = int(np.argmin(np.abs(y - grid.centre_mm[1])))
    centre_col = int(np.argmin(np.abs(x - grid.centre_mm[0])))
    edge = _get(run.m, "rois", "edge")
    edge_row = _label_row(run, edge)
    lines = []
    title = f"horizontal line through the grid centre (y = {y[centre_row]:.1f} mm)"
    if edge_row is not None and abs(edge_row - centre_row) <= 1:
        title = (f"horizontal line through the grid centre and the {edge} insert "
                 f"(y = {y[centre_row]:.1f} mm)")
    lines.append(_line(run, title, x, truth[centre_row], {a: i[centre_row]
                                                          for a, i in images.items()},
                       None if run.labels is None else run.labels[centre_row]))
    if edge_row is not None and abs(edge_row - centre_row) > 1:
        lines.append(_line(run, f"horizontal line through the {edge} insert "
                                f"(y = {y[edge_row]:.1f} mm)", x, truth[edge_row],
                           {a: i[edge_row] for a, i in images.items()},
                           None if run.labels is None else run.labels[edge_row]))
    lines.append(_line(run, f"vertical line through the grid centre (x = {x[centre_col]:.1f} "
                            "mm)", y, truth[:, centre_col],
                       {a: i[:, centre_col] for a, i in images.items()},
                       None if run.labels is None else run.labels[:, centre_col]))
    path = draw_profiles(lines, run.figures / f"{run.slug('profiles', dose)}.png",
                         title=f"Line profiles, {run.dose_title(dose)}, realization 0"
                               f"{run.slice_text()}")
    return (_image(path, f"line profiles, {run.dose_title(dose)}")
            + _note("Truth in black; grey bands are the ROIs the line crosses."))


def _label_row(run: _Run, name):
    """The row nearest the centroid of a named ROI in the shown plane, or None."""
    if not name or run.labels is None or name not in run.roi_names:
        return None
    rows, _ = np.nonzero(run.labels == run.roi_names.index(name) + 1)
    return int(round(float(rows.mean()))) if rows.size else None


def _line(run: _Run, title: str, position, truth, images: dict, labels) -> dict:
    rois = []
    if labels is not None:
        step = float(position[1] - position[0]) if len(position) > 1 else 1.0
        labels = np.asarray(labels)
        changes = np.flatnonzero(np.diff(labels)) + 1
        for start, end in zip(np.r_[0, changes], np.r_[changes, labels.size]):
            label = int(labels[start])
            if 1 <= label <= len(run.roi_names):
                rois.append((run.roi_names[label - 1], float(position[start]) - step / 2,
                             float(position[end - 1]) + step / 2))
    return {"title": title, "position_mm": position, "truth": truth, "images": images,
            "colours": run.colours, "rois": rois}


# ------------------------------------------------------------------------------------------
# Time
# ------------------------------------------------------------------------------------------


def _timing_section(run: _Run) -> str:
    timings = _get(run.m, "run", "timings_s", default={})
    timings = timings if isinstance(timings, dict) else {}
    shown = {k: _number(v) for k, v in timings.items()}
    shown = {k: v for k, v in shown.items() if v is not None and v >= 0
             and not (k == "report" and v == 0)}
    parts = ['<section id="time"><h2>Time per stage</h2>']
    if not shown:
        parts.append(_note("The run recorded no stage times."))
    else:
        total = sum(shown.values()) or 1.0
        longest = max(shown.values()) or 1.0
        rows = "".join(
            f'<tr><th scope="row" class="label">{_e(STAGE_LABELS.get(k, k))}</th>'
            f"<td>{_fmt(v)}</td><td>{100 * v / total:.0f}</td>"
            f'<td class="label"><span class="bar" style="width: {100 * v / longest:.1f}%">'
            f"</span></td></tr>" for k, v in shown.items())
        parts.append(f'<table class="time"><thead><tr><th class="label">stage</th>'
                     f"<th>wall time (s)</th><th>share (%)</th><th></th></tr></thead>"
                     f"<tbody>{rows}</tbody></table>")
    if timings.get("report") == 0:
        parts.append(_note("Writing this report is timed after the page is written; its time "
                           "is in metrics.json (run, timings_s, report)."))
    parts.append("</section>")
    return "\n".join(parts)
