"""GET /metrics (Prometheus text format) and JSON logs, in one process.

The exposition is parsed with prometheus-client's own text parser
(prometheus_client.parser.text_string_to_metric_families), the reference reader of the
format. Counts are compared as differences, since the process's metrics outlive one app.
Across gunicorn workers: tests/api/test_server_metrics.py.
"""

import io
import json
import logging
import time

import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.api import create_app, observability

EXAMPLE = {
    "catalogue_epoch": "J2016.0",
    "target_epochs": ["J2026.0"],
    "stars": [
        {"ra_deg": 10.0, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0},
        {"ra_deg": 20.0, "dec_deg": -5.0, "pm_ra_cosdec_mas_yr": 3.0, "pm_dec_mas_yr": 4.0},
        {"ra_deg": 30.0, "dec_deg": 15.0, "pm_ra_cosdec_mas_yr": 5.0, "pm_dec_mas_yr": 6.0},
    ],
}


def scrape(client) -> dict:
    """{(sample name, frozenset of labels): value} from /metrics."""
    r = client.get("/metrics")
    assert r.status_code == 200
    assert r.mimetype == "text/plain"
    out = {}
    for family in text_string_to_metric_families(r.get_data(as_text=True)):
        for s in family.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def value(samples, name, **labels):
    return samples.get((name, frozenset(labels.items())), 0.0)


def test_requests_counted_per_endpoint_method_status(client):
    before = scrape(client)
    for _ in range(3):
        assert client.get("/health").status_code == 200
    assert client.get("/no/such/path").status_code == 404
    after = scrape(client)
    key = {"endpoint": "/health", "method": "GET", "status": "200"}
    assert value(after, "skydrift_http_requests_total", **key) - value(
        before, "skydrift_http_requests_total", **key
    ) == pytest.approx(3)
    # Latency histogram: its count moves with the counter; the +Inf bucket holds them all.
    assert value(after, "skydrift_http_request_duration_seconds_count", **key) - value(
        before, "skydrift_http_request_duration_seconds_count", **key
    ) == pytest.approx(3)
    assert value(after, "skydrift_http_request_duration_seconds_bucket", le="+Inf", **key) == value(
        after, "skydrift_http_request_duration_seconds_count", **key
    )
    # Unknown paths share one label value (no unbounded label cardinality).
    unmatched = {"endpoint": "(unmatched)", "method": "GET", "status": "404"}
    assert value(after, "skydrift_http_requests_total", **unmatched) >= 1


def test_stars_processed_and_validation_failures(client):
    before = scrape(client)
    assert client.post("/v1/propagation", json=EXAMPLE).status_code == 200
    bad = dict(EXAMPLE, stars=[dict(EXAMPLE["stars"][0], dec_deg=91.0)])
    assert client.post("/v1/propagation", json=bad).status_code == 422
    after = scrape(client)
    ep = {"endpoint": "/v1/propagation"}
    stars = "skydrift_stars_processed_total"
    assert value(after, stars, **ep) - value(before, stars, **ep) == pytest.approx(3)
    invalid = "skydrift_validation_failures_total"
    assert value(after, invalid, **ep) - value(before, invalid, **ep) == pytest.approx(1)


_STAR_ENDPOINTS = [
    ("/v1/propagation", "propagation_request.json"),
    ("/v1/observed", "observed_request.json"),
    ("/v1/frames", "frames_request.json"),
    ("/v1/velocity", "velocity_request.json"),
    ("/v1/velocity/observables", "velocity_observables_request.json"),
    ("/v1/constellations/lookup", "constellations_lookup_request.json"),
    ("/v1/constellations/margins", "constellations_lookup_request.json"),
    ("/v1/constellations/crossings", "constellations_crossings_request.json"),
    ("/v1/charts/track", "chart_track_request.json"),
    ("/v1/charts/field", "chart_field_request.json"),
]


@pytest.mark.parametrize(("endpoint", "example"), _STAR_ENDPOINTS)
def test_stars_processed_counted_for_every_endpoint_that_takes_stars(client, endpoint, example):
    # README, Observability: skydrift_stars_processed_total by endpoint. Only
    # /v1/propagation was counted; the count is the number of stars sent, read from the
    # request here, not from the service.
    import pathlib

    path = pathlib.Path(__file__).resolve().parents[2] / "shared" / "demo" / "examples"
    body = json.loads((path / example).read_text())
    stars = body["stars"]
    sent = len(stars) if isinstance(stars, list) else len(next(iter(stars.values())))
    before = scrape(client)
    r = client.post(endpoint, json=body)
    assert r.status_code == 200, r.get_data(as_text=True)
    after = scrape(client)
    name = "skydrift_stars_processed_total"
    assert value(after, name, endpoint=endpoint) - value(
        before, name, endpoint=endpoint
    ) == pytest.approx(sent, abs=0)


def test_count_stars_helper(client):
    before = scrape(client)
    with create_app(
        {"SKYDRIFT_SETTINGS": client.application.config["SKYDRIFT_SETTINGS"]}
    ).app_context():
        observability.count_stars("/v1/some-future-endpoint", 7)
    after = scrape(client)
    ep = {"endpoint": "/v1/some-future-endpoint"}
    assert value(after, "skydrift_stars_processed_total", **ep) - value(
        before, "skydrift_stars_processed_total", **ep
    ) == pytest.approx(7)


def test_earth_orientation_table_age_matches_astropy(client):
    """The age against astropy's own reading of the packaged IERS-A table."""
    from astropy.time import Time
    from astropy.utils.iers import IERS_A
    from astropy_iers_data import IERS_A_FILE

    table = IERS_A.read(IERS_A_FILE)
    measured = table["MJD"][table["PolPMFlag_A"] == "I"]
    last_mjd = float(measured.max().value)
    samples = scrape(client)
    age = value(samples, "skydrift_earth_orientation_table_age_days", source="astropy-iers-data")
    expected = Time.now().mjd - last_mjd
    assert age == pytest.approx(expected, abs=0.01)  # days; the scrape and now differ by ms
    assert age > 0


def test_operator_eop_file_is_used_and_its_age_reported(tmp_path, settings):
    """SKYDRIFT_EOP_FILE: astropy's table becomes that file; /metrics and /ready report it.

    The file is the packaged finals2000A.all with its last 30 measured days marked as
    predicted, so its last measured day differs from the packaged table's (columns 8-15 MJD,
    17 the polar-motion I/P flag, 58 the UT1-UTC flag, as in the IERS description of the
    finals2000A layout).
    """
    import dataclasses

    from astropy.utils import iers
    from astropy_iers_data import IERS_A_FILE

    with open(IERS_A_FILE) as fh:
        lines = fh.read().splitlines()
    measured = [i for i, line in enumerate(lines) if line[16] == "I"]
    for i in measured[-30:]:
        line = lines[i]
        lines[i] = line[:16] + "P" + line[17:57] + "P" + line[58:]
    last_measured = float(lines[measured[-31]][7:15])
    path = tmp_path / "finals2000A.all"
    path.write_text("\n".join(lines) + "\n")
    before = iers.earth_orientation_table.get()
    try:
        s = dataclasses.replace(settings, eop_file=str(path))
        c = create_app({"SKYDRIFT_SETTINGS": s}).test_client()
        table = iers.earth_orientation_table.get()
        assert isinstance(table, iers.IERS_A)
        assert table.meta["predictive_mjd"] == pytest.approx(last_measured + 1)
        age = value(
            scrape(c), "skydrift_earth_orientation_table_age_days", source="SKYDRIFT_EOP_FILE"
        )
        assert age == pytest.approx(time.time() / 86400 + 40587 - last_measured, abs=0.01)
        check = c.get("/ready").json["checks"]["earth_orientation"]
        assert check["ok"] and check["detail"].startswith("SKYDRIFT_EOP_FILE")
    finally:
        iers.earth_orientation_table.set(before)


def test_unusable_eop_file_gives_no_table_age(tmp_path, settings):
    """A truncated SKYDRIFT_EOP_FILE (the packaged finals2000A.all cut in the middle of a
    line) leaves no usable table: /ready says so, and /metrics must not report an age read
    from the measured lines before the cut (a table not in use)."""
    import dataclasses

    from astropy.utils import iers
    from astropy_iers_data import IERS_A_FILE

    with open(IERS_A_FILE) as fh:
        text = fh.read()
    path = tmp_path / "finals2000A.all"
    path.write_text(text[: len(text) // 2 + 40])
    before = iers.earth_orientation_table.get()
    try:
        s = dataclasses.replace(settings, eop_file=str(path))
        c = create_app({"SKYDRIFT_SETTINGS": s}).test_client()
        assert not c.get("/ready").json["checks"]["earth_orientation"]["ok"]
        body = c.get("/metrics").get_data(as_text=True)
        assert "# TYPE skydrift_earth_orientation_table_age_days gauge" in body
        assert not [
            line
            for line in body.splitlines()
            if line.startswith("skydrift_earth_orientation_table_age_days")
        ]
    finally:
        iers.earth_orientation_table.set(before)


def test_metrics_not_in_the_openapi_document(client):
    assert "/metrics" not in client.get("/openapi.json").json["paths"]


def test_json_log_lines_carry_the_request_id(app):
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(observability.JsonFormatter())
    log = logging.getLogger("skydrift.test")
    log.addHandler(handler)
    try:
        with app.test_request_context("/health", headers={"X-Request-ID": "trace-42"}):
            app.preprocess_request()
            log.warning("inside %s", "a request")
        log.warning("outside")
    finally:
        log.removeHandler(handler)
    inside, outside = (json.loads(line) for line in stream.getvalue().splitlines())
    assert inside["request_id"] == "trace-42"
    assert inside["message"] == "inside a request"
    assert inside["level"] == "WARNING" and inside["logger"] == "skydrift.test"
    assert "request_id" not in outside
