"""Health, readiness, the OpenAPI document, the reference page, errors, configuration."""

import ast
import html
import json
import pathlib
import re

import pytest

from service.config import ConfigError, Settings

ROOT = pathlib.Path(__file__).resolve().parents[2]


def test_health(client):
    r = client.get("/health")
    assert r.status_code == 200
    assert r.json["status"] == "ok"
    assert r.headers["X-Request-ID"]


def test_the_root_points_to_the_reference_and_lists_the_operations(client):
    """GET / was a 404: a client (or a browser) that starts at the root is told where the
    reference, the OpenAPI document and the probes are, and every operation, as the
    document lists them (each answers something other than a routing 404 or 405)."""
    from service import __version__

    r = client.get("/")
    assert r.status_code == 200
    assert r.mimetype == "application/json"
    body = r.json
    assert (body["service"], body["version"]) == ("Skydrift", __version__)
    doc = client.get("/openapi.json").json
    documented = {
        f"{method.upper()} {path}"
        for path, ops in doc["paths"].items()
        for method in ops
        if method != "parameters"  # (the path's own, not an operation)
    }
    assert set(body["operations"]) == documented
    assert len(body["operations"]) == len(documented) >= 16
    assert "/" not in doc["paths"]  # an index, as /docs is, not an operation
    for key in ("reference", "openapi", "health", "ready"):
        assert client.get(body[key]).status_code == 200, key
    for operation in body["operations"]:
        method, path = operation.split(" ", 1)
        path = path.replace("{abbreviation}", "Ori")
        answer = client.open(path, method=method, json={} if method == "POST" else None)
        assert answer.status_code not in (404, 405), operation
    # a path near none still gets the routing 404, and never "/" as its likely meaning
    r = client.get("/x")
    assert r.status_code == 404
    assert "Did you mean" not in r.json["detail"]


def test_request_id_echoed(client):
    r = client.get("/health", headers={"X-Request-ID": "abc-123"})
    assert r.headers["X-Request-ID"] == "abc-123"


def test_request_id_made_up_when_none_is_given_or_it_is_unusable(client):
    """128 random bits in hex, new for every request; a given id that is too long or not
    printable is replaced too."""
    made = [client.get("/health", headers=h).headers["X-Request-ID"]
            for h in ({}, {}, {"X-Request-ID": "x" * 129}, {"X-Request-ID": "a\tb"})]  # fmt: skip
    for rid in made:
        assert re.fullmatch(r"[0-9a-f]{32}", rid), rid
    assert len(set(made)) == len(made)


def test_ready_lists_checks(client):
    r = client.get("/ready")
    assert r.status_code == 200
    assert r.json["status"] == "ready"
    assert r.json["checks"]["configuration"]["ok"] is True


def test_ready_degraded_when_a_check_fails(settings):
    from service.api import create_app

    app = create_app({"SKYDRIFT_SETTINGS": settings})
    app.extensions["skydrift_ready_checks"]["broken table"] = lambda: (False, "missing")
    r = app.test_client().get("/ready")
    assert r.status_code == 503
    assert r.json["status"] == "degraded"
    assert r.json["checks"]["broken table"] == {"ok": False, "detail": "missing"}


def test_openapi_document_is_3_1_and_describes_every_field(client):
    doc = client.get("/openapi.json").json
    assert doc["openapi"].startswith("3.1")
    star = doc["components"]["schemas"]["StarAstrometry"]
    for name, prop in star["properties"].items():
        assert prop.get("description"), f"{name} lacks a description"


def test_committed_openapi_matches_generator():
    """openapi/openapi.json is generated (make openapi) and must be kept in sync."""
    from service.api import create_app
    from service.api.docs import openapi_document

    committed = json.loads((ROOT / "openapi" / "openapi.json").read_text())
    generated = json.loads(
        json.dumps(openapi_document(create_app({"SKYDRIFT_SETTINGS": Settings()})))
    )
    assert committed == generated, "run `make openapi` and commit openapi/openapi.json"


def test_every_post_endpoint_has_an_example(client):
    doc = client.get("/openapi.json").json
    for path, ops in doc["paths"].items():
        if "post" in ops:
            content = ops["post"]["requestBody"]["content"]["application/json"]
            assert "example" in content or "examples" in content, path


def test_reference_page_is_self_contained(client):
    r = client.get("/docs")
    assert r.status_code == 200
    assert r.mimetype == "text/html"
    text = r.get_data(as_text=True)
    assert "/v1/propagation" in text
    assert "http://" not in text and "https://" not in text  # no CDN or remote assets
    assert "<script" not in text


def test_no_files_served_from_the_working_directory(tmp_path, monkeypatch, settings):
    """The reference page needs no static assets; a ./static folder where the service is
    started (its working directory) must not be served, nor any /static/ route exist."""
    from service.api import create_app

    (tmp_path / "static").mkdir()
    (tmp_path / "static" / "notes.txt").write_text("not for clients")
    monkeypatch.chdir(tmp_path)
    app = create_app({"SKYDRIFT_SETTINGS": settings})
    assert not [r.rule for r in app.url_map.iter_rules() if r.rule.startswith("/static")]
    r = app.test_client().get("/static/notes.txt")
    assert r.status_code == 404
    assert r.mimetype == "application/problem+json"


def _operation_sections(client):
    """(document, path, path item, operation, its section of the reference page) for every
    GET and POST operation of the OpenAPI document."""
    doc = client.get("/openapi.json").json
    sections = client.get("/docs").get_data(as_text=True).split("<h2>")
    for path, ops in doc["paths"].items():
        for method, op in ops.items():
            if method not in ("get", "post"):
                continue
            head = f"{method.upper()}</span> <code>{html.escape(path)}</code></h2>"
            (section,) = [s for s in sections if head in s]
            yield doc, path, ops, op, section


def test_reference_page_lists_every_parameter(client):
    """Every path and query parameter of the OpenAPI document appears on the reference page,
    in the section of its operation, with its description."""
    checked = 0
    for _, path, ops, op, section in _operation_sections(client):
        for prm in ops.get("parameters", []) + op.get("parameters", []):
            assert f"<code>{html.escape(prm['name'])}</code>" in section, (path, prm["name"])
            assert html.escape(prm.get("description", "")) in section, (path, prm["name"])
            checked += 1
    assert checked >= 60  # the outline options, and the query options of CSV and Arrow bodies


def test_reference_page_describes_every_response(client):
    """Every response of every operation appears on the reference page with the description
    the OpenAPI document gives it, also where the document refers to a shared component
    (the error responses: 400, 401, 403, 413, 415, 422, 429, 503 were listed as bare codes)."""
    checked = 0
    for doc, path, _, op, section in _operation_sections(client):
        for code, resp in op["responses"].items():
            if "$ref" in resp:
                resp = doc["components"]["responses"][resp["$ref"].rsplit("/", 1)[-1]]
            assert resp["description"], (path, code)
            line = f"<li><code>{code}</code> {html.escape(resp['description'])}</li>"
            assert line in section, (path, code)
            checked += 1
    assert checked >= 100  # 16 operations, most with eight or more responses


def test_unknown_path_is_problem_json(client):
    r = client.get("/no/such/thing")
    assert r.status_code == 404
    assert r.mimetype == "application/problem+json"
    assert r.json["status"] == 404
    assert r.json["detail"] == (
        "No endpoint at /no/such/thing. The endpoints are listed at /, /docs and /openapi.json."
    )


@pytest.mark.parametrize(
    ("method", "path", "likely"),
    [
        ("POST", "/v1/propogation", "/v1/propagation"),  # a typing error
        ("POST", "/propagation", "/v1/propagation"),  # the version left out
        ("GET", "/V1/Constellations", "/v1/constellations"),  # letter case
        ("GET", "/v1/sites/", "/v1/sites"),  # a trailing slash
        ("POST", "/v1/velocity/observable", "/v1/velocity/observables"),
        # a path parameter keeps what was written there (not /v1/constellations/outlines)
        ("GET", "/v1/constellations/Ori/outlines", "/v1/constellations/Ori/outline"),
    ],
)
def test_a_misspelt_path_is_told_the_likely_one(client, method, path, likely):
    """werkzeug's 404 said "If you entered the URL manually please check your spelling"."""
    r = client.open(path, method=method, json={} if method == "POST" else None)
    assert r.status_code == 404
    assert r.mimetype == "application/problem+json"
    assert f"No endpoint at {path}. Did you mean {likely}?" in r.json["detail"]


@pytest.mark.parametrize(
    ("method", "path", "said"),
    [
        ("POST", "/v1/site", "Did you mean /v1/sites? It takes GET, not POST."),
        ("GET", "/v1/propagaton", "Did you mean /v1/propagation? It takes POST, not GET."),
        ("POST", "/v1/constellations/Ori/outlines",
         "Did you mean /v1/constellations/Ori/outline? It takes GET, not POST."),
        # the method is taken there: the path alone is told
        ("GET", "/v1/site", "Did you mean /v1/sites? The endpoints"),
        ("POST", "/v1/observd", "Did you mean /v1/observed? The endpoints"),
    ],
)  # fmt: skip
def test_a_misspelt_path_is_told_the_method_the_likely_one_takes(client, method, path, said):
    # A client that sent POST /v1/site was offered /v1/sites, and sending there met a 405.
    r = client.open(path, method=method, json={} if method == "POST" else None)
    assert r.status_code == 404
    assert said in r.json["detail"], r.json["detail"]


def test_wrong_method_is_problem_json(client):
    r = client.get("/v1/propagation")
    assert r.status_code == 405
    assert r.mimetype == "application/problem+json"
    assert r.json["detail"] == "GET is not taken at /v1/propagation; it takes POST."
    assert "POST" in r.headers["Allow"]
    r = client.delete("/v1/sites")
    assert r.json["detail"] == "DELETE is not taken at /v1/sites; it takes GET."


def test_unexpected_error_gives_bare_500_without_trace(settings):
    from service.api import create_app

    app = create_app({"SKYDRIFT_SETTINGS": settings})

    @app.route("/boom")
    def boom():
        raise RuntimeError("secret internals")

    r = app.test_client().get("/boom")
    assert r.status_code == 500
    assert r.mimetype == "application/problem+json"
    assert "secret" not in r.get_data(as_text=True)
    assert "Traceback" not in r.get_data(as_text=True)


@pytest.mark.parametrize(
    ("env", "needle"),
    [
        ({"SKYDRIFT_MAX_STARS": "many"}, "SKYDRIFT_MAX_STARS"),
        ({"SKYDRIFT_MAX_STARS": "0"}, "SKYDRIFT_MAX_STARS"),
        ({"SKYDRIFT_LOG_LEVEL": "LOUD"}, "SKYDRIFT_LOG_LEVEL"),
        ({"SKYDRIFT_LOG_LEVEL": "LOUD"}, "ERROR or CRITICAL"),  # every accepted name listed
        ({"SKYDRIFT_SITES_FILE": "/nonexistent/sites.json"}, "SKYDRIFT_SITES_FILE"),
        # int() and float() read these; an operator's typing mistake is not a number
        ({"SKYDRIFT_MAX_STARS": "1_000"}, "SKYDRIFT_MAX_STARS"),
        ({"SKYDRIFT_MAX_EPOCHS": "\u0661\u0660"}, "SKYDRIFT_MAX_EPOCHS"),  # Arabic-Indic 10
        ({"SKYDRIFT_FORWARDED_HOPS": "+1"}, "SKYDRIFT_FORWARDED_HOPS"),  # never negative
        ({"SKYDRIFT_TEST_FAIL_FIRST_N": "0x10"}, "SKYDRIFT_TEST_FAIL_FIRST_N"),
        ({"SKYDRIFT_SUN_AVOIDANCE_DEG": "3_0"}, "SKYDRIFT_SUN_AVOIDANCE_DEG"),
        ({"SKYDRIFT_REQUEST_TIMEOUT_S": "\uff11\uff10"}, "SKYDRIFT_REQUEST_TIMEOUT_S"),  # fullwidth
        ({"SKYDRIFT_NEAR_BOUNDARY_ARCSEC": "nan"}, "SKYDRIFT_NEAR_BOUNDARY_ARCSEC"),
        ({"SKYDRIFT_LOW_PARALLAX_SNR": "infinity"}, "SKYDRIFT_LOW_PARALLAX_SNR"),
        ({"SKYDRIFT_LOW_PARALLAX_SNR": "+5"}, "SKYDRIFT_LOW_PARALLAX_SNR"),
        ({"SKYDRIFT_HORIZON_LIMIT_DEG": "-1_0"}, "SKYDRIFT_HORIZON_LIMIT_DEG"),
    ],
)
def test_bad_settings_stop_the_start_naming_the_variable(env, needle):
    with pytest.raises(ConfigError, match=needle) as info:
        Settings.from_env(env)
    assert "\n" not in str(info.value)


def test_number_settings_written_in_ascii_decimals_are_kept():
    s = Settings.from_env(
        {
            "SKYDRIFT_MAX_STARS": " 1000 ",  # spaces around, as int() took them
            "SKYDRIFT_HORIZON_LIMIT_DEG": "-5.5",  # below the horizon: a sign makes sense
            "SKYDRIFT_SUN_AVOIDANCE_DEG": "45",
            "SKYDRIFT_NEAR_BOUNDARY_ARCSEC": "2e-1",
            "SKYDRIFT_REQUEST_TIMEOUT_S": ".5",
        }
    )
    assert s.max_stars == 1000 and s.horizon_limit_deg == -5.5
    assert (s.sun_avoidance_deg, s.near_boundary_arcsec, s.request_timeout_s) == (45, 0.2, 0.5)


def test_defaults_need_no_environment():
    s = Settings.from_env({})
    assert s.max_stars == 1_000_000
    assert s.sun_avoidance_deg == 30.0


def test_core_imports_no_web_framework():
    """service/core is pure computation: no flask, marshmallow, webargs or werkzeug."""
    banned = {"flask", "flask_smorest", "marshmallow", "webargs", "werkzeug", "apispec"}
    for path in (ROOT / "service" / "core").glob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name.split(".")[0] for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names = [node.module.split(".")[0]]
            assert not banned.intersection(names), f"{path.name} imports {names}"


def test_service_never_scopes_warnings_with_catch_warnings():
    """warnings.catch_warnings() saves the process-wide filter list and puts it back on exit
    (Python 3.11-3.13): entered from two threads of a threaded worker at once it can put back
    a list the other thread changed and leave a filter behind for every later request. The
    service reports ERFA's conditions with flags (calling the ufuncs, which return status
    codes) and installs its one upstream filter for good (batch.engine)."""
    for path in sorted((ROOT / "service").rglob("*.py")):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            name = getattr(node, "attr", None) or getattr(node, "id", None)
            assert name != "catch_warnings", f"{path.relative_to(ROOT)}:{node.lineno}"


def _lenient_fields(schema, path="", seen=None):
    """Fields of a request schema that would read a JSON string as a number or boolean."""
    import marshmallow as ma

    seen = set() if seen is None else seen
    out = []
    for name, fld in schema.fields.items():
        where = f"{path}.{name}" if path else name
        inner = fld.inner if isinstance(fld, ma.fields.List) else fld
        if isinstance(inner, ma.fields.Nested):
            if id(inner.schema) not in seen:
                seen.add(id(inner.schema))
                out += _lenient_fields(inner.schema, where, seen)
        elif type(inner) in (ma.fields.Float, ma.fields.Number, ma.fields.Boolean):
            out.append(where)
        elif isinstance(inner, ma.fields.Integer) and not inner.strict:
            out.append(where)
        elif type(inner).__module__.startswith("service.") and type(inner) not in _CHECKED:
            # A field of the project's own: its JSON types are its own business (SiteField
            # once read true as latitude 1); add it to _CHECKED with a test that shows it.
            out.append(f"{where} ({type(inner).__name__}: types not checked by a test)")
    return out


def _checked_own_fields():
    from service.api import common, frames, observed, tables

    return {
        common.StrictFloat,  # test_observed_api, test_charts_api: numbers in quotes
        common.StrictBoolean,  # test_charts_api: 0 and "yes" as booleans
        common.Choice,  # test_observed_api: a word of a list given as a number or list
        common.EpochField,  # test_propagation_api: an epoch of another JSON type
        common.InstantField,  # test_observed_api: an instant of another JSON type
        frames.EquinoxField,  # test_observed_api: an equinox of another JSON type
        observed.SiteField,  # test_observed_api: site coordinates of another JSON type
        tables.StarTableField,  # test_propagation_api: strings and booleans as numbers
    }


_CHECKED = _checked_own_fields()


def test_request_options_take_json_numbers_and_booleans_only():
    """marshmallow's Float, Integer and Boolean also read "12.5", 12.0 and "yes": request
    fields use common.StrictFloat, Integer(strict=True) and common.StrictBoolean (star table
    columns are checked with numpy by tables.StarTableField instead)."""
    import importlib
    import inspect

    import marshmallow as ma

    found = {}
    for path in sorted((ROOT / "service" / "api").glob("*.py")):
        module = importlib.import_module(f"service.api.{path.stem}")
        for name, cls in inspect.getmembers(module, inspect.isclass):
            if cls.__module__ == module.__name__ and issubclass(cls, ma.Schema):
                if name.endswith("RequestSchema"):
                    found[name] = _lenient_fields(cls())
    assert len(found) >= 9, sorted(found)  # every endpoint's request schema was seen
    assert not {k: v for k, v in found.items() if v}


@pytest.mark.parametrize("layout", ["records", "columns"])
def test_problem_detail_counts_the_invalid_values_not_listed(client, layout):
    # 60 declinations out of range (the bound is the IAU definition of declination, +-90
    # deg): 50 are listed and the rest summed up in one "(more)" entry; the detail must
    # count all 60, not the 51 entries of the list.
    star = {"ra_deg": 1.0, "dec_deg": 95.0, "pm_ra_cosdec_mas_yr": 0.0, "pm_dec_mas_yr": 0.0}
    stars = [star] * 60
    if layout == "columns":
        stars = {k: [v] * 60 for k, v in star.items()}
    body = {"catalogue_epoch": "J2016.0", "target_epochs": ["J2020.0"], "stars": stars}
    problem = client.post("/v1/propagation", json=body).get_json()
    assert problem["status"] == 422
    assert problem["errors"][-1]["field"].endswith("(more)")
    assert problem["errors"][-1]["message"].startswith("10 further invalid values")
    assert problem["detail"] == "The request has 60 invalid fields."


def test_the_words_of_a_list_are_shown_wherever_the_field_is(client):
    """A field taking a word of a list (common.Choice) lists its words on the reference page
    and, as a query option of a CSV or Arrow body, in the OpenAPI document: "layout" was
    described as "one record per star, or columns" without the words records and columns,
    and its query option had no enum."""
    doc = client.get("/openapi.json").json
    body = doc["components"]["schemas"]["PropagationRequest"]["properties"]
    query = {p["name"]: p["schema"] for p in doc["paths"]["/v1/propagation"]["post"]["parameters"]}
    for name in ("model", "layout"):
        assert query[name]["enum"] == [w for w in body[name]["enum"] if w is not None], name
    assert "default" not in query["model"]  # (a query option only with a CSV or Arrow body)
    lookup = {
        p["name"]: p["schema"]
        for p in doc["paths"]["/v1/constellations/lookup"]["post"]["parameters"]
    }
    assert lookup["reduction"]["enum"] == ["fk4", "fk5", "fk5_iau1976"]
    text = html.unescape(client.get("/docs").get_data(as_text=True))
    assert "the layout of the request's stars. One of: records, columns.</td>" in text
    assert "pmsafe. One of: standard, light_time.</td>" in text


def test_reference_page_gives_every_field_a_type(client):
    """Every field row of the reference page names its type. A field that may be null holds
    its schema in anyOf (the observed atmosphere, the velocities' solar_motion) and was shown
    with an empty type; read from the OpenAPI document, it is "Atmosphere or null"."""
    text = client.get("/docs").get_data(as_text=True)
    rows = re.findall(r"<tr><td[^>]*><code>([^<]*)</code>(?: \*)?</td><td>([^<]*)</td>", text)
    assert len(rows) > 400
    assert [name for name, typ in rows if not typ.strip()] == []
    assert ("atmosphere", "Atmosphere or null") in rows
    assert ("solar_motion", "SolarMotion or null") in rows


def test_ensure_sync_answers_are_kept_and_unchanged():
    """SkydriftFlask keeps ensure_sync's answer per function: the same answers as Flask's
    own (a plain function as it is; a coroutine function wrapped, or refused the same way
    without Flask's async extra), and callables that cannot be hashed still answered."""
    from flask import Flask

    from service.api.app import SkydriftFlask

    ours, flasks = SkydriftFlask("a"), Flask("b")

    def plain():
        return 1

    async def coroutine():
        return 2

    class Unhashable:
        __hash__ = None

        def __call__(self):
            return 3

    assert ours.ensure_sync(plain) is plain
    assert ours.ensure_sync(plain) is plain  # kept
    assert plain in ours._sync_functions
    odd = Unhashable()
    assert ours.ensure_sync(odd) is odd is flasks.ensure_sync(odd)
    try:
        expected = flasks.ensure_sync(coroutine)()
    except RuntimeError as exc:  # Flask without its async extra (asgiref)
        with pytest.raises(RuntimeError, match=str(exc)[:20]):
            ours.ensure_sync(coroutine)
    else:
        assert ours.ensure_sync(coroutine)() == expected == 2
        assert ours.ensure_sync(coroutine) is not coroutine
