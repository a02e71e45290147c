"""Every invalid field of a request named in one answer.

Each request below has an error that the schema finds in a field of its own (a star's
ra_deg of 400, a tolerance below its range) and one that a check of several values
together finds (a window, a frame's equinox, correlations that cannot all hold). Both must
be in the same 422 problem, under the paths and in the words each has alone: a client
that fixes the first must not meet the second only in the next round.
"""

#: A star refused for its own sake: right ascension out of range.
BAD_STAR = {"ra_deg": 400.0, "dec_deg": 10.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}
#: A star valid on its own.
STAR = {"ra_deg": 40.0, "dec_deg": 10.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}

#: Correlations of ra, dec and parallax that cannot all hold: the matrix [[1, .9, -.9],
#: [.9, 1, .9], [-.9, .9, 1]] has the determinant 1 - 3(.81) - 2(.729) = -2.888 < 0.
PSD_STAR = {
    **STAR,
    "parallax_mas": 10.0,
    "ra_error_mas": 1.0,
    "dec_error_mas": 1.0,
    "parallax_error_mas": 1.0,
    "pm_ra_cosdec_error_mas_yr": 1.0,
    "pm_dec_error_mas_yr": 1.0,
    "correlation_ra_dec": 0.9,
    "correlation_ra_parallax": -0.9,
    "correlation_dec_parallax": 0.9,
}

#: A star with one proper-motion component and not the other.
HALF_MOTION_STAR = {"ra_deg": 40.0, "dec_deg": 10.0, "pm_ra_cosdec_mas_yr": 1.0}

#: Velocity stars: one out of range, one whose correlations of parallax and the proper
#: motions cannot all hold (the same determinant as above, -2.888).
VELOCITY_STAR = {
    "ra_deg": 40.0,
    "dec_deg": 10.0,
    "parallax_mas": 10.0,
    "pm_ra_cosdec_mas_yr": 1.0,
    "pm_dec_mas_yr": 1.0,
    "radial_velocity_km_s": 5.0,
}
BAD_VELOCITY_STAR = {**VELOCITY_STAR, "ra_deg": 400.0}
VELOCITY_PSD_STAR = {
    **VELOCITY_STAR,
    "parallax_error_mas": 1.0,
    "pm_ra_cosdec_error_mas_yr": 1.0,
    "pm_dec_error_mas_yr": 1.0,
    "correlation_parallax_pm_ra": 0.9,
    "correlation_parallax_pm_dec": -0.9,
    "correlation_pm_ra_pm_dec": 0.9,
}
BAD_UVW_STAR = {"ra_deg": 400.0, "dec_deg": 10.0, "parallax_mas": 10.0, "u_km_s": 1.0,
                "v_km_s": 1.0, "w_km_s": 1.0}  # fmt: skip
SOLAR_MOTION = {"u_km_s": 10.0, "v_km_s": 12.0, "w_km_s": 7.0}


def errors_of(resp) -> dict:
    """field -> messages of a 422 problem."""
    assert resp.status_code == 422, resp.get_data(as_text=True)
    assert resp.mimetype == "application/problem+json"
    out: dict = {}
    for e in resp.json["errors"]:
        out.setdefault(e["field"], []).append(e["message"])
    return out


def assert_names(resp, *expected):
    """The problem names every (field, start of its message) of ``expected``."""
    errors = errors_of(resp)
    for field, message in expected:
        assert field in errors, errors
        assert any(m.startswith(message) for m in errors[field]), errors
    return errors


# ------------------------------------------------------------------ /v1/propagation


def test_propagation_correlations_with_a_bad_star(client):
    r = client.post(
        "/v1/propagation",
        json={"stars": [BAD_STAR, PSD_STAR], "catalogue_epoch": 2016.0, "target_epochs": [2020.0]},
    )
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("stars[1].correlation_*", "the correlations do not form a positive semi-definite"),
    )


def test_propagation_no_target_with_a_bad_star(client):
    r = client.post("/v1/propagation", json={"stars": [BAD_STAR], "catalogue_epoch": 2016.0})
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("target_epochs", "give exactly one of target_epochs or target_range"),
    )


def test_propagation_correlation_out_of_range_is_not_judged_again(client):
    # A correlation refused for its own sake (above 1) is not also called impossible.
    star = {**PSD_STAR, "correlation_ra_dec": 1.5}
    r = client.post(
        "/v1/propagation",
        json={"stars": [star], "catalogue_epoch": 2016.0, "target_epochs": [2020.0]},
    )
    assert set(errors_of(r)) == {"stars[0].correlation_ra_dec"}


# ------------------------------------------------------------------ /v1/velocity


def test_velocity_solar_motion_without_lsr_with_a_bad_star(client):
    r = client.post(
        "/v1/velocity", json={"stars": [BAD_VELOCITY_STAR], "solar_motion": SOLAR_MOTION}
    )
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("solar_motion", "is used only with relative_to_lsr true"),
    )


def test_velocity_correlations_with_a_bad_star(client):
    r = client.post("/v1/velocity", json={"stars": [BAD_VELOCITY_STAR, VELOCITY_PSD_STAR]})
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("stars[1].correlation_*", "the correlations of parallax, proper motions"),
    )


def test_observables_solar_motion_without_lsr_with_a_bad_star(client):
    r = client.post(
        "/v1/velocity/observables", json={"stars": [BAD_UVW_STAR], "solar_motion": SOLAR_MOTION}
    )
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("solar_motion", "is used only with relative_to_lsr true"),
    )


# ------------------------------------------------------------------ CSV and Arrow bodies

CSV_BODY = "ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\n400,10,1,1\n40,10,1,\n"


def test_csv_bad_cells_with_a_bad_option(client):
    r = client.post(
        "/v1/propagation?catalogue_epoch=2016&target_epochs=2020&model=fast",
        data=CSV_BODY,
        content_type="text/csv",
    )
    assert_names(
        r,
        ("line 2: ra_deg", "must be between 0 and 360"),
        ("line 3: pm_dec_mas_yr", "is required; the cell is empty"),
        ("model", "must be one of: standard, light_time"),
    )
