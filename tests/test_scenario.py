"""Scenario files and the run command: bad input in one line, shipped scenarios, a small run.

Check values: the scenario's own settings (what the run must record), the HU scale's
definition (water 0 HU, a fact of the trade), and the same-seed-same-bits rule of the project.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from simbench.cli import main
from simbench.data import shipped_files
from simbench.scenario import load_scenario

SMALL = """\
name: small
phantom: water-ellipse-inserts
scanner:
  name: small fan
  geometry: {type: fan, sid: 575 mm, sdd: 1050 mm, detector_shape: curved, columns: 200,
             column_pitch: 4 mm, views: 180, arc: 360 deg}
  source: {kvp: 120, filtration: [{material: aluminium, thickness: 3 mm}]}
  exposure: {air_counts: 2.0e4}
  detector: {material: Gd2O2S, thickness: 1.4 mm}
grid: {size: 144, voxel_size: 2.5 mm}
seed: 5
realizations: 2
doses: [1.0, 0.5]
algorithms:
  - {name: fbp-hann, use: fbp, options: {filter: hann, water_correction: true}}
metrics: [rmse, ssim, psnr, rois, ttf, nps, detectability, time]
rois: {background: water, edge: cortical bone, noise: [water]}
"""


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("run")
    (folder / "small.yaml").write_text(SMALL)
    assert main(["run", str(folder / "small.yaml"), "-o", str(folder / "out"), "--quiet"]) == 0
    return folder


def test_every_shipped_scenario_is_valid():
    names = shipped_files("scenarios")
    assert {"quickstart", "low-dose", "beam-hardening", "metal", "rings", "scatter",
            "cone-beam", "resolution-noise"} <= set(names)
    for path in names.values():
        scenario = load_scenario(path)
        assert scenario.algorithms and scenario.realizations >= 1


def test_a_run_writes_every_part_of_its_folder(small_run):
    out = small_run / "out"
    from simbench.folders import verify_folder

    verify_folder(out, "run")
    metrics = json.loads((out / "metrics.json").read_text())
    assert metrics["doses"] == ["dose-1", "dose-0.5"] and metrics["realizations"] == 2
    result = metrics["algorithms"]["fbp-hann"]["doses"]["dose-1"]
    for name in ("rmse", "ssim", "psnr", "ttf_f50_per_mm", "noise_std_hu", "detectability",
                 "wall_time_s"):
        assert name in result["metrics"], name
    rmse = result["metrics"]["rmse"]
    assert len(rmse["values"]) == 2 and rmse["low"] <= rmse["mean"] <= rmse["high"]
    # water reads 0 HU by the definition of the scale (within the noise of 2 realizations)
    water = result["rois"]["water"]["mean_hu"]
    assert abs(water["mean"]) < 20
    # half the dose: more noise (quantum noise scales as 1/sqrt(dose), a fact of the trade)
    half = metrics["algorithms"]["fbp-hann"]["doses"]["dose-0.5"]
    assert half["metrics"]["noise_std_hu"]["mean"] > result["metrics"]["noise_std_hu"]["mean"]
    assert [s["identity"] for s in result["seeds"]] == [
        ["run", "small", "dose", "1", "realization", 0],
        ["run", "small", "dose", "1", "realization", 1]]
    for part in ("scenario.resolved.yaml", "truth/image.npy", "truth/labels.npy",
                 "truth/line_integrals.npy", "recon/fbp-hann/dose-0.5/realization-1.npy",
                 "measured/dose-1/realization-0/measured/projections.npy", "report.html"):
        assert (out / part).is_file(), part
    resolved = (out / "scenario.resolved.yaml").read_text()
    assert "reference_energy:" in resolved and "voxel_size" in resolved


def test_same_seed_same_bits(small_run, tmp_path):
    # the identity of every measurement, not the order of execution, keys its random stream:
    # a second run of the same file gives the same images to the bit
    assert main(["run", str(small_run / "small.yaml"), "-o", str(tmp_path / "again"),
                 "--quiet"]) == 0
    for part in ("recon/fbp-hann/dose-1/realization-1.npy",
                 "measured/dose-0.5/realization-0/measured/projections.npy"):
        assert np.array_equal(np.load(small_run / "out" / part), np.load(tmp_path / "again" / part))


BAD = [
    ("unknown algorithm", SMALL.replace("use: fbp,", "use: fbpp,"), "algorithms[0].use",
     "unknown reconstructor"),
    ("unknown metric", SMALL.replace("metrics: [rmse,", "metrics: [rmsd,"), "metrics",
     "unknown metric"),
    ("unknown ROI", SMALL.replace("background: water", "background: bone"), "rois.background",
     "has no ROI"),
    ("option of the wrong type", SMALL.replace("filter: hann", "filter: 3"),
     "algorithms[0].options", "not valid for option 'filter'"),
    ("unknown option", SMALL.replace("filter: hann", "filtre: hann"), "algorithms[0].options",
     "has no option 'filtre'"),
    ("grid over the budget", SMALL.replace("size: 144, voxel_size: 2.5 mm", "size: 4096"),
     "--grid-size", "budget"),
    ("missing phantom file", SMALL.replace("phantom: water-ellipse-inserts",
                                           "phantom: ./nowhere.yaml"), "phantom", "no phantom"),
    ("module path without --allow-code", SMALL.replace("use: fbp,", "use: os.path:join,"),
     "algorithms[0].use", "--allow-code"),
    ("program without --allow-code", SMALL.replace(
        "use: fbp, options: {filter: hann, water_correction: true}", "command: ./prog"),
     "algorithms[0].command", "--allow-code"),
    ("duplicate algorithm", SMALL.replace("metrics:", "  - {name: fbp-hann, use: fbp}\nmetrics:"),
     "algorithms[1].name", "used twice"),
    ("too many realizations", SMALL.replace("realizations: 2", "realizations: 100000"),
     "realizations", "<= 1000"),
    ("bad dose", SMALL.replace("doses: [1.0, 0.5]", "doses: [1.0, -2]"), "doses[1]", ">="),
    ("tolerance of an unknown metric", SMALL + "tolerances: {rmsee: 5 %}\n",
     "tolerances.rmsee", "unknown metric"),
    ("task contrast without a number", SMALL + "detectability_task: {diameter: 5 mm, "
     "contrast: high}\n", "detectability_task.contrast", "not a contrast"),
    ("task diameter out of range", SMALL + "detectability_task: {diameter: 5 m, "
     "contrast: 10 HU}\n", "detectability_task.diameter", "out of range"),
    ("grid beyond the source's path", SMALL.replace("size: 144, voxel_size: 2.5 mm",
                                                    "size: 400, voxel_size: 4 mm"),
     "grid", "source's path"),
    ("task without a contrast", SMALL + "detectability_task: {diameter: 5 mm}\n",
     "detectability_task", "contrast"),
]


@pytest.mark.parametrize("case, text, field, fragment", BAD, ids=[b[0] for b in BAD])
def test_bad_scenarios_end_in_one_line_and_leave_no_run(tmp_path, capsys, case, text, field,
                                                         fragment, monkeypatch):
    monkeypatch.setenv("SIMBENCH_MEMORY_BUDGET", "256 MiB")
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    assert main(["run", str(path), "-o", str(tmp_path / "out"), "--quiet"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1, lines
    assert field in lines[0] and fragment in lines[0] and "(valid:" in lines[0], lines[0]
    if field != "--grid-size":
        assert re.search(r"bad\.yaml:\d+:\d+", lines[0]), lines[0]
    assert not (tmp_path / "out").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out.")]
