"""The figures of a run report: truth, reconstruction and difference images, line profiles, and
TTF and NPS curves.

Each function draws from arrays and plain dicts (as read from a run folder) and writes one PNG
through :func:`simbench.report.figures.finish_figure`, which adds the caution footer and writes
atomically.

The layouts are fixed in inches rather than left to matplotlib's constrained layout: the
report is written inside every run and must cost less than one reconstruction, and the
constrained layout's extra measuring pass was most of the drawing time. For the same reason
all algorithms of one dose share one image figure (one row each) instead of one figure each.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

#: light figures: the report embeds every PNG, and a few MB is the budget for the quickstart
DPI = 100


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _figure(width_in: float, height_in: float, rows: int, cols: int, *, left: float,
            right: float, top: float, bottom: float, wspace_in: float = 0.0,
            hspace_in: float = 0.0, **subplots):
    """A figure whose margins and gaps are given in inches (no layout engine)."""
    plt = _pyplot()
    inner_w = width_in - left - right
    inner_h = height_in - top - bottom
    panel_w = (inner_w - wspace_in * (cols - 1)) / cols
    panel_h = (inner_h - hspace_in * (rows - 1)) / rows
    return plt.subplots(rows, cols, figsize=(width_in, height_in), squeeze=False,
                        gridspec_kw=dict(left=left / width_in, right=1 - right / width_in,
                                         top=1 - top / height_in, bottom=bottom / height_in,
                                         wspace=wspace_in / panel_w, hspace=hspace_in / panel_h),
                        **subplots)


def algorithm_colours(names) -> dict:
    """One colour per algorithm, the same in every figure of a report (matplotlib's cycle).

    Parameters
    ----------
    names : sequence of str
        Algorithm names in report order.

    Returns
    -------
    dict
        name -> colour.

    Examples
    --------
    >>> algorithm_colours(["fbp-ramp", "fbp-hann"])
    {'fbp-ramp': 'C0', 'fbp-hann': 'C1'}
    """
    cycle = ["C0", "C1", "C2", "C3", "C4", "C5", "C6", "C8", "C9"]
    return {name: cycle[i % len(cycle)] for i, name in enumerate(names)}


def draw_comparisons(truth_hu: np.ndarray, images_hu: dict, extent_mm: tuple, path, *,
                     title: str = "", window: tuple = (-200.0, 200.0),
                     difference_window: float = 50.0) -> Path:
    """Write a PNG with one row per algorithm: truth, reconstruction and their difference (HU).

    Parameters
    ----------
    truth_hu : float (ny, nx)
        The truth, HU, row index growing with +y.
    images_hu : dict
        algorithm -> float (ny, nx) reconstruction on the same grid, HU; NaN marks pixels not
        compared (outside the field of view), shown blank.
    extent_mm : (xmin, xmax, ymin, ymax)
        Pixel edges (:meth:`simbench.geometry.grid.ImageGrid.extent_mm`).
    path : str or Path
    title : str
    window : (low, high)
        Grey-level window of truth and reconstructions, HU (one window for every panel).
    difference_window : float
        Differences are shown from -difference_window to +difference_window HU.

    Returns
    -------
    Path

    Notes
    -----
    Each difference panel's title gives its RMSE in HU over the compared (finite) pixels.
    """
    from simbench.report.figures import finish_figure

    truth_hu = np.asarray(truth_hu, dtype=np.float64)
    n = max(1, len(images_hu))
    panel, gap_h, top, bottom = 2.7, 0.4, 0.6, 0.5
    width, right = 11.3, 1.95
    figure, axes = _figure(width, top + bottom + n * panel + (n - 1) * gap_h, n, 3, left=0.2,
                           right=right, top=top, bottom=bottom, wspace_in=0.2,
                           hspace_in=gap_h)
    grey = difference = None
    style = dict(origin="lower", extent=extent_mm, interpolation="nearest")
    for row, (name, image) in zip(axes, images_hu.items()):
        image = np.asarray(image, dtype=np.float64)
        diff = image - truth_hu
        inside = np.isfinite(diff)
        rmse = float(np.sqrt(np.mean(diff[inside] ** 2))) if inside.any() else float("nan")
        grey = row[0].imshow(truth_hu, cmap="gray", vmin=window[0], vmax=window[1], **style)
        row[1].imshow(image, cmap="gray", vmin=window[0], vmax=window[1], **style)
        difference = row[2].imshow(diff, cmap="RdBu_r", vmin=-difference_window,
                                   vmax=difference_window, **style)
        row[0].set_title("truth", fontsize=9)
        row[1].set_title(f"{name}: reconstruction", fontsize=9)
        row[2].set_title(f"{name}: reconstruction - truth (RMSE {rmse:.1f} HU)", fontsize=9)
    for ax in axes.ravel():  # positions are in the label below; ticks cost a third of the time
        ax.set_axis_off()
    x0, x1, y0, y1 = extent_mm
    axes[-1, 0].annotate(f"x from {x0:g} to {x1:g} mm, y from {y0:g} to {y1:g} mm (y up)",
                         (0, 0), xycoords="axes fraction", xytext=(0, -4),
                         textcoords="offset points", va="top", fontsize=8)
    if grey is not None:
        height = figure.get_figheight()
        low, span = bottom / height, 1 - (top + bottom) / height
        edge = width - right
        for x_in, shown, label in ((edge + 0.25, grey, "HU"),
                                   (edge + 1.1, difference, "difference (HU)")):
            cax = figure.add_axes((x_in / width, low, 0.13 / width, span))
            figure.colorbar(shown, cax=cax, label=label)
    heading = f"grey window {window[0]:g} to {window[1]:g} HU"
    figure.suptitle(f"{title} ({heading})" if title else heading,
                    y=1 - 0.12 / figure.get_figheight(), va="top")
    return finish_figure(figure, path, dpi=DPI)


def draw_profiles(lines: list, path, *, title: str = "") -> Path:
    """Write a PNG of line profiles: the truth and each algorithm along each line, in HU.

    Parameters
    ----------
    lines : list of dict
        One panel per line, top to bottom, each with ``title`` (str), ``position_mm`` (float
        (n,), along the line), ``truth`` (float (n,), HU), ``images`` (dict algorithm ->
        float (n,), HU; NaN where not compared), ``colours`` (dict algorithm -> colour) and
        ``rois`` (list of (name, start_mm, end_mm) the line crosses, shaded).
    path : str or Path
    title : str

    Returns
    -------
    Path
    """
    from simbench.report.figures import finish_figure

    panel, gap, top, bottom = 2.5, 0.55, 0.62, 0.72
    figure, axes = _figure(11.0, top + bottom + len(lines) * panel + (len(lines) - 1) * gap,
                           len(lines), 1, left=0.85, right=0.25, top=top, bottom=bottom,
                           hspace_in=gap)
    for ax, line in zip(axes[:, 0], lines):
        position = np.asarray(line["position_mm"], dtype=np.float64)
        for name, start, end in line.get("rois", []):
            ax.axvspan(start, end, color="0.5", alpha=0.12, lw=0)
            ax.annotate(name, ((start + end) / 2, 1.0), xycoords=("data", "axes fraction"),
                        xytext=(0, -2), textcoords="offset points", ha="center", va="top",
                        fontsize=7, color="0.3")
        for name, values in line["images"].items():
            ax.plot(position, values, lw=0.8, color=line["colours"].get(name), label=name)
        ax.plot(position, line["truth"], lw=1.3, color="black", label="truth")
        ax.set_title(line["title"], fontsize=9)
        ax.set_ylabel("HU")
        ax.margins(x=0)
        ax.grid(alpha=0.3)
    axes[-1, 0].set_xlabel("position along the line (mm)")
    axes[0, 0].legend(loc="best", fontsize=8, ncols=min(6, len(lines[0]["images"]) + 1))
    if title:
        figure.suptitle(title, y=1 - 0.12 / figure.get_figheight(), va="top")
    return finish_figure(figure, path, dpi=DPI)


def draw_curves(series: list, path, *, title: str = "") -> Path | None:
    """Write a PNG of TTF and radial NPS curves, one line per series (algorithm and dose).

    Parameters
    ----------
    series : list of dict
        Each with ``label`` (str), ``colour``, ``linestyle`` and the ``curves`` record of
        metrics.json for one algorithm at one dose: ``ttf`` (``frequency_per_mm``, ``value``,
        ``insert``) and ``nps`` (``frequency_per_mm``, ``value``, ``unit``), either absent.
    path : str or Path
    title : str

    Returns
    -------
    Path or None
        None when no series has either curve (nothing is written).

    Notes
    -----
    The NPS axis is logarithmic when its values above 1e-9 of the largest span more than a
    decade and a half (the zero-frequency sample of a mean-subtracted NPS is zero to rounding
    and is left out of a log axis).
    """
    ttf = [(s, s["curves"]["ttf"]) for s in series if _curve(s["curves"].get("ttf"))]
    nps = [(s, s["curves"]["nps"]) for s in series if _curve(s["curves"].get("nps"))]
    if not ttf and not nps:
        return None
    from simbench.report.figures import finish_figure

    panels = [p for p in (("ttf", ttf), ("nps", nps)) if p[1]]
    figure, axes = _figure(5.5 * len(panels), 4.1, 1, len(panels), left=0.85, right=0.25,
                           top=0.62, bottom=0.72, wspace_in=0.95)
    for ax, (kind, records) in zip(axes[0], panels):
        style = [dict(color=s.get("colour"), ls=s.get("linestyle", "-"), label=s["label"])
                 for s, _ in records]
        if kind == "ttf":
            for (_, record), how in zip(records, style):
                ax.plot(*_arrays(record), lw=1.2, **how)
            for level in (0.5, 0.1):
                ax.axhline(level, color="0.6", lw=0.7, ls=":")
            inserts = sorted({str(r.get("insert")) for _, r in records if r.get("insert")})
            ax.set_title("TTF" + (f" ({', '.join(inserts)} insert)" if inserts else ""),
                         fontsize=9)
            ax.set_ylabel("TTF")
        else:
            values = np.concatenate([_arrays(r)[1] for _, r in records])
            top = float(np.nanmax(values)) if np.isfinite(values).any() else 0.0
            # a mean-subtracted NPS is zero (to rounding) at zero frequency: not a decade
            floor = 1e-9 * top
            shown = values[values > floor]
            log = top > 0 and shown.size > 1 and shown.max() / shown.min() > 10 ** 1.5
            for (_, record), how in zip(records, style):
                f, v = _arrays(record)
                keep = (v > floor) if log else np.isfinite(v)
                ax.plot(f[keep], v[keep], lw=1.2, marker="o", ms=3, **how)
            if log:
                ax.set_yscale("log")
            units = sorted({str(r.get("unit")) for _, r in records if r.get("unit")})
            ax.set_title("radial NPS", fontsize=9)
            ax.set_ylabel("NPS" + (f" ({', '.join(units)})" if units else ""))
        ax.set_xlabel("spatial frequency (1/mm)")
        ax.set_xlim(left=0)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
    if title:
        figure.suptitle(title, y=1 - 0.12 / figure.get_figheight(), va="top")
    return finish_figure(figure, path, dpi=DPI)


#: line styles telling doses apart in figures that show several
DOSE_STYLES = ("-", "--", ":", "-.")


def _curve(record) -> bool:
    """A curve record with matching, non-empty, numeric frequency and value lists."""
    if not isinstance(record, dict):
        return False
    f, v = record.get("frequency_per_mm"), record.get("value")
    if not (isinstance(f, list) and isinstance(v, list) and 0 < len(f) == len(v)):
        return False
    try:
        f, v = np.asarray(f, dtype=np.float64), np.asarray(v, dtype=np.float64)
    except (TypeError, ValueError):
        return False
    return bool((np.isfinite(f) & np.isfinite(v)).any())


def _arrays(record) -> tuple[np.ndarray, np.ndarray]:
    f = np.asarray(record["frequency_per_mm"], dtype=np.float64)
    v = np.asarray(record["value"], dtype=np.float64)
    return f, v
