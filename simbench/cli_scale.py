"""Command-line commands that generate and verify datasets (added to ``simbench`` by :mod:`simbench.cli`)."""

from __future__ import annotations

import sys


def add_commands(command) -> None:
    """Add this module's commands; ``command(name, help, example)`` returns a sub-parser."""
    p = command("generate", "Generate a dataset from a spec: truth images, ROI labels, exact "
                            "line integrals and measured data per dose for many samples, in "
                            "HDF5 shards with a manifest of checksums; resumes after an "
                            "interruption.",
                "simbench generate inserts-2d -o my-dataset --workers 2")
    p.add_argument("spec", help="dataset spec file or shipped spec name (see docs/datasets.md)")
    p.add_argument("-o", "--output", required=True, metavar="DATASET", help="dataset folder")
    p.add_argument("--workers", default=None, metavar="N",
                   help="run on N local worker processes (default: in this process)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on a Dask cluster, e.g. tcp://host:8786 (its workers must see the "
                        "dataset folder at the same path)")
    p.add_argument("--allow-code", action="store_true",
                   help="allow the module or file path of the spec's reconstructor to run")
    p.add_argument("--start-over", action="store_true",
                   help="if the folder holds a dataset of another spec, delete it first")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=cmd_generate)

    p = command("verify", "Recheck every checksum of a dataset (shard files and every array "
                          "of every sample); exit 0 if whole, 1 naming what is wrong.",
                "simbench verify my-dataset")
    p.add_argument("dataset", metavar="DATASET", help="dataset folder")
    p.set_defaults(run=cmd_verify)


def workers_option(value: str | None) -> int | None:
    from simbench.errors import InputError, Where
    from simbench.execute.executors import MAX_LOCAL_WORKERS

    if value is None:
        return None
    try:
        n = int(value)
    except ValueError:
        n = 0
    if not 1 <= n <= MAX_LOCAL_WORKERS:
        raise InputError(Where("<command line>", field="--workers"),
                         f"'{value}' is not a number of worker processes",
                         f"a whole number from 1 to {MAX_LOCAL_WORKERS}")
    return n


def cmd_generate(args) -> int:
    """``simbench generate``: plan (checked and costed), then write or resume the dataset."""
    from pathlib import Path

    from simbench.execute.dataset import DatasetPlan, generate
    from simbench.execute.dataset_spec import load_dataset_spec
    from simbench.execute.executors import open_executor

    workers = workers_option(args.workers)
    spec = load_dataset_spec(args.spec, allow_code=args.allow_code)
    plan = DatasetPlan(spec, Path(args.output), workers=workers or 1)
    with open_executor(workers=workers, scheduler=args.scheduler) as executor:
        generate(plan, executor, start_over=args.start_over, progress=not args.quiet)
    return 0


def cmd_verify(args) -> int:
    """``simbench verify``: 0 if every checksum matches, 1 with one line per problem."""
    from simbench.execute.dataset import verify_dataset

    problems, summary = verify_dataset(args.dataset)
    for problem in problems:
        sys.stderr.write(f"simbench: damaged: {' '.join(problem.split())}\n")
    print(summary)
    return 1 if problems else 0
