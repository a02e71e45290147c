"""Liveness and readiness."""

from __future__ import annotations

import marshmallow as ma
from flask import current_app

from .. import __version__
from .common import Blueprint, always_present

blp = Blueprint("health", __name__, description="Liveness and readiness of the service.")


@always_present
class HealthSchema(ma.Schema):
    status = ma.fields.String(metadata={"description": "Always 'ok' while the process runs."})
    version = ma.fields.String(metadata={"description": "Version of the service."})


@always_present
class CheckSchema(ma.Schema):
    ok = ma.fields.Boolean(metadata={"description": "True where this part is usable."})
    detail = ma.fields.String(
        metadata={"description": "What was checked and found (the table in use, or the fault)."}
    )


@always_present
class ReadySchema(ma.Schema):
    status = ma.fields.String(metadata={"description": "'ready' or 'degraded'."})
    checks = ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.Nested(CheckSchema),
        metadata={
            "description": "One check per part, by name (configuration, "
            "constellation_boundaries, earth_orientation)."
        },
    )


@blp.route("/health")
@blp.doc(operationId="getHealth")
@blp.response(200, HealthSchema)
def health():
    """Process alive.

    Answers as long as the process can serve a request; it checks nothing else.
    """
    return {"status": "ok", "version": __version__}


@blp.route("/ready")
@blp.doc(operationId="getReadiness")
@blp.response(200, ReadySchema)
@blp.alt_response(503, schema=ReadySchema, description="A table or setting is not usable.")
def ready():
    """Tables loaded and configuration valid.

    Runs each capability's readiness check (data tables loaded, settings valid). Answers
    503 with the failing checks while the service is degraded.
    """
    checks = {"configuration": {"ok": True, "detail": "settings validated at start"}}
    for name, fn in current_app.extensions["skydrift_ready_checks"].items():
        try:
            ok, detail = fn()
        except Exception as exc:  # a failing check must not crash the probe
            ok, detail = False, f"check failed: {type(exc).__name__}"
        checks[name] = {"ok": bool(ok), "detail": str(detail)}
    ok = all(c["ok"] for c in checks.values())
    body = {"status": "ready" if ok else "degraded", "checks": checks}
    return body, (200 if ok else 503)


def register(app, api):
    api.register_blueprint(blp)
