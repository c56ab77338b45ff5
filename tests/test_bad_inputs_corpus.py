"""The corpus of hand-written bad inputs: every case ends in exit code 2 and one placed line.

Each entry of tests/bad_inputs/expected.yaml names a command line over the files of that
folder (bad phantoms and scanners with their voxel, pose and spectrum files, paired with
valid partners) and a fragment of the error: the field at fault. The command runs in-process
(``simbench.cli.main``) under the memory budget and guard of tests/fuzz_harness.py, with a
hang limit suited to hostile files, and must

* exit with code 2 and print exactly one line on standard error (warnings aside), with no
  traceback;
* start that line with its place: the file and its line and column (YAML), the file and its
  line (CSV), or ``<command line>`` for an option;
* name the field (the fragment, or one of the fragments given) in that line, outside the
  file names;
* leave nothing behind where the output was to go;
* keep the traced memory under the harness's bound.

The rule is the project's (DEVELOPERS.md, "Errors and warnings"; the "Errors" section of
docs/phantom-language.md); the ranges the cases step outside are those stated in
docs/phantom-language.md ("Ranges", "Limits"), docs/geometry.md ("Ranges and limits") and
docs/physics.md ("Physical ranges").
"""

from __future__ import annotations

import re
import shlex
import shutil
import tempfile
from pathlib import Path

import pytest
import yaml

from fuzz_harness import (InputFile, describe_input, judge_cli, listing, report, run_cli,
                          warm_up)

HERE = Path(__file__).parent / "bad_inputs"
#: hostile files may take a while to refuse on a busy machine; this only stops a hang
HANG_LIMIT_S = 60.0


def _cases() -> list[dict]:
    with open(HERE / "expected.yaml", encoding="utf-8") as handle:
        return yaml.safe_load(handle)


def _inputs() -> list[InputFile]:
    files = []
    for path in sorted(HERE.iterdir()):
        if path.suffix in (".yaml", ".yml"):
            files.append(InputFile(path, "line:col" if path.stat().st_size else ""))
        elif path.suffix == ".csv":
            files.append(InputFile(path, "line" if path.stat().st_size else ""))
        else:
            files.append(InputFile(path))
    files.append(InputFile(Path("/dev/zero")))
    return files


def _without_paths(line: str, out: Path) -> str:
    """The error line with the corpus's and the output's paths blanked out, so that a field
    is not found in a file's name."""
    for folder in (HERE, out):
        line = re.sub(re.escape(str(folder)) + r"(/[^\s:]*)?", "<path>", line)
    return line


CASES = _cases()


@pytest.fixture(scope="module", autouse=True)
def _warm(tmp_path_factory):
    """Compiled kernels and libraries loaded before any guarded run (see ``warm_up``)."""
    warm_up(tmp_path_factory.mktemp("warm"))


def test_index_names_existing_files():
    """Every file the index runs exists, and every bad file of the folder has a case."""
    named = set()
    for case in CASES:
        for word in shlex.split(case["run"]):
            if word.startswith("{here}/"):
                path = HERE / word[len("{here}/"):]
                assert path.exists(), (case["name"], word)
                named.add(path.name)
    for path in HERE.iterdir():
        if path.suffix == ".yaml" and path.name != "expected.yaml":
            assert path.name in named, f"{path.name} is in bad_inputs/ but no case runs it"


@pytest.mark.parametrize("case", CASES, ids=[case["name"] for case in CASES])
def test_bad_input(case, tmp_path_factory):
    out = Path(tempfile.mkdtemp(dir=tmp_path_factory.getbasetemp()))
    try:
        argv = [word.replace("{here}", str(HERE)).replace("{out}", str(out))
                for word in shlex.split(case["run"])]
        outputs = [Path(argv[argv.index("-o") + 1])] if "-o" in argv else []
        before = {out: listing(out)}
        outcome = run_cli(argv, hang_limit_s=HANG_LIMIT_S)
        problems = judge_cli(outcome, _inputs(), outputs, before, argv=argv)
        if outcome.kind == "exit" and outcome.code == 0:
            problems.append("the bad input was accepted (exit code 0)")
        errors = [line for line in outcome.stderr.splitlines() if ": error: " in line]
        wanted = case["field"] if isinstance(case["field"], list) else [case["field"]]
        if outcome.kind == "exit" and outcome.code == 2 and errors and \
                not any(fragment in _without_paths(errors[-1], out) for fragment in wanted):
            problems.append("the error line does not name " + " or ".join(map(repr, wanted)))
        files = {word.rsplit("/", 1)[-1]: Path(word).read_bytes()
                 for word in argv if word.startswith(str(HERE)) and Path(word).is_file()
                 and Path(word).stat().st_size < 4000}
        report(problems, f"case {case['name']}: {case['why']}\n" + describe_input(files, argv),
               outcome, f"bad input {case['name']}")
    finally:
        shutil.rmtree(out, ignore_errors=True)
