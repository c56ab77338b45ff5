"""The ``simbench`` command line: a thin layer over the modules.

Every bad input ends as one line on standard error, ``simbench: error: <file>:<line>:<col>:
<field>: <problem> (valid: ...)``, and exit code 2; warnings are one line each too.
"""

from __future__ import annotations

import argparse
import importlib
import signal
import sys
import threading
import time
import warnings
from pathlib import Path

import simbench
from simbench.data import shipped_files
from simbench.errors import InputError, Where

EXAMPLES = {
    "trace": "simbench trace shepp-logan parallel-bench-2d --energy 60 -o sino.npy",
    "draw": "simbench draw water-ellipse-inserts -o phantom.png",
    "scan": "simbench scan water-ellipse-inserts fan-clinical -o scan-out --seed 7",
    "spectrum": "simbench spectrum fan-clinical -o spectrum.png",
    "list": "simbench list",
    "demo": "simbench demo -o simbench-demo",
    "reconstruct": "simbench reconstruct scan-out --algorithm fbp --option filter=hann -o recon-out",
    "algorithms": "simbench algorithms",
    "run": "simbench run quickstart -o quickstart-run",
    "compare": "simbench compare run-a run-b -o comparison",
    "baseline": "simbench baseline quickstart-run -o baseline.yaml",
    "check": "simbench check quickstart-run --baseline baseline.yaml --junit results.xml",
}


# ------------------------------------------------------------------------------------------
# Shipped files
# ------------------------------------------------------------------------------------------


def resolve(name_or_path: str, kind: str) -> Path:
    """An existing path as given, else the shipped file of that name, else the path as given
    (so that the loader reports it missing with its own message)."""
    path = Path(name_or_path)
    if path.exists():
        return path
    files = shipped_files(kind)
    stem = path.name[:-5] if path.name.endswith(".yaml") else path.name
    if path.parent == Path(".") and stem in files:
        return files[stem]
    return path


# ------------------------------------------------------------------------------------------
# Commands
# ------------------------------------------------------------------------------------------


def _load(phantom_arg: str | None, scanner_arg: str | None):
    from simbench.phantom import load_phantom
    from simbench.scanner import load_scanner

    phantom = load_phantom(resolve(phantom_arg, "phantoms")) if phantom_arg else None
    scanner = load_scanner(resolve(scanner_arg, "scanners")) if scanner_arg else None
    if phantom is not None and scanner is not None:
        dim = scanner.geometry.poses().dimension
        if phantom.dimension == 3 and dim == 2:
            raise InputError(scanner.geometry.where,
                             f"a 2-D scanner cannot scan the 3-D phantom '{phantom.name}'",
                             "a scanner with rows (parallel stack, cone) for 3-D phantoms")
    return phantom, scanner


def _check_output(path: str, suffix: str, option: str = "-o") -> Path:
    out = Path(path)
    if out.suffix.lower() != suffix:
        raise InputError(Where("<command line>", field=option),
                         f"output '{path}' does not end in {suffix}", f"a file name ending in {suffix}")
    if out.exists() and out.is_dir():
        raise InputError(Where("<command line>", field=option), f"output '{path}' is a directory",
                         f"a file name ending in {suffix}")
    return out


def cmd_trace(args: argparse.Namespace) -> int:
    import numpy as np

    from simbench.atomic import write_json, write_npy
    from simbench.budget import check_bytes
    from simbench.execute.scan import edge_columns, warn_if_truncated
    from simbench.folders import file_sha256
    from simbench.materials import mu_table
    from simbench.trace import iter_trace, line_integrals, trace

    out = _check_output(args.output, ".npy")
    energy = _energy_option(args.energy)
    phantom, scanner = _load(args.phantom, args.scanner)
    geometry = scanner.geometry
    cells = float(geometry.n_rows) * geometry.n_cols
    # the whole sinogram is held (float64) while the views stream through the tracer
    check_bytes(8.0 * geometry.n_views * cells, Where(str(scanner.source), field="geometry"),
                f"the line integrals of {geometry.n_views} views of {int(cells)} cells",
                "fewer views, rows or columns")
    poses = scanner.geometry.poses()
    mu = mu_table(phantom.materials, [energy])[:, 0]
    started = time.perf_counter()
    trace(phantom, poses, views=[0])  # compiles the kernels on a first use
    compile_seconds = time.perf_counter() - started
    started = time.perf_counter()
    # chunk by chunk of views: only the line integrals are kept, so large cone-beam runs
    # need the memory of the output, not of every material's path lengths
    sinogram = np.empty(poses.projection_shape)
    edges = np.zeros((len(phantom.materials), poses.n_views, 2))
    for views, lengths in iter_trace(phantom, poses):
        sinogram[views] = line_integrals(lengths, mu)
        edges[:, views] = edge_columns(lengths)
    seconds = time.perf_counter() - started
    if not np.isfinite(sinogram).all():
        raise InputError(Where(str(phantom.source), field="objects"),
                         "the line integrals are not finite; nothing was written",
                         "object sizes and material attenuation within their documented ranges")
    warn_if_truncated(edges, scanner.source)
    write_npy(out, np.ascontiguousarray(sinogram, dtype=np.float64))
    sidecar = out.with_suffix(".json")
    write_json(sidecar, {
        "what": "exact monochromatic line integrals (dimensionless), float64",
        "file": out.name,
        "sha256": file_sha256(out),
        "layout": "(n_views, n_cols)" if poses.dimension == 2 else "(n_views, n_rows, n_cols)",
        "shape": list(sinogram.shape),
        "energy_kev": energy,
        "phantom": {"name": phantom.name, "file": str(phantom.source)},
        "materials": [{"name": m.name, "mu_per_mm": float(v)} for m, v in zip(phantom.materials, mu)],
        "scanner": {"name": scanner.name, "file": str(scanner.source)},
        "geometry": poses.to_record(),
        "trace_seconds": round(seconds, 3),
        "compile_and_first_view_seconds": round(compile_seconds, 3),
        "simbench_version": simbench.__version__,
        "caution": simbench.CAUTION,
    })
    print(f"wrote {out} {tuple(sinogram.shape)} and {sidecar} "
          f"(line integrals at {energy:g} keV, max {sinogram.max():.4g}, traced in {seconds:.2f} s"
          + (f" after {compile_seconds:.1f} s compiling" if compile_seconds > 1.0 else "") + ")")
    return 0


def _whole_option(text: str, option: str) -> int:
    """A whole number >= 0 from a command-line option (a seed or a sample index)."""
    from simbench.spec import check_integer

    try:
        value = int(text)
    except ValueError:
        value = text
    return check_integer(value, Where("<command line>", field=option), minimum=0,
                         maximum=2**63 - 1)


def cmd_draw(args: argparse.Namespace) -> int:
    from simbench.phantom.families import load_family
    from simbench.report.drawing import draw_phantom

    out = _check_output(args.output, ".png")
    energy = _energy_option(args.energy)
    pixels = _pixels_option(args.pixels)
    from simbench.budget import check_bytes

    # the truth image and label map in float64, and the figure's RGBA canvas (about 2x wider
    # than the image with labels and colour bar), measured on the shipped phantoms
    check_bytes(64.0 * pixels * pixels, Where("<command line>", field="--pixels"),
                f"a {pixels} x {pixels} drawing", "fewer pixels")
    seed = _whole_option(args.seed, "--seed")
    sample = _whole_option(args.sample, "--sample")
    family = load_family(resolve(args.phantom, "phantoms"))
    phantom, _ = family.sample(seed, sample)
    draw_phantom(phantom, out, energy_kev=energy, pixels=pixels)
    drawn = f", sample {sample} of seed {seed}" if family.is_random else ""
    print(f"wrote {out} ({phantom.name}{drawn}, mu at {energy:g} keV)")
    return 0


def cmd_scan(args: argparse.Namespace) -> int:
    from simbench.execute.scan import run_scan

    phantom, scanner = _load(args.phantom, args.scanner)
    if scanner.physics is None:
        raise InputError(Where(str(scanner.source), field="source"),
                         "the scanner file has no source section, so it cannot be scanned",
                         "add a source section (energy or kvp) and an exposure section")
    energy = None if args.energy is None else _energy_option(args.energy)
    summary = run_scan(phantom, scanner, Path(args.output), seed=args.seed,
                       noise=not args.noise_free, reference_energy_kev=energy)
    print(summary)
    return 0


def cmd_reconstruct(args: argparse.Namespace) -> int:
    from simbench.execute.reconstruct import run_reconstruction

    if (args.algorithm is None) == (args.external_command is None):
        raise InputError(Where("<command line>", field="--algorithm"),
                         "give exactly one of --algorithm and --command",
                         "--algorithm NAME, or --command 'PROGRAM ARGS' for an external program")
    if args.external_command is not None:
        from simbench.recon.external import external_reconstructor

        limit = _number_option(args.time_limit, "--time-limit", 0.1, 7 * 86400.0)
        reconstructor = external_reconstructor("external", args.external_command, stage=args.stage,
                                               time_limit_s=limit)
    else:
        from simbench.recon.registry import find_reconstructor

        reconstructor = find_reconstructor(args.algorithm, allow_code=True)
    options = {}
    for text in args.option:
        key, sep, value = text.partition("=")
        if not sep or not key.strip():
            raise InputError(Where("<command line>", field="--option"),
                             f"'{text}' is not KEY=VALUE", "an option such as filter=hann")
        options[key.strip()] = value.strip()
    print(run_reconstruction(Path(args.scan), reconstructor, options, Path(args.output),
                             grid_options=(args.grid_size, args.voxel_size, args.grid_centre)))
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    from simbench.execute.run import run_scenario
    from simbench.scenario import load_scenario

    scenario = load_scenario(resolve(args.scenario, "scenarios"))
    from simbench.cli_scale import workers_option

    run_scenario(scenario, Path(args.output), allow_code=args.allow_code,
                 progress=not args.quiet and sys.stderr.isatty(), reuse=not args.fresh,
                 workers=workers_option(args.workers), scheduler=args.scheduler)
    return 0


def cmd_compare(args: argparse.Namespace) -> int:
    from simbench.scenario.regression import compare_command

    print(compare_command(args.runs, args.output))
    return 0


def cmd_baseline(args: argparse.Namespace) -> int:
    from simbench.scenario.regression import baseline_command

    print(baseline_command(args.run_folder, args.output))
    return 0


def cmd_check(args: argparse.Namespace) -> int:
    from simbench.scenario.regression import check_command

    return check_command(args.run_folder, args.baseline, args.junit, args.markdown)


def cmd_algorithms(args: argparse.Namespace) -> int:
    from simbench.recon.registry import list_reconstructors

    for name, found, problem in list_reconstructors():
        if found is None:
            print(f"{name}: cannot be loaded: {problem}")
            continue
        print(f"{name}  [{found.stage}; {found.origin}]  {found.summary}")
        for option in found.options:
            print(f"    {option.name} = {option.default!r}: {option.help} ({option.valid()})")
    print("Also: --algorithm module:function or file.py:function, and --command 'PROGRAM "
          "{exchange}' for a program in any language (docs/plugins.md).")
    return 0


def cmd_spectrum(args: argparse.Namespace) -> int:
    from simbench.report.spectrum_figure import plot_spectrum
    from simbench.scanner import load_scanner

    out = _check_output(args.output, ".png")
    scanner = load_scanner(resolve(args.scanner, "scanners"))
    spectrum = scanner.spectrum()
    plot_spectrum(spectrum, out)
    print(f"wrote {out}")
    from simbench.materials.spectra import effective_energy_kev

    print(f"mean energy {spectrum.mean_energy_kev:.1f} keV, first HVL {spectrum.hvl_mm_al:.2f} "
          f"mm Al, effective energy {effective_energy_kev(spectrum, 'water'):.1f} keV in water "
          f"({spectrum.effective_energy_kev:.1f} keV in aluminium)")
    return 0


def cmd_list(args: argparse.Namespace) -> int:
    from simbench.materials import material_names

    print("shipped phantoms:  " + ", ".join(shipped_files("phantoms")))
    print("shipped scanners:  " + ", ".join(shipped_files("scanners")))
    print("shipped scenarios: " + ", ".join(shipped_files("scenarios")))
    print("shipped dataset specs: " + ", ".join(shipped_files("datasets")))
    print("catalogue materials: " + ", ".join(material_names()))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    import numpy as np

    out = Path(args.output)
    print(simbench.CAUTION)
    print("(The first run compiles the numba kernels, under a minute on 2 cores; they are "
          "cached for later runs.)")
    steps = [
        ["draw", "water-ellipse-inserts", "-o", str(out / "water-ellipse-inserts.png")],
        ["draw", "cone-beam-3d", "-o", str(out / "cone-beam-3d.png")],
        ["trace", "shepp-logan", "parallel-bench-2d", "--energy", "60", "-o", str(out / "shepp-logan-sinogram.npy")],
        ["trace", "water-ellipse-inserts", "fan-clinical", "--energy", "70", "-o", str(out / "water-ellipse-fan.npy")],
        ["scan", "water-ellipse-inserts", "fan-clinical", "--seed", "1", "-o", str(out / "scan")],
        ["reconstruct", str(out / "scan"), "--algorithm", "fbp", "--option", "filter=hann",
         "--option", "water_correction=true", "--grid-size", "512", "-o",
         str(out / "reconstruction")],
    ]
    for step in steps:
        print("$ simbench " + " ".join(step))
        code = main(step)
        if code:
            return code
    from simbench.report.sinogram_figure import draw_sinogram

    for name in ("shepp-logan-sinogram", "water-ellipse-fan"):
        draw_sinogram(np.load(out / f"{name}.npy"), out / f"{name}.png", title=name)
        print(f"wrote {out / (name + '.png')}")
    figure = _demo_comparison(out / "scan", out / "reconstruction",
                              out / "truth-reconstruction-difference.png")
    print(f"wrote {figure}: truth, reconstruction and difference in HU, the whole loop")
    return 0


def _demo_comparison(scan: Path, reconstruction: Path, path: Path) -> Path:
    """Truth (rasterized at the scan's reference energy on the reconstruction's grid),
    reconstruction and difference, in HU."""
    import numpy as np

    import json

    from simbench.folders import verify_folder
    from simbench.geometry import ImageGrid
    from simbench.materials import get_material, mu_table
    from simbench.phantom import load_phantom, rasterize
    from simbench.report.comparison_figure import draw_comparison, to_hu

    record = json.loads((scan / "scan.json").read_text(encoding="utf-8"))
    verify_folder(reconstruction, "reconstruction")
    info = json.loads((reconstruction / "reconstruction.json").read_text(encoding="utf-8"))
    g = info["grid"]
    grid = ImageGrid(tuple(g["shape"]), tuple(g["spacing_mm"]), tuple(g["centre_mm"]),
                     g["dimension"])
    energy = float(record["truth"]["reference_energy_kev"])
    truth = rasterize(load_phantom(record["phantom"]["file"]), grid, energy)
    mu_water, mu_air = mu_table([get_material("water"), get_material("air")], [energy])[:, 0]
    image = np.load(reconstruction / "image.npy").astype(np.float64)
    # outside the field of view no view sees every point: not compared
    from simbench.geometry import Poses, field_of_view_radius_mm

    radius = field_of_view_radius_mm(Poses.from_record(record["geometry"]))
    x, y = np.meshgrid(grid.axis_mm("x"), grid.axis_mm("y"))
    image[np.hypot(x, y) > radius] = np.nan
    return draw_comparison(to_hu(truth, mu_water, mu_air), to_hu(image, mu_water, mu_air),
                           grid.extent_mm(), path,
                           title=f"{record['phantom']['name']}, {record['scanner']['name']}, "
                                 f"FBP at {energy:g} keV")


# ------------------------------------------------------------------------------------------
# Helpers
# ------------------------------------------------------------------------------------------


def _energy_option(value: str) -> float:
    from simbench.materials.attenuation import VALID_ENERGY_RANGE_KEV
    from simbench.spec import parse_energy

    where = Where("<command line>", field="--energy")
    energy = parse_energy(value, where)
    lo, hi = VALID_ENERGY_RANGE_KEV
    if not lo <= energy <= hi:
        raise InputError(where, f"{energy:g} keV is outside the attenuation tables",
                         f"an energy from {lo:g} to {hi:g} keV")
    return energy


#: image sizes ``draw`` accepts: enough to see a phantom, small enough for a figure
PIXELS_RANGE = (16, 4096)


def _pixels_option(value: str) -> int:
    lo, hi = PIXELS_RANGE
    try:
        pixels = int(value)
    except ValueError:
        pixels = None
    if pixels is None or not lo <= pixels <= hi:
        raise InputError(Where("<command line>", field="--pixels"),
                         f"'{value}' is not an image size in pixels", f"a whole number from {lo} "
                         f"to {hi}")
    return pixels


def _number_option(value: str, option: str, low: float, high: float) -> float:
    import math

    try:
        number = float(value)
    except ValueError:
        number = math.nan
    if not (math.isfinite(number) and low <= number <= high):
        raise InputError(Where("<command line>", field=option), f"'{value}' is not valid",
                         f"a number from {low:g} to {high:g}")
    return number


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line and exit 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message} (see '{self.prog} --help')\n")
        raise SystemExit(2)


#: modules with ``add_commands(command)``, where ``command(name, help, example)`` returns the
#: sub-parser to fill; they import nothing heavy at module level (``--help`` stays fast)
COMMAND_MODULES = ("simbench.cli_scale", "simbench.cli_export")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="simbench",
        description="A virtual CT scanner and test bench: exact line integrals of phantoms, "
                    "measurement physics, and scoring of processing code against the truth. "
                    + simbench.CAUTION,
        epilog="Shipped phantoms and scanners can be named without a path (see 'simbench list').",
    )
    parser.add_argument("--version", action="version", version=f"simbench {simbench.__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def command(name: str, help_text: str, example: str | None = None) -> argparse.ArgumentParser:
        sub = commands.add_parser(name, help=help_text, description=help_text,
                                  epilog=f"example: {example or EXAMPLES[name]}")
        sub.add_argument("--memory-budget", metavar="SIZE", default=None,
                         help="refuse work estimated to need more memory than this, e.g. '8 GiB' "
                              "(default: $SIMBENCH_MEMORY_BUDGET, else 80%% of available memory)")
        return sub

    p = command("trace", "Trace a phantom through a scanner's geometry into exact monochromatic "
                         "line integrals (float64 .npy plus a JSON sidecar of the geometry).")
    p.add_argument("phantom", help="phantom file or shipped phantom name")
    p.add_argument("scanner", help="scanner file or shipped scanner name")
    p.add_argument("--energy", required=True, metavar="KEV", help="reference energy in keV")
    p.add_argument("-o", "--output", required=True, metavar="FILE.npy", help="output file")
    p.set_defaults(run=cmd_trace)

    p = command("draw", "Draw a phantom (central slices for 3-D) with object labels and a scale bar.")
    p.add_argument("phantom", help="phantom file or shipped phantom name")
    p.add_argument("-o", "--output", required=True, metavar="FILE.png", help="output PNG")
    p.add_argument("--energy", default="60", metavar="KEV", help="energy for mu, keV (default 60)")
    p.add_argument("--pixels", default="512", metavar="N",
                   help=f"image size, {PIXELS_RANGE[0]} to {PIXELS_RANGE[1]} (default 512)")
    p.add_argument("--seed", default="0", metavar="N",
                   help="root seed of a phantom with a random section (default 0)")
    p.add_argument("--sample", default="0", metavar="N",
                   help="sample index of a phantom with a random section (default 0)")
    p.set_defaults(run=cmd_draw)

    p = command("scan", "Scan a phantom: raw counts, flat and dark frames and projections, "
                        "with a JSON sidecar of every physics setting.")
    p.add_argument("phantom", help="phantom file or shipped phantom name")
    p.add_argument("scanner", help="scanner file or shipped scanner name (with a source section)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="output folder")
    p.add_argument("--seed", type=int, default=0, metavar="N", help="root seed (default 0)")
    p.add_argument("--noise-free", action="store_true", help="expected values, no random noise")
    p.add_argument("--energy", default=None, metavar="KEV",
                   help="reference energy of the truth line integrals, keV (default: the source "
                        "energy, or the mean energy of the detected air spectrum)")
    p.set_defaults(run=cmd_scan)

    p = command("reconstruct", "Reconstruct a scan folder with a built-in, installed or "
                               "external reconstructor; writes a folder with image.npy and a "
                               "JSON sidecar.")
    p.add_argument("scan", help="scan folder written by 'simbench scan'")
    p.add_argument("--algorithm", metavar="NAME", default=None,
                   help="a name from 'simbench algorithms', module:function or file.py:function")
    p.add_argument("--command", metavar="'PROGRAM ARGS'", default=None, dest="external_command",
                   help="an external program run on an exchange folder ({exchange} in ARGS, "
                        "else appended); see docs/plugins.md")
    p.add_argument("--stage", choices=("projections", "counts"), default="projections",
                   help="input stage of --command (default projections)")
    p.add_argument("--time-limit", default="3600", metavar="S",
                   help="seconds before --command is stopped (default 3600)")
    p.add_argument("--option", action="append", default=[], metavar="KEY=VALUE",
                   help="an option of the reconstructor (repeat for several)")
    p.add_argument("--grid-size", default=None, metavar="N|NX,NY[,NZ]",
                   help="image size in voxels (default: the detector's sampling over the "
                        "field of view)")
    p.add_argument("--voxel-size", default=None, metavar="MM", help="voxel size in mm")
    p.add_argument("--grid-centre", default=None, metavar="X,Y[,Z]", help="grid centre in mm")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="output folder")
    p.set_defaults(run=cmd_reconstruct)

    p = command("run", "Run a scenario: scan, reconstruct with every algorithm, score against "
                       "the exact truth, and write metrics.json and report.html in one folder.")
    p.add_argument("scenario", help="scenario file or shipped scenario name")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="output folder")
    p.add_argument("--allow-code", action="store_true",
                   help="allow the module paths and programs named in the scenario file to run")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--fresh", action="store_true",
                   help="make everything again (default: take over the finished truth, "
                        "measurements and built-in reconstructions of an interrupted or earlier "
                        "run into DIR whose inputs are unchanged, and say so)")
    p.add_argument("--workers", default=None, metavar="N",
                   help="measure and reconstruct on N local worker processes (default: in this "
                        "process; the results are the same bits)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on a Dask cluster, e.g. tcp://host:8786 (its workers must see DIR "
                        "at the same path)")
    p.set_defaults(run=cmd_run)

    p = command("compare", "Compare runs: one table across runs, algorithms and doses of the main "
                           "metrics with their intervals; printed, and written as CSV and markdown.")
    p.add_argument("runs", nargs="+", metavar="RUN", help="run folders written by 'simbench run'")
    p.add_argument("-o", "--output", default=None, metavar="PREFIX",
                   help="also write PREFIX.csv and PREFIX.md")
    p.set_defaults(run=cmd_compare)

    p = command("baseline", "Write a baseline file from a run, with default tolerances you can "
                            "edit, for 'simbench check'.")
    p.add_argument("run_folder", metavar="RUN", help="run folder written by 'simbench run'")
    p.add_argument("-o", "--output", required=True, metavar="FILE.yaml", help="baseline file")
    p.set_defaults(run=cmd_baseline)

    p = command("check", "Check a run against a baseline: exit 1 if a metric regressed beyond "
                         "its tolerance (decided on the realizations' statistics).")
    p.add_argument("run_folder", metavar="RUN", help="run folder written by 'simbench run'")
    p.add_argument("--baseline", required=True, metavar="FILE.yaml", help="baseline file")
    p.add_argument("--junit", default=None, metavar="FILE.xml", help="write JUnit XML")
    p.add_argument("--markdown", default=None, metavar="FILE.md", help="write a markdown summary")
    p.set_defaults(run=cmd_check)

    p = command("algorithms", "List every reconstructor found: built-in, installed through "
                              "the simbench.reconstructors entry points, with stage and options.")
    p.set_defaults(run=cmd_algorithms)

    p = command("spectrum", "Plot a scanner's source spectrum; print mean energy and HVL.")
    p.add_argument("scanner", help="scanner file or shipped scanner name")
    p.add_argument("-o", "--output", required=True, metavar="FILE.png", help="output PNG")
    p.set_defaults(run=cmd_spectrum)

    p = command("list", "List the shipped phantoms, scanners, scenarios and dataset specs, and the "
                        "catalogue materials.")
    p.set_defaults(run=cmd_list)

    p = command("demo", "Draw, trace, scan and reconstruct shipped phantoms into a folder, and "
                        "show truth, reconstruction and difference: the whole loop in a minute.")
    p.add_argument("-o", "--output", default="simbench-demo", metavar="DIR",
                   help="output folder (default simbench-demo)")
    p.set_defaults(run=cmd_demo)
    for module in COMMAND_MODULES:  # commands kept beside the code they drive
        importlib.import_module(module).add_commands(command)
    return parser


def _one_line_warning(message, category, filename, lineno, file=None, line=None) -> None:
    text = " ".join(str(message).split())
    sys.stderr.write(f"simbench: warning: {text}\n")


class Interrupted(BaseException):
    """SIGINT or SIGTERM arrived: unwinds like KeyboardInterrupt so every output in progress
    is removed by its ``finally`` (temporary files, staging folders)."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


def _on_signal(signum, frame) -> None:
    # one signal is enough: later ones must not interrupt the clean-up of the first
    for other in (signal.SIGINT, signal.SIGTERM):
        signal.signal(other, signal.SIG_IGN)
    raise Interrupted(signum)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code.

    0 done; 2 bad input (one line naming the file, line, column and field) or an output that
    cannot be written; 128 + the signal number after SIGINT (130) or SIGTERM (143), with
    nothing half-written left behind.
    """
    from simbench.budget import parse_size, set_memory_budget

    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    previous = warnings.showwarning
    warnings.showwarning = _one_line_warning
    handlers, previous_budget = {}, None
    if threading.current_thread() is threading.main_thread():
        handlers = {s: signal.signal(s, _on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        budget = getattr(args, "memory_budget", None)
        if budget is not None:
            previous_budget = set_memory_budget(parse_size(
                budget, Where("<command line>", field="--memory-budget")))
        return int(args.run(args) or 0)
    except InputError as error:
        sys.stderr.write(f"simbench: error: {error}\n")
        return 2
    except (Interrupted, KeyboardInterrupt) as stop:
        signum = getattr(stop, "signum", signal.SIGINT)
        sys.stderr.write(f"simbench: stopped by {signal.Signals(signum).name}; nothing "
                         "half-written was put in place ('run' and 'generate' resume from their "
                         "finished work when started again)\n")
        return 128 + int(signum)
    except OSError as exc:
        place = exc.filename if exc.filename is not None else "<output>"
        sys.stderr.write(f"simbench: error: {place}: {exc.strerror or exc} (valid: a path "
                         "that exists or can be created and written, on a disk with room)\n")
        return 2
    except MemoryError:
        sys.stderr.write("simbench: error: out of memory (valid: a smaller input, or a smaller "
                         "--memory-budget so that estimates refuse it before the work starts)\n")
        return 2
    finally:
        warnings.showwarning = previous
        if getattr(args, "memory_budget", None) is not None:
            set_memory_budget(previous_budget)
        for number, handler in handlers.items():
            signal.signal(number, handler)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
