"""How a batch job is described: input fields, output columns, flags, parameters.

Nothing here imports Dask; the job descriptions (:mod:`.jobs`) and the command line can be
loaded without the optional extra.
"""

from __future__ import annotations

import datetime as _dt
import enum
import functools
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from ..core.epochs import EPOCH_MAX_JYEAR, EPOCH_MIN_JYEAR, EpochError, label_epochs, parse_epoch

#: dtype of every flag column in the output (bit masks).
FLAG_DTYPE = "uint32"


class BatchInputError(ValueError):
    """The run cannot start: bad mapping, missing column, bad option. Says what to change."""


class BatchDataError(ValueError):
    """The run stopped part-way at input it refuses (a CSV row or cell); names the file and
    line where it could. Nothing is left of the output."""


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
        optional ones may be absent (unknown everywhere, NaN) or NaN (unknown in that row).
    low, high : float
        Valid closed range; values outside it, and infinities, flag the row
        VALUE_OUT_OF_RANGE.
    placeholder : float
        Value handed to the core in rows that are not computed (keeps numpy quiet about
        NaN or infinite arguments; those rows' results are discarded).
    mapped_only : bool
        Read only when named in the column mapping, never found by its canonical name
        alone (for inputs that also have a one-value form, like the catalogue epoch).
    """

    name: str
    unit: str
    description: str
    required: bool
    low: float = -np.inf
    high: float = np.inf
    placeholder: float = 0.0
    mapped_only: bool = False


@dataclass(frozen=True)
class OutputColumn:
    """One result column: name, dtype, unit and description.

    A column of dtype ``"category"`` holds names from a fixed list (``categories``): the
    job computes integer codes (index into the list, -1 for none) and the output is a
    pandas Categorical, written to Parquet as dictionary-encoded strings.
    """

    name: str
    dtype: str
    unit: str
    description: str
    categories: tuple | None = None


def _no_options(parser) -> None:
    return None


def _no_params(args) -> tuple[dict, dict]:
    return {}, {}


def _same_params(params: dict, mapping: Mapping) -> dict:
    return dict(params)


def _no_tables() -> dict:
    return {}


def _all_fields(params: dict):
    return None


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
        ``compute(inputs, params) -> {output name: ndarray}`` on one partition: every
        input a float64 array of the partition's length (unknown = NaN; absent optional
        fields are all-NaN arrays), every output an array of that length.
    frames : mapping
        Reference frames of input and output, for the metadata.
    add_options : callable
        ``add_options(parser)``: the job's own command-line options.
    params_from_args : callable
        ``params_from_args(args) -> (params, given)``: parameters from parsed options, and
        the values as the user wrote them (for the metadata).
    check_params : callable
        ``check_params(params, mapping) -> params``: complete and check the parameters
        against the column mapping; raises :class:`BatchInputError`.
    describe_params : callable
        ``describe_params(params, mapping, given) -> dict`` for the metadata.
    data_tables : callable
        ``data_tables() -> dict``: the data tables the job depends on, for the metadata.
    fields_used : callable
        ``fields_used(params) -> set of names or None``: the fields a run with these
        parameters needs (None: all); the others are not read.
    epoch_dates_motion : bool
        Whether a row's catalogue epoch (when read from a column) is needed for its results:
        True where the stars are moved from it (a row without one is then not computed,
        REQUIRED_VALUE_MISSING); False where it only dates a result.
    """

    name: str
    summary: str
    fields: tuple[InputField, ...]
    outputs: tuple[OutputColumn, ...]
    flag_columns: Mapping[str, tuple[type[enum.IntFlag], Mapping]]
    compute: Callable[[dict, dict], dict]
    frames: Mapping[str, str]
    add_options: Callable = field(default=_no_options)
    params_from_args: Callable = field(default=_no_params)
    check_params: Callable = field(default=_same_params)
    describe_params: Callable = field(default=None)
    data_tables: Callable = field(default=_no_tables)
    fields_used: Callable = field(default=_all_fields)
    epoch_dates_motion: bool = True

    def field(self, name: str) -> InputField:
        """The input field called ``name``."""
        for f in self.fields:
            if f.name == name:
                return f
        raise KeyError(name)

    @property
    def output_names(self) -> list[str]:
        return [c.name for c in self.outputs] + ["row_flags"]


# ---------------------------------------------------------------------------------------
# Epochs, shared by the jobs
# ---------------------------------------------------------------------------------------

#: Optional per-row catalogue epoch (catalogues whose stars have their own epochs).
CATALOGUE_EPOCH_FIELD = InputField(
    "catalogue_epoch_jyear",
    "Julian epoch (TDB), yr",
    "per-row catalogue epoch, read only when mapped with --columns (otherwise the "
    "--catalogue-epoch value holds for every row)",
    False,
    EPOCH_MIN_JYEAR,
    EPOCH_MAX_JYEAR,
    placeholder=2000.0,
    mapped_only=True,
)


@functools.cache
def run_now() -> _dt.datetime:
    """What "now" means in a batch run: the clock read once, as the run reads its first
    epoch option, so that every option given as "now" is the same instant (as in one API
    request)."""
    return _dt.datetime.now(_dt.UTC)


def parse_epoch_option(text: str | None, option: str) -> float | None:
    """An epoch option as a Julian epoch (TDB), or None if not given ("now": the run's one
    instant, :func:`run_now`)."""
    if text is None:
        return None
    try:
        return parse_epoch(text, now=run_now())
    except EpochError as exc:
        raise BatchInputError(f"{option}: {exc}") from None


def epoch_record(given, jyear) -> dict:
    """An epoch for the metadata: as given, as Julian epoch (TDB) and in ISO UTC."""
    labels = label_epochs([jyear])
    return {
        "given": given if given is not None else float(jyear),
        "julian_epoch_tdb": float(jyear),
        "iso_utc": labels.iso_utc[0],
    }


def catalogue_epoch_record(params: dict, mapping: Mapping, given: Mapping) -> dict | None:
    """The catalogue epoch for the metadata: a column, one value, or None."""
    if CATALOGUE_EPOCH_FIELD.name in mapping:
        return {"column": mapping[CATALOGUE_EPOCH_FIELD.name], "unit": CATALOGUE_EPOCH_FIELD.unit}
    if params.get("catalogue_epoch_jyear") is None:
        return None
    return epoch_record(given.get("catalogue_epoch"), params["catalogue_epoch_jyear"])


def check_catalogue_epoch(params: dict, mapping: Mapping, *, required: bool) -> None:
    """One value or a column for the catalogue epoch, not both; one of them if required."""
    per_row = CATALOGUE_EPOCH_FIELD.name in mapping
    if per_row and params.get("catalogue_epoch_jyear") is not None:
        raise BatchInputError(
            "give the catalogue epoch either as one value (--catalogue-epoch) or as a "
            "column (--columns catalogue_epoch_jyear=COLUMN), not both"
        )
    if required and not per_row and params.get("catalogue_epoch_jyear") is None:
        raise BatchInputError(
            "a catalogue epoch is needed: --catalogue-epoch (e.g. J2016.0) or a per-row "
            "column (--columns catalogue_epoch_jyear=COLUMN)"
        )


def catalogue_epoch_values(inputs: dict, params: dict):
    """Per-row epochs if mapped, else the one value (NaN if none was given)."""
    if CATALOGUE_EPOCH_FIELD.name in inputs:
        return inputs[CATALOGUE_EPOCH_FIELD.name]
    value = params.get("catalogue_epoch_jyear")
    return np.nan if value is None else value
