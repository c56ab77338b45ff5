"""The human report of a run (simbench/report/run_report.py): one self-contained HTML5 page,
every figure an embedded PNG, the caution in view, every algorithm and metric shown with the
best mean marked, and a page (never a traceback) when parts of a run are missing."""

from __future__ import annotations

import base64
import io
import json
import struct

import numpy as np
import pytest

import simbench
from simbench.report.run_report import write_report
from report_builders import MU_AIR, MU_WATER, Page, synthetic_run

# PNG signature and IHDR layout: PNG specification (ISO/IEC 15948:2003, W3C), sections 5.2
# and 11.2.2: 8 signature bytes, then the IHDR chunk whose data starts with the big-endian
# width and height at bytes 16 to 24 of the file.
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

SMALL_SCENARIO = """\
name: report-check
description: two FBP filters at two doses on a coarse grid, for the report's tests
phantom: water-ellipse-inserts
scanner:
  name: coarse fan beam
  geometry: {type: fan, sid: 575 mm, sdd: 1050 mm, detector_shape: curved, columns: 220,
             column_pitch: 2.0 mm, views: 120, arc: 360 deg}
  source: {kvp: 120, filtration: [{material: aluminium, thickness: 3.0 mm}]}
  exposure: {air_counts: 2.0e5}
  detector: {material: Gd2O2S, thickness: 1.4 mm}
grid: {size: 160, voxel_size: 2.5 mm}
seed: 7
realizations: 2
doses: [1.0, 0.5]
algorithms:
  - {name: fbp-ramp, use: fbp, options: {filter: ramp, water_correction: true}}
  - {name: fbp-hann, use: fbp, options: {filter: hann, water_correction: true}}
metrics: [rmse, ssim, psnr, rois, ttf, nps, detectability, time]
rois: {background: water, edge: cortical bone, noise: [water]}
"""


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    """A real run through the command line: 2 algorithms x 2 doses x 2 realizations."""
    from simbench.cli import main

    folder = tmp_path_factory.mktemp("run")
    scenario = folder / "report-check.yaml"
    scenario.write_text(SMALL_SCENARIO, encoding="utf-8")
    out = folder / "out"
    assert main(["run", str(scenario), "-o", str(out), "--quiet"]) == 0
    metrics = json.loads((out / "metrics.json").read_text(encoding="utf-8"))
    html_text = (out / "report.html").read_bytes().decode("utf-8")  # valid UTF-8 or fails
    return out, metrics, html_text, Page(html_text)


def _png(src: str) -> bytes:
    prefix = "data:image/png;base64,"
    assert src.startswith(prefix), src[:60]
    return base64.b64decode(src[len(prefix):], validate=True)


def _check_png(data: bytes) -> np.ndarray:
    """A valid PNG: signature, IHDR size, and pixels decoded by matplotlib that are not blank."""
    import matplotlib.image

    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])
    pixels = matplotlib.image.imread(io.BytesIO(data), format="png")
    assert pixels.shape[:2] == (height, width) and pixels.shape[2] in (3, 4)
    assert float(np.std(pixels[..., :3])) > 0.01  # not a blank canvas
    return pixels


def _metrics_tables(page: Page) -> list[dict]:
    return [t for t in page.tables if t["class"] == "metrics"]


def _marked(table: dict) -> dict:
    """metric key -> algorithms whose cell is marked best, from one metrics table."""
    header = [cell[2] for cell in table["rows"][0]]
    algorithms = header[3:]
    out = {}
    for row in table["rows"][1:]:
        key = row[0][2].split()[-1]  # the label ends with the metric's key
        out[key] = {a for a, cell in zip(algorithms, row[3:]) if "best" in cell[1].split()}
    return out


def _expected_best(entries: dict, better: str) -> set:
    means = {a: e["mean"] for a, e in entries.items()}
    if len(means) < 2 or better not in ("lower", "higher", "zero") or \
            len(set(means.values())) == 1:
        return set()
    key = {"lower": lambda v: v, "higher": lambda v: -v, "zero": abs}[better]
    top = min(key(v) for v in means.values())
    return {a for a, v in means.items() if np.isclose(key(v), top, rtol=1e-12, atol=0.0)}


# ------------------------------------------------------------------------------------------
# A real run
# ------------------------------------------------------------------------------------------


def test_report_is_one_self_contained_html5_page(small_run):
    out, metrics, text, page = small_run
    # HTML5: the doctype, a declared UTF-8 charset (HTML Living Standard, "the meta element")
    assert text.startswith("<!DOCTYPE html>")
    assert [d.lower() for d in page.declarations] == ["doctype html"]
    assert any(tag == "meta" and attrs.get("charset", "").lower() == "utf-8"
               for tag, attrs in page.attrs)
    assert "html" in page.tags and "title" in page.tags
    # nothing to run and nothing to fetch
    for tag in ("script", "link", "iframe", "object", "embed", "base"):
        assert tag not in page.tags
    for tag, attrs in page.attrs:
        for name in ("src", "href", "srcset", "action", "data"):
            value = attrs.get(name)
            if value is not None:
                assert value.startswith(("data:image/png;base64,", "#")), (tag, name)
    assert "http://" not in text and "https://" not in text
    assert any(tag == "meta" and attrs.get("http-equiv") == "Content-Security-Policy"
               and "default-src 'none'" in attrs.get("content", "")
               for tag, attrs in page.attrs)


def test_every_image_is_an_embedded_png(small_run):
    out, metrics, text, page = small_run
    figures = sorted((out / "figures").glob("*.png"))
    # per dose: images and profiles; for the run: TTF and NPS
    assert len(page.images) == 2 * len(metrics["doses"]) + 1 == len(figures)
    embedded = sorted(_png(img["src"]) for img in page.images)
    assert embedded == sorted(f.read_bytes() for f in figures)
    for img in page.images:
        assert img.get("alt")
        _check_png(_png(img["src"]))


def test_caution_names_and_run_facts_are_shown(small_run):
    out, metrics, text, page = small_run
    assert " ".join(simbench.CAUTION.split()) in page.text
    for name, record in metrics["algorithms"].items():
        assert name in page.text
        for dose in record["doses"].values():
            for key in dose["metrics"]:
                assert key in page.text
            for roi in dose["rois"]:
                assert roi in page.text
    for fact in ("report-check", "water-ellipse-inserts", "coarse fan beam", "dose factor 0.5",
                 f"{metrics['reference_energy_kev']:g} keV", "160 x 160 pixels of 2.5 x 2.5 mm"):
        assert fact in page.text
    # the run records the report's own time after writing it
    assert metrics["run"]["timings_s"]["report"] > 0


def test_best_mean_of_each_metric_is_marked(small_run):
    out, metrics, text, page = small_run
    tables = _metrics_tables(page)
    assert len(tables) == len(metrics["doses"])
    checked = 0
    for dose, table in zip(metrics["doses"], tables):
        marked = _marked(table)
        names = {k for a in metrics["algorithms"].values() for k in a["doses"][dose]["metrics"]}
        assert set(marked) == names
        for key in names:
            entries = {a: r["doses"][dose]["metrics"][key]
                       for a, r in metrics["algorithms"].items()
                       if key in r["doses"][dose]["metrics"]}
            better = next(iter(entries.values()))["better"]
            assert marked[key] == _expected_best(entries, better), (dose, key)
            checked += bool(marked[key])
    assert checked >= 4  # rmse, ssim, psnr at least, at two doses


def test_roi_tables_show_the_runs_numbers(small_run):
    # the source of every value is the run's own metrics.json; the report shows HU to 0.1
    out, metrics, text, page = small_run
    roi_tables = [t for t in page.tables if t["class"] == "rois"]
    assert len(roi_tables) == len(metrics["doses"]) * len(metrics["algorithms"])
    header = [cell[2] for cell in roi_tables[0]["rows"][0]]
    assert header == ["ROI", "truth (HU)", "mean (HU)", "bias (HU)", "noise (HU)", "CNR"]
    # metrics.json sorts its keys; the page follows the scenario's order
    header = [cell[2] for cell in _metrics_tables(page)[0]["rows"][0]]
    assert header[3:] == ["fbp-ramp", "fbp-hann"]
    first = roi_tables[0]
    record = metrics["algorithms"]["fbp-ramp"]["doses"][metrics["doses"][0]]["rois"]
    rows = {name: row for row in first["rows"][1:] for name in record
            if row[0][2] == name or row[0][2].startswith(name + " ")}
    assert set(rows) == set(record)
    bone = rows["cortical bone"]
    stats = record["cortical bone"]
    assert bone[2][2].split()[0] == f"{stats['mean_hu']['mean']:.1f}"
    assert bone[3][2].split()[0] == f"{stats['bias_hu']['mean']:.1f}"
    assert bone[1][2] == f"{stats['mean_hu']['mean'] - stats['bias_hu']['mean']:.1f}"


# ------------------------------------------------------------------------------------------
# Missing pieces and odd runs: a page, never a traceback
# ------------------------------------------------------------------------------------------


def test_three_d_run_with_one_algorithm_and_one_realization(tmp_path):
    metrics = synthetic_run(tmp_path, dimension=3, algorithms=("only",), doses=(1.0,),
                            realizations=1, curves=False)
    page = Page(write_report(tmp_path, metrics).read_text(encoding="utf-8"))
    assert "central slice" in page.text
    assert "one value, no interval" in page.text
    assert "No TTF or NPS in this run" in page.text
    assert "field of view could not be read back" in page.text  # no scenario.resolved.yaml
    assert len(page.images) == 2  # images and profiles
    for img in page.images:
        _check_png(_png(img["src"]))
    assert not any(_marked(t)[k] for t in _metrics_tables(page) for k in _marked(t))


def test_best_follows_the_direction_and_skips_ties(tmp_path):
    metrics = synthetic_run(tmp_path, curves=True)
    page = Page(write_report(tmp_path, metrics).read_text(encoding="utf-8"))
    for table in _metrics_tables(page):
        marked = _marked(table)
        assert marked["rmse"] == {"smooth"}            # lower: less noise
        assert marked["ssim"] == {"smooth"}            # higher: 0.90 against 0.85
        assert marked["cupping_percent"] == {"smooth"}  # closer to zero: 0.5 against -1.5
        assert marked["peak_memory_mib"] == set()      # all equal: nothing to mark
    # RMSE is shown in HU: 1000 * rmse / (mu_water - mu_air), ARCHITECTURE.md's HU
    rmse = metrics["algorithms"]["smooth"]["doses"]["dose-1"]["metrics"]["rmse"]["mean"]
    row = next(r for r in _metrics_tables(page)[0]["rows"] if r[0][2].endswith("rmse"))
    shown = float(row[3][2].split()[0])
    assert shown == pytest.approx(1000 * rmse / (MU_WATER - MU_AIR), rel=1e-3)
    assert len(page.images) == 5
    for img in page.images:
        _check_png(_png(img["src"]))


def test_missing_and_misshapen_reconstructions_are_named(tmp_path):
    metrics = synthetic_run(tmp_path, doses=(1.0,))
    (tmp_path / "recon" / "sharp" / "dose-1" / "realization-0.npy").unlink()
    np.save(tmp_path / "recon" / "smooth" / "dose-1" / "realization-0.npy", np.zeros((3, 3)))
    page = Page(write_report(tmp_path, metrics).read_text(encoding="utf-8"))
    assert "No readable reconstruction at this dose" in page.text
    assert "recon/sharp/dose-1/realization-0.npy" in page.text
    assert "recon/smooth/dose-1/realization-0.npy" in page.text


@pytest.mark.parametrize("metrics", [
    {},
    {"algorithms": "none", "doses": "dose-1", "grid": {"shape": [1, 0, 4]}, "run": []},
    {"algorithms": {"a": {"doses": {"dose-1": {"metrics": {"rmse": "bad", "ssim": {}},
                                               "rois": {"water": {"mean_hu": 3}},
                                               "curves": {"ttf": {"frequency_per_mm": [None],
                                                                  "value": [1]},
                                                          "nps": None}}}}},
     "doses": ["dose-1"], "hu_scale": {"mu_water_per_mm": 0.0, "mu_air_per_mm": 0.0},
     "run": {"timings_s": {"trace": "x", "score": -1, "reconstruct": float("nan")}}},
], ids=["empty", "wrong kinds", "broken entries"])
def test_a_damaged_record_still_gives_a_page(tmp_path, metrics):
    page = Page(write_report(tmp_path, metrics).read_text(encoding="utf-8"))
    assert " ".join(simbench.CAUTION.split()) in page.text
    assert page.images == []


def test_names_are_escaped(tmp_path):
    metrics = synthetic_run(tmp_path, algorithms=("a<b>&c", "plain"), doses=(1.0,),
                            curves=False)
    text = write_report(tmp_path, metrics).read_text(encoding="utf-8")
    page = Page(text)
    assert "a<b>&c" in page.text
    assert "b" not in page.tags
    assert "a&lt;b&gt;&amp;c" in text
