"""Small run folders for the report's tests, built without running a scan: a disc phantom's
truth, labels and noisy reconstructions on a coarse grid, and a metrics record of format
version 1 shaped like the runner's (simbench/execute/run.py)."""

from __future__ import annotations

import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np

MU_WATER, MU_AIR = 0.0206, 2.3e-5  # 1/mm near 60 keV (common practice, rounded)


def estimate(values, better: str, unit: str = "") -> dict:
    """A metrics.json estimate: mean and an interval of +-2 standard errors (not Student-t;
    the report only formats what it is given)."""
    values = [float(v) for v in values]
    n = len(values)
    mean = float(np.mean(values))
    std = float(np.std(values, ddof=1)) if n > 1 else 0.0
    half = 2.0 * std / np.sqrt(n) if n > 1 else 0.0
    return {"mean": mean, "low": mean - half, "high": mean + half, "std": std, "n": n,
            "level": 0.95, "values": values, "unit": unit, "better": better}


def synthetic_run(folder: Path, *, dimension: int = 2, algorithms=("smooth", "sharp"),
                  doses=(1.0, 0.5), realizations: int = 2, curves: bool = True,
                  n: int = 48) -> dict:
    """Write truth/, recon/ and metrics.json into ``folder``; return the metrics record.

    The phantom is a water disc (ROI "water", the background) holding a bone insert (ROI
    "bone", the edge) on the +x side; algorithm k adds noise of 5 (k + 1) / dose HU.
    """
    folder = Path(folder)
    nz = 6 if dimension == 3 else 1
    spacing = 4.0
    axis = (np.arange(n) - (n - 1) / 2) * spacing
    x, y = np.meshgrid(axis, axis)
    body = np.hypot(x, y) < 0.42 * n * spacing
    insert = np.hypot(x - 0.2 * n * spacing, y) < 0.08 * n * spacing
    centre = np.hypot(x, y) < 0.08 * n * spacing
    mu = np.where(body, MU_WATER, MU_AIR)
    mu = np.where(insert, 2.0 * MU_WATER, mu)
    labels = np.where(centre, 1, 0) + np.where(insert, 2, 0)
    if dimension == 3:
        mu = np.broadcast_to(mu, (nz, n, n)).copy()
        labels = np.broadcast_to(labels, (nz, n, n)).copy()
    (folder / "truth").mkdir(parents=True, exist_ok=True)
    np.save(folder / "truth" / "image.npy", mu.astype(np.float32))
    np.save(folder / "truth" / "labels.npy", labels.astype(np.int32))
    rng = np.random.default_rng(3)
    dose_labels = [f"dose-{d:g}" for d in doses]
    scale = 1000.0 / (MU_WATER - MU_AIR)
    record: dict = {}
    for k, name in enumerate(algorithms):
        record[name] = {"reconstructor": "fbp", "origin": "built-in", "stage": "projections",
                        "options": {"filter": name}, "doses": {}}
        for dose, label in zip(doses, dose_labels):
            sigma_hu = 5.0 * (k + 1) / dose
            rmse = []
            for r in range(realizations):
                image = mu + rng.normal(0.0, sigma_hu / scale, mu.shape)
                (folder / "recon" / name / label).mkdir(parents=True, exist_ok=True)
                np.save(folder / "recon" / name / label / f"realization-{r}.npy",
                        image.astype(np.float32))
                rmse.append(float(np.sqrt(np.mean((image - mu) ** 2))))
            entry = {
                "metrics": {
                    "rmse": estimate(rmse, "lower", "1/mm"),
                    "ssim": estimate([0.9 - 0.05 * k] * realizations, "higher"),
                    "cupping_percent": estimate([(-1.0) ** k * (k + 0.5)] * realizations,
                                                "zero", "%"),
                    "peak_memory_mib": estimate([0.0] * realizations, "lower", "MiB"),
                },
                "rois": {
                    "water": {"mean_hu": estimate([1.5] * realizations, "none", "HU"),
                              "bias_hu": estimate([1.5] * realizations, "zero", "HU"),
                              "std_hu": estimate([sigma_hu] * realizations, "lower", "HU")},
                    "bone": {"mean_hu": estimate([990.0] * realizations, "none", "HU"),
                             "bias_hu": estimate([-10.0] * realizations, "zero", "HU"),
                             "std_hu": estimate([sigma_hu] * realizations, "lower", "HU"),
                             "cnr": estimate([990.0 / sigma_hu] * realizations, "higher")},
                },
                "curves": {}, "seeds": [],
            }
            if curves:
                f = np.linspace(0.0, 0.125, 40)
                entry["curves"]["ttf"] = {"frequency_per_mm": f.tolist(),
                                          "value": np.exp(-(f / (0.03 * (k + 1))) ** 2)
                                          .tolist(), "insert": "bone"}
                if realizations >= 2:
                    fr = np.linspace(0.0, 0.125, 8)
                    nps = np.r_[1e-30, sigma_hu ** 2 * 16.0 * fr[1:] / 0.125]
                    entry["curves"]["nps"] = {"frequency_per_mm": fr.tolist(),
                                              "value": nps.tolist(), "unit": "HU^2 mm^2"}
            record[name]["doses"][label] = entry
    metrics = {
        "format_version": 1,
        "scenario": {"name": "synthetic", "file": str(folder / "synthetic.yaml"),
                     "description": "a disc with a bone insert, for the report's tests"},
        "phantom": {"name": "disc", "roi_names": ["water", "bone"]},
        "scanner": {"name": "none"},
        "reference_energy_kev": 60.0,
        "hu_scale": {"mu_water_per_mm": MU_WATER, "mu_air_per_mm": MU_AIR},
        "grid": {"shape": [nz, n, n], "spacing_mm": [spacing] * 3, "centre_mm": [0.0] * 3,
                 "dimension": dimension},
        "doses": dose_labels, "dose_factors": list(doses), "realizations": realizations,
        "seed": 1, "rois": {"background": "water", "edge": "bone", "noise": ["water"]},
        "algorithms": record,
        "run": {"simbench_version": "0", "started": "2026-01-01T00:00:00+0000",
                "timings_s": {"trace": 0.5, "measure": 1.0, "reconstruct": 3.0, "score": 0.2,
                              "report": 0.0}, "wall_time_s": 4.7},
        "caution": "",
    }
    (folder / "metrics.json").write_text(json.dumps(metrics), encoding="utf-8")
    return metrics


class Page(HTMLParser):
    """What the tests read from a report: tags, images, text, and tables as rows of cells
    ``(tag, class, text)``, with each table's own class."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.attrs: list[tuple[str, dict]] = []
        self.declarations: list[str] = []
        self.images: list[dict] = []
        self.texts: list[str] = []
        self.tables: list[dict] = []
        self._cell = None
        self._table = None
        self.feed(text)
        self.close()

    def handle_decl(self, decl):
        self.declarations.append(decl)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        self.attrs.append((tag, attrs))
        if tag == "img":
            self.images.append(attrs)
        elif tag == "table":
            self._table = {"class": attrs.get("class", ""), "rows": []}
            self.tables.append(self._table)
        elif tag == "tr" and self._table is not None:
            self._table["rows"].append([])
        elif tag in ("td", "th") and self._table is not None:
            self._cell = [tag, attrs.get("class", ""), ""]
            self._table["rows"][-1].append(self._cell)

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._cell[2] = " ".join(self._cell[2].split())
            self._cell = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        self.texts.append(data)
        if self._cell is not None:
            self._cell[2] += " " + data

    @property
    def text(self) -> str:
        return " ".join(" ".join(self.texts).split())
