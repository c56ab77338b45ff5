"""Fuzzing: valid and mutated inputs end in a valid result or one placed InputError line.

Phantom files, scanner files (with their voxel, pose and spectrum files) and command-line
options are built valid by tests/fuzz_strategies.py, then mutated, and run through the loaders
and through ``simbench.cli.main`` in-process under the memory budget and guard of
tests/fuzz_harness.py, which also says exactly what counts as an acceptable outcome. The rule
under test is the project's: every input ends in a valid result (finite arrays, whole output
folders) or one ``InputError`` line naming the file, line and column (docs/phantom-language.md,
"Errors"; docs/geometry.md; DEVELOPERS.md, "Errors and warnings").

The normal suite runs each test below with a fixed, derandomized set of examples (about 1000
in all); ``pytest --fuzz-long`` adds the ``fuzz_long`` variants, which draw many more random
examples and shrink what they find. A failure shows the input files and the output; with
``SIMBENCH_FUZZ_REPORT=<file>`` every failure is recorded there instead and the run goes on.
"""

from __future__ import annotations

import shutil
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

import fuzz_strategies as fs
from fuzz_harness import (TINY_PHANTOM, TINY_SCANNER, InputFile, describe_input, judge_cli,
                          judge_loader, listing, report, run_cli, run_loader, warm_up,
                          yaml_has_content)

#: examples of each test in the normal suite (about 1000 in all)
EXAMPLES = {"phantom": 300, "scanner": 330, "trace": 150, "scan": 45, "draw": 12,
            "options": 165}
#: how many times more the long run draws
LONG_FACTOR = 20

NORMAL = dict(deadline=None, derandomize=True, database=None,
              phases=(Phase.explicit, Phase.generate), report_multiple_bugs=False,
              suppress_health_check=list(HealthCheck))
LONG = dict(deadline=None, derandomize=False, database=None, report_multiple_bugs=True,
            print_blob=True, suppress_health_check=list(HealthCheck))


# --------------------------------------------------------------------------------------------
# Fixtures and helpers
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    """A folder for the examples, after the harness's warm-up (see ``warm_up``)."""
    warm_up(tmp_path_factory.mktemp("warm"))
    return tmp_path_factory.mktemp("fuzz")


class Example:
    """One example's folder: writes the case's files, cleans up afterwards."""

    def __init__(self, workspace: Path):
        self.folder = Path(tempfile.mkdtemp(dir=workspace))
        self.files: dict[str, bytes] = {}
        self.inputs: list[InputFile] = []

    def write(self, case: fs.Case, prefix: str = "") -> Path:
        for name, data in case.files.items():
            path = self.folder / (prefix + name if name == case.main else name)
            path.write_bytes(data)
            self.files[path.name] = data
            self.inputs.append(InputFile(path, _lines_kind(name, data)))
        return self.folder / (prefix + case.main)

    def write_text(self, name: str, text: str) -> Path:
        path = self.folder / name
        path.write_text(text, encoding="utf-8")
        self.inputs.append(InputFile(path, "line:col"))
        return path

    def __enter__(self) -> "Example":
        return self

    def __exit__(self, *exc) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)


def _lines_kind(name: str, data: bytes) -> str:
    if name.endswith((".yaml", ".yml")):
        return "line:col" if yaml_has_content(data) else ""
    if name.endswith(".csv"):
        return "line" if data.strip() else ""
    return ""


def _shown(case_notes: list[str], files: dict[str, bytes], argv: list[str] | None = None) -> str:
    notes = ("mutations: " + "; ".join(case_notes) + "\n") if case_notes else "mutations: none\n"
    return notes + describe_input(files, argv)


def _finite(name: str, array: np.ndarray, problems: list[str]) -> None:
    values = np.asarray(array, dtype=np.float64)
    if values.size and np.isnan(values).any():
        problems.append(f"the loaded result's {name} holds NaN")


def _check_phantom(phantom) -> list[str]:
    """A loaded phantom must hold finite numbers (2-D prisms are infinite along z only)."""
    from simbench.materials import mu_table

    problems: list[str] = []
    objects = phantom.objects
    for name in ("centre", "rotation", "params", "bound_radius", "poly_xy"):
        array = np.asarray(getattr(objects, name), dtype=np.float64)
        if array.size and not np.isfinite(array).all():
            problems.append(f"the compiled objects' {name} holds NaN or inf")
    _finite("half sizes", objects.half_sizes, problems)
    if phantom.voxels is not None and not np.isfinite(phantom.voxels.values).all():
        problems.append("the voxel values hold NaN or inf")
    if phantom.materials:
        mu = mu_table(phantom.materials, [60.0])
        if not np.isfinite(mu).all():
            problems.append(f"mu at 60 keV of the phantom's materials is not finite: {mu[:, 0]}")
    return problems


def _check_scanner(scanner) -> list[str]:
    """A loaded scanner's poses must be finite; a spectrum file must read."""
    poses = scanner.geometry.poses()
    problems: list[str] = []
    for name in ("source", "direction", "detector_centre", "u_axis", "v_axis", "col_u_mm",
                 "row_v_mm"):
        if not np.isfinite(getattr(poses, name)).all():
            problems.append(f"the poses' {name} holds NaN or inf")
    if scanner.physics is not None and scanner.physics.source.kind == "file":
        spectrum = scanner.spectrum()
        if not np.isfinite(np.asarray(spectrum.fluence, dtype=np.float64)).all():
            problems.append("the spectrum read from the file holds NaN or inf")
    return problems


def _loader_run(load, path: Path, check):
    found: list[str] = []

    def then(result):
        found.extend(check(result))

    outcome = run_loader(load, path, then=then)
    return outcome, found


def _pair(body, examples: int, **strategies):
    """The normal test and its ``fuzz_long`` variant, from one body."""
    normal = settings(max_examples=examples, **NORMAL)(given(**strategies)(body))
    long = pytest.mark.fuzz_long(
        settings(max_examples=examples * LONG_FACTOR, **LONG)(given(**strategies)(body)))
    return normal, long


# --------------------------------------------------------------------------------------------
# Loaders
# --------------------------------------------------------------------------------------------


def phantom_file(workspace, case):
    from simbench.phantom import load_phantom

    with Example(workspace) as example:
        path = example.write(case)
        outcome, found = _loader_run(load_phantom, path, _check_phantom)
        problems = judge_loader(outcome, example.inputs) + found
        report(problems, _shown(case.notes, example.files), outcome, "phantom file")


def scanner_file(workspace, case):
    from simbench.scanner import load_scanner

    with Example(workspace) as example:
        path = example.write(case)
        outcome, found = _loader_run(load_scanner, path, _check_scanner)
        problems = judge_loader(outcome, example.inputs) + found
        report(problems, _shown(case.notes, example.files), outcome, "scanner file")


test_phantom_files, test_phantom_files_long = _pair(
    phantom_file, EXAMPLES["phantom"], case=fs.phantom_cases())
test_scanner_files, test_scanner_files_long = _pair(
    scanner_file, EXAMPLES["scanner"], case=fs.scanner_cases(cheap=False))


# --------------------------------------------------------------------------------------------
# Commands
# --------------------------------------------------------------------------------------------


def _command(example: Example, argv: list[str], notes: list[str], outputs: list[Path],
             whole: Path | None, test: str) -> None:
    watched = sorted({p.parent for p in outputs if p.parent.exists()} | {example.folder})
    before = {folder: listing(folder) for folder in watched}
    outcome = run_cli(argv)
    problems = judge_cli(outcome, example.inputs, outputs, before, whole, argv)
    report(problems, _shown(notes, example.files, argv), outcome, test)


@st.composite
def _phantom_and_scanner(draw, physics: bool, mutate_both: bool = False):
    """A phantom and a cheap scanner of the same dimension; usually one of them mutated."""
    dimension = draw(st.sampled_from([2, 2, 3]))
    target = draw(st.sampled_from(["phantom", "scanner", "neither"] + (["both"] if mutate_both
                                                                        else [])))
    most = {True: 2, False: 0}
    phantom = draw(fs.mutated(fs.phantom_trees(dimension, max_objects=3), "phantom.yaml",
                              most[target in ("phantom", "both")], bomb=True))
    scanner = draw(fs.mutated(fs.scanner_trees(physics=physics, cheap=True, dimension=dimension),
                              "scanner.yaml", most[target in ("scanner", "both")]))
    return phantom, scanner


def trace_command(workspace, cases, energy):
    phantom_case, scanner_case = cases
    with Example(workspace) as example:
        phantom = example.write(phantom_case)
        scanner = example.write(scanner_case)
        out = example.folder / "out" / "sinogram.npy"
        argv = ["trace", str(phantom), str(scanner), "--energy", energy, "-o", str(out)]
        _command(example, argv, phantom_case.notes + scanner_case.notes,
                 [out, out.with_suffix(".json")], None, "trace command")


def scan_command(workspace, cases, seed, noise_free):
    phantom_case, scanner_case = cases
    with Example(workspace) as example:
        phantom = example.write(phantom_case)
        scanner = example.write(scanner_case)
        out = example.folder / "scan"
        argv = ["scan", str(phantom), str(scanner), "-o", str(out), "--seed", seed]
        argv += ["--noise-free"] if noise_free else []
        _command(example, argv, phantom_case.notes + scanner_case.notes, [out], out,
                 "scan command")


def draw_command(workspace, case, pixels, energy):
    with Example(workspace) as example:
        phantom = example.write(case)
        out = example.folder / "drawing.png"
        argv = ["draw", str(phantom), "-o", str(out), "--pixels", pixels, "--energy", energy]
        _command(example, argv, case.notes, [out], None, "draw command")


_energies = st.sampled_from(["60"] * 6 + fs.ENERGY_OPTIONS)
_seeds = st.sampled_from(["0"] * 4 + fs.SEED_OPTIONS)
_pixels = st.sampled_from(["16"] * 4 + fs.PIXEL_OPTIONS)

test_trace_command, test_trace_command_long = _pair(
    trace_command, EXAMPLES["trace"],
    cases=_phantom_and_scanner(physics=False, mutate_both=True), energy=_energies)
test_scan_command, test_scan_command_long = _pair(
    scan_command, EXAMPLES["scan"], cases=_phantom_and_scanner(physics=True), seed=_seeds,
    noise_free=st.booleans())
test_draw_command, test_draw_command_long = _pair(
    draw_command, EXAMPLES["draw"], case=fs.phantom_cases(max_mutations=2), pixels=_pixels,
    energy=_energies)


# --------------------------------------------------------------------------------------------
# Command-line options on valid files
# --------------------------------------------------------------------------------------------


@st.composite
def _argv_plans(draw):
    """A command line as a plan: names of the files and options to put in it."""
    # 'demo' is left out: it traces the shipped phantoms at full size, too slow for fuzzing
    command = draw(st.sampled_from(["trace", "scan", "draw", "spectrum", "list", "nonsense",
                                    ""]))
    plan: list = [command]
    if command in ("trace", "scan", "draw"):
        plan.append(("phantom", draw(st.sampled_from(["file", "file", "file", "missing",
                                                       "folder", "shipped", "device", "empty"]))))
    if command in ("trace", "scan", "spectrum"):
        plan.append(("scanner", draw(st.sampled_from(["file", "file", "missing", "shipped",
                                                       "folder"]))))
    plan.append(("output", draw(st.sampled_from(fs.OUTPUT_NAMES)),
                 draw(st.sampled_from([".npy", ".png", "", ".NPY", ".txt"])),
                 draw(st.sampled_from(["absent", "absent", "file", "folder", "full folder"]))))
    options = {"--energy": _energies, "--seed": _seeds, "--pixels": _pixels,
               "--memory-budget": st.sampled_from(fs.BUDGET_OPTIONS)}
    for option in draw(st.lists(st.sampled_from(sorted(options)), unique=True, max_size=2)):
        plan.append((option, draw(options[option])))
    if draw(st.integers(0, 4)) == 0:
        plan.append(("extra", draw(st.sampled_from(["--noise-free", "--bogus", "-x", "--",
                                                    "extra", "--energy", "-o"]))))
    if draw(st.integers(0, 5)) == 0:
        plan = draw(st.permutations(plan))
    return plan


def command_line(workspace, plan):
    with Example(workspace) as example:
        phantom = example.write_text("phantom.yaml", TINY_PHANTOM)
        scanner = example.write_text("scanner.yaml", TINY_SCANNER)
        (example.folder / "empty.yaml").write_bytes(b"")
        example.inputs.append(InputFile(example.folder / "empty.yaml", ""))
        outputs: list[Path] = []
        whole = None
        argv: list[str] = []
        command = ""
        for step in plan:
            if isinstance(step, str):
                command = step
                if step:
                    argv.append(step)
                continue
            kind = step[0]
            if kind in ("phantom", "scanner"):
                argv.append({"file": str(phantom if kind == "phantom" else scanner),
                             "missing": str(example.folder / "absent.yaml"),
                             "folder": str(example.folder),
                             "shipped": "water-cylinder" if kind == "phantom" else
                             "parallel-bench-2d",
                             "device": "/dev/null",
                             "empty": str(example.folder / "empty.yaml")}[step[1]])
            elif kind == "output":
                _, name, suffix, state = step
                out = example.folder / "out" / (name + suffix)
                try:
                    out.parent.mkdir(parents=True, exist_ok=True)
                    if state == "file":
                        out.write_bytes(b"old")
                    elif state in ("folder", "full folder"):
                        out.mkdir(exist_ok=True)
                        if state == "full folder":
                            (out / "old.txt").write_text("old")
                except (OSError, UnicodeEncodeError):
                    pass
                argv += ["-o", str(out)]
                outputs.append(out)
                if command == "trace":
                    outputs.append(out.with_suffix(".json") if out.suffix else out)
                if command == "scan":
                    whole = out
            elif kind == "extra":
                argv.append(step[1])
            else:
                argv += [kind, step[1]]
        shown = {"phantom.yaml": TINY_PHANTOM.encode(), "scanner.yaml": TINY_SCANNER.encode()}
        example.files.update(shown)
        _command(example, argv, [], outputs, whole if command == "scan" else None,
                 "command line")


test_command_line, test_command_line_long = _pair(
    command_line, EXAMPLES["options"], plan=_argv_plans())


def test_examples_add_up():
    """The normal suite runs at least 1000 examples (the harness's stated size)."""
    assert sum(EXAMPLES.values()) >= 1000

