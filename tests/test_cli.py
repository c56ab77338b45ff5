"""The command line: outputs, sidecars, and one-line errors with exit code 2."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

import simbench
from simbench.cli import main

DISC_PHANTOM = """\
name: disc
dimension: 2
objects:
  - {shape: circle, centre: [10, -5], radius: 40, mu: 0.02 /mm}
"""

PARALLEL_SCANNER = """\
name: small parallel
geometry:
  type: parallel
  dimension: 2
  columns: 101
  column_pitch: 1 mm
  views: 12
  arc: 180 deg
"""


@pytest.fixture()
def disc_files(tmp_path):
    phantom = tmp_path / "disc.yaml"
    phantom.write_text(DISC_PHANTOM)
    scanner = tmp_path / "parallel.yaml"
    scanner.write_text(PARALLEL_SCANNER)
    return phantom, scanner


def test_version_and_help(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["--version"])
    assert stop.value.code == 0
    assert simbench.__version__ in capsys.readouterr().out
    for command in ("trace", "draw", "scan", "spectrum", "list", "demo"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        text = capsys.readouterr().out
        assert "example: simbench " + command in text


def test_trace_writes_exact_disc_sinogram_and_sidecar(disc_files, tmp_path, capsys):
    phantom, scanner = disc_files
    out = tmp_path / "out" / "sino.npy"
    assert main(["trace", str(phantom), str(scanner), "--energy", "60", "-o", str(out)]) == 0
    sino = np.load(out)
    assert sino.dtype == np.float64 and sino.shape == (12, 101)
    # Closed form: the parallel projection of a disc of radius R centred at c is
    # 2 mu sqrt(R^2 - (t - c.u(phi))^2) (chord length of a circle)
    sidecar = json.loads(out.with_suffix(".json").read_text())
    phi = np.asarray(sidecar["geometry"]["angles_rad"])
    t = np.asarray(sidecar["geometry"]["col_u_mm"])
    shift = 10 * np.cos(phi) - 5 * np.sin(phi)
    arg = 40.0**2 - (t[None, :] - shift[:, None]) ** 2
    expected = 2 * 0.02 * np.sqrt(np.clip(arg, 0, None))
    np.testing.assert_allclose(sino, expected, rtol=1e-12, atol=1e-12)
    assert sidecar["energy_kev"] == 60.0
    assert "do not replace acceptance testing" in sidecar["caution"]


def _error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert "Traceback" not in err[0]
    return err[0]


def test_missing_phantom_file(disc_files, tmp_path, capsys):
    _, scanner = disc_files
    code = main(["trace", str(tmp_path / "nope.yaml"), str(scanner), "--energy", "60",
                 "-o", str(tmp_path / "x.npy")])
    assert code == 2
    line = _error_line(capsys)
    assert "nope.yaml" in line and "not found" in line
    assert not (tmp_path / "x.npy").exists()


def test_yaml_syntax_error_names_line(tmp_path, disc_files, capsys):
    _, scanner = disc_files
    bad = tmp_path / "bad.yaml"
    bad.write_text("name: x\ndimension: 2\nobjects:\n  - {shape: circle, radius: 3\n")
    code = main(["trace", str(bad), str(scanner), "--energy", "60", "-o", str(tmp_path / "x.npy")])
    assert code == 2
    line = _error_line(capsys)
    assert "bad.yaml:" in line and "YAML" in line


def test_sdd_not_beyond_sid_is_refused(tmp_path, disc_files, capsys):
    phantom, _ = disc_files
    scanner = tmp_path / "fan.yaml"
    scanner.write_text("name: f\ngeometry:\n  type: fan\n  sid: 500 mm\n  sdd: 400 mm\n"
                       "  columns: 10\n  column_pitch: 1 mm\n  views: 10\n")
    code = main(["trace", str(phantom), str(scanner), "--energy", "60", "-o", str(tmp_path / "x.npy")])
    assert code == 2
    line = _error_line(capsys)
    assert "fan.yaml:5" in line and "sdd" in line


def test_bad_energy_and_output_suffix(disc_files, tmp_path, capsys):
    phantom, scanner = disc_files
    assert main(["trace", str(phantom), str(scanner), "--energy", "-5",
                 "-o", str(tmp_path / "x.npy")]) == 2
    assert "--energy" in _error_line(capsys)
    assert main(["trace", str(phantom), str(scanner), "--energy", "60",
                 "-o", str(tmp_path / "x.txt")]) == 2
    assert ".npy" in _error_line(capsys)


def test_truncating_detector_warns(tmp_path, capsys):
    phantom = tmp_path / "big.yaml"
    phantom.write_text("name: big\ndimension: 2\nobjects:\n"
                       "  - {shape: circle, radius: 200, material: water}\n")
    scanner = tmp_path / "p.yaml"
    scanner.write_text(PARALLEL_SCANNER)
    assert main(["trace", str(phantom), str(scanner), "--energy", "60",
                 "-o", str(tmp_path / "x.npy")]) == 0
    err = capsys.readouterr().err
    assert "warning" in err and "100.0 % of views" in err


def test_real_process_exit_code_and_single_line(tmp_path):
    # A separate interpreter, as a user runs it: exit code 2 and one line, no traceback.
    result = subprocess.run([sys.executable, "-m", "simbench.cli", "draw",
                             str(tmp_path / "missing.yaml"), "-o", str(tmp_path / "m.png")],
                            capture_output=True, text=True)
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and "Traceback" not in result.stderr
    assert "missing.yaml" in result.stderr


def test_list_names_shipped_files(capsys):
    assert main(["list"]) == 0
    out = capsys.readouterr().out
    for name in ("shepp-logan", "water-ellipse-inserts", "cone-beam-3d", "fan-clinical",
                 "cone-flat-panel", "parallel-bench-2d", "water"):
        assert name in out
