"""JSON in and out with orjson: fast, numpy-aware, NaN written as null (unknown)."""

from __future__ import annotations

import contextvars
import json

import marshmallow as ma
import orjson
from flask import g, has_request_context
from flask.json.provider import JSONProvider
from flask_smorest import abort
from webargs import core as webargs_core
from webargs.flaskparser import FlaskParser
from webargs.flaskparser import abort as webargs_abort
from werkzeug.exceptions import ClientDisconnected, RequestEntityTooLarge

from . import jsoncolumns

try:  # gunicorn's errors for a malformed chunked body (gunicorn serves the application)
    from gunicorn.http.errors import ParseException as _ChunkErrors
except ImportError:  # pragma: no cover - another WSGI server
    _ChunkErrors = ()

DUMP_OPTIONS = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NON_STR_KEYS

#: The schema of the JSON body being read, in this thread (BodyParser.load_json).
_BODY_SCHEMA: contextvars.ContextVar = contextvars.ContextVar("body_schema", default=None)


def dumps(obj) -> bytes:
    """Serialise to JSON bytes; numpy arrays natively, NaN and infinities as null."""
    return orjson.dumps(obj, option=DUMP_OPTIONS)


def read_body(req) -> bytes:
    """The request body, read from the WSGI input in one call.

    werkzeug's ``get_data`` reads the stream 8 KB at a time, through a Python call per piece
    into gunicorn's body reader: for a 48 MB body 0.15 to 0.25 s, against 0.07 s for one
    read of the whole ``Content-Length`` (measured with benchmarks/bench_http.py's server).
    The checks of werkzeug's stream stay: a body above the configured maximum is refused
    (413) before it is read, and a short body is a client that went away (as werkzeug
    reports it). The result is cached as ``get_data`` caches it.

    A body without a Content-Length (chunked transfer coding) is read up to one byte past
    the configured maximum: more than the maximum is refused with 413 (werkzeug's own
    reader would stop at the maximum and hand on the first part as if it were all), and a
    malformed chunk is a 400 naming the fault (gunicorn raises its parse errors there).
    """
    cached = getattr(req, "_cached_data", None)  # werkzeug's cache of get_data
    if cached is not None:
        return cached
    n = req.content_length
    limit = req.max_content_length
    if n is None:
        data = _read_unsized(req, limit)
    elif n == 0:
        data = b""
    else:
        if limit is not None and n > limit:
            raise RequestEntityTooLarge()
        data = req.environ["wsgi.input"].read(n)
        if len(data) != n:
            raise ClientDisconnected()
    req._cached_data = data
    return data


def _read_unsized(req, limit: int | None) -> bytes:
    """A body that comes without a Content-Length: chunked, or none at all."""
    if not req.environ.get("wsgi.input_terminated"):
        return b""  # no length and no chunked coding: no body (werkzeug's rule too)
    stream = req.environ["wsgi.input"]
    try:
        data = stream.read() if limit is None else stream.read(limit + 1)
    except _ChunkErrors as exc:
        abort(400, message=f"The chunked request body is malformed ({exc}).")
    except OSError as exc:  # the client went away, or was too slow (408, errors.py)
        raise ClientDisconnected() from exc
    if limit is not None and len(data) > limit:
        raise RequestEntityTooLarge()
    return data


class OrjsonProvider(JSONProvider):
    """Flask JSON provider backed by orjson."""

    def dumps(self, obj, **kwargs):
        return dumps(obj).decode()

    def loads(self, s, **kwargs):
        return orjson.loads(s)

    def response(self, *args, **kwargs):
        """JSON response; or, when the request set ``g.skydrift_answer_writer`` (a client of
        a star-table endpoint asking for another answer format, see common.Blueprint), the
        response that writer makes of the answer object, without JSON in between."""
        obj = self._prepare_response_obj(args, kwargs)
        writer = g.get("skydrift_answer_writer") if has_request_context() else None
        if writer is not None and isinstance(obj, dict):
            return writer(obj)
        return self._app.response_class(dumps(obj), mimetype="application/json")


class BodyParser(FlaskParser):
    """webargs parser that reads JSON bodies with orjson (about 5x faster than json).

    Unknown query parameters are refused (422 naming them), as unknown body fields are: a
    misspelt option must not silently fall back to its default. A ``text/csv`` body on a
    star-table endpoint is read by :mod:`.csvio` instead (its options come from the query
    string, checked by the endpoint's schema like body fields); so is an Arrow IPC stream
    body (``application/vnd.apache.arrow.stream``), by :mod:`.arrowio`.
    """

    DEFAULT_UNKNOWN_BY_LOCATION = {
        **FlaskParser.DEFAULT_UNKNOWN_BY_LOCATION,
        "query": ma.RAISE,
        "querystring": ma.RAISE,
    }

    def load_json(self, req, schema):
        """JSON body, or for a ``text/csv`` or Arrow stream body the star table and query
        options."""
        if req.mimetype == "text/csv":
            from .csvio import load_csv_request

            return load_csv_request(req, schema)
        if req.mimetype == "application/vnd.apache.arrow.stream":
            from .arrowio import load_arrow_request

            return load_arrow_request(req, schema)
        if req.args:
            refuse_query_options(req.args)
        _BODY_SCHEMA.set(schema)  # for a large body's number columns (_raw_load_json)
        return super().load_json(req, schema)

    def load_querystring(self, req, schema):
        refuse_repeated_options(schema, req.args)
        return super().load_querystring(req, schema)

    def _raw_load_json(self, req):
        if not webargs_core.is_json(req.mimetype):
            return webargs_core.missing
        data = read_body(req)
        if not data:
            return webargs_core.missing  # no body: each required field is reported missing
        try:
            if len(data) >= jsoncolumns.FROM_BYTES:
                return jsoncolumns.loads(data, _star_number_columns(_BODY_SCHEMA.get()))
            return orjson.loads(data)
        except orjson.JSONDecodeError as exc:
            # webargs turns json.JSONDecodeError into a 400 through our error handler, but
            # takes an empty `doc` to mean "no body": orjson leaves it empty for bytes that
            # are not UTF-8, so it is never passed on empty.
            raise json.JSONDecodeError(
                _decode_problem(exc), exc.doc or "(body)", exc.pos or 0
            ) from None

    def _handle_invalid_json_error(self, error, req, *args, **kwargs):
        """400 that says where the body stops being JSON (line and column) and why."""
        webargs_abort(
            400, exc=error, messages={"json": ["Invalid JSON body."]}, where=_where(error)
        )


#: Words some writers put in JSON for numbers it cannot hold (Python's json, JavaScript).
_NOT_JSON_NUMBERS = ("NaN", "Infinity", "-Infinity", "nan", "inf", "-inf")

#: orjson's message for text that is not UTF-8 (it names surrogates whatever the bytes are).
_NOT_UTF8 = "str is not valid UTF-8"


def _decode_problem(exc: orjson.JSONDecodeError) -> str:
    """orjson's reason for refusing a body, with a hint where the usual mistake shows."""
    if exc.msg.startswith(_NOT_UTF8):
        return "the body is not UTF-8 text (JSON must be UTF-8)"
    doc, pos = exc.doc or "", exc.pos or 0
    # orjson stops on the first character it cannot read: a sign's "I" for "-Infinity".
    start = pos - 1 if pos and doc[pos - 1 : pos] == "-" else pos
    if any(doc.startswith(word, start) for word in _NOT_JSON_NUMBERS):
        return (
            "NaN and infinities are not numbers in JSON; send null for an unknown value "
            f"({exc.msg})"
        )
    if exc.msg.startswith("number is infinity"):
        return "a number beyond the largest double (about 1.8e308)"
    return exc.msg


def _where(error) -> str | None:
    """'line L, column C: reason' of a JSON decoding error (the reason alone for text that
    is not UTF-8, where orjson gives no place)."""
    msg = getattr(error, "msg", None)
    if msg is None:  # a UnicodeDecodeError from webargs itself
        return "the body is not UTF-8 text (JSON must be UTF-8)"
    if msg.startswith("the body is not UTF-8"):
        return msg
    return f"line {error.lineno}, column {error.colno}: {msg}"


def _star_number_columns(schema) -> frozenset:
    """Names of the number columns of the schema's star table (``stars``), if it has one:
    those a large body in the columns layout may give as arrays (:mod:`.jsoncolumns`)."""
    from .tables import StarTableField

    fld = schema.fields.get("stars") if schema is not None else None
    return fld.numeric_names if isinstance(fld, StarTableField) else frozenset()


def refuse_query_options(args) -> None:
    """422 naming each query parameter sent beside a JSON body: only CSV and Arrow bodies
    take their options from the query string, so ``?model=light_time`` would otherwise be
    ignored without a word and the default used."""
    abort(
        422,
        errors=[
            {
                "field": key,
                "message": "query options are read only with a text/csv or Arrow body; "
                "with a JSON body give it in the body",
            }
            for key in args
        ],
    )


def refuse_repeated_options(schema, args) -> None:
    """422 for a query parameter given more than once where one value belongs: which of
    ``?tolerance_arcsec=1&tolerance_arcsec=2`` was meant is unknowable, and taking the first
    would silently drop the other. List fields (and unknown names, refused by the schema)
    are left alone; ``a.b`` names the member ``b`` of the nested field ``a``."""
    errors = []
    for key in args:
        times = len(args.getlist(key))
        fld = schema.fields.get(key.partition(".")[0])
        if times > 1 and fld is not None and not isinstance(fld, ma.fields.List):
            errors.append({"field": key, "message": f"given {times} times; give it once"})
    if errors:
        abort(422, errors=errors)
