"""The answer check every API test runs through (tests/answer_check.py) can fail, and the
document declares the members every answer carries.

Reference: the committed OpenAPI 3.1 document read as JSON Schema 2020-12 by the
``jsonschema`` library (not written by this project).
"""

from __future__ import annotations

import json

import pytest
from werkzeug.wrappers import Response

from tests.answer_check import CheckedClient, answer_schema, check_answer

BODY = {
    "stars": [{"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}],
    "catalogue_epoch": "J2016.0",
    "target_epochs": ["J2030.0"],
}


def _answer(body: dict, status: int = 200, mimetype: str = "application/json"):
    return Response(json.dumps(body), status, mimetype=mimetype)


def test_the_shared_client_checks_answers(client):
    assert isinstance(client, CheckedClient)


def test_a_true_answer_passes_and_a_changed_one_fails(client):
    resp = client.post("/v1/propagation", json=BODY)
    assert resp.status_code == 200
    good = resp.json
    check_answer("/v1/propagation", "post", _answer(good))

    missing = json.loads(json.dumps(good))
    del missing["stars"][0]["flags"]  # a member every star result carries
    with pytest.raises(AssertionError, match="'flags' is a required property"):
        check_answer("/v1/propagation", "post", _answer(missing))

    wrong = json.loads(json.dumps(good))
    wrong["star_count"] = "1"
    with pytest.raises(AssertionError, match="star_count"):
        check_answer("/v1/propagation", "post", _answer(wrong))

    nothing = {key: value for key, value in good.items() if key != "epochs"}
    with pytest.raises(AssertionError, match="'epochs' is a required property"):
        check_answer("/v1/propagation", "post", _answer(nothing))


def test_problem_answers_are_checked_too(client):
    resp = client.post("/v1/propagation", json={**BODY, "catalogue_epoch": "J20x6"})
    assert resp.status_code == 422
    problem = resp.json
    assert problem["errors"][0]["field"] == "catalogue_epoch"
    del problem["title"]
    with pytest.raises(AssertionError, match="'title' is a required property"):
        check_answer("/v1/propagation", "post", _answer(problem, 422, "application/problem+json"))


def test_templated_paths_are_matched():
    schema = answer_schema("/v1/constellations/Ori/outline", "get", 200, "application/geo+json")
    assert schema == {"$ref": "#/components/schemas/GeoJsonFeature"}
    assert answer_schema("/v1/no-such-thing", "get", 200, "application/json") is None


def test_members_always_answered_are_required_in_the_document():
    """Members present in every answer are `required` (a generated client types them as
    always there); the layout alternatives (stars or columns) are not."""
    from tests.answer_check import _document

    schemas = _document()["components"]["schemas"]
    assert "stars" not in schemas["PropagationResponse"]["required"]
    assert "columns" not in schemas["PropagationResponse"]["required"]
    assert set(schemas["StarResult"]["required"]) == {"index", "id", "flags", "at_epochs"}
    assert set(schemas["Problem"]["required"]) == {"type", "title", "status"}
    # request schemas keep their own required members only
    assert set(schemas["PropagationRequest"]["required"]) == {"stars", "catalogue_epoch"}
