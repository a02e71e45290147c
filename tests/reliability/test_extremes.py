"""Every numeric field of every star table at the edges of what the document allows.

Random fuzzing rarely lands exactly on a bound, on the smallest positive double, or on all
fields at their largest at once, which is where overflow turns an answer into garbage. For
every POST operation in the committed OpenAPI document whose example body has a star table,
this sends the example with

- each numeric column, in turn, at its lower bound, its upper bound, -0.0, the smallest
  positive double and (if unbounded) +-1e308;
- all numeric columns at once at their lower bounds, at their upper bounds, and at the
  smallest positive double;

in both the records and the columns form. Every answer must be documented (schemathesis
checks status code, content type and body schema) and none may be a 5xx. Warnings are errors
in the test run, so a silent overflow in the computation fails here as a 500.
"""

from __future__ import annotations

import json
import math
import pathlib

import pytest
import schemathesis

from service.api import create_app
from service.config import Settings

ROOT = pathlib.Path(__file__).resolve().parents[2]
DOC = json.loads((ROOT / "openapi" / "openapi.json").read_text())
SCHEMA = schemathesis.openapi.from_path(ROOT / "openapi" / "openapi.json")
TINY = 5e-324  # smallest positive (subnormal) double


def _deref(node):
    if isinstance(node, dict) and "$ref" in node:
        target = DOC
        for part in node["$ref"].removeprefix("#/").split("/"):
            target = target[part]
        return _deref(target)
    return node


def _table_operations():
    """(path, example body, table field name, record schema) for every star-table operation."""
    out = []
    for path, ops in sorted(DOC["paths"].items()):
        op = ops.get("post")
        if not op or "requestBody" not in op:
            continue
        content = op["requestBody"]["content"]["application/json"]
        example = content.get("example")
        body_schema = _deref(content["schema"])
        for name, prop in body_schema.get("properties", {}).items():
            variants = prop.get("oneOf", [])
            records = [v for v in variants if v.get("title") == "records"]
            if records and example and isinstance(example.get(name), list):
                record = _deref(records[0]["items"])
                out.append((path, example, name, record))
    return out


def _edges(prop: dict) -> list[float]:
    """Values at the edges of one numeric property."""
    values = [-0.0, TINY]
    lo, hi = prop.get("minimum"), prop.get("maximum")
    xlo, xhi = prop.get("exclusiveMinimum"), prop.get("exclusiveMaximum")
    values.append(
        lo if lo is not None else (math.nextafter(xlo, math.inf) if xlo is not None else -1e308)
    )
    values.append(
        hi if hi is not None else (math.nextafter(xhi, -math.inf) if xhi is not None else 1e308)
    )
    return values


def _is_number(prop: dict) -> bool:
    types = prop.get("type")
    types = types if isinstance(types, list) else [types]
    return "number" in types


def _allowed(prop: dict, value: float) -> bool:
    if prop.get("minimum") is not None and value < prop["minimum"]:
        return False
    if prop.get("maximum") is not None and value > prop["maximum"]:
        return False
    if prop.get("exclusiveMinimum") is not None and value <= prop["exclusiveMinimum"]:
        return False
    return not (prop.get("exclusiveMaximum") is not None and value >= prop["exclusiveMaximum"])


def _cases():
    cases = []
    for path, example, table, record in _table_operations():
        numeric = {k: p for k, p in record["properties"].items() if _is_number(p)}
        for name, prop in sorted(numeric.items()):
            for value in _edges(prop):
                cases.append(
                    pytest.param(path, example, table, {name: value}, id=f"{path}:{name}={value:g}")
                )
        for label, pick in (("all-low", 2), ("all-high", 3), ("all-tiny", 1)):
            override = {}
            for name, prop in numeric.items():
                value = _edges(prop)[pick]
                if _allowed(prop, value) and abs(value) < 1e300:
                    override[name] = value
            cases.append(pytest.param(path, example, table, override, id=f"{path}:{label}"))
    return cases


@pytest.fixture(scope="module")
def client():
    app = create_app({"SKYDRIFT_SETTINGS": Settings(), "TESTING": True})
    return app.test_client()


def test_there_are_table_operations_to_check():
    assert any(path == "/v1/propagation" for path, *_ in _table_operations())


@pytest.mark.parametrize(("path", "example", "table", "override"), _cases())
def test_edge_values_give_documented_answers(client, path, example, table, override):
    """Records form for every case; the columns form is read by the same code (tables.py)
    once the values are arrays, and is checked with every column at once below."""
    _check(client, path, example, table, override, "records")


@pytest.mark.parametrize(
    ("path", "example", "table", "override"),
    [c for c in _cases() if c.id.rsplit(":", 1)[1].startswith("all-")],
)
def test_edge_values_in_columns_form(client, path, example, table, override):
    _check(client, path, example, table, override, "columns")


def _check(client, path, example, table, override, form):
    stars = [dict(star, **override) for star in example[table]]
    if form == "columns":
        keys = sorted(set().union(*stars))
        stars = {k: [s.get(k) for s in stars] for k in keys}
    body = dict(example, **{table: stars})
    response = client.post(path, json=body)
    assert response.status_code < 500, response.get_data(as_text=True)[:500]
    operation = SCHEMA[path]["POST"]
    operation.validate_response(response)
    if response.status_code == 422:
        # Only a value outside the documented bounds may be refused for its range.
        record = next(rec for p, _, t, rec in _table_operations() if p == path and t == table)
        for name, value in override.items():
            prop = record["properties"][name]
            if not _allowed(prop, value):
                return
        messages = [e["message"] for e in response.json.get("errors", [])]
        assert not any("must be" in m and "between" in m for m in messages), messages
