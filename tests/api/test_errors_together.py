"""Every invalid field of a request named in one answer.

Each request below has an error that the schema finds in a field of its own (a star's
ra_deg of 400, a tolerance below its range) and one that a check of several values
together finds (a window, a frame's equinox, correlations that cannot all hold). Both must
be in the same 422 problem, under the paths and in the words each has alone: a client
that fixes the first must not meet the second only in the next round.
"""

import io

import pyarrow as pa
import pytest

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


# ------------------------------------------------------------------ /v1/frames


@pytest.mark.parametrize(
    ("frames", "field", "message"),
    [
        ({"from_frame": {"name": "galactic", "equinox": 2000}}, "from_frame.equinox",
         "frame galactic takes no equinox"),
        ({"from_frame": {"name": "fk5", "equinox": "of_date"}}, "from_frame.equinox",
         "equinox 'of_date' is for the ecliptic frame only"),
        ({"from_frame": {"name": "icrs"}, "to_frame": {"name": "fk4", "equinox": 50}},
         "to_frame.equinox", "equinox must be between 1000 and 3000"),
    ],
)  # fmt: skip
def test_frames_equinox_with_a_bad_star(client, frames, field, message):
    r = client.post("/v1/frames", json={"stars": [BAD_STAR], "catalogue_epoch": 2016.0, **frames})
    assert_names(r, ("stars[0].ra_deg", "must be between 0 and 360"), (field, message))


# ------------------------------------------------------------------ /v1/constellations


@pytest.mark.parametrize("endpoint", ["lookup", "margins"])
def test_half_proper_motion_with_a_bad_star(client, endpoint):
    r = client.post(f"/v1/constellations/{endpoint}", json={"stars": [BAD_STAR, HALF_MOTION_STAR]})
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("stars[1].pm_dec_mas_yr", "is missing while pm_ra_cosdec_mas_yr is given"),
    )


def test_half_proper_motion_and_bad_position_of_one_star(client):
    star = {**HALF_MOTION_STAR, "dec_deg": 95.0}
    r = client.post("/v1/constellations/lookup", json={"stars": {k: [v] for k, v in star.items()}})
    assert_names(
        r,
        ("stars.dec_deg[0]", "must be between -90 and 90"),
        ("stars.pm_dec_mas_yr[0]", "is missing while pm_ra_cosdec_mas_yr is given"),
    )


def test_proper_motion_out_of_range_is_not_called_missing(client):
    # pm_dec given but refused for its own sake: not "missing while pm_ra is given".
    star = {**STAR, "pm_dec_mas_yr": 1e11}
    r = client.post("/v1/constellations/lookup", json={"stars": [star]})
    assert set(errors_of(r)) == {"stars[0].pm_dec_mas_yr"}
    assert len(r.json["errors"]) == 1


def test_lookup_near_boundary_with_a_bad_star(client):
    r = client.post(
        "/v1/constellations/lookup", json={"stars": [BAD_STAR], "near_boundary_arcsec": 5.0}
    )
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("near_boundary_arcsec", "is an option of /v1/constellations/margins"),
    )


def test_lookup_epoch_without_catalogue_epoch_with_a_bad_star(client):
    r = client.post("/v1/constellations/lookup", json={"stars": [BAD_STAR], "epoch": 2000.0})
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("catalogue_epoch", "give catalogue_epoch (the epoch of the positions) with epoch"),
    )


def test_lookup_bad_catalogue_epoch_is_not_called_missing(client):
    r = client.post(
        "/v1/constellations/lookup",
        json={"stars": [STAR], "epoch": 2000.0, "catalogue_epoch": "soon"},
    )
    errors = errors_of(r)
    assert list(errors) == ["catalogue_epoch"] and len(errors["catalogue_epoch"]) == 1
    assert errors["catalogue_epoch"][0].startswith("cannot read epoch")


def test_lookup_frame_equinox_with_a_bad_star(client):
    r = client.post(
        "/v1/constellations/lookup",
        json={"stars": [BAD_STAR], "frame": {"name": "galactic", "equinox": 2000}},
    )
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("frame.equinox", "frame galactic takes no equinox"),
    )


@pytest.mark.parametrize(
    ("window", "field", "message"),
    [
        ({"start": 2100.0, "end": 2050.0}, "end", "must be later than start"),
        ({"start": 2100.0, "end": "J150000.0"}, "end",
         "must be within 100000 years of catalogue_epoch"),
        ({"start": 2000.0, "end": 2050.0, "max_step_yr": 1e-4}, "max_step_yr",
         "must be at least 1 day"),
        ({"start": "J-90000.0", "end": "J90000.0", "max_step_yr": 0.003}, "max_step_yr",
         "too small for the window: more than 10**6 steps"),
    ],
)  # fmt: skip
def test_crossings_window_with_a_bad_star(client, window, field, message):
    r = client.post(
        "/v1/constellations/crossings",
        json={"stars": [BAD_STAR], "catalogue_epoch": 2000.0, **window},
    )
    assert_names(r, ("stars[0].ra_deg", "must be between 0 and 360"), (field, message))


@pytest.mark.parametrize(
    ("path", "query", "message"),
    [
        ("/v1/constellations/Tau/outline", "frame=galactic&equinox=2000",
         "only for frame fk5 or fk4"),
        ("/v1/constellations/outlines", "frame=fk5&equinox=900", "must be between 1000 and 3000"),
    ],
)  # fmt: skip
def test_outline_equinox_with_a_bad_tolerance(client, path, query, message):
    r = client.get(f"{path}?{query}&tolerance_arcsec=-1")
    assert_names(r, ("tolerance_arcsec", "must be between 0.001 and 60"), ("equinox", message))


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


# ------------------------------------------------------------------ /v1/charts


@pytest.mark.parametrize(
    ("span", "field", "message"),
    [
        ({"start": 2100.0, "stop": 2050.0}, "stop", "must be later than start"),
        ({"start": "J-190000.0", "stop": "J15000.0", "boundaries": False}, "stop",
         "at most 200,000 years after start"),
        ({"start": 2000.0, "stop": "J150000.0"}, "stop", "must be within 100,000 years"),
    ],
)  # fmt: skip
def test_track_span_with_a_bad_star(client, span, field, message):
    r = client.post(
        "/v1/charts/track", json={"stars": [BAD_STAR], "catalogue_epoch": 2000.0, **span}
    )
    assert_names(r, ("stars[0].ra_deg", "must be between 0 and 360"), (field, message))


def test_track_span_reversed_and_outside_the_crossing_window(client):
    # A reversed span does not hide that its start is too far from the catalogue epoch for
    # the boundaries' crossing search (nor the other way round).
    r = client.post(
        "/v1/charts/track",
        json={"stars": [STAR], "catalogue_epoch": 2000.0, "start": "J150000.0", "stop": 2100.0},
    )
    assert_names(
        r,
        ("stop", "must be later than start"),
        ("start", "must be within 100,000 years of catalogue_epoch"),
    )


@pytest.mark.parametrize(
    ("path", "options"),
    [
        ("/v1/charts/track", {"start": 2000.0, "stop": 2100.0}),
        ("/v1/charts/field", {"epochs": [2000.0, 2100.0]}),
    ],
)
def test_chart_id_not_drawable_with_a_bad_star(client, path, options):
    stars = [BAD_STAR, {**STAR, "id": "KV\x01"}]
    r = client.post(path, json={"stars": stars, "catalogue_epoch": 2000.0, **options})
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("stars[1].id", "must not contain control characters"),
    )


def test_field_chart_same_epochs_with_a_bad_star(client):
    r = client.post(
        "/v1/charts/field",
        json={"stars": [BAD_STAR], "catalogue_epoch": 2000.0, "epochs": [2000.0, 2000.0]},
    )
    assert_names(
        r,
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("epochs", "the two epochs must differ"),
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


def test_csv_half_proper_motion_with_a_bad_option(client):
    r = client.post(
        "/v1/constellations/lookup?near_boundary_arcsec=3", data=CSV_BODY, content_type="text/csv"
    )
    assert_names(
        r,
        ("line 2: ra_deg", "must be between 0 and 360"),
        ("line 3: pm_dec_mas_yr", "is missing while pm_ra_cosdec_mas_yr is given"),
        ("near_boundary_arcsec", "is an option of /v1/constellations/margins"),
    )


def test_arrow_half_proper_motion_with_a_bad_option(client):
    table = pa.table(
        {
            "ra_deg": [400.0, 40.0],
            "dec_deg": [10.0, 10.0],
            "pm_ra_cosdec_mas_yr": [1.0, 1.0],
            "pm_dec_mas_yr": [1.0, None],
        }
    )
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    r = client.post(
        "/v1/constellations/lookup?near_boundary_arcsec=3",
        data=sink.getvalue(),
        content_type="application/vnd.apache.arrow.stream",
    )
    assert_names(
        r,
        ("stars.ra_deg[0]", "must be between 0 and 360"),
        ("stars.pm_dec_mas_yr[1]", "is missing while pm_ra_cosdec_mas_yr is given"),
        ("near_boundary_arcsec", "is an option of /v1/constellations/margins"),
    )


@pytest.mark.parametrize(
    ("epochs", "field"), [([2000.0, "zz"], "epochs[1]"), ([2000.0, "zz", 2000.0], "epochs[1]")]
)
def test_field_chart_epochs_judged_only_when_read(client, epochs, field):
    # marshmallow keeps the epochs read of a list with one refused: they are not compared
    # (a list of one would fail the comparison, one of two left of three would call them
    # equal).
    r = client.post(
        "/v1/charts/field", json={"stars": [STAR], "catalogue_epoch": 2000.0, "epochs": epochs}
    )
    errors = errors_of(r)
    assert field in errors and "epochs" not in errors, errors


# ------------------------------------------------------------------ unknown star fields


def _propagate(client, stars):
    """POST /v1/propagation of ``stars`` (records or columns) from J2016.0 to J2020.0."""
    return client.post(
        "/v1/propagation",
        json={"stars": stars, "catalogue_epoch": 2016.0, "target_epochs": [2020.0]},
    )


def _arrow_bytes(columns: dict) -> bytes:
    table = pa.table(columns)
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


def test_unknown_star_field_with_bad_values_in_every_form(client):
    # An unknown field is named beside the values refused in the same table: its name and
    # a value out of range in one answer, records, columns, CSV and Arrow alike.
    query = "/v1/propagation?catalogue_epoch=2016&target_epochs=2020"
    records = [{**BAD_STAR, "colour": 1.2}, {**STAR, "dec_deg": -95.0}]
    r = _propagate(client, records)
    errors = assert_names(
        r,
        ("stars[0].colour", "unknown field"),
        ("stars[0].ra_deg", "must be between 0 and 360"),
        ("stars[1].dec_deg", "must be between -90 and 90"),
    )
    assert len(errors) == 3, errors
    columns = {k: [v, v] for k, v in STAR.items()} | {"dec_deg": [10.0, 95.0], "colour": [1, 2]}
    r = _propagate(client, columns)
    assert_names(
        r, ("stars.colour", "unknown field"), ("stars.dec_deg[1]", "must be between -90 and 90")
    )
    csv = "ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr,colour\n400,10,1,1,0.5\n"
    r = client.post(query, data=csv, content_type="text/csv")
    assert_names(
        r, ("line 1: colour", "unknown field"), ("line 2: ra_deg", "must be between 0 and 360")
    )
    arrow = _arrow_bytes({**{k: [v] for k, v in BAD_STAR.items()}, "colour": [0.5]})
    r = client.post(query, data=arrow, content_type="application/vnd.apache.arrow.stream")
    assert_names(
        r, ("stars.colour", "unknown field"), ("stars.ra_deg[0]", "must be between 0 and 360")
    )


def test_misspelled_required_field_is_named_once(client):
    # "ra" is taken to stand for ra_deg (the message says so): ra_deg is not also called
    # required, and the other values are still judged.
    star = {"ra": 40.0, "dec_deg": 95.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 1.0}
    r = _propagate(client, [star])
    errors = assert_names(
        r,
        ("stars[0].ra", 'unknown field (did you mean "ra_deg"?)'),
        ("stars[0].dec_deg", "must be between -90 and 90"),
    )
    assert set(errors) == {"stars[0].ra", "stars[0].dec_deg"}, errors
    # Another required field that no given name stands for is still called required.
    star = {"ra": 40.0, "dec_deg": 10.0, "pm_ra_cosdec_mas_yr": 1.0}
    r = _propagate(client, [star])
    errors = assert_names(r, ("stars[0].pm_dec_mas_yr", "is required"))
    assert "stars[0].ra_deg" not in errors, errors


def test_misspelled_correlation_is_not_judged_without_it(client):
    # With correlation_dec_parallax misspelled, the two correlations left would be judged
    # as a matrix [[1, .9, -.9], [.9, 1, 0], [-.9, 0, 1]] (determinant 1 - 2 (.81) < 0)
    # that the client never meant: only the name is refused.
    star = {k: v for k, v in PSD_STAR.items() if k != "correlation_dec_parallax"}
    star["correlation_dec_parallx"] = 0.9
    r = _propagate(client, [star])
    errors = assert_names(
        r, ("stars[0].correlation_dec_parallx", 'unknown field (did you mean "correlation_dec')
    )
    assert len(errors) == 1, errors
    # Without the misspelled one, the two left are judged (and refused) as given.
    star = {k: v for k, v in PSD_STAR.items() if k != "correlation_dec_parallax"}
    r = _propagate(client, [star])
    assert_names(r, ("stars[0].correlation_*", "the correlations do not form"))


def test_columns_of_unequal_length_with_an_unknown_column(client):
    # The shape of the table and an unknown column in one answer; the unknown column's own
    # length is not judged.
    columns = {"ra_deg": [40.0, 41.0], "dec_deg": [10.0], "pm_ra_cosdec_mas_yr": [1.0, 1.0],
               "pm_dec_mas_yr": [1.0, 1.0], "colour": [1.0, 2.0, 3.0]}  # fmt: skip
    r = _propagate(client, columns)
    errors = assert_names(
        r,
        ("stars.colour", "unknown field"),
        ("stars.dec_deg", "has 1 value where ra_deg has 2"),
    )
    assert set(errors) == {"stars.colour", "stars.dec_deg"}, errors
