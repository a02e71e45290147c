"""Tables of stars in request bodies: a list of records or an object of columns.

A batch endpoint takes its stars either as a list of records (convenient)::

    "stars": [{"id": "KV-0001", "ra_deg": 12.5, "dec_deg": -3.25, ...}, ...]

or as columns, one array per field (fast; the form bulk clients should use)::

    "stars": {"id": ["KV-0001", ...], "ra_deg": [12.5, ...], "dec_deg": [-3.25, ...]}

:class:`StarTableField` is a marshmallow field that turns either form into numpy arrays and
validates them with numpy, not element by element. Its column set, units, ranges and
descriptions come from an ordinary marshmallow schema of one record, which is also what the
OpenAPI document shows. ``null`` (or an absent optional key) means unknown and becomes NaN;
it never becomes zero.

A request may list columns of its table to leave unread (``ignored_columns``, an
:class:`IgnoredColumnsField`): a catalogue file's magnitudes, say. Any other name the table
does not take is refused, so that a misspelt field never goes unnoticed.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

import marshmallow as ma
import numpy as np
from flask import current_app
from flask_smorest import abort

from ..core.constants import MAX_ABS_MAS, MAX_DISTANCE_PC, MIN_DISTANCE_PC  # noqa: F401

# Bounds shared with the batch jobs (re-exported for the endpoint schemas).
from .errors import MORE_FIELD, WholePath, further
from .spelling import closest_name, did_you_mean

#: Default bound on every numeric column of every star table, in the column's own unit,
#: where the record schema gives none (or only one side): no quantity the service takes
#: (deg, mas, mas/yr, km/s, pc, years) means anything for a star beyond 1e10, and the bound
#: keeps squares and products finite. Added to the record schema itself, so the OpenAPI
#: document shows it.
DEFAULT_MAX_ABS_VALUE = 1e10

#: At most this many individual field errors are listed in one problem response.
MAX_LISTED_ERRORS = 50

_NUMBER_TYPES = (float, int)

NUMBER_MESSAGE = "must be a number (in the unit of the field name)"
QUOTED_NUMBER_MESSAGE = "must be a number (in the unit of the field name), written without quotes"
_ID_TYPES = (str, int)
#: Longest star identifier accepted, characters.
MAX_ID_LENGTH = 64
#: The request field that lists columns of the star table to leave unread, and the most
#: names it may list.
IGNORED_COLUMNS = "ignored_columns"
MAX_IGNORED_COLUMNS = 200
#: Longest column name ``ignored_columns`` may list, characters.
MAX_COLUMN_NAME_LENGTH = 256


#: Metadata key of a record schema's field: what to send where the value is missing
#: (:func:`.common.number_field`'s ``missing_hint``), said with "is required".
MISSING_HINT_KEY = "missing_hint"


@dataclass
class ColumnSpec:
    """What one column accepts, read from a marshmallow field of the record schema."""

    name: str
    kind: str  # "number" or "id"
    required: bool
    allow_none: bool
    lo: float | None = None
    hi: float | None = None
    lo_inclusive: bool = True
    hi_inclusive: bool = True
    #: What to send instead, said where a required value is missing (common.number_field).
    missing_hint: str = ""

    @classmethod
    def from_field(cls, name: str, fld: ma.fields.Field) -> ColumnSpec:
        kind = "number" if isinstance(fld, ma.fields.Number) else "id"
        spec = cls(name, kind, bool(fld.required), bool(fld.allow_none))
        spec.missing_hint = fld.metadata.get(MISSING_HINT_KEY, "")
        for v in fld.validators:  # several Range validators: their intersection
            if not isinstance(v, ma.validate.Range):
                continue
            if v.min is not None and (spec.lo is None or v.min >= spec.lo):
                tighter = spec.lo is None or v.min > spec.lo
                spec.lo_inclusive = (
                    v.min_inclusive if tighter else spec.lo_inclusive and v.min_inclusive
                )
                spec.lo = v.min
            if v.max is not None and (spec.hi is None or v.max <= spec.hi):
                tighter = spec.hi is None or v.max < spec.hi
                spec.hi_inclusive = (
                    v.max_inclusive if tighter else spec.hi_inclusive and v.max_inclusive
                )
                spec.hi = v.max
        return spec

    def missing(self, message: str) -> str:
        """``message`` (a required value is missing), with the field's hint if it has one."""
        return f"{message} ({self.missing_hint})" if self.missing_hint else message

    def range_text(self) -> str:
        if self.lo is not None and self.hi is not None:
            lo_text, hi_text = _bound_text(self.lo), _bound_text(self.hi)
            if self.lo_inclusive and self.hi_inclusive:
                return f"must be between {lo_text} and {hi_text}"
            lo = ">=" if self.lo_inclusive else ">"
            hi = "<=" if self.hi_inclusive else "<"
            return f"must be {lo} {lo_text} and {hi} {hi_text}"
        if self.lo is not None:
            return f"must be {'>=' if self.lo_inclusive else '>'} {_bound_text(self.lo)}"
        return f"must be {'<=' if self.hi_inclusive else '<'} {_bound_text(self.hi)}"


@dataclass
class StarTable:
    """Validated stars as numpy columns.

    Attributes
    ----------
    columns : dict of str -> ndarray
        Float columns (NaN = unknown) for every numeric field of the record schema; a
        column the client did not give is made, all NaN, when first read.
    ids : list or None
        The ``id`` column as given (strings or integers), or None if absent.
    size : int
        Number of stars.
    form : {"records", "columns"}
        Which form the client used; paths in error messages follow it.
    given : set of str
        Columns the client supplied (even if some values are null).
    lines : list of int or None
        For a CSV body, the file line of each star.
    derived : dict
        What the table's checks (RowCheck) computed that the view uses as well, by a key
        of the check's own, so that it is not computed twice.
    """

    columns: dict
    ids: list | None
    size: int
    form: str
    given: set = field(default_factory=set)
    lines: list | None = None
    derived: dict = field(default_factory=dict)

    def path(self, index: int, name: str, field_name: str = "stars") -> str:
        """Path of one value for error messages: stars[3].dec_deg, stars.dec_deg[3], or
        for a CSV body ``line 7: dec_deg`` (line in the file; the header is line 1)."""
        if self.lines is not None:
            return f"line {self.lines[index]}: {name}"
        if self.form == "records":
            return f"{field_name}[{index}].{name}"
        return f"{field_name}.{name}[{index}]"


class _Columns(dict):
    """Numeric columns by name; one the client did not give is made (all NaN) when read."""

    def __init__(self, n: int, numeric_names: frozenset):
        super().__init__()
        self._n = n
        self._numeric_names = numeric_names

    def __missing__(self, name: str) -> np.ndarray:
        if name not in self._numeric_names:
            raise KeyError(name)
        column = self[name] = np.full(self._n, np.nan)
        return column


class TableErrors:
    """Collects per-value errors, keeping at most MAX_LISTED_ERRORS (counting the rest)."""

    def __init__(self, form: str, lines: list | None = None, header_line: int = 1):
        self.form = form
        self.lines = lines
        self.header_line = header_line
        self.items: dict[str, list[str]] = {}
        self.more = 0
        #: Column name -> arrays of the indices of its values found invalid (all of them,
        #: listed or not): the stars a RowCheck reading that column leaves alone.
        self.invalid: dict[str, list[np.ndarray]] = {}

    def add(self, key: str, message: str) -> None:
        if len(self.items) >= MAX_LISTED_ERRORS and key not in self.items:
            self.more += 1
            return
        self.items.setdefault(key, []).append(message)

    def add_indices(self, indices, name: str, message: str) -> None:
        indices = np.asarray(indices, dtype=np.int64)
        self.invalid.setdefault(name, []).append(indices)
        for i in indices[: MAX_LISTED_ERRORS + 1]:
            self.add(self.key(int(i), name), message)
        self.more += max(0, indices.size - (MAX_LISTED_ERRORS + 1))

    def key(self, index: int, name: str) -> str:
        if self.lines is not None:
            return f"line {self.lines[index]}: {name}"
        return f"[{index}].{name}" if self.form == "records" else f"{name}[{index}]"

    def header_key(self, name: str) -> str:
        """Key of an error about a whole column (absent, unknown)."""
        if self.lines is not None:
            return f"line {self.header_line}: {name}"
        return "[0]." + name if self.form == "records" else name

    def raise_if_any(self) -> None:
        if self.items and self.lines is not None:
            # CSV bodies: the paths are file lines, not members of the request object, so
            # they are reported as they are rather than under the table field's name (and
            # with the errors of the other fields, the query options).
            messages = {WholePath(k): ms for k, ms in sorted(self.items.items(), key=_line_of)}
            if self.more:
                messages[WholePath(MORE_FIELD)] = [further(self.more, "invalid values")]
            raise ma.ValidationError(messages)
        if self.items:
            messages = dict(self.items)
            if self.more:
                messages[MORE_FIELD] = [further(self.more)]
            raise ma.ValidationError(messages)


def _number_column(values: list, spec: ColumnSpec, errors: TableErrors) -> np.ndarray:
    """List of JSON values -> float array, with type and null checks (Note: bool is no number)."""
    types = set(map(type, values))
    if types <= {float, int}:
        try:
            return np.asarray(values, dtype=float)
        except OverflowError:
            pass
    bad = [i for i, v in enumerate(values) if type(v) not in _NUMBER_TYPES and v is not None]
    if bad:
        # A number sent as a string ("19.6") is the common case: say what to change.
        quoted, other = [], []
        for i in bad:
            (quoted if _finite_number_text(values[i]) else other).append(i)
        if quoted:
            errors.add_indices(quoted, spec.name, QUOTED_NUMBER_MESSAGE)
        if other:
            errors.add_indices(other, spec.name, NUMBER_MESSAGE)
    if None in values and not spec.allow_none:
        nulls = [i for i, v in enumerate(values) if v is None]
        errors.add_indices(nulls, spec.name, spec.missing("is required and may not be null"))
    if bad:
        return np.full(len(values), np.nan)
    try:
        return np.array(values, dtype=float)
    except OverflowError:
        big = [i for i, v in enumerate(values) if type(v) is int and abs(v) > 1e300]
        errors.add_indices(big, spec.name, "number out of range")
        return np.full(len(values), np.nan)


#: A number as JSON writes it (RFC 8259 section 6).
_JSON_NUMBER_TEXT = re.compile(r"-?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?\Z")


def _finite_number_text(value) -> bool:
    """Whether ``value`` is a string that, without its quotes, is a finite JSON number
    ("19.6", "-2e3"; not "1_000", "+5" or "1e999")."""
    return (
        type(value) is str
        and _JSON_NUMBER_TEXT.match(value) is not None
        and math.isfinite(float(value))
    )


def _line_of(item) -> int:
    """Sort key of a CSV error: its line number."""
    head = item[0].partition(":")[0]
    return int(head[5:]) if head.startswith("line ") and head[5:].isdigit() else 0


def _csv_number_column(cells: list, spec: ColumnSpec, errors: TableErrors) -> np.ndarray:
    """CSV cells -> float array: empty = null (NaN); text that is no finite number is an
    error (so 'nan' or 'inf' written in a cell is refused, not taken as unknown)."""
    empty = np.fromiter((c == "" for c in cells), dtype=bool, count=len(cells))
    filled = ["nan" if e else c for e, c in zip(empty, cells, strict=True)]
    not_number = np.zeros(len(cells), dtype=bool)
    text = "".join(cells)
    if not text.isascii() or "_" in text:
        # float() would read "1_000" and other scripts' digits ("٣٥", "３"): refused.
        odd = np.fromiter(
            (not c.isascii() or "_" in c for c in cells), dtype=bool, count=len(cells)
        )
        errors.add_indices(
            np.flatnonzero(odd),
            spec.name,
            "must be a number written with ASCII digits and no underscores",
        )
        not_number |= odd
        filled = ["nan" if o else c for o, c in zip(odd, filled, strict=True)]
    try:
        arr = np.asarray(filled, dtype=float)
    except (ValueError, OverflowError):
        arr = np.full(len(cells), np.nan)
        unreadable = np.zeros(len(cells), dtype=bool)
        for i, c in enumerate(filled):
            try:
                arr[i] = float(c)
            except ValueError:
                not_number[i] = True
                unreadable[i] = True
        errors.add_indices(
            np.flatnonzero(unreadable),
            spec.name,
            "must be a number (in the unit of the column name)",
        )
    not_finite = ~empty & ~not_number & ~np.isfinite(arr)
    if not_finite.any():
        errors.add_indices(
            np.flatnonzero(not_finite),
            spec.name,
            "must be a finite number; leave the cell empty for unknown",
        )
        arr[not_finite] = np.nan
    if empty.any() and not spec.allow_none:
        errors.add_indices(
            np.flatnonzero(empty), spec.name, spec.missing("is required; the cell is empty")
        )
    return arr


def _check_range(arr: np.ndarray, spec: ColumnSpec, errors: TableErrors) -> None:
    if arr.size == 1:  # one star: the same comparisons on a Python float (NaN passes)
        v = arr.item()
        lo, hi = spec.lo, spec.hi
        if (lo is not None and (v < lo if spec.lo_inclusive else v <= lo)) or (
            hi is not None and (v > hi if spec.hi_inclusive else v >= hi)
        ):
            errors.add_indices(np.array([0]), spec.name, spec.range_text())
        return
    with np.errstate(invalid="ignore"):
        bad = np.zeros(arr.shape, dtype=bool)
        if spec.lo is not None:
            bad |= (arr < spec.lo) if spec.lo_inclusive else (arr <= spec.lo)
        if spec.hi is not None:
            bad |= (arr > spec.hi) if spec.hi_inclusive else (arr >= spec.hi)
    idx = np.flatnonzero(bad)
    if idx.size:
        errors.add_indices(idx, spec.name, spec.range_text())


def _id_column(values: list, errors: TableErrors) -> list:
    types = set(map(type, values))
    if not types <= {str, int, type(None)}:
        bad = [i for i, v in enumerate(values) if not (type(v) in _ID_TYPES or v is None)]
        # The JSON reader gives an integer beyond 64 bits as a float: not what was written.
        big = [i for i in bad if type(values[i]) is float and abs(values[i]) >= 2.0**63]
        errors.add_indices(
            big,
            "id",
            "an integer id must lie within 64 bits (-2**63 to 2**64 - 1): send "
            "larger ones as strings",
        )
        errors.add_indices(sorted(set(bad) - set(big)), "id", "must be a string or an integer")
    elif str in types:
        long_ = [i for i, v in enumerate(values) if type(v) is str and len(v) > MAX_ID_LENGTH]
        if long_:
            errors.add_indices(long_, "id", f"at most {MAX_ID_LENGTH} characters")
    return values


def _bound_numeric_fields(record_schema: type[ma.Schema]) -> None:
    """Give every numeric field of a record schema both bounds (DEFAULT_MAX_ABS_VALUE)."""
    for fld in record_schema._declared_fields.values():
        if not isinstance(fld, ma.fields.Number):
            continue
        ranges = [v for v in fld.validators if isinstance(v, ma.validate.Range)]
        has_lo = any(v.min is not None for v in ranges)
        has_hi = any(v.max is not None for v in ranges)
        if not (has_lo and has_hi):
            fld.validators.append(
                ma.validate.Range(
                    min=None if has_lo else -DEFAULT_MAX_ABS_VALUE,
                    max=None if has_hi else DEFAULT_MAX_ABS_VALUE,
                )
            )


@dataclass(frozen=True)
class RowCheck:
    """A check of each star's values taken together (correlations that cannot all hold,
    one proper-motion component without the other), run by a StarTableField with its own
    checks of each value, so that one answer names every invalid value.

    ``find(table, usable)`` gets the table (:class:`StarTable`) and a mask of the stars
    whose values in ``reads`` all passed their own checks (a value refused for its own
    sake is not judged again with the others); it returns (indices, column name, message)
    for the stars it refuses, the indices among the usable ones. A column of ``reads``
    refused as a whole (absent where required, or holding values that are no numbers)
    leaves the check out.
    """

    reads: tuple[str, ...]
    find: Callable[[StarTable, np.ndarray], Iterable[tuple[np.ndarray, str, str]]]


#: Every column name that some star table of the service takes (filled as the tables are
#: made, when the blueprints are imported). A column one table does not take but another
#: does (the demo catalogue's standard errors sent for a constellation lookup) is no
#: misspelling, and its message says so instead of naming a look-alike.
SERVICE_COLUMN_NAMES: set[str] = set()


class StarTableField(ma.fields.Field):
    """Marshmallow field for a table of stars (records or columns), validated with numpy.

    Parameters
    ----------
    record_schema : type[marshmallow.Schema]
        Schema of one record: its fields define the columns (Float with Range validators,
        ``required``, ``allow_none``) and their documentation. An ``id`` field, if present,
        is an optional client identifier echoed back.
    checks : sequence of RowCheck
        Checks of each star's values together, run after the checks of each value (their
        errors are listed with those).
    """

    def __init__(self, record_schema: type[ma.Schema], checks: tuple[RowCheck, ...] = (), **kwargs):
        super().__init__(**kwargs)
        self.record_schema = record_schema
        self.checks = tuple(checks)
        _bound_numeric_fields(record_schema)
        schema = record_schema()
        self.specs = [ColumnSpec.from_field(n, f) for n, f in schema.fields.items()]
        self.names = {s.name for s in self.specs}
        self.numeric_names = frozenset(s.name for s in self.specs if s.kind == "number")
        self._spec_of = {s.name: s for s in self.specs}
        self._required_names = frozenset(s.name for s in self.specs if s.required)
        SERVICE_COLUMN_NAMES.update(self.names)

    def _max_rows(self) -> int | None:
        try:
            return current_app.config["SKYDRIFT_SETTINGS"].max_stars
        except (RuntimeError, KeyError):
            return None

    def _deserialize(self, value, attr, data, **kwargs) -> StarTable:
        from .arrowio import ArrowTable
        from .csvio import CsvTable

        skip = self._ignored(data)
        if isinstance(value, CsvTable):
            return self._from_csv(value, skip)
        if isinstance(value, ArrowTable):
            return self._from_arrow(value, skip)
        if isinstance(value, list):
            return self._from_records(value, skip)
        if isinstance(value, dict):
            return self._from_columns(value, skip)
        raise ma.ValidationError(
            "must be a list of star records or an object of equal-length columns"
        )

    def _ignored(self, data) -> frozenset:
        """The names listed in the request's ``ignored_columns`` that the table does not
        take. A value that is no list of names is left to that field's own check, and so is
        a listed name the table takes (which is read as usual)."""
        if not self._offers_ignoring():
            return frozenset()
        value = data.get(IGNORED_COLUMNS) if isinstance(data, dict) else None
        if not isinstance(value, list):
            return frozenset()
        return frozenset(v for v in value if isinstance(v, str)) - self.names

    def _limit(self, n: int) -> None:
        if n == 0:
            raise ma.ValidationError("at least one star is required")
        limit = self._max_rows()
        if limit is not None and n > limit:
            # 413 rather than 422: the request is well formed but larger than allowed.
            abort(
                413,
                errors=[
                    {
                        "field": self.name or "stars",
                        "message": f"{n} stars in one request; the limit is {limit} "
                        "(setting SKYDRIFT_MAX_STARS)",
                    }
                ],
            )

    def _from_records(self, records: list, skip: frozenset) -> StarTable:
        self._limit(len(records))
        if len(records) == 1 and not skip:
            table = self._one_plain_record(records[0])
            if table is not None:
                return table
        return self._records_table(records, skip)

    def _records_table(self, records: list, skip: frozenset) -> StarTable:
        """A list of records read column by column (:meth:`_finish`), every error named."""
        errors = TableErrors("records")
        not_obj = [i for i, r in enumerate(records) if type(r) is not dict]
        if not_obj:
            for i in not_obj[:MAX_LISTED_ERRORS]:
                errors.add(f"[{i}]", "must be an object (a star record)")
            errors.more += len(not_obj[MAX_LISTED_ERRORS:])  # counted, not listed
            errors.raise_if_any()
        keys = set().union(*records) - skip if records else set()
        unknown = keys - self.names
        if unknown:
            for k, name in enumerate(sorted(unknown)[:MAX_LISTED_ERRORS]):
                first = next(i for i, r in enumerate(records) if name in r)
                errors.add(f"[{first}].{name}", self._unknown_text(name, listed=k == 0))
            errors.more += max(0, len(unknown) - MAX_LISTED_ERRORS)
        columns = {name: [r.get(name) for r in records] for name in keys & self.names}
        return self._finish(columns, len(records), errors, keys)

    def _one_plain_record(self, record) -> StarTable | None:
        """One star record all of whose values pass their checks, read without the column
        machinery of :meth:`_finish` (20 to 12 us in a tight loop, about 20 us of a
        request: the one-star request of a telescope), or None where anything is amiss:
        the record is then read the general way, which names what is wrong. It accepts
        only what that way accepts, and gives the same table
        (tests/api/test_one_record_path.py compares the two on every star table)."""
        if type(record) is not dict or not self._required_names <= record.keys():
            return None
        spec_of = self._spec_of
        columns = _Columns(1, self.numeric_names)
        ids = None
        for name, value in record.items():
            spec = spec_of.get(name)
            if spec is None:
                return None  # an unknown column
            kind = type(value)
            if spec.kind == "id":
                if not (
                    kind is int or value is None or (kind is str and len(value) <= MAX_ID_LENGTH)
                ):
                    return None
                ids = [value]
                continue
            if not (kind is float or kind is int or (value is None and spec.allow_none)):
                return None  # no number (a bool, a string), or a required value null
            try:
                arr = np.asarray([value], dtype=float)  # as _number_column reads it
            except OverflowError:
                return None
            v = arr.item()
            lo, hi = spec.lo, spec.hi
            if (lo is not None and (v < lo if spec.lo_inclusive else v <= lo)) or (
                hi is not None and (v > hi if spec.hi_inclusive else v >= hi)
            ):
                return None  # out of range (NaN, an unknown value, passes as in _check_range)
            columns[name] = arr
        table = StarTable(columns, ids, 1, "records", set(record))
        usable = np.ones(1, dtype=bool)
        for check in self.checks:
            for indices, _, _ in check.find(table, usable):
                if len(indices):
                    return None  # values that cannot hold together
        return table

    def _from_columns(self, cols: dict, skip: frozenset) -> StarTable:
        errors = TableErrors("columns")
        unknown = sorted(set(cols) - self.names - skip)
        for k, name in enumerate(unknown[:MAX_LISTED_ERRORS]):
            errors.add(errors.header_key(name), self._unknown_text(name, listed=k == 0))
        errors.more += len(unknown[MAX_LISTED_ERRORS:])
        # The shape of the columns taken (an unknown one is only named): with an error
        # here no value is read, and the unknown names come in the same answer.
        lengths = {}
        misshapen = False
        for name, col in cols.items():
            if name not in self.names:
                continue
            if not isinstance(col, list | np.ndarray):  # arrays: see .jsoncolumns
                errors.add(errors.header_key(name), "must be an array (one value per star)")
                misshapen = True
                continue
            lengths[name] = len(col)
        sizes = set(lengths.values())
        if len(sizes) > 1:
            # The length most columns share (ties: the first column's) is taken as meant;
            # each column of another length is named.
            counts = {size: list(lengths.values()).count(size) for size in sizes}
            first = next(iter(lengths.values()))
            usual = max(sizes, key=lambda size: (counts[size], size == first))
            reference = next(k for k, v in lengths.items() if v == usual)
            misshapen = True
            for name, size in lengths.items():
                if size != usual:
                    errors.add(
                        errors.header_key(name),
                        f"has {size} value{'' if size == 1 else 's'} where {reference} has "
                        f"{usual}: all columns must have the same length (one value per star)",
                    )
        if misshapen:
            errors.raise_if_any()
        if not lengths or 0 in sizes:
            errors.raise_if_any()
            raise ma.ValidationError("at least one star is required")
        n = sizes.pop()
        self._limit(n)
        return self._finish(cols, n, errors, set(cols) - skip)

    def _from_csv(self, table, skip: frozenset) -> StarTable:
        """A CSV body (text cells, empty = null); errors name the line of the file."""
        # A CSV table answers in the columns layout unless asked otherwise (it is the fast
        # one, and CSV answers are the same from either); errors name file lines.
        errors = TableErrors("columns", table.lines, table.header_line)
        unknown = [h for h in table.header if h not in self.names and h not in skip]
        for k, name in enumerate(unknown[:MAX_LISTED_ERRORS]):
            errors.add(errors.header_key(name), self._unknown_text(name, listed=k == 0))
        errors.more += len(unknown[MAX_LISTED_ERRORS:])
        if table.size == 0:
            errors.add(f"line {table.header_line + 1}", "at least one star is required")
            errors.raise_if_any()
        self._limit(table.size)
        raw = {}
        for spec in self.specs:
            cells = table.columns.get(spec.name)
            if cells is None:
                continue
            if spec.kind == "id":
                # Text as written (as Python's csv module and a JSON string give it): only
                # an empty cell is no identifier.
                raw[spec.name] = [c if c != "" else None for c in cells]
            else:
                cells = [c.strip() for c in cells]  # "1, 2.5": blanks around a number
                raw[spec.name] = _csv_number_column(cells, spec, errors)
        given = set(table.header) - skip
        return self._finish(raw, table.size, errors, given, lines=table.lines)

    def _from_arrow(self, table, skip: frozenset) -> StarTable:
        """An Arrow IPC body (typed columns, null = unknown); errors name stars.<column>[<row>]
        as for the columns form, which it answers in unless asked otherwise."""
        errors = TableErrors("columns")
        unknown = [h for h in table.names if h not in self.names and h not in skip]
        for k, name in enumerate(unknown[:MAX_LISTED_ERRORS]):
            errors.add(errors.header_key(name), self._unknown_text(name, listed=k == 0))
        errors.more += len(unknown[MAX_LISTED_ERRORS:])
        if table.size == 0:
            errors.raise_if_any()
            raise ma.ValidationError("at least one star is required")
        self._limit(table.size)
        raw = {}
        for spec in self.specs:
            if spec.name not in table.names:
                continue
            if spec.kind == "id":
                raw[spec.name] = table.id_column(errors)
            else:
                raw[spec.name] = table.number_column(spec, errors)
        if any(v is None for v in raw.values()):
            errors.raise_if_any()  # a mistyped column (None) must not read as absent
        return self._finish(raw, table.size, errors, set(table.names) - skip)

    def _finish(
        self, raw: dict, n: int, errors: TableErrors, given: set, lines: list | None = None
    ) -> StarTable:
        columns = _Columns(n, self.numeric_names)
        ids = None
        # Columns an unknown name given probably stands for ("ra" for "ra_deg"), absent:
        # its error says so, a "required" of the same column would only repeat it, and no
        # check of several values reads them (the client meant to give them).
        meant = {self._likely_column(name) for name in given - self.names} & self.names
        lost = meant - given  # columns refused as a whole: absent, meant or not numbers
        given = given & self.names
        for spec in self.specs:
            values = raw.get(spec.name)
            if values is None:
                if spec.required and spec.name not in lost:
                    errors.add(errors.header_key(spec.name), spec.missing("is required"))
                    lost.add(spec.name)
                continue
            if spec.kind == "id":
                ids = _id_column(values, errors)
                continue
            arr = values if isinstance(values, np.ndarray) else _number_column(values, spec, errors)
            if spec.name in errors.invalid:  # some values no numbers: the column may be NaN
                lost.add(spec.name)
            if spec.lo is not None or spec.hi is not None:
                _check_range(arr, spec, errors)
            columns[spec.name] = arr
        table = StarTable(columns, ids, n, errors.form, given, lines)
        for check in self.checks:
            if lost.intersection(check.reads):
                continue
            usable = np.ones(n, dtype=bool)
            for name in check.reads if errors.invalid else ():
                for indices in errors.invalid.get(name, ()):
                    usable[indices] = False
            for indices, name, message in check.find(table, usable):
                errors.add_indices(indices, name, message)
        errors.raise_if_any()
        return table

    def _likely_column(self, name: str) -> str | None:
        """The column of the service ``name`` most likely stands for (closest_name among
        the columns of every table, SERVICE_COLUMN_NAMES), or None. A name of one letter is
        matched among this table's columns only: a "V" column of a catalogue is more often
        a magnitude than the velocity component that other endpoints take."""
        pool = self.names if len(name) < 2 else self.names | SERVICE_COLUMN_NAMES
        return closest_name(name, pool)

    def _unknown_text(self, name, listed: bool) -> str:
        """The message of an unknown column: that other endpoints take it (a name of
        SERVICE_COLUMN_NAMES) or the name of theirs it likely stands for
        ("Parallax_Error_Mas" sent for a constellation lookup), the name of this table it
        likely stands for, or, for a name like no accepted one (a catalogue's magnitudes),
        how to leave it unread; and with ``listed`` (the first unknown column of a table: a
        catalogue file may bring a hundred) every accepted name. A likely misspelling of
        this table's columns gets no word on leaving it unread: a misspelt parallax left out
        would only move the error further on."""
        names = [s.name for s in self.specs]
        listing = "accepted fields: " + ", ".join(names) if listed else None
        unread = f" (to leave it unread, list it in {IGNORED_COLUMNS})"
        unread = unread if self._offers_ignoring() else ""
        likely = None if name in SERVICE_COLUMN_NAMES else self._likely_column(name)
        if name in SERVICE_COLUMN_NAMES:  # spelt right, for another endpoint
            text = "unknown field here, though other endpoints take it" + unread
        elif likely is not None and likely not in self.names:
            text = f'unknown field here; it looks like "{likely}", which other endpoints take'
            text += unread
        elif likely is not None:
            text = "unknown field" + did_you_mean([likely])
        else:
            text = "unknown field" + unread
        return f"{text}; {listing}" if listing else text

    def _offers_ignoring(self) -> bool:
        return isinstance(self.parent, ma.Schema) and IGNORED_COLUMNS in self.parent.fields


class IgnoredColumnsField(ma.fields.List):
    """Names of columns (or record members) of the request's star table to leave unread.

    Each must be a name the table does not take: an accepted name listed is refused, since
    it would be read all the same. Names that are not in the table are no error (one list
    can serve several files).
    """

    def __init__(self, **kwargs):
        super().__init__(
            ma.fields.String(
                validate=ma.validate.Length(
                    min=1, max=MAX_COLUMN_NAME_LENGTH, error="must be {min} to {max} characters"
                )
            ),
            validate=ma.validate.Length(
                max=MAX_IGNORED_COLUMNS, error="must list at most {max} names"
            ),
            metadata={
                "description": "Columns of the star table (or members of its records) to "
                "leave unread: a catalogue file's magnitudes or notes, say. Each must be a "
                "name the table does not take; any other such name is still refused, so "
                "that a misspelt field never goes unnoticed. Names absent from the table "
                f"are no error. At most {MAX_IGNORED_COLUMNS} names."
            },
            **kwargs,
        )

    def _deserialize(self, value, attr, data, **kwargs) -> list:
        from .csvio import table_field_name

        table = table_field_name(self.parent)
        accepted = self.parent.fields[table].names if table else set()
        message = "is a field of the star table and is read; list only columns it does not take"
        # Every listed name the table takes is named, with the list's other errors.
        taken = {}
        if isinstance(value, list):
            taken = {
                i: [message] for i, v in enumerate(value) if isinstance(v, str) and v in accepted
            }
        try:
            names = super()._deserialize(value, attr, data, **kwargs)
        except ma.ValidationError as exc:
            if not taken or not isinstance(exc.messages, dict):
                raise
            merged = dict(exc.messages)
            for i, messages in taken.items():
                merged[i] = list(merged.get(i, [])) + messages
            raise ma.ValidationError(dict(sorted(merged.items()))) from exc
        if taken:
            raise ma.ValidationError(taken)
        return names


def id_field_to_openapi(self, field, **kwargs) -> dict:
    """apispec attribute function: a star's ``id`` (a Raw field, in records, columns and
    answers) is a string of at most MAX_ID_LENGTH characters, an integer, or null."""
    if type(field) is ma.fields.Raw and field.name == "id":
        return {"type": ["string", "integer", "null"], "maxLength": MAX_ID_LENGTH}
    return {}


def range_bounds_to_openapi(self, field, ret=None, **kwargs) -> dict:
    """apispec attribute function: an exclusive Range bound as JSON Schema's
    exclusiveMinimum/exclusiveMaximum (apispec writes every bound as inclusive)."""
    if ret is None or ("minimum" not in ret and "maximum" not in ret):
        return {}
    spec = ColumnSpec.from_field("", field)
    out = {}
    if spec.lo is not None and not spec.lo_inclusive and "minimum" in ret:
        ret.pop("minimum")
        out["exclusiveMinimum"] = spec.lo
    if spec.hi is not None and not spec.hi_inclusive and "maximum" in ret:
        ret.pop("maximum")
        out["exclusiveMaximum"] = spec.hi
    return out


def _bound_text(value: float) -> str:
    """A bound in the fewest digits that still give its value (299792.458, not 299792)."""
    text = f"{value:g}"
    return text if float(text) == value else repr(float(value))


def table_field_to_openapi(self, field, **kwargs) -> dict:
    """apispec attribute function: document a StarTableField as records or columns."""
    if not isinstance(field, StarTableField):
        return {}
    # The record schema is registered as a component here if its blueprint did not register
    # it already, so the reference always resolves.
    ref = self.resolve_nested_schema(field.record_schema)
    record_props = self.schema2jsonschema(field.record_schema)
    columns = {}
    for name, prop in record_props.get("properties", {}).items():
        item = {k: v for k, v in prop.items() if k not in ("description", "example")}
        columns[name] = {
            "type": "array",
            "items": item,
            "description": prop.get("description", ""),
        }
    return {
        "oneOf": [
            {"type": "array", "items": ref, "minItems": 1, "title": "records"},
            {
                "type": "object",
                "title": "columns",
                "properties": columns,
                "additionalProperties": False,
                "description": "One array per field, all of the same length.",
            },
        ]
    }
