"""Scoring one algorithm at one dose: every metric a scenario asks for, over its realizations.

This module decides *which* metric is measured *where* (which ROI, which insert, which mask);
the metrics themselves live in :mod:`simbench.score` and know nothing of scenarios.

Every scalar is reported as an estimate over the realizations (mean, Student-t interval,
standard deviation, the per-realization values) with its unit and the direction in which it
is better (``lower``, ``higher``, or ``zero`` for signed errors), which ``simbench check``
uses to tell a regression from an improvement.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from simbench.geometry.grid import ImageGrid

#: direction in which each metric is better, and its unit
METRIC_INFO = {
    "rmse": ("lower", "1/mm"), "nrmse": ("lower", ""), "mae": ("lower", "1/mm"),
    "psnr": ("higher", "dB"), "ssim": ("higher", ""),
    "mean_hu": ("none", "HU"), "bias_hu": ("zero", "HU"), "std_hu": ("lower", "HU"),
    "cnr": ("higher", ""), "uniformity_hu": ("lower", "HU"), "cupping_percent": ("zero", "%"),
    "ttf_f50_per_mm": ("higher", "1/mm"), "ttf_f10_per_mm": ("higher", "1/mm"),
    "noise_std_hu": ("lower", "HU"), "detectability": ("higher", ""),
    "streak_index_hu": ("lower", "HU"), "reprojection_rmse": ("lower", ""),
    "wall_time_s": ("lower", "s"), "peak_memory_mib": ("lower", "MiB"),
}


@dataclass
class ScoringContext:
    """What scoring needs about the truth: images, ROIs, the field of view, HU scale."""

    truth: np.ndarray            # mu, 1/mm, grid.image_shape
    labels: np.ndarray           # ROI labels, 0 outside every ROI
    grid: ImageGrid
    phantom: object
    rois: dict                   # the scenario's roles: background, edge, noise, centre, periphery
    mu_water: float
    mu_air: float
    fov: np.ndarray              # bool, pixels seen from every view
    task: tuple | None = None    # d' task: (diameter mm, contrast HU); None: the edge insert

    def roi_label(self, name: str) -> int:
        return list(self.phantom.roi_names).index(name) + 1

    def roi_disc(self, name: str) -> tuple[tuple, float, int]:
        """(centre (x, y) mm, radius mm, slice index) of a circular ROI object."""
        objects = self.phantom.objects
        index = int(np.flatnonzero(objects.roi_label == self.roi_label(name))[-1])
        centre = objects.centre[index]
        radius = float(min(objects.half_sizes[index][:2]))
        k = 0
        if self.grid.dimension == 3:
            k = int(np.argmin(np.abs(self.grid.axis_mm("z") - centre[2])))
        return (float(centre[0]), float(centre[1])), radius, k


def _estimate(values, metric: str) -> dict:
    from simbench.score.statistics import mean_confidence_interval

    values = [float(v) for v in values]
    better, unit = METRIC_INFO.get(metric, ("lower", ""))
    if len(values) >= 2:
        e = mean_confidence_interval(values)
        out = {"mean": e.mean, "low": e.low, "high": e.high, "std": e.std, "n": e.n,
               "level": e.level}
    else:
        out = {"mean": values[0], "low": values[0], "high": values[0], "std": 0.0,
               "n": len(values), "level": 0.95}
    out.update(values=values, unit=unit, better=better)
    return out


def _plane(image: np.ndarray, grid: ImageGrid, k: int) -> tuple[np.ndarray, ImageGrid]:
    if grid.dimension == 2:
        return image, grid
    plane = ImageGrid((1,) + tuple(grid.shape[1:]), grid.spacing_mm,
                      (grid.centre_mm[0], grid.centre_mm[1], float(grid.axis_mm("z")[k])), 2)
    return image[k], plane


def _jackknife_estimate(value: float, others: list, metric: str) -> dict:
    from simbench.score.statistics import jackknife_interval

    e = jackknife_interval(value, others)
    better, unit = METRIC_INFO.get(metric, ("lower", ""))
    return {"mean": e.mean, "low": e.low, "high": e.high, "std": e.std, "n": e.n,
            "level": e.level, "interval": "jackknife", "values": [float(value)],
            "leave_one_out": [float(v) for v in others], "unit": unit, "better": better}


def _pooled(stack: list, c: ScoringContext, metrics: tuple) -> tuple[dict, dict]:
    """The metrics measured once from all realizations together: the TTF of the mean image,
    the noise of the noise power spectrum of the deviations from it, and d' from both.

    Returns
    -------
    (dict, dict)
        Metric name -> value (absent when it cannot be measured), and the curves.
    """
    values: dict = {}
    curves: dict = {}
    mean_image = np.mean(stack, axis=0)
    ttf = None
    if ("ttf" in metrics or "detectability" in metrics) and c.rois.get("edge"):
        from simbench.score.resolution import ttf_circular_insert

        centre, radius, k = c.roi_disc(c.rois["edge"])
        plane, plane_grid = _plane(mean_image, c.grid, k)
        ttf = ttf_circular_insert(plane, plane_grid, centre, radius)
        values["ttf_f50_per_mm"] = ttf.f50_per_mm
        values["ttf_f10_per_mm"] = ttf.f10_per_mm
        curves["ttf"] = {"frequency_per_mm": ttf.frequencies_per_mm.tolist(),
                         "value": ttf.values.tolist(), "insert": c.rois["edge"]}
    nps = None
    if ("nps" in metrics or "detectability" in metrics) and c.rois.get("noise") \
            and len(stack) >= 2:
        from simbench.score.noise import noise_power_spectrum, square_roi

        patches = []
        for name in c.rois["noise"]:
            centre, radius, k = c.roi_disc(name)
            size = int(2 * radius / np.sqrt(2) / c.grid.spacing_mm[0])
            if size < 8:
                continue
            for image in stack:
                plane, plane_grid = _plane(image - mean_image, c.grid, k)
                rows, cols = square_roi(plane_grid, centre, size)
                patches.append(1000.0 * plane[rows, cols] / (c.mu_water - c.mu_air))
        if patches:
            nps = noise_power_spectrum(np.stack(patches), c.grid.spacing_mm[:2])
            # mean-subtracted realizations: each deviation carries (n - 1)/n of the variance
            scale = len(stack) / (len(stack) - 1)
            values["noise_std_hu"] = float(np.sqrt(nps.variance * scale))
            curves["nps"] = {"frequency_per_mm": nps.radial_frequencies_per_mm.tolist(),
                             "value": (nps.radial_nps * scale).tolist(), "unit": "HU^2 mm^2"}
    if "detectability" in metrics and ttf is not None and nps is not None:
        from simbench.score.detectability import DiscTask, npw_detectability

        if c.task is not None:
            task = DiscTask(diameter_mm=c.task[0], contrast=c.task[1])
        else:
            centre, radius, k = c.roi_disc(c.rois["edge"])
            contrast = abs(ttf.contrast) if ttf.contrast is not None else 1.0
            task = DiscTask(diameter_mm=2 * radius, contrast=float(
                1000.0 * contrast / (c.mu_water - c.mu_air)))
        values["detectability"] = npw_detectability(task, nps, ttf)
    return {k: v for k, v in values.items() if v is not None and np.isfinite(v)}, curves


def score_realizations(images: list, context: ScoringContext, metrics: tuple, *,
                       wall_times: list, peak_bytes: list,
                       reprojection_errors: list | None = None) -> dict:
    """Every requested metric of one algorithm at one dose.

    Parameters
    ----------
    images : list of float arrays, ``grid.image_shape``
        One reconstruction per realization (mu, 1/mm).
    context : ScoringContext
    metrics : tuple of str
        The scenario's metric names (:data:`simbench.scenario.spec.METRICS`).
    wall_times, peak_bytes : list of float
        Per realization.
    reprojection_errors : list of float, optional
        RMSE of the reprojected image against the exact line integrals, per realization.

    Returns
    -------
    dict
        ``metrics`` (name -> estimate), ``rois`` (ROI name -> statistic -> estimate),
        ``curves`` (name -> arrays for figures).
    """
    from simbench.score import pixels, rois as roi_metrics, streaks

    c = context
    out: dict = {"metrics": {}, "rois": {}, "curves": {}}
    stack = [np.asarray(image, dtype=np.float64) for image in images]

    def add(name: str, values) -> None:
        values = [v for v in values if v is not None and np.isfinite(v)]
        if values:
            out["metrics"][name] = _estimate(values, name)

    for name in ("rmse", "nrmse", "mae", "psnr", "ssim"):
        if name in metrics:
            function = getattr(pixels, name)
            add(name, [function(image, c.truth, mask=c.fov) for image in stack])
    hu = lambda mu: 1000.0 * (mu - c.mu_water) / (c.mu_water - c.mu_air)  # noqa: E731
    if "rois" in metrics and c.phantom.roi_names:
        per_roi: dict = {}
        for image in stack:
            for stat in roi_metrics.roi_statistics(image, c.labels, truth=c.truth,
                                                   mu_water=c.mu_water, mu_air=c.mu_air
                                                   ).values():
                name = c.phantom.roi_names[stat.label - 1]
                entry = per_roi.setdefault(name, {"mean_hu": [], "bias_hu": [], "std_hu": []})
                entry["mean_hu"].append(stat.mean_hu)
                entry["bias_hu"].append(stat.bias_hu)
                entry["std_hu"].append(stat.std_hu)
        background = c.rois.get("background")
        for name, entry in per_roi.items():
            result = {k: _estimate(v, k) for k, v in entry.items() if None not in v}
            if background and name != background:
                result["cnr"] = _estimate([roi_metrics.cnr(image, c.roi_label(name),
                                                           c.roi_label(background), c.labels)
                                           for image in stack], "cnr")
            out["rois"][name] = result
    if "uniformity" in metrics and c.rois.get("centre") and c.rois.get("periphery"):
        centre = c.roi_label(c.rois["centre"])
        periphery = [c.roi_label(n) for n in c.rois["periphery"]]
        add("uniformity_hu", [roi_metrics.uniformity(image, centre, periphery, c.mu_water,
                                                     c.mu_air, c.labels) for image in stack])
        add("cupping_percent", [roi_metrics.cupping(image, centre, periphery, c.labels)
                                for image in stack])
    pooled, curves = _pooled(stack, c, metrics)
    out["curves"].update(curves)
    leave_one_out = [_pooled(stack[:i] + stack[i + 1:], c, metrics)[0]
                     for i in range(len(stack))] if len(stack) >= 3 and pooled else []
    for name, value in pooled.items():
        others = [d.get(name) for d in leave_one_out]
        if others and all(v is not None and np.isfinite(v) for v in others):
            out["metrics"][name] = _jackknife_estimate(value, others, name)
        else:
            add(name, [value])
    if "streaks" in metrics and c.rois.get("edge"):
        centre, radius, k = c.roi_disc(c.rois["edge"])
        from simbench.score.rois import annulus_mask

        ring = annulus_mask(c.grid, centre, radius * 1.5, radius * 4.0) & c.fov
        add("streak_index_hu", [streaks.streak_index(hu(image), hu(c.truth), ring)
                                for image in stack])
    if "projection_error" in metrics and reprojection_errors:
        add("reprojection_rmse", reprojection_errors)
    if "time" in metrics:
        add("wall_time_s", wall_times)
        add("peak_memory_mib", [b / 2**20 for b in peak_bytes])
    return out
