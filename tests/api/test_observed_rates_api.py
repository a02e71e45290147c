"""POST /v1/observed with include_rates: the tracking rates in every form of the answer,
the core's numbers, and bad input."""

import csv
import io
import json

import numpy as np
import pyarrow as pa
import pytest

from service.core import observed as core
from tests.conftest import DEMO

OBS = "/v1/observed"
ARROW = "application/vnd.apache.arrow.stream"
RATES = (
    "azimuth_rate_arcsec_s",
    "altitude_rate_arcsec_s",
    "parallactic_angle_rate_arcsec_s",
    "hour_angle_rate_arcsec_s",
    "observed_dec_rate_arcsec_s",
)


@pytest.fixture(scope="module")
def request_body():
    body = json.loads((DEMO / "examples" / "observed_request.json").read_text())
    return dict(body, instants=["2026-12-02T22:30:00Z", "2026-12-03T01:30:00Z"])


def test_rates_only_when_asked_for(client, request_body):
    plain = client.post(OBS, json=request_body).json
    place = plain["stars"][0]["at_instants"][0]
    assert not set(RATES) & set(place) and not set(RATES) & set(plain["units"])
    asked = client.post(OBS, json=dict(request_body, include_rates=True)).json
    for star in asked["stars"]:
        for at in star["at_instants"]:
            assert set(RATES) <= set(at)
    for name in RATES:
        assert asked["units"][name].startswith("arcsec/s,")
    # Asking for rates changes no other number of the answer.
    for s0, s1 in zip(plain["stars"], asked["stars"], strict=True):
        for a0, a1 in zip(s0["at_instants"], s1["at_instants"], strict=True):
            assert {k: v for k, v in a1.items() if k not in RATES} == a0


def test_rates_agree_with_the_places_a_second_apart(client, request_body):
    """Through the whole service: each rate against the change of the answer's own place
    between instants 0.5 s before and after (central difference). The core's tests check
    the rates to 2e-6 arcsec/s away from the Sun (tests/core/test_tracking_rates.py); here,
    through JSON, measured within 5e-7; tolerance 5e-6 arcsec/s, times sin z for the
    azimuth (places more than 5 deg from the zenith) and cos(dec) for the hour angle."""
    body = dict(request_body, include_rates=True, instants=["2026-12-02T22:30:00Z"])
    at = client.post(OBS, json=body).json["stars"]
    before = client.post(OBS, json=dict(body, instants=["2026-12-02T22:29:59.5Z"])).json["stars"]
    after = client.post(OBS, json=dict(body, instants=["2026-12-02T22:30:00.5Z"])).json["stars"]
    checked = 0
    for s, b, a in zip(at, before, after, strict=True):
        p, pb, pa_ = s["at_instants"][0], b["at_instants"][0], a["at_instants"][0]
        if p["zenith_distance_deg"] < 5.0:
            continue
        sin_z = np.sin(np.radians(p["zenith_distance_deg"]))
        d_az = ((pa_["azimuth_deg"] - pb["azimuth_deg"] + 180.0) % 360.0 - 180.0) * 3600.0
        d_alt = (pa_["altitude_deg"] - pb["altitude_deg"]) * 3600.0
        assert abs(p["altitude_rate_arcsec_s"] - d_alt) < 5e-6
        assert abs(p["azimuth_rate_arcsec_s"] - d_az) * sin_z < 5e-6
        assert abs(p["altitude_rate_arcsec_s"]) + abs(p["azimuth_rate_arcsec_s"]) > 1.0
        cos_dec = np.cos(np.radians(p["observed_dec_deg"]))
        d_ha = ((pa_["hour_angle_deg"] - pb["hour_angle_deg"] + 180.0) % 360.0 - 180.0) * 3600.0
        d_dec = (pa_["observed_dec_deg"] - pb["observed_dec_deg"]) * 3600.0
        assert abs(p["hour_angle_rate_arcsec_s"] - d_ha) * cos_dec < 5e-6
        assert abs(p["observed_dec_rate_arcsec_s"] - d_dec) < 5e-6
        # The Earth rotation angle's rate, 15.041 arcsec/s (IERS Conventions 2010, eq. 5.15,
        # from memory); the example's stars are 44 to 68 deg up, where refraction moves it
        # by a few thousandths (measured 15.036 to 15.038).
        assert p["hour_angle_rate_arcsec_s"] == pytest.approx(15.04, abs=0.05)
        checked += 1
    assert checked >= 2


def test_rates_in_csv_and_arrow_answers(client, request_body):
    body = dict(request_body, include_rates=True)
    js = client.post(OBS, json=body).json
    rows = list(csv.DictReader(io.StringIO(
        client.post(OBS, json=body, headers={"Accept": "text/csv"}).get_data(as_text=True)
    )))  # fmt: skip
    table = pa.ipc.open_stream(client.post(OBS, json=body, headers={"Accept": ARROW}).data)
    table = table.read_all()
    arrow_rows = table.to_pylist()
    m = len(js["instants"])
    for i, star in enumerate(js["stars"]):
        for k, place in enumerate(star["at_instants"]):
            for name in RATES:
                assert float(rows[i * m + k][name]) == place[name]
                assert arrow_rows[i * m + k][name] == place[name]
    for name in RATES:
        assert table.schema.field(name).metadata[b"unit"].decode() == js["units"][name]
    plain = client.post(OBS, json=request_body, headers={"Accept": "text/csv"})
    assert not set(RATES) & set(next(csv.reader(io.StringIO(plain.get_data(as_text=True)))))


def test_rates_of_a_csv_request(client):
    text = (
        "id,ra_deg,dec_deg,parallax_mas,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\n"
        "a,10.5,40.25,5.0,1.0,-2.0\nb,200.0,-10.0,,0.0,0.0\n"
    )
    r = client.post(
        OBS + "?catalogue_epoch=J2016.0&instants=2026-12-02T22:30:00Z&site=kestrel-ridge"
        "&include_rates=true",
        data=text,
        content_type="text/csv",
        headers={"Accept": "text/csv"},
    )
    assert r.status_code == 200, r.get_data(as_text=True)
    rows = list(csv.DictReader(io.StringIO(r.get_data(as_text=True))))
    assert len(rows) == 2
    assert all(np.isfinite(float(row[name])) for row in rows for name in RATES)


def test_rates_equal_the_cores(client, request_body):
    """The answer's rates are the core's for the same stars (observed_places(rates=True),
    after the propagation the endpoint does; compared via one star given at the instant)."""
    star = {"id": "x", "ra_deg": 123.4, "dec_deg": -20.5, "parallax_mas": 12.0,
            "pm_ra_cosdec_mas_yr": 0.0, "pm_dec_mas_yr": 0.0}  # fmt: skip
    body = {"stars": [star], "catalogue_epoch": "2026-12-02T22:30:00Z",
            "instants": ["2026-12-02T22:30:00Z"], "site": "kestrel-ridge",
            "atmosphere": {"pressure_hpa": 0.0}, "include_rates": True}  # fmt: skip
    place = client.post(OBS, json=body).json["stars"][0]["at_instants"][0]
    import erfa

    jd1, jd2 = erfa.dtf2d("UTC", 2026, 12, 2, 22, 30, 0.0)
    epoch = erfa.epj(*erfa.taitt(*erfa.utctai(jd1, jd2)))
    res = core.observed_places(123.4, -20.5, 12.0, 0.0, 0.0, 0.0, epoch, jd1, jd2,
                               core.make_site(38.4127, -7.6543, 1460.0),
                               core.make_atmosphere(pressure_hpa=0.0), rates=True)  # fmt: skip
    for name in RATES:
        assert place[name] == pytest.approx(float(getattr(res, name)), abs=1e-9)


@pytest.mark.parametrize("value", ["yes", 1, "true", None])
def test_include_rates_must_be_true_or_false(client, request_body, value):
    r = client.post(OBS, json=dict(request_body, include_rates=value))
    assert r.status_code == 422 and r.mimetype == "application/problem+json"
    errors = r.json["errors"]
    assert [e["field"] for e in errors] == ["include_rates"], errors


def test_include_rates_in_a_query_must_be_true_or_false(client):
    r = client.post(
        OBS + "?catalogue_epoch=J2016.0&instants=2026-12-02T22:30:00Z&site=kestrel-ridge"
        "&include_rates=maybe",
        data="id,ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\na,10.5,40.25,1.0,-2.0\n",
        content_type="text/csv",
    )
    assert r.status_code == 422
    assert "include_rates" in [e["field"] for e in r.json["errors"]]


def test_readme_example_of_the_rates_says_what_the_service_answers(client):
    """The README's curl example of include_rates, sent as written, gives the figures the
    README states (to their last digit, give or take what a newer Earth-orientation table
    moves: 2e-4 deg, 20 ms of UT1, in the place; 1e-3 and 1e-2 arcsec/s in the alt-azimuth
    rates, 1e-4 in the hour angle's and declination's, stated to four decimals)."""
    import re

    from tests.conftest import ROOT

    text = (ROOT / "README.md").read_text()
    start = text.index('"site": "kestrel-ridge", "include_rates": true')
    body = text[text.rindex("-d '", 0, start) + 4 : text.index("}'", start) + 1]
    place = client.post(OBS, json=json.loads(body)).json["stars"][0]["at_instants"][0]
    said = text[start : start + 1500]
    figures = re.search(
        r"azimuth ([\d.]+) deg and altitude ([\d.]+) deg, moving at ([\d.]+) arcsec/s in\s+"
        r"azimuth and ([\d.]+) arcsec/s in altitude, its field turning at ([\d.]+) arcsec/s",
        said,
    )
    assert figures, "the README's sentence after the example changed"
    az, alt, az_rate, alt_rate, pa_rate = (float(x) for x in figures.groups())
    equatorial = re.search(
        r"its hour angle\s+([-\d.]+) deg grows at ([\d.]+) arcsec/s and its observed "
        r"declination\s+([-\d.]+) deg changes by\s+([-\d.]+) arcsec/s",
        said,
    )
    assert equatorial, "the README's sentence on the hour angle changed"
    ha, ha_rate, dec, dec_rate = (float(x) for x in equatorial.groups())
    assert place["hour_angle_deg"] == pytest.approx(ha, abs=2e-4)
    assert place["observed_dec_deg"] == pytest.approx(dec, abs=2e-4)
    assert place["hour_angle_rate_arcsec_s"] == pytest.approx(ha_rate, abs=1e-4)
    assert place["observed_dec_rate_arcsec_s"] == pytest.approx(dec_rate, abs=1e-4)
    assert place["azimuth_deg"] == pytest.approx(az, abs=2e-4)
    assert place["altitude_deg"] == pytest.approx(alt, abs=2e-4)
    assert place["azimuth_rate_arcsec_s"] == pytest.approx(az_rate, abs=1e-3)
    assert place["altitude_rate_arcsec_s"] == pytest.approx(alt_rate, abs=1e-3)
    assert place["parallactic_angle_rate_arcsec_s"] == pytest.approx(pa_rate, abs=1e-2)
