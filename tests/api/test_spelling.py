"""An unknown name in a request is answered with the accepted name it most likely stands for.

Field names carry their unit, so the usual slips are the bare quantity ("ra", "parallax")
and typing errors ("target_epoch"); the suggestion must never name a field of another
quantity (pm_ra_mas_yr is not pm_dec_mas_yr) and is left out where two fit alike.
"""

from __future__ import annotations

import json
import pathlib

import pytest

from service.api.app import create_app
from service.api.propagation import StarAstrometrySchema as PropagationStar
from service.api.spelling import closest_name, likely_names

#: The star fields of POST /v1/propagation (id, ra_deg, ..., the 15 correlations).
STAR_FIELDS = list(PropagationStar().fields)
REQUEST_FIELDS = ["stars", "catalogue_epoch", "target_epochs", "target_range", "model", "layout"]


@pytest.mark.parametrize(
    ("given", "likely"),
    [
        ("ra", "ra_deg"),
        ("dec", "dec_deg"),
        ("parallax", "parallax_mas"),
        ("pm_ra", "pm_ra_cosdec_mas_yr"),
        ("pm_ra_mas_yr", "pm_ra_cosdec_mas_yr"),  # not pm_dec_mas_yr, though closer in letters
        ("pm_dec", "pm_dec_mas_yr"),
        ("radial_velocity", "radial_velocity_km_s"),
        ("ra_err", "ra_error_mas"),
        ("paralax_mas", "parallax_mas"),  # a typing error: difflib
        ("RA_DEG", "ra_deg"),
        ("ra_deg", None),  # accepted as it is
        ("mas", None),  # a unit alone is no field's start
        ("pmra", "pm_ra_cosdec_mas_yr"),  # catalogue short forms (common practice)
        ("rv", "radial_velocity_km_s"),
        ("pm", None),
        ("", None),
    ],
)
def test_closest_star_field(given, likely):
    assert closest_name(given, STAR_FIELDS) == likely


# Column names of the Gaia DR3 gaia_source table (Gaia data release documentation, chapter
# "Datamodel description"; the names from memory), which catalogue files often carry.
@pytest.mark.parametrize(
    ("given", "likely"),
    [
        ("pmra", "pm_ra_cosdec_mas_yr"),
        ("pmdec", "pm_dec_mas_yr"),
        ("parallax_error", "parallax_error_mas"),
        ("pmra_error", "pm_ra_cosdec_error_mas_yr"),
        ("radial_velocity_error", "radial_velocity_error_km_s"),
        ("ra_dec_corr", "correlation_ra_dec"),
        ("parallax_pmra_corr", "correlation_parallax_pm_ra"),
        ("pmra_pmdec_corr", "correlation_pm_ra_pm_dec"),
        ("ra_dec_correlation", "correlation_ra_dec"),
        ("dec_parallax_correlation", "correlation_dec_parallax"),
        ("source_id", None),
        ("phot_g_mean_mag", None),
    ],
)
def test_catalogue_column_names(given, likely):
    assert closest_name(given, STAR_FIELDS) == likely


def test_two_alike_get_no_suggestion():
    assert closest_name("target_epoch", REQUEST_FIELDS) == "target_epochs"
    assert closest_name("epoch", REQUEST_FIELDS) is None  # catalogue_epoch or target_epochs?
    assert closest_name("target", REQUEST_FIELDS) is None  # target_epochs or target_range?


FRAMES_REQUEST = ["stars", "catalogue_epoch", "from_frame", "to_frame", "target_epochs"]
OBSERVED_REQUEST = ["stars", "catalogue_epoch", "instants", "site", "atmosphere"]
OBSERVED_REQUEST += ["include_rates", "frame", "instant_range"]


@pytest.mark.parametrize(
    ("given", "accepted", "likely"),
    [
        # two alike are both offered
        ("epoch", REQUEST_FIELDS, ["catalogue_epoch", "target_epochs"]),
        ("Target", REQUEST_FIELDS, ["target_epochs", "target_range"]),
        ("frame", FRAMES_REQUEST, ["from_frame", "to_frame"]),  # was offered to_frame only
        # one as before
        ("from", FRAMES_REQUEST, ["from_frame"]),
        ("epochs", REQUEST_FIELDS, ["target_epochs"]),  # the alias first
        ("target_epoch", REQUEST_FIELDS, ["target_epochs"]),
        # "epoch" on an observed place: the catalogue epoch or the instants (it was offered
        # nothing), and on a request with one epoch field, that one
        ("epoch", OBSERVED_REQUEST, ["catalogue_epoch", "instants"]),
        ("Epoch", ["stars", "catalogue_epoch", "relative_to_lsr"], ["catalogue_epoch"]),
        # the one name holding a word whole, where nothing else is likely (was nothing)
        ("limit", OBSERVED_REQUEST + ["horizon_limit_deg"], ["horizon_limit_deg"]),
        ("method", ["stars", "uncertainty_method", "layout"], ["uncertainty_method"]),
        ("lsr", ["stars", "relative_to_lsr", "solar_motion"], ["relative_to_lsr"]),
        # none for units alone or nothing alike
        ("deg", ["horizon_limit_deg", "sun_avoidance_deg"], []),
        ("colour", REQUEST_FIELDS, []),
    ],
)
def test_likely_names_offer_two_alike(given, accepted, likely):
    assert likely_names(given, accepted) == likely


def test_an_unknown_field_for_two_alike_names_both(client):
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}
    got = messages(client.post("/v1/propagation", json={"stars": [star], "epoch": "J2016.0"}))
    assert got["epoch"] == (
        'is not a field of this request (did you mean "catalogue_epoch" or "target_epochs"?)'
    )
    assert got["catalogue_epoch"] == "is required"  # which was meant is not known


@pytest.mark.parametrize(
    ("given", "accepted", "likely"),
    [
        # the only name that begins with the given words, whole
        ("from", ["stars", "from_frame", "to_frame"], "from_frame"),
        ("to", ["stars", "from_frame", "to_frame"], "to_frame"),
        ("monte_carlo", ["monte_carlo_draws", "seed"], "monte_carlo_draws"),
        ("sun", ["sun_avoidance_deg", "horizon_limit_deg"], "sun_avoidance_deg"),
        ("fro", ["from_frame", "to_frame"], None),  # a part of a word is not enough
        # units of the request fields: arcsec and px
        ("near_boundary", ["near_boundary_arcsec", "epoch"], "near_boundary_arcsec"),
        ("width", ["width_px", "title"], "width_px"),
    ],
)
def test_the_only_name_that_begins_with_the_given_words(given, accepted, likely):
    assert closest_name(given, accepted) == likely


@pytest.mark.parametrize(
    ("given", "accepted", "likely"),
    [
        # other words for the same role
        ("times", OBSERVED_REQUEST, "instants"),
        ("date", OBSERVED_REQUEST, "instants"),
        ("times", REQUEST_FIELDS, "target_epochs"),
        ("epochs", REQUEST_FIELDS, "target_epochs"),
        ("epochs", OBSERVED_REQUEST, "instants"),
        ("reference_epoch", REQUEST_FIELDS, "catalogue_epoch"),
        ("observatory", OBSERVED_REQUEST, "site"),
        ("weather", OBSERVED_REQUEST, "atmosphere"),
        ("rates", OBSERVED_REQUEST, "include_rates"),
        ("image_format", ["stars", "format", "width_px"], "format"),
        ("positions", ["stars", "epoch", "frame"], "stars"),  # every table is "stars"
        # a range's members at the top level: the range ("start" was offered "stars")
        ("start", REQUEST_FIELDS, "target_range"),
        ("count", REQUEST_FIELDS, "target_range"),
        ("start_epoch", REQUEST_FIELDS, "target_range"),  # was offered "target_epochs"
        ("start_epoch", ["stars", "catalogue_epoch", "start", "end"], "start"),
        ("stop_epoch", ["stars", "catalogue_epoch", "start", "end"], "end"),
        ("Catalog", REQUEST_FIELDS, "stars"),
        # a range of instants: its members, and "instant" for the list
        ("start", OBSERVED_REQUEST, "instant_range"),
        ("time_range", OBSERVED_REQUEST, "instant_range"),
        ("end_time", OBSERVED_REQUEST, "instant_range"),
        ("instant", OBSERVED_REQUEST, "instants"),
        # none where the request takes no field of that role
        ("observatory", REQUEST_FIELDS, None),
        ("weather", STAR_FIELDS, None),
    ],
)
def test_other_words_for_the_same_role(given, accepted, likely):
    assert closest_name(given, accepted) == likely


def test_a_required_field_an_unknown_name_stands_for_is_not_called_missing_too(client):
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}
    body = {"stars": [star], "catalogue_epoch": "B1950.0", "from": "fk4", "to": "icrs"}
    got = messages(client.post("/v1/frames", json=body))
    assert got == {  # (from_frame is required; to_frame is ICRS unless given)
        "from": 'is not a field of this request (did you mean "from_frame"?)',
        "to": 'is not a field of this request (did you mean "to_frame"?)',
    }
    # a required field no unknown name stands for is still called missing
    body = {"stars": [star], "catalogue_epoch": "J2016.0", "instant": ["now"]}
    got = messages(client.post("/v1/observed", json=body))
    assert got == {
        "instant": 'is not a field of this request (did you mean "instants"?)',
        "site": "is required",
    }


def test_a_check_of_two_fields_keeps_quiet_about_one_an_unknown_name_stands_for(client):
    """ "target_epoch" (or "range") for the target, "catalog_epoch" for a lookup's epoch: the
    name's message says which field it is; the check that one of two fields is given ("give
    exactly one of target_epochs or target_range") or that a field comes with another ("give
    catalogue_epoch ... with epoch") no longer calls it missing as well."""
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}
    base = {"stars": [star], "catalogue_epoch": "J2016.0"}
    for name, value, meant in [("target_epoch", "J2030.0", "target_epochs"),
                               ("range", {"start": 2016.0}, "target_range")]:  # fmt: skip
        got = messages(client.post("/v1/propagation", json=dict(base, **{name: value})))
        assert got == {name: f'is not a field of this request (did you mean "{meant}"?)'}
    # with no such name, and with both given, the check speaks as before
    for body in (base, dict(base, target_epochs=[2030.0], target_range={
            "start": 2016.0, "stop": 2030.0, "count": 3})):  # fmt: skip
        got = messages(client.post("/v1/propagation", json=body))
        assert got == {"target_epochs": "give exactly one of target_epochs or target_range"}
    lookup = {"stars": [star], "epoch": "J2100.0"}
    got = messages(client.post("/v1/constellations/lookup", json=dict(lookup, catalog_epoch=2016)))
    assert got == {
        "catalog_epoch": 'is not a field of this request (did you mean "catalogue_epoch"?)'
    }
    got = messages(client.post("/v1/constellations/lookup", json=lookup))
    assert got == {
        "catalogue_epoch": "give catalogue_epoch (the epoch of the positions) with epoch"
    }


def test_an_epoch_given_alone_where_a_list_is_taken_is_shown_the_list_form(client):
    """ "target_epochs": "J2030.0" was answered "must be a list" (marshmallow's words): the
    answer shows the list's form, on every request that takes a list of epochs."""
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}
    base = {"stars": [star], "catalogue_epoch": "J2016.0"}
    one_epoch = 'must be a list, such as ["J2030.0"] for one epoch'
    for path, body, expected in [
        ("/v1/propagation", dict(base, target_epochs="J2030.0"), {"target_epochs": one_epoch}),
        ("/v1/frames", dict(base, from_frame="icrs", target_epochs=2030.0),
         {"target_epochs": one_epoch}),
        ("/v1/observed", dict(base, site="kestrel-ridge", instants="now"),
         {"instants": 'must be a list, such as ["now"] for one instant'}),
        ("/v1/charts/field", dict(base, epochs="J2100.0"),
         {"epochs": 'must be a list, such as ["J2016.0", "J2100.0"]'}),
    ]:  # fmt: skip
        assert messages(client.post(path, json=body)) == expected, path


@pytest.fixture(scope="module")
def client():
    return create_app().test_client()


STAR = {"ra_deg": 10.0, "dec_deg": 41.0, "pm_ra_cosdec_mas_yr": 30.0, "pm_dec_mas_yr": -20.0}


def messages(r) -> dict:
    assert r.status_code == 422, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    return {e["field"]: e["message"] for e in r.json["errors"]}


def test_star_record_field(client):
    star = {k: v for k, v in STAR.items() if k != "ra_deg"} | {"ra": 10.0}
    body = {"stars": [star], "catalogue_epoch": "J2016.0", "target_epochs": ["J2020.0"]}
    got = messages(client.post("/v1/propagation", json=body))
    assert got["stars[0].ra"].startswith('unknown field (did you mean "ra_deg"?); accepted')


def test_star_column_and_csv_header(client):
    cols = {k: [v] for k, v in STAR.items()} | {"parallax": [3.0]}
    body = {"stars": cols, "catalogue_epoch": "J2016.0", "target_epochs": ["J2020.0"]}
    got = messages(client.post("/v1/propagation", json=body))
    assert got["stars.parallax"].startswith('unknown field (did you mean "parallax_mas"?)')
    csv = "ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec,parallax_mas\n10,41,30,-20,3\n"
    r = client.post(
        "/v1/propagation?catalogue_epoch=J2016.0&target_epochs=J2020.0",
        data=csv,
        content_type="text/csv",
    )
    got = messages(r)
    assert got["line 1: pm_dec"].startswith('unknown field (did you mean "pm_dec_mas_yr"?)')


def test_request_and_nested_fields(client):
    body = {
        "stars": [STAR],
        "catalogue_epoch": "J2016.0",
        "target_range": {"start": 2016.0, "stopp": 2030.0, "count": 3},
    }
    got = messages(client.post("/v1/propagation", json=body))
    assert got["target_range.stopp"] == 'is not a field of this request (did you mean "stop"?)'
    body = {"stars": [STAR], "catalogue_epoch": "J2016.0", "target_epoch": "J2020.0"}
    got = messages(client.post("/v1/propagation", json=body))
    assert got["target_epoch"] == 'is not a field of this request (did you mean "target_epochs"?)'
    body = {
        "stars": [STAR],
        "catalogue_epoch": "J2016.0",
        "instants": ["2026-12-03T00:00:00Z"],
        "site": {"latitude": 38.4, "longitude_deg": -7.6},
        "atmosphere": {"pressure": 850.0},
    }
    got = messages(client.post("/v1/observed", json=body))
    assert got["site.latitude"].startswith('unknown field (did you mean "latitude_deg"?)')
    assert got["atmosphere.pressure"] == (
        'is not a field of this request (did you mean "pressure_hpa"?)'
    )


def test_window_end_and_stop(client):
    # The crossing search's window ends at "end", a track chart's span at "stop".
    body = {"stars": [STAR], "catalogue_epoch": "J2016.0", "start": "J2016.0", "stop": "J2100.0"}
    got = messages(client.post("/v1/constellations/crossings", json=body))
    assert got["stop"] == 'is not a field of this request (did you mean "end"?)'
    body = {"stars": [STAR], "catalogue_epoch": "J2016.0", "start": "J2016.0", "end": "J2100.0"}
    got = messages(client.post("/v1/charts/track", json=body))
    assert got["end"] == 'is not a field of this request (did you mean "stop"?)'


def test_query_option(client):
    got = messages(client.get("/v1/constellations/outlines?fram=icrs"))
    assert got["fram"] == 'is not a field of this request (did you mean "frame"?)'


def test_no_likely_name_keeps_the_plain_words(client):
    body = {"stars": [STAR], "catalogue_epoch": "J2016.0", "target_epochs": [2020.0], "zz": 1}
    got = messages(client.post("/v1/propagation", json=body))
    assert got["zz"] == "is not a field of this request (check the spelling)"


def _star_record_names(schema: str) -> list[str]:
    """The fields of a star record, as the committed OpenAPI document lists them."""
    doc = json.loads((pathlib.Path(__file__).parents[2] / "openapi" / "openapi.json").read_text())
    return list(doc["components"]["schemas"][schema]["properties"])


@pytest.mark.parametrize(
    ("path", "schema", "body"),
    [
        ("/v1/propagation", "StarAstrometry",
         {"catalogue_epoch": "J2016.0", "target_epochs": ["J2020.0"]}),
        ("/v1/velocity", "VelocityStar", {}),
    ],
)  # fmt: skip
def test_accepted_fields_listed_whole_and_once(client, path, schema, body):
    # The longest tables (28 and 30 fields with their errors and correlations): the list
    # is not cut short, and with several unknown columns (a catalogue file brings many) it
    # is given with the first only.
    star = STAR | {"colour": 1.0, "zz_extra": 2.0, "paralax_mas": 3.0}
    got = messages(client.post(path, json={"stars": [star], **body}))
    first = got["stars[0].colour"]
    # A name like no accepted one is told how to leave it unread; a likely misspelling is
    # told the name it stands for, and nothing about leaving it unread.
    unplaced = "unknown field (to leave it unread, list it in ignored_columns)"
    assert first.startswith(unplaced + "; accepted fields: ")
    listed = first.removeprefix(unplaced + "; accepted fields: ").split(", ")
    assert sorted(listed) == sorted(_star_record_names(schema))  # the document sorts them
    assert got["stars[0].paralax_mas"] == 'unknown field (did you mean "parallax_mas"?)'
    assert got["stars[0].zz_extra"] == unplaced


def test_many_unknown_columns_give_a_small_answer(client):
    # 150 unknown columns: the first 50 named (the table's own cap), the rest counted.
    cols = {k: [v] for k, v in STAR.items()} | {f"extra_{k:03d}": [1.0] for k in range(150)}
    body = {"stars": cols, "catalogue_epoch": "J2016.0", "target_epochs": ["J2020.0"]}
    r = client.post("/v1/propagation", json=body)
    got = messages(r)
    assert sum(m.startswith("unknown field") for m in got.values()) == 50
    assert sum("accepted fields" in m for m in got.values()) == 1
    assert got["stars.(more)"] == "100 further invalid values not listed"
    assert len(r.get_data()) < 16_000


def test_a_column_other_endpoints_take_is_said_to_be_one(client):
    # The demo catalogue's standard errors and correlations are spelt right, for the
    # propagation and velocity tables; sent for a constellation lookup or an observed
    # place they are refused as columns other endpoints take, not as likely misspellings of
    # a look-alike ("parallax_error_mas" is near "parallax_mas": renaming it would put the
    # errors in the parallax's place).
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "parallax_error_mas": 0.1, "vmag": 5.0}
    star |= {"correlation_ra_dec": 0.2, "paralax_mas": 3.0}
    got = messages(client.post("/v1/constellations/lookup", json={"stars": [star]}))
    here = "unknown field here, though other endpoints take it"
    unread = " (to leave it unread, list it in ignored_columns)"
    # (the first unknown column also lists the accepted fields)
    assert got["stars[0].parallax_error_mas"].startswith(here + unread)
    assert got["stars[0].correlation_ra_dec"].startswith(here + unread)
    # a name no table takes, and a misspelling, are told as before
    assert got["stars[0].vmag"].startswith("unknown field" + unread)
    assert got["stars[0].paralax_mas"].startswith('unknown field (did you mean "parallax_mas"?)')
    # the same names are accepted where they are taken
    body = {"stars": [STAR | {"parallax_error_mas": 0.1, "correlation_ra_dec": 0.2}]}
    body |= {"catalogue_epoch": "J2016.0", "target_epochs": ["J2020.0"]}
    assert client.post("/v1/propagation", json=body).status_code == 200


def test_a_column_other_endpoints_take_is_recognised_misspelt_or_in_capitals(client):
    # Matched among the columns of every endpoint, a name in other letter case or with a
    # typing error is told the other endpoints' column it stands for, not a look-alike of
    # this endpoint's ("Parallax_Error_Mas" was answered: did you mean "parallax_mas"?).
    star = {"ra_deg": 10.0, "dec_deg": 20.0, "Parallax_Error_Mas": 0.1, "pmra_error": 0.2}
    star |= {"ra_dec_corr": 0.1, "paralax_mas": 3.0, "V": 5.1}
    got = messages(client.post("/v1/constellations/lookup", json={"stars": [star]}))
    other = 'unknown field here; it looks like "{}", which other endpoints take'
    unread = " (to leave it unread, list it in ignored_columns)"
    expected = {
        "Parallax_Error_Mas": "parallax_error_mas",
        "pmra_error": "pm_ra_cosdec_error_mas_yr",
        "ra_dec_corr": "correlation_ra_dec",
    }
    for given, taken in expected.items():
        assert got[f"stars[0].{given}"].startswith(other.format(taken) + unread)
    # this endpoint's own columns are still offered for their misspellings
    assert got["stars[0].paralax_mas"].startswith('unknown field (did you mean "parallax_mas"?)')
    # one letter is too little to tell: "V" in a catalogue is usually a magnitude, not the
    # velocity component the kinematics endpoints take as v_km_s
    assert got["stars[0].V"].startswith("unknown field" + unread)
    # where "V" is one of the table's own look-alikes, the hint stays
    body = {"stars": [{"ra_deg": 1.0, "dec_deg": 2.0, "parallax_mas": 10.0, "U": 1, "V": 2}]}
    got = messages(client.post("/v1/velocity/observables", json=body))
    assert got["stars[0].V"] == 'unknown field (did you mean "v_km_s"?)'


def test_a_misspelt_error_column_is_not_offered_as_the_value_it_is_the_error_of(client):
    # "distance_err" is the other endpoints' distance_error_pc: offering this table's
    # distance_pc (as before) would invite the client to send the error as the distance.
    body = {"stars": [{"ra_deg": 1.0, "dec_deg": 2.0, "distance_err": 3.0}]}
    body["stars"][0] |= {"u_km_s": 1.0, "v_km_s": 2.0, "w_km_s": 3.0}
    got = messages(client.post("/v1/velocity/observables", json=body))
    assert got["stars[0].distance_err"].startswith(
        'unknown field here; it looks like "distance_error_pc", which other endpoints take'
    )
    assert "did you mean" not in got["stars[0].distance_err"]
