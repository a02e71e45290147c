"""Columns a request lists in ``ignored_columns`` are left unread, in every form of a table.

A catalogue file often brings columns no endpoint takes (magnitudes, notes). Unlisted, each
is refused by name, so that a misspelt field never goes unnoticed; listed, it is left out,
and the answer is the one for the same table without it. A name the table takes cannot be
listed: it would be read all the same.
"""

import json
import pathlib

import pyarrow as pa
import pytest

from tests.api.test_arrow import ARROW, stream_of
from tests.conftest import DEMO_OPTIONS, DEMO_QUERY

ROOT = pathlib.Path(__file__).resolve().parents[2]
NOT_TAKEN = "is a field of the star table and is read; list only columns it does not take"


def _stars(demo_catalogue, k=4):
    return [dict(s) for s in demo_catalogue["stars"][:k]]


def _with_extras(stars):
    """The stars with a magnitude and a note each (columns no endpoint takes)."""
    return [dict(s, vmag=3.5 + i, notes=f"note {i}") for i, s in enumerate(stars)]


def _fields(r):
    return [(e["field"], e["message"]) for e in r.json["errors"]]


def test_records_members_listed_are_left_out(client, demo_catalogue):
    stars = _stars(demo_catalogue)
    plain = client.post("/v1/propagation", json={"stars": stars, **DEMO_OPTIONS})
    assert plain.status_code == 200
    body = {"stars": _with_extras(stars), **DEMO_OPTIONS}
    refused = client.post("/v1/propagation", json=body)
    assert refused.status_code == 422
    assert {f for f, _ in _fields(refused)} == {"stars[0].notes", "stars[0].vmag"}
    r = client.post("/v1/propagation", json=dict(body, ignored_columns=["vmag", "notes"]))
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.json == plain.json


def test_columns_listed_are_not_judged(client, demo_catalogue):
    # An ignored column's length and values are not looked at (a list of texts, one
    # value short).
    stars = _stars(demo_catalogue)
    columns = {k: [s.get(k) for s in stars] for k in stars[0]}
    plain = client.post("/v1/propagation", json={"stars": columns, **DEMO_OPTIONS})
    assert plain.status_code == 200
    body = {"stars": dict(columns, vmag=["bright"] * (len(stars) - 1)), **DEMO_OPTIONS}
    r = client.post("/v1/propagation", json=dict(body, ignored_columns=["vmag"]))
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.json == plain.json


def test_csv_columns_listed_in_the_query_are_left_out(client):
    csv_text = (ROOT / "shared" / "demo" / "catalogue.csv").read_text()
    lines = csv_text.splitlines()
    extra = [lines[0] + ",vmag,notes"] + [
        f"{ln},{i + 2.5},seen {i}" for i, ln in enumerate(lines[1:])
    ]
    headers = {"Content-Type": "text/csv", "Accept": "text/csv"}
    plain = client.post("/v1/propagation" + DEMO_QUERY, data=csv_text, headers=headers)
    assert plain.status_code == 200
    refused = client.post("/v1/propagation" + DEMO_QUERY, data="\n".join(extra), headers=headers)
    assert refused.status_code == 422
    assert {f for f, _ in _fields(refused)} == {"line 1: notes", "line 1: vmag"}
    query = DEMO_QUERY + "&ignored_columns=vmag,notes"
    r = client.post("/v1/propagation" + query, data="\n".join(extra), headers=headers)
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.get_data(as_text=True) == plain.get_data(as_text=True)


def test_arrow_column_of_another_type_listed_is_left_out(client, demo_catalogue):
    stars = _stars(demo_catalogue)
    columns = {k: [s.get(k) for s in stars] for k in stars[0]}
    plain = client.post(
        "/v1/propagation" + DEMO_QUERY, data=stream_of(pa.table(columns)), content_type=ARROW
    )
    assert plain.status_code == 200
    body = stream_of(pa.table(dict(columns, notes=["a", "b", None, "d"])))  # text: no number column
    refused = client.post("/v1/propagation" + DEMO_QUERY, data=body, content_type=ARROW)
    assert [f for f, _ in _fields(refused)] == ["stars.notes"]
    query = DEMO_QUERY + "&ignored_columns=notes"
    r = client.post("/v1/propagation" + query, data=body, content_type=ARROW)
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.data == plain.data


def test_a_name_not_listed_is_still_refused(client, demo_catalogue):
    # The magnitude is listed; the misspelt parallax is not, and is named with the name it
    # likely stands for. Its values are not taken for the parallax.
    stars = _with_extras(_stars(demo_catalogue))
    stars[0]["paralax_mas"] = stars[0].pop("parallax_mas")
    body = {"stars": stars, "ignored_columns": ["vmag", "notes"], **DEMO_OPTIONS}
    r = client.post("/v1/propagation", json=body)
    assert r.status_code == 422
    [(field, message)] = _fields(r)
    assert field == "stars[0].paralax_mas"
    assert message.startswith('unknown field (did you mean "parallax_mas"?)')


def test_a_name_the_table_takes_cannot_be_listed(client, demo_catalogue):
    body = {"stars": _with_extras(_stars(demo_catalogue)), **DEMO_OPTIONS}
    body["ignored_columns"] = ["vmag", "parallax_mas", "", "notes"]
    r = client.post("/v1/propagation", json=body)
    assert r.status_code == 422
    assert _fields(r) == [
        ("ignored_columns[1]", NOT_TAKEN),
        ("ignored_columns[2]", "must be 1 to 256 characters"),
    ]
    r = client.post("/v1/propagation", json=dict(body, ignored_columns="vmag"))
    assert ("ignored_columns", "must be a list") in _fields(r)
    r = client.post("/v1/propagation", json=dict(body, ignored_columns=["x"] * 201))
    assert ("ignored_columns", "must list at most 200 names") in _fields(r)


@pytest.mark.parametrize(
    "path, extra",
    [
        ("/v1/velocity", {}),
        ("/v1/constellations/lookup", {}),
        ("/v1/constellations/crossings", {"start": "J2016.0", "end": "J3016.0"}),
        ("/v1/frames", {"from_frame": {"name": "icrs"}, "to_frame": {"name": "galactic"}}),
        ("/v1/observed", {"instants": ["2026-12-04T22:00:00Z"], "site": "kestrel-ridge"}),
    ],
)
def test_other_table_endpoints_leave_listed_columns_out(client, demo_catalogue, path, extra):
    astrometry = ("id", "ra_deg", "dec_deg", "parallax_mas", "pm_ra_cosdec_mas_yr",
                  "pm_dec_mas_yr", "radial_velocity_km_s")  # fmt: skip
    stars = [{k: s[k] for k in astrometry if k in s} for s in _stars(demo_catalogue)]
    common = {"catalogue_epoch": "J2016.0", **extra} if path != "/v1/velocity" else {}
    plain = client.post(path, json={"stars": stars, **common})
    assert plain.status_code == 200, plain.get_data(as_text=True)
    body = {"stars": _with_extras(stars), "ignored_columns": ["vmag", "notes"], **common}
    r = client.post(path, json=body)
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.json == plain.json


def test_every_star_table_request_offers_the_list():
    # The committed OpenAPI document: every request body with a star table (the field
    # "stars") has ignored_columns beside it.
    doc = json.loads((ROOT / "openapi" / "openapi.json").read_text())
    schemas = doc["components"]["schemas"]
    with_table = [n for n, s in schemas.items() if "stars" in s.get("properties", {})]
    requests = {n for n in with_table if n.endswith("Request")}
    assert requests == {"PropagationRequest", "VelocityRequest", "ObservablesRequest",
                        "LookupRequest", "CrossingsRequest", "FramesRequest", "ObservedRequest",
                        "TrackChartRequest", "FieldChartRequest"}  # fmt: skip
    assert [n for n in requests if "ignored_columns" not in schemas[n]["properties"]] == []
