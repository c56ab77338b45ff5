"""Command-line commands that export runs, scans, reconstructions and datasets to open formats
(added to ``simbench`` by :mod:`simbench.cli`)."""

from __future__ import annotations

EXAMPLE = "simbench export quickstart-run --format dicom --algorithm fbp-hann --dose 1 -o run-dicom"


def add_commands(command) -> None:
    """Add this module's commands; ``command(name, help, example)`` returns a sub-parser."""
    p = command("export", "Export a run, scan, reconstruction or dataset folder to open formats: "
                          "projections as NeXus NXtomo (HDF5), images as TIFF stacks or DICOM CT "
                          "series in HU. Without --truth, --measured or --algorithm, everything "
                          "the format holds.", EXAMPLE)
    p.add_argument("source", metavar="FOLDER",
                   help="a run, scan, reconstruction or dataset folder written by simbench")
    p.add_argument("--format", required=True, metavar="FORMAT",
                   help="nxtomo (projections), tiff (images and projections) or dicom (images)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="export folder")
    p.add_argument("--truth", action="store_true",
                   help="the truth: image (tiff, dicom), labels (tiff), exact line integrals "
                        "(nxtomo, tiff)")
    p.add_argument("--measured", action="store_true",
                   help="the measured projections (nxtomo, tiff)")
    p.add_argument("--algorithm", action="append", metavar="NAME", default=[],
                   help="the reconstructions of this algorithm (repeat for more; 'all' for "
                        "every one)")
    p.add_argument("--dose", action="append", metavar="FACTOR", default=[],
                   help="only this dose factor of a run, e.g. 1 or 0.25 (repeat for more; "
                        "default every dose)")
    p.add_argument("--realization", action="append", metavar="N", default=[],
                   help="only this noise realization of a run, from 0 (repeat for more; "
                        "default every one)")
    p.add_argument("--sample", action="append", metavar="N", default=[],
                   help="only this sample of a dataset, from 0 (repeat for more; default every "
                        "one)")
    p.add_argument("--data", default=None, metavar="KIND",
                   help="measured data to write: counts (raw counts with flat and dark frames) "
                        "or line-integrals (default: counts where kept for nxtomo, "
                        "line-integrals for tiff)")
    p.add_argument("--hu-step", default=None, metavar="HU",
                   help="DICOM quantization step in HU, the rescale slope (default 1; a "
                        "coarser power-of-two multiple where an image's range needs it)")
    p.set_defaults(run=cmd_export)


def cmd_export(args) -> int:
    """``simbench export``: write the chosen items of a folder in one open format."""
    from simbench.errors import InputError, Where
    from simbench.export.writer import Choice, export

    hu_step = None
    if args.hu_step is not None:
        try:
            hu_step = float(args.hu_step)
        except ValueError:
            raise InputError(Where("<command line>", field="--hu-step"),
                             f"'{args.hu_step}' is not a number",
                             "a step above 0 and at most 1000 HU, e.g. 1 or 0.25") from None
    choice = Choice(truth=args.truth, measured=args.measured,
                    algorithms=tuple(args.algorithm), doses=tuple(args.dose),
                    realizations=tuple(args.realization),
                    samples=tuple(args.sample), data=args.data, hu_step=hu_step)
    export(args.source, args.format.strip().lower(), args.output, choice)
    return 0
