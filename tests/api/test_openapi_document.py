"""The OpenAPI document as a client developer generating code from it reads it.

The outside references are the OpenAPI 3.1 specification's own JSON Schema for documents
(OAI/OpenAPI-Specification schemas/v3.1/schema.yaml, as schemathesis ships it) and the JSON
Schema 2020-12 meta-schema (jsonschema), neither written by this project.
"""

import json
import pathlib
import re

import jsonschema
import pytest
from schemathesis.specs.openapi.definitions import OPENAPI_31

ROOT = pathlib.Path(__file__).resolve().parents[2]
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
    assert len(ids) == len(set(ids)) == 16
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


def _sample_request(doc, path, method, op):
    """(url, json body) of an operation's documented example; path parameters filled."""
    url = path.replace("{abbreviation}", "Ori")
    if method == "post":
        return url, op["requestBody"]["content"]["application/json"]["example"]
    return url, None


def _access_clients():
    """status -> a test client whose settings make every (non-probe) request get it."""
    import dataclasses

    from service.api import create_app
    from service.config import Settings

    def client(**changes):
        settings = dataclasses.replace(Settings(), **changes)
        return create_app({"SKYDRIFT_SETTINGS": settings}).test_client()

    return {
        401: (client(auth_tokens=("a-token-of-thirty-two-characters",), auth_failure_limit=""), {}),
        403: (client(cors_origins=("https://ok.example",)), {"Origin": "https://x.example"}),
        503: (client(test_fail_first_n=1000), {}),
    }


def _assert_documented_problem(doc, op, resp, where):
    documented = op["responses"].get(str(resp.status_code))
    assert documented is not None, (where, resp.status_code)
    while "$ref" in documented:
        documented = doc["components"]["responses"][documented["$ref"].rsplit("/", 1)[-1]]
    assert resp.mimetype == "application/problem+json", where
    schema = documented["content"]["application/problem+json"]["schema"]
    assert schema == {"$ref": "#/components/schemas/Problem"}, where
    # The document's components travel with the reference, so nested references resolve.
    root = {"$ref": "#/components/schemas/Problem", "components": doc["components"]}
    jsonschema.validate(resp.json, root, jsonschema.Draft202012Validator)


def test_access_refusals_are_documented_where_they_occur(doc):
    """401 (tokens set, none sent), 403 (origin outside the allow-list), 429 (rate limit) and
    503 (the time limit's status, here from the test-only failure setting), each sent to
    every operation, are documented there as problem+json (RFC 9457)."""
    import dataclasses

    from service.api import create_app
    from service.config import Settings

    clients = _access_clients()
    for path, method, op in _operations(doc):
        url, body = _sample_request(doc, path, method, op)
        for status, (client, headers) in clients.items():
            resp = client.open(url, method=method.upper(), json=body, headers=headers)
            if path in ("/health", "/ready") and status != 403:
                assert resp.status_code in (200, 503), (path, status)  # never refused
                continue
            assert resp.status_code == status, (path, status)
            _assert_documented_problem(doc, op, resp, (method, path))
        if path in ("/health", "/ready"):
            continue
        settings = dataclasses.replace(Settings(), rate_limit="1/minute")
        limited = create_app({"SKYDRIFT_SETTINGS": settings}).test_client()
        limited.open(url, method=method.upper(), json=body)
        resp = limited.open(url, method=method.upper(), json=body)
        assert resp.status_code == 429, path
        _assert_documented_problem(doc, op, resp, (method, path))


def test_not_found_and_invalid_options_are_documented(doc, client):
    """404 for an unknown constellation; 422 for an unknown query option of a GET."""
    op = doc["paths"]["/v1/constellations/{abbreviation}/outline"]["get"]
    resp = client.get("/v1/constellations/XYZ/outline")
    assert resp.status_code == 404
    _assert_documented_problem(doc, op, resp, "outline")
    for path, method, op in _operations(doc):
        if method != "get" or path in ("/health", "/ready"):
            continue
        url, _ = _sample_request(doc, path, method, op)
        resp = client.get(url + "?no_such_option=1")
        assert resp.status_code == 422, path
        _assert_documented_problem(doc, op, resp, path)


def test_probes_and_operations_declare_their_security(doc):
    """The bearer scheme is declared (RFC 6750) and optional on the operations, since the
    operator decides; the probes never take a token."""
    assert doc["components"]["securitySchemes"]["bearerToken"]["scheme"] == "bearer"
    for path, _, op in _operations(doc):
        expected = [] if path in ("/health", "/ready") else [{"bearerToken": []}, {}]
        assert op["security"] == expected, path


def _resolve(doc, schema):
    while "$ref" in schema:
        schema = doc["components"]["schemas"][schema["$ref"].rsplit("/", 1)[-1]]
    return schema


def _untyped_members(doc, value, schema, path):
    """Paths in ``value`` whose schema leaves them untyped: an object without declared
    properties (or typed additional ones), or a schema without a type."""
    schema = _resolve(doc, schema)
    for key in ("oneOf", "anyOf"):
        if key in schema:
            for alt in schema[key]:
                if jsonschema.Draft202012Validator(
                    {**alt, "components": doc["components"]}
                ).is_valid(value):
                    return _untyped_members(doc, value, alt, path)
    if not any(k in schema for k in ("type", "oneOf", "anyOf", "enum")):
        return [path]
    if isinstance(value, dict):
        props = schema.get("properties")
        extra = schema.get("additionalProperties")
        if props is None and not (isinstance(extra, dict) and extra):
            return [path]
        out = []
        for key, member in value.items():
            sub = (props or {}).get(key, extra)
            out += _untyped_members(doc, member, sub, f"{path}.{key}")
        return out
    if isinstance(value, list):
        return [p for v in value[:3] for p in _untyped_members(doc, v, schema["items"], path)]
    return []


def test_every_star_result_member_is_documented(doc, client):
    """Each POST operation's example answer (records layout), validated against the
    documented 200 schema, and every member of its per-star results declared with a type:
    a client generated from the document gets typed fields, not an untyped map. (Observed
    places and frame conversions were documented as objects of anything.)"""
    for path, method, op in _operations(doc):
        content = op["responses"]["200"]["content"]
        if method != "post" or "application/json" not in content:
            continue
        url, body = _sample_request(doc, path, method, op)
        resp = client.post(url, json=body)
        assert resp.status_code == 200, path
        schema = {**content["application/json"]["schema"], "components": doc["components"]}
        jsonschema.validate(resp.json, schema, jsonschema.Draft202012Validator)
        stars_schema = _resolve(doc, content["application/json"]["schema"])["properties"]
        assert _untyped_members(doc, resp.json["stars"], stars_schema["stars"], path) == []


def test_frames_request_states_its_frames_and_the_default(doc, client):
    """to_frame may be left out; the document must say what is used then (ICRS, as the
    answer's to_frame shows)."""
    props = doc["components"]["schemas"]["FramesRequest"]["properties"]
    assert props["from_frame"]["description"]
    assert "default ICRS" in props["to_frame"]["description"]
    body = {
        "stars": [
            {"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 0.0, "pm_dec_mas_yr": 0.0}
        ],
        "catalogue_epoch": "J2000.0",
        "from_frame": {"name": "galactic"},
    }
    resp = client.post("/v1/frames", json=body)
    assert resp.status_code == 200
    assert resp.json["to_frame"] == "ICRS"


def test_observed_answer_is_typed_throughout(doc, client):
    """Site, refraction, limits, and per instant the Earth orientation values and the Sun
    were objects of anything; a site given by coordinates has a null name."""
    op = doc["paths"]["/v1/observed"]["post"]
    schema = op["responses"]["200"]["content"]["application/json"]["schema"]
    _, body = _sample_request(doc, "/v1/observed", "post", op)
    site = {"latitude_deg": -30.0, "longitude_deg": -70.0, "height_m": 2000.0}
    for changes in ({}, {"site": site, "atmosphere": {"pressure_hpa": 0.0}}):
        resp = client.post("/v1/observed", json={**body, **changes})
        assert resp.status_code == 200
        root = {**schema, "components": doc["components"]}
        jsonschema.validate(resp.json, root, jsonschema.Draft202012Validator)
        untyped = _untyped_members(doc, resp.json, schema, "$")
        assert untyped == ["$.earth_orientation_tables"]  # table provenance: free form


def test_csv_answer_description_matches_the_header(doc, client):
    """The documented leading CSV columns are those of each answer: the epoch columns only
    where the answer has epochs (velocity answers have none)."""
    for path, method, op in _operations(doc):
        content = op["responses"]["200"]["content"]
        if "text/csv" not in content:
            continue
        text = content["text/csv"]["schema"]["description"]
        url, body = _sample_request(doc, path, method, op)
        header = client.post(url, json=body, headers={"Accept": "text/csv"}).text.split("\n")[0]
        columns = header.strip().split(",")
        assert columns[:2] == ["index", "id"] and columns[-1] == "flags", path
        if "epoch_julian_tdb" not in columns:
            # Said conditionally, never as the columns of every answer.
            assert "epoch_julian_tdb, epoch_iso_utc, the" not in text, path
            assert "when the answer has epochs" in text, path


def _described(doc, op, status):
    resp = op["responses"][status]
    if "$ref" in resp:
        resp = doc["components"]["responses"][resp["$ref"].rsplit("/", 1)[-1]]
    return resp["description"]


def test_error_descriptions_cover_the_answers_the_service_gives(doc, client):
    """What the document says a 400, 413 and 415 mean covers what the service answers: every
    body operation takes CSV and Arrow bodies besides JSON (the 415 text said "send
    Content-Type: application/json"), reads them with a 400 when they cannot be read (the 400
    text spoke of JSON only), and /v1/frames and /v1/observed answer too many epochs with a
    413 naming SKYDRIFT_MAX_EPOCHS (the 413 text named the other three limits only)."""
    posts = [(path, op) for path, method, op in _operations(doc) if method == "post"]
    assert len(posts) == 10
    for path, op in posts:
        text = _described(doc, op, "415")
        for mimetype in op["requestBody"]["content"]:
            assert mimetype in text, (path, mimetype)

    url = "/v1/propagation?catalogue_epoch=J2016.0&target_epochs=J2030.0"
    csv = "id,ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\nA\xe9,1,2,3,4\n"
    r = client.post(url, data=csv.encode("latin-1"), content_type="text/csv")
    assert r.status_code == 400 and "UTF-8" in r.json["detail"]
    r = client.post(url, data=b"not arrow", content_type="application/vnd.apache.arrow.stream")
    assert r.status_code == 400 and "Arrow" in r.json["detail"]
    op = doc["paths"]["/v1/propagation"]["post"]
    assert "CSV" in _described(doc, op, "400") and "Arrow" in _described(doc, op, "400")

    star = {"ra_deg": 1.0, "dec_deg": 2.0, "pm_ra_cosdec_mas_yr": 3.0, "pm_dec_mas_yr": 4.0}
    limit = client.application.config["SKYDRIFT_SETTINGS"].max_epochs
    r = client.post(
        "/v1/frames",
        json={
            "stars": [star],
            "catalogue_epoch": 2016.0,
            "from_frame": {"name": "icrs"},
            "to_frame": {"name": "galactic"},
            "target_epochs": [2016.0] * (limit + 1),
        },
    )
    assert r.status_code == 413 and "SKYDRIFT_MAX_EPOCHS" in r.json["errors"][0]["message"]
    assert "SKYDRIFT_MAX_EPOCHS" in _described(doc, doc["paths"]["/v1/frames"]["post"], "413")


#: Unit suffixes of the project's field names (DEVELOPERS.md, Conventions: units are in
#: names), as the schemas use them: a number so named carries its unit already.
UNIT_SUFFIX = re.compile(
    r"_(deg|deg2|sr|arcsec|mas|mas_yr|mas_yr2|km_s|km_s_yr|pc|yr|jyear|days|s|m|hpa|c|um|mjd|px)$"
)

#: What a description of a number without a unit suffix must say: its unit, that it is
#: dimensionless (or a fraction, a coefficient in a stated range), or that it counts.
UNIT_OR_DIMENSIONLESS = re.compile(
    r"\b(degrees?|deg|arcsec|mas|mas/yr|km/s|pc|parsecs?|years?|Julian (epoch|year|date)s?|"
    r"Besselian|days?|seconds?|metres|hPa|Celsius|micrometres|steradians|"
    r"dimensionless|counted|count|number of|page number|status code)\b",
    re.IGNORECASE,
)


def _is_number(schema) -> bool:
    """A number (or null), or an array of them: a quantity. Epochs (a string or a number)
    and star ids (a string or an integer) are not; their descriptions say their forms."""
    types = schema.get("type", [])
    types = set(types if isinstance(types, list) else [types]) - {"null"}
    if types == {"array"} and isinstance(schema.get("items"), dict):
        return _is_number(schema["items"])
    return bool(types) and types <= {"number", "integer"}


def _undescribed(schema, where):
    """(where, problem) for each property under ``schema`` (nested and inline schemas
    included) without a description, or a number without a stated unit."""
    if isinstance(schema, list):
        for k, item in enumerate(schema):
            yield from _undescribed(item, f"{where}[{k}]")
        return
    if not isinstance(schema, dict):
        return
    for name, prop in (schema.get("properties") or {}).items():
        text = (prop.get("description") or "").strip()
        if not text:
            yield f"{where}.{name}", "no description"
        elif _is_number(prop) and not UNIT_SUFFIX.search(name):
            if not UNIT_OR_DIMENSIONLESS.search(text):
                yield f"{where}.{name}", f"no unit in {text!r}"
        yield from _undescribed(prop, f"{where}.{name}")
    for key in ("items", "additionalProperties", "oneOf", "anyOf", "allOf"):
        if isinstance(schema.get(key), dict | list):
            yield from _undescribed(schema[key], f"{where}.{key}")


def test_every_member_is_described_with_its_unit():
    """The design brief's convention: every field has a description with units. Each
    property of every schema of the committed document (components, and the inline schemas
    of request bodies, parameters and answers) has a non-empty description, as the reference
    page's meaning column shows it; a number whose name carries no unit suffix says its
    unit, or that it is dimensionless or a count. (About 100 answer members, AtEpoch's six
    quantities, flag_meanings, star_count, Membership.ra_b1875_deg among them, had none.)"""
    doc = json.loads((ROOT / "openapi" / "openapi.json").read_text())
    problems = []
    for name, schema in doc["components"]["schemas"].items():
        problems += _undescribed(schema, name)
    for path, method, op in _operations(doc):
        where = f"{method.upper()} {path}"
        for param in op.get("parameters", []):
            text = param.get("description") or param["schema"].get("description") or ""
            if not text.strip():
                problems.append((f"{where} ?{param['name']}", "no description"))
            elif _is_number(param["schema"]) and not UNIT_SUFFIX.search(param["name"]):
                if not UNIT_OR_DIMENSIONLESS.search(text):
                    problems.append((f"{where} ?{param['name']}", f"no unit in {text!r}"))
            problems += _undescribed(param["schema"], f"{where} ?{param['name']}")
        for mimetype, media in op.get("requestBody", {}).get("content", {}).items():
            problems += _undescribed(media.get("schema", {}), f"{where} body {mimetype}")
        for status, resp in op["responses"].items():
            for mimetype, media in resp.get("content", {}).items():
                problems += _undescribed(media.get("schema", {}), f"{where} {status} {mimetype}")
    assert problems == []


def test_reference_page_has_no_empty_meaning(client):
    """GET /docs renders each member's description in its meaning column: none is empty
    (100 rows were)."""
    page = client.get("/docs").get_data(as_text=True)
    assert "<td></td></tr>" not in page
    for text in ("Number of stars in the request", "reduced to the equinox B1875.0"):
        assert text in page
