"""CSV in (text/csv bodies) and out (Accept: text/csv) on the star-table endpoints."""

import csv
import io

import pytest

from tests.conftest import DEMO, DEMO_OPTIONS, DEMO_QUERY, propagation_rows, table_endpoint_cases

URL = "/v1/propagation"
QUERY = DEMO_QUERY
HEADER = "id,ra_deg,dec_deg,parallax_mas,pm_ra_cosdec_mas_yr,pm_dec_mas_yr,radial_velocity_km_s"


@pytest.fixture(scope="module")
def demo_csv():
    return (DEMO / "catalogue.csv").read_text()


def post_csv(client, body, query=QUERY, accept="application/json"):
    return client.post(
        URL + query,
        data=body.encode() if isinstance(body, str) else body,
        content_type="text/csv",
        headers={"Accept": accept},
    )


def rows_of(text):
    return list(csv.DictReader(io.StringIO(text)))


def problem_fields(r, status=422):
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    return [(e["field"], e["message"]) for e in r.json.get("errors", [])]


def test_demo_csv_file_is_the_json_catalogue(demo_csv, demo_catalogue):
    # The committed CSV must hold exactly the numbers of the JSON catalogue.
    rows = rows_of(demo_csv)
    assert len(rows) == len(demo_catalogue["stars"])
    for row, star in zip(rows, demo_catalogue["stars"], strict=True):
        for k, v in row.items():
            expected = star.get(k)
            if expected is None:
                assert v == ""
            elif k == "id":
                assert v == expected
            else:
                assert float(v) == expected


def test_csv_round_trip_equals_json_answer(client, demo_csv, demo_request):
    """Demo catalogue through CSV in and CSV out holds exactly the JSON endpoint's numbers."""
    body = demo_request
    js = client.post(URL, json=body).json
    r = post_csv(client, demo_csv, accept="text/csv")
    assert r.status_code == 200
    assert r.mimetype == "text/csv"
    assert "Accept" in r.headers["Vary"]
    rows = rows_of(r.get_data(as_text=True))
    expected = propagation_rows(js)
    assert len(rows) == len(expected)
    for row, want in zip(rows, expected, strict=True):
        assert int(row.pop("index")) == want.pop("index")
        assert float(row.pop("epoch_julian_tdb")) == want.pop("epoch_julian_tdb")
        flags = row.pop("flags")
        assert (flags.split(";") if flags else []) == want.pop("flags")
        for name, value in want.items():
            if value is None:
                assert row.get(name, "") == "", name
            elif name in ("id", "epoch_iso_utc"):
                assert row[name] == value, name
            else:
                assert float(row[name]) == value, name  # exact: shortest repr


def test_csv_body_gives_the_same_json_as_a_json_body(client, demo_csv, demo_request):
    body = demo_request
    # A CSV body answers in the columns layout by default; the numbers are the same.
    as_columns = post_csv(client, demo_csv).json
    assert as_columns["layout"] == "columns"
    assert as_columns == client.post(URL, json=dict(body, layout="columns")).json
    assert (
        post_csv(client, demo_csv, QUERY + "&layout=records").json
        == client.post(URL, json=body).json
    )


def test_columns_layout_gives_the_same_csv(client, demo_csv):
    rec = post_csv(client, demo_csv, accept="text/csv").get_data(as_text=True)
    col = post_csv(client, demo_csv, QUERY + "&layout=columns", accept="text/csv")
    assert col.get_data(as_text=True) == rec


def test_csv_answer_to_a_json_body(client):
    body = {
        "stars": [
            {
                "id": 7,
                "ra_deg": 1.0,
                "dec_deg": 2.0,
                "pm_ra_cosdec_mas_yr": 0.0,
                "pm_dec_mas_yr": 0.0,
            }
        ],
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["J2016.0"],
    }
    r = client.post(URL, json=body, headers={"Accept": "text/csv"})
    rows = rows_of(r.get_data(as_text=True))
    assert rows[0]["id"] == "7"
    assert float(rows[0]["ra_deg"]) == pytest.approx(1.0, abs=1e-12)  # no elapsed time
    # No star has uncertainties: no uncertainty columns at all; unknowns are empty cells.
    assert "ra_error_mas" not in rows[0]
    assert rows[0]["parallax_mas"] == ""
    assert rows[0]["flags"] == "parallax_missing;radial_velocity_missing"


def test_ids_keep_their_blanks_numbers_lose_theirs(client):
    """An identifier is text: Python's csv module reads the cell '"  HX 12 "' as "  HX 12 ",
    and the JSON body with that id answers it unchanged, so a CSV body must too (the
    service's own CSV answer writes it so). Blanks around a number are no part of it."""
    ids = ["  HX 12 ", "HX 12", " 7"]
    body = HEADER + "\n" + "".join(
        f'"{i}", {10 + k} ,5,,1, 1,\n' for k, i in enumerate(ids)
    )  # fmt: skip
    assert [row[0] for row in csv.reader(io.StringIO(body))][1:] == ids  # the reference
    r = post_csv(client, body, accept="text/csv")
    assert r.status_code == 200, r.get_data(as_text=True)
    rows = rows_of(r.get_data(as_text=True))
    assert [row["id"] for row in rows[::2]] == ids
    assert [float(row["pm_dec_mas_yr"]) for row in rows[::2]] == pytest.approx([1.0] * 3, abs=1e-6)
    stars = [
        {"id": i, "ra_deg": 10.0 + k, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0,
         "pm_dec_mas_yr": 1.0}
        for k, i in enumerate(ids)
    ]  # fmt: skip
    js = client.post(URL, json={"stars": stars, **DEMO_OPTIONS, "layout": "columns"}).json
    assert post_csv(client, body).json["columns"]["id"] == js["columns"]["id"] == ids


def test_json_stays_the_default(client, demo_csv):
    assert post_csv(client, demo_csv, accept="*/*").mimetype == "application/json"


def test_bad_cell_reported_with_its_line(client):
    lines = [HEADER] + [f"S{k},{10 + k},5,,1,1," for k in range(8)]
    lines[6] = "S5,15,95,,1,1,"  # line 7 of the file (the header is line 1)
    r = post_csv(client, "\n".join(lines) + "\n")
    assert problem_fields(r) == [("line 7: dec_deg", "must be between -90 and 90")]


def test_cells_with_other_digits_or_underscores_are_refused(client):
    # Python's float() reads "2_0" as 20, the Arabic-Indic "٣٥" as 35 and the full-width
    # "３" as 3: a CSV cell must be written in ASCII digits, as JSON numbers are.
    body = HEADER + "\nA,10,5,,1,1,\nB,\u0663\u0665,2_0,,\uff13,1,\nC,10,5,,1,1,\n"
    message = "must be a number written with ASCII digits and no underscores"
    assert problem_fields(post_csv(client, body)) == [
        ("line 3: ra_deg", message),
        ("line 3: dec_deg", message),
        ("line 3: pm_ra_cosdec_mas_yr", message),
    ]


def test_line_numbers_count_blank_lines_and_errors_come_in_file_order(client):
    body = "\n".join([HEADER, "A,10,5,,1,1,", "", "B,x,5,,1,1,", "C,10,-91,,1,1,9e9"]) + "\n"
    fields = problem_fields(post_csv(client, body))
    assert fields[0] == ("line 4: ra_deg", "must be a number (in the unit of the column name)")
    assert ("line 5: dec_deg", "must be between -90 and 90") in fields
    assert [f for f, _ in fields] == sorted(
        (f for f, _ in fields), key=lambda f: int(f.split(":")[0][5:])
    )
    assert any(f == "line 5: radial_velocity_km_s" for f, _ in fields)


@pytest.mark.parametrize(
    ("body", "expected"),
    [
        (HEADER + ",colour\nA,10,5,,1,1,,red\n", "line 1: colour"),
        ("id,ra_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\nA,10,1,1\n", "line 1: dec_deg"),
        (HEADER + "\nA,10,5,,1,1\n", "line 2"),
        ("id,ra_deg,ra_deg\nA,1,2\n", "line 1: ra_deg"),
        (HEADER + "\nA,10,5,,1,,\n", "line 2: pm_dec_mas_yr"),
        (HEADER + "\nA,10,5,nan,1,1,\n", "line 2: parallax_mas"),
        (HEADER + "\nA,10,5,inf,1,1,\n", "line 2: parallax_mas"),
        (HEADER + "\n", "line 2"),
        ("", "line 1"),
    ],
    ids=[
        "unknown-column",
        "missing-required-column",
        "short-row",
        "column-twice",
        "empty-required-cell",
        "nan-is-not-unknown",
        "infinity",
        "no-rows",
        "empty-body",
    ],
)
def test_structural_problems_name_the_line(client, body, expected):
    fields = [f for f, _ in problem_fields(post_csv(client, body))]
    assert expected in fields


@pytest.mark.parametrize(("sep", "name"), [(";", "semicolons"), ("\t", "tabs")])
def test_other_separator_is_named(client, sep, name):
    """A spreadsheet export with semicolons or tabs: the answer says what to change."""
    body = HEADER.replace(",", sep) + "\n" + sep.join(["A", "10", "5", "", "1", "1", ""]) + "\n"
    assert problem_fields(post_csv(client, body)) == [
        ("line 1", f"the header is separated by {name}; separate the columns with commas")
    ]


def test_not_utf8_is_400(client):
    r = post_csv(client, (HEADER + "\nA\xe9,10,5,,1,1,\n").encode("latin-1"))
    assert r.status_code == 400
    assert r.mimetype == "application/problem+json"
    assert f"byte {len(HEADER) + 2}" in r.json["detail"] and "UTF-8 only" in r.json["detail"]


def test_byte_order_mark_and_crlf_accepted(client):
    body = ("\ufeff" + HEADER + "\r\nA,10,5,,1,1,\r\n").encode("utf-8")
    assert post_csv(client, body).status_code == 200


def test_options_as_query_parameters(client):
    body = HEADER + "\nA,10,5,100,1000,-500,20\n"
    ranged = post_csv(
        client,
        body,
        "?catalogue_epoch=J2016.0&target_range.start=J2016.0&target_range.stop=J2116.0"
        "&target_range.count=3&model=light_time",
    ).json
    assert ranged["model"] == "light_time"
    assert [e["julian_epoch_tdb"] for e in ranged["epochs"]] == [2016.0, 2066.0, 2116.0]
    repeated = post_csv(
        client, body, "?catalogue_epoch=J2016.0&target_epochs=J2016.0&target_epochs=J2116.0"
    ).json
    assert len(repeated["epochs"]) == 2
    as_json = post_csv(
        client, body, '?catalogue_epoch=J2016.0&target_epochs=["J2016.0","J2116.0"]'
    ).json
    assert as_json == repeated


def test_unknown_or_missing_option(client):
    body = HEADER + "\nA,10,5,,1,1,\n"
    fields = [f for f, _ in problem_fields(post_csv(client, body, QUERY + "&colour=red"))]
    assert "colour" in fields
    fields = [f for f, _ in problem_fields(post_csv(client, body, "?target_epochs=J2020"))]
    assert "catalogue_epoch" in fields


@pytest.mark.parametrize(
    "query, field",
    [
        ("?catalogue_epoch=J2016.0&catalogue_epoch=J2000.0&target_epochs=J2020", "catalogue_epoch"),
        (QUERY + "&model=standard&model=light_time", "model"),
        (
            "?catalogue_epoch=J2016.0&target_range.start=J2016.0&target_range.stop=J2116.0"
            "&target_range.count=3&target_range.count=4",
            "target_range.count",
        ),
    ],
)
def test_option_given_twice_is_refused_not_one_dropped(client, query, field):
    """Which of two values was meant is unknowable: 422 naming it (lists, such as
    target_epochs, take repeats: test_options_as_query_parameters)."""
    body = HEADER + "\nA,10,5,100,1000,-500,20\n"
    assert problem_fields(post_csv(client, body, query)) == [(field, "given 2 times; give it once")]


@pytest.mark.parametrize(
    ("url", "option", "text"),
    [
        # str.isdigit() takes the superscript one, which int() refuses: once a 500 (found by
        # the longer schemathesis run).
        ("/v1/velocity", "monte_carlo_draws", "%C2%B9"),
        ("/v1/velocity", "monte_carlo_draws", "1_000"),  # int() would read 1000
        ("/v1/constellations/lookup", "near_boundary_arcsec", "nan"),
        ("/v1/constellations/lookup", "near_boundary_arcsec", "1_0"),  # float() would read 10
        ("/v1/constellations/lookup", "near_boundary_arcsec", "%D9%A3"),  # Arabic-Indic 3
    ],
)
def test_numeric_options_in_the_query_are_ascii_decimals(client, url, option, text):
    body = HEADER + "\nA,10,5,100,1000,-500,20\n"
    r = client.post(f"{url}?{option}={text}", data=body.encode(), content_type="text/csv")
    assert r.status_code == 422, r.get_data(as_text=True)
    assert option in [f for f, _ in problem_fields(r)]


def test_numeric_options_in_the_query_are_read(client):
    body = (HEADER + "\nA,10,5,100,1000,-500,20\n").encode()

    def near(text):
        url = f"/v1/constellations/margins?near_boundary_arcsec={text}"
        r = client.post(url, data=body, content_type="text/csv")
        assert r.status_code == 200, r.get_data(as_text=True)
        return r.json["columns"]["near_boundary"][0], r.json["columns"]["margin_arcsec"][0]

    flag, margin = near("3.6e4")  # the largest allowed, 10 degrees
    assert 1.0 < margin < 3.6e4 and flag
    assert near(f"{margin / 2:.3f}")[0] is False
    assert near(f"{margin * 2:.3f}")[0] is True


def test_errors_stay_problem_json_when_csv_is_asked_for(client):
    r = post_csv(client, HEADER + "\nA,10,95,,1,1,\n", accept="text/csv")
    assert r.mimetype == "application/problem+json"


def test_other_media_types_still_refused(client):
    r = client.post(URL, data="a=b", content_type="application/x-www-form-urlencoded")
    assert r.status_code == 415
    assert "text/csv" in r.json["detail"]


def test_openapi_describes_csv(client):
    op = client.get("/openapi.json").json["paths"]["/v1/propagation"]["post"]
    assert "text/csv" in op["requestBody"]["content"]
    assert "text/csv" in op["responses"]["200"]["content"]
    assert {p["name"] for p in op["parameters"]} >= {"catalogue_epoch", "target_epochs"}


# ------------------------------------------------- every star-table endpoint, generically


def _csv_text(stars):
    """Star records -> CSV text (header of every field given, empty cell = null)."""
    names = list(dict.fromkeys(k for s in stars for k in s))
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(names)
    for s in stars:
        w.writerow(["" if s.get(k) is None else s[k] for k in names])
    return buf.getvalue()


def test_every_table_endpoint_takes_and_gives_csv(client):
    cases = table_endpoint_cases(client, "text/csv")
    assert "/v1/propagation" in [case[0] for case in cases]
    for path, example, stars, query, reference in cases:
        r = client.post(path + query, data=_csv_text(stars), content_type="text/csv")
        assert r.status_code == 200, (path, r.json)
        assert r.json == reference, path
        out = client.post(path, json=example, headers={"Accept": "text/csv"})
        assert out.mimetype == "text/csv", path
        rows = rows_of(out.get_data(as_text=True))
        assert {int(row["index"]) for row in rows} == set(range(len(reference["stars"])))
        assert [row["id"] for row in rows][:1] == [str(reference["stars"][0]["id"])]


@pytest.mark.parametrize("text", ["%D9%A0.%D9%A0%D9%A0%D9%A1", "0.00_1", "nan", "%EF%BC%91"])
def test_numeric_get_options_are_ascii_decimals(client, text):
    r = client.get(f"/v1/constellations/Ori/outline?tolerance_arcsec={text}")
    assert problem_fields(r) == [
        ("tolerance_arcsec", "must be a number written as an ASCII decimal, such as 0.5 or 2e-3")
    ]
    assert client.get("/v1/constellations/Ori/outline?tolerance_arcsec=%200.5").status_code == 200


@pytest.mark.parametrize("equinox", ["-5000", "1", "B3001"])
def test_outline_equinox_within_the_range_frames_take(client, equinox):
    r = client.get(f"/v1/constellations/Ori/outline?frame=fk4&equinox={equinox}")
    assert problem_fields(r) == [("equinox", "must be between 1000 and 3000")]


def test_star_table_in_the_query_beside_a_csv_body_is_refused(client):
    body = HEADER + "\nA,10,5,,1,1,\n"
    fields = problem_fields(post_csv(client, body, QUERY + "&stars=x"))
    assert [f for f, _ in fields] == ["stars"]


def test_site_by_dotted_members_in_the_query(client):
    # The OpenAPI document and this README describe objects in the query string by dotted
    # names; the site (a name or an object) used to be refused that way.
    body = (HEADER + "\nA,10,20,,1,1,\n").encode()
    base = "/v1/observed?catalogue_epoch=J2016&instants=2026-12-02T22:30:00Z&"
    dotted = "site.latitude_deg=38.4127&site.longitude_deg=-7.6543&site.height_m=1460"
    r = client.post(base + dotted, data=body, content_type="text/csv")
    assert r.status_code == 200, r.get_json()
    named = client.post(base + "site=kestrel-ridge", data=body, content_type="text/csv")
    a, b = r.json["stars"][0]["at_instants"][0], named.json["stars"][0]["at_instants"][0]
    assert a["azimuth_deg"] == b["azimuth_deg"] and a["altitude_deg"] == b["altitude_deg"]
    both = client.post(base + "site=kestrel-ridge&site.height_m=1", data=body,
                       content_type="text/csv")  # fmt: skip
    assert [f for f, _ in problem_fields(both)] == ["site"]


def test_instant_range_by_dotted_members_in_the_query(client):
    # A night's track for a CSV table: the range's members as dotted names, as the README says.
    body = (HEADER + "\nA,10,20,,1,1,\n").encode()
    base = "/v1/observed?catalogue_epoch=J2016&site=kestrel-ridge&"
    rng = "instant_range.start=2026-12-06T18:00:00Z&instant_range.stop=2026-12-07T06:00:00Z"
    r = client.post(base + rng + "&instant_range.count=5", data=body, content_type="text/csv")
    assert r.status_code == 200, r.get_json()
    assert [i["epoch"]["iso_utc"][11:16] for i in r.json["instants"]] == [
        "18:00", "21:00", "00:00", "03:00", "06:00"
    ]  # fmt: skip
    text = client.post(
        base + rng + "&instant_range.count=5",
        data=body,
        content_type="text/csv",
        headers={"Accept": "text/csv"},
    ).get_data(as_text=True)
    assert len(text.strip().splitlines()) == 1 + 5  # the header, a row per instant
    bad = client.post(base + rng + "&instant_range.count=1", data=body, content_type="text/csv")
    assert [f for f, _ in problem_fields(bad)] == ["instant_range.count"]


def test_header_column_without_a_name(client):
    # A trailing comma made a nameless column, reported as "line 1: " with "column given
    # twice" or "unknown field".
    for header, k in ((HEADER + ",", 8), (HEADER + ",,", 8)):
        body = header + "\nA,10,5,,1,1,,\n"
        fields = problem_fields(post_csv(client, body))
        assert ("line 1", f"column {k} of the header has no name (a trailing comma?)") in fields
        assert all(f != "line 1: " for f, _ in fields)


def test_offset_plus_decoded_as_space_is_explained(client):
    # '+' in a URL query string is a space (application/x-www-form-urlencoded, WHATWG URL
    # standard): a '+05:30' offset arrives as ' 05:30'. The answer said only that the epoch
    # could not be read.
    from urllib.parse import parse_qs

    assert parse_qs("t=2026-12-02T22:00:00+05:30")["t"] == ["2026-12-02T22:00:00 05:30"]
    body = "ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr\n10,20,1,1\n"
    url = "/v1/propagation?catalogue_epoch=J2016.0&target_epochs="
    r = client.post(url + "2026-12-02T22:00:00+05:30", data=body, content_type="text/csv")
    assert r.status_code == 422
    assert "%2B" in r.json["errors"][0]["message"]
    r = client.post(url + "2026-12-02T22:00:00%2B05:30", data=body, content_type="text/csv")
    assert r.status_code == 200


# ------------------------------------------------------------------ observed: per instant

#: Instants of the observed-place checks: measured (2020), predicted (2026) and unavailable
#: (2045) Earth orientation; the Sun below and above the horizon; two instants 0.43 ms apart
#: that the millisecond label (epoch_iso_utc) writes alike.
OBSERVED_INSTANTS = [
    "2020-06-01T03:00:00Z",
    "2026-12-02T22:30:00.0000267Z",
    "2026-12-02T22:30:00.0004567Z",
    "2045-01-01T12:00:00Z",
    "2026-12-03T12:00:00Z",
]

#: The per-instant members of the JSON answer and the CSV/Arrow columns that carry them.
INSTANT_COLUMNS = {
    "earth_orientation_table": ("earth_orientation", "table"),
    "earth_orientation_status": ("earth_orientation", "status"),
    "earth_orientation_source": ("earth_orientation", "source"),
    "earth_orientation_ut1_utc_s": ("earth_orientation", "ut1_utc_s"),
    "earth_orientation_pm_x_arcsec": ("earth_orientation", "pm_x_arcsec"),
    "earth_orientation_pm_y_arcsec": ("earth_orientation", "pm_y_arcsec"),
    "earth_orientation_accuracy_class": ("earth_orientation", "accuracy_class"),
    "earth_orientation_pointing_error_arcsec": ("earth_orientation", "pointing_error_arcsec"),
    "sun_altitude_deg": ("sun", "altitude_deg"),
    "sun_azimuth_deg": ("sun", "azimuth_deg"),
}


@pytest.fixture(scope="module")
def observed_request():
    import json

    body = json.loads((DEMO / "examples" / "observed_request.json").read_text())
    return dict(body, instants=OBSERVED_INSTANTS)


def test_observed_csv_rows_carry_each_instants_sun_and_earth_orientation(client, observed_request):
    """Each CSV row of an observed-place answer holds what the JSON answer says of its
    instant: the Sun's altitude and azimuth (advisory safety figures), UT1-UTC, polar motion
    and their status and table, and the UTC date in full; the same numbers, bit for bit.
    The CSV answer used to leave all of them out (the JSON one only had them)."""
    js = client.post("/v1/observed", json=observed_request).json
    r = client.post("/v1/observed", json=observed_request, headers={"Accept": "text/csv"})
    assert r.status_code == 200 and r.mimetype == "text/csv"
    rows = rows_of(r.get_data(as_text=True))
    stars, instants = js["stars"], js["instants"]
    assert len(stars) == 3 and len(instants) == 5
    assert len(rows) == len(stars) * len(instants)  # star by star, instants within a star
    header = list(rows[0])
    assert header[-1] == "flags"
    assert {"utc_jd", *INSTANT_COLUMNS} <= set(header)
    statuses = {inst["earth_orientation"]["status"] for inst in instants}
    assert statuses == {"measured", "predicted", "unavailable"}
    assert {inst["sun"]["altitude_deg"] > 0 for inst in instants} == {True, False}
    for i, star in enumerate(stars):
        for k, inst in enumerate(instants):
            row = rows[i * len(instants) + k]
            assert (row["index"], row["id"]) == (str(i), star["id"])
            for column, (obj, member) in INSTANT_COLUMNS.items():
                want = inst[obj][member]
                got = float(row[column]) if isinstance(want, float) else row[column]
                assert got == want, (i, k, column)
            assert [float(x) for x in row["utc_jd"].split(";")] == inst["utc_jd"]
            # The star's own place stays under its name beside the Sun's.
            place = star["at_instants"][k]
            assert float(row["altitude_deg"]) == place["altitude_deg"]
            assert float(row["sun_separation_deg"]) == place["sun_separation_deg"]


def test_observed_csv_instant_keeps_the_precision_of_the_json_answer(client, observed_request):
    """Two instants 0.43 ms apart have the same millisecond label (epoch_iso_utc); the CSV
    row tells them apart, as the JSON answer does, by the two-part UTC Julian date."""
    import erfa

    r = client.post("/v1/observed", json=observed_request, headers={"Accept": "text/csv"})
    rows = rows_of(r.get_data(as_text=True))[1:3]  # the first star at the 2026 instants
    assert rows[0]["epoch_iso_utc"] == rows[1]["epoch_iso_utc"] == "2026-12-02T22:30:00.000Z"
    dates = [tuple(float(x) for x in row["utc_jd"].split(";")) for row in rows]
    assert dates[0] != dates[1]
    # pyerfa dtf2d: the calendar date and time of day in UTC -> two-part Julian date.
    for (d1, d2), seconds in zip(dates, (0.0000267, 0.0004567), strict=True):
        w1, w2 = erfa.dtf2d("UTC", 2026, 12, 2, 22, 30, seconds)
        assert d1 == w1
        tol_day = 1e-15  # day (86 ps): one unit in the last place of the day fraction
        assert abs(d2 - w2) <= tol_day
    tol_s = 1e-9  # s: the difference of the two dates, 0.43 ms, read back from the CSV
    assert abs((dates[1][1] - dates[0][1]) * 86400.0 - 0.00043) < tol_s


def test_instant_cells_do_not_overwrite_a_star_column():
    """A member of an instant object named as a column of the star's rows keeps both: the
    instant's under ``instant_<name>`` (none of today's answers has such a name)."""
    from service.api import csvio

    epoch = {"julian_epoch_tdb": 2026.0, "iso_utc": "2026-01-01T00:00:00.000Z"}
    body = {
        "instants": [{"epoch": epoch, "airmass": 9.0, "sun": {"altitude_deg": -5.0}}],
        "stars": [{"index": 0, "id": "A", "at_instants": [{"airmass": 1.5, "flags": []}]}],
    }
    rows = rows_of(csvio.body_to_csv(body, {"at_instants", "instants", "sun"}))
    assert rows == [
        {
            "index": "0",
            "id": "A",
            "epoch_julian_tdb": "2026.0",
            "epoch_iso_utc": "2026-01-01T00:00:00.000Z",
            "airmass": "1.5",
            "instant_airmass": "9.0",
            "sun_altitude_deg": "-5.0",
            "flags": "",
        }
    ]


@pytest.mark.parametrize(
    ("before", "after"),
    [
        (None, "Accept"),
        ("Origin", "Origin, Accept"),
        ("Origin, accept", "Origin, accept"),
        ("Accept-Encoding", "Accept-Encoding, Accept"),
    ],
)
def test_answers_of_table_endpoints_vary_on_accept(before, after):
    """An answer that differs by Accept (JSON, CSV or Arrow) says so in Vary, once, after
    any names already there (RFC 9110 section 12.5.5), as werkzeug's ``vary.add`` writes it."""
    from flask import Response

    from service.api.common import _vary_on_accept

    resp = Response()
    if before is not None:
        resp.headers["Vary"] = before
    _vary_on_accept(resp)
    assert resp.headers["Vary"] == after
    if before is not None and "accept" not in before.lower().split(", "):
        ref = Response()
        ref.headers["Vary"] = before
        ref.vary.add("Accept")
        assert ref.headers["Vary"] == after
