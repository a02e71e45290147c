"""Shared test fixtures."""

import json
import pathlib

import prometheus_client.values  # noqa: F401  (see below)
import pytest

# prometheus-client picks its value class (memory, or files in PROMETHEUS_MULTIPROC_DIR) when
# it is first imported. Some tests set that variable for a while (the gunicorn settings, the
# manifests); had prometheus-client first been imported then, every later in-process test
# would write its metrics to a folder no longer named and fail. Imported here, before any
# test runs, it keeps the in-process mode, whatever order the tests run in.

ROOT = pathlib.Path(__file__).resolve().parents[1]
DEMO = ROOT / "shared" / "demo"


@pytest.fixture(scope="session")
def settings():
    from service.config import Settings

    return Settings(max_stars=1000, max_body_bytes=2_000_000, max_results=5000, max_epochs=100)


@pytest.fixture(scope="session")
def app(settings):
    from service.api import create_app

    from .answer_check import CheckedClient

    app = create_app({"SKYDRIFT_SETTINGS": settings, "TESTING": True})
    app.test_client_class = CheckedClient  # every answer checked against the OpenAPI document
    return app


@pytest.fixture()
def client(app):
    return app.test_client()


@pytest.fixture(scope="session")
def demo_catalogue():
    return json.loads((DEMO / "catalogue.json").read_text())


#: The propagation options the CSV and Arrow tests send with the demo catalogue: as fields
#: of a JSON body (DEMO_OPTIONS) and as the query string of a CSV or Arrow body (DEMO_QUERY).
DEMO_OPTIONS = {"catalogue_epoch": "J2016.0", "target_epochs": ["J2026.0", "J2100.0"]}
DEMO_QUERY = "?catalogue_epoch=J2016.0&target_epochs=J2026.0,J2100.0"


@pytest.fixture
def demo_request(demo_catalogue):
    """The demo catalogue with DEMO_OPTIONS: a JSON body for POST /v1/propagation."""
    return {"stars": demo_catalogue["stars"], **DEMO_OPTIONS}


def example_parts(example: dict) -> tuple[list[dict], str]:
    """An example JSON request -> (its stars as records, the other fields as a query string
    the way a CSV or Arrow body carries them: lists repeated, objects with dotted names,
    null as an empty value)."""
    from urllib.parse import urlencode

    stars = example["stars"]
    if isinstance(stars, dict):
        stars = [dict(zip(stars, row, strict=True)) for row in zip(*stars.values(), strict=True)]
    query = []
    for key, value in example.items():
        if key == "stars" or value is None:
            continue
        if isinstance(value, dict):
            query.extend((f"{key}.{k}", "" if v is None else str(v)) for k, v in value.items())
        elif isinstance(value, list):
            query.extend((key, str(v)) for v in value)
        elif isinstance(value, bool):
            query.append((key, "true" if value else "false"))
        else:
            query.append((key, str(value)))
    return stars, "?" + urlencode(query)


def table_endpoint_cases(client, mimetype: str) -> list[tuple]:
    """Every POST endpoint of the OpenAPI document that takes and answers ``mimetype`` (a
    star-table format: CSV, Arrow) and has an example request, as
    (path, example, its stars as records, its other fields as a query string, the JSON
    answer to the example). Examples with a layout ask for records, and the query carries
    the layout the JSON answer has, so that a table body gives the same answer."""
    doc = client.get("/openapi.json").json
    out = []
    for path, item in sorted(doc["paths"].items()):
        op = item.get("post")
        if not op or mimetype not in op.get("requestBody", {}).get("content", {}):
            continue
        example = op["requestBody"]["content"]["application/json"].get("example")
        if not example or mimetype not in op["responses"]["200"]["content"]:
            continue
        if "layout" in example:
            example = dict(example, layout="records")
        reference = client.post(path, json=example)
        assert reference.status_code == 200, (path, reference.json)
        stars, query = example_parts(example)
        if "layout" in reference.json:
            query += "&layout=" + reference.json["layout"]
        out.append((path, example, stars, query, reference.json))
    return out


def propagation_rows(answer: dict) -> list[dict]:
    """The rows a table answer (CSV, Arrow) of POST /v1/propagation must hold for its JSON
    records answer: one per star and epoch, star by star, with the star's index, id and
    flags (a list), the epoch, the six parameters and their uncertainties (None: unknown)."""
    rows = []
    for star in answer["stars"]:
        for epoch, at in zip(answer["epochs"], star["at_epochs"], strict=True):
            row = {
                "index": star["index"],
                "id": star["id"],
                "epoch_julian_tdb": epoch["julian_epoch_tdb"],
                "epoch_iso_utc": epoch["iso_utc"],
                "flags": star["flags"],
            }
            values = dict(at)
            values.update(values.pop("uncertainties") or {})
            row.update(values)
            rows.append(row)
    return rows
