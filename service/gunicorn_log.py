"""gunicorn logger writing JSON lines: the access log and gunicorn's own messages.

Selected in deploy/gunicorn.conf.py (``logger_class``). Every line is one JSON object; access
lines carry the request id the application echoed in X-Request-ID, so a client's id finds
the access line and the application's own log lines (see service.api.observability).
"""

from __future__ import annotations

import datetime
import json
import logging
import sys
import traceback

from gunicorn.glogging import Logger

from .api.observability import JsonFormatter


class JsonLogger(Logger):
    """gunicorn's logger with JSON formatters; the application's logs join its error log."""

    def setup(self, cfg):
        super().setup(cfg)
        formatter = JsonFormatter()
        for handler in self.error_log.handlers:
            handler.setFormatter(formatter)
        # The application's loggers (and libraries') go to standard error as JSON too.
        root = logging.getLogger()
        if not any(getattr(h, "_skydrift_json", False) for h in root.handlers):
            handler = logging.StreamHandler(sys.stderr)
            handler.setFormatter(formatter)
            handler._skydrift_json = True
            root.addHandler(handler)
        root.setLevel(self.loglevel)

    def access(self, resp, req, environ, request_time):
        if not self.access_log_enabled:
            return
        try:
            atoms = self.atoms(resp, req, environ, request_time)
            entry = {
                "time": datetime.datetime.now(datetime.UTC).isoformat(timespec="milliseconds"),
                "type": "access",
                "remote": atoms["h"],
                "method": atoms["m"],
                "path": atoms["U"],
                "query": atoms["q"] or None,
                "protocol": atoms["H"],
                "status": int(atoms["s"]),
                "bytes": atoms["B"],
                "duration_ms": round(atoms["D"] / 1000.0, 3),
                "request_id": atoms.get("{x-request-id}o"),
                "user_agent": atoms["a"],
            }
            self.access_log.info(json.dumps(entry, ensure_ascii=False))
        except Exception:
            self.error(traceback.format_exc())
