"""Settings from environment variables (twelve-factor), validated once at start.

Every setting has a safe default, so ``skydrift serve`` works with none set. A bad value
stops the service at start with a message naming the variable, rather than at the first
request.
"""

from __future__ import annotations

import ipaddress
import os
import re
import urllib.parse
from dataclasses import dataclass, field

from .numbers import setting_number


class ConfigError(ValueError):
    """A setting that cannot be used; the message names the environment variable."""


def _written(lo) -> str:
    """How a number setting is written, for its error message."""
    return " in ASCII digits" + ("" if lo < 0 else ", without a sign")


def _int(env, name, default, lo, hi):
    raw = env.get(name)
    if raw is None or raw == "":
        return default
    value = setting_number(raw, whole=True, signed=lo < 0)
    if value is None:  # int() would also read "1_000" and other scripts' digits
        raise ConfigError(f"{name}={raw!r}: expected a whole number{_written(lo)}")
    if not lo <= value <= hi:
        raise ConfigError(f"{name}={value}: must be between {lo} and {hi}")
    return value


def _float(env, name, default, lo, hi):
    raw = env.get(name)
    if raw is None or raw == "":
        return default
    value = setting_number(raw, whole=False, signed=lo < 0)
    if value is None:  # float() would also read "1_0", "nan", "inf" and other scripts' digits
        raise ConfigError(f"{name}={raw!r}: expected a number{_written(lo)}")
    if not lo <= value <= hi:
        raise ConfigError(f"{name}={value}: must be between {lo} and {hi}")
    return value


def _str(env, name, default):
    raw = env.get(name)
    return default if raw is None or raw == "" else raw


#: Failed authentications allowed per client address (when tokens are set) before that
#: address is answered 429 until the window ends.
DEFAULT_AUTH_FAILURE_LIMIT = "10/minute"


@dataclass(frozen=True)
class Settings:
    """All settings, with their environment variable names and defaults.

    Attributes
    ----------
    max_body_bytes : int
        SKYDRIFT_MAX_BODY_BYTES: largest request body accepted (413 beyond), bytes.
        Default 268435456 (256 MiB: a million stars in columnar JSON is about 120 MB).
    max_stars : int
        SKYDRIFT_MAX_STARS: most stars in one request (413 beyond). Default 1,000,000.
    max_epochs : int
        SKYDRIFT_MAX_EPOCHS: most target epochs in one request. Default 10,000.
    max_results : int
        SKYDRIFT_MAX_RESULTS: most star-epoch results in one request. Default 2,000,000.
    near_boundary_arcsec : float
        SKYDRIFT_NEAR_BOUNDARY_ARCSEC: default margin under which a position is flagged as
        near a constellation boundary, arcsec. Default 1.
    low_parallax_snr : float
        SKYDRIFT_LOW_PARALLAX_SNR: parallax signal-to-noise below which 1/parallax is flagged
        as a biased distance. Default 5.
    sites_file : str
        SKYDRIFT_SITES_FILE: JSON file of named observing sites; empty = the packaged demo
        site list. Its content is checked when the application is made
        (service/api/observed.py, ``load_sites``): a bad file stops the start.
    eop_file : str
        SKYDRIFT_EOP_FILE: an IERS finals2000A file newer than the packaged one; empty = the
        table packaged with astropy-iers-data.
    sun_avoidance_deg : float
        SKYDRIFT_SUN_AVOIDANCE_DEG: Sun-avoidance angle for pointing warnings, degrees.
        Default 30 is a placeholder: the operator must set the facility's own value.
    horizon_limit_deg : float
        SKYDRIFT_HORIZON_LIMIT_DEG: altitude below which a target is flagged, degrees.
        Default 0.
    log_level : str
        SKYDRIFT_LOG_LEVEL: logging level name. Default INFO.

    Access control and limits (all off or permissive by default; see README, Deployment):

    auth_tokens : tuple of str
        SKYDRIFT_AUTH_TOKENS (comma-separated) and SKYDRIFT_AUTH_TOKENS_FILE (one token per
        line; a comment is a line of its own starting with ``#``, and a ``#`` anywhere else
        stops the start): bearer tokens accepted. Unset = no authentication; set but holding
        no token stops the start. Each token at least 16 characters. Never shown by the
        service.
    cors_origins : tuple of str
        SKYDRIFT_CORS_ORIGINS: comma-separated web origins (``https://sky.example.org``)
        allowed to call the API from a browser, or ``*`` for any. Empty = no CORS headers.
    rate_limit : str
        SKYDRIFT_RATE_LIMIT: per-client request limit, e.g. ``120/minute`` or
        ``10/second;1000/hour``. Empty = unlimited. A client is its bearer token when
        authentication is on, otherwise its address.
    rate_limit_storage : str
        SKYDRIFT_RATE_LIMIT_STORAGE: where the counts live. Default ``memory://`` (per worker
        process); a shared store (``redis://host:6379``, with its client installed) makes the
        limit exact across workers and replicas. Its scheme is checked at start even when no
        limit uses the store; the store is reached only when one does.
    auth_failure_limit : str
        SKYDRIFT_AUTH_FAILURE_LIMIT: failed authentications (401 answers) allowed per client
        address, when tokens are set, e.g. ``10/minute``; past it, every request from that
        address that needs a token is answered 429 until the window ends. Default
        ``10/minute``; ``off`` = no limit. Counted in SKYDRIFT_RATE_LIMIT_STORAGE.
    forwarded_hops : int
        SKYDRIFT_FORWARDED_HOPS: trusted reverse proxies in front of the service whose
        X-Forwarded-For / X-Forwarded-Proto are believed (client address for rate limiting
        and logs). Default 0.
    request_timeout_s : float
        SKYDRIFT_REQUEST_TIMEOUT_S: time after which a request is abandoned with a 503
        problem, seconds. Default 0 = only the worker timeout of gunicorn
        (SKYDRIFT_TIMEOUT_S, default 120) applies.
    test_fail_first_n : int
        SKYDRIFT_TEST_FAIL_FIRST_N: TEST ONLY, never in production. The first N API requests
        (not /health, /ready, /metrics) are answered 503 with Retry-After, to test clients'
        retry logic against the real server. Default 0 = off.
    test_fail_retry_after_s : int
        SKYDRIFT_TEST_FAIL_RETRY_AFTER_S: TEST ONLY, the Retry-After of those 503 answers,
        seconds. Default 1.
    """

    max_body_bytes: int = 268_435_456
    max_stars: int = 1_000_000
    max_epochs: int = 10_000
    max_results: int = 2_000_000
    near_boundary_arcsec: float = 1.0
    low_parallax_snr: float = 5.0
    sites_file: str = ""
    eop_file: str = ""
    sun_avoidance_deg: float = 30.0
    horizon_limit_deg: float = 0.0
    log_level: str = "INFO"
    # Access control and limits.
    auth_tokens: tuple = field(default=(), repr=False)
    cors_origins: tuple = ()
    rate_limit: str = ""
    rate_limit_storage: str = "memory://"
    auth_failure_limit: str = DEFAULT_AUTH_FAILURE_LIMIT
    forwarded_hops: int = 0
    request_timeout_s: float = 0.0
    test_fail_first_n: int = 0
    test_fail_retry_after_s: int = 1

    @classmethod
    def from_env(cls, env=None) -> Settings:
        """Read and validate the settings from ``env`` (default: ``os.environ``)."""
        env = os.environ if env is None else env
        level = _str(env, "SKYDRIFT_LOG_LEVEL", "INFO").upper()
        if level not in ("DEBUG", "INFO", "WARNING", "ERROR", "CRITICAL"):
            raise ConfigError(
                f"SKYDRIFT_LOG_LEVEL={level!r}: use DEBUG, INFO, WARNING, ERROR or CRITICAL"
            )
        settings = cls(
            max_body_bytes=_int(env, "SKYDRIFT_MAX_BODY_BYTES", 268_435_456, 1024, 4 << 30),
            max_stars=_int(env, "SKYDRIFT_MAX_STARS", 1_000_000, 1, 100_000_000),
            max_epochs=_int(env, "SKYDRIFT_MAX_EPOCHS", 10_000, 1, 10_000_000),
            max_results=_int(env, "SKYDRIFT_MAX_RESULTS", 2_000_000, 1, 1_000_000_000),
            near_boundary_arcsec=_float(env, "SKYDRIFT_NEAR_BOUNDARY_ARCSEC", 1.0, 0.0, 3600.0),
            low_parallax_snr=_float(env, "SKYDRIFT_LOW_PARALLAX_SNR", 5.0, 0.0, 1e6),
            sites_file=_str(env, "SKYDRIFT_SITES_FILE", ""),
            eop_file=_str(env, "SKYDRIFT_EOP_FILE", ""),
            sun_avoidance_deg=_float(env, "SKYDRIFT_SUN_AVOIDANCE_DEG", 30.0, 0.0, 180.0),
            horizon_limit_deg=_float(env, "SKYDRIFT_HORIZON_LIMIT_DEG", 0.0, -90.0, 90.0),
            log_level=level,
            **_access_settings(env),
        )
        # SKYDRIFT_EOP_FILE is not checked here: unreadable Earth-orientation tables leave
        # the service running, degraded (service/api/observed.py), rather than stopped.
        for name in ("sites_file",):
            path = getattr(settings, name)
            if path and not os.path.isfile(path):
                raise ConfigError(f"SKYDRIFT_{name.upper()}={path!r}: no such file")
        return settings


#: Shortest bearer token accepted (a random 128-bit token is 22 characters in base64).
MIN_TOKEN_LENGTH = 16


def _tokens(env) -> tuple:
    """Bearer tokens from SKYDRIFT_AUTH_TOKENS and SKYDRIFT_AUTH_TOKENS_FILE.

    The file holds one token per line; blank lines and lines whose first non-blank character
    is ``#`` are ignored. A ``#`` anywhere else stops the start: a trailing comment would
    otherwise be cut off a token containing ``#``, leaving its first part as the token.
    A byte order mark at the start of the file is ignored. A setting that is given but
    holds no token stops the start too, rather than leaving the service open.
    """
    found = []  # (token, where it came from, for messages that never show the token)
    raw = _str(env, "SKYDRIFT_AUTH_TOKENS", "")
    for number, token in enumerate(raw.split(","), 1):
        found.append((token.strip(), f"SKYDRIFT_AUTH_TOKENS (token {number})"))
    if raw and not any(token for token, _ in found):
        raise ConfigError("SKYDRIFT_AUTH_TOKENS is set but holds no token")
    path = _str(env, "SKYDRIFT_AUTH_TOKENS_FILE", "")
    if path:
        try:
            with open(path, encoding="utf-8-sig") as fh:
                lines = fh.read().splitlines()
        except (OSError, UnicodeDecodeError) as exc:
            reason = getattr(exc, "strerror", None) or "not UTF-8 text"
            raise ConfigError(f"SKYDRIFT_AUTH_TOKENS_FILE={path!r}: {reason}") from None
        in_file = 0
        for number, line in enumerate(lines, 1):
            token = line.strip()
            if not token or token.startswith("#"):
                continue
            where = f"SKYDRIFT_AUTH_TOKENS_FILE={path!r} line {number}"
            if "#" in token:
                raise ConfigError(
                    f"{where}: '#' inside a line; a comment needs a line of its own and a "
                    "token may not contain '#'"
                )
            found.append((token, where))
            in_file += 1
        if not in_file:
            raise ConfigError(
                f"SKYDRIFT_AUTH_TOKENS_FILE={path!r}: no token in the file (only blank lines "
                "or comments); unset the setting to run without authentication"
            )
    tokens = []
    for token, where in found:
        if not token:
            continue
        if len(token) < MIN_TOKEN_LENGTH or not token.isprintable() or " " in token:
            raise ConfigError(
                f"{where}: a token is shorter than {MIN_TOKEN_LENGTH} characters or "
                "contains spaces or control characters"
            )
        if token not in tokens:
            tokens.append(token)
    return tuple(tokens)


#: host[:port] of an origin: a bracketed IPv6 address or a name without ':', then a port.
_ORIGIN_HOST_PORT = re.compile(r"(\[[0-9A-Fa-f:.]+\]|[^:\[\]/?#@\\\s]+)(?::([0-9]{1,5}))?")
_DEFAULT_PORTS = {"http": 80, "https": 443}


def _origin(text: str) -> str | None:
    """``text`` as a browser writes it in the Origin header, or None if it is no origin.

    Browsers send the ASCII serialisation of an origin (HTML standard, "origin"; RFC 6454
    section 6.2): scheme and host in lower case, the port left out when it is the scheme's
    default. The allow-list is compared with that text, so it is written the same way here;
    written otherwise (``https://Sky.Example.org``, ``https://sky.example.org:443``) it
    would never match and every browser request would be refused.
    """
    scheme, sep, rest = text.partition("://")
    scheme = scheme.lower()
    if not sep or scheme not in _DEFAULT_PORTS or not rest.isascii():
        return None  # a non-ASCII host reaches the header in its punycode form
    match = _ORIGIN_HOST_PORT.fullmatch(rest)
    if match is None:
        return None
    host, port = match.group(1).lower(), match.group(2)
    if host.startswith("["):  # browsers write IPv6 addresses compressed: [::1]
        try:
            host = f"[{ipaddress.IPv6Address(host[1:-1]).compressed}]"
        except ValueError:
            return None
    if port is not None:
        number = int(port)
        if number > 65535:
            return None
        port = None if number == _DEFAULT_PORTS[scheme] else str(number)
    return f"{scheme}://{host}" + (f":{port}" if port else "")


def _origins(env) -> tuple:
    raw = _str(env, "SKYDRIFT_CORS_ORIGINS", "")
    origins = []
    for given in (o.strip().rstrip("/") for o in raw.split(",") if o.strip()):
        origin = given if given == "*" else _origin(given)
        if origin is None:
            raise ConfigError(
                f"SKYDRIFT_CORS_ORIGINS: {given!r} is not an origin (scheme://host[:port], or "
                "*; a host with non-ASCII letters in its punycode form, xn--...)"
            )
        origins.append(origin)
    return tuple(origins)


def _limit_string(env, name, default) -> str:
    """A rate-limit string (``120/minute``, ``10/second;1000/hour``), or "" for none."""
    limit = _str(env, name, default).strip()
    if limit.lower() == "off":
        return ""
    if limit:
        from limits import parse_many

        try:
            parsed = parse_many(limit)
        except ValueError:
            raise ConfigError(
                f"{name}={limit!r}: expected e.g. '120/minute' or '10/second;1000/hour'"
            ) from None
        if any(item.amount < 1 for item in parsed):
            # "0/minute" would refuse every request of every client, forever.
            raise ConfigError(f"{name}={limit!r}: each limit must allow at least 1 request")
    return limit


def _rate_limit(env) -> dict:
    storage = _str(env, "SKYDRIFT_RATE_LIMIT_STORAGE", "memory://")
    if "://" not in storage:
        raise ConfigError(f"SKYDRIFT_RATE_LIMIT_STORAGE={storage!r}: expected a URI")
    # Its scheme is checked here, whether or not a limit uses the store yet (the store
    # itself is made, and its client library looked for, only when one does; no network
    # here). The async+ schemes are for asyncio applications: the limiter of this one
    # stopped the start with a bare AssertionError on them.
    from limits.storage import SCHEMES

    scheme = urllib.parse.urlparse(storage).scheme  # as the limits library reads it
    if scheme not in SCHEMES or scheme.startswith("async+"):
        known = ", ".join(sorted(s for s in SCHEMES if not s.startswith("async+")))
        raise ConfigError(
            f"SKYDRIFT_RATE_LIMIT_STORAGE={storage!r}: not a store the rate limiter knows "
            f"(the scheme is one of {known})"
        )
    return {
        "rate_limit": _limit_string(env, "SKYDRIFT_RATE_LIMIT", ""),
        "rate_limit_storage": storage,
        "auth_failure_limit": _limit_string(
            env, "SKYDRIFT_AUTH_FAILURE_LIMIT", DEFAULT_AUTH_FAILURE_LIMIT
        ),
    }


def _access_settings(env) -> dict:
    """The access-control and limit settings (kept apart from the computation settings)."""
    return {
        "auth_tokens": _tokens(env),
        "cors_origins": _origins(env),
        **_rate_limit(env),
        "forwarded_hops": _int(env, "SKYDRIFT_FORWARDED_HOPS", 0, 0, 10),
        "request_timeout_s": _float(env, "SKYDRIFT_REQUEST_TIMEOUT_S", 0.0, 0.0, 86400.0),
        "test_fail_first_n": _int(env, "SKYDRIFT_TEST_FAIL_FIRST_N", 0, 0, 1_000_000),
        "test_fail_retry_after_s": _int(env, "SKYDRIFT_TEST_FAIL_RETRY_AFTER_S", 1, 0, 3600),
    }
