"""Access control and limits: tokens, CORS, rate limits, body size, time limits, headers.

Everything here is off or permissive by default (a lab on a private network needs none of
it) and switched on by settings (service/config.py, README "Deployment"). Checks run before
the request body is read, in this order, each rejection an RFC 9457 problem:

1. CORS preflight (OPTIONS with Origin): answered here, 204 for an allowed origin, 403
   otherwise. A request from a browser origin outside the allow-list: 403.
2. Bearer token (SKYDRIFT_AUTH_TOKENS[_FILE]): 401 with ``WWW-Authenticate: Bearer`` when
   missing or not accepted (RFC 6750 section 3). Compared in constant time. Each 401 counts
   against the client address (SKYDRIFT_AUTH_FAILURE_LIMIT); an address past that limit is
   answered 429 with Retry-After, without its token being looked at, until the window ends.
3. Declared body size above SKYDRIFT_MAX_BODY_BYTES: 413, without reading the body.
4. Per-client rate limit (SKYDRIFT_RATE_LIMIT, flask-limiter): 429 with Retry-After.
5. Test only (SKYDRIFT_TEST_FAIL_FIRST_N): 503 with Retry-After for the first N requests.

Then, while the request runs: past SKYDRIFT_REQUEST_TIMEOUT_S it is abandoned with 503.

Liveness and readiness (``/health``, ``/ready``) are never authenticated, limited or failed
on purpose: orchestrators probe them; ``/metrics`` needs the token (when tokens are set) but
is neither limited nor failed on purpose. Every response carries the security headers of
:data:`SECURITY_HEADERS`.
"""

from __future__ import annotations

import ctypes
import hashlib
import hmac
import logging
import math
import multiprocessing
import os
import threading
import time

from flask import Response, g, request
from werkzeug.exceptions import ServiceUnavailable
from werkzeug.middleware.proxy_fix import ProxyFix

from ..config import ConfigError
from .errors import clip_echo, problem_response

log = logging.getLogger("skydrift.access")

#: Paths orchestrators probe: never behind a token, a rate limit or a test failure.
PROBE_PATHS = frozenset({"/health", "/ready"})
#: Paths not subject to rate limits or test failures (but to the token when one is set).
OPERATOR_PATHS = PROBE_PATHS | {"/metrics"}

#: Headers on every response. The content security policy allows only the reference page's
#: inline styles; nothing is loaded from elsewhere and no page may frame the service.
SECURITY_HEADERS = {
    "X-Content-Type-Options": "nosniff",
    "X-Frame-Options": "DENY",
    "Content-Security-Policy": "default-src 'none'; style-src 'unsafe-inline'; "
    "frame-ancestors 'none'; base-uri 'none'; form-action 'none'",
    "Referrer-Policy": "no-referrer",
    "Cross-Origin-Opener-Policy": "same-origin",
    "Cache-Control": "no-store",
}

_SECURITY_HEADERS_BY_LOWER = tuple((k.lower(), (k, v)) for k, v in SECURITY_HEADERS.items())

CORS_ALLOW_METHODS = "GET, POST, OPTIONS"
CORS_ALLOW_HEADERS = "Authorization, Content-Type, X-Request-ID"
CORS_EXPOSE_HEADERS = (
    "X-Request-ID, Retry-After, X-RateLimit-Limit, X-RateLimit-Remaining, X-RateLimit-Reset"
)
CORS_MAX_AGE_S = 600


class RequestTimeLimit(ServiceUnavailable):
    """The request ran past SKYDRIFT_REQUEST_TIMEOUT_S."""

    description = (
        "The request took longer than the service's time limit; send a smaller batch "
        "(fewer stars or epochs)."
    )


# --- bearer tokens --------------------------------------------------------------------------


def _token_digests(tokens) -> tuple:
    # Compare fixed-length digests so neither the length nor the content of an accepted
    # token leaks through timing.
    return tuple(hashlib.sha256(t.encode()).digest() for t in tokens)


def _check_token(digests) -> Response | None:
    header = request.headers.get("Authorization", "")
    scheme, _, given = header.partition(" ")
    if not header:
        return _unauthorized("A bearer token is required (Authorization: Bearer <token>).")
    if scheme.lower() != "bearer":
        return _unauthorized("Use the Bearer scheme: Authorization: Bearer <token>.", True)
    if not given.strip():
        return _unauthorized("The bearer token is empty (Authorization: Bearer <token>).", True)
    digest = hashlib.sha256(given.strip().encode()).digest()
    match = False
    for known in digests:  # no early exit: every token is compared
        match |= hmac.compare_digest(digest, known)
    if not match:
        return _unauthorized("The bearer token is not accepted.", True)
    g.client = "token:" + digest.hex()[:16]
    return None


class _FailureLimit:
    """Failed authentications per client address (SKYDRIFT_AUTH_FAILURE_LIMIT).

    Kept in the rate-limit store (SKYDRIFT_RATE_LIMIT_STORAGE), fixed windows. Only 401
    answers count, by address: a client with a wrong token cannot use up another client's
    allowance, except one sharing its address (hence SKYDRIFT_FORWARDED_HOPS behind proxies).
    """

    NAMESPACE = "skydrift-auth-failures"

    def __init__(self, limit: str, storage_uri: str):
        from limits import parse_many, storage, strategies
        from limits.errors import ConfigurationError

        self.items = parse_many(limit)
        try:
            store = storage.storage_from_string(storage_uri)
        except ConfigurationError as exc:
            raise ConfigError(f"SKYDRIFT_RATE_LIMIT_STORAGE={storage_uri!r}: {exc}") from None
        self.limiter = strategies.FixedWindowRateLimiter(store)

    def wait_s(self, key: str) -> int:
        """Whole seconds until ``key`` may try again; 0 if it may now."""
        wait = 0
        for item in self.items:
            if not self.limiter.test(item, self.NAMESPACE, key):
                stats = self.limiter.get_window_stats(item, self.NAMESPACE, key)
                wait = max(wait, 1, math.ceil(stats.reset_time - time.time()))
        return wait

    def hit(self, key: str) -> None:
        for item in self.items:
            self.limiter.hit(item, self.NAMESPACE, key)


def _too_many_failures(wait_s: int) -> Response:
    return problem_response(
        429,
        "Too Many Requests",
        f"Too many failed authentications from this address; try again in {wait_s} s "
        "(setting SKYDRIFT_AUTH_FAILURE_LIMIT).",
        headers={"Retry-After": str(wait_s)},
    )


def _unauthorized(detail: str, invalid: bool = False) -> Response:
    challenge = 'Bearer realm="skydrift"'
    if invalid:
        challenge += ', error="invalid_token"'
    return problem_response(401, "Unauthorized", detail, headers={"WWW-Authenticate": challenge})


# --- CORS -------------------------------------------------------------------------------------


def _origin_allowed(origin: str, origins) -> bool:
    return "*" in origins or origin in origins


def _same_origin(origin: str) -> bool:
    return origin == request.host_url.rstrip("/")


def _preflight(origins) -> Response:
    origin = request.headers["Origin"]
    if not _origin_allowed(origin, origins):
        return problem_response(
            403,
            "Forbidden",
            f"Origin {clip_echo(origin)} is not allowed (setting SKYDRIFT_CORS_ORIGINS).",
        )
    resp = Response(status=204)
    resp.headers["Access-Control-Allow-Methods"] = CORS_ALLOW_METHODS
    resp.headers["Access-Control-Allow-Headers"] = CORS_ALLOW_HEADERS
    resp.headers["Access-Control-Max-Age"] = str(CORS_MAX_AGE_S)
    return resp


# --- request time limit ---------------------------------------------------------------------


class _Watchdog:
    """Raises RequestTimeLimit in threads whose request ran past its deadline.

    One daemon thread per process (started on first use, so after gunicorn forks) looks at
    the deadlines every 50 ms and raises the exception asynchronously in an overdue request's
    thread (CPython's PyThreadState_SetAsyncExc). It works for sync and threaded workers
    alike; the exception arrives when the thread next runs Python code, so one long numpy
    call finishes first.
    """

    TICK_S = 0.05
    #: Seconds between two raisings in a request that is still running (one was dropped).
    REFIRE_S = 1.0

    def __init__(self):
        self.lock = threading.Lock()
        self.deadlines: dict[int, float] = {}
        self.fired: set[int] = set()
        self.thread = None
        self.pid = None

    def arm(self, seconds: float) -> None:
        ident = threading.get_ident()
        with self.lock:
            self.deadlines[ident] = time.monotonic() + seconds
            if self.thread is None or self.pid != os.getpid() or not self.thread.is_alive():
                self.pid = os.getpid()
                self.thread = threading.Thread(
                    target=self._run, name="skydrift-request-time-limit", daemon=True
                )
                self.thread.start()

    def disarm(self) -> None:
        ident = threading.get_ident()
        try:
            with self.lock:
                self.deadlines.pop(ident, None)
                if ident in self.fired:
                    # Fired as the request finished, perhaps not yet raised: withdraw it.
                    _set_async_exc(ident, None)
                self.fired.discard(ident)
        except RequestTimeLimit:  # raised here, after the answer was made: ignore it
            with self.lock:
                self.fired.discard(ident)

    def answering(self) -> None:
        """This thread's request is being answered with its time limit's 503: raise no more
        in it. A raising while that answer is made (its after-request hooks, slow on a
        starved machine) would turn it into a 500."""
        with self.lock:
            ident = threading.get_ident()
            if ident in self.deadlines:
                self.deadlines[ident] = math.inf

    def fired_here(self) -> bool:
        """Whether this thread's request ran past its deadline (until it is disarmed)."""
        with self.lock:
            return threading.get_ident() in self.fired

    def _run(self) -> None:
        while True:
            time.sleep(self.TICK_S)
            now = time.monotonic()
            with self.lock:
                for ident, deadline in list(self.deadlines.items()):
                    if now >= deadline:
                        # Raised again every REFIRE_S until the request ends or its 503
                        # is being made (answering): Python prints and drops an exception
                        # raised in a weakref callback or a __del__ (matplotlib's charts
                        # run many), and the request would run on.
                        self.deadlines[ident] = now + self.REFIRE_S
                        self.fired.add(ident)
                        _set_async_exc(ident, RequestTimeLimit)


def _set_async_exc(ident: int, exc_type) -> None:
    ctypes.pythonapi.PyThreadState_SetAsyncExc(
        ctypes.c_ulong(ident), ctypes.py_object(exc_type) if exc_type else None
    )


_watchdog = _Watchdog()


def answering_time_limit() -> None:
    """The request being served is answered with its time limit's 503 (the watchdog raises
    RequestTimeLimit no more in it)."""
    _watchdog.answering()


def time_limit_passed() -> bool:
    """Whether the request being served ran past SKYDRIFT_REQUEST_TIMEOUT_S.

    The exception is raised wherever the request's thread next runs Python code; inside an
    extension's callback (matplotlib's path conversion, for one) the extension may replace
    it with its own error (ValueError: Invalid affine transformation matrix), which must
    still be answered as the time limit, 503, not as an unexpected 500.
    """
    return _watchdog.fired_here()


# --- wiring ---------------------------------------------------------------------------------


def register(app) -> None:
    """Install the checks and headers on ``app`` (after the request id hook)."""
    settings = app.config["SKYDRIFT_SETTINGS"]
    digests = _token_digests(settings.auth_tokens)
    origins = tuple(settings.cors_origins)
    max_body = settings.max_body_bytes
    timeout_s = settings.request_timeout_s
    fail_first = settings.test_fail_first_n
    fail_counter = multiprocessing.Value("q", 0) if fail_first > 0 else None
    failures = None
    if digests and settings.auth_failure_limit:
        failures = _FailureLimit(settings.auth_failure_limit, settings.rate_limit_storage)
    if fail_first > 0:
        log.warning("SKYDRIFT_TEST_FAIL_FIRST_N=%d: test-only failures are switched on", fail_first)
    if settings.forwarded_hops:
        n = settings.forwarded_hops
        app.wsgi_app = ProxyFix(app.wsgi_app, x_for=n, x_proto=n, x_host=n)

    @app.before_request
    def _gate():
        g.client = "addr:" + (request.remote_addr or "unknown")
        origin = request.headers.get("Origin")
        if origins and origin and not _same_origin(origin):
            if request.method == "OPTIONS" and "Access-Control-Request-Method" in request.headers:
                return _preflight(origins)
            if not _origin_allowed(origin, origins):
                return problem_response(
                    403,
                    "Forbidden",
                    f"Origin {clip_echo(origin)} is not allowed (setting SKYDRIFT_CORS_ORIGINS).",
                )
        if digests and request.path not in PROBE_PATHS:
            # Keyed by address (g.client is still "addr:..." here), never by the token given.
            wait_s = failures.wait_s(g.client) if failures is not None else 0
            if wait_s:
                return _too_many_failures(wait_s)
            rejection = _check_token(digests)
            if rejection is not None:
                if failures is not None:
                    failures.hit(g.client)
                return rejection
        length = request.content_length
        if length is not None and length > max_body:
            resp = problem_response(
                413,
                "Content Too Large",
                f"The request body of {length} bytes exceeds the limit of {max_body} bytes "
                "(setting SKYDRIFT_MAX_BODY_BYTES).",
            )
            resp.headers["Connection"] = "close"  # the body is never read
            return resp
        return None

    if settings.rate_limit:
        _install_rate_limit(app, settings)

    @app.before_request
    def _test_failures_and_time_limit():
        if fail_counter is not None and request.path not in OPERATOR_PATHS:
            with fail_counter.get_lock():
                fail_counter.value += 1
                seen = fail_counter.value
            if seen <= fail_first:
                return problem_response(
                    503,
                    "Service Unavailable",
                    f"Test failure {seen} of {fail_first} (setting SKYDRIFT_TEST_FAIL_FIRST_N, "
                    "for testing clients only).",
                    headers={"Retry-After": str(settings.test_fail_retry_after_s)},
                )
        if timeout_s > 0:
            _watchdog.arm(timeout_s)
        return None

    @app.after_request
    def _headers(resp):
        origin = request.headers.get("Origin")
        if origins:
            resp.vary.add("Origin")  # answers differ by origin: caches must keep them apart
            if origin and _origin_allowed(origin, origins):
                resp.headers["Access-Control-Allow-Origin"] = "*" if "*" in origins else origin
                resp.headers["Access-Control-Expose-Headers"] = CORS_EXPOSE_HEADERS
        # Each security header unless the view set its own: one pass over the headers
        # (Headers.setdefault scans them once per name).
        have = {name.lower() for name, _ in resp.headers.items()}
        resp.headers.extend([kv for low, kv in _SECURITY_HEADERS_BY_LOWER if low not in have])
        return resp

    # Registered last, so among the application's after_request hooks it runs first.
    if timeout_s > 0:

        @app.after_request
        def _stop_clock(resp):
            _watchdog.disarm()
            return resp

        @app.teardown_request
        def _stop_clock_on_error(exc):
            _watchdog.disarm()


def _install_rate_limit(app, settings) -> None:
    from flask_limiter import Limiter

    def client_key() -> str:
        return g.get("client") or ("addr:" + (request.remote_addr or "unknown"))

    # flask-limiter puts a Retry-After (the seconds to the end of the window, up to an hour
    # or a day) on every response, and raises any Retry-After of the answer's own to it: a
    # 503 of the request time limit or of SKYDRIFT_TEST_FAIL_FIRST_N would tell a client
    # that honours it to wait out the rate-limit window. Only a 429 keeps the limiter's; any
    # other answer keeps its own, or none. after_request hooks run in reverse order of
    # registration: this one (registered before the limiter's) runs after it, and
    # _own_retry_after (registered after) runs before it.
    @app.after_request
    def _restore_retry_after(resp):
        if resp.status_code != 429 and "skydrift_retry_after" in g:
            own = g.pop("skydrift_retry_after")
            if own is None:
                resp.headers.pop("Retry-After", None)
            else:
                resp.headers["Retry-After"] = own
        return resp

    from limits.errors import ConfigurationError

    try:
        limiter = Limiter(
            client_key,
            app=app,
            application_limits=[settings.rate_limit],
            application_limits_exempt_when=lambda: (
                request.path in OPERATOR_PATHS or request.method == "OPTIONS"
            ),
            storage_uri=settings.rate_limit_storage,
            headers_enabled=True,
            strategy="fixed-window",
            key_prefix="skydrift",
        )
    except ConfigurationError as exc:  # unknown scheme, or its client not installed
        raise ConfigError(
            f"SKYDRIFT_RATE_LIMIT_STORAGE={settings.rate_limit_storage!r}: {exc}"
        ) from None
    app.extensions["skydrift_limiter"] = limiter

    @app.after_request
    def _own_retry_after(resp):
        g.skydrift_retry_after = resp.headers.get("Retry-After")
        return resp


def client_id() -> str:
    """Who is calling, as used for rate limits: ``token:<digest prefix>`` or ``addr:<ip>``."""
    return g.get("client") or "addr:" + (request.remote_addr or "unknown")
