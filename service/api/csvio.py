"""CSV in and out for every batch endpoint (every endpoint whose body holds a star table).

Request (``Content-Type: text/csv``)
    The body is the star table: a header row of column names, which are the field names of
    the endpoint's record schema and carry their units (``ra_deg``, ``parallax_mas``, ...),
    then one star per line. An empty cell is null (unknown, never zero). Blank lines are
    skipped. Identifiers read from CSV are text, kept as written (blanks too); blanks around
    a number are ignored. The body must be UTF-8 (a byte-order mark
    is allowed). A JSON answer to a CSV
    body comes in the columns layout unless the request says ``layout=records``. The
    endpoint's other request fields travel as query parameters: lists repeated or comma-separated
    (``target_epochs=J2026.0,J2100.0``), nested objects with dotted names
    (``target_range.start=J2000&target_range.stop=J2100&target_range.count=11``), any other
    value as text or as JSON; an empty value is null. A bad cell is reported with its line
    number in the file (the header is line 1): ``line 7: dec_deg`` / ``must be between -90
    and 90``.

Response (``Accept: text/csv``)
    One row per star and epoch (or per star and event, such as a boundary crossing; a star
    without any gets one row), the header row first. Columns, in order: ``index`` (position
    of the star in the request, from 0), ``id``, ``epoch_julian_tdb`` and ``epoch_iso_utc``
    (when the answer has epochs; any other epoch object ``x`` gives ``x_julian_tdb`` and
    ``x_iso_utc``), then the endpoint's per-star and per-epoch quantities under
    their JSON names (units in the names; nested objects such as ``uncertainties`` give one
    column per member and none when null for every star), then what the answer says of each
    row's instant where it lists instants with their own figures (observed places:
    ``utc_jd``, the UTC date as two numbers in one cell, which keeps the instant to the
    precision of the JSON answer where ``epoch_iso_utc`` stops at the millisecond; an object
    ``o`` of the instant gives ``o_<member>``: ``earth_orientation_table``,
    ``earth_orientation_status``, ``earth_orientation_source``,
    ``earth_orientation_ut1_utc_s``, ``earth_orientation_pm_x_arcsec``,
    ``earth_orientation_pm_y_arcsec``, ``earth_orientation_accuracy_class``,
    ``earth_orientation_pointing_error_arcsec``, ``sun_altitude_deg``, ``sun_azimuth_deg``),
    and last the lists of names (``flags``), separated by ``;``. A short vector per star (an
    interval) is one cell, its numbers separated by ``;``. Null is an empty cell; numbers
    are written with the shortest representation that reads back to the same double, so a
    CSV answer holds exactly the numbers of the JSON answer. Errors stay
    ``application/problem+json``.
"""

from __future__ import annotations

import csv
import io
import json

import orjson
from flask import request
from flask_smorest import abort

from ..numbers import DECIMAL_TEXT, WHOLE_TEXT
from .jsonio import read_body, refuse_repeated_options

CSV_MIMETYPE = "text/csv"

#: Columns that lead every CSV answer when present, in this order.
LEADING_COLUMNS = ("index", "id", "epoch_julian_tdb", "epoch_iso_utc")

#: Separator of names inside one cell (flags).
LIST_SEPARATOR = ";"


class CsvTable:
    """A star table read from a CSV body: raw text cells by column, with line numbers.

    Attributes
    ----------
    header : list of str
        Column names as given.
    columns : dict of str -> list of str
        The cells of each column, one per data row, as written (the table check strips the
        blanks around numbers; an identifier is text and keeps them).
    lines : list of int
        Line number in the body of each data row (header = line 1).
    header_line : int
        Line number of the header row.
    """

    def __init__(self, header, columns, lines, header_line=1):
        self.header = header
        self.columns = columns
        self.lines = lines
        self.header_line = header_line

    @property
    def size(self) -> int:
        return len(self.lines)


def _problem(status: int, errors: list[dict] | None = None, message: str | None = None):
    if errors is not None:
        abort(status, errors=errors)
    abort(status, message=message)


def parse_csv_body(data: bytes) -> CsvTable:
    """Read a CSV request body into a :class:`CsvTable`; structural problems abort with 4xx."""
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        _problem(
            400,
            message=f"The CSV body is not UTF-8 text (byte {exc.start}); CSV is read as UTF-8 "
            "only, whatever a charset parameter says.",
        )
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header = None
    header_line = 1
    rows: list[list[str]] = []
    lines: list[int] = []
    errors: list[dict] = []
    last = 0
    try:
        for row in reader:
            start = last + 1
            last = reader.line_num
            if not row or (len(row) == 1 and not row[0].strip()):
                continue
            if header is None:
                header = [h.strip() for h in row]
                header_line = start
                for sep, name in ((";", "semicolons"), ("\t", "tabs")):
                    if len(header) == 1 and sep in header[0]:
                        # A spreadsheet export with another separator: say so, rather than
                        # calling the whole line one unknown column.
                        _problem(
                            422,
                            errors=[
                                {
                                    "field": f"line {start}",
                                    "message": f"the header is separated by {name}; "
                                    "separate the columns with commas",
                                }
                            ],
                        )
                continue
            if len(row) != len(header):
                if len(errors) < 50:
                    errors.append(
                        {
                            "field": f"line {start}",
                            "message": f"row has {len(row)} cells; the header has {len(header)}",
                        }
                    )
                continue
            rows.append(row)
            lines.append(start)
    except csv.Error as exc:
        _problem(400, message=f"The CSV body cannot be read: line {reader.line_num}: {exc}.")
    if header is None:
        _problem(422, errors=[{"field": "line 1", "message": "no header row: the body is empty"}])
    seen = set()
    for k, name in enumerate(header, start=1):
        if not name:
            errors.append(
                {
                    "field": f"line {header_line}",
                    "message": f"column {k} of the header has no name (a trailing comma?)",
                }
            )
        elif name in seen:
            errors.append({"field": f"line {header_line}: {name}", "message": "column given twice"})
        seen.add(name)
    if errors:
        _problem(422, errors=errors)
    cells = list(zip(*rows, strict=True)) if rows else [() for _ in header]
    columns = {name: list(col) for name, col in zip(header, cells, strict=True)}
    return CsvTable(header, columns, lines, header_line)


def table_field_name(schema) -> str | None:
    """Name of the first star-table field of a schema (the part a CSV body carries)."""
    from .tables import StarTableField

    for name, fld in schema.fields.items():
        if isinstance(fld, StarTableField):
            return name
    return None


def _option_values(schema, req_args, exclude: str) -> dict:
    """Query parameters -> request fields (lists, dotted nested objects, JSON values)."""
    import marshmallow as ma

    data: dict = {}
    for key in req_args:
        base, _, rest = key.partition(".")
        fld = schema.fields.get(base)
        if base == exclude:
            abort(
                422,
                errors=[{"field": key, "message": "the body is the star table; give no "
                         f"{exclude} in the query string"}],
            )  # fmt: skip
        members = (
            fld.schema.fields
            if isinstance(fld, ma.fields.Nested)
            else getattr(fld, "member_fields", None)  # an object field of its own kind
        )
        if rest and members is not None:
            nested = data.setdefault(base, {})
            if not isinstance(nested, dict):
                _given_both_ways(base)
            nested[rest] = _typed(members.get(rest), _json_or_text(req_args.get(key)))
            continue
        if not rest and isinstance(data.get(base), dict):
            _given_both_ways(base)
        if isinstance(fld, ma.fields.List):
            items = []
            for value in req_args.getlist(key):
                if value.lstrip().startswith("["):
                    items.extend(_json_or_text(value))
                else:
                    items.extend(v.strip() for v in value.split(","))
            data[key] = items
            continue
        data[key] = _typed(fld, _json_or_text(req_args.get(key)))
    return data


def _given_both_ways(base: str) -> None:
    abort(
        422,
        errors=[
            {
                "field": base,
                "message": f"given both whole ({base}=...) and by members ({base}.<member>=...); "
                "give one",
            }
        ],
    )


def _typed(fld, value):
    """A query text for a numeric or boolean field -> the value it spells (strict fields)."""
    import marshmallow as ma

    if not isinstance(value, str):
        return value
    text = value.strip()
    if isinstance(fld, ma.fields.Boolean) and text.lower() in ("true", "false"):
        return text.lower() == "true"
    # ASCII decimal forms only: Python's int() and float() would also read "1_000", "nan",
    # "infinity" and other scripts' digits, and str.isdigit() takes "¹", which int() refuses.
    if isinstance(fld, ma.fields.Integer) and WHOLE_TEXT.match(text):
        return int(text)
    if isinstance(fld, ma.fields.Float) and DECIMAL_TEXT.match(text):
        return float(text)
    return value


def _json_or_text(value: str):
    """A query value: JSON if it looks like an object or list, null if empty, else text."""
    stripped = value.strip()
    if not stripped:
        return None
    if stripped[:1] in ("{", "["):
        try:
            return json.loads(stripped)
        except ValueError:
            return value
    return value


def load_csv_request(req, schema) -> dict:
    """The request fields of a CSV request: the table from the body, options from the query."""
    return load_table_request(req, schema, parse_csv_body)


def load_table_request(req, schema, parse_body) -> dict:
    """The request fields of a request whose body is only the star table (CSV, Arrow): the
    table read from the body by ``parse_body(bytes)``, the other fields from the query."""
    name = table_field_name(schema)
    if name is None:  # pragma: no cover - the blueprint accepts tables only for table endpoints
        abort(415, message=f"{req.mimetype} is not accepted here")
    refuse_repeated_options(schema, req.args)
    data = _option_values(schema, req.args, name)
    data[name] = parse_body(read_body(req))
    return data


def wants_csv() -> bool:
    """True when the client prefers text/csv to JSON in its Accept header."""
    if "csv" not in request.headers.get("Accept", "").lower():
        return False  # the common case, without parsing the header
    best = request.accept_mimetypes.best_match(["application/json", CSV_MIMETYPE])
    return best == CSV_MIMETYPE and request.accept_mimetypes[CSV_MIMETYPE] > 0


# ------------------------------------------------------------------ CSV out


def _cell(value) -> str:
    if value is None:
        return ""
    if value is True:
        return "true"
    if value is False:
        return "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, list):
        if value and all(v is None for v in value):
            return ""  # an unknown vector is one empty cell
        return LIST_SEPARATOR.join(_cell(v) for v in value)  # names, or a short vector
    if isinstance(value, dict):
        return orjson.dumps(value).decode()
    return str(value)


def _epoch_columns(epochs, k) -> dict:
    if epochs is not None and k < len(epochs) and _is_epoch(epochs[k]):
        return _epoch_cells("epoch", epochs[k])
    return {}


def _column_cells(values) -> list[str]:
    """Cells of a whole column; a column of numbers and nulls takes the fast path."""
    kinds = set(map(type, values))
    if kinds <= {float, type(None)}:
        return ["" if v is None else repr(v) for v in values]
    return [_cell(v) for v in values]


def _is_epoch(value) -> bool:
    return isinstance(value, dict) and "julian_epoch_tdb" in value


def _epoch_cells(key: str, value: dict) -> dict:
    """An epoch object -> <key>_julian_tdb and <key>_iso_utc cells."""
    return {
        f"{key}_julian_tdb": value.get("julian_epoch_tdb"),
        f"{key}_iso_utc": value.get("iso_utc"),
    }


def _flatten_record(
    rec: dict, nested_names: set, object_lists: set = frozenset()
) -> tuple[dict, list | None, list]:
    """One star record -> (scalar cells, per-epoch list or None, list-valued keys).

    A list of objects (per epoch, or per event such as a boundary crossing) gives one row
    per object; an empty one gives the star one row without them. An epoch object gives
    ``<key>_julian_tdb`` and ``<key>_iso_utc``; other objects give one cell per member.
    """
    out: dict = {}
    per_epoch = None
    lists = []
    for key, value in rec.items():
        if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            per_epoch = value
        elif isinstance(value, list) and not value and (key in object_lists or key in nested_names):
            continue
        elif _is_epoch(value):
            out.update(_epoch_cells(key, value))
        elif isinstance(value, dict):
            for inner, v in value.items():
                out[inner if inner not in rec else f"{key}.{inner}"] = v
        elif value is None and key in nested_names:
            continue
        else:
            # Names (flags): last columns. The Arrow answer is made from the answer object
            # itself, where the flag names of a star are a tuple, not a JSON list.
            if isinstance(value, list | tuple) and all(isinstance(v, str) for v in value):
                lists.append(key)
            out[key] = value
    return out, per_epoch, lists


def _answer_epochs(body: dict) -> list | None:
    """The answer's epochs, in order: an ``epochs`` list, or a list of objects each with an
    ``epoch`` (such as the instants of an observed-place answer)."""
    epochs = body.get("epochs")
    if isinstance(epochs, list) and all(_is_epoch(e) for e in epochs):
        return epochs
    instants = _answer_instants(body)
    return None if instants is None else [v["epoch"] for v in instants]


def _answer_instants(body: dict) -> list | None:
    """The answer's list of objects each with an ``epoch`` (the instants of an observed-place
    answer, with what belongs to each instant), or None."""
    for value in body.values():
        if (
            isinstance(value, list)
            and value
            and all(isinstance(v, dict) and _is_epoch(v.get("epoch")) for v in value)
        ):
            return value
    return None


def _instant_members(instant: dict):
    """(column, member name, value) for the members of an instant object other than its
    epoch: an object ``o`` gives ``o_<member>`` (``sun_altitude_deg``,
    ``earth_orientation_ut1_utc_s``), any other value keeps its name (``utc_jd``, a short
    vector: one cell)."""
    for key, value in instant.items():
        if key == "epoch":
            continue
        if isinstance(value, dict):
            for inner, v in value.items():
                yield f"{key}_{inner}", inner, v
        else:
            yield key, key, value


def instant_column_names(body: dict) -> dict:
    """The columns an answer's instant objects give: column name -> name of the member it
    holds (``sun_altitude_deg`` -> ``altitude_deg``)."""
    return {
        column: member
        for instant in _answer_instants(body) or ()
        for column, member, _ in _instant_members(instant)
    }


def _instant_cells(instant: dict) -> dict:
    """The cells an instant object gives each of its rows: column -> value."""
    return {column: value for column, _, value in _instant_members(instant)}


def _rows_from_records(body: dict, nested_names: set):
    epochs = _answer_epochs(body)
    instants = _answer_instants(body)
    # What the answer says of each instant itself (the UTC date in full, the Sun, the Earth
    # orientation), made once and put on each of its rows: a CSV row stands alone.
    per_instant = None if instants is None else [_instant_cells(v) for v in instants]
    common = _epoch_cells("epoch", body["epoch"]) if _is_epoch(body.get("epoch")) else {}
    object_lists = {
        k
        for rec in body["stars"]
        for k, v in rec.items()
        if isinstance(v, list) and v and all(isinstance(x, dict) for x in v)
    }
    for rec in body["stars"]:
        base, per_epoch, lists = _flatten_record(rec, nested_names, object_lists)
        if per_epoch is None:
            yield {**_lead(base), **common, **base}, lists
            continue
        for k, entry in enumerate(per_epoch):
            row = {key: base[key] for key in ("index", "id") if key in base}
            if isinstance(epochs, list) and len(epochs) == len(per_epoch):
                row.update(_epoch_columns(epochs, k))
            row.update(common)
            flat, _, more = _flatten_record(entry, nested_names)
            row.update(flat)
            row.update({key: v for key, v in base.items() if key not in row})
            if per_instant is not None and len(per_instant) == len(per_epoch):
                cells = per_instant[k]
                if cells.keys().isdisjoint(row):
                    row.update(cells)
                else:  # a name the star's row has already (none today)
                    row.update({(f"instant_{c}" if c in row else c): v for c, v in cells.items()})
            yield row, lists + more


def _lead(base: dict) -> dict:
    return {k: base[k] for k in ("index", "id") if k in base}


def _columns_table(body: dict) -> tuple[list[str], list[list[str]]]:
    """A ``columns`` answer -> (header, one list of cells per column), column-wise (fast:
    no object per row). Rows run star by star, epochs within a star."""
    cols = body["columns"]
    epochs = _answer_epochs(body)
    n = next((len(v) for k, v in cols.items() if k in ("flags", "id") and v is not None), None)
    if n is None:
        n = body.get("star_count")
    m = len(epochs) if isinstance(epochs, list) else None
    per_star, per_epoch = {}, {}
    for key, value in cols.items():
        if value is None:
            continue
        # An array with one row per epoch and one value per star; anything else (a value
        # or a short list per star) belongs to the star.
        if (
            m is not None
            and key != "flags"
            and len(value) == m
            and all(isinstance(v, list) and (n is None or len(v) == n) for v in value)
        ):
            per_epoch[key] = value
            n = len(value[0]) if n is None else n
        else:
            per_star[key] = value
    n = n or 0
    reps = m if per_epoch else 1
    lists = [  # lists of names (flags): judged on the first stars
        k
        for k, v in per_star.items()
        if all(isinstance(x, list) and all(isinstance(y, str) for y in x) for x in v[:100])
    ]
    out: dict[str, list[str]] = {"index": _repeat([str(i) for i in range(n)], reps)}
    if "id" in per_star:
        out["id"] = _repeat(_column_cells(per_star["id"]), reps)
    if per_epoch:
        out["epoch_julian_tdb"] = [_cell(e.get("julian_epoch_tdb")) for e in epochs] * n
        out["epoch_iso_utc"] = [_cell(e.get("iso_utc")) for e in epochs] * n
    elif _is_epoch(body.get("epoch")):
        for name, value in _epoch_cells("epoch", body["epoch"]).items():
            out[name] = [_cell(value)] * n
    for key, value in cols.items():
        if key in out or key in lists or value is None:
            continue
        if key in per_epoch:
            flat = [v for row in zip(*value, strict=True) for v in row]
            out[key] = _column_cells(flat)
        else:
            out[key] = _repeat(_column_cells(value), reps)
    for key in lists:
        out[key] = _repeat(_column_cells(per_star[key]), reps)
    lead = [k for k in LEADING_COLUMNS if k in out]
    header = lead + [k for k in out if k not in lead]
    return header, [out[k] for k in header]


def _repeat(cells: list, times: int) -> list:
    """Each cell ``times`` times in a row (a star's value on each of its epoch rows)."""
    if times == 1:
        return cells
    return [c for c in cells for _ in range(times)]


def body_to_csv(body: dict, nested_names: set | None = None) -> str:
    """A JSON answer (records or columns layout) as CSV text: one row per star and epoch.

    Parameters
    ----------
    body : dict
        The endpoint's JSON answer, with a ``stars`` list of records or a ``columns`` object.
    nested_names : set of str, optional
        Keys whose values are objects (possibly null); null ones give no column.
    """
    nested_names = set(nested_names or ())
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\r\n")
    if not isinstance(body.get("stars"), list) and isinstance(body.get("columns"), dict):
        header, columns = _columns_table(body)
        writer.writerow(header)
        writer.writerows(zip(*columns, strict=True))
        return buf.getvalue()
    header, rows = record_rows(body, nested_names)
    writer.writerow(header)
    for row in rows:
        writer.writerow([_cell(row.get(k)) for k in header])
    return buf.getvalue()


def record_rows(body: dict, nested_names: set) -> tuple[list[str], list[dict]]:
    """A records answer (or one object) -> (header, rows as dicts): the rows and column
    order of the CSV answer, values not yet written as text."""
    if isinstance(body.get("stars"), list):
        rows = list(_rows_from_records(body, nested_names))
    else:
        rows = [(body, [])]
    order: dict = {}
    list_keys: dict = {}
    for row, lists in rows:
        for key in row:
            order.setdefault(key, None)
        for key in lists:
            list_keys.setdefault(key, None)
    lead = [k for k in LEADING_COLUMNS if k in order]
    tail = [k for k in list_keys if k in order]
    middle = [k for k in order if k not in lead and k not in list_keys]
    return lead + middle + tail, [row for row, _ in rows]


def nested_field_names(schema) -> set:
    """Names of object-valued fields (Dict, Nested, lists of Nested) anywhere in a response
    schema: a null or empty value of these gives no column."""
    import marshmallow as ma

    names: set = set()
    seen: set = set()

    def walk(s):
        if id(s) in seen:
            return
        seen.add(id(s))
        for name, fld in s.fields.items():
            inner = fld.inner if isinstance(fld, ma.fields.List) else fld
            if isinstance(inner, ma.fields.Nested):
                names.add(name)
                walk(inner.schema)
            elif isinstance(fld, ma.fields.Dict):
                names.add(name)

    walk(schema)
    return names
