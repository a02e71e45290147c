"""The OpenAPI document as a client developer generating code from it reads it.

The outside references are the OpenAPI 3.1 specification's own JSON Schema for documents
(OAI/OpenAPI-Specification schemas/v3.1/schema.yaml, as schemathesis ships it) and the JSON
Schema 2020-12 meta-schema (jsonschema), neither written by this project.
"""

import jsonschema
import pytest
from schemathesis.specs.openapi.definitions import OPENAPI_31

METHODS = ("get", "put", "post", "delete", "options", "head", "patch", "trace")


@pytest.fixture(scope="module")
def doc():
    from service.api import create_app
    from service.api.docs import openapi_document
    from service.config import Settings

    return openapi_document(create_app({"SKYDRIFT_SETTINGS": Settings()}))


def _operations(doc):
    for path, item in doc["paths"].items():
        for method, op in item.items():
            if method in METHODS:
                yield path, method, op


def test_document_validates_as_openapi_3_1(doc):
    """Reference: the OpenAPI 3.1 schema for documents (OAI, 2022-10-07). A Media Type
    Object has no `description` field; a generator that checks the document refuses it."""
    errors = [
        f"{'/'.join(map(str, e.absolute_path))}: {e.message}"
        for e in jsonschema.Draft202012Validator(OPENAPI_31).iter_errors(doc)
    ]
    assert errors == []


def test_every_schema_is_valid_json_schema_2020_12(doc):
    """Reference: the JSON Schema 2020-12 meta-schema, the dialect of OpenAPI 3.1."""
    meta = jsonschema.Draft202012Validator(jsonschema.Draft202012Validator.META_SCHEMA)
    for name, schema in doc["components"]["schemas"].items():
        assert list(meta.iter_errors(schema)) == [], name


def test_operations_have_unique_ids_tags_and_summaries(doc):
    """Code generators name client methods after operationId (OpenAPI 3.1 section 4.8.10:
    unique among all operations); without one each invents a name from the path."""
    ids, summaries = [], []
    tags = {t["name"] for t in doc["tags"]}
    for path, method, op in _operations(doc):
        assert op.get("operationId"), (method, path)
        assert op["operationId"].isidentifier(), op["operationId"]
        assert op.get("summary"), (method, path)
        assert len(op.get("tags", [])) == 1 and op["tags"][0] in tags, (method, path)
        ids.append(op["operationId"])
        summaries.append(op["summary"])
    assert len(ids) == len(set(ids)) == 15
    assert len(summaries) == len(set(summaries))


def test_frame_equinox_has_its_type(doc):
    """FrameSpec.equinox (frames, constellation lookups, observed places) takes a year or
    an epoch string, or null; documented without a type, generators make it 'any'."""
    equinox = doc["components"]["schemas"]["FrameSpec"]["properties"]["equinox"]
    assert equinox["type"] == ["string", "number", "null"]


def test_star_ids_are_typed_in_requests_and_answers(doc):
    """A star's id is a string (at most 64 characters), an integer or null, as the tables'
    check takes it; documented as any value, generators type it as an untyped object."""
    seen = 0
    for name, schema in doc["components"]["schemas"].items():
        prop = schema.get("properties", {}).get("id")
        if prop is None:
            continue
        assert prop["type"] == ["string", "integer", "null"], name
        assert prop["maxLength"] == 64, name
        seen += 1
    assert seen >= 14  # every record schema and every per-star answer


def test_star_id_types_documented_are_those_accepted(client):
    lookup = "/v1/constellations/lookup"
    for good in ("KRC 0001", 7, None, "x" * 64):
        r = client.post(lookup, json={"stars": [{"id": good, "ra_deg": 1.0, "dec_deg": 2.0}]})
        assert r.status_code == 200, good
        assert r.json["stars"][0]["id"] == good
    for bad in (1.5, True, {"a": 1}, [1], "x" * 65):
        r = client.post(lookup, json={"stars": [{"id": bad, "ra_deg": 1.0, "dec_deg": 2.0}]})
        assert r.status_code == 422, bad
