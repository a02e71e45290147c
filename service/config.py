"""Settings from environment variables (twelve-factor), validated once at start.

Every setting has a safe default, so ``skydrift serve`` works with none set. A bad value
stops the service at start with a message naming the variable, rather than at the first
request.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field, fields


class ConfigError(ValueError):
    """A setting that cannot be used; the message names the environment variable."""


def _int(env, name, default, lo, hi):
    raw = env.get(name)
    if raw is None or raw == "":
        return default
    try:
        value = int(raw)
    except ValueError:
        raise ConfigError(f"{name}={raw!r}: expected a whole number") from None
    if not lo <= value <= hi:
        raise ConfigError(f"{name}={value}: must be between {lo} and {hi}")
    return value


def _float(env, name, default, lo, hi):
    raw = env.get(name)
    if raw is None or raw == "":
        return default
    try:
        value = float(raw)
    except ValueError:
        raise ConfigError(f"{name}={raw!r}: expected a number") from None
    if not lo <= value <= hi:
        raise ConfigError(f"{name}={value}: must be between {lo} and {hi}")
    return value


def _str(env, name, default):
    raw = env.get(name)
    return default if raw is None or raw == "" else raw


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
        site list.
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
    extra: dict = field(default_factory=dict)

    @classmethod
    def from_env(cls, env=None) -> Settings:
        """Read and validate the settings from ``env`` (default: ``os.environ``)."""
        env = os.environ if env is None else env
        level = _str(env, "SKYDRIFT_LOG_LEVEL", "INFO").upper()
        if level not in ("DEBUG", "INFO", "WARNING", "ERROR", "CRITICAL"):
            raise ConfigError(f"SKYDRIFT_LOG_LEVEL={level!r}: use DEBUG, INFO, WARNING or ERROR")
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
        )
        for name in ("sites_file", "eop_file"):
            path = getattr(settings, name)
            if path and not os.path.isfile(path):
                raise ConfigError(f"SKYDRIFT_{name.upper()}={path!r}: no such file")
        return settings

    def as_public_dict(self) -> dict:
        """The settings as shown by the readiness endpoint (no secrets are settings here)."""
        return {f.name: getattr(self, f.name) for f in fields(self) if f.name != "extra"}
