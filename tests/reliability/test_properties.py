"""Property tests through the HTTP layer (hypothesis), complementing those of the core.

The core's own property tests (tests/core) already cover propagation forward-and-back,
covariance symmetry and positive semi-definiteness, frame and velocity round trips and
constellation membership under displacements smaller than the margin, on the core
functions. These check that the same invariants survive the service path: JSON in, schema
validation, arrays, core, JSON out. Sources: the invariants are properties of the models
(the straight-line model is a flow: moving by t1 then t2 equals moving by t1 + t2; a
covariance matrix is symmetric positive semi-definite), not values; tolerances are stated
per quantity.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.api import create_app
from service.config import Settings

#: Position tolerance after a forward-and-back trip, mas (JSON keeps every digit of a double;
#: the trip itself loses a few ulps of 360 deg, about 1e-10 mas).
POSITION_TOL_MAS = 1e-6
#: Proper motion tolerance after a trip, mas/yr.
PM_TOL_MAS_YR = 1e-9
#: Smallest eigenvalue allowed for a correlation matrix, dimensionless (rounding).
PSD_TOL = 1e-9

PROPERTY_SETTINGS = settings(
    max_examples=25,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


@pytest.fixture(scope="module")
def client():
    return create_app({"SKYDRIFT_SETTINGS": Settings(), "TESTING": True}).test_client()


stars = st.fixed_dictionaries(
    {
        "ra_deg": st.floats(0.0, 360.0, exclude_max=True),
        "dec_deg": st.floats(-89.0, 89.0),
        "parallax_mas": st.floats(0.01, 800.0),
        "pm_ra_cosdec_mas_yr": st.floats(-5000.0, 5000.0),
        "pm_dec_mas_yr": st.floats(-5000.0, 5000.0),
        "radial_velocity_km_s": st.floats(-500.0, 500.0),
    }
)
epochs = st.floats(-3000.0, 7000.0)


def _propagate(client, star_list, epoch_from, targets, layout="records", **extra):
    body = {
        "stars": star_list,
        "catalogue_epoch": epoch_from,
        "target_epochs": list(targets),
        "layout": layout,
        **extra,
    }
    r = client.post("/v1/propagation", json=body)
    assert r.status_code == 200, r.get_data(as_text=True)[:500]
    return r.json


def _sky_separation_mas(ra1, dec1, ra2, dec2) -> float:
    a1, d1, a2, d2 = map(math.radians, (ra1, dec1, ra2, dec2))
    c = math.sin(d1) * math.sin(d2) + math.cos(d1) * math.cos(d2) * math.cos(a1 - a2)
    s = math.hypot(
        math.cos(d2) * math.sin(a2 - a1),
        math.cos(d1) * math.sin(d2) - math.sin(d1) * math.cos(d2) * math.cos(a2 - a1),
    )
    return math.degrees(math.atan2(s, c)) * 3.6e6


@PROPERTY_SETTINGS
@given(star=stars, t0=epochs, t1=epochs)
def test_api_forward_and_back_returns_the_star(client, star, t0, t1):
    out = _propagate(client, [star], t0, [t1])["stars"][0]["at_epochs"][0]
    moved = {k: out[k] for k in star}
    back = _propagate(client, [moved], t1, [t0])["stars"][0]["at_epochs"][0]
    sep = _sky_separation_mas(star["ra_deg"], star["dec_deg"], back["ra_deg"], back["dec_deg"])
    assert sep < POSITION_TOL_MAS * max(1.0, abs(t1 - t0) / 100.0)
    assert abs(back["pm_ra_cosdec_mas_yr"] - star["pm_ra_cosdec_mas_yr"]) < PM_TOL_MAS_YR * max(
        1.0, abs(star["pm_ra_cosdec_mas_yr"])
    ) * max(1.0, abs(t1 - t0))


@PROPERTY_SETTINGS
@given(star=stars, t0=epochs, t1=epochs, t2=epochs)
def test_api_moves_compose(client, star, t0, t1, t2):
    """Moving t0 -> t1 -> t2 answers as t0 -> t2 (the model is a flow)."""
    direct = _propagate(client, [star], t0, [t2])["stars"][0]["at_epochs"][0]
    mid = _propagate(client, [star], t0, [t1])["stars"][0]["at_epochs"][0]
    two = _propagate(client, [{k: mid[k] for k in star}], t1, [t2])["stars"][0]["at_epochs"][0]
    sep = _sky_separation_mas(direct["ra_deg"], direct["dec_deg"], two["ra_deg"], two["dec_deg"])
    span = max(1.0, (abs(t1 - t0) + abs(t2 - t1)) / 100.0)
    assert sep < POSITION_TOL_MAS * span


@PROPERTY_SETTINGS
@given(batch=st.lists(stars, min_size=1, max_size=20), t0=epochs, t1=epochs)
def test_api_records_and_columns_give_the_same_numbers(client, batch, t0, t1):
    records = _propagate(client, batch, t0, [t1], layout="records")
    columns_in = {k: [s[k] for s in batch] for k in batch[0]}
    columns = _propagate(client, columns_in, t0, [t1], layout="columns")
    for name in ("ra_deg", "dec_deg", "parallax_mas", "pm_ra_cosdec_mas_yr", "pm_dec_mas_yr"):
        from_records = [s["at_epochs"][0][name] for s in records["stars"]]
        assert columns["columns"][name][0] == from_records  # bit for bit


errors = st.fixed_dictionaries(
    {
        "ra_error_mas": st.floats(0.001, 10.0),
        "dec_error_mas": st.floats(0.001, 10.0),
        "parallax_error_mas": st.floats(0.001, 10.0),
        "pm_ra_cosdec_error_mas_yr": st.floats(0.001, 10.0),
        "pm_dec_error_mas_yr": st.floats(0.001, 10.0),
        "radial_velocity_error_km_s": st.floats(0.01, 20.0),
        "correlation_ra_dec": st.floats(-0.5, 0.5),
        "correlation_parallax_pm_ra": st.floats(-0.5, 0.5),
        "correlation_pm_ra_pm_dec": st.floats(-0.5, 0.5),
    }
)
PARAMS = ("ra", "dec", "parallax", "pm_ra", "pm_dec", "radial_velocity")


@PROPERTY_SETTINGS
@given(star=stars, err=errors, t1=epochs)
def test_api_uncertainties_form_a_valid_covariance(client, star, err, t1):
    """The standard errors and correlations answered at any epoch form a symmetric positive
    semi-definite matrix (the correlations lie in [-1, 1] and can all hold at once)."""
    out = _propagate(client, [dict(star, **err)], 2016.0, [t1])["stars"][0]["at_epochs"][0]
    unc = out["uncertainties"]
    corr = np.eye(6)
    for i in range(6):
        for j in range(i + 1, 6):
            value = unc[f"correlation_{PARAMS[i]}_{PARAMS[j]}"]
            assert value is not None and -1.0 - 1e-12 <= value <= 1.0 + 1e-12
            corr[i, j] = corr[j, i] = value
    assert all(unc[k] is not None and unc[k] >= 0.0 for k in unc if "error" in k)
    assert np.linalg.eigvalsh(corr)[0] > -PSD_TOL


@PROPERTY_SETTINGS
@given(
    ra=st.floats(0.0, 360.0, exclude_max=True),
    dec=st.floats(-89.0, 89.0),
    angle=st.floats(0.0, 2.0 * math.pi),
    fraction=st.floats(0.0, 0.9),
)
def test_api_constellation_stable_under_displacements_within_the_margin(
    client, ra, dec, angle, fraction
):
    """A position moved by less than its margin (as the service states it) keeps its
    constellation, through the margins and lookup endpoints (epoch B1875: no precession
    between the request and the boundary table beyond the reduction itself)."""
    star = {"ra_deg": ra, "dec_deg": dec, "pm_ra_cosdec_mas_yr": 0.0, "pm_dec_mas_yr": 0.0}
    body = {"stars": [star], "catalogue_epoch": "J2016.0", "epoch": "J2016.0"}
    r = client.post("/v1/constellations/margins", json=body)
    assert r.status_code == 200
    first = r.json["stars"][0]
    # Keep off the boundary by more than the rounding of the reduction (1 mas).
    margin_deg = first["margin_arcsec"] / 3600.0
    step_deg = fraction * margin_deg - 1e-6
    if step_deg <= 0.0:
        return
    d = math.radians(dec)
    # Small step on the sphere in direction `angle` (east of north), degrees.
    new_dec = dec + step_deg * math.cos(angle)
    new_ra = (ra + step_deg * math.sin(angle) / max(math.cos(d), 1e-9)) % 360.0
    if abs(new_dec) > 89.0 or step_deg * abs(math.sin(angle)) / max(math.cos(d), 1e-9) > 1.0:
        return  # near a pole the flat step is not a short arc
    moved = dict(star, ra_deg=new_ra, dec_deg=new_dec)
    sep_deg = _sky_separation_mas(ra, dec, new_ra, new_dec) / 3.6e6
    if sep_deg >= 0.95 * margin_deg:
        return
    r2 = client.post("/v1/constellations/lookup", json=dict(body, stars=[moved]))
    assert r2.status_code == 200
    assert r2.json["stars"][0]["constellation"] == first["constellation"]
