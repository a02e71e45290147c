"""gunicorn logger writing JSON lines: the access log and gunicorn's own messages.

Selected in deploy/gunicorn.conf.py (``logger_class``). Every line is one JSON object; access
lines carry the request id the application echoed in X-Request-ID, so a client's id finds
the access line and the application's own log lines (see service.api.observability).
"""

from __future__ import annotations

import datetime
import logging
import sys
import traceback

import orjson
from gunicorn.glogging import Logger

from .api.observability import JsonFormatter, log_unraisable

#: Handlers whose ``emit`` is a write of the formatted message and a flush (gunicorn sets up
#: the access log with one of these and the format "%(message)s").
_PLAIN_HANDLERS = (logging.StreamHandler, logging.FileHandler)


def _plain(handler) -> bool:
    """Whether ``handler`` writes the message alone to an open stream (see _PLAIN_HANDLERS)."""
    fmt = getattr(handler.formatter, "_fmt", "%(message)s")
    return type(handler) in _PLAIN_HANDLERS and fmt == "%(message)s" and bool(handler.stream)


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
        # Exceptions Python drops (the request time limit's, raised in a __del__) as JSON
        # lines too; set in the master, inherited by every worker it forks.
        sys.unraisablehook = log_unraisable

    def access(self, resp, req, environ, request_time):
        """One JSON line per request: the fields of gunicorn's atoms ``h m U q H s B D a``
        and ``{x-request-id}o``, read directly (``Logger.atoms`` formats every request and
        response header and environ entry, most of the cost of the line)."""
        if not self.access_log_enabled:
            return
        try:
            status = resp.status
            if isinstance(status, str):
                status = status.split(None, 1)[0]
            request_id = None
            for name, value in resp.headers:
                if name.lower() == "x-request-id":
                    request_id = value  # the last one, as in the atoms
            entry = {
                "time": datetime.datetime.now(datetime.UTC).isoformat(timespec="milliseconds"),
                "type": "access",
                "remote": environ.get("REMOTE_ADDR", "-"),
                "method": environ.get("REQUEST_METHOD"),
                "path": environ.get("PATH_INFO"),
                "query": environ.get("QUERY_STRING") or None,
                "protocol": environ.get("SERVER_PROTOCOL"),
                "status": int(status),
                "bytes": getattr(resp, "sent", None),
                "duration_ms": round(
                    (request_time.seconds * 1_000_000 + request_time.microseconds) / 1000.0, 3
                ),
                "request_id": request_id,
                "user_agent": environ.get("HTTP_USER_AGENT", "-"),
            }
            self._write_access(orjson.dumps(entry).decode())
        except Exception:
            self.error(traceback.format_exc())

    def _write_access(self, line: str) -> None:
        """Write one access line as the access log's handlers would, at a third of the cost
        where they are gunicorn's own (a stream or a file, message only): no log record is
        made and formatted per request. Any other handler (a syslog one, a test's) gets the
        line through the logger as before."""
        handlers = self.access_log.handlers
        if handlers and all(_plain(h) for h in handlers):
            for handler in handlers:
                with handler.lock:  # gunicorn's reopen_files swaps the stream under it
                    handler.stream.write(line + handler.terminator)
                    handler.stream.flush()
        else:
            self.access_log.info(line)
