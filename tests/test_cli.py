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
    # 2 mu sqrt(R^2 - (t - c.u(phi))^2) (chord length of a circle); tolerance: float64
    # rounding of an exact tracer (common practice)
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
    # closed form: a 200 mm radius disc overfills the 101 x 1 mm detector (half width
    # 50.5 mm) in every view, so every view is truncated
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


MONO_SCANNER = PARALLEL_SCANNER + """\
source:
  energy: 60 keV
exposure:
  air_counts: 1.0e4
"""


def _scan(phantom, scanner, out, *extra):
    return main(["scan", str(phantom), str(scanner), "-o", str(out), *extra])


def test_scan_folder_noise_free_equals_truth(disc_files, tmp_path):
    phantom, _ = disc_files
    scanner = tmp_path / "mono.yaml"
    scanner.write_text(MONO_SCANNER)
    out = tmp_path / "scan"
    assert _scan(phantom, scanner, out, "--noise-free") == 0
    record = json.loads((out / "scan.json").read_text())
    assert record["truth"]["reference_energy_kev"] == 60.0
    assert record["seed"]["noise"] is False
    truth = np.load(out / "truth" / "line_integrals.npy")
    projections = np.load(out / "measured" / "projections.npy")
    # Beer-Lambert with air calibration (fact of the trade): ln(flat / counts) is the line
    # integral; the stored projections are float32, so compare at float32 precision.
    np.testing.assert_allclose(projections, truth, rtol=1e-6, atol=1e-6)
    for name in ("counts", "flat", "dark"):
        assert (out / "measured" / f"{name}.npy").exists()


def test_scan_same_seed_same_bits_other_seed_differs(disc_files, tmp_path):
    phantom, _ = disc_files
    scanner = tmp_path / "mono.yaml"
    scanner.write_text(MONO_SCANNER)
    runs = {}
    for name, seed in (("a", "5"), ("b", "5"), ("c", "6")):
        assert _scan(phantom, scanner, tmp_path / name, "--seed", seed) == 0
        runs[name] = np.load(tmp_path / name / "measured" / "counts.npy")
    assert np.array_equal(runs["a"], runs["b"])
    assert not np.array_equal(runs["a"], runs["c"])


def test_scan_bad_kvp_is_one_line_exit_2(disc_files, tmp_path, capsys):
    phantom, _ = disc_files
    scanner = tmp_path / "tube.yaml"
    scanner.write_text(PARALLEL_SCANNER + "source:\n  kvp: 20\nexposure:\n  air_counts: 1.0e4\n")
    assert _scan(phantom, scanner, tmp_path / "out") == 2
    line = _error_line(capsys)
    # kVp 20 is below the tube model's 40 to 150 kV (tests/test_spectra.py); line 10,
    # column 8 is the value "20" in the text written above (counted by hand)
    assert "tube.yaml:10:8" in line and "kvp" in line
    assert not (tmp_path / "out" / "scan.json").exists()


def test_scan_without_source_section(disc_files, tmp_path, capsys):
    phantom, scanner = disc_files
    assert _scan(phantom, scanner, tmp_path / "out") == 2
    assert "source" in _error_line(capsys)


def test_spectrum_command_prints_beam_quality(tmp_path, capsys):
    out = tmp_path / "spectrum.png"
    assert main(["spectrum", "fan-clinical", "-o", str(out)]) == 0
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    text = capsys.readouterr().out
    assert "mean energy" in text and "mm Al" in text and "in water" in text


def test_spectrum_file_source_is_read_beside_the_scanner_and_filtered(disc_files, tmp_path,
                                                                       capsys):
    phantom, _ = disc_files
    rows = "\n".join(f"{e:.1f} {1.0 + 0.01 * e:.4f}" for e in np.arange(20.0, 100.0, 1.0))
    (tmp_path / "beam.txt").write_text("# energy keV, relative fluence\n" + rows + "\n")
    scanner = tmp_path / "file-source.yaml"
    scanner.write_text(PARALLEL_SCANNER + "source:\n  spectrum_file: beam.txt\n  filtration:\n"
                       "    - {material: aluminium, thickness: 2 mm}\nexposure:\n"
                       "  air_counts: 1.0e5\n")
    assert main(["spectrum", str(scanner), "-o", str(tmp_path / "s.png")]) == 0
    assert "mm Al" in capsys.readouterr().out
    out = tmp_path / "scan"
    assert _scan(phantom, scanner, out, "--noise-free") == 0
    record = json.loads((out / "scan.json").read_text())
    energies = np.asarray(record["measurement"]["energies_kev"])
    detected = np.asarray(record["measurement"]["detected_air_photons_per_bin"])
    # The file's relative fluence through 2 mm of aluminium (Beer-Lambert, mu from the
    # materials module), normalised to the air counts: the filter must have been applied once.
    from simbench.materials import get_material, mu_table

    want = (1.0 + 0.01 * energies) * np.exp(-2.0 * mu_table([get_material("aluminium")],
                                                            energies)[0])
    # rtol: float64 rounding of the same products (common practice)
    np.testing.assert_allclose(detected / detected.sum(), want / want.sum(), rtol=1e-9)


def test_scan_too_large_for_memory_is_refused(disc_files, tmp_path, capsys, monkeypatch):
    # A scan whose estimated memory exceeds what the machine has ends with one line and
    # exit code 2 rather than being killed half way (the machine is made to look small).
    import simbench.budget as budget_module

    monkeypatch.delenv("SIMBENCH_MEMORY_BUDGET", raising=False)
    monkeypatch.setattr(budget_module, "available_memory_bytes", lambda: 100_000)
    phantom, _ = disc_files
    scanner = tmp_path / "mono.yaml"
    scanner.write_text(MONO_SCANNER)
    assert _scan(phantom, scanner, tmp_path / "out") == 2
    line = _error_line(capsys)
    assert "KiB" in line and "fewer rows or columns" in line and "budget" in line
    assert not (tmp_path / "out" / "scan.json").exists()


def test_voxel_phantom_traces_like_the_analytic_square(tmp_path):
    # A 40 x 40 mm square of 1 mm water voxels (label 1) and the analytic 40 x 40 mm water
    # rectangle have the same exact line integrals: Siddon's method is exact for the voxel
    # model, and a voxel square is the rectangle (closed form: chord lengths of a square).
    labels = np.zeros((60, 60), dtype=np.int32)
    labels[10:50, 10:50] = 1
    np.save(tmp_path / "labels.npy", labels)
    (tmp_path / "voxels.yaml").write_text(
        "name: voxel square\ndimension: 2\nvoxels:\n  file: labels.npy\n  voxel_size: 1 mm\n"
        "  labels: {1: water}\n")
    (tmp_path / "square.yaml").write_text(
        "name: square\ndimension: 2\nobjects:\n"
        "  - {shape: rectangle, size: [40, 40], material: water}\n")
    scanner = tmp_path / "parallel.yaml"
    scanner.write_text(PARALLEL_SCANNER.replace("column_pitch: 1 mm", "column_pitch: 0.7 mm"))
    for name in ("voxels", "square"):
        assert main(["trace", str(tmp_path / f"{name}.yaml"), str(scanner), "--energy", "70",
                     "-o", str(tmp_path / f"{name}.npy")]) == 0
    voxel, analytic = np.load(tmp_path / "voxels.npy"), np.load(tmp_path / "square.npy")
    # not vacuous: a 40 mm water chord at 70 keV is about 40 x 0.0193 /mm = 0.77 (water
    # 0.193 cm^2/g at 70 keV, xraylib CS_Total_CP)
    assert analytic.max() > 0.5
    # tolerance: float64 rounding of exact path lengths summed voxel by voxel (common practice)
    np.testing.assert_allclose(voxel, analytic, rtol=1e-9, atol=1e-12)


def test_scan_in_blocks_equals_scan_in_one_block(disc_files, tmp_path):
    # Noise-free, a scan measured block by block (flat and dark of the first block, detector
    # lag carried over) must equal the same scan measured in one block, to the last bit.
    from simbench.execute.scan import run_scan
    from simbench.phantom import load_phantom
    from simbench.scanner import load_scanner

    phantom_path, _ = disc_files
    scanner_path = tmp_path / "lagging.yaml"
    scanner_path.write_text(PARALLEL_SCANNER + "source:\n  kvp: 80\n  filtration:\n"
                            "    - {material: aluminium, thickness: 2 mm}\nexposure:\n"
                            "  air_counts: 1.0e4\ndetector:\n  lag: 0.05\n  blur: 1.5 mm\n"
                            "  gain_spread: 0.01\n  dark_level: 30\n")
    phantom, scanner = load_phantom(phantom_path), load_scanner(scanner_path)
    from simbench.errors import InputWarning

    for name, views in (("one", 12), ("blocks", 5)):
        # the disc reaches the last column in some views: the truncation warning is expected
        with pytest.warns(InputWarning, match="does not cover"):
            run_scan(phantom, scanner, tmp_path / name, noise=False, block_views=views)
    for name in ("measured/counts", "measured/projections", "measured/flat", "measured/dark",
                 "truth/line_integrals", "truth/path_lengths"):
        one = np.load(tmp_path / "one" / f"{name}.npy")
        blocks = np.load(tmp_path / "blocks" / f"{name}.npy")
        assert np.array_equal(one, blocks), name
    record = json.loads((tmp_path / "blocks" / "scan.json").read_text())
    assert record["measurement"]["blocks"]["count"] == 3
