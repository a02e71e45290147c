"""Application factory: ``create_app(config=None)`` builds the Flask app.

Tests call it with a test configuration; gunicorn serves ``service.wsgi:app``.
"""

from __future__ import annotations

import logging
import os
import time

import flask_smorest
from flask import Flask, g, request
from werkzeug.exceptions import ClientDisconnected, HTTPException

from .. import __version__
from ..config import Settings
from . import errors
from .common import ProblemSchema, epoch_field_to_openapi
from .frames import equinox_field_to_openapi, frame_field_to_openapi
from .jsonio import OrjsonProvider
from .openapi_errors import PROBLEM_MIMETYPE, ProblemResponsesPlugin
from .tables import id_field_to_openapi, range_bounds_to_openapi, table_field_to_openapi

API_DESCRIPTION = """\
Skydrift moves stellar astrometry between epochs, frames and places; finds the IAU
constellation of a position at an epoch, its distance from the boundary and future crossings;
and turns astrometry into velocities.

Units are fixed and appear in field names: degrees on the sky, mas for parallax, mas/yr for
proper motion (the RA component includes cos(dec)), km/s for velocities, pc for distances.
Epochs are Julian epochs on the TDB scale unless written otherwise ("J2016.0", "B1950.0",
"JD2451545.0", "MJD51544.5", ISO 8601 UTC, "now"). A null value means unknown, never zero.

Errors are RFC 9457 problem details (application/problem+json) listing each offending field.

Safety: figures about the Sun and the horizon are advisory. The facility's own interlocks and
safety rules decide whether a telescope may point somewhere.
"""


def _new_id() -> str:
    return os.urandom(16).hex()


class SkydriftFlask(Flask):
    """Flask, with :meth:`ensure_sync`'s answer kept for each function it is asked about.

    Flask asks it of every request hook and view on every request (some sixteen times for
    one request here), and each answer takes ``inspect.iscoroutinefunction`` (about a
    microsecond). The functions are the application's own, fixed once it is built; the
    answers are kept for up to MAX_KEPT of them (any further ones are answered as before).
    """

    MAX_KEPT = 1024

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._sync_functions = {}

    def ensure_sync(self, func):
        kept = self._sync_functions
        try:
            return kept[func]
        except (KeyError, TypeError):  # TypeError: a callable that cannot be hashed
            pass
        sync = super().ensure_sync(func)
        if len(kept) < self.MAX_KEPT:
            try:
                kept[func] = sync
            except TypeError:
                pass
        return sync


class SkydriftApi(flask_smorest.Api):
    """flask-smorest Api whose errors are RFC 9457 problem details."""

    ERROR_SCHEMA = ProblemSchema

    def handle_http_exception(self, error):
        return errors.handle_http_exception(error)

    def _register_responses(self):
        # Error responses are documented as problem+json, which is what errors.py sends.
        default_type = self.DEFAULT_RESPONSE_CONTENT_TYPE
        self.DEFAULT_RESPONSE_CONTENT_TYPE = PROBLEM_MIMETYPE
        try:
            super()._register_responses()
        finally:
            self.DEFAULT_RESPONSE_CONTENT_TYPE = default_type


def create_app(config: dict | None = None) -> Flask:
    """Build the application.

    Parameters
    ----------
    config : dict, optional
        Flask configuration overrides. ``SKYDRIFT_SETTINGS`` may hold a
        :class:`~service.config.Settings`; otherwise settings are read from the environment
        (and a bad setting stops the start with a message naming the variable).
    """
    # No static folder: the reference page needs no assets, and Flask's default would serve
    # any file under ./static of the working directory (the import name is no package).
    app = SkydriftFlask("skydrift", static_folder=None)
    app.json = OrjsonProvider(app)
    settings = (config or {}).get("SKYDRIFT_SETTINGS") or Settings.from_env()
    app.config.update(
        SKYDRIFT_SETTINGS=settings,
        MAX_CONTENT_LENGTH=settings.max_body_bytes,
        API_TITLE="Skydrift",
        API_VERSION=__version__,
        OPENAPI_VERSION="3.1.0",
        OPENAPI_URL_PREFIX=None,
        API_SPEC_OPTIONS={
            "info": {
                "description": API_DESCRIPTION,
                "license": {"name": "MIT", "identifier": "MIT"},
            },
            "servers": [{"url": "/", "description": "this service"}],
        },
    )
    app.config.update(config or {})
    logging.getLogger("skydrift").setLevel(settings.log_level)

    api = SkydriftApi(app, spec_kwargs={"extra_plugins": [ProblemResponsesPlugin()]})
    api.ma_plugin.converter.add_attribute_function(table_field_to_openapi)
    api.ma_plugin.converter.add_attribute_function(epoch_field_to_openapi)
    api.ma_plugin.converter.add_attribute_function(range_bounds_to_openapi)
    api.ma_plugin.converter.add_attribute_function(equinox_field_to_openapi)
    api.ma_plugin.converter.add_attribute_function(frame_field_to_openapi)
    api.ma_plugin.converter.add_attribute_function(id_field_to_openapi)
    app.extensions["skydrift_api"] = api
    app.extensions["skydrift_ready_checks"] = {}
    app.register_error_handler(HTTPException, errors.handle_http_exception)
    app.register_error_handler(Exception, errors.handle_unexpected)
    app.register_error_handler(TimeoutError, errors.handle_client_timeout)
    app.register_error_handler(ClientDisconnected, errors.handle_client_timeout)

    @app.before_request
    def _start():
        g.start = time.perf_counter()
        given = request.headers.get("X-Request-ID", "")
        # One made up: 128 random bits in hex (as uuid4().hex, at a quarter of its cost).
        g.request_id = given if 0 < len(given) <= 128 and given.isprintable() else _new_id()

    @app.before_request
    def _refuse_encoded_bodies():
        # Bodies are read as sent: a compressed body would be misread (or, decompressed,
        # could be a bomb), so any Content-Encoding other than identity is refused.
        encoding = request.headers.get("Content-Encoding", "").strip().lower()
        if encoding not in ("", "identity"):
            flask_smorest.abort(
                415,
                message=f"Content-Encoding {encoding[:40]!r} is not accepted; send the "
                "body uncompressed",
            )

    @app.after_request
    def _finish(resp):
        # The security headers are added by access.register.
        resp.headers["X-Request-ID"] = g.get("request_id", "")
        return resp

    # Metrics, access control and limits (service/api/observability.py, access.py).
    from . import access, observability

    observability.register(app)
    access.register(app)

    from . import charts, constellations, docs, frames, health, observed, propagation, velocity

    health.register(app, api)
    propagation.register(app, api)
    constellations.register(app, api)
    velocity.register(app, api)
    frames.register(app, api)
    observed.register(app, api)
    charts.register(app, api)
    docs.register(app, api)
    return app
