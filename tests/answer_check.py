"""Every JSON answer the API tests receive, checked against the committed OpenAPI document.

The suite's shared ``client`` fixture is a :class:`CheckedClient`: each 200 answer in JSON
(``application/json``, ``application/geo+json``) and each ``application/problem+json``
answer of an operation the document lists is validated against the schema the document
gives for that status (JSON Schema 2020-12, by the ``jsonschema`` library), so that the
thousands of requests the API tests send also check that the document says what the
service answers: the members it declares as always present are there, with the types it
states. Answers above
:data:`LARGEST` bytes are left to the tests that make them (validating a million-star
answer would take minutes).
"""

from __future__ import annotations

import functools
import json
import pathlib
import re

import jsonschema
from flask.testing import FlaskClient

ROOT = pathlib.Path(__file__).resolve().parents[1]
LARGEST = 2_000_000


@functools.cache
def _document() -> dict:
    return json.loads((ROOT / "openapi" / "openapi.json").read_text())


@functools.cache
def _operations() -> list[tuple[re.Pattern, str, dict]]:
    """(path pattern, method, operation) for every operation of the document."""
    out = []
    for path, item in _document()["paths"].items():
        pattern = re.compile("^" + re.sub(r"\\\{[^/]+\\\}", "[^/]+", re.escape(path)) + "$")
        for method, op in item.items():
            if isinstance(op, dict) and "responses" in op:
                out.append((pattern, method, op))
    return out


@functools.cache
def _validator(schema_json: str) -> jsonschema.Draft202012Validator:
    root = {**json.loads(schema_json), "components": _document()["components"]}
    return jsonschema.Draft202012Validator(root)


def answer_schema(path: str, method: str, status: int, mimetype: str) -> dict | None:
    """The schema the document gives for this answer, or None where it gives none."""
    for pattern, op_method, op in _operations():
        if op_method != method or not pattern.match(path):
            continue
        responses = op["responses"]
        response = responses.get(str(status)) or responses.get("default")
        if response is None:
            return None
        if "$ref" in response:
            response = _document()["components"]["responses"][response["$ref"].split("/")[-1]]
        return response.get("content", {}).get(mimetype, {}).get("schema")
    return None


def check_answer(path: str, method: str, resp) -> None:
    """Raise AssertionError when a checked answer does not match the document."""
    mimetype = resp.mimetype or ""  # none on a 304
    if mimetype != "application/json" and not mimetype.endswith("+json"):
        return
    if mimetype != "application/problem+json" and resp.status_code != 200:
        return
    data = resp.get_data()
    if not data or len(data) > LARGEST:
        return
    schema = answer_schema(path, method, resp.status_code, mimetype)
    if schema is None:
        return
    errors = sorted(
        _validator(json.dumps(schema, sort_keys=True)).iter_errors(json.loads(data)),
        key=lambda e: list(e.absolute_path),
    )
    if errors:
        where = "\n".join(
            f"  at {'/'.join(map(str, e.absolute_path)) or '(root)'}: {e.message[:300]}"
            for e in errors[:10]
        )
        raise AssertionError(
            f"{method.upper()} {path} answered {resp.status_code} {mimetype} not as "
            f"openapi/openapi.json documents it:\n{where}"
        )


class CheckedClient(FlaskClient):
    """Flask's test client, checking each answer against the OpenAPI document."""

    def open(self, *args, **kwargs):
        resp = super().open(*args, **kwargs)
        request = resp.request
        if request.path.startswith("/v1/") or request.path in ("/health", "/ready"):
            check_answer(request.path, request.method.lower(), resp)
        return resp
