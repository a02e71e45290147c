"""Access control and limits: one test per setting, and the defaults (all off/permissive).

The expected statuses and headers follow the HTTP standards: RFC 9110 (401, 403, 413, 503,
Retry-After), RFC 6750 section 3 (WWW-Authenticate: Bearer, error="invalid_token"), RFC 6585
section 4 (429), the Fetch standard's CORS protocol (Access-Control-* headers, preflight),
RFC 9457 (problem+json).
"""

import dataclasses
import hmac
import time

import pytest

from service.api import access, create_app
from service.config import ConfigError, Settings

PROPAGATION_BODY = {
    "catalogue_epoch": "J2016.0",
    "target_epochs": ["J2026.0"],
    "stars": [{"ra_deg": 10.0, "dec_deg": 5.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}],
}
TOKEN_A = "test-token-aaaaaaaaaaaaaaaa"
TOKEN_B = "test-token-bbbbbbbbbbbbbbbb"


def make_client(settings, **changes):
    s = dataclasses.replace(settings, **changes)
    return create_app({"SKYDRIFT_SETTINGS": s, "TESTING": True}).test_client()


def assert_problem(r, status):
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    assert r.json["status"] == status
    assert r.json["request_id"] == r.headers["X-Request-ID"]


def bearer(token):
    return {"Authorization": f"Bearer {token}"}


# --- defaults ------------------------------------------------------------------------------


def test_defaults_are_open(client):
    r = client.post("/v1/propagation", json=PROPAGATION_BODY)
    assert r.status_code == 200
    assert "Access-Control-Allow-Origin" not in r.headers
    assert "X-RateLimit-Limit" not in r.headers
    # A browser origin is neither rejected nor granted CORS when no allow-list is set.
    r = client.get("/health", headers={"Origin": "https://elsewhere.example"})
    assert r.status_code == 200
    assert "Access-Control-Allow-Origin" not in r.headers


def test_default_settings_switch_everything_off():
    s = Settings.from_env({})
    assert s.auth_tokens == () and s.cors_origins == () and s.rate_limit == ""
    assert s.request_timeout_s == 0 and s.test_fail_first_n == 0 and s.forwarded_hops == 0


@pytest.mark.parametrize(
    "path, kwargs",
    [
        ("/health", {}),
        ("/no/such/path", {}),  # 404 problem
        ("/v1/propagation", {"json": {"stars": []}}),  # 422 problem
        ("/docs", {}),
        ("/metrics", {}),
    ],
)
def test_security_headers_on_every_response(client, path, kwargs):
    r = client.post(path, **kwargs) if kwargs else client.get(path)
    for name, value in access.SECURITY_HEADERS.items():
        assert r.headers.get(name) == value, (path, name)


@pytest.mark.parametrize("spelling", ["Cache-Control", "cache-control", "CACHE-CONTROL"])
def test_security_headers_keep_a_views_own_value_once(settings, spelling):
    """A view that sets one of the security headers itself (header names are
    case-insensitive, RFC 9110 section 5.1) keeps its value, not a second one."""
    app = create_app({"SKYDRIFT_SETTINGS": settings, "TESTING": True})

    @app.get("/own-cache-control")
    def own():
        return "cached", 200, {spelling: "max-age=60"}

    r = app.test_client().get("/own-cache-control")
    assert r.headers.getlist("Cache-Control") == ["max-age=60"]
    assert r.headers.get("X-Frame-Options") == access.SECURITY_HEADERS["X-Frame-Options"]


# --- bearer tokens -------------------------------------------------------------------------


def test_token_required_when_configured(settings):
    c = make_client(settings, auth_tokens=(TOKEN_A,))
    r = c.post("/v1/propagation", json=PROPAGATION_BODY)
    assert_problem(r, 401)
    assert r.headers["WWW-Authenticate"].startswith("Bearer")


def test_wrong_token_rejected_with_invalid_token(settings):
    c = make_client(settings, auth_tokens=(TOKEN_A,))
    r = c.post("/v1/propagation", json=PROPAGATION_BODY, headers=bearer(TOKEN_B))
    assert_problem(r, 401)
    assert 'error="invalid_token"' in r.headers["WWW-Authenticate"]
    # A prefix of the token, or another scheme with the right token, is not accepted either.
    assert c.get("/docs", headers=bearer(TOKEN_A[:-1])).status_code == 401
    assert c.get("/docs", headers={"Authorization": f"Basic {TOKEN_A}"}).status_code == 401


def test_right_token_accepted_and_every_token_checked(settings, monkeypatch):
    calls = []
    original = hmac.compare_digest

    def spy(a, b):
        calls.append((len(a), len(b)))
        return original(a, b)

    monkeypatch.setattr(access.hmac, "compare_digest", spy)
    c = make_client(settings, auth_tokens=(TOKEN_A, TOKEN_B))
    r = c.post("/v1/propagation", json=PROPAGATION_BODY, headers=bearer(TOKEN_B))
    assert r.status_code == 200
    assert c.get("/openapi.json", headers=bearer(TOKEN_A)).status_code == 200
    # Constant time: hmac.compare_digest against every configured token, every request.
    assert len(calls) == 4


def test_probes_open_and_metrics_closed_with_tokens(settings):
    c = make_client(settings, auth_tokens=(TOKEN_A,))
    assert c.get("/health").status_code == 200
    assert c.get("/ready").status_code == 200
    assert c.get("/metrics").status_code == 401
    assert c.get("/metrics", headers=bearer(TOKEN_A)).status_code == 200


def test_tokens_from_environment_and_file(tmp_path):
    f = tmp_path / "tokens"
    f.write_text(f"# operators\n{TOKEN_A}\n\n  # pipeline\n{TOKEN_B}  \n")
    s = Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)})
    assert s.auth_tokens == (TOKEN_A, TOKEN_B)
    s = Settings.from_env({"SKYDRIFT_AUTH_TOKENS": f" {TOKEN_A} ,{TOKEN_B}"})
    assert s.auth_tokens == (TOKEN_A, TOKEN_B)
    # Tokens are never shown (repr; the readiness endpoint shows no settings).
    assert TOKEN_A not in repr(s) and TOKEN_A not in str(s)
    assert TOKEN_A not in str(create_app({"SKYDRIFT_SETTINGS": s}).test_client().get("/ready").data)


def test_tokens_file_refuses_a_hash_inside_a_line(tmp_path):
    # A '#' after a token started a comment, so the token "s3cret-pipeline-token#part2"
    # was cut to "s3cret-pipeline-token", and that shorter string was then accepted.
    # Now a comment needs a line of its own and the start stops, naming the file and line.
    f = tmp_path / "tokens"
    f.write_text(f"# operators\n{TOKEN_A}\ns3cret-pipeline-token#part2\n")
    with pytest.raises(ConfigError, match=r"tokens' line 3: '#' inside a line") as caught:
        Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)})
    assert "s3cret" not in str(caught.value)  # the token is never shown
    f.write_text(f"{TOKEN_A}  # pipeline\n")  # a trailing comment: refused the same way
    with pytest.raises(ConfigError, match="line 1"):
        Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)})


def test_tokens_file_with_no_token_stops_the_start(tmp_path):
    # An empty file (a Secret mounted before it was filled, say) left authentication off
    # without a word: every request was served to anyone.
    f = tmp_path / "tokens"
    for text in ["", "\n\n", "# to be filled\n"]:
        f.write_text(text)
        with pytest.raises(ConfigError, match="no token in the file"):
            Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)})
    with pytest.raises(ConfigError, match="holds no token"):
        Settings.from_env({"SKYDRIFT_AUTH_TOKENS": " , "})


def test_tokens_file_byte_order_mark_and_line_ends(tmp_path):
    # A UTF-8 byte order mark (U+FEFF, written by some editors) is not part of the first
    # token; it was kept, and the start failed with a message about control characters.
    f = tmp_path / "tokens"
    f.write_bytes(b"\xef\xbb\xbf" + f"{TOKEN_A}\r\n{TOKEN_B}\r\n".encode())
    assert Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)}).auth_tokens == (
        TOKEN_A,
        TOKEN_B,
    )
    f.write_bytes(b"\xff" + TOKEN_A.encode())  # not UTF-8: named, no traceback
    with pytest.raises(ConfigError, match="not UTF-8"):
        Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)})
    f.write_text(f"{TOKEN_A}\nshort-token\n")  # a bad token: its line is named
    with pytest.raises(ConfigError, match="line 2: a token is shorter"):
        Settings.from_env({"SKYDRIFT_AUTH_TOKENS_FILE": str(f)})


@pytest.mark.parametrize(
    "env, needle",
    [
        ({"SKYDRIFT_AUTH_TOKENS": "short"}, "SKYDRIFT_AUTH_TOKENS"),
        ({"SKYDRIFT_AUTH_TOKENS_FILE": "/nonexistent/tokens"}, "SKYDRIFT_AUTH_TOKENS_FILE"),
        ({"SKYDRIFT_CORS_ORIGINS": "sky.example.org"}, "SKYDRIFT_CORS_ORIGINS"),
        ({"SKYDRIFT_CORS_ORIGINS": "https://sky.example.org/app"}, "SKYDRIFT_CORS_ORIGINS"),
        ({"SKYDRIFT_RATE_LIMIT": "lots"}, "SKYDRIFT_RATE_LIMIT"),
        # A zero amount refused every request of every client, forever.
        ({"SKYDRIFT_RATE_LIMIT": "0/minute"}, "SKYDRIFT_RATE_LIMIT"),
        ({"SKYDRIFT_AUTH_FAILURE_LIMIT": "0/minute"}, "SKYDRIFT_AUTH_FAILURE_LIMIT"),
        ({"SKYDRIFT_AUTH_FAILURE_LIMIT": "often"}, "SKYDRIFT_AUTH_FAILURE_LIMIT"),
        ({"SKYDRIFT_REQUEST_TIMEOUT_S": "-1"}, "SKYDRIFT_REQUEST_TIMEOUT_S"),
        ({"SKYDRIFT_TEST_FAIL_FIRST_N": "x"}, "SKYDRIFT_TEST_FAIL_FIRST_N"),
        ({"SKYDRIFT_FORWARDED_HOPS": "99"}, "SKYDRIFT_FORWARDED_HOPS"),
    ],
)
def test_bad_access_settings_stop_the_start(env, needle):
    with pytest.raises(ConfigError, match=needle):
        Settings.from_env(env)


@pytest.mark.parametrize("storage", ["reddis://h:6379", "async+memory://"])
def test_unknown_rate_limit_store_stops_the_start_even_with_no_limit(storage):
    # Not checked until a limit used the store: an operator who set the store first and the
    # limit later learnt of the mistake only then. The async+ schemes stopped the start
    # with a bare AssertionError once a limit used them.
    env = {"SKYDRIFT_RATE_LIMIT_STORAGE": storage, "SKYDRIFT_AUTH_FAILURE_LIMIT": "off"}
    with pytest.raises(ConfigError, match="SKYDRIFT_RATE_LIMIT_STORAGE") as info:
        Settings.from_env(env)
    assert "\n" not in str(info.value) and "memory, " in str(info.value)  # the schemes named
    env["SKYDRIFT_RATE_LIMIT"] = "10/second"
    with pytest.raises(ConfigError, match="SKYDRIFT_RATE_LIMIT_STORAGE"):
        Settings.from_env(env)


def test_shared_rate_limit_stores_are_accepted_without_a_connection():
    # Only the address is read at start: no connection, and no client library needed
    # until a limit uses the store (then access.py names a missing one).
    for storage in ("redis://cache.example.org:6379/0", "redis+unix:///run/redis.sock"):
        env = {"SKYDRIFT_RATE_LIMIT_STORAGE": storage}
        assert Settings.from_env(env).rate_limit_storage == storage


@pytest.mark.parametrize("storage", ["foo://x", "nosuchstore://127.0.0.1:1"])
def test_unusable_rate_limit_store_stops_the_start_naming_the_setting(settings, storage):
    # The limits library refuses an unknown scheme (or one whose client is not installed)
    # when the limiter is made; that came out as a traceback naming no setting.
    s = dataclasses.replace(settings, rate_limit="10/second", rate_limit_storage=storage)
    with pytest.raises(ConfigError, match="SKYDRIFT_RATE_LIMIT_STORAGE"):
        create_app({"SKYDRIFT_SETTINGS": s, "TESTING": True})


# --- CORS ----------------------------------------------------------------------------------

SKY_APP = "https://sky.example.org"


def test_cors_headers_only_for_allowed_origins(settings):
    c = make_client(settings, cors_origins=(SKY_APP,))
    r = c.post("/v1/propagation", json=PROPAGATION_BODY, headers={"Origin": SKY_APP})
    assert r.status_code == 200
    assert r.headers["Access-Control-Allow-Origin"] == SKY_APP
    assert "Origin" in r.headers["Vary"]
    assert "X-Request-ID" in r.headers["Access-Control-Expose-Headers"]
    r = c.post("/v1/propagation", json=PROPAGATION_BODY, headers={"Origin": "https://evil.example"})
    assert_problem(r, 403)
    assert "Access-Control-Allow-Origin" not in r.headers
    # No Origin (servers, scripts): no CORS headers, no rejection.
    r = c.post("/v1/propagation", json=PROPAGATION_BODY)
    assert r.status_code == 200 and "Access-Control-Allow-Origin" not in r.headers


def test_cors_preflight(settings):
    c = make_client(settings, cors_origins=(SKY_APP,), auth_tokens=(TOKEN_A,))
    ask = {
        "Access-Control-Request-Method": "POST",
        "Access-Control-Request-Headers": "authorization, content-type",
    }
    # A preflight carries no credentials, so it must pass without the token.
    r = c.options("/v1/propagation", headers={"Origin": SKY_APP, **ask})
    assert r.status_code == 204
    assert r.headers["Access-Control-Allow-Origin"] == SKY_APP
    assert "POST" in r.headers["Access-Control-Allow-Methods"]
    assert "Authorization" in r.headers["Access-Control-Allow-Headers"]
    r = c.options("/v1/propagation", headers={"Origin": "https://evil.example", **ask})
    assert_problem(r, 403)
    assert "Access-Control-Allow-Origin" not in r.headers


def test_refused_origin_is_echoed_clipped_and_empty_token_named(settings):
    """The 403 names the Origin it refused, cut to the 300 characters every echo of request
    text is cut to (errors.MAX_ECHOED_CHARS); an empty bearer token is called empty."""
    c = make_client(settings, cors_origins=(SKY_APP,), auth_tokens=(TOKEN_A,))
    long_origin = "https://" + "x" * 5000 + ".example"
    for r in (
        c.post("/v1/propagation", json=PROPAGATION_BODY, headers={"Origin": long_origin}),
        c.options("/v1/propagation", headers={"Origin": long_origin,
                                              "Access-Control-Request-Method": "POST"}),
    ):  # fmt: skip
        assert_problem(r, 403)
        assert "https://xxx" in r.json["detail"] and len(r.json["detail"]) < 400
    r = c.post("/v1/propagation", json=PROPAGATION_BODY, headers={"Authorization": "Bearer   "})
    assert_problem(r, 401)
    assert "empty" in r.json["detail"]


@pytest.mark.parametrize(
    "written, sent",
    [
        # Browsers send the ASCII serialisation of an origin (HTML standard, "origin";
        # RFC 6454 section 6.2): scheme and host in lower case, no default port, IPv6
        # compressed. An allow-list entry written otherwise used to match no browser.
        ("HTTPS://Sky.Example.org", SKY_APP),
        ("https://sky.example.org:443/", SKY_APP),
        ("http://localhost:80", "http://localhost"),
        ("http://[0:0:0:0:0:0:0:1]:5173", "http://[::1]:5173"),
    ],
)
def test_cors_origins_compared_as_browsers_write_them(settings, written, sent):
    s = Settings.from_env({"SKYDRIFT_CORS_ORIGINS": written})
    assert s.cors_origins == (sent,)
    c = make_client(settings, cors_origins=s.cors_origins)
    r = c.get("/v1/constellations", headers={"Origin": sent})
    assert r.status_code == 200 and r.headers["Access-Control-Allow-Origin"] == sent


@pytest.mark.parametrize(
    "written",
    ["https://sky.example.org?x=1", "https://user@sky.example.org", "https://bücher.example",
     "https://sky.example.org:65536", "ftp://sky.example.org"],
)  # fmt: skip
def test_cors_origins_no_browser_can_send_stop_the_start(written):
    # A query, user info or a non-ASCII host (browsers send its punycode form) can never
    # be in an Origin header: such an entry would refuse every browser without a word.
    with pytest.raises(ConfigError, match="SKYDRIFT_CORS_ORIGINS"):
        Settings.from_env({"SKYDRIFT_CORS_ORIGINS": written})


def test_cors_any_origin(settings):
    c = make_client(settings, cors_origins=("*",))
    r = c.get("/health", headers={"Origin": "https://anything.example"})
    assert r.headers["Access-Control-Allow-Origin"] == "*"


# --- rate limit ----------------------------------------------------------------------------


def test_rate_limit_429_with_retry_after(settings):
    c = make_client(settings, rate_limit="3/minute")
    for _ in range(3):
        r = c.post("/v1/propagation", json=PROPAGATION_BODY)
        assert r.status_code == 200
        assert r.headers["X-RateLimit-Limit"] == "3"
    r = c.post("/v1/propagation", json=PROPAGATION_BODY)
    assert_problem(r, 429)
    retry_after = int(r.headers["Retry-After"])
    assert 0 < retry_after <= 60
    # Probes and metrics are never limited.
    assert c.get("/health").status_code == 200
    assert c.get("/ready").status_code == 200
    assert c.get("/metrics").status_code == 200


def test_rate_limit_retry_after_only_on_429(settings):
    # RFC 9110 section 10.2.3: Retry-After says how long to wait before the next request.
    # The limiter put its window's end (here up to 3600 s) on every answer and raised a
    # 503's own Retry-After to it, so a client honouring it waited out the hour.
    c = make_client(settings, rate_limit="2/hour", test_fail_first_n=1, test_fail_retry_after_s=1)
    r = c.post("/v1/propagation", json=PROPAGATION_BODY)
    assert_problem(r, 503)
    assert r.headers.getlist("Retry-After") == ["1"]  # SKYDRIFT_TEST_FAIL_RETRY_AFTER_S
    r = c.post("/v1/propagation", json=PROPAGATION_BODY)
    assert r.status_code == 200 and "Retry-After" not in r.headers
    assert r.headers["X-RateLimit-Remaining"] == "0"
    r = c.post("/v1/propagation", json=PROPAGATION_BODY)
    assert_problem(r, 429)
    assert 3500 < int(r.headers["Retry-After"]) <= 3600
    # The request time limit's 503 carries no Retry-After of the limiter's either.
    slow = _app_with_slow_route(dataclasses.replace(settings, rate_limit="5/hour"), 0.2)
    r = slow.get("/test-slow/5.0")
    assert_problem(r, 503)
    assert "Retry-After" not in r.headers


def test_rate_limit_is_per_client(settings):
    c = make_client(settings, rate_limit="2/minute", auth_tokens=(TOKEN_A, TOKEN_B))
    for _ in range(2):
        assert c.get("/openapi.json", headers=bearer(TOKEN_A)).status_code == 200
    assert c.get("/openapi.json", headers=bearer(TOKEN_A)).status_code == 429
    assert c.get("/openapi.json", headers=bearer(TOKEN_B)).status_code == 200


def test_rate_limit_per_address_behind_trusted_proxy(settings):
    c = make_client(settings, rate_limit="1/minute", forwarded_hops=1)
    one = {"X-Forwarded-For": "192.0.2.1"}
    two = {"X-Forwarded-For": "192.0.2.2"}
    assert c.get("/openapi.json", headers=one).status_code == 200
    assert c.get("/openapi.json", headers=one).status_code == 429
    assert c.get("/openapi.json", headers=two).status_code == 200


# --- failed authentications ---------------------------------------------------------------


def test_failed_authentications_limited_per_address(settings):
    # Wrong or missing tokens were never limited (the rate limit runs after the token
    # check), so a client could guess tokens at full speed. Past the limit, an address is
    # answered 429 with Retry-After (RFC 6585 section 4) without its token being looked
    # at, so the answer tells a guesser nothing; other addresses keep their own count.
    c = make_client(
        settings, auth_tokens=(TOKEN_A,), auth_failure_limit="3/minute", forwarded_hops=1
    )
    guesser = {"X-Forwarded-For": "192.0.2.1"}
    other = {"X-Forwarded-For": "192.0.2.2"}
    for _ in range(5):  # successes do not count
        assert c.get("/openapi.json", headers={**guesser, **bearer(TOKEN_A)}).status_code == 200
    for i in range(3):
        guess = {} if i == 0 else bearer(f"guess-{i:016d}")  # a missing token counts too
        assert c.get("/openapi.json", headers={**guesser, **guess}).status_code == 401
    for headers in [bearer("guess-again-0000000000"), bearer(TOKEN_A)]:
        r = c.get("/openapi.json", headers={**guesser, **headers})
        assert_problem(r, 429)
        assert 0 < int(r.headers["Retry-After"]) <= 60
        assert "SKYDRIFT_AUTH_FAILURE_LIMIT" in r.json["detail"]
    # Another address is not locked out, and has a count of its own.
    assert c.get("/openapi.json", headers={**other, **bearer(TOKEN_A)}).status_code == 200
    assert c.get("/openapi.json", headers={**other, **bearer(TOKEN_B)}).status_code == 401
    # Probes stay open to the locked-out address.
    assert c.get("/health", headers=guesser).status_code == 200


def test_failed_authentication_limit_beside_the_rate_limit_and_off(settings):
    c = make_client(
        settings, auth_tokens=(TOKEN_A,), auth_failure_limit="2/minute", rate_limit="5/hour"
    )
    for _ in range(2):
        assert c.get("/openapi.json", headers=bearer(TOKEN_B)).status_code == 401
    r = c.get("/openapi.json", headers=bearer(TOKEN_B))
    assert_problem(r, 429)
    assert r.headers.getlist("Retry-After") and int(r.headers["Retry-After"]) <= 60
    # A preflight carries no token and is not a failure.
    c = make_client(
        settings, auth_tokens=(TOKEN_A,), auth_failure_limit="1/minute", cors_origins=(SKY_APP,)
    )
    ask = {"Origin": SKY_APP, "Access-Control-Request-Method": "POST"}
    for _ in range(3):
        assert c.options("/v1/propagation", headers=ask).status_code == 204
    assert c.get("/openapi.json", headers=bearer(TOKEN_A)).status_code == 200
    # "off": no limit on failures.
    s = Settings.from_env({"SKYDRIFT_AUTH_FAILURE_LIMIT": "off"})
    assert s.auth_failure_limit == ""
    c = make_client(settings, auth_tokens=(TOKEN_A,), auth_failure_limit="")
    assert {c.get("/docs", headers=bearer(TOKEN_B)).status_code for _ in range(30)} == {401}


def test_failed_authentication_limit_defaults_and_store(settings):
    assert Settings.from_env({}).auth_failure_limit == "10/minute"
    s = dataclasses.replace(settings, auth_tokens=(TOKEN_A,), rate_limit_storage="foo://x")
    with pytest.raises(ConfigError, match="SKYDRIFT_RATE_LIMIT_STORAGE"):
        create_app({"SKYDRIFT_SETTINGS": s, "TESTING": True})


# --- body size and batch size --------------------------------------------------------------


class UnreadableBody:
    """A request body of ``size`` bytes that fails the test if anything reads it."""

    def __init__(self, size):
        self.size, self.pos = size, 0

    def tell(self):
        return self.pos

    def seek(self, offset, whence=0):
        self.pos = self.size if whence == 2 else offset

    def read(self, *args):
        raise AssertionError("the body was read")

    readline = readlines = read

    def __iter__(self):
        raise AssertionError("the body was read")


def test_oversized_body_413_before_the_body_is_read(client, settings):
    r = client.post(
        "/v1/propagation",
        input_stream=UnreadableBody(settings.max_body_bytes + 1),
        content_type="application/json",
    )
    assert_problem(r, 413)
    assert str(settings.max_body_bytes) in r.json["detail"]


def test_oversized_chunked_body_413_names_the_setting(client, settings):
    # No declared length (Transfer-Encoding: chunked, RFC 9112 section 7.1): the limit
    # bites while the body is read. The answer named no limit and no setting
    # (werkzeug's "The data value transmitted exceeds the capacity limit.").
    import io

    body = b"[" + b" " * (settings.max_body_bytes + 10) + b"]"
    r = client.post(
        "/v1/propagation",
        input_stream=io.BytesIO(body),
        content_type="application/json",
        headers={"Transfer-Encoding": "chunked"},
        environ_overrides={"wsgi.input_terminated": True},
    )
    assert_problem(r, 413)
    assert "SKYDRIFT_MAX_BODY_BYTES" in r.json["detail"]
    assert str(settings.max_body_bytes) in r.json["detail"]


def test_oversized_invalid_json_is_413_not_400(client, settings):
    # Parsing would answer 400 (not JSON); the size check comes first.
    r = client.post(
        "/v1/propagation",
        data=b"{" * (settings.max_body_bytes + 1),
        content_type="application/json",
    )
    assert_problem(r, 413)


def test_batch_size_limit(client, settings):
    stars = PROPAGATION_BODY["stars"] * (settings.max_stars + 1)
    r = client.post("/v1/propagation", json=dict(PROPAGATION_BODY, stars=stars))
    assert_problem(r, 413)


# --- request time limit --------------------------------------------------------------------


def _wait(seconds):
    """Wait in short sleeps, running Python code between them (where the time limit's
    exception can arrive)."""
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        time.sleep(0.01)


def _slow_app(settings, seconds):
    """The application with a time limit of ``seconds`` and a route that takes as long as
    asked (/test-slow/<seconds>)."""
    app = create_app(
        {"SKYDRIFT_SETTINGS": dataclasses.replace(settings, request_timeout_s=seconds)}
    )

    @app.get("/test-slow/<float:duration>")
    def slow(duration):
        _wait(duration)
        return {"slept": duration}

    return app


def _app_with_slow_route(settings, seconds):
    return _slow_app(settings, seconds).test_client()


def test_a_slow_answer_past_the_time_limit_stays_the_time_limit_503(settings):
    # The watchdog raises its exception again every second while a request runs on (one
    # may be dropped). Once the time limit's 503 is being made it must raise no more: an
    # answer whose after-request hooks take longer than that (a starved machine) was
    # interrupted again and answered 500, its hooks run twice.
    app = _slow_app(settings, 0.2)
    hook_runs = {"started": 0, "finished": 0}

    @app.after_request
    def slow_hook(resp):
        hook_runs["started"] += 1
        _wait(access._Watchdog.REFIRE_S + 0.3)  # past the watchdog's next raising
        hook_runs["finished"] += 1
        return resp

    r = app.test_client().get("/test-slow/5.0")
    assert_problem(r, 503)
    assert "time limit" in r.json["detail"]
    assert hook_runs == {"started": 1, "finished": 1}


def test_request_time_limit(settings):
    c = _app_with_slow_route(settings, 0.2)
    started = time.monotonic()
    r = c.get("/test-slow/5.0")
    assert time.monotonic() - started < 2.0
    assert_problem(r, 503)
    assert "time limit" in r.json["detail"]
    # A quick request is untouched, and no timer is left running after it.
    assert c.get("/test-slow/0.05").status_code == 200
    time.sleep(0.3)
    assert c.get("/health").status_code == 200


# --- test-only failures --------------------------------------------------------------------


def test_fail_first_n_is_test_only_and_counts(settings):
    c = make_client(settings, test_fail_first_n=2, test_fail_retry_after_s=3)
    assert c.get("/health").status_code == 200  # probes are not failed on purpose
    for _ in range(2):
        r = c.post("/v1/propagation", json=PROPAGATION_BODY)
        assert_problem(r, 503)
        assert r.headers["Retry-After"] == "3"
        assert "SKYDRIFT_TEST_FAIL_FIRST_N" in r.json["detail"]
    assert c.post("/v1/propagation", json=PROPAGATION_BODY).status_code == 200


def test_request_time_limit_in_a_worker_thread(settings):
    # Threaded gunicorn workers serve requests outside the main thread.
    import threading

    c = _app_with_slow_route(settings, 0.2)
    out = {}
    t = threading.Thread(target=lambda: out.update(r=c.get("/test-slow/5.0")))
    started = time.monotonic()
    t.start()
    t.join(10)
    assert time.monotonic() - started < 2.0
    assert_problem(out["r"], 503)


STATIC_GETS = (
    "/v1/constellations",
    "/v1/constellations/Ori/outline?frame=galactic",
    "/v1/constellations/outlines?tolerance_arcsec=30",
)


@pytest.mark.parametrize("path", STATIC_GETS)
def test_static_answers_may_be_cached_and_revalidated(client, path):
    # RFC 9110 section 13.1.2: a GET whose If-None-Match names the current ETag is answered
    # 304 without a body; RFC 9111 section 5.2.2: max-age lets caches reuse the answer.
    first = client.get(path)
    assert first.status_code == 200
    tag = first.headers["ETag"]
    assert tag.startswith('"') and tag.endswith('"')  # a strong ETag
    assert first.headers["Cache-Control"] == "public, max-age=86400"
    again = client.get(path, headers={"If-None-Match": tag})
    assert again.status_code == 304 and again.data == b""
    assert again.headers["ETag"] == tag
    other = client.get(path, headers={"If-None-Match": '"something-else"'})
    assert other.status_code == 200 and other.data == first.data


def test_cached_answers_differ_by_request_and_stay_private_behind_tokens(client, settings):
    a = client.get("/v1/constellations/Ori/outline").headers["ETag"]
    b = client.get("/v1/constellations/Ori/outline?frame=galactic").headers["ETag"]
    assert a != b
    # Behind tokens a shared cache must not serve the answer to a caller without one
    # (RFC 9111 section 3.5): private only.
    c = make_client(settings, auth_tokens=(TOKEN_A,))
    r = c.get("/v1/constellations", headers={"Authorization": f"Bearer {TOKEN_A}"})
    assert r.headers["Cache-Control"] == "private, max-age=86400"
    assert c.get("/v1/constellations").status_code == 401
    # An outline for the equinox of now moves with the clock (0.14 arcsec a day of
    # precession): not stored.
    now = client.get("/v1/constellations/Ori/outline?frame=fk5&equinox=now")
    assert now.status_code == 200 and now.headers["Cache-Control"] == "no-store"
    assert "ETag" not in now.headers
    # Everything else, errors included, is still not stored.
    assert client.get("/v1/constellations/Xyz/outline").headers["Cache-Control"] == "no-store"
    lookup = client.post(
        "/v1/constellations/lookup", json={"stars": [{"ra_deg": 83.0, "dec_deg": 5.0}]}
    )
    assert lookup.status_code == 200 and lookup.headers["Cache-Control"] == "no-store"
    assert "ETag" not in lookup.headers


def test_request_time_limit_turned_into_another_error_by_a_library_is_still_503(settings):
    # The time limit's exception arrives wherever the thread next runs Python code; inside
    # an extension's callback the extension may report its own error instead (seen under
    # load: matplotlib's "ValueError: Invalid affine transformation matrix" for a chart past
    # the limit). README: past the limit a request is answered 503, not 500.
    from service.api.access import RequestTimeLimit

    app = create_app({"SKYDRIFT_SETTINGS": dataclasses.replace(settings, request_timeout_s=0.2)})

    @app.get("/test-slow-extension")
    def slow_extension():
        try:
            end = time.monotonic() + 5.0
            while time.monotonic() < end:
                time.sleep(0.01)
        except RequestTimeLimit:  # what an extension converting the error does
            raise ValueError("Invalid affine transformation matrix") from None
        return {"slept": 5.0}

    r = app.test_client().get("/test-slow-extension")
    assert_problem(r, 503)
    assert "time limit" in r.json["detail"]
    assert app.test_client().get("/health").status_code == 200


def test_request_time_limit_raised_again_when_the_first_is_dropped(settings):
    # Python prints and drops an exception raised in a weakref callback or a __del__ (seen
    # under load: "Exception ignored in: WeakKeyDictionary...remove ... RequestTimeLimit"
    # during a chart, which then ran to its end and was answered 200). README: a request
    # still running past the limit is answered 503.
    from service.api.access import RequestTimeLimit, _watchdog

    app = create_app({"SKYDRIFT_SETTINGS": dataclasses.replace(settings, request_timeout_s=0.2)})

    @app.get("/test-slow-dropping")
    def slow_dropping():
        dropped = False
        end = time.monotonic() + 6.0
        while time.monotonic() < end:
            try:
                time.sleep(0.01)
            except RequestTimeLimit:
                if dropped:
                    raise
                dropped = True  # as Python does in a weakref callback
        return {"dropped": dropped}

    started = time.monotonic()
    r = app.test_client().get("/test-slow-dropping")
    elapsed = time.monotonic() - started
    assert_problem(r, 503)
    # limit 0.2 s, raised again REFIRE_S later, watchdog ticks of 0.05 s: 0.5 s to spare
    assert elapsed < 0.2 + _watchdog.REFIRE_S + 0.5
    assert app.test_client().get("/health").status_code == 200
