"""Apache Arrow IPC streams in (request bodies) and out (Accept) on the star-table endpoints.

Streams are written and read with pyarrow's own IPC writer and reader (the reference
implementation of the format), never with the service's code.
"""

import csv
import io
import json

import numpy as np
import pyarrow as pa
import pytest

from tests.conftest import DEMO_OPTIONS, DEMO_QUERY, propagation_rows, table_endpoint_cases

ARROW = "application/vnd.apache.arrow.stream"
URL = "/v1/propagation"
QUERY = DEMO_QUERY


def stream_of(table: pa.Table | pa.RecordBatch, batches: int = 1) -> bytes:
    """An Arrow IPC stream written by pyarrow (optionally cut into several record batches)."""
    if isinstance(table, pa.RecordBatch):
        table = pa.Table.from_batches([table])
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        if batches == 1:
            writer.write_table(table)
        else:
            step = -(-table.num_rows // batches)
            for batch in table.to_batches(max_chunksize=step):
                writer.write_batch(batch)
    return sink.getvalue().to_pybytes()


def read_stream(data: bytes) -> pa.Table:
    with pa.ipc.open_stream(pa.py_buffer(data)) as reader:
        return reader.read_all()


def table_of(stars: list[dict]) -> pa.Table:
    """Records -> an Arrow table (pyarrow infers the types; None -> null)."""
    names = list(dict.fromkeys(k for s in stars for k in s))
    return pa.table({k: [s.get(k) for s in stars] for k in names})


def post_arrow(client, body: bytes, query=QUERY, accept="application/json", url=URL):
    return client.post(url + query, data=body, content_type=ARROW, headers={"Accept": accept})


def problem_fields(r, status=422):
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    return [(e["field"], e["message"]) for e in r.json.get("errors", [])]


@pytest.fixture(scope="module")
def demo_stream(demo_catalogue):
    return stream_of(table_of(demo_catalogue["stars"]))


def small_table(**overrides) -> pa.Table:
    cols = {
        "id": pa.array(["A", "B", "C"]),
        "ra_deg": pa.array([10.0, 20.0, 30.0]),
        "dec_deg": pa.array([-5.0, 5.0, 15.0]),
        "parallax_mas": pa.array([10.0, None, 2.0]),
        "pm_ra_cosdec_mas_yr": pa.array([1.0, 2.0, 3.0]),
        "pm_dec_mas_yr": pa.array([-1.0, -2.0, -3.0]),
    }
    cols.update(overrides)
    return pa.table({k: v for k, v in cols.items() if v is not None})


# ------------------------------------------------------------------ answers equal JSON


def _check_propagation_rows(table: pa.Table, js: dict) -> None:
    """Every Arrow row holds exactly (bit for bit) the numbers of the JSON records answer."""
    rows = table.to_pylist()
    expected = propagation_rows(js)
    assert len(rows) == len(expected)
    for row, want in zip(rows, expected, strict=True):
        assert row["flags"] == ";".join(want.pop("flags"))
        for name, value in want.items():
            assert row.get(name) == value, name  # None (null) or the same double


def test_propagation_with_uncertainties_equals_json(client, demo_stream, demo_request):
    body = demo_request
    js = client.post(URL, json=body).json
    assert any(s["at_epochs"][0]["uncertainties"] for s in js["stars"])  # the case is tested
    r = post_arrow(client, demo_stream, accept=ARROW)
    assert r.status_code == 200
    assert r.mimetype == ARROW
    assert "Accept" in r.headers["Vary"]
    _check_propagation_rows(read_stream(r.data), js)
    # A JSON body asking for Arrow (records layout answer) gives the same stream contents.
    r2 = client.post(URL, json=body, headers={"Accept": ARROW})
    assert r2.mimetype == ARROW
    _check_propagation_rows(read_stream(r2.data), js)


def _check_columns(table: pa.Table, columns: dict) -> None:
    """Arrow columns (one row per star) equal the JSON columns answer exactly."""
    got = table.to_pydict()
    assert got["index"] == list(range(table.num_rows))
    for name, values in columns.items():
        if values is None:
            assert name not in got
        elif name == "flags":
            assert got[name] == [";".join(v) for v in values]
        else:
            assert got[name] == values, name


@pytest.mark.parametrize(
    "path, example, extra",
    [
        ("/v1/velocity", "velocity_request.json", {}),
        ("/v1/constellations/margins", "constellations_lookup_request.json", {}),
        ("/v1/velocity/observables", "velocity_observables_request.json", {}),
    ],
)
def test_other_endpoints_equal_json(client, path, example, extra):
    from service.api.examples import load_example

    body = dict(load_example(example), layout="columns", **extra)
    js = client.post(path, json=body)
    assert js.status_code == 200, js.json
    r = client.post(path, json=body, headers={"Accept": ARROW})
    assert r.mimetype == ARROW
    table = read_stream(r.data)
    assert table.num_rows == js.json["star_count"]
    _check_columns(table, js.json["columns"])
    # The answer's other members travel as JSON in the schema metadata.
    meta = json.loads(table.schema.metadata[b"skydrift.answer"])
    assert meta == {k: v for k, v in js.json.items() if k != "columns"}


@pytest.mark.parametrize(
    "path, example",
    [
        ("/v1/propagation", "propagation_request.json"),
        ("/v1/velocity", "velocity_request.json"),
        ("/v1/constellations/lookup", "constellations_lookup_request.json"),
    ],
)
def test_records_and_columns_layouts_give_one_arrow_schema(client, path, example):
    """The layout of the JSON answer must not change the Arrow answer: the same column
    types (pyarrow's Schema.equals: epoch_iso_utc dictionary-encoded, an interval a
    fixed-size list) and the same values, as the module text promises for both."""
    from service.api.examples import load_example

    tables = {}
    for layout in ("records", "columns"):
        body = dict(load_example(example), layout=layout)
        r = client.post(path, json=body, headers={"Accept": ARROW})
        assert r.status_code == 200, r.get_data(as_text=True)
        tables[layout] = read_stream(r.data)
    records, columns = tables["records"], tables["columns"]
    assert records.schema.equals(columns.schema, check_metadata=False), (
        records.schema,
        columns.schema,
    )
    assert records.to_pylist() == columns.to_pylist()
    for name in records.column_names:
        if name.endswith("_iso_utc"):
            assert pa.types.is_dictionary(records.schema.field(name).type)


def test_flags_last_when_the_first_star_has_no_uncertainties(client):
    """A records answer whose first star comes without standard errors and a later one with
    them: the Arrow answer keeps the CSV answer's columns in its order, flags last (the
    README and the module text; the reference is the service's own text/csv answer, read by
    Python's csv module). The flag names of a star are a tuple in the answer object, which
    was not taken for a list of names, so flags landed before the uncertainty columns."""
    plain = {"ra_deg": 10.0, "dec_deg": -5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}
    errors = {
        "ra_error_mas": 0.1,
        "dec_error_mas": 0.1,
        "pm_ra_cosdec_error_mas_yr": 0.2,
        "pm_dec_error_mas_yr": 0.2,
    }
    body = {
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["J2030.0"],
        "stars": [dict(plain, id="A"), dict(plain, id="B", **errors)],
    }
    out = client.post(URL, json=body, headers={"Accept": ARROW})
    assert out.status_code == 200, out.get_data(as_text=True)
    table = read_stream(out.data)
    text = client.post(URL, json=body, headers={"Accept": "text/csv"}).get_data(as_text=True)
    header = next(csv.reader(io.StringIO(text)))
    assert header[-1] == "flags"
    assert table.column_names == header


@pytest.mark.parametrize("layout", ["records", "columns"])
def test_a_quantity_unknown_for_every_star_is_float64_nulls(client, layout):
    """No star with a radial velocity (common in catalogues): the Arrow answer's
    radial_velocity_km_s is float64 with nulls, as the README says of unknown values and as
    the columns layout of a numeric column gives. From the records layout a column of nulls
    only was taken for lists of names and came as a dictionary of empty strings."""
    star = {"ra_deg": 10.0, "dec_deg": -5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}
    body = {
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["J2030.0"],
        "stars": [star, dict(star, parallax_mas=5.0)],
        "layout": layout,
    }
    out = client.post(URL, json=body, headers={"Accept": ARROW})
    assert out.status_code == 200, out.get_data(as_text=True)
    table = read_stream(out.data)
    for name in ("radial_velocity_km_s", "parallax_mas"):
        assert table.schema.field(name).type == pa.float64(), name
    assert table.column("radial_velocity_km_s").to_pylist() == [None, None]
    assert table.column("parallax_mas").to_pylist()[0] is None


def test_round_trip_through_pyarrow(client, demo_catalogue):
    """Written by pyarrow, propagated over no time, read by pyarrow: the input comes back.

    Zero elapsed time leaves the astrometry unchanged in the straight-line model (ESA 1997,
    The Hipparcos Catalogue Vol. 1 sec. 1.5.5, eq. 1.5.18 with t - T = 0); the only change
    is rounding in the round trip through the unit vectors.
    """
    stars = demo_catalogue["stars"]
    r = post_arrow(
        client,
        stream_of(table_of(stars)),
        "?catalogue_epoch=J2016.0&target_epochs=J2016.0",
        accept=ARROW,
    )
    table = read_stream(r.data)
    assert table.num_rows == len(stars)
    assert table.column("id").to_pylist() == [s["id"] for s in stars]
    tol_deg = 1e-12  # deg, rounding of the unit-vector round trip (common practice)
    for name in ("ra_deg", "dec_deg"):
        got = table.column(name).to_numpy()
        want = np.array([s[name] for s in stars])
        np.testing.assert_allclose(got, want, rtol=0, atol=tol_deg, err_msg=name)
    tol_mas_yr = 1e-9  # mas/yr, same rounding
    got = table.column("pm_dec_mas_yr").to_numpy()
    want = np.array([s["pm_dec_mas_yr"] for s in stars])
    np.testing.assert_allclose(got, want, rtol=0, atol=tol_mas_yr)
    # Units in each field's metadata, as in the JSON answer's `units`.
    meta = json.loads(table.schema.metadata[b"skydrift.answer"])
    for name in ("ra_deg", "parallax_mas", "pm_ra_cosdec_mas_yr", "correlation_ra_dec"):
        field = table.schema.field(name)
        unit = meta["units"].get(name, meta["units"].get("correlation_*"))
        assert field.metadata[b"unit"].decode() == unit
    assert table.schema.field("flags").type == pa.dictionary(pa.int32(), pa.string())


def test_arrow_body_gives_the_same_json_as_a_json_body(client, demo_stream, demo_request):
    body = demo_request
    as_columns = post_arrow(client, demo_stream).json
    assert as_columns["layout"] == "columns"  # as for a CSV body
    assert as_columns == client.post(URL, json=dict(body, layout="columns")).json
    records = post_arrow(client, demo_stream, QUERY + "&layout=records").json
    assert records == client.post(URL, json=body).json


def test_numeric_types_and_batches(client, demo_catalogue):
    """Integer and float32 columns are read as float64; several record batches as one."""
    stars = [
        {"id": 7, "ra_deg": 10, "dec_deg": -3, "pm_ra_cosdec_mas_yr": 4, "pm_dec_mas_yr": 2},
        {"id": 8, "ra_deg": 200, "dec_deg": 45, "pm_ra_cosdec_mas_yr": -1, "pm_dec_mas_yr": 0},
    ]
    js = client.post(URL + "?", json={"stars": stars, **_q()}).json
    t = table_of(stars)
    typed = t.cast(
        pa.schema(
            [
                ("id", pa.uint16()),
                ("ra_deg", pa.int32()),
                ("dec_deg", pa.int8()),
                ("pm_ra_cosdec_mas_yr", pa.float32()),  # 4.0 and -1.0 are exact in float32
                ("pm_dec_mas_yr", pa.uint8()),
            ]
        )
    )
    q = "?catalogue_epoch=J2016.0&target_epochs=J2026.0,J2100.0&layout=records"
    assert post_arrow(client, stream_of(typed), q).json == js
    assert post_arrow(client, stream_of(typed, batches=2), q).json == js
    many = table_of(demo_catalogue["stars"])
    one = post_arrow(client, stream_of(many)).json
    assert post_arrow(client, stream_of(many, batches=3)).json == one


def _q():
    return dict(DEMO_OPTIONS)


def test_nulls_give_the_flags_of_json_nulls(client):
    stars = [
        {"ra_deg": 10.0, "dec_deg": 1.0, "parallax_mas": None, "pm_ra_cosdec_mas_yr": 1.0,
         "pm_dec_mas_yr": 1.0, "radial_velocity_km_s": None},
        {"ra_deg": 11.0, "dec_deg": 2.0, "parallax_mas": 5.0, "pm_ra_cosdec_mas_yr": 1.0,
         "pm_dec_mas_yr": 1.0, "radial_velocity_km_s": 12.0},
    ]  # fmt: skip
    js = client.post(URL, json={"stars": stars, **_q(), "layout": "columns"}).json
    r = post_arrow(client, stream_of(table_of(stars)), accept=ARROW)
    table = read_stream(r.data)
    assert table.column("flags").to_pylist()[::2] == [";".join(f) for f in js["columns"]["flags"]]
    assert "parallax_missing" in table.column("flags").to_pylist()[0]
    # Unknown outputs are Arrow nulls, not NaN.
    assert table.column("parallax_mas").null_count == 2
    assert table.column("parallax_mas").to_pylist()[:2] == [None, None]


def test_columns_of_nulls_and_dictionary_ids(client):
    """pyarrow types a column of None alone as `null`: unknown values, as JSON nulls; ids
    may come dictionary-encoded (pandas categoricals)."""
    t = small_table(
        id=pa.array(["A", "B", "A"]).dictionary_encode(),
        parallax_mas=pa.array([None, None, None]),
    )
    assert t.schema.field("parallax_mas").type == pa.null()
    r = post_arrow(client, stream_of(t))
    assert r.status_code == 200, r.json
    assert r.json["columns"]["id"] == ["A", "B", "A"]
    assert all("parallax_missing" in f for f in r.json["columns"]["flags"])
    required = small_table(ra_deg=pa.array([None, None, None]))
    assert ("stars.ra_deg[0]", "is required and may not be null") in problem_fields(
        post_arrow(client, stream_of(required))
    )


def test_integer_ids_stay_integers(client):
    t = small_table(id=pa.array([5, 6, 7], pa.int64()))
    r = post_arrow(client, stream_of(t), accept=ARROW)
    assert read_stream(r.data).column("id").to_pylist() == [5, 5, 6, 6, 7, 7]
    assert post_arrow(client, stream_of(t)).json["columns"]["id"] == [5, 6, 7]


def test_unsigned_64_bit_ids_stay_integers(client):
    # Ids above 2**63 - 1 (an Arrow uint64 column) came back as text in the Arrow answer,
    # so the answer no longer joined with the table sent. Reference: pyarrow's own uint64.
    ids = pa.array([2**64 - 1, 0, None], pa.uint64())
    r = post_arrow(client, stream_of(small_table(id=ids)), accept=ARROW)
    col = read_stream(r.data).column("id")
    assert col.type == pa.uint64()
    assert col.to_pylist() == [2**64 - 1, 2**64 - 1, 0, 0, None, None]
    assert (
        post_arrow(client, stream_of(small_table(id=ids))).json["columns"]["id"] == ids.to_pylist()
    )
    records = QUERY + "&layout=records"  # the records answer is turned into Arrow apart
    r = post_arrow(client, stream_of(small_table(id=ids)), query=records, accept=ARROW)
    assert read_stream(r.data).column("id").type == pa.uint64()


# ------------------------------------------------------------------ bad bodies


FINITE = "must be a finite number; use null for unknown"


@pytest.mark.parametrize(
    "column, values, message",
    [
        ("dec_deg", [1.0, float("nan"), 2.0], FINITE),
        ("dec_deg", [1.0, float("inf"), 2.0], FINITE),
        ("parallax_mas", [1.0, float("-inf"), None], FINITE),
        ("ra_deg", [1.0, None, 2.0], "is required and may not be null"),
        ("dec_deg", [1.0, 95.0, 2.0], "must be between -90 and 90"),
    ],
)  # fmt: skip
def test_bad_values_name_the_row(client, column, values, message):
    r = post_arrow(client, stream_of(small_table(**{column: pa.array(values)})))
    # Each bad value reported once (an infinity was also reported out of range).
    assert problem_fields(r) == [(f"stars.{column}[1]", message)]


@pytest.mark.parametrize(
    "column, array",
    [
        ("ra_deg", pa.array(["10", "20", "30"])),
        ("dec_deg", pa.array([True, False, True])),
        ("pm_dec_mas_yr", pa.array([[1.0], [2.0], [3.0]])),
        ("parallax_mas", pa.array([1, 2, 3], pa.decimal128(5, 1))),
        ("id", pa.array([1.5, 2.5, 3.5])),
    ],
)
def test_column_of_another_type_is_named(client, column, array):
    fields = problem_fields(post_arrow(client, stream_of(small_table(**{column: array}))))
    assert [f for f, _ in fields] == [f"stars.{column}"]
    assert str(array.type) in fields[0][1]


def test_unknown_column_same_text_as_json(client):
    t = small_table(magnitude_v=pa.array([1.0, 2.0, 3.0]))
    fields = problem_fields(post_arrow(client, stream_of(t)))
    cols = {k: t.column(k).to_pylist() for k in t.column_names}
    js = client.post(URL, json={"stars": cols, **_q()})
    assert fields == problem_fields(js)
    assert fields[0][0] == "stars.magnitude_v"


def test_missing_required_column(client):
    fields = problem_fields(post_arrow(client, stream_of(small_table(ra_deg=None))))
    assert fields == [("stars.ra_deg", "is required")]


def test_missing_proper_motion_says_to_give_zero(client):
    hint = (
        "(give 0 where the target has no proper motion along this axis: "
        "a missing value is not taken as zero)"
    )
    t = small_table(pm_dec_mas_yr=pa.array([-1.0, None, -3.0]))
    assert problem_fields(post_arrow(client, stream_of(t))) == [
        ("stars.pm_dec_mas_yr[1]", f"is required and may not be null {hint}")
    ]
    no_pm = small_table(pm_ra_cosdec_mas_yr=None)
    assert problem_fields(post_arrow(client, stream_of(no_pm))) == [
        ("stars.pm_ra_cosdec_mas_yr", f"is required {hint}")
    ]


def test_repeated_column(client):
    t = small_table()
    t = t.append_column("ra_deg", pa.array([1.0, 2.0, 3.0]))
    assert problem_fields(post_arrow(client, stream_of(t))) == [
        ("stars.ra_deg", "column given twice")
    ]


def test_empty_table_is_422(client):
    empty = small_table().slice(0, 0)
    fields = problem_fields(post_arrow(client, stream_of(empty)))
    assert fields == [("stars", "at least one star is required")]


@pytest.mark.parametrize(
    "body",
    [b"", b"id,ra_deg\nA,1\n", b"\xff\xff\xff\xff\x10\x00\x00\x00garbage-garbage-"],
)
def test_not_an_arrow_stream_is_400(client, body):
    r = post_arrow(client, body)
    assert problem_fields(r, 400) == []
    assert "Arrow IPC stream" in r.json["detail"]


@pytest.mark.parametrize("tail", ["second_stream", "junk", "zero_bytes"])
def test_data_after_the_end_of_the_stream_is_400(client, tail):
    # Two streams joined end to end: pyarrow reads the first and stops at its end-of-stream
    # marker, so the second stream's stars would be dropped without a word.
    first = stream_of(small_table())
    extras = {
        "second_stream": stream_of(small_table(id=pa.array(["X", "Y", "Z"]))),
        "junk": b"garbage",
        "zero_bytes": bytes(64),
    }
    extra = extras[tail]
    r = post_arrow(client, first + extra)
    assert problem_fields(r, 400) == []
    assert f"byte {len(first)} of {len(first) + len(extra)}" in r.json["detail"]
    assert post_arrow(client, first).status_code == 200  # the first stream alone is read


def test_arrow_file_format_is_not_a_stream(client):
    # The Arrow IPC *file* format (magic "ARROW1") is another media type; refused as 400.
    sink = pa.BufferOutputStream()
    t = small_table()
    with pa.ipc.new_file(sink, t.schema) as writer:
        writer.write_table(t)
    r = post_arrow(client, sink.getvalue().to_pybytes())
    assert r.status_code == 400
    # The answer says what the body is and what to send, not pyarrow's reading of the file's
    # magic bytes as a message length ("Expected to read 1330795073 metadata bytes").
    assert "Arrow IPC file" in r.json["detail"] and "stream format" in r.json["detail"]


def test_too_many_rows_is_413(client, settings):
    n = settings.max_stars + 1
    t = pa.table(
        {
            "ra_deg": np.full(n, 10.0),
            "dec_deg": np.zeros(n),
            "pm_ra_cosdec_mas_yr": np.zeros(n),
            "pm_dec_mas_yr": np.zeros(n),
        }
    )
    fields = problem_fields(post_arrow(client, stream_of(t)), 413)
    assert fields[0][0] == "stars"


def test_options_from_the_query_string(client):
    body = stream_of(small_table())
    r = post_arrow(client, body, "?catalogue_epoch=J2016.0&target_range.start=J2000"
                   "&target_range.stop=J2100&target_range.count=3")  # fmt: skip
    assert r.status_code == 200, r.json
    assert len(r.json["epochs"]) == 3
    assert problem_fields(post_arrow(client, body, "?target_epochs=J2020")) == [
        ("catalogue_epoch", "is required")
    ]
    assert ("model", "must be one of: standard, light_time") in problem_fields(
        post_arrow(client, body, QUERY + "&model=fast")
    )


def test_errors_stay_problem_json_when_arrow_is_asked_for(client):
    r = post_arrow(client, stream_of(small_table(dec_deg=pa.array([1.0, 95.0, 2.0]))), accept=ARROW)
    assert r.mimetype == "application/problem+json"


def test_json_stays_the_default(client):
    body = stream_of(small_table())
    assert post_arrow(client, body, accept="*/*").mimetype == "application/json"
    csv_first = f"text/csv, {ARROW};q=0.5"
    assert post_arrow(client, body, accept=csv_first).mimetype == "text/csv"


def test_media_type_in_accept_is_case_insensitive(client):
    # RFC 9110: media type names are case-insensitive. An upper-case Accept once got JSON.
    body = stream_of(small_table())
    r = post_arrow(client, body, accept=ARROW.upper())
    assert r.mimetype == ARROW
    assert read_stream(r.data).num_rows == 2 * small_table().num_rows  # two epochs (QUERY)


def test_charts_take_arrow_but_answer_images(client):
    q = "?catalogue_epoch=J2016.0&start=J2016.0&stop=J2116.0&format=svg"
    r = post_arrow(client, stream_of(small_table()), q, accept=ARROW, url="/v1/charts/track")
    assert r.status_code == 200, r.get_data(as_text=True)[:300]
    assert r.mimetype == "image/svg+xml"


def test_openapi_describes_arrow(client):
    doc = client.get("/openapi.json").json
    for path in ("/v1/propagation", "/v1/velocity", "/v1/constellations/lookup"):
        op = doc["paths"][path]["post"]
        assert ARROW in op["requestBody"]["content"], path
        assert ARROW in op["responses"]["200"]["content"], path
    track = doc["paths"]["/v1/charts/track"]["post"]
    assert ARROW in track["requestBody"]["content"]
    assert ARROW not in track["responses"]["200"]["content"]


# ------------------------------------------------- every star-table endpoint, generically


def _as_cell(value) -> str:
    """An Arrow value written as the CSV answer writes the same JSON value."""
    if value is None:
        return ""
    if value is True or value is False:
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, list):
        return "" if all(v is None for v in value) else ";".join(_as_cell(v) for v in value)
    return str(value)


def test_every_table_endpoint_takes_and_gives_arrow(client):
    cases = table_endpoint_cases(client, ARROW)
    assert {"/v1/propagation", "/v1/frames", "/v1/observed"} <= {case[0] for case in cases}
    for path, example, stars, query, reference in cases:
        body = stream_of(table_of(stars))
        r = post_arrow(client, body, query, url=path)
        assert r.status_code == 200, (path, r.json)
        assert r.json == reference, path
        # Arrow out: the rows and columns of the CSV answer, cell for cell.
        out = post_arrow(client, body, query, accept=ARROW, url=path)
        assert out.mimetype == ARROW, path
        table = read_stream(out.data)
        text = client.post(path, json=example, headers={"Accept": "text/csv"})
        rows = list(csv.DictReader(io.StringIO(text.get_data(as_text=True))))
        assert table.column_names == list(rows[0]), path
        assert table.num_rows == len(rows), path
        for got, want in zip(table.to_pylist(), rows, strict=True):
            assert {k: _as_cell(v) for k, v in got.items()} == want, path


def test_body_read_in_one_call_keeps_werkzeugs_checks(app):
    """jsonio.read_body: a body shorter than its Content-Length is a client gone; one longer
    than the maximum is refused before it is read; the body is cached like get_data's."""
    from flask import request
    from werkzeug.exceptions import ClientDisconnected, RequestEntityTooLarge

    from service.api.jsonio import read_body

    def ctx(data: bytes, length: int):
        environ = {"wsgi.input": io.BytesIO(data), "CONTENT_LENGTH": str(length)}
        return app.test_request_context(
            URL, method="POST", content_type=ARROW, environ_overrides=environ
        )

    with ctx(b"abc", 10):
        with pytest.raises(ClientDisconnected):
            read_body(request)
    limit = app.config["MAX_CONTENT_LENGTH"]
    with ctx(b"", limit + 1):
        with pytest.raises(RequestEntityTooLarge):
            read_body(request)
    with ctx(b"abcdef", 6):
        assert read_body(request) == b"abcdef"
        assert request.get_data() == b"abcdef"  # cached


@pytest.mark.parametrize("codec", ["zstd", "lz4"])
def test_compressed_batches_are_refused_before_decoding(client, codec):
    # LZ4/ZSTD buffers could expand a small body without bound (a decompression bomb).
    t = small_table()
    sink = pa.BufferOutputStream()
    options = pa.ipc.IpcWriteOptions(compression=codec)
    with pa.ipc.new_stream(sink, t.schema, options=options) as writer:
        writer.write_table(t)
    r = post_arrow(client, sink.getvalue().to_pybytes())
    assert problem_fields(r, 415) == []
    assert "uncompressed" in r.json["detail"]


def test_forged_lengths_are_400(client):
    """A record batch that claims more rows than its buffers hold is refused (validation),
    never read out of bounds; so is a stream cut short."""
    import struct

    t = pa.table({k: [1.0] * 7 for k in ("ra_deg", "dec_deg")})
    good = stream_of(t)
    # Stream framing (Arrow IPC format): 0xFFFFFFFF, int32 metadata length, metadata
    # (flatbuffer), body. The schema message has no body; the record batch comes next.
    schema_len = struct.unpack_from("<i", good, 4)[0]
    start = 8 + schema_len
    meta_len = struct.unpack_from("<i", good, start + 4)[0]
    meta = good[start + 8 : start + 8 + meta_len]
    assert meta.count(struct.pack("<q", 7)) >= 3  # batch length and both field nodes
    forged_meta = meta.replace(struct.pack("<q", 7), struct.pack("<q", 7000))
    forged = good[: start + 8] + forged_meta + good[start + 8 + meta_len :]
    for body in (forged, good[:-24] + good[-8:]):
        r = post_arrow(client, body)
        assert r.status_code == 400, r.get_data(as_text=True)[:300]
        assert r.mimetype == "application/problem+json"


def test_long_dictionary_ids_refused_before_decoding(client):
    ids = pa.DictionaryArray.from_arrays(pa.array([0, 0, 0], pa.int32()), pa.array(["x" * 65]))
    fields = problem_fields(post_arrow(client, stream_of(small_table(id=ids))))
    assert fields == [("stars.id", "at most 64 characters")]


def test_answer_arrives_whole_in_pieces(client, monkeypatch):
    """The answer is sent in pieces of arrowio.ANSWER_PIECE_BYTES (1 MiB; 4 kB here, so that
    a test-sized answer spans many): they join into one stream that pyarrow reads, of the
    length the Content-Length header says, with the values of the JSON answer."""
    from service.api import arrowio

    monkeypatch.setattr(arrowio, "ANSWER_PIECE_BYTES", 4096)
    n = 1000
    rng = np.random.default_rng(11)
    cols = {
        "ra_deg": rng.uniform(0.0, 360.0, n),
        "dec_deg": rng.uniform(-89.0, 89.0, n),
        "parallax_mas": rng.uniform(0.5, 50.0, n),
        "pm_ra_cosdec_mas_yr": rng.normal(0.0, 30.0, n),
        "pm_dec_mas_yr": rng.normal(0.0, 30.0, n),
    }
    r = post_arrow(client, stream_of(pa.table(cols)), accept=ARROW)
    assert r.status_code == 200 and r.mimetype == ARROW
    assert r.is_streamed  # pieces, not one bytes copy of the whole stream
    pieces = list(r.response)
    assert len(pieces) > 10 and all(0 < len(p) <= 4096 for p in pieces)
    data = b"".join(pieces)
    assert int(r.headers["Content-Length"]) == len(data)
    table = read_stream(data)
    assert table.num_rows == 2 * n  # two target epochs
    js = client.post(
        URL, json={"stars": {k: v.tolist() for k, v in cols.items()}, **DEMO_OPTIONS}
    ).json
    assert js["layout"] == "columns"
    # JSON columns are (epoch, star); Arrow rows go star by star, each star's epochs in turn.
    expected = np.asarray(js["columns"]["ra_deg"]).T.reshape(-1)
    assert table.column("ra_deg").to_pylist() == expected.tolist()


def test_observed_arrow_rows_carry_each_instants_sun_and_earth_orientation(client):
    """As the CSV answer (tests/api/test_csv_api.py): each Arrow row of an observed-place
    answer holds the JSON answer's figures of its instant, bit for bit: the two-part UTC
    date (a two-element list), the Sun's altitude and azimuth, the Earth orientation and
    its status and table (dictionary-encoded text, repeated on many rows)."""
    from tests.api.test_csv_api import INSTANT_COLUMNS, OBSERVED_INSTANTS
    from tests.conftest import DEMO

    request = json.loads((DEMO / "examples" / "observed_request.json").read_text())
    request["instants"] = OBSERVED_INSTANTS
    js = client.post("/v1/observed", json=request).json
    r = client.post("/v1/observed", json=request, headers={"Accept": ARROW})
    assert r.status_code == 200 and r.mimetype == ARROW
    table = read_stream(r.data)
    stars, instants = js["stars"], js["instants"]
    assert table.num_rows == len(stars) * len(instants)
    assert table.schema.field("utc_jd").type == pa.list_(pa.float64(), 2)
    assert table.schema.field("sun_altitude_deg").type == pa.float64()
    assert table.schema.field("earth_orientation_status").type == pa.dictionary(
        pa.int32(), pa.string()
    )
    # Units in the field metadata, from the JSON answer's units of the member held.
    for column, member in (
        ("utc_jd", "utc_jd"),
        ("earth_orientation_ut1_utc_s", "ut1_utc_s"),
        ("earth_orientation_pm_x_arcsec", "pm_x_arcsec"),
        ("earth_orientation_pm_y_arcsec", "pm_y_arcsec"),
        ("sun_altitude_deg", "altitude_deg"),
    ):
        assert table.schema.field(column).metadata[b"unit"].decode() == js["units"][member]
    assert js["units"]["ut1_utc_s"].startswith("s,")
    rows = table.to_pylist()
    for i, star in enumerate(stars):
        for k, inst in enumerate(instants):
            row = rows[i * len(instants) + k]
            assert (row["index"], row["id"]) == (i, star["id"])
            for column, (obj, member) in INSTANT_COLUMNS.items():
                assert row[column] == inst[obj][member], (i, k, column)
            assert row["utc_jd"] == inst["utc_jd"]
            assert row["altitude_deg"] == star["at_instants"][k]["altitude_deg"]
