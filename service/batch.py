"""Whole-catalogue runs: the core applied partition by partition with Dask.

A catalogue too large for one HTTP request (or one machine's memory) is processed as a
dask.dataframe over Parquet (or CSV) files: each partition is read with only the columns a
job needs, handed to the core's vectorised functions as numpy arrays, and written back as
Parquet with the results and per-row flags. The same functions as the HTTP service, so the
numbers are the same to the last bit; Dask only decides which partition runs where.

Jobs
----
``propagate``
    :func:`service.core.propagation.propagate` to one target epoch.

Each job declares its input fields (canonical names with units, required or optional, valid
ranges), its output columns and its flag enumerations; see :data:`JOBS` and
``skydrift batch fields JOB``.

Column mapping
--------------
Inputs are found by canonical field name (``ra_deg``, ``pm_dec_mas_yr``, ...). A catalogue
with other column names maps them, canonical name on the left::

    --columns ra_deg=RA_ICRS,dec_deg=DE_ICRS,parallax_mas=Plx

or with a JSON or TOML file of the same pairs (``--columns-file``; a TOML file may also put
them under a ``[columns]`` table). Values must already be in the canonical units. Optional
fields absent from the input are unknown for every row (the core's flags then say so); a
required field absent, or any explicitly mapped column absent, stops the run before any work
with a message naming the column.

Per-row flags
-------------
Every output row carries ``row_flags`` (:class:`RowFlag`: the row could not be computed at
all, e.g. NaN in a required field; its results are then NaN and its job flags 0) and the
job's own flag column (e.g. ``propagation_flags``, :class:`~service.core.propagation.
PropagationFlag`). Flag columns are unsigned 32-bit bit masks; the metadata file lists every
bit with its name and meaning, and :func:`flag_names` turns a column into lists of names.

Metadata
--------
Next to the Parquet parts, ``_skydrift_run.json`` records the job, the input and its column
mapping, the epochs (as given, as Julian epoch TDB and ISO UTC), the model and frames, the
flag meanings and counts, how the run was executed, and the versions of the service and of
numpy, pyerfa (with its ERFA), astropy, astropy-iers-data, pandas, pyarrow and dask
(on the workers too, for a cluster). Readers of the dataset skip files whose names begin
with an underscore.

Dask, pandas and pyarrow are the optional extra ``skydrift[batch]``; this module imports them
only when a run starts, so the service itself does not need them.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import enum
import importlib.metadata
import json
import pathlib
import platform
import sys
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from . import __version__
from .core import propagation as _propagation
from .core.constants import C_KM_S
from .core.epochs import EPOCH_MAX_JYEAR, EPOCH_MIN_JYEAR, label_epochs, parse_epoch

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

#: dtype of every flag column in the output (bit masks).
FLAG_DTYPE = "uint32"

INPUT_FORMATS = ("auto", "parquet", "csv")

#: Default partition size when reading Parquet: Dask groups row groups up to this much
#: (uncompressed) data. The work per row is numeric, so partitions of a few hundred thousand
#: rows keep every worker busy while a partition's arrays stay small (Dask's own default,
#: 256 MiB, gives too few partitions for a few million rows).
DEFAULT_PARQUET_BLOCKSIZE = "32MiB"
LOCAL_SCHEDULERS = ("threads", "processes", "synchronous")

_EXTRA_HINT = "the batch commands need the optional extra: pip install 'skydrift[batch]'"


class BatchInputError(ValueError):
    """The run cannot start: bad mapping, missing column, bad option. Says what to change."""


class RowFlag(enum.IntFlag):
    """Why a row of the input was not computed (column ``row_flags``)."""

    #: A required field is NaN or null in this row: no result (NaN), job flags 0.
    REQUIRED_VALUE_MISSING = 1
    #: A field is infinite or outside its valid range (e.g. declination beyond +-90 deg):
    #: no result (NaN), job flags 0.
    VALUE_OUT_OF_RANGE = 2


ROW_FLAG_MEANINGS = {
    RowFlag.REQUIRED_VALUE_MISSING: "A required field is NaN or null: row not computed "
    "(results NaN, job flags 0).",
    RowFlag.VALUE_OUT_OF_RANGE: "A field is infinite or outside its valid range: row not "
    "computed (results NaN, job flags 0).",
}


# ---------------------------------------------------------------------------------------
# Job descriptions
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class InputField:
    """One input a job reads from a catalogue column.

    Attributes
    ----------
    name : str
        Canonical field name, unit included (``ra_deg``).
    unit : str
        Unit the column must be in.
    description : str
        What the field is.
    required : bool
        Required fields must be present as columns and finite in every computed row;
        optional ones may be absent (unknown everywhere) or NaN (unknown in that row).
    low, high : float
        Valid closed range; values outside it, and infinities, flag the row
        VALUE_OUT_OF_RANGE.
    placeholder : float
        Value handed to the core in rows that are not computed (keeps numpy quiet about
        NaN or infinite arguments; those rows' results are discarded).
    """

    name: str
    unit: str
    description: str
    required: bool
    low: float = -np.inf
    high: float = np.inf
    placeholder: float = 0.0


@dataclass(frozen=True)
class OutputColumn:
    """One result column: name, numpy dtype, unit and description."""

    name: str
    dtype: str
    unit: str
    description: str


@dataclass(frozen=True)
class BatchJob:
    """A core computation packaged for partition-wise runs.

    Attributes
    ----------
    name : str
        Subcommand name.
    summary : str
        One line for the help text.
    fields : tuple of InputField
        Inputs, by canonical name.
    outputs : tuple of OutputColumn
        Result columns (flag columns included, dtype :data:`FLAG_DTYPE`).
    flag_columns : mapping of str to (IntFlag type, meanings)
        The job's flag columns: enumeration and {member: meaning}.
    compute : callable
        ``compute(inputs, params) -> {output name: ndarray}`` on one partition's arrays
        (every input a float64 array of the partition's length, unknown = NaN).
    frames : mapping
        Reference frames of input and output, for the metadata.
    """

    name: str
    summary: str
    fields: tuple[InputField, ...]
    outputs: tuple[OutputColumn, ...]
    flag_columns: Mapping[str, tuple[type[enum.IntFlag], Mapping]]
    compute: Callable[[dict, dict], dict]
    frames: Mapping[str, str]

    def field(self, name: str) -> InputField:
        for f in self.fields:
            if f.name == name:
                return f
        raise KeyError(name)


_ASTROMETRY_FIELDS = (
    InputField("ra_deg", "deg", "ICRS right ascension", True, 0.0, 360.0),
    InputField("dec_deg", "deg", "ICRS declination", True, -90.0, 90.0),
    InputField(
        "parallax_mas",
        "mas",
        "parallax; NaN = unknown, zero or negative accepted and flagged",
        False,
        placeholder=np.nan,
    ),
    InputField(
        "pm_ra_cosdec_mas_yr",
        "mas/yr",
        "proper motion in right ascension times cos(dec)",
        True,
    ),
    InputField("pm_dec_mas_yr", "mas/yr", "proper motion in declination", True),
    InputField(
        "radial_velocity_km_s",
        "km/s",
        "radial velocity, positive receding; NaN = unknown",
        False,
        -C_KM_S,
        C_KM_S,
        placeholder=np.nan,
    ),
)

_ASTROMETRY_OUTPUTS = (
    ("ra_deg", "deg", "ICRS right ascension at the target epoch"),
    ("dec_deg", "deg", "ICRS declination at the target epoch"),
    ("parallax_mas", "mas", "parallax at the target epoch (NaN where unknown)"),
    ("pm_ra_cosdec_mas_yr", "mas/yr", "proper motion in RA times cos(dec) at the target epoch"),
    ("pm_dec_mas_yr", "mas/yr", "proper motion in declination at the target epoch"),
    ("radial_velocity_km_s", "km/s", "radial velocity at the target epoch (NaN where unknown)"),
)

PROPAGATION_FLAG_MEANINGS = {
    _propagation.PropagationFlag.PARALLAX_MISSING: "No parallax: distance unknown, radial "
    "velocity not applied, parallax out unknown.",
    _propagation.PropagationFlag.PARALLAX_NOT_POSITIVE: "Parallax zero or negative: no "
    "distance; radial velocity not applied; parallax out is the formal value.",
    _propagation.PropagationFlag.RADIAL_VELOCITY_MISSING: "No radial velocity: taken as zero "
    "for the motion (no perspective acceleration); radial velocity out unknown.",
    _propagation.PropagationFlag.PROPER_MOTION_IMPLAUSIBLE: "Total proper motion above 10.4 "
    "arcsec/yr, more than any known star: probably a unit mistake.",
    _propagation.PropagationFlag.SPACE_VELOCITY_IMPLAUSIBLE: "Implied space velocity above "
    "half the speed of light: inconsistent inputs.",
    _propagation.PropagationFlag.AT_POLE: "At a celestial pole: right ascension undefined.",
    _propagation.PropagationFlag.DISTANCE_REPLACED: "Light-time model: distance replaced by "
    "a minimum value (SOFA pmsafe).",
    _propagation.PropagationFlag.NOT_CONVERGED: "Light-time model: iteration did not converge.",
    _propagation.PropagationFlag.RADIAL_VELOCITY_UNCHANGED: "Radial velocity given without a "
    "usable parallax: passed through unchanged.",
}

#: Optional per-row catalogue epoch (for catalogues whose stars have their own epochs).
CATALOGUE_EPOCH_FIELD = InputField(
    "catalogue_epoch_jyear",
    "Julian epoch (TDB), yr",
    "per-row catalogue epoch; used only when mapped with --columns (otherwise the "
    "--catalogue-epoch value holds for every row)",
    False,
    EPOCH_MIN_JYEAR,
    EPOCH_MAX_JYEAR,
    placeholder=2000.0,
)


def _compute_propagation(inputs: dict, params: dict) -> dict:
    epoch_from = inputs.get("catalogue_epoch_jyear")
    if epoch_from is None:
        epoch_from = params["catalogue_epoch_jyear"]
    result = _propagation.propagate(
        inputs["ra_deg"],
        inputs["dec_deg"],
        inputs["parallax_mas"],
        inputs["pm_ra_cosdec_mas_yr"],
        inputs["pm_dec_mas_yr"],
        inputs["radial_velocity_km_s"],
        epoch_from,
        params["target_epoch_jyear"],
        model=params["model"],
    )
    ast = result.astrometry
    out = {name: getattr(ast, name) for name, _, _ in _ASTROMETRY_OUTPUTS}
    out["propagation_flags"] = result.flags
    return out


PROPAGATE = BatchJob(
    name="propagate",
    summary="move every star's astrometry to one target epoch",
    fields=_ASTROMETRY_FIELDS + (CATALOGUE_EPOCH_FIELD,),
    outputs=tuple(OutputColumn(n, "float64", u, d) for n, u, d in _ASTROMETRY_OUTPUTS)
    + (
        OutputColumn(
            "propagation_flags", FLAG_DTYPE, "bit mask", "PropagationFlag bits (see metadata)"
        ),
    ),
    flag_columns={
        "propagation_flags": (_propagation.PropagationFlag, PROPAGATION_FLAG_MEANINGS),
    },
    compute=_compute_propagation,
    frames={"input": "ICRS", "output": "ICRS"},
)

#: The jobs by subcommand name.
JOBS: dict[str, BatchJob] = {PROPAGATE.name: PROPAGATE}


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
        raw = p.read_text()
        if p.suffix.lower() == ".toml":
            import tomllib

            data = tomllib.loads(raw)
        else:
            data = json.loads(raw)
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
        Job parameters; for ``propagate``: ``target_epoch_jyear``, ``model`` and (unless a
        per-row epoch column is mapped) ``catalogue_epoch_jyear``.
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
    1. A field not in ``columns`` is looked up under its canonical name. Optional fields
       found under neither are absent (unknown for every row); except the per-row catalogue
       epoch, which is read only when mapped explicitly.
    """
    if isinstance(job, str):
        try:
            job = JOBS[job]
        except KeyError:
            raise BatchInputError(f"unknown job {job!r}; choose one of {sorted(JOBS)}") from None
    columns = dict(columns or {})
    names = {f.name for f in job.fields}
    unknown = sorted(set(columns) - names)
    if unknown:
        raise BatchInputError(
            f"unknown field name(s) {', '.join(unknown)} in the column mapping; the fields of "
            f"'{job.name}' are: {', '.join(f.name for f in job.fields)}"
        )
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
        if f is CATALOGUE_EPOCH_FIELD and not explicit:
            continue
        src = columns.get(f.name, f.name)
        if src in input_columns:
            dtype = input_columns[src]
            if not _is_numeric(dtype):
                raise BatchInputError(
                    f"column {src!r} (for {f.name}, in {f.unit}) in {source} is not numeric "
                    f"(dtype {dtype})"
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
    out_names = [c.name for c in job.outputs] + ["row_flags"]
    clash = sorted(set(keep) & set(out_names))
    if clash:
        raise BatchInputError(
            f"kept column(s) {', '.join(clash)} would clash with result columns of the same "
            "name; keep them under another name in the input, or do not keep them"
        )
    params = dict(params)
    if job is PROPAGATE:
        params.setdefault("model", "standard")
        if params["model"] not in _propagation.MODELS:
            raise BatchInputError(
                f"unknown model {params['model']!r}; choose one of {_propagation.MODELS}"
            )
        if params.get("target_epoch_jyear") is None:
            raise BatchInputError("a target epoch is needed (--target-epoch)")
        per_row = "catalogue_epoch_jyear" in mapping
        if per_row and params.get("catalogue_epoch_jyear") is not None:
            raise BatchInputError(
                "give the catalogue epoch either as one value (--catalogue-epoch) or as a "
                "column (--columns catalogue_epoch_jyear=COLUMN), not both"
            )
        if not per_row and params.get("catalogue_epoch_jyear") is None:
            raise BatchInputError(
                "a catalogue epoch is needed: --catalogue-epoch (e.g. J2016.0) or a per-row "
                "column (--columns catalogue_epoch_jyear=COLUMN)"
            )
    return BatchPlan(job, mapping, tuple(absent), keep, params)


def _is_numeric(dtype) -> bool:
    try:
        kind = np.dtype(dtype).kind
    except TypeError:
        # pandas extension dtypes (nullable Int64, Float64, pyarrow-backed numbers)
        kind = getattr(getattr(dtype, "numpy_dtype", None), "kind", "O")
    return kind in "fiub"


# ---------------------------------------------------------------------------------------
# One partition
# ---------------------------------------------------------------------------------------


def _as_float(series) -> np.ndarray:
    values = series.to_numpy()
    if values.dtype == np.float64:
        return values
    return series.to_numpy(dtype=np.float64, na_value=np.nan)


def row_checks(plan: BatchPlan, inputs: dict) -> np.ndarray:
    """:class:`RowFlag` bits per row from the input arrays of one partition."""
    n = len(next(iter(inputs.values())))
    flags = np.zeros(n, dtype=np.uint32)
    for name, x in inputs.items():
        f = plan.job.field(name)
        nan = np.isnan(x)
        if f.required:
            flags[nan] |= np.uint32(RowFlag.REQUIRED_VALUE_MISSING)
        bad = ~nan & ~(np.isfinite(x) & (x >= f.low) & (x <= f.high))
        flags[bad] |= np.uint32(RowFlag.VALUE_OUT_OF_RANGE)
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
    data = {k: frame[k].to_numpy() for k in plan.keep}
    for col in plan.job.outputs:
        values = results[col.name] if n else np.zeros(0)
        values = np.asarray(values).astype(col.dtype, copy=False)
        if any_skipped:
            blank = np.nan if values.dtype.kind == "f" else 0
            values = np.where(skipped, blank, values).astype(col.dtype, copy=False)
        data[col.name] = values
    data["row_flags"] = row_flags
    return pd.DataFrame(data, index=frame.index)


def output_meta(plan: BatchPlan, input_meta):
    """Empty pandas DataFrame with the output's columns and dtypes (Dask's ``meta``)."""
    import pandas as pd

    data = {k: input_meta[k].iloc[:0] for k in plan.keep}
    for col in plan.job.outputs:
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
            kw = {} if blocksize is None else {"blocksize": blocksize}
            frame = dd.read_csv(source, **kw)
    except (FileNotFoundError, OSError) as exc:
        raise BatchInputError(f"cannot open {source}: {exc}") from None
    return frame, fmt


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
    plan = make_plan(input_columns=schema, source=str(source), **plan_args)
    if fmt == "parquet":
        frame = frame[plan.columns_read]
    else:
        # Re-open reading only the needed columns, numbers as float64.
        import dask.dataframe as dd

        kw = {} if blocksize is None else {"blocksize": blocksize}
        dtypes = {src: "float64" for src in plan.mapping.values()}
        frame = dd.read_csv(source, usecols=plan.columns_read, dtype=dtypes, **kw)
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


def _epoch_record(given, jyear) -> dict:
    labels = label_epochs([jyear])
    return {
        "given": given,
        "julian_epoch_tdb": float(jyear),
        "iso_utc": labels.iso_utc[0],
    }


def flag_names(mask, column: str, job: BatchJob | str) -> list[list[str]]:
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
    list of list of str
    """
    from .core.flags import flag_names as _names

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
    given_epochs: Mapping[str, object] | None = None,
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
    given_epochs : mapping, optional
        The epochs as the user wrote them (``catalogue_epoch``, ``target_epoch``), recorded
        in the metadata beside their Julian epochs.

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
    dest = pathlib.Path(destination)
    if dest.exists() and not overwrite:
        if not dest.is_dir() or any(dest.iterdir()):
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
        str(dest),
        write_index=False,
        overwrite=overwrite,
        compute=False,
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
        own_client = client = Client(scheduler)
    try:
        if client is not None:
            from distributed import progress as dist_progress

            execution = {
                "scheduler": "dask.distributed",
                "address": str(client.scheduler.address),
                "workers": len(client.scheduler_info(n_workers=-1)["workers"]),
                "threads": int(sum(client.nthreads().values())),
            }
            with _known_upstream_warnings():  # for workers in this process
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
            with dask.config.set(cfg), _progress_bar(progress), _known_upstream_warnings():
                _, count_frame = dask.compute(write, counts)
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
    metadata["parameters"] = _parameter_record(plan, given_epochs or {})
    (dest / METADATA_FILE).write_text(json.dumps(metadata, indent=2, sort_keys=False) + "\n")
    return RunSummary(str(dest), rows, flag_counts, wall, metadata)


@contextlib.contextmanager
def _known_upstream_warnings():
    """Silence warnings from the libraries' own code that say nothing about the run."""
    with warnings.catch_warnings():
        # dask's Parquet reader calls DataFrame.reset_index(inplace=True), deprecated in
        # pandas 3.1 (a FutureWarning subclass); harmless, and nothing a user can change.
        warnings.filterwarnings(
            "ignore", message="The inplace keyword in DataFrame.reset_index", category=Warning
        )
        yield


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
    params = dict(plan.params)
    record: dict = {}
    if plan.job is PROPAGATE:
        record["model"] = params["model"]
        if "catalogue_epoch_jyear" in plan.mapping:
            record["catalogue_epoch"] = {
                "column": plan.mapping["catalogue_epoch_jyear"],
                "unit": CATALOGUE_EPOCH_FIELD.unit,
            }
        else:
            record["catalogue_epoch"] = _epoch_record(
                given.get("catalogue_epoch", params["catalogue_epoch_jyear"]),
                params["catalogue_epoch_jyear"],
            )
        record["target_epoch"] = _epoch_record(
            given.get("target_epoch", params["target_epoch_jyear"]),
            params["target_epoch_jyear"],
        )
    else:
        record.update({k: v for k, v in params.items() if _jsonable(v)})
    record["frames"] = dict(plan.job.frames)
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
        "flags": _flag_tables(job),
        "flag_counts": flag_counts,
        "execution": execution,
        "versions": _versions(),
    }


def read_metadata(destination) -> dict:
    """The metadata of a finished run (the JSON file in its output directory)."""
    return json.loads((pathlib.Path(destination) / METADATA_FILE).read_text())


# ---------------------------------------------------------------------------------------
# Command line: ``skydrift batch JOB INPUT OUTPUT ...``
# ---------------------------------------------------------------------------------------


def add_subcommands(sub) -> None:
    """Add the ``batch`` command and its job subcommands to the ``skydrift`` parser."""
    batch = sub.add_parser(
        "batch",
        help="run a job over a whole catalogue (Parquet or CSV) with Dask",
        description="Whole-catalogue runs on Dask: local by default, on a cluster with "
        "--scheduler. Needs the optional extra skydrift[batch].",
    )
    jobs = batch.add_subparsers(dest="batch_job", required=True)
    for job in JOBS.values():
        p = jobs.add_parser(job.name, help=job.summary, description=job.summary)
        p.add_argument("input", help="Parquet file, directory or glob, or CSV file(s)")
        p.add_argument("output", help="output directory (Parquet parts and metadata)")
        if job is PROPAGATE:
            p.add_argument(
                "--catalogue-epoch",
                help="epoch of the input astrometry, e.g. J2016.0 (or map a per-row "
                "column to catalogue_epoch_jyear)",
            )
            p.add_argument("--target-epoch", required=True, help="epoch to move the stars to")
            p.add_argument(
                "--model", default="standard", choices=_propagation.MODELS, help="motion model"
            )
        _common_options(p)
        p.set_defaults(func=_cli_run, batch_job_spec=job)
    fields = jobs.add_parser("fields", help="list a job's input fields and output columns")
    fields.add_argument("job", choices=sorted(JOBS))
    fields.set_defaults(func=_cli_fields)


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
    p.add_argument("--format", default="auto", choices=INPUT_FORMATS, help="input format")
    p.add_argument("--blocksize", help="partition size for reading, e.g. 128MiB")
    p.add_argument("--scheduler", help="address of a running Dask scheduler (default: run locally)")
    p.add_argument(
        "--local",
        default="threads",
        choices=LOCAL_SCHEDULERS,
        help="local scheduler (default threads)",
    )
    p.add_argument("--workers", type=int, help="local workers (default: CPU count)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output")
    p.add_argument(
        "--quiet", action="store_true", help="no progress bar (also off when not a terminal)"
    )


def _cli_fields(args) -> int:
    job = JOBS[args.job]
    print(f"{job.name}: {job.summary}")
    print("input fields (map other column names with --columns NAME=COLUMN):")
    for f in job.fields:
        need = "required" if f.required else "optional"
        print(f"  {f.name:24s} {need:8s} {f.unit:24s} {f.description}")
    print("output columns:")
    for c in job.outputs:
        print(f"  {c.name:24s} {c.dtype:8s} {c.unit:24s} {c.description}")
    print(f"  {'row_flags':24s} {FLAG_DTYPE:8s} {'bit mask':24s} RowFlag bits")
    return 0


def _cli_run(args) -> int:
    job: BatchJob = args.batch_job_spec
    try:
        mapping = parse_column_mapping(args.columns, args.columns_file)
        keep = [k.strip() for k in args.keep.split(",") if k.strip()]
        params: dict = {}
        given: dict = {}
        if job is PROPAGATE:
            from .core.epochs import EpochError

            try:
                if args.catalogue_epoch is not None:
                    params["catalogue_epoch_jyear"] = parse_epoch(args.catalogue_epoch)
                    given["catalogue_epoch"] = args.catalogue_epoch
                params["target_epoch_jyear"] = parse_epoch(args.target_epoch)
                given["target_epoch"] = args.target_epoch
            except EpochError as exc:
                raise BatchInputError(f"epoch: {exc}") from None
            params["model"] = args.model
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
            given_epochs=given,
        )
    except BatchInputError as exc:
        print(f"skydrift batch {job.name}: {exc}", file=sys.stderr)
        return 2
    notable = {
        col: {k: v for k, v in counts.items() if v} for col, counts in summary.flag_counts.items()
    }
    print(
        f"{summary.rows} rows -> {summary.destination} in {summary.wall_time_s:.1f} s "
        f"(metadata: {METADATA_FILE})"
    )
    for col, counts in notable.items():
        if counts:
            text = ", ".join(f"{k} {v}" for k, v in counts.items())
            print(f"  {col}: {text}")
    return 0


__all__ = [
    "JOBS",
    "METADATA_FILE",
    "BatchInputError",
    "BatchJob",
    "BatchPlan",
    "InputField",
    "OutputColumn",
    "RowFlag",
    "RunSummary",
    "build_output",
    "flag_names",
    "make_plan",
    "parse_column_mapping",
    "process_partition",
    "read_metadata",
    "run_batch",
]
