"""RFC 9457 problem details for every error, with the offending field paths.

Every error response is ``application/problem+json``::

    {"type": "about:blank", "title": "Unprocessable Entity", "status": 422,
     "detail": "The request has 1 invalid field.",
     "errors": [{"field": "stars[3].dec_deg", "message": "must be between -90 and 90"}]}

No stack trace ever reaches a client; unexpected failures are logged with the request id.
"""

from __future__ import annotations

import difflib
import logging
import re

import marshmallow as ma
from flask import Response, current_app, g, has_request_context, request
from werkzeug.exceptions import (
    HTTPException,
    InternalServerError,
    MethodNotAllowed,
    RequestEntityTooLarge,
)

from ..core.epochs import EPOCH_FORMS
from .jsonio import dumps
from .spelling import accepted_names, did_you_mean, likely_names

log = logging.getLogger("skydrift.errors")

PROBLEM_MIMETYPE = "application/problem+json"

#: At most this many field errors are listed in one problem response (the rest are counted),
#: so a body with a million bad values gets a small answer.
MAX_LISTED_ERRORS = 100

#: Field paths are cut to this many characters (they may hold a client's own text).
MAX_ECHOED_CHARS = 300

#: Messages are cut to this many characters: they quote a client's text only in short
#: pieces, and the longest of the service's own, an unknown star field's with the accepted
#: fields of the table (given once per table), is about 750.
MAX_MESSAGE_CHARS = 1000


def problem_response(
    status: int,
    title: str,
    detail: str | None = None,
    errors: list[dict] | None = None,
    headers: dict | None = None,
    **extra,
) -> Response:
    """Build an RFC 9457 problem+json response."""
    body = {"type": "about:blank", "title": title, "status": status}
    if detail:
        body["detail"] = detail
    if errors:
        body["errors"] = errors
    body.update(extra)
    request_id = getattr(g, "request_id", None)
    if request_id:
        body["request_id"] = request_id
    resp = Response(dumps(body), status=status, mimetype=PROBLEM_MIMETYPE)
    for k, v in (headers or {}).items():
        resp.headers[k] = v
    return resp


#: marshmallow's stock messages in the project's wording (the field path comes first in
#: every problem, so messages read as "<field> <message>").
_STOCK_MESSAGES = {
    "Missing data for required field.": "is required",
    "Unknown field.": "is not a field of this request (check the spelling)",
    "Field may not be null.": "may not be null",
    "Not a valid integer.": "must be a whole number",
    "Not a valid number.": "must be a number",
    "Not a valid string.": "must be a string",
    "Not a valid boolean.": "must be true or false",
    "Not a valid list.": "must be a list",
    "Invalid input type.": "must be an object",
    "Shorter than minimum length 1.": "must have at least one entry",
    "Special numeric values (nan or infinity) are not permitted.": "must be a finite number",
}


#: marshmallow's Range and OneOf messages ("Must be greater than or equal to -100.0 and less
#: than or equal to 60.0.", "Must be one of: a, b."), reworded as the star-table columns
#: word their bounds (tables.ColumnSpec.range_text).
_RANGE_MESSAGE = re.compile(
    r"Must be (?:(?P<lo_op>greater than(?: or equal to)?) (?P<lo>\S+?))?"
    r"(?: and )?(?:(?P<hi_op>less than(?: or equal to)?) (?P<hi>\S+?))?\.",
)
_ONE_OF_MESSAGE = re.compile(r"Must be one of: (?P<choices>.*)\.")
_LENGTH_MESSAGE = re.compile(r"Length must be (?P<n>\d+)\.")
_OPERATORS = {
    "greater than or equal to": ">=",
    "greater than": ">",
    "less than or equal to": "<=",
    "less than": "<",
}


def _bound(text: str) -> str:
    """A bound as marshmallow prints it, without a float's ".0" (1000000.0 -> 1000000)."""
    return text[:-2] if text.endswith(".0") and text[:-2].lstrip("-").isdigit() else text


def _worded(message: str) -> str:
    stock = _STOCK_MESSAGES.get(message)
    if stock is not None:
        return stock
    m = _RANGE_MESSAGE.fullmatch(message)
    if m and (m["lo"] or m["hi"]):
        lo_op, hi_op = _OPERATORS.get(m["lo_op"]), _OPERATORS.get(m["hi_op"])
        if lo_op == ">=" and hi_op == "<=":
            return f"must be between {_bound(m['lo'])} and {_bound(m['hi'])}"
        parts = [f"{op} {_bound(v)}" for op, v in ((lo_op, m["lo"]), (hi_op, m["hi"])) if v]
        return "must be " + " and ".join(parts)
    m = _ONE_OF_MESSAGE.fullmatch(message)
    if m:
        return f"must be one of: {m['choices']}"
    m = _LENGTH_MESSAGE.fullmatch(message)
    if m:
        return f"must have exactly {m['n']} entries"
    return message


_LOCATIONS = ("json", "query", "form", "files", "headers", "view_args")
_UNKNOWN = ["Unknown field."]
_MISSING = ["Missing data for required field."]


def with_likely_names(messages, schema):
    """marshmallow's "Unknown field." for a name, with the accepted name it most likely
    stands for ("target_epoch": did you mean "target_epochs"?), found in ``schema`` (the
    request's, as webargs passes it) and its nested schemas; other messages unchanged."""
    if not isinstance(messages, dict) or not isinstance(schema, ma.Schema):
        return messages
    fields = schema.fields
    out, meant = {}, set()
    for key, value in messages.items():
        if key in _LOCATIONS and isinstance(value, dict):
            out[key] = with_likely_names(value, schema)
        elif value == _UNKNOWN and isinstance(key, str):
            likely = likely_names(key, accepted_names(schema))
            out[key] = [_unknown_field_text(likely)] if likely else value
            if len(likely) == 1:
                meant.add(likely[0])
        else:
            out[key] = _in_nested(fields.get(key), value)
    # A required field an unknown name likely stands for ("from" for "from_frame") is not
    # called missing as well: the name's own message says which it is, as in star tables.
    for key in meant.intersection(out):
        if out[key] == _MISSING:
            del out[key]
    return out


def _unknown_field_text(likely: list[str]) -> str:
    return "is not a field of this request" + did_you_mean(likely)


def _in_nested(field, value):
    if isinstance(field, ma.fields.Nested) and isinstance(field.schema, ma.Schema):
        if field.many and isinstance(value, dict):
            return {i: with_likely_names(v, field.schema) for i, v in value.items()}
        return with_likely_names(value, field.schema)
    inner = getattr(field, "inner", None)  # List(Nested(...))
    if isinstance(inner, ma.fields.Nested) and isinstance(value, dict):
        return {i: _in_nested(inner, v) for i, v in value.items()}
    return value


class WholePath(str):
    """A key of nested error messages that is a whole field path of its own, listed as it
    is rather than under the field that holds it: the file lines of a CSV body's star table
    ("line 7: dec_deg"), whose errors marshmallow files under the table field."""

    __slots__ = ()


def flatten_messages(messages, prefix: str = "") -> list[dict]:
    """Flatten marshmallow/webargs nested messages into [{"field", "message"}].

    Keys that start with "[" (list indices) are appended without a dot, so paths read
    ``stars[3].dec_deg``. The webargs location key ("json") is dropped.
    """
    out: list[dict] = []
    if isinstance(messages, dict):
        for key, value in messages.items():
            if isinstance(key, WholePath):
                out.extend(flatten_messages(value, str(key)))
                continue
            key = str(key)
            if not prefix and key in ("json", "query", "form", "files", "headers", "view_args"):
                out.extend(flatten_messages(value, ""))
                continue
            if key == "_schema":
                path = prefix or "(body)"
            elif key.startswith("[") or not prefix:
                path = f"{prefix}{key}"
            else:
                path = f"{prefix}.{key}"
            if key.isdigit() and prefix:
                path = f"{prefix}[{key}]"
            out.extend(flatten_messages(value, path))
    elif isinstance(messages, list | tuple):
        if all(isinstance(m, str) for m in messages):
            for m in messages:
                out.append({"field": prefix or "(body)", "message": _worded(m)})
        else:
            for m in messages:
                out.extend(flatten_messages(m, prefix))
    else:
        out.append({"field": prefix or "(body)", "message": _worded(str(messages))})
    return out


#: Field of the entry that stands for the errors a list cut short leaves out.
MORE_FIELD = "(more)"


def further(count: int, what: str = "invalid values not listed") -> str:
    """Message of a MORE_FIELD entry: "450 further invalid values not listed"."""
    return f"{count} further {what}"


#: The count in a MORE_FIELD entry's message (written by :func:`further`).
_FURTHER = re.compile(r"(\d+) further ")


def _invalid_count(errors: list[dict]) -> int:
    """Offending fields in a list of errors, counting those a "(more)" entry stands for."""
    n = 0
    for e in errors:
        left_out = _FURTHER.match(str(e.get("message", "")))
        if str(e.get("field", "")).endswith(MORE_FIELD) and left_out:
            n += int(left_out.group(1))
        else:
            n += 1
    return n


#: The end of a message about an epoch that cannot be read: the forms taken.
_EPOCH_FORMS_TAIL = f": {EPOCH_FORMS}"


def _forms_told_once(errors: list[dict]) -> list[dict]:
    """The forms of epoch taken, told in full with the first epoch that cannot be read and
    referred to after it (300 bad epochs in a list: one help text, not 300)."""
    first = None
    out = []
    for e in errors:
        message = e.get("message")
        if isinstance(message, str) and message.endswith(_EPOCH_FORMS_TAIL):
            if first is None:
                first = e.get("field")
            else:
                head = message[: -len(_EPOCH_FORMS_TAIL)]
                e = {**e, "message": f"{head}: the forms taken are in the message for {first}"}
        out.append(e)
    return out


def _paths() -> list[str]:
    """The service's paths as the API reference writes them ("/v1/constellations/
    {abbreviation}/outline")."""
    return sorted(
        {
            re.sub(r"<(?:\w+:)?(\w+)>", r"{\1}", rule.rule)
            for rule in current_app.url_map.iter_rules()
            if rule.endpoint != "static"
        }
    )


def _routing_detail(error: HTTPException) -> str | None:
    """What a 404 or 405 of the routing says: the path or method a client likely meant.

    werkzeug's words ("If you entered the URL manually please check your spelling") name
    neither; a client that wrote /v1/propogation is told /v1/propagation."""
    path = request.path
    if error.code == 405:
        methods = _methods_taken(error)
        if not methods:
            return None
        return (
            f"{clip_echo(request.method, 20)} is not taken at {clip_echo(path, 100)}; "
            f"it takes {methods}."
        )
    likely = _likely_path(path)
    hint = f" Did you mean {likely}?{_methods_note(likely)}" if likely else ""
    return (
        f"No endpoint at {clip_echo(path, 100)}.{hint} The endpoints are listed at /, /docs "
        "and /openapi.json."
    )


def _methods_taken(error: HTTPException) -> str:
    """The methods a 405 names, as "GET or POST" (HEAD and OPTIONS, which every route
    answers, left out); "" where it names none."""
    methods = set(getattr(error, "valid_methods", None) or ()) - {"HEAD", "OPTIONS"}
    return " or ".join(sorted(methods))


def _methods_note(path: str) -> str:
    """The sentence "It takes GET, not POST." (after a space) where the request's method is
    not taken at ``path``, the likely path for a misspelt one; else nothing. POST /v1/site
    is told that /v1/sites is read with GET, rather than sent there to meet a 405."""
    try:
        current_app.create_url_adapter(request).match(path, method=request.method)
    except MethodNotAllowed as exc:
        methods = _methods_taken(exc)
        if methods:
            return f" It takes {methods}, not {clip_echo(request.method, 20)}."
    except HTTPException:  # not matched after all (a redirect, a converter's refusal)
        pass
    return ""


def _likely_path(path: str) -> str | None:
    """The service's path ``path`` most likely stands for: the same but for letter case or
    a trailing slash, or else the most similar by difflib. A path parameter takes the given
    path's segment there: /v1/constellations/Ori/outlines -> /v1/constellations/Ori/outline.
    """
    written = path.rstrip("/").split("/")
    candidates = {}
    for known in _paths():
        if known == "/":  # the index: no misspelt path stands for it
            continue
        parts = known.split("/")
        if len(parts) == len(written):
            parts = [w if p.startswith("{") else p for p, w in zip(parts, written, strict=True)]
        candidates["/".join(parts).lower()] = "/".join(parts)
    given = "/".join(written).lower()
    if given in candidates:
        return candidates[given]
    close = difflib.get_close_matches(given, list(candidates), n=1, cutoff=0.8)
    return candidates[close[0]] if close else None


def clip_echo(text: str, limit: int = MAX_ECHOED_CHARS) -> str:
    """Text from the request echoed in an answer, cut to ``limit`` characters."""
    return text if len(text) <= limit else text[: limit - 3] + "..."


#: Titles where RFC 9110 renamed the status (werkzeug keeps the older name), so that one
#: status has one title whichever part of the service answers it.
_TITLES = {413: "Content Too Large"}


def handle_http_exception(error: HTTPException) -> Response:
    """Shape every HTTPException (including flask-smorest/webargs aborts) as problem+json."""
    if error.code == 503:
        from .access import RequestTimeLimit, answering_time_limit

        if isinstance(error, RequestTimeLimit):
            answering_time_limit()
    data = getattr(error, "data", None) or {}
    errors = None
    if "errors" in data:
        errors = data["errors"] if isinstance(data["errors"], list) else None
        if errors is None:
            errors = flatten_messages(data["errors"])
    elif "messages" in data:
        errors = flatten_messages(with_likely_names(data["messages"], data.get("schema")))
    if errors and error.code == 400 and any("Invalid JSON" in e["message"] for e in errors):
        errors = None
        detail = "The request body is not valid JSON."
        if data.get("where"):  # line, column and reason (jsonio.BodyParser)
            detail = f"The request body is not valid JSON: {clip_echo(data['where'])}."
    elif errors and error.code == 413:  # nothing invalid: more than the service takes
        detail = "The request is over a limit of the service (errors name it and its setting)."
    elif errors:
        n = _invalid_count(errors)
        detail = f"The request has {n} invalid field{'s' if n != 1 else ''}."
    else:
        detail = data.get("message") or error.description
    if error.code in (404, 405) and not data and has_request_context():
        detail = _routing_detail(error) or detail
    if isinstance(error, RequestEntityTooLarge) and not data:
        # A body without a declared length (chunked) that grew past the limit while read:
        # werkzeug's words name no limit and no setting.
        limit = current_app.config["SKYDRIFT_SETTINGS"].max_body_bytes
        detail = (
            f"The request body exceeds the limit of {limit} bytes "
            "(setting SKYDRIFT_MAX_BODY_BYTES)."
        )
    if errors:
        errors = _forms_told_once(errors)
    if errors and len(errors) > MAX_LISTED_ERRORS:
        more = len(errors) - MAX_LISTED_ERRORS
        errors = errors[:MAX_LISTED_ERRORS] + [{"field": MORE_FIELD, "message": further(more)}]
    if errors:
        # A client's own text (an unknown 10 MB key) is never echoed at length.
        errors = [
            {
                "field": clip_echo(str(e.get("field", ""))),
                "message": clip_echo(str(e.get("message", "")), MAX_MESSAGE_CHARS),
            }
            for e in errors
        ]
    headers = dict(data.get("headers") or {})
    if error.code == 405 and hasattr(error, "valid_methods") and error.valid_methods:
        headers["Allow"] = ", ".join(error.valid_methods)
    return problem_response(
        error.code or 500,
        _TITLES.get(error.code, error.name),
        detail,
        errors,
        headers,
        **data.get("extra", {}),
    )


def handle_unexpected(error: Exception) -> Response:
    """Log an unexpected failure and answer a bare 500 problem (no trace to the client)."""
    if isinstance(error, HTTPException):
        return handle_http_exception(error)
    from .access import RequestTimeLimit, time_limit_passed

    if time_limit_passed():  # the time limit's exception, turned into another by a library
        log.info("request past its time limit ended with %s: %s", type(error).__name__, error)
        return handle_http_exception(RequestTimeLimit())
    log.exception("unhandled error", extra={"request_id": getattr(g, "request_id", None)})
    ise = InternalServerError()
    return problem_response(
        500, ise.name, "An internal error occurred; it has been logged with the request id."
    )


def handle_client_timeout(error: Exception) -> Response:
    """The client stopped sending its body in time (service.workers): 408, never a 500.

    Werkzeug reports a failed body read as ClientDisconnected (a 400) with the socket's
    error as its context; a timeout there is answered 408 as well.
    """
    cause = error if isinstance(error, TimeoutError) else error.__context__
    if not isinstance(cause, TimeoutError):
        return handle_http_exception(error)
    log.info("client timed out sending the request: %s", cause)
    return problem_response(
        408,
        "Request Timeout",
        "The request body did not arrive in time; send it without pauses.",
        headers={"Connection": "close"},
    )
