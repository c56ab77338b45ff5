"""Run one input under a memory and time guard, and judge the outcome.

Every input to simbench must end in one of two ways:

* a **valid result**: the loader returns, or the command exits 0; then every ``.npy`` written
  holds only finite numbers, a scan folder is whole (it has its ``scan.json``), and standard
  error holds nothing but one-line warnings;
* **one InputError line with a place**: the loader raises :class:`simbench.errors.InputError`
  (or the command exits 2 and prints ``simbench: error: ...``), the text is one line, it
  starts with the file it is about (followed by ``:line:col`` when that file is YAML with
  content, ``:line`` for a CSV) or with ``<command line>`` for an option, and nothing was
  left behind at the output's place.

Anything else (another exception type, a multi-line message, exit code other than 0 or 2, a
non-finite array, a half-written output, memory beyond the bound) is a failure, reported
with the input and the output.

The guard
---------
During each run the memory budget of :mod:`simbench.budget` is :data:`MEMORY_BUDGET_BYTES`,
and the traced peak (``tracemalloc``, which sees numpy's buffers) must stay under
:data:`PEAK_BOUND_BYTES`. Two safety nets keep a runaway input from taking the shared machine
down with it: the process's address space may grow by at most :data:`ADDRESS_SPACE_HEADROOM`
(so a huge allocation fails at once with MemoryError), and a timer stops a run whose traced
memory passes the bound or which is still running after its hang limit. The hang limit is
not a speed check: valid inputs finish in well under a second; it only turns a hang into a
failure message instead of a stuck test suite.

Recording instead of stopping
-----------------------------
With ``SIMBENCH_FUZZ_REPORT=<file>`` in the environment, each failure is appended to that file
as one JSON line and the run goes on, so that one run lists every distinct failure for
triage; without it the first failure fails the test.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import resource
import signal
import time
import traceback
import tracemalloc
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from simbench import budget
from simbench.errors import InputError

#: the memory budget every reader checks its estimates against during a run
MEMORY_BUDGET_BYTES = 64 * 2**20
#: the traced peak allowed per run: the budget plus room for estimates that are only
#: approximate and for the interpreter's own objects (a stated bound, not a measurement)
PEAK_BOUND_BYTES = 4 * MEMORY_BUDGET_BYTES
#: how far the process's address space may grow during a run before allocations fail
ADDRESS_SPACE_HEADROOM = 2**30
#: seconds after which a run counts as hung (fuzz examples; the corpus allows more)
HANG_LIMIT_S = 30.0
#: how often the timer looks at the traced memory and the clock
_TICK_S = 0.05

REPORT_VARIABLE = "SIMBENCH_FUZZ_REPORT"

_ERROR_LINE = re.compile(r"^simbench(?: [a-z]+)?: error: (.*)$")
#: the command-line parser's own errors name the option or argument and end with this
_USAGE_ERROR = re.compile(r"\(see 'simbench(?: [a-z]+)? --help'\)$")
_WARNING_PREFIX = "simbench: warning: "


class Runaway(BaseException):
    """Raised into a run that passed its memory bound or its hang limit.

    A BaseException, so that no ``except Exception`` inside simbench can swallow it.
    """


class FuzzFailure(AssertionError):
    """An outcome that is neither a valid result nor one placed InputError line."""


# --------------------------------------------------------------------------------------------
# The guard
# --------------------------------------------------------------------------------------------


@dataclass
class Usage:
    """What a guarded run used."""

    peak_bytes: int = 0
    seconds: float = 0.0


def _address_space_bytes() -> int | None:
    try:
        with open("/proc/self/status", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


@contextlib.contextmanager
def guarded(hang_limit_s: float = HANG_LIMIT_S):
    """Run the body under the memory budget, the address-space ceiling and the timer.

    Yields a :class:`Usage` that is filled in when the body ends. The body sees
    :class:`Runaway` when its traced memory passes :data:`PEAK_BOUND_BYTES` or it runs past
    ``hang_limit_s``; an allocation past the address-space ceiling raises MemoryError.
    """
    usage = Usage()
    started_tracing = not tracemalloc.is_tracing()
    if started_tracing:
        tracemalloc.start(1)
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    budget.set_memory_budget(MEMORY_BUDGET_BYTES)

    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    ceiling = None
    now = _address_space_bytes()
    if now is not None:
        ceiling = now + ADDRESS_SPACE_HEADROOM
        if hard != resource.RLIM_INFINITY:
            ceiling = min(ceiling, hard)
        if soft != resource.RLIM_INFINITY and soft <= ceiling:
            ceiling = None
    if ceiling is not None:
        resource.setrlimit(resource.RLIMIT_AS, (ceiling, hard))

    state = {"active": True}
    start = time.perf_counter()

    def tick(signum, frame):
        if not state["active"]:
            return
        used = tracemalloc.get_traced_memory()[0] - base
        if used > PEAK_BOUND_BYTES:
            state["active"] = False
            raise Runaway(f"traced memory passed {PEAK_BOUND_BYTES / 2**20:.0f} MiB "
                          f"({used / 2**20:.0f} MiB held)")
        if time.perf_counter() - start > hang_limit_s:
            state["active"] = False
            raise Runaway(f"still running after the hang limit of {hang_limit_s:g} s")

    previous = signal.signal(signal.SIGALRM, tick)
    signal.setitimer(signal.ITIMER_REAL, _TICK_S, _TICK_S)
    try:
        yield usage
    finally:
        state["active"] = False
        signal.setitimer(signal.ITIMER_REAL, 0.0)
        signal.signal(signal.SIGALRM, previous)
        if ceiling is not None:
            resource.setrlimit(resource.RLIMIT_AS, (soft, hard))
        usage.seconds = time.perf_counter() - start
        usage.peak_bytes = max(0, tracemalloc.get_traced_memory()[1] - base)
        budget.set_memory_budget(None)
        if started_tracing:
            tracemalloc.stop()


# --------------------------------------------------------------------------------------------
# Warming up
# --------------------------------------------------------------------------------------------

#: small valid files: a disc of water, a parallel beam of 8 cells and 3 views
TINY_PHANTOM = ("name: tiny\ndimension: 2\nobjects:\n"
                "  - {shape: circle, radius: 5, material: water}\n")
TINY_SCANNER = ("name: tiny\ngeometry: {type: parallel, columns: 8, column_pitch: 2 mm, views: 3}\n"
                "source: {energy: 60 keV}\nexposure: {air_counts: 1.0e+4}\n")

#: warm-up inputs that reach every family of compiled kernels: 2-D and 3-D shapes, label and
#: mu voxels, each geometry, a tube with photon counting, sub-rays, blur, lag and scatter
_WARM_PHANTOMS = {
    "warm-2d.yaml": "name: w\ndimension: 2\nobjects:\n  - {shape: ellipse, semi_axes: [9, 5], "
                    "angle: 20, material: water}\n  - {shape: polygon, vertices: [[0, 0], [4, 0], "
                    "[0, 4]], mu: 0.01 /mm, mode: add}\n  - bars: {line_pairs_per_mm: 1, count: 2, "
                    "length: 4, material: aluminium}\n",
    "warm-3d.yaml": "name: w\ndimension: 3\nobjects:\n  - {shape: cylinder, radius: 9, height: 9, "
                    "material: water}\n  - {shape: cone, base_radius: 3, top_radius: 0, height: 4, "
                    "axis: [1, 1, 1], material: pmma}\n  - {shape: box, size: [2, 2, 2], rotate: "
                    "[x: 30], mu: 0.02 /mm}\n  - {shape: ellipsoid, semi_axes: [1, 2, 3], "
                    "material: lung}\n",
    "warm-labels.yaml": "name: w\ndimension: 2\nvoxels: {file: warm-labels.npy, voxel_size: 2, "
                        "labels: {1: water}}\n",
    "warm-mu.yaml": "name: w\ndimension: 3\nvoxels: {file: warm-mu.npy, voxel_size: 2, "
                    "mu_unit: /mm}\n",
}
_WARM_SCANNERS = {
    "warm-fan.yaml": ("warm-2d.yaml", "name: w\ngeometry: {type: fan, sid: 100, sdd: 200, "
                      "detector_shape: curved, columns: 8, column_pitch: 4, views: 2}\nsource: "
                      "{kvp: 80, focal_spot: 1 mm, focal_spot_samples: 2}\nexposure: {air_counts: "
                      "1.0e+4}\ndetector: {type: photon-counting, thresholds: [20, 40], "
                      "energy_resolution: 5 keV, material: CdTe, thickness: 1 mm, blur: 1 mm, "
                      "lag: 0.1, aperture_samples: 2, dead_cells: [1], full_scale: 1.0e+6, "
                      "hot_cells: [2]}\nscatter: {model: thickness, max_spr: 0.2, "
                      "thickness_scale: 100 mm}\n"),
    "warm-cone.yaml": ("warm-3d.yaml", "name: w\ngeometry: {type: helical, sid: 100, sdd: 200, "
                       "columns: 8, column_pitch: 4, rows: 2, row_pitch: 4, views: 2, "
                       "table_feed_per_turn: 5}\nsource: {kvp: 80}\nexposure: {mas_per_view: "
                       "0.01}\ndetector: {material: CsI, thickness: 0.5 mm, electronic_noise: 2, "
                       "dark_level: 10, gain_spread: 0.01, crosstalk: 0.01}\nscatter: {model: "
                       "centre, spr_at_centre: 0.1}\n"),
    "warm-poses.yaml": ("warm-mu.yaml", "name: w\ngeometry: {type: poses, beam: parallel, "
                        "columns: 8, column_pitch: 4, rows: 2, row_pitch: 4, poses: [{direction: "
                        "[0, 1, 0], detector_centre: [0, 50, 0], u_axis: [1, 0, 0], v_axis: "
                        "[0, 0, 1]}]}\nsource: {energy: 60 keV}\nexposure: {air_counts: 100}\n"),
    "warm-parallel.yaml": ("warm-labels.yaml", TINY_SCANNER),
}


_warmed = False


def warm_up(folder: Path) -> None:
    """Run each command once on inputs that reach every family of compiled kernels.

    This loads numba's compiled kernels (compiling them on a fresh install), xraylib's tables,
    scipy and matplotlib outside any guarded run, where a first compilation would pass the
    hang limit. Runs once per process; ``folder`` receives the warm-up files.
    """
    global _warmed
    if _warmed:
        return
    np.save(folder / "warm-labels.npy", np.array([[0, 1], [1, 1]], dtype=np.uint8))
    np.save(folder / "warm-mu.npy", np.full((2, 2, 2), 0.01))
    for name, text in {**_WARM_PHANTOMS, **{k: v[1] for k, v in _WARM_SCANNERS.items()}}.items():
        (folder / name).write_text(text)
    from simbench.cli import main

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for scanner, (phantom, _) in _WARM_SCANNERS.items():
            for command in (["trace", str(folder / phantom), str(folder / scanner), "--energy",
                             "60", "-o", str(folder / (scanner + ".npy"))],
                            ["scan", str(folder / phantom), str(folder / scanner), "-o",
                             str(folder / (scanner + ".scan"))]):
                assert main(command) == 0, command
        for phantom in _WARM_PHANTOMS:
            assert main(["draw", str(folder / phantom), "--pixels", "16", "-o",
                         str(folder / (phantom + ".png"))]) == 0, phantom
    _warmed = True


# --------------------------------------------------------------------------------------------
# Outcomes
# --------------------------------------------------------------------------------------------


@dataclass
class Outcome:
    """How one run ended.

    Attributes
    ----------
    kind : str
        ``"ok"``, ``"input-error"``, ``"exit"`` (a command's exit code), ``"escaped"``
        (another exception) or ``"runaway"``.
    message : str
        The InputError text, or the escaped exception's type and text.
    code : int or None
        The command's exit code.
    stdout, stderr : str
    where : str
        The last frames of an escaped exception's traceback.
    usage : Usage
    """

    kind: str
    message: str = ""
    code: int | None = None
    stdout: str = ""
    stderr: str = ""
    where: str = ""
    usage: Usage = field(default_factory=Usage)


def _escaped(exc: BaseException) -> Outcome:
    frames = traceback.extract_tb(exc.__traceback__)[-4:]
    where = " <- ".join(f"{Path(f.filename).name}:{f.lineno} {f.name}" for f in reversed(frames))
    text = str(exc)
    if len(text) > 300:
        text = text[:300] + "..."
    return Outcome("escaped", f"{type(exc).__name__}: {text}", where=where)


def run_loader(load, path: Path, hang_limit_s: float = HANG_LIMIT_S, then=None) -> Outcome:
    """Call ``load(path)`` (and ``then(result)`` if given) under the guard."""
    try:
        with guarded(hang_limit_s) as usage:
            try:
                result = load(path)
                if then is not None:
                    then(result)
                outcome = Outcome("ok")
            except InputError as exc:
                outcome = Outcome("input-error", str(exc))
            except Runaway as exc:
                outcome = Outcome("runaway", str(exc))
            except (KeyboardInterrupt, SystemExit):
                raise
            except BaseException as exc:  # noqa: BLE001 - every other end is the finding
                outcome = _escaped(exc)
    except Runaway as exc:  # fired between the body's end and the guard's exit
        outcome = Outcome("runaway", str(exc))
    outcome.usage = usage
    return outcome


def run_cli(argv: list[str], hang_limit_s: float = HANG_LIMIT_S) -> Outcome:
    """Run ``simbench.cli.main(argv)`` in-process under the guard, capturing its output.

    Standard output is UTF-8 with strict errors and standard error UTF-8 with backslash
    escapes, as Python sets them up on a UTF-8 terminal, so text that a terminal could not
    show fails here as it would there.
    """
    from simbench.cli import main

    out_bytes, err_bytes = io.BytesIO(), io.BytesIO()
    out = io.TextIOWrapper(out_bytes, encoding="utf-8", errors="strict", write_through=True)
    err = io.TextIOWrapper(err_bytes, encoding="utf-8", errors="backslashreplace",
                           write_through=True)
    try:
        with guarded(hang_limit_s) as usage:
            with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
                try:
                    code = main(list(argv))
                    outcome = Outcome("exit", code=code)
                except SystemExit as stop:
                    code = stop.code
                    outcome = Outcome("exit", code=code if isinstance(code, int) or code is None
                                      else 1, message="" if isinstance(code, int) or code is None
                                      else str(code))
                except Runaway as exc:
                    outcome = Outcome("runaway", str(exc))
                except KeyboardInterrupt:
                    raise
                except BaseException as exc:  # noqa: BLE001 - every other end is the finding
                    outcome = _escaped(exc)
    except Runaway as exc:
        outcome = Outcome("runaway", str(exc))
    outcome.usage = usage
    if outcome.kind == "exit" and outcome.code is None:
        outcome.code = 0
    outcome.stdout = out_bytes.getvalue().decode("utf-8", "replace")
    outcome.stderr = err_bytes.getvalue().decode("utf-8", "replace")
    return outcome


# --------------------------------------------------------------------------------------------
# Judging
# --------------------------------------------------------------------------------------------


@dataclass
class InputFile:
    """A file an input consists of, for judging where an error says it is.

    ``lines`` is ``"line:col"`` for YAML with content, ``"line"`` for CSV and other text
    tables, ``""`` for binary files and empty documents.
    """

    path: Path
    lines: str = ""


def describe_input(files: dict[str, bytes] | None, argv: list[str] | None = None,
                   limit: int = 2500) -> str:
    """The input as text for a failure message (long files cut)."""
    parts = []
    if argv is not None:
        parts.append("command: simbench " + " ".join(repr(a) if (" " in a or not a) else a
                                                    for a in argv))
    for name, data in (files or {}).items():
        if name.endswith(".npy"):
            parts.append(f"--- {name} ({len(data)} bytes): {data[:160]!r}")
            continue
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError:
            text = repr(data)
        if len(text) > limit:
            text = text[:limit] + f"\n... ({len(text) - limit} more characters)"
        parts.append(f"--- {name}\n{text}")
    return "\n".join(parts)


def yaml_has_content(data: bytes) -> bool:
    """Whether a YAML file holds anything besides blank lines and comments."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return True
    return any(line.strip() and not line.strip().startswith("#") and line.strip() not in
               ("---", "...") for line in text.splitlines())


def placement_problem(message: str, files: list[InputFile], command_line: bool) -> str | None:
    """None if ``message`` starts with a place; else what is wrong with it.

    A place is one of ``files`` followed by a colon (and by ``line:col`` for a YAML file with
    content, ``line`` for a CSV), or ``<command line>`` for an option.
    """
    if "\n" in message or "\r" in message:
        return "the error text has more than one line"
    if not message.strip():
        return "the error text is empty"
    if command_line and message.startswith("<command line>"):
        return None
    for item in sorted(files, key=lambda f: -len(str(f.path))):
        name = str(item.path)
        if not message.startswith(name + ":"):
            continue
        rest = message[len(name):]
        if item.lines == "line:col" and not re.match(r"^:\d+:\d+: ", rest):
            return f"the error names {item.path.name} without line:column"
        if item.lines == "line" and not re.match(r"^:\d+(?::\d+)?: ", rest):
            return f"the error names {item.path.name} without a line"
        return None
    return "the error does not start with the file it is about"


def nonfinite_arrays(place: Path) -> list[str]:
    """The ``.npy`` files under ``place`` (or ``place`` itself) that hold NaN or inf."""
    if place.is_file():
        paths = [place] if place.suffix == ".npy" else []
    elif place.is_dir():
        paths = sorted(place.rglob("*.npy"))
    else:
        paths = []
    bad = []
    for path in paths:
        try:
            array = np.load(path, allow_pickle=False, mmap_mode="r")
        except (OSError, ValueError) as exc:
            bad.append(f"{path.name} cannot be read back ({exc})")
            continue
        if array.dtype.kind in "fc" and array.size and not bool(np.isfinite(array).all()):
            count = int(array.size - np.count_nonzero(np.isfinite(array)))
            bad.append(f"{path.relative_to(place.parent)} holds {count} non-finite values")
        del array
    return bad


def listing(folder: Path) -> set[str]:
    """Every path under ``folder``, relative, for before/after comparisons."""
    if not folder.exists():
        return set()
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def _peak_problem(outcome: Outcome) -> list[str]:
    peak = outcome.usage.peak_bytes
    if peak <= PEAK_BOUND_BYTES:
        return []
    text = (f"traced memory peak {peak / 2**20:.0f} MiB over the bound of "
            f"{PEAK_BOUND_BYTES / 2**20:.0f} MiB")
    if peak > ADDRESS_SPACE_HEADROOM:
        text += " (an allocation that large was attempted; numpy traces it even when it fails)"
    return [text]


def judge_loader(outcome: Outcome, files: list[InputFile]) -> list[str]:
    """Problems with a loader's outcome (empty when it is acceptable)."""
    problems = []
    if outcome.kind == "input-error":
        problem = placement_problem(outcome.message, files, command_line=False)
        if problem:
            problems.append(problem)
    elif outcome.kind == "escaped":
        problems.append(f"escaped {outcome.message} (at {outcome.where})")
    elif outcome.kind == "runaway":
        problems.append(f"runaway: {outcome.message}")
    problems.extend(_peak_problem(outcome))
    return problems


def judge_cli(outcome: Outcome, files: list[InputFile], outputs: list[Path],
              before: dict[Path, set[str]], whole: Path | None = None,
              argv: list[str] = ()) -> list[str]:
    """Problems with a command's outcome (empty when it is acceptable).

    Parameters
    ----------
    outcome : Outcome
    files : list of InputFile
        The input files (for the place of an error).
    outputs : list of Path
        What the command was asked to write (a file, its sidecar, a folder).
    before : dict of Path -> set of str
        Listings of the outputs' parent folders before the run: after an error they must be
        unchanged (no half-written output, no temporary left behind).
    whole : Path, optional
        A folder that must hold ``scan.json`` after a successful run.
    argv : list of str
        The command line: a path given there that is not one of ``files`` (missing, a
        folder, a device) is a place of its own.
    """
    problems = []
    if outcome.kind == "escaped":
        problems.append(f"escaped {outcome.message} (at {outcome.where})")
    elif outcome.kind == "runaway":
        problems.append(f"runaway: {outcome.message}")
    elif outcome.code not in (0, 2):
        problems.append(f"exit code {outcome.code}" + (f" ({outcome.message})"
                                                       if outcome.message else ""))
    problems.extend(_peak_problem(outcome))
    if problems:
        return problems
    lines = outcome.stderr.splitlines()
    errors = [line for line in lines if _ERROR_LINE.match(line)]
    others = [line for line in lines if not _ERROR_LINE.match(line)
              and not line.startswith(_WARNING_PREFIX)]
    if others:
        problems.append(f"standard error holds a line that is neither an error nor a one-line "
                        f"warning: {others[0][:200]!r}")
    if outcome.code == 0:
        if errors:
            problems.append("exit code 0 but an error line was printed")
        for place in outputs:
            problems.extend(nonfinite_arrays(place))
        if whole is not None and not (whole / "scan.json").is_file():
            problems.append(f"the output folder {whole.name} has no scan.json")
        return problems
    # exit code 2
    if len(errors) != 1:
        problems.append(f"exit code 2 with {len(errors)} error lines")
        return problems
    if lines and lines[-1] != errors[0]:
        problems.append("the error line is not the last line on standard error")
    text = _ERROR_LINE.match(errors[0]).group(1)
    if not _USAGE_ERROR.search(text):
        # an output that cannot be written is placed at that output (or a folder on its way)
        known = {f.path for f in files}
        places = files + [InputFile(p) for out in outputs for p in (out, *out.parents)
                          if len(p.parts) > 2]
        places += [InputFile(Path(word)) for word in argv
                   if word and not word.startswith("-") and Path(word) not in known]
        problem = placement_problem(text, places, command_line=True)
        if problem:
            problems.append(problem)
    for folder, seen in before.items():
        now = listing(folder)
        if now != seen:
            added = sorted(now - seen)[:3]
            problems.append(f"after the error, {folder.name}/ gained {added}"
                            if added else f"after the error, {folder.name}/ lost files")
    return problems


def report(problems: list[str], shown_input: str, outcome: Outcome, test: str) -> None:
    """Fail with the input and output shown, or record the failure (see module docstring)."""
    if not problems:
        return
    text = (f"{'; '.join(problems)}\n"
            f"outcome: {outcome.kind}" + (f", exit code {outcome.code}" if outcome.code is not None
                                         else "")
            + (f"\nmessage: {outcome.message}" if outcome.message else "")
            + (f"\nstderr: {outcome.stderr[-1500:]}" if outcome.stderr else "")
            + (f"\nstdout: {outcome.stdout[-500:]}" if outcome.stdout else "")
            + f"\ntraced peak {outcome.usage.peak_bytes / 2**20:.1f} MiB, "
              f"{outcome.usage.seconds:.2f} s"
            + f"\ninput:\n{shown_input}")
    record = os.environ.get(REPORT_VARIABLE)
    if record:
        with open(record, "a", encoding="utf-8") as handle:
            handle.write(json.dumps({"test": test, "problems": problems, "kind": outcome.kind,
                                     "message": outcome.message, "where": outcome.where,
                                     "stderr": outcome.stderr[-1500:], "input": shown_input[:4000]},
                                    ensure_ascii=True) + "\n")
        return
    raise FuzzFailure(text)

