"""Hostile input catalogue: one test per kind of malicious or broken body.

Every answer must be a documented 4xx ``application/problem+json`` (or a correct 200 where the
input is odd but valid), small, and quick to produce; never a 5xx, never a stack trace, never
a silently misread value. The application runs in-process with its default (production)
limits unless a test needs tighter ones; every POST operation of the committed OpenAPI
document is covered where the attack is not specific to one operation.
"""

from __future__ import annotations

import gzip
import json
import pathlib

import orjson
import pytest

from service.api import create_app
from service.config import Settings

ROOT = pathlib.Path(__file__).resolve().parents[2]
DOC = json.loads((ROOT / "openapi" / "openapi.json").read_text())
POST_PATHS = sorted(p for p, ops in DOC["paths"].items() if "post" in ops)

#: The largest problem+json answer accepted for any hostile input, bytes: 100 listed errors
#: of a few hundred characters each (errors.MAX_LISTED_ERRORS, MAX_ECHOED_CHARS; the
#: service's own longest message, the accepted fields of a star table, comes once per table).
MAX_PROBLEM_BYTES = 64_000

STAR = {
    "id": "HX-1",
    "ra_deg": 10.0,
    "dec_deg": 20.0,
    "parallax_mas": 5.0,
    "pm_ra_cosdec_mas_yr": 1.0,
    "pm_dec_mas_yr": 2.0,
    "radial_velocity_km_s": 3.0,
}


def body(**changes) -> dict:
    out = {"stars": [dict(STAR)], "catalogue_epoch": 2016.0, "target_epochs": [2026.0]}
    out.update(changes)
    return out


def star_body(**star_changes) -> dict:
    return body(stars=[dict(STAR, **star_changes)])


@pytest.fixture(scope="module")
def client():
    app = create_app({"SKYDRIFT_SETTINGS": Settings(), "TESTING": True})
    return app.test_client()


def post(client, data, path="/v1/propagation", content_type="application/json", **headers):
    if not isinstance(data, bytes | str):
        data = orjson.dumps(data)
    return client.post(path, data=data, headers={"Content-Type": content_type, **headers})


def assert_problem(response, status: int) -> dict:
    assert response.status_code == status, response.get_data(as_text=True)[:500]
    assert response.mimetype == "application/problem+json"
    assert len(response.get_data()) < MAX_PROBLEM_BYTES
    problem = response.json
    assert problem["status"] == status
    assert "Traceback" not in response.get_data(as_text=True)
    return problem


def fields(problem: dict) -> list[str]:
    return [e["field"] for e in problem.get("errors", [])]


# ------------------------------------------------------------------ 1. deeply nested JSON


@pytest.mark.parametrize("path", POST_PATHS)
@pytest.mark.parametrize("opener,closer", [(b"[", b"]"), (b'{"a":', b"}")])
def test_deeply_nested_json(client, path, opener, closer):
    """100,000 levels: the parser's depth limit refuses it (400), no recursion error."""
    depth = 100_000
    data = opener * depth + b"1" + closer * depth
    assert_problem(post(client, data, path), 400)


def test_nesting_inside_a_valid_body(client):
    nested = b"[" * 50_000 + b"]" * 50_000
    data = orjson.dumps(body()).replace(b'"HX-1"', nested)
    assert_problem(post(client, data), 400)


# ------------------------------------------------------------------ 2. 10 MB strings

TEN_MB = "x" * 10_000_000


@pytest.mark.parametrize(
    "where",
    ["star id", "catalogue_epoch", "target epoch", "model", "layout", "unknown key", "star key"],
)
def test_ten_megabyte_strings(client, where):
    b = body()
    if where == "star id":
        b["stars"][0]["id"] = TEN_MB
    elif where == "catalogue_epoch":
        b["catalogue_epoch"] = TEN_MB
    elif where == "target epoch":
        b["target_epochs"] = [TEN_MB]
    elif where in ("model", "layout"):
        b[where] = TEN_MB
    elif where == "unknown key":
        b[TEN_MB] = 1
    else:
        b["stars"][0][TEN_MB] = 1
    problem = assert_problem(post(client, b), 422)
    assert all(len(f) <= 300 for f in fields(problem))  # the string is not echoed back


def test_ten_megabyte_string_over_a_small_body_limit(settings):
    app = create_app({"SKYDRIFT_SETTINGS": settings, "TESTING": True})  # 2 MB limit
    r = post(app.test_client(), star_body(id=TEN_MB))
    assert_problem(r, 413)


# ------------------------------------------------------------------ 3. huge numbers


@pytest.mark.parametrize(
    "name", ["ra_deg", "dec_deg", "parallax_mas", "pm_ra_cosdec_mas_yr", "radial_velocity_km_s"]
)
@pytest.mark.parametrize("value", [1e308, -1e308])
def test_huge_numbers_in_star_fields(client, name, value):
    problem = assert_problem(post(client, star_body(**{name: value})), 422)
    assert fields(problem) == [f"stars[0].{name}"]


@pytest.mark.parametrize("where", ["catalogue_epoch", "target_epochs"])
def test_huge_numbers_as_epochs(client, where):
    b = body(**{where: 1e308 if where == "catalogue_epoch" else [1e308]})
    problem = assert_problem(post(client, b), 422)
    assert fields(problem)[0].startswith(where)


@pytest.mark.parametrize("literal", [b"1e400", b"-1e400", b"1" + b"0" * 400, b"NaN", b"Infinity"])
def test_numbers_json_cannot_hold_are_refused(client, literal):
    """Beyond double range, beyond 64-bit integers, or not JSON at all: 400, not inf or NaN."""
    data = orjson.dumps(star_body()).replace(b"10.0", literal, 1)
    assert_problem(post(client, data), 400)


# ------------------------------------------------------------------ 4. negative zero


def test_negative_zero_is_zero(client):
    """-0.0 in every field answers exactly as +0.0 (RA stays in [0, 360))."""
    zeros = {k: 0.0 for k in ("ra_deg", "dec_deg", "pm_ra_cosdec_mas_yr", "pm_dec_mas_yr")}
    negative = {k: -0.0 for k in zeros}
    plus = post(client, star_body(**zeros))
    minus = post(client, star_body(**negative))
    assert plus.status_code == minus.status_code == 200
    at_plus = plus.json["stars"][0]["at_epochs"][0]
    at_minus = minus.json["stars"][0]["at_epochs"][0]
    assert at_minus == at_plus
    assert 0.0 <= at_minus["ra_deg"] < 360.0


def test_negative_zero_parallax_is_not_positive(client):
    r = post(client, star_body(parallax_mas=-0.0))
    assert r.status_code == 200
    assert "parallax_not_positive" in r.json["stars"][0]["flags"]


def test_negative_zero_epochs(client):
    r = post(client, body(catalogue_epoch=-0.0, target_epochs=[-0.0, "J-0.0"]))
    assert r.status_code == 200
    assert [e["julian_epoch_tdb"] for e in r.json["epochs"]] == [0.0, 0.0]


# ------------------------------------------------------------------ 5. unicode in numbers


@pytest.mark.parametrize(
    "value",
    ["١٢٣", "１２３", "12\u0663", "12.5", "1e3", "NaN", "\u221e", "12\u00a0", "\u200b12"],
)
def test_unicode_and_strings_in_numeric_fields(client, value):
    """A string is never read as a number, whatever digits it holds (Python's float would)."""
    problem = assert_problem(post(client, star_body(ra_deg=value)), 422)
    assert fields(problem) == ["stars[0].ra_deg"]


@pytest.mark.parametrize(
    "value", ["J２０１６.0", "٢٠١٦", "2016\u0660", "JD２４５１５４５", "2016_0"]
)
def test_unicode_digits_in_epochs(client, value):
    problem = assert_problem(post(client, body(catalogue_epoch=value)), 422)
    assert fields(problem) == ["catalogue_epoch"]


def test_unicode_in_identifiers_is_echoed_intact(client):
    r = post(client, star_body(id="星-\u00e9-\U0001f52d"))
    assert r.status_code == 200
    assert r.json["stars"][0]["id"] == "星-\u00e9-\U0001f52d"


# ------------------------------------------------------------------ 6. duplicated keys


def test_duplicated_keys_last_one_wins(client):
    """RFC 8259 leaves duplicate names to the parser; ours keeps the last, always.

    Documented behaviour (README, reliability): the same body always gives the same answer,
    and the value used is the one a reader sees last.
    """
    first_bad = (
        b'{"stars":[{"ra_deg":400.0,"ra_deg":10.0,"dec_deg":20.0,'
        b'"pm_ra_cosdec_mas_yr":1,"pm_dec_mas_yr":2}],'
        b'"catalogue_epoch":2016.0,"target_epochs":[2026.0]}'
    )
    last_bad = first_bad.replace(b'"ra_deg":400.0,"ra_deg":10.0', b'"ra_deg":10.0,"ra_deg":400.0')
    ok = post(client, first_bad)
    assert ok.status_code == 200
    assert abs(ok.json["stars"][0]["at_epochs"][0]["ra_deg"] - 10.0) < 1e-3
    problem = assert_problem(post(client, last_bad), 422)
    assert fields(problem) == ["stars[0].ra_deg"]


def test_duplicated_top_level_keys(client):
    data = orjson.dumps(body())[:-1] + b',"catalogue_epoch":"bogus"}'
    problem = assert_problem(post(client, data), 422)
    assert fields(problem) == ["catalogue_epoch"]


# ------------------------------------------------------------------ 7. a million nulls

MILLION = 1_000_000


def test_a_million_null_stars(client):
    problem = assert_problem(post(client, body(stars=[None] * MILLION)), 422)
    assert len(problem["errors"]) <= 101


def test_a_million_null_columns(client):
    cols = {k: [None] * MILLION for k in STAR}
    problem = assert_problem(post(client, body(stars=cols)), 422)
    assert len(problem["errors"]) <= 101
    assert problem["errors"][-1]["field"].endswith("(more)")


@pytest.mark.parametrize(
    "path, extra, key",
    [
        ("/v1/propagation", {}, "target_epochs"),
        ("/v1/frames", {"from_frame": {"name": "icrs"}}, "target_epochs"),
        ("/v1/observed", {"site": "kestrel-ridge"}, "instants"),
    ],
)
def test_a_million_null_epochs(client, path, extra, key):
    """Refused on the count before any epoch is read, as a limit of the service (413, as
    too many stars are) naming the field and the setting, on every operation that takes a
    list of epochs or instants."""
    sent = {k: v for k, v in body(**extra).items() if k != "target_epochs"}
    sent[key] = [None] * MILLION
    problem = assert_problem(post(client, sent, path), 413)
    assert fields(problem) == [key]
    assert "SKYDRIFT_MAX_EPOCHS" in problem["errors"][0]["message"]


def test_an_epoch_range_over_the_limit(client):
    """A start/stop/count range counts as its count of epochs."""
    rng = {"start": 2000.0, "stop": 2100.0, "count": 10_000_000}
    sent = {k: v for k, v in body(target_range=rng).items() if k != "target_epochs"}
    problem = assert_problem(post(client, sent), 413)
    assert fields(problem) == ["target_range.count"]
    assert "SKYDRIFT_MAX_EPOCHS" in problem["errors"][0]["message"]


@pytest.mark.parametrize("path", POST_PATHS)
def test_a_million_nulls_as_the_whole_body(client, path):
    problem = assert_problem(post(client, [None] * MILLION, path), 422)
    assert len(problem.get("errors", [])) <= 101


# ------------------------------------------------------------------ 8. wrong content types


@pytest.mark.parametrize("path", POST_PATHS)
@pytest.mark.parametrize(
    "content_type",
    [
        "",
        "text/plain",
        "application/x-www-form-urlencoded",
        "multipart/form-data; boundary=xyz",
        "application/xml",
        "application/octet-stream",
        "text/csv",
        "application/jsonx",
    ],
)
def test_wrong_content_types(client, path, content_type):
    example = DOC["paths"][path]["post"]["requestBody"]["content"]["application/json"]
    data = orjson.dumps(example["example"])
    if content_type == "text/csv":
        # Star-table endpoints read CSV (tests/api/test_csv_api.py): a JSON body sent as
        # CSV cannot be read as CSV (its quotes), 400 as for a body that is not JSON.
        assert_problem(post(client, data, path, content_type=content_type), 400)
        return
    assert_problem(post(client, data, path, content_type=content_type), 415)


def test_json_with_a_charset_parameter_is_json(client):
    r = post(client, body(), content_type="application/json; charset=utf-8")
    assert r.status_code == 200


def test_body_that_is_not_utf8(client):
    data = orjson.dumps(star_body(id="caf\u00e9")).replace("é".encode(), "é".encode("latin-1"))
    assert_problem(post(client, data), 400)


# ------------------------------------------------------------------ 9. compressed bodies


def _gzip_bomb(size: int = 50_000_000) -> bytes:
    """size bytes of JSON whitespace inside a valid body, gzip-compressed (about 50 kB)."""
    raw = b'{"stars":[' + b" " * size + b'],"catalogue_epoch":2016,"target_epochs":[2026]}'
    return gzip.compress(raw, compresslevel=9)


@pytest.mark.parametrize("path", POST_PATHS)
def test_gzip_bomb_is_refused_unread(client, path):
    """Compressed bodies are not accepted: 415, never decompressed, never misread as JSON."""
    bomb = _gzip_bomb()
    assert len(bomb) < 100_000
    problem = assert_problem(post(client, bomb, path, **{"Content-Encoding": "gzip"}), 415)
    assert "Content-Encoding" in problem["detail"]


@pytest.mark.parametrize("encoding", ["deflate", "br", "zstd", "gzip, identity", "x-gzip", "GZIP"])
def test_other_content_encodings_are_refused(client, encoding):
    assert_problem(post(client, body(), **{"Content-Encoding": encoding}), 415)


def test_identity_encoding_is_accepted(client):
    assert post(client, body(), **{"Content-Encoding": "identity"}).status_code == 200
