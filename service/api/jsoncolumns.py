"""Large JSON bodies in the columns layout, read without a Python float per value.

orjson reads a body of a million stars in columns into six million Python floats, which
the table check then copies into numpy arrays: 0.6 s of a 1,000,000-star request (the
astronomy takes 0.06 s). simdjson (pysimdjson) parses the same text and copies each array
of numbers straight into a float64 buffer, in about a third of the time.

:func:`loads` gives exactly the document orjson gives, except that each member of
``stars`` named as a number column that is an array of JSON numbers is a float64 numpy
array (the table check takes it as the list it replaces; other members, such as the star
ids, stay lists). Anything it is not sure of, it leaves to orjson, which then
reads the body and reports what is wrong with it as before: a document whose top level is
no object or has no ``stars`` object, a member named twice in either (orjson keeps the
last, simdjson finds the first), text it cannot parse, and any escape sequence ``\\u``
(see below). A column with a null, a string, a boolean, ... is read as a list, as orjson
reads it. Parsed numbers are the nearest doubles, as orjson's (both round correctly).

simdjson's buffer copy flattens nested arrays (``[[1.0], [2.0]]`` comes out as
``[1.0, 2.0]``), which must not pass for a column. So the ``[`` of the body are counted:
one per column read as a buffer plus those of everything read as Python objects (counted
in their orjson text, keys included) must account for all of them, or orjson reads the
body. Without ``\\u`` escapes every ``[`` of a string is one in the body, so the count is
exact.
"""

from __future__ import annotations

import numpy as np
import orjson

try:
    import simdjson
except ImportError:  # pragma: no cover - the dependency is declared; orjson alone still works
    simdjson = None

#: Bodies from this size are tried here first; below it orjson alone is as fast.
FROM_BYTES = 1 << 20

#: What pysimdjson raises for text it does not take (or a value of another type).
_REFUSALS = (ValueError, TypeError, RuntimeError, KeyError, IndexError, OverflowError)


def loads(data: bytes, number_columns=frozenset()):
    """The JSON document in ``data`` (bytes), as :func:`orjson.loads` gives it, with the
    members of ``stars`` named in ``number_columns`` as float64 arrays where the body is
    large and plain enough (see the module text); otherwise exactly ``orjson.loads(data)``."""
    if simdjson is not None and number_columns and len(data) >= FROM_BYTES:
        doc = _with_number_columns(data, number_columns)
        if doc is not None:
            return doc
    return orjson.loads(data)


def _with_number_columns(data: bytes, number_columns) -> dict | None:
    if b"\\u" in data:
        return None
    try:
        parsed = simdjson.Parser().parse(data)
        try:
            return _convert(parsed, data, number_columns)
        finally:
            del parsed  # before the parser goes: its objects point into it
    except _REFUSALS:
        return None


def _convert(doc, data: bytes, number_columns) -> dict | None:
    if not isinstance(doc, simdjson.Object):
        return None
    keys = list(doc.keys())
    if len(set(keys)) != len(keys) or "stars" not in keys:
        return None
    stars = doc["stars"]
    if not isinstance(stars, simdjson.Object):
        return None
    star_keys = list(stars.keys())
    if len(set(star_keys)) != len(star_keys):
        return None
    brackets = sum(k.count("[") for k in keys) + sum(k.count("[") for k in star_keys)
    columns = {}
    for name in star_keys:
        value = stars[name]
        if isinstance(value, simdjson.Array) and name in number_columns:
            try:
                columns[name] = np.frombuffer(value.as_buffer(of_type="d"), dtype=np.float64)
                brackets += 1
                continue
            except _REFUSALS:
                pass
        value = _python(value)
        columns[name] = value
        brackets += orjson.dumps(value).count(b"[")
    out = {}
    for key in keys:
        if key == "stars":
            out[key] = columns
            continue
        value = _python(doc[key])
        out[key] = value
        brackets += orjson.dumps(value).count(b"[")
    if data.count(b"[") != brackets:
        return None  # an array flattened into a column, or text not as counted
    return out


def _python(value):
    """A parsed value as orjson gives it (lists, dicts, str, int, float, bool, None)."""
    if isinstance(value, simdjson.Array):
        return value.as_list()
    if isinstance(value, simdjson.Object):
        return value.as_dict()
    return value
