"""Apache Arrow IPC streams in and out for every star-table endpoint (bulk clients).

The media type is ``application/vnd.apache.arrow.stream`` (the IANA registration of the Arrow
IPC streaming format). Arrow carries typed columns in binary, so a million stars cross HTTP
without text parsing: the request's columns become numpy arrays without a Python loop, and
the answer's numpy arrays become Arrow columns the same way.

Request (``Content-Type: application/vnd.apache.arrow.stream``)
    The body is one Arrow IPC stream (a schema, then one or more record batches) holding
    the star table: one column per field of the endpoint's record schema, under the same
    names as the JSON columns (units in the names: ``ra_deg``, ``parallax_mas``, ...).
    Numeric columns may have any Arrow integer or floating-point type and are read as
    float64; an Arrow null is unknown (as a JSON null is), while a NaN or infinite value is
    refused (422), never taken as unknown. ``id`` is a string or integer column. A column of
    any other type, an unknown or repeated column name, or a table without rows is refused
    (422, naming the column: ``stars.ra_deg`` / ``stars.ra_deg[7]``); a body that is not an
    Arrow stream is a 400, compressed record batches a 415 (:func:`parse_arrow_body`).
    The endpoint's other request fields travel in the query string exactly as with a CSV
    body (:mod:`.csvio`). An Arrow body answers JSON unless the client
    asks for Arrow (Accept), in the columns layout unless the query says ``layout=records``,
    as a CSV body does: the body says how the stars come in, Accept says how the answer
    should go out.

Response (``Accept: application/vnd.apache.arrow.stream``)
    One Arrow IPC stream with one record batch: one row per star and epoch (or per star and
    event), with the rows and columns of the CSV answer, in its order: ``index`` (int64),
    ``id`` (string or int64), ``epoch_julian_tdb`` (float64) and ``epoch_iso_utc``, the
    quantities under their JSON names (float64, bool or string; a short vector per star,
    such as an interval, or the ``utc_jd`` of an observed place's instant, is a fixed-size
    list of float64), the figures of each row's instant as in the CSV answer
    (``sun_altitude_deg``, ``earth_orientation_ut1_utc_s``, ...), and ``flags`` last: the
    star's flag names joined by ``;`` (empty: none). Strings repeated on many rows
    (``epoch_iso_utc``, ``flags``, an instant's text such as ``earth_orientation_status``)
    are dictionary-encoded. An unknown value (JSON null) is
    an Arrow null. Each quantity with a unit carries it in its field metadata (``unit``);
    the answer's other members (units, flag meanings, epochs, warnings, ...) are the JSON
    text of the schema metadata key ``skydrift.answer``. Errors stay
    ``application/problem+json``.
"""

from __future__ import annotations

import fnmatch

import numpy as np
import pyarrow as pa
from flask import current_app, request
from flask_smorest import abort

from . import csvio
from .jsonio import dumps
from .tables import MAX_ID_LENGTH

ARROW_MIMETYPE = "application/vnd.apache.arrow.stream"

#: Schema metadata key holding the answer's members other than the table, as JSON text.
ANSWER_METADATA_KEY = b"skydrift.answer"

#: First bytes of the Arrow IPC *file* format (Feather version 2), another media type.
ARROW_FILE_MAGIC = b"ARROW1"

#: Unit of the epoch column, in its field metadata.
EPOCH_UNIT = "Julian epoch (TDB), years"

# pyarrow imports pandas, when it is installed, on its first conversion of anything (0.4 s;
# the service image has no pandas, development environments do): paid here, at start and
# before gunicorn forks its workers, rather than by the first Arrow request of each worker.
pa.array([0.0])


class ArrowTable:
    """A star table read from an Arrow IPC stream: typed columns, not yet validated.

    Attributes
    ----------
    table : pyarrow.Table
        The stream's record batches as one table.
    names : list of str
        Column names as given.
    """

    def __init__(self, table: pa.Table):
        self.table = table
        self.names = list(table.column_names)

    @property
    def size(self) -> int:
        return self.table.num_rows

    def number_column(self, spec, errors) -> np.ndarray | None:
        """One numeric column as float64 (null = NaN); type, NaN and null errors collected.

        Zero-copy for a float64 column in one chunk without nulls (the array is read-only).
        """
        col = self.table.column(spec.name)
        if pa.types.is_null(col.type):  # a column of nulls only (pyarrow's type for [None])
            col = col.cast(pa.float64())
        if not (pa.types.is_integer(col.type) or pa.types.is_floating(col.type)):
            errors.add(
                errors.header_key(spec.name),
                f"must be a column of numbers (an Arrow integer or floating-point type), "
                f"not {col.type}",
            )
            return None
        arr = _to_float64(col)
        nulls = col.null_count
        if pa.types.is_floating(col.type):
            bad = ~np.isfinite(arr)
            if nulls:
                bad &= _valid(col)
            if bad.any():
                errors.add_indices(
                    np.flatnonzero(bad), spec.name, "must be a finite number; use null for unknown"
                )
                arr = np.where(bad, np.nan, arr)  # reported once, not again by the range check
        if nulls and not spec.allow_none:
            errors.add_indices(
                np.flatnonzero(~_valid(col)),
                spec.name,
                spec.missing("is required and may not be null"),
            )
        return arr

    def id_column(self, errors) -> list | None:
        """The ``id`` column as a list of str or int (null = None), or None if mistyped.

        Dictionary-encoded strings (as pandas categoricals give) are read as strings; a
        column of nulls only is no identifiers at all.
        """
        col = self.table.column("id")
        t = col.type
        if pa.types.is_dictionary(t):
            # Lengths checked before decoding: one long value on every row would expand.
            values = [v for c in col.chunks for v in c.dictionary.to_pylist()]
            if any(isinstance(v, str | bytes) and len(v) > MAX_ID_LENGTH for v in values):
                errors.add(errors.header_key("id"), f"at most {MAX_ID_LENGTH} characters")
                return None
            t = t.value_type
            col = col.cast(t)
        elif pa.types.is_null(t):
            t = pa.string()
            col = col.cast(t)
        if not (
            pa.types.is_integer(t)
            or pa.types.is_string(t)
            or pa.types.is_large_string(t)
            or (hasattr(pa.types, "is_string_view") and pa.types.is_string_view(t))
        ):
            errors.add(errors.header_key("id"), f"must be a column of strings or integers, not {t}")
            return None
        return col.to_pylist()


def _to_float64(col: pa.ChunkedArray) -> np.ndarray:
    """A numeric chunked array -> one float64 numpy array, nulls as NaN."""
    if col.num_chunks == 1:
        arr = col.chunk(0).to_numpy(zero_copy_only=False)
    elif col.num_chunks == 0:
        return np.empty(0)
    else:
        arr = col.to_numpy()
    return arr if arr.dtype == np.float64 else arr.astype(np.float64)


def _valid(col: pa.ChunkedArray) -> np.ndarray:
    return col.is_valid().to_numpy(zero_copy_only=False)


def parse_arrow_body(data: bytes) -> ArrowTable:
    """Read an Arrow IPC stream body.

    A body that is not one aborts with 400, and so does one with anything after the end of
    the stream (Note 3); compressed record batches with 415 (Note 1); repeated column names
    with 422.

    Notes
    -----
    1. An uncompressed stream is read without copying: the table is no larger than the
       body, which the body size limit bounds. LZ4 or ZSTD buffer compression would let a
       small body expand to any size in memory (a decompression bomb), so it is refused
       before anything is decoded, as compressed Content-Encodings are (app.py).
    2. The table is validated in full (buffer sizes, offsets), so that a forged stream is a
       400 rather than a read out of bounds.
    3. A stream ends at its end-of-stream marker (or at the end of the body); pyarrow stops
       reading there. Two streams sent one after the other (files joined end to end) would
       otherwise be answered for the first stream's stars alone, without a word.
    """
    if data[:6] == ARROW_FILE_MAGIC:
        abort(
            400,
            message="The body is an Arrow IPC file (a Feather or .arrow file, which starts "
            "with ARROW1), not an Arrow IPC stream: send the stream format (pyarrow: "
            "pyarrow.ipc.new_stream).",
        )
    buf = pa.py_buffer(data)
    try:
        source = pa.BufferReader(buf)
        for message in pa.ipc.MessageReader.open_stream(source):
            if _is_compressed_batch(message.metadata.to_pybytes()):
                abort(
                    415,
                    message="Compressed Arrow record batches (LZ4 or ZSTD buffers) are not "
                    "accepted; send the stream uncompressed.",
                )
        end = source.tell()
        if end < len(data):
            abort(
                400,
                message=f"The body goes on after the end of its Arrow IPC stream (byte {end} "
                f"of {len(data)}): send one stream (several streams one after another, or "
                "other data after one, would lose stars).",
            )
        with pa.ipc.open_stream(buf) as reader:
            table = reader.read_all()
        table.validate(full=True)
    except (pa.ArrowException, OSError, ValueError, IndexError) as exc:
        text = str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__
        abort(400, message=f"The body is not an Arrow IPC stream ({text}).")
    seen: set = set()
    repeated = []
    for name in table.column_names:
        if name in seen:
            repeated.append(name)
        seen.add(name)
    if repeated:
        abort(
            422,
            errors=[
                {"field": f"stars.{name}", "message": "column given twice"} for name in repeated
            ],
        )
    return ArrowTable(table)


def _is_compressed_batch(meta: bytes) -> bool:
    """Whether an IPC message is a record batch or dictionary batch with compressed buffers,
    read from its flatbuffer metadata without decoding the body (False for other messages).

    The layout is Arrow's format/Message.fbs: Message {version, header_type, header,
    bodyLength}; RecordBatch {length, nodes, buffers, compression}; DictionaryBatch {id,
    data: RecordBatch, isDelta}. Header types: 2 DictionaryBatch, 3 RecordBatch.
    """

    def u16(pos):
        return int.from_bytes(meta[pos : pos + 2], "little")

    def u32(pos):
        return int.from_bytes(meta[pos : pos + 4], "little")

    def field(table, i):  # position of field i of a table, None if absent
        vtable = table - int.from_bytes(meta[table : table + 4], "little", signed=True)
        if 4 + 2 * i + 2 > u16(vtable):
            return None
        offset = u16(vtable + 4 + 2 * i)
        return table + offset if offset else None

    root = u32(0)
    kind_at, header_at = field(root, 1), field(root, 2)
    kind = meta[kind_at] if kind_at is not None else 0
    if header_at is None or kind not in (2, 3):
        return False
    header = header_at + u32(header_at)
    if kind == 2:
        data_at = field(header, 1)
        if data_at is None:
            return False
        header = data_at + u32(data_at)
    return field(header, 3) is not None  # RecordBatch.compression


def load_arrow_request(req, schema) -> dict:
    """The request fields of an Arrow request: the table from the body, options from the
    query string (read as for a CSV body)."""
    return csvio.load_table_request(req, schema, parse_arrow_body)


def wants_arrow() -> bool:
    """True when the client prefers an Arrow stream to JSON and CSV in its Accept header."""
    if "arrow" not in request.headers.get("Accept", "").lower():
        return False  # the common case, without parsing the header
    accept = request.accept_mimetypes
    best = accept.best_match(["application/json", csvio.CSV_MIMETYPE, ARROW_MIMETYPE])
    return best == ARROW_MIMETYPE and accept[ARROW_MIMETYPE] > 0


# ------------------------------------------------------------------ Arrow out


def arrow_response(body: dict, nested_names: set | None = None):
    """A JSON answer dict -> a Flask response holding it as an Arrow IPC stream."""
    table = body_to_arrow(body, nested_names)
    # The stream's size first (nothing written), then the stream into memory of exactly
    # that size from Python's allocator (pyarrow's own pool keeps freed memory a while).
    size = pa.MockOutputStream()
    with pa.ipc.new_stream(size, table.schema) as writer:
        writer.write_table(table)
    stream = bytearray(size.size())
    with pa.ipc.new_stream(pa.FixedSizeBufferWriter(pa.py_buffer(stream)), table.schema) as w:
        w.write_table(table)
    resp = current_app.response_class(_pieces(stream), mimetype=ARROW_MIMETYPE)
    resp.content_length = len(stream)
    return resp


#: Size of the bytes pieces an Arrow answer is sent in.
ANSWER_PIECE_BYTES = 1 << 20


def _pieces(stream: bytearray):
    """The stream as bytes of ANSWER_PIECE_BYTES each: WSGI servers send bytes (gunicorn takes
    nothing else), and one bytes copy of a whole million-row answer (72 MB) costs 0.05 s,
    most of it touching fresh memory, where pieces reuse the same few megabytes."""
    view = memoryview(stream)
    for start in range(0, len(view), ANSWER_PIECE_BYTES):
        yield bytes(view[start : start + ANSWER_PIECE_BYTES])


def body_to_arrow(body: dict, nested_names: set | None = None) -> pa.Table:
    """A JSON answer (records or columns layout) as an Arrow table: one row per star and
    epoch, the columns of the CSV answer in its order; the other members as metadata.

    Parameters
    ----------
    body : dict
        The endpoint's answer, with a ``stars`` list of records or a ``columns`` object
        (whose quantities may be numpy arrays: per star, shape (N,) or (N, K); per epoch,
        shape (M, N)).
    nested_names : set of str, optional
        Keys whose values are objects (possibly null); null ones give no column.
    """
    if not isinstance(body.get("stars"), list) and isinstance(body.get("columns"), dict):
        columns = _columns_arrow(body)
    else:
        columns = _records_arrow(body, set(nested_names or ()))
    units = body.get("units") if isinstance(body.get("units"), dict) else {}
    members = csvio.instant_column_names(body)  # an instant's column -> its member name
    fields = []
    for name, arr in columns.items():
        unit = EPOCH_UNIT if name == "epoch_julian_tdb" else _unit(units, members.get(name, name))
        fields.append(pa.field(name, arr.type, metadata=None if unit is None else {"unit": unit}))
    rest = {k: v for k, v in body.items() if k not in ("stars", "columns")}
    schema = pa.schema(fields, metadata={ANSWER_METADATA_KEY: dumps(rest)})
    return pa.Table.from_arrays(list(columns.values()), schema=schema)


def _unit(units: dict, name: str) -> str | None:
    if name in units and isinstance(units[name], str):
        return units[name]
    for pattern, unit in units.items():
        if "*" in pattern and isinstance(unit, str) and fnmatch.fnmatchcase(name, pattern):
            return unit
    return None


def _float_array(values) -> pa.Array:
    """float64 Arrow array from numbers without a Python loop; NaN and infinities are nulls
    (as in the JSON answer)."""
    a = np.ascontiguousarray(values, dtype=np.float64).reshape(-1)
    bad = ~np.isfinite(a)
    if not bad.any():
        return pa.Array.from_buffers(pa.float64(), a.size, [None, pa.py_buffer(a)])
    valid = pa.py_buffer(np.packbits(~bad, bitorder="little"))
    return pa.Array.from_buffers(
        pa.float64(), a.size, [valid, pa.py_buffer(a)], null_count=int(bad.sum())
    )


def _numpy_array(values: np.ndarray) -> pa.Array:
    """A 1-D numpy array (float, int or bool) -> Arrow; floats via :func:`_float_array`."""
    if values.dtype.kind == "f":
        return _float_array(values)
    return pa.array(values)


def _short_vectors(values: np.ndarray) -> pa.Array:
    """(N, K) numbers -> fixed-size lists of K float64 (unknown entries null)."""
    return pa.FixedSizeListArray.from_arrays(_float_array(values), values.shape[1])


def _names_column(lists: list) -> pa.Array | None:
    """Lists of names per row (flags) -> dictionary-encoded ';'-joined strings; None if
    the lists hold anything but strings.

    Rows with the same list object (the flag lists of the service are shared by all stars
    with the same mask) are looked at and joined once, so a million rows cost one pass over
    object ids.
    """
    n = len(lists)
    if n == 0:
        return pa.DictionaryArray.from_arrays(pa.array([], pa.int32()), pa.array([], pa.string()))
    codes = getattr(lists, "codes", None)
    if codes is not None and len(codes) == n:  # flag_names told which stars share a tuple
        return _dictionary([csvio.LIST_SEPARATOR.join(t) for t in lists.distinct], codes)
    keys = np.fromiter(map(id, lists), dtype=np.int64, count=n)
    encoded = pa.array(keys).dictionary_encode()
    indices = encoded.indices.to_numpy(zero_copy_only=False)
    first = np.empty(len(encoded.dictionary), dtype=np.int64)
    first[indices[::-1]] = np.arange(n - 1, -1, -1)  # first row of each distinct object
    if not all(isinstance(x, str) for i in first.tolist() for x in lists[i] or ()):
        return None
    texts = [
        "" if lists[i] is None else csvio.LIST_SEPARATOR.join(map(str, lists[i]))
        for i in first.tolist()
    ]
    return _dictionary(texts, indices)


def _dictionary(texts: list, codes: np.ndarray) -> pa.DictionaryArray:
    """Row i holds ``texts[codes[i]]``, dictionary-encoded with each distinct text once."""
    distinct, remap = np.unique(np.array(texts, dtype=object), return_inverse=True)
    return pa.DictionaryArray.from_arrays(
        pa.array(remap.reshape(-1)[codes].astype(np.int32)),
        pa.array(distinct.tolist(), pa.string()),
    )


def _repeated_strings(values: list, rows: np.ndarray | None = None) -> pa.Array:
    """A few distinct strings (or nulls), taken at ``rows`` -> dictionary-encoded column."""
    dictionary = pa.array(values, pa.string())
    indices = np.arange(len(values), dtype=np.int32) if rows is None else rows.astype(np.int32)
    mask = np.array([v is None for v in values], dtype=bool)[indices]
    idx = pa.array(indices, mask=mask) if mask.any() else pa.array(indices)
    return pa.DictionaryArray.from_arrays(idx, dictionary)


def _python_array(values: list) -> pa.Array:
    """A column of JSON values (numbers, text, booleans, null, short lists) -> Arrow; a
    column Arrow cannot type as one (mixed text and numbers) becomes text, as in CSV."""
    kinds = set(map(type, values))
    if kinds == {type(None)}:
        # Unknown for every row (a catalogue without any radial velocity): float64 nulls,
        # as a quantity of the columns layout gives, not the names of an empty list.
        return _float_array(np.full(len(values), np.nan))
    if kinds <= {float, int, type(None)} and float in kinds:
        return _float_array([np.nan if v is None else v for v in values])
    if kinds and kinds <= {list, tuple, type(None)}:
        names = _names_column(values)
        if names is not None:
            return names
        vectors = _vector_rows(values)
        if vectors is not None:
            return _short_vectors(vectors)
    try:
        return pa.array(values, from_pandas=True)  # NaN (also inside lists) -> null
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
        return pa.array([None if v is None else csvio._cell(v) for v in values], pa.string())


def _vector_rows(values: list) -> np.ndarray | None:
    """Short vectors of numbers (an interval per star), all of one length K, as an (N, K)
    float array (null: NaN), so that the records layout gives the fixed-size lists the
    columns layout gives; None for anything else."""
    sizes = {len(v) for v in values if v is not None}
    if len(sizes) != 1 or 0 in sizes:
        return None
    if not all(type(x) in (float, int) or x is None for v in values if v is not None for x in v):
        return None
    (k,) = sizes
    return np.array(
        [[np.nan] * k if v is None else [np.nan if x is None else x for x in v] for v in values],
        dtype=float,
    )


def _ids_array(ids: list) -> pa.Array:
    """Identifiers as given: int64 if all integers, uint64 if all integers and some above
    int64 (an Arrow uint64 id column), else text (a mix gives text)."""
    try:
        return pa.array(ids)
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
        pass
    try:
        return pa.array(ids, pa.uint64())
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
        return pa.array([None if v is None else str(v) for v in ids], pa.string())


def _take(arr: pa.Array, rows: np.ndarray | None) -> pa.Array:
    return arr if rows is None else arr.take(pa.array(rows))


def _columns_arrow(body: dict) -> dict:
    """A ``columns`` answer -> Arrow columns, rows star by star, epochs within a star; numpy
    arrays pass without a Python loop."""
    cols = body["columns"]
    epochs = csvio._answer_epochs(body)
    n = next((len(v) for k, v in cols.items() if k in ("flags", "id") and v is not None), None)
    if n is None:
        n = body.get("star_count")
    m = len(epochs) if isinstance(epochs, list) else None

    def is_per_epoch(key, value):
        if m is None or key == "flags":
            return False
        if isinstance(value, np.ndarray):
            return value.ndim == 2 and value.shape[0] == m and (n is None or value.shape[1] == n)
        return (
            isinstance(value, list)
            and len(value) == m
            and all(isinstance(v, list | np.ndarray) and (n is None or len(v) == n) for v in value)
        )

    per_epoch = {k: v for k, v in cols.items() if v is not None and is_per_epoch(k, v)}
    if n is None and per_epoch:
        n = len(next(iter(per_epoch.values()))[0])
    n = n or 0
    reps = m if per_epoch else 1
    star_rows = None if reps == 1 else np.repeat(np.arange(n, dtype=np.int64), reps)
    out: dict[str, pa.Array] = {
        "index": pa.array(np.repeat(np.arange(n, dtype=np.int64), reps)),
    }
    if cols.get("id") is not None:
        out["id"] = _take(_ids_array(cols["id"]), star_rows)
    if per_epoch:
        epoch_rows = np.tile(np.arange(m, dtype=np.int64), n)
        out["epoch_julian_tdb"] = _float_array(
            np.array([e.get("julian_epoch_tdb") for e in epochs], dtype=float)[epoch_rows]
        )
        out["epoch_iso_utc"] = _repeated_strings([e.get("iso_utc") for e in epochs], epoch_rows)
    elif csvio._is_epoch(body.get("epoch")):
        epoch = body["epoch"]
        out["epoch_julian_tdb"] = _float_array(np.full(n, epoch.get("julian_epoch_tdb"), float))
        out["epoch_iso_utc"] = _repeated_strings([epoch.get("iso_utc")], np.zeros(n, np.int64))
    names_last = {}
    for key, value in cols.items():
        if key in out or value is None:
            continue
        if key in per_epoch:
            arr = np.asarray(value, dtype=float)
            out[key] = _float_array(arr.T)  # (N, M): star by star, epochs within a star
        elif isinstance(value, np.ndarray) and value.ndim == 2:
            out[key] = _take(_short_vectors(value), star_rows)
        elif isinstance(value, np.ndarray):
            out[key] = _take(_numpy_array(value), star_rows)
        else:
            names = _names_column(value) if key == "flags" else None
            arr = names if names is not None else _python_array(value)
            if isinstance(arr, pa.DictionaryArray):
                names_last[key] = _take(arr, star_rows)
            else:
                out[key] = _take(arr, star_rows)
    out.update(names_last)
    lead = [k for k in csvio.LEADING_COLUMNS if k in out]
    return {k: out[k] for k in lead + [k for k in out if k not in lead]}


def _records_arrow(body: dict, nested_names: set) -> dict:
    """A records answer (or a single object) -> Arrow columns, through the CSV answer's rows
    (the same rows and column order)."""
    header, rows = csvio.record_rows(body, nested_names)
    per_instant = csvio.instant_column_names(body)
    out = {}
    for key in header:
        values = [row.get(key) for row in rows]
        if key == "id":
            out[key] = _ids_array(values)
        elif (key.endswith("_iso_utc") or key in per_instant) and all(
            v is None or type(v) is str for v in values
        ):
            # repeated on many rows: dictionary-encoded, as in the columns layout
            out[key] = pa.array(values, pa.string()).dictionary_encode()
        else:
            out[key] = _python_array(values)
    return out
