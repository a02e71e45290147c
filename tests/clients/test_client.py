"""The Python client against the real service (gunicorn on loopback) and a scripted server."""

import csv
import email.utils
import io
import json
import subprocess
import sys
import threading
import time
import xml.etree.ElementTree as ET
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest

from service.client import Client, FieldError, SkydriftError, merge_answers
from service.core import observed as core_observed
from tests.conftest import DEMO, ROOT
from tests.reliability.server import free_port

EPOCHS = ["J2026.0", "J2100.0"]


@pytest.fixture()
def sky(live_service):
    with Client(live_service, timeout=(5, 60)) as c:
        yield c


def columns_of(stars):
    names = list(dict.fromkeys(k for s in stars for k in s))
    return {n: [s.get(n) for s in stars] for n in names}


def test_import_needs_requests_only():
    code = (
        "import sys, service.client\n"
        "heavy = [m for m in ('numpy', 'flask', 'astropy', 'marshmallow', 'erfa', "
        "'matplotlib', 'orjson') if m in sys.modules]\n"
        "print(','.join(heavy))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True
    )
    assert out.stdout.strip() == ""


def test_health_ready_openapi(sky):
    assert sky.health()["status"] == "ok"
    assert sky.ready()["status"] == "ready"
    assert "/v1/propagation" in sky.openapi()["paths"]


def test_propagate_records_equals_direct_post(sky, demo_catalogue):
    stars = demo_catalogue["stars"]
    got = sky.propagate(stars, catalogue_epoch="J2016.0", target_epochs=EPOCHS)
    direct = sky.post(
        "/v1/propagation",
        {"stars": stars, "catalogue_epoch": "J2016.0", "target_epochs": EPOCHS},
    )
    assert got == direct
    assert got["star_count"] == len(stars)


@pytest.mark.parametrize("layout", ["records", "columns"])
def test_batches_joined_as_if_sent_at_once(live_service, demo_catalogue, layout):
    stars = demo_catalogue["stars"]
    if layout == "columns":
        stars = columns_of(stars)
    whole = Client(live_service, batch_size=1000)
    done = []
    parts = Client(live_service, batch_size=7)
    a = whole.propagate(stars, catalogue_epoch="J2016.0", target_epochs=EPOCHS)
    b = parts.propagate(
        stars, catalogue_epoch="J2016.0", target_epochs=EPOCHS, progress=done.append
    )
    assert done == [7, 7, 7, 7, 2]  # 30 stars in batches of 7
    assert b == a


def test_range_and_single_epoch_forms(sky):
    star = {"ra_deg": 10.0, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}
    a = sky.propagate([star], catalogue_epoch=2016.0, target_range=("J2016", "J2116", 3))
    assert [e["julian_epoch_tdb"] for e in a["epochs"]] == [2016.0, 2066.0, 2116.0]
    b = sky.propagate([star], catalogue_epoch=2016.0, target_epochs="J2116")
    assert b["epochs"][0]["julian_epoch_tdb"] == 2116.0
    # The API's own form of a range: the same answer (its keys were unpacked as the tuple).
    same = {"start": "J2016", "stop": "J2116", "count": 3}
    assert sky.propagate([star], catalogue_epoch=2016.0, target_range=same)["epochs"] == a["epochs"]
    with pytest.raises(ValueError, match="give start, stop and count"):
        sky.propagate([star], catalogue_epoch=2016.0, target_range={"start": 1, "stop": 2})
    with pytest.raises(ValueError):
        sky.propagate([star], catalogue_epoch=2016.0)


def test_nan_is_sent_as_unknown(sky):
    star = {
        "ra_deg": 10.0,
        "dec_deg": 5.0,
        "parallax_mas": float("nan"),
        "pm_ra_cosdec_mas_yr": 1.0,
        "pm_dec_mas_yr": 1.0,
    }
    a = sky.propagate([star], catalogue_epoch=2016.0, target_epochs=[2020.0])
    assert "parallax_missing" in a["stars"][0]["flags"]


def test_propagate_csv_batched_equals_whole(live_service):
    text = (DEMO / "catalogue.csv").read_text()
    whole = Client(live_service).propagate_csv(
        text, catalogue_epoch="J2016.0", target_epochs=EPOCHS
    )
    parts = Client(live_service, batch_size=4).propagate_csv(
        text, catalogue_epoch="J2016.0", target_epochs=EPOCHS
    )
    assert parts == whole
    assert whole.splitlines()[0].startswith("index,id,epoch_julian_tdb,epoch_iso_utc,ra_deg")
    assert len(whole.splitlines()) == 1 + 30 * 2


def test_csv_and_arrow_methods_leave_listed_columns_unread(sky, demo_catalogue):
    # A catalogue export with a magnitude and a note: refused as it is, the same answer as
    # without them when they are listed (sent in batches, each with the list).
    import pyarrow as pa

    text = (DEMO / "catalogue.csv").read_text()
    lines = text.splitlines()
    extra = "\n".join([lines[0] + ",vmag,notes"] + [f"{ln},4.5,ok" for ln in lines[1:]])
    options = {"catalogue_epoch": "J2016.0", "target_epochs": EPOCHS}
    with pytest.raises(SkydriftError) as refused:
        sky.propagate_csv(extra, **options)
    assert "vmag" in str(refused.value)
    got = Client(sky.base_url, batch_size=7).propagate_csv(
        extra, ignored_columns=["vmag", "notes"], **options
    )
    assert got == sky.propagate_csv(text, **options)
    table = pa.table(columns_of(demo_catalogue["stars"]))
    with_note = table.append_column("notes", pa.array(["ok"] * table.num_rows))
    got = sky.propagate_arrow(with_note, ignored_columns="notes", **options)  # one name
    assert got.equals(sky.propagate_arrow(table, **options))


def test_json_methods_leave_listed_members_unread(sky, demo_catalogue):
    """Records that carry members an endpoint does not take (a magnitude, a note), as a
    catalogue export would: every typed JSON method takes ignored_columns= and answers as
    for the records without them, in batches too; refused without it."""
    plain = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]][:5]
    extra = [dict(s, vmag=4.5, notes="ok") for s in plain]
    when = "2026-12-02T22:00:00Z"
    calls = {
        "propagate": {"catalogue_epoch": "J2016.0", "target_epochs": EPOCHS},
        "velocity": {},
        "constellations": {"catalogue_epoch": "J2016.0", "epoch": "J2026.0"},
        "constellation_crossings": {
            "catalogue_epoch": "J2016.0",
            "start": "J2016.0",
            "end": "J3016.0",
        },  # fmt: skip
        "frames": {"catalogue_epoch": "J2016.0", "from_frame": "icrs", "to_frame": "galactic"},
        "observed": {"catalogue_epoch": "J2016.0", "instants": when, "site": "kestrel-ridge"},
    }
    small = Client(sky.base_url, batch_size=2)
    for name, options in calls.items():
        with pytest.raises(SkydriftError) as refused:
            getattr(sky, name)(extra, **options)
        assert "vmag" in str(refused.value), name
        # An observed place is the same in batches of other sizes to 1e-12 relative, not
        # bit for bit (a batch of one star takes another path; README, Accuracy):
        # compared unbatched.
        client = sky if name == "observed" else small
        got = getattr(client, name)(extra, ignored_columns=["vmag", "notes"], **options)
        assert got == getattr(sky, name)(plain, **options), name
    # The inverse of the velocities: its own members, with a note.
    uvw = [{"ra_deg": 10.0, "dec_deg": 20.0, "parallax_mas": 50.0, "u_km_s": 10.0,
            "v_km_s": -5.0, "w_km_s": 3.0}]  # fmt: skip
    noted = [dict(uvw[0], notes="ok")]
    got = sky.velocity_observables(noted, ignored_columns="notes")  # one name
    assert got == sky.velocity_observables(uvw)


def test_now_is_one_instant_across_batches(live_service, demo_catalogue):
    """A call sent as several requests means one instant by "now": each request's "now" was
    its own clock reading, so 30 stars in batches of 7 were moved to five epochs a few ms
    apart, and the joined JSON answer named the first batch's epoch for all of them. CSV:
    the answer's epoch column; JSON (whose answer has no epoch per star): the requests
    sent, which must all carry one pinned instant, not "now"."""
    text = (DEMO / "catalogue.csv").read_text()
    sky = Client(live_service, batch_size=7)
    out = sky.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=["now", "J2100"])
    rows = list(csv.DictReader(io.StringIO(out)))
    assert len({r["epoch_julian_tdb"] for r in rows}) == 2  # "now" and J2100
    sent = []
    post = sky.post

    def recording_post(path, body, *args, **kwargs):
        sent.append(tuple(body["target_epochs"]))
        return post(path, body, *args, **kwargs)

    sky.post = recording_post
    answer = sky.propagate(demo_catalogue["stars"], catalogue_epoch="J2016.0",
                           target_epochs="now")  # fmt: skip
    assert len(sent) == 5 and len(set(sent)) == 1 and sent[0][0] != "now"
    # The answer's epoch is the instant pinned (ISO text to the microsecond), as the answer
    # writes it: rounded to the millisecond.
    import datetime as dt

    pinned = dt.datetime.fromisoformat(sent[0][0])
    answered = dt.datetime.fromisoformat(answer["epochs"][0]["iso_utc"])
    assert abs((answered - pinned).total_seconds()) <= 0.0005


def test_csv_error_lines_refer_to_the_callers_text(live_service):
    lines = (DEMO / "catalogue.csv").read_text().splitlines()
    cells = lines[22].split(",")
    cells[2] = "-97.5"  # dec_deg of the star on line 23
    lines[22] = ",".join(cells)
    with pytest.raises(SkydriftError) as info:
        Client(live_service, batch_size=5).propagate_csv(
            "\n".join(lines), catalogue_epoch="J2016.0", target_epochs=EPOCHS
        )
    assert info.value.status == 422
    assert info.value.errors == [FieldError("line 23: dec_deg", "must be between -90 and 90")]


@pytest.mark.parametrize("layout", ["records", "columns"])
def test_batched_errors_name_the_index_in_the_whole_input(live_service, demo_catalogue, layout):
    stars = [dict(s) for s in demo_catalogue["stars"]]
    stars[23]["dec_deg"] = 91.0
    if layout == "columns":
        stars = columns_of(stars)
    with Client(live_service, batch_size=10) as sky:
        with pytest.raises(SkydriftError) as info:
            sky.propagate(stars, catalogue_epoch="J2016.0", target_epochs=EPOCHS)
    expected = "stars[23].dec_deg" if layout == "records" else "stars.dec_deg[23]"
    assert [e.field for e in info.value.errors] == [expected]


def test_problem_details_become_the_exception(sky):
    bad = [{"ra_deg": 10.0, "dec_deg": 95.0, "pm_ra_cosdec_mas_yr": 0, "pm_dec_mas_yr": 0}]
    with pytest.raises(SkydriftError) as info:
        sky.propagate(bad, catalogue_epoch="J2016.0", target_epochs=EPOCHS)
    err = info.value
    assert err.status == 422
    assert err.title == "Unprocessable Entity"
    assert err.detail == "The request has 1 invalid field."
    assert err.errors == [FieldError("stars[0].dec_deg", "must be between -90 and 90")]
    assert err.request_id
    assert "stars[0].dec_deg: must be between -90 and 90" in str(err)


def test_not_found_and_bad_epoch(sky):
    with pytest.raises(SkydriftError) as info:
        sky.get("/v1/no-such-thing")
    assert info.value.status == 404
    star = {"ra_deg": 1.0, "dec_deg": 1.0, "pm_ra_cosdec_mas_yr": 0, "pm_dec_mas_yr": 0}
    with pytest.raises(SkydriftError) as info:
        sky.propagate([star], catalogue_epoch="yesterday-ish", target_epochs=EPOCHS)
    assert [e.field for e in info.value.errors] == ["catalogue_epoch"]


def test_velocity_methods(live_service, demo_catalogue):
    stars = demo_catalogue["stars"]
    with Client(live_service, batch_size=8) as sky:
        a = sky.velocity(stars, catalogue_epoch="J2016.0", relative_to_lsr=True)
        direct = sky.post(
            "/v1/velocity",
            {"stars": stars, "catalogue_epoch": "J2016.0", "relative_to_lsr": True},
        )
        assert a == direct  # four batches joined as if sent at once
        text = sky.velocity_csv((DEMO / "catalogue.csv").read_text(), relative_to_lsr=True)
        assert len(text.splitlines()) == 1 + len(stars)
        s = a["stars"][0]
        back = sky.velocity_observables(
            [
                {
                    "id": s["id"],
                    "ra_deg": stars[0]["ra_deg"],
                    "dec_deg": stars[0]["dec_deg"],
                    "u_km_s": s["u_km_s"],
                    "v_km_s": s["v_km_s"],
                    "w_km_s": s["w_km_s"],
                    "parallax_mas": stars[0]["parallax_mas"],
                }
            ]
        )
    # The inverse returns the proper motion that went in (round trip through the service).
    assert back["stars"][0]["pm_ra_cosdec_mas_yr"] == pytest.approx(
        stars[0]["pm_ra_cosdec_mas_yr"], abs=1e-6
    )


ASTROMETRY = ("id", "ra_deg", "dec_deg", "parallax_mas", "pm_ra_cosdec_mas_yr",
              "pm_dec_mas_yr", "radial_velocity_km_s")  # fmt: skip


def test_constellation_methods(live_service, demo_catalogue):
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]]
    with Client(live_service, batch_size=8) as sky:
        whole = sky.post(
            "/v1/constellations/margins",
            {"stars": stars, "catalogue_epoch": "J2016.0", "epoch": "J2026.0"},
        )
        batched = sky.constellations(
            stars, catalogue_epoch="J2016.0", epoch="J2026.0", margins=True
        )
        assert batched == whole
        plain = sky.constellations(stars, catalogue_epoch="J2016.0", epoch="J2026.0")
        assert [s["constellation"] for s in plain["stars"]] == [
            s["constellation"] for s in whole["stars"]
        ]
        found = sky.constellation_crossings(
            stars[16:18], catalogue_epoch="J2016.0", start="J2016.0", end="J8016.0"
        )
        first = found["stars"][0]["crossings"][0]
        assert (first["from_constellation"], first["to_constellation"]) == ("Tau", "Ari")
        assert found["stars"][1]["index"] == 1
        assert len(sky.constellation_list()["constellations"]) == 88
        outline = sky.constellation_outline("Ari")
        assert outline["properties"]["abbreviation"] == "Ari"
        assert len(sky.constellation_outlines(tolerance_arcsec=10.0)["features"]) == 88


def test_constellation_methods_take_the_stars_frame(live_service, demo_catalogue):
    """Positions in galactic coordinates (from astropy's ICRS -> Galactic transform, not the
    project's) with frame="galactic" fall in the constellations of the ICRS positions, in
    JSON and in CSV; without the frame they would be read as ICRS."""
    from astropy.coordinates import SkyCoord

    icrs = [{"id": s["id"], "ra_deg": s["ra_deg"], "dec_deg": s["dec_deg"]}
            for s in demo_catalogue["stars"]]  # fmt: skip
    gal = SkyCoord(
        [s["ra_deg"] for s in icrs], [s["dec_deg"] for s in icrs], unit="deg", frame="icrs"
    ).galactic
    in_gal = [
        {"id": s["id"], "ra_deg": float(lon), "dec_deg": float(lat)}
        for s, lon, lat in zip(icrs, gal.l.deg, gal.b.deg, strict=True)
    ]
    with Client(live_service, batch_size=8) as sky:
        want = [s["constellation"] for s in sky.constellations(icrs)["stars"]]
        got = sky.constellations(in_gal, frame="galactic")["stars"]
        assert [s["constellation"] for s in got] == want
        assert [s["constellation"] for s in sky.constellations(in_gal)["stars"]] != want
        text = "id,ra_deg,dec_deg\n" + "".join(
            f"{s['id']},{s['ra_deg']!r},{s['dec_deg']!r}\n" for s in in_gal
        )
        rows = list(csv.DictReader(io.StringIO(sky.constellations_csv(text, frame="galactic"))))
        assert [r["constellation"] for r in rows] == want


def test_frames_and_observed_methods(live_service, demo_catalogue):
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]]
    with Client(live_service, batch_size=10) as sky:
        # ICRS -> galactic -> ICRS returns the input (round trip through the service).
        gal = sky.frames(
            stars[:3], catalogue_epoch="J2016.0", from_frame="icrs", to_frame="galactic"
        )
        back_in = [
            dict(s, **{k: a[k] for k in ("ra_deg", "dec_deg")})
            for s, a in zip(stars[:3], (x["at_epochs"][0] for x in gal["stars"]), strict=True)
        ]
        # (pm and parallax of the galactic answer are carried too)
        for s, x in zip(back_in, gal["stars"], strict=True):
            s.update({k: x["at_epochs"][0][k] for k in ("pm_ra_cosdec_mas_yr", "pm_dec_mas_yr")})
        back = sky.frames(
            back_in, catalogue_epoch="J2016.0", from_frame={"name": "galactic"}, to_frame="icrs"
        )
        for s, x in zip(stars[:3], back["stars"], strict=True):
            assert x["at_epochs"][0]["dec_deg"] == pytest.approx(s["dec_deg"], abs=1e-9)  # deg
        body = {"stars": stars, "catalogue_epoch": "J2016.0",
                "instants": ["2026-12-02T22:00:00Z"], "site": "kestrel-ridge"}  # fmt: skip
        whole = sky.post("/v1/observed", body)
        batched = sky.observed(
            stars, catalogue_epoch="J2016.0", instants="2026-12-02T22:00:00Z",
            site="kestrel-ridge",
        )  # fmt: skip
        listed = {site["name"]: site for site in sky.site_list()["sites"]}
    assert batched == whole  # three batches joined as if sent at once
    assert "advisory" in batched["advisory"].lower()
    assert listed["kestrel-ridge"]["longitude_deg"] == whole["site"]["longitude_deg"]


def test_observed_methods_take_an_instant_range(live_service, demo_catalogue):
    """instant_range= on observed and observed_csv, as a tuple or the API's dict: the
    request's instant_range; batches of stars each get the whole range; exactly one of
    instants and instant_range."""
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]][:5]
    rng = ("2026-12-06T18:00:00Z", "2026-12-07T06:00:00Z", 4)
    with Client(live_service, batch_size=2) as sky:
        whole = sky.post("/v1/observed", {
            "stars": stars, "catalogue_epoch": "J2016.0", "site": "kestrel-ridge",
            "instant_range": dict(zip(("start", "stop", "count"), rng, strict=True))})  # fmt: skip
        batched = sky.observed(
            stars, catalogue_epoch="J2016.0", instant_range=rng, site="kestrel-ridge"
        )
        as_dict = sky.observed(
            stars, catalogue_epoch="J2016.0", site="kestrel-ridge",
            instant_range={"start": rng[0], "stop": rng[1], "count": "4"},
        )  # fmt: skip
        text = "id,ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\nA,10,20,1,1\n"
        answer = sky.observed_csv(
            text, catalogue_epoch="J2016.0", instant_range=rng, site="kestrel-ridge"
        )
        rows = list(csv.DictReader(io.StringIO(answer)))
        with pytest.raises(ValueError, match="exactly one of instants or instant_range"):
            sky.observed(stars, catalogue_epoch="J2016.0", site="kestrel-ridge")
        with pytest.raises(ValueError, match="instant_range: give start, stop and count"):
            sky.observed(stars, catalogue_epoch="J2016.0", site="kestrel-ridge",
                         instant_range={"start": rng[0], "stop": rng[1]})  # fmt: skip
    assert batched == whole == as_dict  # three batches joined as if sent at once
    assert len(whole["instants"]) == 4
    assert [r["epoch_iso_utc"][11:16] for r in rows] == ["18:00", "22:00", "02:00", "06:00"]


def test_observed_methods_ask_for_rates(live_service, demo_catalogue):
    """include_rates= on observed and observed_csv: the request's include_rates."""
    rates = core_observed.RATE_NAMES  # the five rates
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]][:4]
    when = {"catalogue_epoch": "J2016.0", "instants": "2026-12-02T22:00:00Z",
            "site": "kestrel-ridge"}  # fmt: skip
    with Client(live_service) as sky:
        whole = sky.post("/v1/observed", {**when, "instants": [when["instants"]],
                                          "stars": stars, "include_rates": True})  # fmt: skip
        asked = sky.observed(stars, include_rates=True, **when)
        plain = sky.observed(stars, **when)
        text = "id,ra_deg,dec_deg,parallax_mas,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\n" + "".join(
            f"{s['id']},{s['ra_deg']!r},{s['dec_deg']!r},{s['parallax_mas']!r},"
            f"{s['pm_ra_cosdec_mas_yr']!r},{s['pm_dec_mas_yr']!r}\n"
            for s in stars
        )
        rows = list(csv.DictReader(io.StringIO(sky.observed_csv(text, include_rates=True, **when))))
        plain_rows = list(csv.DictReader(io.StringIO(sky.observed_csv(text, **when))))
    assert asked == whole
    assert all(set(rates) <= set(s["at_instants"][0]) for s in asked["stars"])
    assert not set(rates) & set(plain["stars"][0]["at_instants"][0])
    assert set(rows[0]) - set(plain_rows[0]) == set(rates)


def test_unreachable_service_after_retries():
    waits = []
    c = Client(f"http://127.0.0.1:{free_port()}", retries=2, sleep=waits.append)
    with pytest.raises(SkydriftError) as info:
        c.health()
    assert info.value.status is None
    assert len(waits) == 2
    assert 0.25 <= waits[0] <= 0.5 and 0.5 <= waits[1] <= 1.0  # backoff 0.5 s doubled


def test_chart_methods_return_images(sky, demo_catalogue):
    stars = demo_catalogue["stars"]
    svg = sky.chart_track(stars[16:18], catalogue_epoch="J2016.0", start="J2016.0", stop="J3016.0")
    root = ET.fromstring(svg)
    ids = [g.get("id") for g in root.iter("{http://www.w3.org/2000/svg}g")]
    assert "track-0" in ids and "track-1" in ids
    png = sky.chart_field(
        stars, catalogue_epoch="J2016.0", epochs=("J2016.0", "J12016.0"), image_format="png"
    )
    assert png.startswith(b"\x89PNG\r\n\x1a\n")
    svg = sky.chart_track(
        stars[16:17], catalogue_epoch="J2016.0", start="J2016.0", stop="J3016.0", width_px=600
    )
    assert ET.fromstring(svg).get("width") == "600px"
    png = sky.chart_field(stars, catalogue_epoch="J2016.0", epochs=("J2016.0", "J12016.0"),
                          image_format="png", width_px=500)  # fmt: skip
    assert int.from_bytes(png[16:20], "big") == 500  # the PNG header's width (IHDR)


def test_merge_answers_fills_columns_a_batch_lacks():
    a = {"star_count": 2, "columns": {"id": ["a", "b"], "x": [[1, 2]], "err": [[0.1, 0.2]]}}
    b = {"star_count": 1, "columns": {"id": ["c"], "x": [[3]]}}
    merged = merge_answers([a, b], [0, 2])
    assert merged["star_count"] == 3
    assert merged["columns"] == {"id": ["a", "b", "c"], "x": [[1, 2, 3]], "err": [[0.1, 0.2, None]]}


def test_bearer_token_against_the_real_server():
    from tests.clients.conftest import start_service, stop_service

    token = "kestrel-ridge-test-token-0001"  # test value, 16+ characters as the service asks
    url, proc = start_service({"SKYDRIFT_AUTH_TOKENS": token})
    star = {"ra_deg": 10.0, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}
    try:
        with Client(url, retries=0) as sky:
            with pytest.raises(SkydriftError) as info:
                sky.propagate([star], catalogue_epoch=2016.0, target_epochs=[2020.0])
        assert info.value.status == 401
        with Client(url, token=token) as sky:
            answer = sky.propagate([star], catalogue_epoch=2016.0, target_epochs=[2020.0])
        assert answer["star_count"] == 1
    finally:
        stop_service(proc)


# ------------------------------------------------------------------ retries


def test_retries_against_the_real_server():
    """The service's test-only setting answers 503 with Retry-After to the first requests."""
    import dataclasses

    from service.config import Settings
    from tests.clients.conftest import start_service, stop_service

    if "test_fail_first_n" not in {f.name for f in dataclasses.fields(Settings)}:
        pytest.skip("this service has no test-only failure setting")
    url, proc = start_service(
        {"SKYDRIFT_TEST_FAIL_FIRST_N": "3", "SKYDRIFT_TEST_FAIL_RETRY_AFTER_S": "1"}
    )
    star = {"ra_deg": 10.0, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}
    try:
        waits = []
        with Client(url, retries=1, sleep=waits.append) as sky:
            with pytest.raises(SkydriftError) as info:  # failures 1 and 2: retries run out
                sky.propagate([star], catalogue_epoch=2016.0, target_epochs=[2020.0])
        assert info.value.status == 503
        assert info.value.retry_after_s == 1.0
        assert waits == [1.0]
        waits.clear()
        with Client(url, sleep=waits.append) as sky:  # failure 3, then the answer
            answer = sky.propagate([star], catalogue_epoch=2016.0, target_epochs=[2020.0])
        assert answer["star_count"] == 1
        assert waits == [1.0]
    finally:
        stop_service(proc)


class ScriptedServer:
    """A loopback HTTP server answering from a script: (status, headers, body) per request."""

    def __init__(self, script):
        self.script = list(script)
        self.seen = []
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def _answer(self):
                length = int(self.headers.get("Content-Length") or 0)
                outer.seen.append((self.command, self.path, self.rfile.read(length)))
                status, headers, body = outer.script.pop(0) if outer.script else (500, {}, b"")
                self.send_response(status)
                for k, v in headers.items():
                    self.send_header(k, v)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            do_GET = do_POST = _answer

            def log_message(self, *args):
                pass

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}"
        self.thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.httpd.shutdown()
        self.httpd.server_close()


OK = (200, {"Content-Type": "application/json"}, json.dumps({"status": "ok"}).encode())
BUSY = (
    503,
    {"Content-Type": "application/problem+json", "Retry-After": "2"},
    json.dumps({"type": "about:blank", "title": "Service Unavailable", "status": 503}).encode(),
)


def test_retries_honour_retry_after_seconds():
    waits = []
    with ScriptedServer([BUSY, BUSY, OK]) as srv:
        assert Client(srv.url, sleep=waits.append).health() == {"status": "ok"}
    assert waits == [2.0, 2.0]
    assert len(srv.seen) == 3


def test_retries_honour_retry_after_http_date_and_429():
    when = email.utils.formatdate(time.time() + 30, usegmt=True)
    limited = (429, {"Retry-After": when}, b"slow down")
    waits = []
    with ScriptedServer([limited, OK]) as srv:
        Client(srv.url, sleep=waits.append).health()
    assert 25.0 <= waits[0] <= 31.0


def test_retry_after_is_capped_and_backoff_used_without_it():
    waits = []
    long_wait = (503, {"Retry-After": "3600"}, b"")
    plain = (502, {}, b"")
    with ScriptedServer([long_wait, plain, OK]) as srv:
        Client(srv.url, sleep=waits.append, max_retry_after_s=10.0, backoff_s=1.0).health()
    assert waits[0] == 10.0
    assert 1.0 <= waits[1] <= 2.0  # second attempt: 1 s doubled, with jitter in [0.5, 1]


def test_post_bodies_are_resent_on_retry():
    waits = []
    with ScriptedServer([BUSY, OK]) as srv:
        Client(srv.url, sleep=waits.append).post("/v1/x", {"a": 1})
    assert srv.seen[0][2] == srv.seen[1][2] == b'{"a": 1}'


def test_retries_exhausted_raise_with_retry_after():
    waits = []
    with ScriptedServer([BUSY] * 3) as srv:
        with pytest.raises(SkydriftError) as info:
            Client(srv.url, retries=2, sleep=waits.append).health()
    assert info.value.status == 503
    assert info.value.retry_after_s == 2.0
    assert waits == [2.0, 2.0]


def test_non_json_error_still_an_exception():
    with ScriptedServer([(502, {"Content-Type": "text/html"}, b"<h1>bad gateway</h1>")]) as srv:
        with pytest.raises(SkydriftError) as info:
            Client(srv.url, retries=0).health()
    assert info.value.status == 502
    assert "bad gateway" in info.value.detail


def test_connection_reused(live_service):
    c = Client(live_service)
    for _ in range(3):
        c.health()
    pool = c.session.get_adapter(live_service).poolmanager
    (key,) = pool.pools.keys()
    assert pool.pools[key].num_connections == 1


def test_large_answers_decode_alike_with_the_collector_paused():
    import gc
    import json

    from service import client as client_module

    body = {"flags": [[] for _ in range(300_000)], "ra_deg": [[0.1 * i for i in range(10)]]}
    content = json.dumps(body).encode()
    assert len(content) >= client_module._LARGE_ANSWER_BYTES  # the large-answer route
    assert client_module._loads(content) == body  # json (the reference) wrote it
    assert gc.isenabled()  # and the collector runs again afterwards
    assert client_module._loads(b'{"a": [1.5, null]}') == {"a": [1.5, None]}


def test_arrow_round_trip_equals_the_json_answer(sky, demo_catalogue):
    import pyarrow as pa

    from service.client import arrow_answer_members

    stars = demo_catalogue["stars"]
    cols = columns_of(stars)
    table = pa.table(cols)  # pyarrow types the columns (null = unknown)
    got = sky.propagate_arrow(table, catalogue_epoch="J2016.0", target_epochs=EPOCHS)
    js = sky.propagate(cols, catalogue_epoch="J2016.0", target_epochs=EPOCHS, layout="columns")
    assert got.num_rows == len(stars) * len(EPOCHS)
    rows = got.to_pylist()
    for k, epoch in enumerate(EPOCHS):
        for i, star in enumerate(stars):
            row = rows[i * len(EPOCHS) + k]  # star by star, epochs within a star
            assert (row["index"], row["id"]) == (i, star["id"])
            for name in ("ra_deg", "dec_deg", "parallax_mas", "radial_velocity_km_s"):
                assert row[name] == js["columns"][name][k][i], (name, epoch)  # exact doubles
            assert row["flags"] == ";".join(js["columns"]["flags"][i])
    members = arrow_answer_members(got)
    assert members["units"]["ra_deg"] == "deg"
    assert [e["julian_epoch_tdb"] for e in members["epochs"]] == [
        e["julian_epoch_tdb"] for e in js["epochs"]
    ]
    # A dict of columns works too.
    again = sky.post_arrow(
        "/v1/propagation", cols, {"catalogue_epoch": "J2016.0", "target_epochs": EPOCHS}
    )
    assert again.equals(got)


def test_arrow_errors_are_raised_with_the_field(sky):
    with pytest.raises(SkydriftError) as err:
        sky.propagate_arrow(
            {"ra_deg": [10.0, float("nan")], "dec_deg": [1.0, 2.0]},
            catalogue_epoch="J2016.0",
            target_epochs=["J2020.0"],
        )
    assert err.value.status == 422
    assert any(e.field == "stars.ra_deg[1]" for e in err.value.errors), err.value


def test_client_arrow_names_are_the_services():
    # The client repeats them so that it needs only requests; they must not drift apart.
    from service import client
    from service.api import arrowio

    assert client.ARROW_MIMETYPE == arrowio.ARROW_MIMETYPE
    assert client.ARROW_ANSWER_KEY == arrowio.ANSWER_METADATA_KEY


def test_an_answer_of_another_kind_is_not_taken_for_one():
    # A proxy's page or another service on the address answered 200 with HTML, and that
    # HTML was written out as the CSV (or the chart) with exit status 0.
    page = (200, {"Content-Type": "text/html"}, b"<html><body>Welcome</body></html>")
    for call in (
        lambda c: c.health(),
        lambda c: c.post_csv("/v1/propagation", "id,ra_deg,dec_deg\nA,1,2\n", {}),
        lambda c: c.chart_field([], catalogue_epoch="J2016", epochs=("J2016", "J2100")),
    ):
        with ScriptedServer([page]) as srv:
            with pytest.raises(SkydriftError, match="text/html") as err:
                call(Client(srv.url, retries=0))
        assert err.value.title == "Unexpected answer"


def test_csv_error_line_after_a_cell_over_two_lines():
    # A quoted id holding a line break makes its row two lines long: the bad row below
    # starts on line 9 of the text (header 1, rows 2-4, the two-line row 5-6, rows 7-8,
    # the bad row 9; checked by reading the text), which is also what the service says
    # when sent the text as it is. The client said line 10 (it took its rewritten batch
    # as one row per line).
    from service.local import local_client

    rows = [r.split(",") for r in (DEMO / "catalogue.csv").read_text().splitlines()[:11]]
    rows[4][0] = '"KRC\n0004"'
    rows[7][2] = "95"  # dec_deg
    text = "\n".join(",".join(r) for r in rows) + "\n"
    assert text.splitlines()[8].startswith("KRC 0007,")
    for batch_size in (100, 3):
        with local_client(batch_size=batch_size) as sky, pytest.raises(SkydriftError) as info:
            sky.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=EPOCHS)
        assert info.value.errors == [FieldError("line 9: dec_deg", "must be between -90 and 90")]


def test_an_answer_cut_off_is_a_failed_connection():
    # The body ends after 6 of the 1000 bytes its Content-Length announces (a worker killed
    # while sending): requests raises ChunkedEncodingError, which the client let through
    # instead of retrying it as a failed connection and raising SkydriftError.
    import socket

    listener = socket.create_server(("127.0.0.1", 0))
    head = b"HTTP/1.1 200 OK\r\nContent-Type: application/json\r\n"
    cut = head + b'Content-Length: 1000\r\n\r\n{"ok":'
    whole = head + b'Content-Length: 11\r\n\r\n{"ok":true}'
    answers = [cut, whole, cut]

    def serve():
        while answers:
            conn, _ = listener.accept()
            conn.recv(65536)
            conn.sendall(answers.pop(0))
            conn.close()

    threading.Thread(target=serve, daemon=True).start()
    url = f"http://127.0.0.1:{listener.getsockname()[1]}"
    waits = []
    try:
        assert Client(url, sleep=waits.append).health() == {"ok": True}
        assert len(waits) == 1
        with pytest.raises(SkydriftError) as info:
            Client(url, retries=0).health()
        assert info.value.status is None and info.value.title == "Answer cut off"
    finally:
        listener.close()


#: Stars x epochs per request of the service started by small_results_limit (setting
#: SKYDRIFT_MAX_RESULTS): the 30 demo stars at 21 epochs (630 results) exceed it, 4 stars
#: (84) do not.
SMALL_RESULTS_LIMIT = 100
MANY_EPOCHS = [f"J{2016 + 5 * k}.0" for k in range(21)]


@pytest.fixture(scope="module")
def small_results_limit():
    from tests.clients.conftest import start_service, stop_service

    url, proc = start_service({"SKYDRIFT_MAX_RESULTS": str(SMALL_RESULTS_LIMIT)})
    yield url
    stop_service(proc)


def test_batches_shrink_to_the_services_results_limit(small_results_limit, demo_catalogue):
    """More stars x epochs than SKYDRIFT_MAX_RESULTS in one batch: every batch was refused
    (413), whatever the epochs, with the default 100,000 stars per batch. The client halves
    the batch until it fits; the answers equal those of batches small enough from the
    start (4 stars x 21 epochs = 84 results), stars in order, none lost."""
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]]
    small = Client(small_results_limit, batch_size=4)
    with Client(small_results_limit) as sky, pytest.raises(SkydriftError) as refused:
        body = {"stars": stars, "catalogue_epoch": "J2016.0", "target_epochs": MANY_EPOCHS}
        sky.post("/v1/propagation", body)
    assert refused.value.status == 413
    with Client(small_results_limit) as sky:
        done = []
        got = sky.propagate(stars, catalogue_epoch="J2016.0", target_epochs=MANY_EPOCHS,
                            progress=done.append)  # fmt: skip
        assert got == small.propagate(stars, catalogue_epoch="J2016.0", target_epochs=MANY_EPOCHS)
        assert [s["index"] for s in got["stars"]] == list(range(30)) and sum(done) == 30
        text = (DEMO / "catalogue.csv").read_text()
        csv_got = sky.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=MANY_EPOCHS)
        assert csv_got == small.propagate_csv(
            text, catalogue_epoch="J2016.0", target_epochs=MANY_EPOCHS
        )
        frames = sky.frames(stars, catalogue_epoch="J2016.0", from_frame="icrs",
                            to_frame="galactic", target_epochs=MANY_EPOCHS)  # fmt: skip
        assert frames == small.frames(stars, catalogue_epoch="J2016.0", from_frame="icrs",
                                      to_frame="galactic", target_epochs=MANY_EPOCHS)  # fmt: skip
        instants = [f"2026-12-02T{h:02d}:00:00Z" for h in range(21)]
        buf = io.StringIO()
        writer = csv.DictWriter(buf, ASTROMETRY)
        writer.writeheader()
        writer.writerows(stars)
        text = buf.getvalue()  # the columns the observed place takes
        observed = sky.observed_csv(text, catalogue_epoch="J2016.0", instants=instants,
                                    site="kestrel-ridge")  # fmt: skip
        assert observed == small.observed_csv(text, catalogue_epoch="J2016.0",
                                              instants=instants, site="kestrel-ridge")  # fmt: skip
        # "now", sent once and refused, then in several batches: still one instant.
        out = sky.propagate_csv(
            text, catalogue_epoch="J2016.0", target_epochs=["now", *MANY_EPOCHS[1:]]
        )
        rows = list(csv.DictReader(io.StringIO(out)))
        assert len(rows) == 30 * 21 and len({r["epoch_iso_utc"] for r in rows}) == 21
        assert [int(r["index"]) for r in rows] == sorted(int(r["index"]) for r in rows)


@pytest.fixture(scope="module")
def small_star_and_body_limits():
    from tests.clients.conftest import start_service, stop_service

    url, proc = start_service({"SKYDRIFT_MAX_STARS": "7", "SKYDRIFT_MAX_BODY_BYTES": "2000"})
    yield url
    stop_service(proc)


def test_batches_shrink_to_the_services_star_and_body_limits(
    small_star_and_body_limits, demo_catalogue
):
    """A pool that takes 7 stars and 2,000 bytes per request (an interactive pool's limits
    are set low on purpose): the 30 demo stars in one batch were refused (413 naming
    SKYDRIFT_MAX_BODY_BYTES, then SKYDRIFT_MAX_STARS) and the call failed. The client halves
    the batch on the body size and takes the star limit the refusal names as its size; the
    answers equal those of 7-star batches from the start, stars in order, none lost."""
    url = small_star_and_body_limits
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in demo_catalogue["stars"]]
    small = Client(url, batch_size=7)
    expected = small.propagate(stars, catalogue_epoch="J2016.0", target_epochs=["J2026.0"])
    with Client(url) as sky:
        sizes, post = [], sky.post
        sky.post = lambda path, body: sizes.append(len(body["stars"])) or post(path, body)
        got = sky.propagate(stars, catalogue_epoch="J2016.0", target_epochs=["J2026.0"])
        assert got == expected
        assert [s["index"] for s in got["stars"]] == list(range(30))
        assert sizes[0] == 30 and sizes[-5:] == [7, 7, 7, 7, 2]
        text = (DEMO / "catalogue.csv").read_text()
        assert sky.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=["J2026.0"]) == (
            small.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=["J2026.0"])
        )


def test_an_epoch_limit_is_not_taken_for_a_results_limit(small_results_limit):
    """More epochs than SKYDRIFT_MAX_EPOCHS: no batch of stars can cure it, so it is raised
    at once, not after halving the batch down to one star."""
    star = {"ra_deg": 10.0, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}
    sent = []
    with Client(small_results_limit) as sky:
        post = sky.post
        sky.post = lambda path, body: sent.append(path) or post(path, body)
        with pytest.raises(SkydriftError) as info:
            sky.observed([star] * 4, catalogue_epoch="J2016.0", site="kestrel-ridge",
                         instants=["2026-12-02T22:00:00Z"] * 10_001)  # fmt: skip
    assert info.value.status == 413 and "SKYDRIFT_MAX_EPOCHS" in str(info.value)
    assert "SKYDRIFT_MAX_RESULTS" not in str(info.value) and len(sent) == 1


def test_csv_epochs_fit_the_request_line_comma_separated(sky, live_service):
    """CSV and Arrow bodies carry their epochs in the query string, which gunicorn reads up
    to 8190 bytes (limit_request_line, deploy/gunicorn.conf.py). The key repeated per epoch
    ("&target_epochs=J2026.01") spent 24 bytes an epoch: 600 epochs made a 14,000-byte line,
    refused by gunicorn (414) before reaching the service. Comma-separated, as the service
    reads lists (README, CSV), they take 9 bytes each and fit; more than fit raise
    ValueError before anything is sent, saying what to do instead."""
    text = "id,ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\nA,10,5,100,-50\n"
    epochs = [f"J{2016 + k / 100:.2f}" for k in range(600)]
    repeated = "&".join(f"target_epochs={e}" for e in epochs)
    assert len(f"POST /v1/propagation?catalogue_epoch=J2016.0&{repeated} HTTP/1.1") > 8190
    out = sky.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=epochs)
    rows = list(csv.DictReader(io.StringIO(out)))
    star = {"ra_deg": 10, "dec_deg": 5, "pm_ra_cosdec_mas_yr": 100, "pm_dec_mas_yr": -50}
    as_json = sky.propagate([star], catalogue_epoch="J2016.0", target_epochs=epochs)
    assert [float(r["epoch_julian_tdb"]) for r in rows] == [
        e["julian_epoch_tdb"] for e in as_json["epochs"]
    ]
    assert [float(r["dec_deg"]) for r in rows] == [
        x["dec_deg"] for x in as_json["stars"][0]["at_epochs"]
    ]
    too_many = [f"J{2016 + k / 1000:.3f}" for k in range(1000)]
    with pytest.raises(ValueError, match="1000 target_epochs.*8190.*target_range"):
        sky.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=too_many)
    # In this process (the command line without --url) there is no request line to limit.
    from service.local import local_client

    with local_client() as here:
        out = here.propagate_csv(text, catalogue_epoch="J2016.0", target_epochs=too_many)
    assert len(out.splitlines()) == 1 + 1000
