"""Every bad input named by the acceptance lists ends as one line with exit code 2.

Each case writes a small phantom and scanner, runs the command line in-process and checks:
exit code 2, exactly one line on standard error, no traceback, and the line names the file,
the line and column, and the field, and says what would be valid.
"""

from __future__ import annotations

import re

import pytest

from simbench.cli import main

PHANTOM = """\
name: case
dimension: 2
objects:
  - {shape: circle, radius: 40, material: water}
"""

SCANNER = """\
name: case
geometry:
  type: parallel
  dimension: 2
  columns: 64
  column_pitch: 2 mm
  views: 8
source:
  energy: 60 keV
exposure:
  air_counts: 1.0e4
"""

# (case, file to corrupt, text, expected line number, expected field fragment)
# Expected line numbers are those of the texts written here, counted by hand (1-based); a
# YAML syntax error in a flow mapping left open is reported at the end of the text (line 5).
PHANTOM_CASES = [
    ("yaml syntax", "name: case\ndimension: 2\nobjects:\n  - {shape: circle, radius: 3\n", 5, None),
    ("unknown shape", PHANTOM.replace("circle", "hexagon"), 4, "shape"),
    ("missing field", PHANTOM.replace("radius: 40, ", ""), 4, "radius"),
    ("extra field", PHANTOM.replace("radius: 40,", "radius: 40, colour: red,"), 4, "colour"),
    ("zero size", PHANTOM.replace("radius: 40", "radius: 0"), 4, "radius"),
    ("negative size", PHANTOM.replace("radius: 40", "radius: -4"), 4, "radius"),
    ("mu without units", PHANTOM.replace("material: water", "mu: 0.02"), 4, "mu"),
    ("unknown material", PHANTOM.replace("water", "watr"), 4, "material"),
    ("3-D shape in 2-D", PHANTOM.replace("circle", "sphere"), 4, "shape"),
    ("NaN", PHANTOM.replace("radius: 40", "radius: .nan"), 4, "radius"),
    ("inf", PHANTOM.replace("radius: 40", "radius: .inf"), 4, "radius"),
]

# Out-of-range values against the project's stated limits: tube model 40 to 150 kV,
# attenuation tables 1 to 800 keV (simbench.materials.VALID_ENERGY_RANGE_KEV), at most
# MAX_THRESHOLDS = 8 photon-counting thresholds.
SCANNER_CASES = [
    ("SDD <= SID", SCANNER.replace("type: parallel\n  dimension: 2",
                                   "type: fan\n  sid: 500 mm\n  sdd: 500 mm"), 5, "sdd"),
    ("zero views", SCANNER.replace("views: 8", "views: 0"), 7, "views"),
    ("negative filter thickness", SCANNER.replace(
        "energy: 60 keV", "kvp: 100\n  filtration:\n    - {material: aluminium, thickness: -1 mm}"),
        11, "thickness"),
    ("kVp out of range", SCANNER.replace("energy: 60 keV", "kvp: 300"), 9, "kvp"),
    ("energy outside the tables", SCANNER.replace("energy: 60 keV", "energy: 5000 keV"), 9, "energy"),
    ("zero exposure", SCANNER.replace("air_counts: 1.0e4", "air_counts: 0"), 11, "air_counts"),
    ("negative exposure", SCANNER.replace("air_counts: 1.0e4", "air_counts: -5"), 11, "air_counts"),
    ("too many thresholds", SCANNER.replace("energy: 60 keV", "kvp: 120") + (
        "detector:\n  type: photon-counting\n  thresholds: [20, 30, 40, 50, 60, 70, 80, 90, 100]\n"),
        14, "thresholds"),
    ("thresholds not increasing", SCANNER.replace("energy: 60 keV", "kvp: 120") + (
        "detector:\n  type: photon-counting\n  thresholds: [20, 50, 40]\n"), 14, "thresholds"),
]


def _run(tmp_path, phantom_text, scanner_text, command):
    phantom = tmp_path / "phantom.yaml"
    scanner = tmp_path / "scanner.yaml"
    phantom.write_text(phantom_text)
    scanner.write_text(scanner_text)
    if command == "trace":
        argv = ["trace", str(phantom), str(scanner), "--energy", "60", "-o", str(tmp_path / "p.npy")]
    else:
        argv = ["scan", str(phantom), str(scanner), "-o", str(tmp_path / "scan")]
    return main(argv)


def _check(capsys, file_name, line, field):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    text = err[0]
    assert "Traceback" not in text
    assert re.search(rf"{file_name}:{line}:\d+", text), text
    if field is not None:
        assert field in text, text
    assert "(valid:" in text, text


@pytest.mark.parametrize("case,text,line,field", PHANTOM_CASES, ids=[c[0] for c in PHANTOM_CASES])
def test_bad_phantom(tmp_path, capsys, case, text, line, field):
    assert _run(tmp_path, text, SCANNER, "trace") == 2
    _check(capsys, "phantom.yaml", line, field)
    assert not (tmp_path / "p.npy").exists()


@pytest.mark.parametrize("case,text,line,field", SCANNER_CASES, ids=[c[0] for c in SCANNER_CASES])
def test_bad_scanner(tmp_path, capsys, case, text, line, field):
    assert _run(tmp_path, PHANTOM, text, "scan") == 2
    _check(capsys, "scanner.yaml", line, field)
    assert not (tmp_path / "scan" / "scan.json").exists()


def test_missing_files(tmp_path, capsys):
    assert main(["trace", str(tmp_path / "none.yaml"), "parallel-bench-2d", "--energy", "60",
                 "-o", str(tmp_path / "p.npy")]) == 2
    assert "none.yaml" in capsys.readouterr().err
    (tmp_path / "phantom.yaml").write_text(PHANTOM)
    assert main(["scan", str(tmp_path / "phantom.yaml"), str(tmp_path / "none.yaml"),
                 "-o", str(tmp_path / "scan")]) == 2
    assert "none.yaml" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------
# Files that are not files, deep nesting, long numbers, bad bytes (the reading limits of
# simbench/spec.py), command-line options and outputs that cannot be written
# ------------------------------------------------------------------------------------------

def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert "Traceback" not in err[0] and "(valid:" in err[0], err[0]
    return err[0]


def test_devices_and_pipes_are_refused_without_reading(tmp_path, capsys):
    import os

    fifo = tmp_path / "phantom.fifo"
    os.mkfifo(fifo)  # reading it would block for ever
    for path in ("/dev/zero", str(fifo)):
        assert main(["draw", path, "-o", str(tmp_path / "p.png")]) == 2
        assert "not a regular file" in _one_line(capsys)


@pytest.mark.parametrize("case, text, line, fragment", [
    # 65 nested lists: one more than simbench.spec.MAX_YAML_DEPTH; column 65 of line 4 is the
    # 65th bracket of the text written here (counted: 2 spaces and "- " before the first)
    ("deep nesting", PHANTOM + "  - " + "[" * 100 + "]" * 100 + "\n", 5, "nested more than"),
    ("long number", PHANTOM.replace("radius: 40", "radius: 4" + "0" * 300), 4, "characters"),
    ("bad bytes", PHANTOM.replace("water", "wat\udcffr"), 4, "not UTF-8"),
])
def test_unreadable_text_names_its_line(tmp_path, capsys, case, text, line, fragment):
    path = tmp_path / "phantom.yaml"
    path.write_bytes(text.encode("utf-8", "surrogateescape"))
    assert main(["draw", str(path), "-o", str(tmp_path / "p.png")]) == 2
    text = _one_line(capsys)
    assert re.search(rf"phantom.yaml:{line}:\d+", text) and fragment in text, text


def test_an_integer_beyond_float64_is_out_of_range_not_a_traceback(tmp_path, capsys):
    # 10^400 exceeds the largest float64 (about 1.8e308, IEEE 754)
    path = tmp_path / "phantom.yaml"
    path.write_text(PHANTOM.replace("radius: 40", "radius: 1" + "0" * 60))
    assert main(["draw", str(path), "-o", str(tmp_path / "p.png")]) == 2
    assert "radius" in _one_line(capsys)


@pytest.mark.parametrize("option, value", [
    ("--energy", "1e6"), ("--energy", "0.5"), ("--energy", "60 MeV"), ("--energy", "nan"),
    ("--energy", "1" + "0" * 400),
])
def test_energies_outside_the_attenuation_tables(tmp_path, capsys, option, value):
    # the tables cover 1 to 800 keV (simbench.materials.attenuation.VALID_ENERGY_RANGE_KEV)
    (tmp_path / "phantom.yaml").write_text(PHANTOM)
    assert main(["trace", str(tmp_path / "phantom.yaml"), "parallel-bench-2d", option, value,
                 "-o", str(tmp_path / "p.npy")]) == 2
    assert "--energy" in _one_line(capsys)
    assert not (tmp_path / "p.npy").exists()


@pytest.mark.parametrize("value", ["0", "-3", "100000", "1e9", "many"])
def test_pixels_out_of_range(tmp_path, capsys, value):
    assert main(["draw", "water-cylinder", "--pixels", value, "-o", str(tmp_path / "p.png")]) == 2
    assert "--pixels" in _one_line(capsys)


def test_memory_budget_option_is_checked_and_applied(tmp_path, capsys):
    assert main(["draw", "water-cylinder", "--memory-budget", "lots", "-o",
                 str(tmp_path / "p.png")]) == 2
    assert "--memory-budget" in _one_line(capsys)
    assert main(["draw", "water-cylinder", "--pixels", "2048", "--memory-budget", "16 MiB",
                 "-o", str(tmp_path / "p.png")]) == 2
    line = _one_line(capsys)
    assert "--pixels" in line and "budget of 16 MiB" in line
    assert not (tmp_path / "p.png").exists()


@pytest.mark.parametrize("target", [
    "under-a-file/p.npy",  # a path through a regular file
    "/proc/simbench-test/p.npy",  # a system folder no one can create folders in
])
def test_outputs_that_cannot_be_written(tmp_path, capsys, target):
    (tmp_path / "under-a-file").write_text("a file")
    (tmp_path / "phantom.yaml").write_text(PHANTOM)
    out = target if target.startswith("/") else str(tmp_path / target)
    assert main(["trace", str(tmp_path / "phantom.yaml"), "parallel-bench-2d", "--energy",
                 "60", "-o", out]) == 2
    line = _one_line(capsys)
    assert out in line and "cannot write here" in line, line


def test_a_scan_into_a_folder_the_user_owns_is_refused(tmp_path, capsys):
    (tmp_path / "phantom.yaml").write_text(PHANTOM)
    (tmp_path / "scanner.yaml").write_text(SCANNER)
    (tmp_path / "thesis").mkdir()
    (tmp_path / "thesis" / "chapter1.tex").write_text("years of work")
    assert main(["scan", str(tmp_path / "phantom.yaml"), str(tmp_path / "scanner.yaml"),
                 "-o", str(tmp_path / "thesis")]) == 2
    assert "refusing to replace" in _one_line(capsys)
    assert (tmp_path / "thesis" / "chapter1.tex").read_text() == "years of work"


def test_characters_yaml_forbids_are_named_by_line_and_column(tmp_path, capsys):
    # YAML 1.1 allows no C0 control characters but tab and newline (YAML spec, section 5.1);
    # the DEL character sits on line 4, column 29 of the text written here (counted by hand)
    path = tmp_path / "phantom.yaml"
    path.write_text(PHANTOM.replace("radius: 40", "radius: 4\x7f"))
    assert main(["draw", str(path), "-o", str(tmp_path / "p.png")]) == 2
    line = _one_line(capsys)
    assert "phantom.yaml:4:" in line and "U+007F" in line, line


def test_deep_flow_nesting_is_refused_in_linear_time(tmp_path, capsys):
    # 20000 nested brackets: refused from the raw text before the parser sees them
    path = tmp_path / "phantom.yaml"
    path.write_text(PHANTOM + "  - " + "[" * 20000 + "]" * 20000 + "\n")
    assert main(["draw", str(path), "-o", str(tmp_path / "p.png")]) == 2
    assert "nested more than 64 deep" in _one_line(capsys)
