"""POST /v1/velocity and /v1/velocity/observables: results, flags, one test per bad input."""

import json
import math
import re

import numpy as np
import pytest

from service.core import kinematics as core

URL = "/v1/velocity"
INVERSE_URL = "/v1/velocity/observables"
STAR = {
    "ra_deg": 10.0,
    "dec_deg": 5.0,
    "parallax_mas": 20.0,
    "pm_ra_cosdec_mas_yr": 100.0,
    "pm_dec_mas_yr": -50.0,
    "radial_velocity_km_s": 12.0,
}
UVW_STAR = {"ra_deg": 10.0, "dec_deg": 5.0, "distance_pc": 80.0, "u_km_s": -10.0,
            "v_km_s": -20.0, "w_km_s": 5.0}  # fmt: skip


def post(client, body, url=URL):
    return client.post(url, json=body)


def assert_problem(r, status, field=None):
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    body = r.json
    assert body["status"] == status
    if field is not None:
        fields = [e["field"] for e in body.get("errors", [])]
        assert field in fields, fields
    return body


def col(stars, name):
    return np.array([np.nan if s.get(name) is None else s[name] for s in stars], float)


# ---------------------------------------------------------------- results


def test_demo_catalogue_matches_core(client, demo_catalogue):
    stars = demo_catalogue["stars"]
    r = post(client, {"stars": stars, "catalogue_epoch": "J2016.0"})
    assert r.status_code == 200
    body = r.json
    assert body["star_count"] == len(stars)
    assert "Galactic centre" in body["uvw_convention"]
    ref = core.space_velocity(
        col(stars, "ra_deg"),
        col(stars, "dec_deg"),
        col(stars, "parallax_mas"),
        col(stars, "pm_ra_cosdec_mas_yr"),
        col(stars, "pm_dec_mas_yr"),
        col(stars, "radial_velocity_km_s"),
        parallax_error_mas=col(stars, "parallax_error_mas"),
        pm_ra_cosdec_error_mas_yr=col(stars, "pm_ra_cosdec_error_mas_yr"),
        pm_dec_error_mas_yr=col(stars, "pm_dec_error_mas_yr"),
        parallax_pm_ra_cosdec_corr=np.nan_to_num(col(stars, "correlation_parallax_pm_ra")),
        radial_velocity_error_km_s=col(stars, "radial_velocity_error_km_s"),
        epoch_jyear=2016.0,
    )
    got_u = np.array([np.nan if s["u_km_s"] is None else s["u_km_s"] for s in body["stars"]])
    np.testing.assert_array_equal(got_u, ref.uvw_km_s[:, 0])
    got_err = [s["w_error_km_s"] for s in body["stars"]]
    want_err = [None if np.isnan(x) else x for x in ref.uvw_error_km_s[:, 2]]
    assert got_err == want_err
    got_epoch = [s["closest_approach_epoch_jyear"] for s in body["stars"]]
    want_epoch = [None if np.isnan(x) else x for x in ref.closest_approach_epoch_jyear]
    assert got_epoch == want_epoch
    for s, star in zip(body["stars"], stars, strict=True):
        assert s["id"] == star["id"]


def test_records_and_columns_give_identical_numbers(client, demo_catalogue):
    stars = demo_catalogue["stars"]
    names = sorted({k for s in stars for k in s})
    columns = {n: [s.get(n) for s in stars] for n in names}
    rec = post(client, {"stars": stars}).json
    colr = post(client, {"stars": columns}).json
    assert colr["layout"] == "columns"
    for i, s in enumerate(rec["stars"]):
        for name in ("u_km_s", "v_error_km_s", "transverse_velocity_km_s", "u_interval_km_s"):
            assert s[name] == colr["columns"][name][i]
        assert s["flags"] == colr["columns"]["flags"][i]


def test_missing_and_negative_parallax_give_nulls_and_flags(client):
    stars = [STAR, dict(STAR, parallax_mas=None), dict(STAR, parallax_mas=-0.4),
             dict(STAR, radial_velocity_km_s=None)]  # fmt: skip
    body = post(client, {"stars": stars}).json
    s = body["stars"]
    assert s[0]["u_km_s"] is not None
    assert "parallax_missing" in s[1]["flags"] and s[1]["u_km_s"] is None
    assert "parallax_not_positive" in s[2]["flags"] and s[2]["transverse_velocity_km_s"] is None
    assert "radial_velocity_missing" in s[3]["flags"] and s[3]["u_km_s"] is None
    assert s[3]["transverse_velocity_km_s"] is not None
    assert set(body["flag_meanings"]) >= {"parallax_missing", "parallax_not_positive"}


def test_lsr_and_solar_motion_override(client):
    body = post(client, {"stars": [STAR], "relative_to_lsr": True}).json
    s = body["stars"][0]
    # Schoenrich, Binney & Dehnen 2010: (11.1, 12.24, 7.25) km/s.
    assert body["solar_motion_km_s"] == [11.1, 12.24, 7.25]
    assert s["u_lsr_km_s"] - s["u_km_s"] == pytest.approx(11.1, abs=1e-12)
    sun = {"u_km_s": 10.0, "v_km_s": 5.25, "w_km_s": 7.0}
    s2 = post(client, {"stars": [STAR], "relative_to_lsr": True, "solar_motion": sun}).json
    assert s2["stars"][0]["v_lsr_km_s"] - s2["stars"][0]["v_km_s"] == pytest.approx(5.25)
    assert "u_lsr_km_s" not in post(client, {"stars": [STAR]}).json["stars"][0]


def test_explicit_distance_is_used_and_flagged(client):
    s = post(client, {"stars": [dict(STAR, parallax_mas=-1.0, distance_pc=50.0)]}).json
    star = s["stars"][0]
    assert star["distance_pc"] == 50.0
    assert "distance_given" in star["flags"]
    assert star["u_km_s"] is not None


def test_uncertainties_and_correlation_flag(client):
    star = dict(STAR, parallax_error_mas=0.1, pm_ra_cosdec_error_mas_yr=0.1,
                pm_dec_error_mas_yr=0.1, radial_velocity_error_km_s=1.0)  # fmt: skip
    s = post(client, {"stars": [star]}).json["stars"][0]
    assert s["u_error_km_s"] > 0
    assert "correlations_assumed_zero" in s["flags"]
    lo, hi = s["u_interval_km_s"]
    assert lo == pytest.approx(s["u_km_s"] - s["u_error_km_s"], rel=1e-12)
    s2 = post(client, {"stars": [STAR]}).json["stars"][0]
    assert s2["u_error_km_s"] is None and "uncertainties_missing" in s2["flags"]


def test_radial_velocity_correlations_are_used_and_checked(client):
    # correlation_parallax_radial_velocity and the proper-motion ones were accepted and
    # ignored; the answer must equal the core's with them (itself checked against astropy
    # draws in tests/core/test_kinematics.py) and differ from the answer without them.
    star = dict(STAR, parallax_error_mas=0.1, pm_ra_cosdec_error_mas_yr=0.2,
                pm_dec_error_mas_yr=0.15, radial_velocity_error_km_s=0.8,
                correlation_parallax_radial_velocity=0.8,
                correlation_pm_ra_radial_velocity=0.5)  # fmt: skip
    s = post(client, {"stars": [star]}).json["stars"][0]
    ref = core.space_velocity(
        *(star[k] for k in ("ra_deg", "dec_deg", "parallax_mas", "pm_ra_cosdec_mas_yr",
                            "pm_dec_mas_yr", "radial_velocity_km_s")),
        parallax_error_mas=0.1, pm_ra_cosdec_error_mas_yr=0.2, pm_dec_error_mas_yr=0.15,
        radial_velocity_error_km_s=0.8, parallax_radial_velocity_corr=0.8,
        pm_ra_cosdec_radial_velocity_corr=0.5,
    )  # fmt: skip
    tol = 1e-12  # km/s
    assert abs(s["u_error_km_s"] - ref.uvw_error_km_s[0]) < tol
    assert abs(s["total_velocity_error_km_s"] - ref.total_velocity_error_km_s) < tol
    without = {k: v for k, v in star.items() if not k.endswith("radial_velocity")}
    s0 = post(client, {"stars": [without]}).json["stars"][0]
    assert abs(s0["u_error_km_s"] - s["u_error_km_s"]) > 0.01  # km/s
    # A distance given in place of the parallax has none of the parallax's correlations.
    dist = dict(star, distance_pc=50.0, distance_error_pc=0.25)
    d1 = post(client, {"stars": [dist]}).json["stars"][0]
    dist["correlation_parallax_radial_velocity"] = 0.0
    d0 = post(client, {"stars": [dist]}).json["stars"][0]
    assert d1["u_error_km_s"] == d0["u_error_km_s"]
    # Impossible together: parallax-pm_ra 0.9 but the two with the radial velocity opposed.
    bad = dict(star, correlation_parallax_pm_ra=0.9, correlation_parallax_radial_velocity=0.9,
               correlation_pm_ra_radial_velocity=-0.9)  # fmt: skip
    assert_problem(post(client, {"stars": [bad]}), 422, "stars[0].correlation_*")


def test_monte_carlo_auto_is_seeded_and_flagged(client):
    stars = [dict(STAR, parallax_error_mas=0.1, pm_ra_cosdec_error_mas_yr=0.1,
                  pm_dec_error_mas_yr=0.1, radial_velocity_error_km_s=1.0)]  # fmt: skip
    stars.append(dict(stars[0], parallax_mas=0.5, parallax_error_mas=0.2))  # SNR 2.5
    body = {"stars": stars, "uncertainty_method": "auto", "monte_carlo_draws": 2000, "seed": 9}
    a = post(client, body).json["stars"]
    b = post(client, body).json["stars"]
    assert a == b
    assert "monte_carlo_uncertainties" not in a[0]["flags"]
    assert {"parallax_low_snr", "monte_carlo_uncertainties"} <= set(a[1]["flags"])


def test_implausible_proper_motion_warns_but_answers(client):
    body = post(client, {"stars": [dict(STAR, pm_ra_cosdec_mas_yr=20000.0)]}).json
    assert "proper_motion_implausible" in body["stars"][0]["flags"]
    assert body["warnings"][0]["index"] == 0


def test_radial_velocity_in_metres_per_second_warns_but_answers(client):
    body = post(client, {"stars": [dict(STAR, radial_velocity_km_s=41_700.0)]}).json
    assert "radial_velocity_implausible" in body["stars"][0]["flags"]
    assert "km/s, not m/s" in body["warnings"][0]["message"]
    assert body["stars"][0]["u_km_s"] is not None  # computed as given


def test_parallax_in_microarcseconds_warns_but_answers(client):
    # 1,000 mas, nearer than 1 pc (common practice; core.constants): Proxima Centauri's
    # 768.07 mas (Gaia DR3, from memory), the largest known parallax, passes unflagged;
    # 768,070 is it in microarcseconds. A distance given in its place is used instead.
    stars = [
        dict(STAR, parallax_mas=768.07),
        dict(STAR, parallax_mas=768_070.0),
        dict(STAR, parallax_mas=768_070.0, distance_pc=1.3),
    ]
    body = post(client, {"stars": stars}).json
    assert ["parallax_implausible" in s["flags"] for s in body["stars"]] == [False, True, False]
    assert [w["index"] for w in body["warnings"]] == [1]
    assert "microarcseconds given as milliarcseconds" in body["warnings"][0]["message"]
    assert "parallax_implausible" in body["flag_meanings"]
    assert body["stars"][1]["u_km_s"] is not None  # computed as given
    # The inverse takes a parallax too: its proper motions scale with it.
    inverse = [dict(UVW_STAR, distance_pc=None, parallax_mas=p) for p in (768.07, 768_070.0)]
    body = post(client, {"stars": inverse}, INVERSE_URL).json
    assert ["parallax_implausible" in s["flags"] for s in body["stars"]] == [False, True]
    assert [w["index"] for w in body["warnings"]] == [1]
    assert "parallax_implausible" in body["flag_meanings"]


def test_inverse_round_trip_through_both_endpoints(client):
    stars = [UVW_STAR, dict(UVW_STAR, ra_deg=250.0, dec_deg=-60.0, u_km_s=40.0)]
    obs = post(client, {"stars": stars}, INVERSE_URL).json["stars"]
    back_stars = [
        {"ra_deg": s["ra_deg"], "dec_deg": s["dec_deg"], "distance_pc": s["distance_pc"],
         "parallax_mas": None, "pm_ra_cosdec_mas_yr": o["pm_ra_cosdec_mas_yr"],
         "pm_dec_mas_yr": o["pm_dec_mas_yr"], "radial_velocity_km_s": o["radial_velocity_km_s"]}
        for s, o in zip(stars, obs, strict=True)
    ]  # fmt: skip
    back = post(client, {"stars": back_stars}).json["stars"]
    for s, b in zip(stars, back, strict=True):
        for k in ("u_km_s", "v_km_s", "w_km_s"):
            assert b[k] == pytest.approx(s[k], rel=1e-9, abs=1e-9)  # relative 1e-9


def test_inverse_lsr_and_without_distance(client):
    star = {k: v for k, v in UVW_STAR.items() if k != "distance_pc"}
    body = post(client, {"stars": [star], "relative_to_lsr": True}, INVERSE_URL).json
    s = body["stars"][0]
    assert s["pm_ra_cosdec_mas_yr"] is None and s["radial_velocity_km_s"] is not None
    assert s["flags"] == ["parallax_missing"]
    assert body["solar_motion_km_s"] == [11.1, 12.24, 7.25]


def test_examples_answer(client):
    from service.api.examples import load_example

    assert post(client, load_example("velocity_request.json")).status_code == 200
    r = post(client, load_example("velocity_observables_request.json"), INVERSE_URL)
    assert r.status_code == 200


# ---------------------------------------------------------------- bad input, one per case


def test_negative_distance(client):
    star = dict(STAR, distance_pc=-10.0)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].distance_pc")


def test_zero_distance(client):
    star = dict(STAR, distance_pc=0.0)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].distance_pc")


def test_negative_distance_in_columns_names_index(client):
    cols = {k: [v, v] for k, v in STAR.items()}
    cols["distance_pc"] = [100.0, -1.0]
    assert_problem(post(client, {"stars": cols}), 422, "stars.distance_pc[1]")


def test_nan_string_is_rejected(client):
    star = dict(STAR, parallax_mas="NaN")
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].parallax_mas")


def test_nan_literal_is_not_json(client):
    text = json.dumps({"stars": [STAR]}).replace("100.0", "NaN")
    assert_problem(client.post(URL, data=text, content_type="application/json"), 400)


def test_infinity_is_rejected(client):
    text = json.dumps({"stars": [STAR]}).replace("100.0", "1e999")
    assert_problem(client.post(URL, data=text, content_type="application/json"), 400)


def test_missing_proper_motion(client):
    star = {k: v for k, v in STAR.items() if k != "pm_dec_mas_yr"}
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].pm_dec_mas_yr")


def test_dec_out_of_range(client):
    assert_problem(post(client, {"stars": [dict(STAR, dec_deg=-91)]}), 422, "stars[0].dec_deg")


def test_radial_velocity_faster_than_light(client):
    star = dict(STAR, radial_velocity_km_s=3e5)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].radial_velocity_km_s")


def test_negative_parallax_error(client):
    star = dict(STAR, parallax_error_mas=-0.1)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].parallax_error_mas")


def test_negative_distance_error(client):
    star = dict(STAR, distance_pc=10.0, distance_error_pc=-1.0)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].distance_error_pc")


def test_correlation_out_of_range(client):
    star = dict(STAR, correlation_parallax_pm_dec=-1.5)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].correlation_parallax_pm_dec")


def test_correlations_not_positive_semidefinite(client):
    star = dict(STAR, correlation_parallax_pm_ra=0.9, correlation_parallax_pm_dec=0.9,
                correlation_pm_ra_pm_dec=-0.9)  # fmt: skip
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].correlation_*")


def test_unknown_uncertainty_method(client):
    body = {"stars": [STAR], "uncertainty_method": "bootstrap"}
    assert_problem(post(client, body), 422, "uncertainty_method")


def test_monte_carlo_draws_out_of_range(client):
    body = {"stars": [STAR], "uncertainty_method": "monte_carlo", "monte_carlo_draws": 5}
    assert_problem(post(client, body), 422, "monte_carlo_draws")


def test_monte_carlo_samples_over_the_limit(client):
    cols = {k: [v] * 30 for k, v in STAR.items()}
    body = {"stars": cols, "uncertainty_method": "monte_carlo", "monte_carlo_draws": 1_000_000}
    assert_problem(post(client, body), 413, "monte_carlo_draws")


def test_auto_counts_only_the_stars_it_draws_against_the_sample_limit(client):
    # auto counted every star against the limit on samples, even stars with a precise
    # parallax that it never draws (with the default 10,000 draws any request of more than
    # 2,000 stars was refused), and advised to use auto. Only the stars it draws (flagged
    # parallax_low_snr) count now.
    n, draws = 900, 50_000  # 4.5e7 samples if every star were drawn
    errors = {"parallax_error_mas": 0.1, "pm_ra_cosdec_error_mas_yr": 0.1,
              "pm_dec_error_mas_yr": 0.1, "radial_velocity_error_km_s": 1.0}  # fmt: skip
    cols = {k: [v] * n for k, v in {**STAR, **errors}.items()}  # parallax SNR 200
    cols["parallax_error_mas"][7] = 10.0  # SNR 2: the one star drawn
    options = {"uncertainty_method": "auto", "monte_carlo_draws": draws}
    body = post(client, {"stars": cols, **options}).json
    drawn = ["monte_carlo_uncertainties" in f for f in body["columns"]["flags"]]
    assert drawn.count(True) == 1 and drawn[7]
    cols["parallax_error_mas"] = [10.0] * n  # every star drawn
    r = post(client, {"stars": cols, **options})
    message = assert_problem(r, 413, "monte_carlo_draws")["errors"][0]["message"]
    assert "900 stars drawn" in message and "uncertainty_method auto" not in message


def test_low_snr_default_is_the_operators_setting():
    # SKYDRIFT_LOW_PARALLAX_SNR (README, Configuration) sets the default threshold; a
    # request's own low_snr_threshold still wins, and the answer says which was used.
    from service.api.app import create_app
    from service.config import Settings

    app = create_app({"SKYDRIFT_SETTINGS": Settings(low_parallax_snr=20.0), "TESTING": True})
    client = app.test_client()
    star = dict(STAR, parallax_mas=10.0, parallax_error_mas=1.0)  # signal-to-noise 10
    r = post(client, {"stars": [star]})
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.json["low_snr_threshold"] == 20.0
    assert "parallax_low_snr" in r.json["stars"][0]["flags"]
    r = post(client, {"stars": [star], "low_snr_threshold": 5.0})
    assert r.json["low_snr_threshold"] == 5.0
    assert "parallax_low_snr" not in r.json["stars"][0]["flags"]


def test_non_positive_snr_threshold(client):
    assert_problem(post(client, {"stars": [STAR], "low_snr_threshold": 0}), 422,
                   "low_snr_threshold")  # fmt: skip


def test_solar_motion_incomplete(client):
    body = {"stars": [STAR], "solar_motion": {"u_km_s": 1.0, "v_km_s": 2.0}}
    assert_problem(post(client, body), 422, "solar_motion.w_km_s")


@pytest.mark.parametrize("url", [URL, INVERSE_URL])
def test_solar_motion_without_relative_to_lsr_is_refused(client, url):
    # It was ignored: U, V, W sent to the inverse as relative to the LSR with their solar
    # motion, but without relative_to_lsr, were taken as heliocentric, and the proper
    # motions answered were off by the Sun's motion (about 17 km/s) without a word.
    sun = {"u_km_s": 10.0, "v_km_s": 11.0, "w_km_s": 7.0}
    star = STAR if url == URL else UVW_STAR
    body = assert_problem(post(client, {"stars": [star], "solar_motion": sun}, url), 422)
    assert [e["field"] for e in body["errors"]] == ["solar_motion"]
    both = {"stars": [star], "solar_motion": sun, "relative_to_lsr": True}
    assert post(client, both, url).json["solar_motion_km_s"] == [10.0, 11.0, 7.0]


def test_solar_motion_nan(client):
    body = {"stars": [STAR], "solar_motion": {"u_km_s": "NaN", "v_km_s": 2.0, "w_km_s": 1.0}}
    assert_problem(post(client, body), 422, "solar_motion.u_km_s")


def test_unparseable_catalogue_epoch(client):
    body = {"stars": [STAR], "catalogue_epoch": "the day after tomorrow"}
    assert_problem(post(client, body), 422, "catalogue_epoch")


def test_unknown_field_is_named(client):
    star = dict(STAR, distance_kpc=3.0)
    assert_problem(post(client, {"stars": [star]}), 422, "stars[0].distance_kpc")


def test_empty_batch(client):
    assert_problem(post(client, {"stars": []}), 422, "stars")


def test_inverse_negative_distance(client):
    star = dict(UVW_STAR, distance_pc=-80.0)
    assert_problem(post(client, {"stars": [star]}, INVERSE_URL), 422, "stars[0].distance_pc")


def test_inverse_nan_velocity(client):
    star = dict(UVW_STAR, u_km_s="NaN")
    assert_problem(post(client, {"stars": [star]}, INVERSE_URL), 422, "stars[0].u_km_s")


def test_inverse_missing_velocity_component(client):
    star = {k: v for k, v in UVW_STAR.items() if k != "w_km_s"}
    assert_problem(post(client, {"stars": [star]}, INVERSE_URL), 422, "stars[0].w_km_s")


def test_inverse_wrong_content_type(client):
    r = client.post(INVERSE_URL, data=json.dumps({"stars": [UVW_STAR]}), content_type="text/plain")
    assert_problem(r, 415)


def test_openapi_describes_every_velocity_field(client):
    doc = client.get("/openapi.json").json
    assert {"/v1/velocity", "/v1/velocity/observables"} <= set(doc["paths"])
    for schema in ("VelocityStar", "ObservablesStar"):
        for name, prop in doc["components"]["schemas"][schema]["properties"].items():
            assert prop.get("description"), f"{schema}.{name} lacks a description"


def test_inverse_flags_and_warns_a_space_velocity_above_half_c(client):
    # 1.5 c: the answer was given with no word. The limit is the propagation's (half the
    # speed of light, the speed SOFA starpm caps at).
    fast = dict(UVW_STAR, u_km_s=299792.458, v_km_s=200000.0, w_km_s=200000.0)
    slow = dict(UVW_STAR, u_km_s=140000.0, v_km_s=0.0, w_km_s=0.0)  # 0.47 c
    body = post(client, {"stars": [fast, slow, UVW_STAR]}, INVERSE_URL).json
    assert ["space_velocity_implausible" in s["flags"] for s in body["stars"]] == [
        True, False, False,
    ]  # fmt: skip
    assert [w["index"] for w in body["warnings"]] == [0]
    assert "space_velocity_implausible" in body["flag_meanings"]


@pytest.mark.parametrize("url", [URL, INVERSE_URL])
def test_distance_below_the_smallest_accepted_is_refused(client, url):
    # 5e-324 pc was echoed as 0.0 with null proper motions and no reason given (1000/d
    # overflows); the smallest distance is that of the largest parallax accepted.
    star = dict(STAR if url == URL else UVW_STAR, distance_pc=5e-324)
    r = post(client, {"stars": [star]}, url)
    answer = assert_problem(r, 422, "stars[0].distance_pc")
    assert answer["errors"][0]["message"] == "must be between 1e-07 and 1e+10"


def test_inverse_echoes_the_distance_given(client):
    star = dict(UVW_STAR, distance_pc=1e-7)
    got = post(client, {"stars": [star]}, INVERSE_URL).json["stars"][0]
    assert got["distance_pc"] == 1e-7 and math.isfinite(got["pm_ra_cosdec_mas_yr"])


def test_forward_flags_and_warns_a_space_velocity_above_half_c(client):
    # A parallax of 0.005 mas with 316 mas/yr of proper motion is a speed of 3e5 km/s: the
    # answer gave it with no word (the inverse and the propagation flag such speeds).
    # Reference: pyerfa starpv's "excessive speed" status (above half the speed of light,
    # SOFA's limit), run on each star with rv 0 for the star without one.
    import warnings

    import erfa

    stars = [
        dict(STAR, parallax_mas=0.005, pm_ra_cosdec_mas_yr=300.0, pm_dec_mas_yr=100.0),
        dict(STAR, parallax_mas=0.02, pm_ra_cosdec_mas_yr=300.0, pm_dec_mas_yr=100.0),
        dict(STAR, parallax_mas=0.005, pm_ra_cosdec_mas_yr=300.0, pm_dec_mas_yr=100.0,
             radial_velocity_km_s=None),
        STAR,
    ]  # fmt: skip
    expected = []
    for s in stars:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            erfa.starpv(
                math.radians(s["ra_deg"]),
                math.radians(s["dec_deg"]),
                math.radians(s["pm_ra_cosdec_mas_yr"] / 3.6e6)
                / math.cos(math.radians(s["dec_deg"])),
                math.radians(s["pm_dec_mas_yr"] / 3.6e6),
                s["parallax_mas"] / 1000.0,
                s["radial_velocity_km_s"] or 0.0,
            )
        expected.append(any("excessive speed" in str(w.message) for w in caught))
    assert expected == [True, False, True, False]
    body = post(client, {"stars": stars}).json
    assert ["space_velocity_implausible" in s["flags"] for s in body["stars"]] == expected
    assert [w["index"] for w in body["warnings"]] == [0, 2]
    assert "space_velocity_implausible" in body["flag_meanings"]


def test_radial_velocity_missing_meaning_says_what_is_null(client):
    # The meaning said every secular quantity is null without a radial velocity, but the
    # radial-velocity rate v_t^2/d (Hipparcos Vol. 1 section 1.2.8) needs none and is given.
    body = post(client, {"stars": [dict(STAR, radial_velocity_km_s=None)]}).json
    got = body["stars"][0]
    a = 149_597_870.7 / (365.25 * 86400.0)  # km/s per au/yr (IAU 2012 Resolution B2 au)
    vt = a * math.hypot(100.0, -50.0) / 20.0  # km/s, A mu / parallax
    d_km = 50.0 * 3.0856775814913673e13  # 1000/20 pc in km (IAU 2012 au, pc = 648000/pi au)
    expected = vt * vt / d_km * 365.25 * 86400.0  # km/s per Julian year
    assert abs(got["radial_velocity_rate_km_s_yr"] - expected) < 1e-15  # km/s/yr
    assert got["pm_total_rate_mas_yr2"] is None and got["closest_approach_time_yr"] is None
    meaning = body["flag_meanings"]["radial_velocity_missing"]
    assert "secular quantities are null" not in meaning and "radial-velocity rate" in meaning


@pytest.mark.parametrize("parallax", [2.2e-311, 1e-307, 5e-324])
def test_parallax_too_small_for_a_distance_is_flagged(client, parallax):
    """1000/parallax overflows below about 5.6e-306 mas: the distance-dependent outputs are
    null, and the star says why (the forward answer had no flag for a star without proper
    motion: inf * 0 made its velocities unknown unsaid). The inverse keeps the proper
    motions, which are proportional to the parallax: mu = v_t parallax / A (A = 1 au per
    Julian year, 4.7404705 km/s from the IAU 2012 Resolution B2 au), checked by scaling the
    answer for a parallax of 1 mas."""
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "parallax_mas": parallax, "pm_ra_cosdec_mas_yr": 0.0,
            "pm_dec_mas_yr": 0.0, "radial_velocity_km_s": 0.0}  # fmt: skip
    got = client.post(URL, json={"stars": [star]}).json["stars"][0]
    assert "parallax_too_small" in got["flags"]
    assert got["distance_pc"] is None and got["u_km_s"] is None
    assert got["radial_velocity_km_s"] == 0.0  # needs no distance
    space = {"ra_deg": 10.0, "dec_deg": 20.0, "u_km_s": 10.0, "v_km_s": 5.0, "w_km_s": 1.0}
    tiny, one = (
        client.post(f"{URL}/observables", json={"stars": [dict(space, parallax_mas=p)]}).json[
            "stars"
        ][0]
        for p in (parallax, 1.0)
    )
    assert tiny["flags"] == ["parallax_too_small"] and tiny["distance_pc"] is None
    assert one["flags"] == [] and one["distance_pc"] == pytest.approx(1000.0, rel=1e-15)
    for name in ("pm_ra_cosdec_mas_yr", "pm_dec_mas_yr"):
        # subnormal parallaxes carry fewer digits: 5e-324 is the smallest double itself
        assert tiny[name] == pytest.approx(one[name] * parallax, rel=1e-9, abs=1e-323)
    assert tiny["radial_velocity_km_s"] == one["radial_velocity_km_s"]


def test_zero_proper_motion_and_zero_parallax_error_nulls_are_flagged(client):
    # Every null of an answer has a flag that says why: a star without proper motion has no
    # position angle and no linear transverse-velocity error (the derivative of |mu| is
    # undefined at zero); a zero parallax error makes parallax / error infinite, which JSON
    # cannot carry. Both were null with no flag. References: tests/core/test_kinematics.py
    # (direct simulations of 200,000 draws).
    errs = {"parallax_error_mas": 0.1, "pm_ra_cosdec_error_mas_yr": 0.2,
            "pm_dec_error_mas_yr": 0.3, "radial_velocity_error_km_s": 1.0}  # fmt: skip
    stars = [{**STAR, **errs}, {**STAR, **errs, "pm_ra_cosdec_mas_yr": 0.0, "pm_dec_mas_yr": 0.0},
             {**STAR, **errs, "parallax_error_mas": 0.0}]  # fmt: skip
    for layout in ("records", "columns"):
        body = post(client, {"stars": stars, "layout": layout}).json
        if layout == "records":
            s = body["stars"]
        else:
            c = body["columns"]
            s = [{k: v[i] for k, v in c.items() if v is not None} for i in range(3)]
        assert "proper_motion_zero" not in s[0]["flags"] and s[0]["parallax_snr"] == 200.0
        assert "proper_motion_zero" in s[1]["flags"]
        assert s[1]["transverse_velocity_error_km_s"] is None
        assert s[1]["pm_position_angle_deg"] is None
        assert "parallax_error_zero" in s[2]["flags"] and s[2]["parallax_snr"] is None
        assert s[2]["transverse_velocity_error_km_s"] is not None
        meanings = body["flag_meanings"]
        assert "derivative" in meanings["proper_motion_zero"]
        assert "infinite" in meanings["parallax_error_zero"]


def test_component_rates_at_a_pole_are_null_and_flagged(client):
    # tan(dec) is infinite at a pole: the component rates were null with no flag.
    # Reference: tests/core/test_kinematics.py (ERFA pmsafe for the total rate kept).
    body = post(client, {"stars": [dict(STAR, dec_deg=90.0), STAR]}).json
    pole, other = body["stars"]
    assert "at_pole" in pole["flags"] and "at_pole" not in other["flags"]
    assert pole["pm_ra_cosdec_rate_mas_yr2"] is None and pole["pm_dec_rate_mas_yr2"] is None
    assert pole["pm_total_rate_mas_yr2"] is not None
    assert other["pm_ra_cosdec_rate_mas_yr2"] is not None
    assert "tan(dec)" in body["flag_meanings"]["at_pole"]


def test_inverse_at_a_pole_is_flagged(client):
    # The inverse took east and north from the RA given at a pole with no flag. Values
    # against astropy: tests/core/test_kinematics.py (inverse at a pole).
    space = {"ra_deg": 45.0, "u_km_s": 10.0, "v_km_s": -20.0, "w_km_s": 5.0, "distance_pc": 50.0}
    stars = [dict(space, dec_deg=90.0), dict(space, dec_deg=-90.0), dict(space, dec_deg=89.0)]
    body = post(client, {"stars": stars}, INVERSE_URL).json
    assert ["at_pole" in s["flags"] for s in body["stars"]] == [True, True, False]
    meaning = body["flag_meanings"]["at_pole"]
    assert "right ascension given" in meaning and "rate" not in meaning


def test_every_null_parallax_snr_is_explained_by_a_flag(client):
    # A non-positive parallax without its error got a null parallax_snr under
    # parallax_not_positive alone, whose meaning spoke only of velocities (with an error the
    # ratio is given, -2/0.5 here). Every null must be named by a flag whose meaning says
    # so. Reference: the ratio parallax / parallax error, computed here.
    base = {"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 50.0, "pm_dec_mas_yr": -30.0}
    rows = [
        {"parallax_mas": -2.0},
        {"parallax_mas": 0.0},
        {"parallax_mas": 1e-307},  # parallax_too_small
        {"parallax_mas": 5.0},
        {"parallax_mas": 5.0, "distance_pc": 100.0},
        {"parallax_mas": -2.0, "parallax_error_mas": 0.0},
        {"parallax_mas": -2.0, "parallax_error_mas": 0.5},
        {"parallax_mas": 1e-307, "parallax_error_mas": 0.5},
    ]
    body = post(client, {"stars": [dict(base, **r) for r in rows]}).json
    for row, star in zip(rows, body["stars"], strict=True):
        if star["parallax_snr"] is None:
            said = [f for f in star["flags"] if "parallax_snr" in body["flag_meanings"][f]]
            assert said, (row, star["flags"])
        else:
            want = row["parallax_mas"] / row["parallax_error_mas"]
            assert star["parallax_snr"] == pytest.approx(want, rel=1e-15, abs=0.0)
    assert [s["parallax_snr"] is None for s in body["stars"]] == [True] * 6 + [False] * 2


def test_inverse_flag_meanings_speak_of_the_inverse_answer(client):
    # The inverse answer took the forward answer's meanings: a missing or non-positive
    # parallax said "velocities are null" (the velocities are the input; the proper motions
    # are what is null) and parallax_snr, which this answer has not, was named in four of
    # them. Every flag the inverse raises must have a meaning that names only members of
    # its own request and answer, and each null must be named by a flag of its star.
    # Reference: the nulls of the answer itself.
    space = {"ra_deg": 10.0, "dec_deg": 20.0, "u_km_s": 10.0, "v_km_s": 5.0, "w_km_s": 1.0}
    rows = [
        {},  # parallax_missing
        {"parallax_mas": -2.0},  # parallax_not_positive
        {"parallax_mas": 1e-307},  # parallax_too_small
        {"parallax_mas": 5.0, "distance_pc": 100.0},  # distance_given
        {"parallax_mas": 2000.0},  # parallax_implausible
        {"parallax_mas": 5.0, "u_km_s": 2e5},  # space_velocity_implausible
        {"parallax_mas": 5.0, "dec_deg": 90.0},  # at_pole
    ]
    body = post(client, {"stars": [dict(space, **r) for r in rows]}, INVERSE_URL).json
    raised = {f for s in body["stars"] for f in s["flags"]}
    assert raised == {"parallax_missing", "parallax_not_positive", "parallax_too_small",
                      "distance_given", "parallax_implausible", "space_velocity_implausible",
                      "at_pole"}  # fmt: skip
    meanings = body["flag_meanings"]
    assert set(meanings) == raised
    members = set(body["units"]) | set(body["stars"][0]) | set(UVW_STAR) | {"parallax_mas"}
    for flag, text in meanings.items():
        named = set(re.findall(r"\b[a-z]+(?:_[a-z0-9]+)+\b", text)) - set(meanings)
        assert named <= members, (flag, named - members)
    for row, star in zip(rows, body["stars"], strict=True):
        for name in ("distance_pc", "pm_ra_cosdec_mas_yr", "pm_dec_mas_yr"):
            if star[name] is None:
                said = [f for f in star["flags"] if name in meanings[f]]
                assert said, (row, name, star["flags"])
    assert "velocities" not in meanings["parallax_missing"]
    assert "velocities" not in meanings["parallax_not_positive"]


def test_every_null_of_a_star_at_rest_is_named_by_a_flag(client):
    # A star at rest relative to the Sun (no proper motion, radial velocity 0) has no time
    # of closest approach, so with a catalogue epoch its closest_approach_epoch_jyear is
    # null too; proper_motion_zero named the time and the distance but not the epoch.
    # Reference: the answer's own nulls, each of which a flag of the star must name (the
    # position angle, closest-approach proper motion and parallax, the line-of-sight angle,
    # the linear transverse and total velocity errors, and the closest-approach time,
    # distance and epoch).
    errs = {"parallax_error_mas": 0.3, "pm_ra_cosdec_error_mas_yr": 0.1,
            "pm_dec_error_mas_yr": 0.1, "radial_velocity_error_km_s": 1.0}  # fmt: skip
    rest = dict(STAR, **errs, pm_ra_cosdec_mas_yr=0.0, pm_dec_mas_yr=0.0, radial_velocity_km_s=0.0)
    body = post(client, {"stars": [rest], "catalogue_epoch": "J2016.0"}).json
    star = body["stars"][0]
    assert star["flags"] == ["proper_motion_zero", "correlations_assumed_zero"]
    nulls = [k for k, v in star.items() if v is None and k != "id"]
    assert "closest_approach_epoch_jyear" in nulls and "closest_approach_time_yr" in nulls
    for name in nulls:
        said = [f for f in star["flags"] if name in body["flag_meanings"][f]]
        assert said, name


@pytest.mark.parametrize(
    ("parallax", "flag"),
    [(None, "parallax_missing"), (-1.0, "parallax_not_positive"), (1e-307, "parallax_too_small")],
)
def test_a_star_without_a_distance_has_its_nulls_named(client, parallax, flag):
    # Without a distance the rates (proper motions, radial velocity) and the whole closest
    # approach are null too; the meanings spoke of "velocities" only, and said nothing of
    # what is still given. Reference: the answer's own nulls and values.
    star = dict(STAR, parallax_mas=parallax)
    body = post(client, {"stars": [star], "catalogue_epoch": "J2016.0"}).json
    got = body["stars"][0]
    assert flag in got["flags"]
    for name in ("pm_total_rate_mas_yr2", "radial_velocity_rate_km_s_yr",
                 "closest_approach_time_yr", "closest_approach_speed_km_s"):  # fmt: skip
        assert got[name] is None
    for name in ("pm_total_mas_yr", "pm_position_angle_deg", "radial_velocity_km_s"):
        assert got[name] is not None
    meaning = body["flag_meanings"][flag]
    assert "rates" in meaning and "closest approach" in meaning
    assert "radial velocity are given" in meaning


def test_rates_are_derivatives_of_the_propagation_answer(client):
    # The rates answered are the derivatives at the catalogue epoch of what POST
    # /v1/propagation answers (Hipparcos Catalogue, ESA 1997, Vol. 1, section 1.5.5
    # straight-line model): central differences over -+0.5 yr. At radial velocity 0 there is
    # no perspective acceleration (-2 mu_r mu, Hipparcos Vol. 1 section 1.2.8), yet the
    # component rates are not zero: the tan(dec) terms of the turning east and north
    # directions. The description called pm_ra_cosdec_rate_mas_yr2 the perspective
    # acceleration. Tolerances: 1e-9 mas/yr^2 for the proper-motion rates (the differences'
    # truncation error is about 1e-12 here), 1e-12 km/s/yr for the radial-velocity rate.
    stars = [dict(STAR, dec_deg=60.0, pm_ra_cosdec_mas_yr=900.0, pm_dec_mas_yr=-700.0,
                  parallax_mas=150.0, radial_velocity_km_s=rv) for rv in (0.0, -80.0)]  # fmt: skip
    got = post(client, {"stars": stars, "catalogue_epoch": "J2016.0"}).json["stars"]
    h = 0.5  # yr
    prop = client.post(
        "/v1/propagation",
        json={"stars": stars, "catalogue_epoch": "J2016.0",
              "target_epochs": [2016.0 - h, 2016.0 + h]},
    ).json["stars"]  # fmt: skip
    for g, p in zip(got, prop, strict=True):
        before, after = p["at_epochs"]

        def rate(name, after=after, before=before):
            return (after[name] - before[name]) / (2.0 * h)

        def total(x):
            return math.hypot(x["pm_ra_cosdec_mas_yr"], x["pm_dec_mas_yr"])

        assert abs(g["pm_ra_cosdec_rate_mas_yr2"] - rate("pm_ra_cosdec_mas_yr")) < 1e-9
        assert abs(g["pm_dec_rate_mas_yr2"] - rate("pm_dec_mas_yr")) < 1e-9
        assert abs(g["pm_total_rate_mas_yr2"] - (total(after) - total(before)) / (2 * h)) < 1e-9
        assert abs(g["radial_velocity_rate_km_s_yr"] - rate("radial_velocity_km_s")) < 1e-12
    assert abs(got[0]["pm_ra_cosdec_rate_mas_yr2"]) > 1e-6  # the tan(dec) term alone
    assert abs(got[0]["pm_total_rate_mas_yr2"]) < 1e-15  # no perspective acceleration
    fields = client.get("/openapi.json").json["components"]["schemas"]["VelocityResult"]
    for name in ("pm_ra_cosdec_rate_mas_yr2", "pm_dec_rate_mas_yr2"):
        text = fields["properties"][name]["description"]
        assert "tan(dec)" in text and "perspective acceleration" in text
