"""``skydrift batch JOB INPUT OUTPUT ...``: whole-catalogue runs from the command line."""

from __future__ import annotations

import sys

from ..numbers import whole
from .engine import INPUT_FORMATS, LOCAL_SCHEDULERS, METADATA_FILE
from .jobs import JOBS
from .spec import FLAG_DTYPE, BatchDataError, BatchInputError, BatchJob


def add_subcommands(sub) -> None:
    """Add the ``batch`` command and its job subcommands to the ``skydrift`` parser."""
    batch = sub.add_parser(
        "batch",
        help="run a job over a whole catalogue (Parquet or CSV) with Dask",
        description="Whole-catalogue runs on Dask: local by default, on a cluster with "
        "--scheduler. Needs the optional extra skydrift[batch]. "
        "'skydrift batch fields JOB' lists a job's input fields and output columns.",
    )
    jobs = batch.add_subparsers(dest="batch_job", required=True)
    for job in JOBS.values():
        p = jobs.add_parser(job.name, help=job.summary, description=job.summary)
        p.add_argument("input", help="Parquet file, directory or glob, or CSV file(s)")
        p.add_argument("output", help="output directory (Parquet parts and metadata)")
        job.add_options(p)
        _common_options(p)
        p.set_defaults(func=_run, batch_job_spec=job)
    fields = jobs.add_parser("fields", help="list a job's input fields and output columns")
    fields.add_argument(
        "job",
        type=str.lower,
        choices=sorted(JOBS),
        metavar="job",
        help="the job whose fields to list: " + ", ".join(sorted(JOBS)),
    )
    fields.set_defaults(func=_fields)


def _common_options(p) -> None:
    p.add_argument(
        "--columns",
        help="column mapping, canonical=COLUMN pairs separated by commas "
        "(e.g. ra_deg=RA_ICRS,dec_deg=DE_ICRS)",
    )
    p.add_argument("--columns-file", help="column mapping as a JSON or TOML file")
    p.add_argument(
        "--keep", default="", help="input columns to copy to the output (comma-separated)"
    )
    p.add_argument(
        "--format", default="auto", type=str.lower, choices=INPUT_FORMATS, help="input format"
    )
    p.add_argument(
        "--blocksize", help="partition size for reading, e.g. 64MiB (default: 16MiB for Parquet)"
    )
    p.add_argument(
        "--scheduler",
        help="address of a running Dask scheduler, e.g. tcp://10.0.0.5:8786 (default: run locally)",
    )
    p.add_argument(
        "--local",
        default="threads",
        type=str.lower,
        choices=LOCAL_SCHEDULERS,
        help="local scheduler (default threads)",
    )
    p.add_argument("--workers", type=whole, help="local workers (default: CPU count)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output")
    p.add_argument(
        "--quiet", action="store_true", help="no progress bar (also off when not a terminal)"
    )


def _fields(args) -> int:
    job = JOBS[args.job]
    print(f"{job.name}: {job.summary}")
    print("input fields (map other column names with --columns NAME=COLUMN):")
    for f in job.fields:
        need = "required" if f.required else "optional"
        print(f"  {f.name:32s} {need:8s} {f.unit:22s} {f.description}")
    print("output columns:")
    for c in job.outputs:
        print(f"  {c.name:32s} {c.dtype:8s} {c.unit:22s} {c.description}")
    print(f"  {'row_flags':32s} {FLAG_DTYPE:8s} {'bit mask':22s} RowFlag bits")
    return 0


def _run(args) -> int:
    job: BatchJob = args.batch_job_spec
    try:
        from .engine import parse_column_mapping, run_batch

        mapping = parse_column_mapping(args.columns, args.columns_file)
        keep = [k.strip() for k in args.keep.split(",") if k.strip()]
        params, given = job.params_from_args(args)
        summary = run_batch(
            job,
            args.input,
            args.output,
            params=params,
            columns=mapping,
            keep=keep,
            input_format=args.format,
            blocksize=args.blocksize,
            scheduler=args.scheduler,
            local=args.local,
            workers=args.workers,
            overwrite=args.overwrite,
            progress=not args.quiet and sys.stderr.isatty(),
            given=given,
        )
    except BatchInputError as exc:
        print(f"skydrift batch {job.name}: {exc}", file=sys.stderr)
        return 2
    except BatchDataError as exc:
        # A CSV row or cell refused part-way, with its file and line: no output is left.
        print(f"skydrift batch {job.name}: {exc}", file=sys.stderr)
        return 1
    except (OSError, ValueError) as exc:
        # Found while reading the files or running (an option dask refuses, a path that
        # cannot be written): said in one line; no partial output is left (engine.run_batch).
        print(f"skydrift batch {job.name}: {type(exc).__name__}: {exc}", file=sys.stderr)
        return 1
    print(
        f"{summary.rows} rows -> {summary.destination} in {summary.wall_time_s:.1f} s "
        f"(metadata: {METADATA_FILE})"
    )
    for col, counts in summary.flag_counts.items():
        notable = {k: v for k, v in counts.items() if v}
        if notable:
            print(f"  {col}: " + ", ".join(f"{k} {v}" for k, v in notable.items()))
    return 0
