"""The engine of batch runs: plans checked before any work, partitions, whole runs.

See the package documentation (:mod:`service.batch`) for what a run reads and writes.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import functools
import importlib.metadata
import json
import os
import pathlib
import platform
import re
import sys
import threading
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from .. import __version__
from .csvinput import is_nullable_int
from .jobs import JOBS
from .spec import (
    CATALOGUE_EPOCH_FIELD,
    FLAG_DTYPE,
    ROW_FLAG_MEANINGS,
    BatchDataError,
    BatchInputError,
    BatchJob,
    RowFlag,
)

#: Name of the metadata file written beside the Parquet parts of the output.
METADATA_FILE = "_skydrift_run.json"

#: Version of the layout of the metadata file (raised when a key changes meaning).
METADATA_LAYOUT = 1

#: Distributions whose versions are recorded in the metadata.
RECORDED_DISTRIBUTIONS = (
    "numpy",
    "pyerfa",
    "astropy",
    "astropy-iers-data",
    "pandas",
    "pyarrow",
    "dask",
    "distributed",
)

INPUT_FORMATS = ("auto", "parquet", "csv")

#: Default partition size when reading Parquet (Dask's ``blocksize``): a file larger than
#: twice this is split, its row groups gathered into partitions of up to this much
#: uncompressed data (all of the file's columns counted); a smaller file is one partition.
#: The work per row is numeric, so partitions of a few hundred thousand rows keep every
#: worker busy while a partition's arrays stay small (Dask's own default, 256 MiB, gives
#: too few partitions for a few million rows).
DEFAULT_PARQUET_BLOCKSIZE = "16MiB"
LOCAL_SCHEDULERS = ("threads", "processes", "synchronous")

#: How long to wait for a Dask scheduler given by address before giving up, seconds.
SCHEDULER_TIMEOUT_S = 30.0

_EXTRA_HINT = "the batch commands need the optional extra: pip install 'skydrift[batch]'"


class ColumnNotNumeric(BatchInputError):
    """A column mapped to a numeric field has another type in the input's schema."""

    def __init__(self, message: str, column: str, field):
        super().__init__(message)
        self.column = column
        self.field = field


# ---------------------------------------------------------------------------------------
# Plans: what one run does, checked before any work
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BatchPlan:
    """Everything a partition needs: the job, the column mapping and the parameters.

    Attributes
    ----------
    job : BatchJob
    mapping : dict
        Canonical field name -> input column, for the fields read from the input.
    absent : tuple of str
        Optional fields not in the input (unknown, NaN, for every row).
    keep : tuple of str
        Input columns copied unchanged to the output (identifiers).
    params : dict
        Job parameters (epochs as Julian epochs TDB, model, ...).
    """

    job: BatchJob
    mapping: dict
    absent: tuple
    keep: tuple
    params: dict

    @property
    def columns_read(self) -> list[str]:
        """Input columns to read, each once, in a stable order."""
        cols = list(self.keep)
        for src in self.mapping.values():
            if src not in cols:
                cols.append(src)
        return cols


def parse_column_mapping(text: str | None = None, path: str | None = None) -> dict:
    """Read a column mapping from ``name=COLUMN,...`` text and/or a JSON or TOML file.

    Parameters
    ----------
    text : str, optional
        Comma-separated ``canonical=column`` pairs.
    path : str, optional
        JSON or TOML file of ``canonical = "column"`` pairs (TOML: at top level or under a
        ``[columns]`` table). Pairs in ``text`` override those in the file.

    Returns
    -------
    dict
        Canonical field name -> input column name.
    """
    mapping: dict = {}
    if path:
        p = pathlib.Path(path)
        kind = "TOML" if p.suffix.lower() == ".toml" else "JSON"
        # A mapping file that cannot be read is a bad command line (exit 2), as an input
        # that cannot be opened is: it was exit 1 with the bare error of open() or json.
        try:
            raw = p.read_text()
        except OSError as exc:
            raise BatchInputError(f"--columns-file {path}: {exc.strerror or exc}") from None
        try:
            if kind == "TOML":
                import tomllib

                data = tomllib.loads(raw)
            else:
                data = json.loads(raw)
        except ValueError as exc:  # tomllib.TOMLDecodeError and JSONDecodeError included
            raise BatchInputError(f"--columns-file {path}: not {kind} ({exc})") from None
        if isinstance(data, dict) and isinstance(data.get("columns"), dict):
            data = data["columns"]
        if not isinstance(data, dict) or not all(
            isinstance(k, str) and isinstance(v, str) for k, v in data.items()
        ):
            raise BatchInputError(
                f'{path}: a column mapping is a table of canonical_name = "column" pairs'
            )
        mapping.update(data)
    if text:
        for item in text.split(","):
            item = item.strip()
            if not item:
                continue
            name, sep, column = item.partition("=")
            if not sep or not name.strip() or not column.strip():
                raise BatchInputError(
                    f"--columns: {item!r} is not of the form canonical_name=COLUMN"
                )
            mapping[name.strip()] = column.strip()
    return mapping


def make_plan(
    job: BatchJob | str,
    input_columns: Mapping[str, object],
    *,
    columns: Mapping[str, str] | None = None,
    keep: Sequence[str] = (),
    params: dict,
    source: str = "the input",
) -> BatchPlan:
    """Check a run against the input's columns and build its plan, before any work.

    Parameters
    ----------
    job : BatchJob or str
    input_columns : mapping
        Column name -> dtype of the input (its schema).
    columns : mapping, optional
        Canonical field name -> input column (Note 1).
    keep : sequence of str
        Input columns to copy to the output unchanged.
    params : dict
        Job parameters, completed and checked by the job (``propagate``:
        ``target_epoch_jyear``, ``model`` and, unless a per-row epoch column is mapped,
        ``catalogue_epoch_jyear``; ``velocity``: all optional).
    source : str
        How to name the input in messages.

    Returns
    -------
    BatchPlan

    Raises
    ------
    BatchInputError
        Unknown field name in the mapping; required column missing; mapped or kept column
        missing; non-numeric input column; output name clash; missing parameter.

    Notes
    -----
    1. A field not in ``columns`` is looked up under its canonical name. Names in
       ``columns`` that are fields of other jobs only are ignored (one mapping can serve
       every job); names that no job knows are an error. Optional fields
       found under neither are absent (unknown for every row); fields marked
       ``mapped_only`` (the per-row catalogue epoch) are read only when mapped explicitly.
    """
    if isinstance(job, str):
        try:
            job = JOBS[job]
        except KeyError:
            raise BatchInputError(f"unknown job {job!r}; choose one of {sorted(JOBS)}") from None
    columns = dict(columns or {})
    names = {f.name for f in job.fields}
    every_job = {f.name for j in JOBS.values() for f in j.fields}
    unknown = sorted(set(columns) - every_job)
    if unknown:
        raise BatchInputError(
            f"unknown field name(s) {', '.join(unknown)} in the column mapping; the fields of "
            f"'{job.name}' are: {', '.join(f.name for f in job.fields)}"
        )
    # One mapping file may serve every job of a catalogue: fields of other jobs are ignored.
    columns = {k: v for k, v in columns.items() if k in names}
    available = list(input_columns)
    shown = ", ".join(available[:40]) + (" ..." if len(available) > 40 else "")

    def _missing(column, why):
        return BatchInputError(
            f"column {column!r} ({why}) is not in {source}; its columns are: {shown}"
        )

    mapping: dict = {}
    absent: list = []
    for f in job.fields:
        explicit = f.name in columns
        if f.mapped_only and not explicit:
            continue
        src = columns.get(f.name, f.name)
        if src in input_columns:
            dtype = input_columns[src]
            if not _is_numeric(dtype):
                raise ColumnNotNumeric(
                    f"column {src!r}{_field_note(f)} in {source} is not numeric (dtype {dtype})",
                    src,
                    f,
                )
            mapping[f.name] = src
        elif f.required:
            hint = "" if explicit else f"; map it with --columns {f.name}=COLUMN"
            raise _missing(src, f"required field {f.name}, {f.unit}{hint}")
        elif explicit:
            raise _missing(src, f"mapped to {f.name}")
        else:
            absent.append(f.name)
    keep = tuple(keep)
    for k in keep:
        if k not in input_columns:
            raise _missing(k, "asked to keep")
    clash = sorted(set(keep) & set(job.output_names))
    if clash:
        raise BatchInputError(
            f"kept column(s) {', '.join(clash)} would clash with result columns of the same "
            "name; keep them under another name in the input, or do not keep them"
        )
    params = job.check_params(dict(params), mapping)
    used = job.fields_used(params)
    if used is not None:
        mapping = {k: v for k, v in mapping.items() if k in used}
        absent = [k for k in absent if k in used]
    return BatchPlan(job, mapping, tuple(absent), keep, params)


def _nullable(dtype):
    """The type a kept column is read with: whole numbers as pandas' nullable integers, so
    that a star without that identifier further on (an empty cell) is copied as unknown
    rather than stopping the run; other types as they are."""
    import pandas as pd

    if dtype.kind in "iu":
        return pd.api.types.pandas_dtype(dtype.name.capitalize().replace("Uint", "UInt"))
    return dtype


def _is_numeric_numpy(dtype) -> bool:
    """A numpy integer or float dtype (not a pandas extension dtype)."""
    return isinstance(dtype, np.dtype) and dtype.kind in "fiu"


def _refuse_text_cell(source, exc: ColumnNotNumeric) -> None:
    """BatchInputError naming the first cell of a CSV column that is not a number (the
    first rows gave the column its type), with its file and line, if one is found."""
    from .csvinput import head_problem

    found = head_problem(source, exc.column)
    if found is not None:
        path, line, problem, column = found
        if column is not None:
            f = exc.field
            problem = f"column {column!r}{_field_note(f)}: {problem}"
        raise BatchInputError(f"{path}: line {line}: {problem}") from None


def _is_numeric(dtype) -> bool:
    try:
        kind = np.dtype(dtype).kind
    except TypeError:
        # pandas extension dtypes (nullable Int64, Float64, pyarrow-backed numbers)
        kind = getattr(getattr(dtype, "numpy_dtype", None), "kind", "O")
    return kind in "fiu"  # not "b": a column of true/false is no number (False is not 0 mas)


# ---------------------------------------------------------------------------------------
# One partition
# ---------------------------------------------------------------------------------------


def _as_float(series) -> np.ndarray:
    values = series.to_numpy()
    if values.dtype == np.float64:
        return values
    return series.to_numpy(dtype=np.float64, na_value=np.nan)


def _acceptable(x: np.ndarray, f) -> np.ndarray:
    """True where a value can be computed with: in range, or NaN for an optional field."""
    finite_bounds = np.isfinite(f.low) and np.isfinite(f.high)
    with np.errstate(invalid="ignore"):
        ok = (x >= f.low) & (x <= f.high) if finite_bounds else np.isfinite(x)
    if not f.required:
        ok |= np.isnan(x)
    return ok


def _all_acceptable(x: np.ndarray, f, required: bool) -> bool:
    """Whether every value is acceptable, from two reductions (no temporaries).

    The minimum and maximum propagate NaN for required fields (so NaN fails the test) and
    skip it for optional ones (fmin, fmax), where NaN means unknown.
    """
    if x.size == 0:
        return True
    if required:
        lo, hi = np.minimum.reduce(x), np.maximum.reduce(x)
    else:
        lo, hi = np.fmin.reduce(x), np.fmax.reduce(x)
        if np.isnan(lo):  # all unknown
            return True
    return bool(np.isfinite(lo) and np.isfinite(hi) and lo >= f.low and hi <= f.high)


def row_checks(plan: BatchPlan, inputs: dict) -> np.ndarray:
    """:class:`RowFlag` bits per row from the input arrays of one partition.

    Notes
    -----
    1. NaN in a required field: REQUIRED_VALUE_MISSING. Infinite, or outside the field's
       valid range: VALUE_OUT_OF_RANGE. NaN in an optional field is "unknown", not bad,
       except a per-row catalogue epoch the job moves the stars from (a row without it
       cannot be computed; ``BatchJob.epoch_dates_motion``).
    2. Two reductions per field (minimum and maximum) find whether anything is wrong; the
       rows are classified only when something is (rare in real catalogues).
    """
    n = len(next(iter(inputs.values())))
    flags = np.zeros(n, dtype=np.uint32)
    for name, x in inputs.items():
        f = plan.job.field(name)
        required = f.required or (
            name == CATALOGUE_EPOCH_FIELD.name and plan.job.epoch_dates_motion
        )
        if _all_acceptable(x, f, required):
            continue
        ok = _acceptable(x, f)
        nan = np.isnan(x)
        if required:
            flags[nan] |= np.uint32(RowFlag.REQUIRED_VALUE_MISSING)
        flags[~ok & ~nan] |= np.uint32(RowFlag.VALUE_OUT_OF_RANGE)
    return flags


def process_partition(frame, plan: BatchPlan):
    """Apply a plan to one partition (a pandas DataFrame); return the output partition.

    Parameters
    ----------
    frame : pandas.DataFrame
        The partition, with (at least) the plan's input columns.
    plan : BatchPlan

    Returns
    -------
    pandas.DataFrame
        Kept columns, the job's result columns and ``row_flags``, on the partition's index.

    Notes
    -----
    1. Rows with any :class:`RowFlag` bit get NaN results and zero job flags; for the core
       their inputs are replaced by placeholders, so that the rows that are computed see
       exactly the values they would see in one call of the core on the whole catalogue
       (the core is element-wise: no result depends on another row).
    """
    import pandas as pd

    n = len(frame)
    inputs = {name: _as_float(frame[src]) for name, src in plan.mapping.items()}
    for name in plan.absent:
        inputs[name] = np.full(n, np.nan)
    if n:
        row_flags = row_checks(plan, inputs)
    else:
        row_flags = np.zeros(0, dtype=np.uint32)
    skipped = row_flags != 0
    any_skipped = bool(skipped.any())
    if any_skipped:
        inputs = {
            name: np.where(skipped, plan.job.field(name).placeholder, x)
            for name, x in inputs.items()
        }
    results = plan.job.compute(inputs, plan.params) if n else {}
    # Kept columns as they are: numpy arrays, or pandas' nullable integers as such (their
    # to_numpy() would give objects, and the writer floats that round large ids).
    data = {k: frame[k].array if is_nullable_int(frame[k].dtype) else frame[k].to_numpy()
            for k in plan.keep}  # fmt: skip
    for col in plan.job.outputs:
        if col.dtype == "category":
            codes = np.asarray(results[col.name] if n else np.zeros(0), dtype=np.int16)
            if any_skipped:
                codes = np.where(skipped, -1, codes)
            data[col.name] = pd.Categorical.from_codes(codes, categories=col.categories)
            continue
        values = results[col.name] if n else np.zeros(0)
        values = np.asarray(values).astype(col.dtype, copy=False)
        if any_skipped:
            blank = np.nan if values.dtype.kind == "f" else 0
            values = np.where(skipped, blank, values).astype(col.dtype, copy=False)
        data[col.name] = values
    data["row_flags"] = row_flags
    # copy=False: one block per column, no copy into a consolidated 2-D block.
    return pd.DataFrame(data, index=frame.index, copy=False)


def output_meta(plan: BatchPlan, input_meta):
    """Empty pandas DataFrame with the output's columns and dtypes (Dask's ``meta``)."""
    import pandas as pd

    data = {k: input_meta[k].iloc[:0] for k in plan.keep}
    for col in plan.job.outputs:
        if col.dtype == "category":
            empty = pd.Categorical.from_codes(np.zeros(0, dtype=np.int16), col.categories)
            data[col.name] = pd.Series(empty)
        else:
            data[col.name] = pd.Series(np.zeros(0, dtype=col.dtype))
    data["row_flags"] = pd.Series(np.zeros(0, dtype=FLAG_DTYPE))
    return pd.DataFrame(data, index=input_meta.index[:0])


# ---------------------------------------------------------------------------------------
# Whole runs
# ---------------------------------------------------------------------------------------


def _require_dask():
    try:
        import dask  # noqa: F401
        import dask.dataframe  # noqa: F401
        import pyarrow  # noqa: F401
    except ImportError as exc:  # pragma: no cover - depends on the installation
        raise BatchInputError(f"{_EXTRA_HINT} ({exc})") from None


def detect_format(source: str, input_format: str = "auto") -> str:
    """``parquet`` or ``csv`` from the option or the file name (default Parquet)."""
    if input_format not in INPUT_FORMATS:
        raise BatchInputError(f"unknown input format {input_format!r}; use {INPUT_FORMATS}")
    if input_format != "auto":
        return input_format
    lowered = str(source).lower()
    for suffix in (".csv", ".csv.gz", ".csv.bz2", ".csv.xz", ".csv.zst"):
        if lowered.endswith(suffix):
            return "csv"
    return "parquet"


def open_input(source, input_format: str = "auto", *, blocksize=None):
    """Open the input lazily with dask.dataframe; only its schema is read here.

    Returns
    -------
    (dask DataFrame, format)
    """
    _require_dask()
    import dask.dataframe as dd

    fmt = detect_format(str(source), input_format)
    try:
        if fmt == "parquet":
            frame = dd.read_parquet(source, blocksize=blocksize or DEFAULT_PARQUET_BLOCKSIZE)
        else:
            frame = _open_csv(source, blocksize=blocksize)
    except (FileNotFoundError, OSError) as exc:
        raise BatchInputError(f"cannot open {source}: {exc}") from None
    return frame, fmt


def _open_csv(source, **kwargs):
    """CSV input read by the service's rule (:mod:`.csvinput`); a row refused in the first
    rows (read here, for the columns and their types) stops the run before any work."""
    from . import csvinput

    try:
        return csvinput.read_csv(source, **kwargs)
    except csvinput.CsvRowError as exc:
        raise BatchInputError(csvinput.describe(source, exc)) from None


def build_output(source, plan_args: dict, *, input_format="auto", blocksize=None):
    """The lazy output: open, check (fail fast), read only the needed columns, map.

    Parameters
    ----------
    source : str or path
        Parquet file, directory or glob; or CSV file(s).
    plan_args : dict
        Keyword arguments of :func:`make_plan` except ``input_columns`` and ``source``
        (``job``, ``columns``, ``keep``, ``params``).
    input_format : {"auto", "parquet", "csv"}
    blocksize : int or str, optional
        Partition size for reading (Dask's ``blocksize``); default Dask's.

    Returns
    -------
    (dask DataFrame, BatchPlan, dict)
        The output collection, the plan, and facts about the input for the metadata.
    """
    frame, fmt = open_input(source, input_format, blocksize=blocksize)
    schema = dict(frame.dtypes.items())
    types = schema
    if fmt == "csv" and not all(_is_numeric(t) for t in schema.values()):
        from .csvinput import first_file_has_no_rows

        if first_file_has_no_rows(source):
            # A header without rows types every column as text: taken as numbers (the
            # re-open below reads them as float64, refusing any cell that is not), as a
            # Parquet file without rows has its columns' types.
            types = {k: np.dtype("float64") for k in schema}
    try:
        plan = make_plan(input_columns=types, source=str(source), **plan_args)
    except ColumnNotNumeric as exc:
        if fmt == "csv":
            _refuse_text_cell(source, exc)
        raise
    if fmt == "parquet":
        frame = frame[plan.columns_read]
    else:
        # Re-open reading only the needed columns, numbers as float64; kept columns of
        # numbers with the type their first rows gave them (a later cell that does not fit
        # is then refused with its line, not in a dask message about types).
        from .csvinput import columns_without_cells

        dtypes = {k: _nullable(schema[k]) for k in plan.keep if _is_numeric_numpy(schema[k])}
        # A kept column without a cell in those rows is float64 only for want of cells: it
        # is copied as text (the identifiers of the later stars), not refused as no number.
        dtypes.update(dict.fromkeys(columns_without_cells(source, set(dtypes)), object))
        dtypes.update({src: "float64" for src in plan.mapping.values()})
        frame = _open_csv(source, blocksize=blocksize, usecols=plan.columns_read, dtype=dtypes)
        frame = frame[plan.columns_read]
    meta = output_meta(plan, frame._meta)
    out = frame.map_partitions(process_partition, plan, meta=meta)
    facts = {
        "source": str(source),
        "format": fmt,
        "partitions": int(frame.npartitions),
        "columns_read": plan.columns_read,
    }
    return out, plan, facts


@dataclass
class RunSummary:
    """What a run did: rows, flag counts per name, time, where the output went."""

    destination: str
    rows: int
    flag_counts: dict
    wall_time_s: float
    metadata: dict = field(repr=False)


def _count_flags(frame, bits: dict):
    """One-row DataFrame: rows, and for each flag column and bit the rows with it set."""
    import pandas as pd

    counts = {"rows": len(frame)}
    for col, col_bits in bits.items():
        values = frame[col].to_numpy()
        present = int(np.bitwise_or.reduce(values)) if len(values) else 0
        if present < 1 << 16:
            # One pass: how many rows have each mask, then the bits of the masks seen.
            per_mask = np.bincount(values, minlength=present + 1)
            masks = np.flatnonzero(per_mask)
            for bit in col_bits:
                with_bit = masks[(masks >> bit) & 1 == 1]
                counts[f"{col}:{bit}"] = int(per_mask[with_bit].sum())
            continue
        for bit in col_bits:
            n = 0
            if present >> bit & 1:
                n = int(np.count_nonzero(values & np.uint32(1 << bit)))
            counts[f"{col}:{bit}"] = n
    return pd.DataFrame({k: np.array([v], dtype=np.int64) for k, v in counts.items()})


def _flag_bits(job: BatchJob) -> dict:
    """Flag column -> bit indices of its enumeration's members."""
    types = {"row_flags": RowFlag, **{c: t for c, (t, _) in job.flag_columns.items()}}
    return {col: [int(m.value).bit_length() - 1 for m in t] for col, t in types.items()}


def _versions() -> dict:
    out = {"skydrift": __version__, "python": platform.python_version()}
    for dist in RECORDED_DISTRIBUTIONS:
        try:
            out[dist] = importlib.metadata.version(dist)
        except importlib.metadata.PackageNotFoundError:
            out[dist] = None
    try:
        import erfa

        out["erfa (library)"] = erfa.version.erfa_version
    except Exception:  # pragma: no cover - old pyerfa without the attribute
        pass
    return out


def flag_names(mask, column: str, job: BatchJob | str) -> list[tuple[str, ...]]:
    """Names of the bits set in a flag column of a job's output, per row.

    Parameters
    ----------
    mask : array_like of int
        Values of the column.
    column : str
        ``row_flags`` or one of the job's flag columns.
    job : BatchJob or str

    Returns
    -------
    list of tuple of str
        One tuple per row (as :func:`service.core.flags.flag_names`).
    """
    from ..core.flags import flag_names as _names

    job = JOBS[job] if isinstance(job, str) else job
    flag_type = RowFlag if column == "row_flags" else job.flag_columns[column][0]
    return _names(np.asarray(mask, dtype=np.int64), flag_type)


def _flag_tables(job: BatchJob) -> dict:
    tables = {"row_flags": _flag_table(RowFlag, ROW_FLAG_MEANINGS)}
    for col, (flag_type, meanings) in job.flag_columns.items():
        tables[col] = _flag_table(flag_type, meanings)
    return tables


def _flag_table(flag_type, meanings) -> dict:
    return {
        str(int(m.value)): {"name": m.name.lower(), "meaning": meanings.get(m, "")}
        for m in flag_type
    }


def _part_name(width: int, i: int) -> str:
    """File name of output part ``i``, numbered to ``width`` digits: Parquet readers that
    take a directory (pyarrow's datasets, pandas) read its files in the order of their
    names, and dask's own names (part.0, part.1, part.10, ..., part.2) would give them the
    rows out of the input's order from the eleventh part on."""
    return f"part.{i:0{width}d}.parquet"


def run_batch(
    job: BatchJob | str,
    source,
    destination,
    *,
    params: dict,
    columns: Mapping[str, str] | None = None,
    keep: Sequence[str] = (),
    input_format: str = "auto",
    blocksize=None,
    scheduler: str | None = None,
    client=None,
    local: str = "threads",
    workers: int | None = None,
    overwrite: bool = False,
    progress: bool = False,
    given: Mapping[str, object] | None = None,
) -> RunSummary:
    """Run a job over a whole catalogue and write Parquet plus the metadata file.

    Parameters
    ----------
    job : BatchJob or str
        The job (:data:`JOBS`).
    source : str or path
        Input Parquet file, directory or glob, or CSV file(s).
    destination : str or path
        Output directory (Parquet parts and :data:`METADATA_FILE`).
    params : dict
        Job parameters (see :func:`make_plan`); epochs as Julian epochs TDB.
    columns : mapping, optional
        Column mapping, canonical field name -> input column.
    keep : sequence of str
        Input columns copied to the output (identifiers).
    input_format : {"auto", "parquet", "csv"}
    blocksize : int or str, optional
        Partition size for reading.
    scheduler : str, optional
        Address of a running dask.distributed scheduler (``tcp://host:8786``). Default: the
        local scheduler in this process.
    client : distributed.Client, optional
        An existing client to run on (instead of ``scheduler``).
    local : {"threads", "processes", "synchronous"}
        Local scheduler when neither ``scheduler`` nor ``client`` is given.
    workers : int, optional
        Local workers (default: the CPU count).
    overwrite : bool
        Replace an existing output directory (otherwise a non-empty one stops the run).
    progress : bool
        Show a progress bar on standard error.
    given : mapping, optional
        Parameters as the user wrote them (epoch strings: ``catalogue_epoch``,
        ``target_epoch``), recorded in the metadata beside their Julian epochs.

    Returns
    -------
    RunSummary

    Raises
    ------
    BatchInputError
        Before any work, for every problem that can be seen from the options and the input's
        schema (missing column, unknown field, existing output, ...).
    """
    started = _dt.datetime.now(_dt.UTC)
    t0 = time.perf_counter()
    if local not in LOCAL_SCHEDULERS:
        raise BatchInputError(f"unknown local scheduler {local!r}; use {LOCAL_SCHEDULERS}")
    _require_dask()
    fs, dest_path = _filesystem(destination)
    dest = str(destination)
    _refuse_overlap(source, fs, dest_path, dest)
    if fs.exists(dest_path) and not overwrite:
        if not fs.isdir(dest_path) or fs.ls(dest_path):
            raise BatchInputError(
                f"output {dest} exists and is not empty; choose another or pass --overwrite"
            )
    out, plan, facts = build_output(
        source,
        {"job": job, "columns": columns, "keep": keep, "params": params},
        input_format=input_format,
        blocksize=blocksize,
    )
    job = plan.job
    import dask

    bits = _flag_bits(job)
    write = out.to_parquet(
        dest,
        write_index=False,
        overwrite=overwrite,
        compute=False,
        name_function=functools.partial(_part_name, len(str(max(out.npartitions - 1, 0)))),
        # Dictionary encoding pays for the flag columns (few distinct values) but costs
        # more than it saves on columns of measured values, which are nearly all distinct.
        use_dictionary=list(bits),
    )
    counts_meta = _count_flags(out._meta, bits).iloc[:0]
    counts = out.map_partitions(_count_flags, bits, meta=counts_meta)

    own_client = None
    execution: dict
    if client is None and scheduler:
        try:
            from distributed import Client
        except ImportError:  # pragma: no cover
            raise BatchInputError(f"{_EXTRA_HINT} (dask.distributed)") from None
        try:
            own_client = client = Client(scheduler, timeout=SCHEDULER_TIMEOUT_S)
        except (OSError, TimeoutError) as exc:
            raise BatchInputError(
                f"cannot reach the Dask scheduler at {scheduler} within "
                f"{SCHEDULER_TIMEOUT_S:g} s ({exc})"
            ) from None
    _silence_known_upstream_warnings()  # for the scheduler's workers in this process
    try:
        if client is not None:
            from distributed import progress as dist_progress

            execution = {
                "scheduler": "dask.distributed",
                "address": str(client.scheduler.address),
                "workers": len(client.scheduler_info(n_workers=-1)["workers"]),
                "threads": int(sum(client.nthreads().values())),
            }
            futures = client.compute([write, counts])
            if progress:
                with contextlib.redirect_stdout(sys.stderr):
                    dist_progress(futures)
                    sys.stderr.write("\n")
            _, count_frame = client.gather(futures)
            worker_versions = client.run(_versions)
            execution["worker_versions"] = _distinct(worker_versions.values())
        else:
            n_workers = workers or _cpu_count()
            execution = {"scheduler": f"local {local}", "workers": n_workers}
            cfg = {"scheduler": local}
            if local != "synchronous":
                cfg["num_workers"] = n_workers
            with dask.config.set(cfg), _progress_bar(progress):
                _, count_frame = dask.compute(write, counts)
    except BaseException as exc:
        # A run that stops part-way (a cell no number, a worker lost) leaves no output:
        # Parquet parts without the metadata file would read back as a smaller catalogue.
        with contextlib.suppress(OSError):
            if fs.exists(dest_path):
                fs.rm(dest_path, recursive=True)
        from .csvinput import CsvRowError, describe

        if isinstance(exc, CsvRowError):
            raise BatchDataError(describe(source, exc, _column_note(plan))) from None
        raise
    finally:
        if own_client is not None:
            own_client.close()

    totals = count_frame.sum(axis=0) if len(count_frame) else {}
    rows = int(totals.get("rows", 0)) if len(count_frame) else 0
    flag_counts: dict = {}
    for col in bits:
        flag_type = RowFlag if col == "row_flags" else job.flag_columns[col][0]
        flag_counts[col] = {
            m.name.lower(): int(totals.get(f"{col}:{int(m.value).bit_length() - 1}", 0) or 0)
            for m in flag_type
        }
    wall = time.perf_counter() - t0
    metadata = _metadata(plan, facts, execution, started, wall, rows, flag_counts, dest)
    metadata["parameters"] = _parameter_record(plan, given or {})
    with fs.open(_join(dest_path, METADATA_FILE), "w") as handle:
        handle.write(json.dumps(metadata, indent=2) + "\n")
    return RunSummary(dest, rows, flag_counts, wall, metadata)


def _column_note(plan: BatchPlan):
    """column -> " (for field, in unit)" or " (kept)", for messages about an input cell."""
    fields = {src: plan.job.field(name) for name, src in plan.mapping.items()}

    def note(column: str) -> str:
        f = fields.get(column)
        if f is not None:
            return _field_note(f)
        return " (kept)" if column in plan.keep else ""

    return note


def _field_note(f) -> str:
    """ " (for field, in unit)": what an input column is read as, in messages about it."""
    return f" (for {f.name}, in {f.unit})"


#: The warning filter a batch run adds to the process, as ``warnings.filterwarnings``
#: arguments: dask's Parquet reader and writer call DataFrame.reset_index(inplace=True),
#: deprecated in pandas 3.1 (Pandas4Warning, a FutureWarning subclass); harmless, and nothing
#: a user can change. Narrow: that one message, raised from dask's own modules.
KNOWN_UPSTREAM_WARNING_FILTER = {
    "action": "ignore",
    "message": "The inplace keyword in DataFrame.reset_index",
    "category": Warning,
    "module": "dask",
}

_FILTER_LOCK = threading.Lock()


def _silence_known_upstream_warnings() -> None:
    """Put :data:`KNOWN_UPSTREAM_WARNING_FILTER` first in the process's warnings filters.

    The filter stays after the run, once in the list however many runs add it (as
    ``warnings.filterwarnings`` replaces an equal entry). It is not scoped with
    ``warnings.catch_warnings()``: that saves the process-wide filter list on entry and puts
    it back on exit, so runs in two threads of one process could put back each other's
    lists (leaving filters behind or dropping them); and the warnings are raised in the
    scheduler's worker threads, which only the process-wide list reaches.
    """
    with _FILTER_LOCK:
        warnings.filterwarnings(**KNOWN_UPSTREAM_WARNING_FILTER)


def _distinct(records) -> list:
    out: list = []
    for r in records:
        if r not in out:
            out.append(r)
    return out


def _cpu_count() -> int:
    import os

    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


@contextlib.contextmanager
def _progress_bar(show: bool):
    if not show:
        yield
        return
    from dask.diagnostics import ProgressBar

    with ProgressBar(out=sys.stderr):
        yield


def _parameter_record(plan: BatchPlan, given: Mapping) -> dict:
    job = plan.job
    if job.describe_params is not None:
        record = dict(job.describe_params(plan.params, plan.mapping, given))
    else:
        record = {k: v for k, v in plan.params.items() if _jsonable(v)}
    record["frames"] = dict(job.frames)
    return record


def _jsonable(value) -> bool:
    try:
        json.dumps(value)
    except TypeError:
        return False
    return True


def _metadata(plan, facts, execution, started, wall, rows, flag_counts, dest) -> dict:
    job = plan.job
    return {
        "layout": METADATA_LAYOUT,
        "job": job.name,
        "started_utc": started.isoformat(timespec="seconds").replace("+00:00", "Z"),
        "wall_time_s": round(wall, 3),
        "input": {
            **facts,
            "column_mapping": dict(plan.mapping),
            "absent_optional_fields": list(plan.absent),
            "kept_columns": list(plan.keep),
            "fields": {
                f.name: {"unit": f.unit, "required": f.required, "description": f.description}
                for f in job.fields
                if f.name in plan.mapping or f.name in plan.absent
            },
        },
        "output": {
            "destination": str(dest),
            "format": "parquet",
            "rows": rows,
            "columns": {
                **{k: {"description": "copied from the input"} for k in plan.keep},
                **{
                    c.name: {"dtype": c.dtype, "unit": c.unit, "description": c.description}
                    for c in job.outputs
                },
                "row_flags": {
                    "dtype": FLAG_DTYPE,
                    "unit": "bit mask",
                    "description": "RowFlag bits: why a row was not computed",
                },
            },
        },
        "data_tables": job.data_tables(),
        "flags": _flag_tables(job),
        "flag_counts": flag_counts,
        "execution": execution,
        "versions": _versions(),
    }


def read_metadata(destination) -> dict:
    """The metadata of a finished run (the JSON file in its output directory)."""
    fs, path = _filesystem(destination)
    with fs.open(_join(path, METADATA_FILE), "r") as handle:
        return json.load(handle)


def _refuse_overlap(source, dest_fs, dest_path: str, shown: str) -> None:
    """BatchInputError when the output is the input, holds it, or lies inside it: writing
    (and with --overwrite, first emptying) the output would destroy or change the input
    before it is read. Checked on the same file system (local paths resolved), with glob
    patterns cut at their first wildcard."""
    from fsspec.implementations.local import LocalFileSystem

    def norm(fs, path: str) -> str:
        path = re.split(r"[*?[]", path, maxsplit=1)[0]
        if isinstance(fs, LocalFileSystem):
            path = os.path.realpath(path)
        return path.rstrip("/")

    dest = norm(dest_fs, dest_path)
    for item in source if isinstance(source, list | tuple) else [source]:
        fs, path = _filesystem(item)
        if type(fs) is not type(dest_fs):
            continue
        src = norm(fs, path)
        if src and (src == dest or src.startswith(dest + "/") or dest.startswith(src + "/")):
            raise BatchInputError(
                f"output {shown} overlaps the input {item} (the same place, or one inside "
                "the other): writing it would change the input before it is read; choose "
                "another output"
            )


def _filesystem(url):
    """(fsspec filesystem, path) for a local path or a URL such as s3://bucket/dir."""
    from fsspec.core import url_to_fs

    return url_to_fs(str(url))


def _join(path: str, name: str) -> str:
    return path.rstrip("/") + "/" + name
