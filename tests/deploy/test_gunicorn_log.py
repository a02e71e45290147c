"""service/gunicorn_log.py: the JSON access line, checked against gunicorn's own atoms.

The access line reads its fields directly instead of through ``Logger.atoms`` (which formats
every header and environ entry); gunicorn's ``atoms`` on the same request is the reference.
"""

import datetime
import json
import logging
import sys
import types

import pytest
from gunicorn.config import Config
from gunicorn.glogging import Logger

from service.gunicorn_log import JsonLogger


class _Lines(logging.Handler):
    def __init__(self):
        super().__init__()
        self.lines = []

    def emit(self, record):
        self.lines.append(record.getMessage())


@pytest.fixture()
def logger():
    root = logging.getLogger()
    handlers, level, hook = list(root.handlers), root.level, sys.unraisablehook
    try:
        log = JsonLogger(Config())
    finally:  # JsonLogger.setup joins the root logger to its error log: undo that here
        root.handlers[:] = handlers
        root.setLevel(level)
        sys.unraisablehook = hook
    sink = _Lines()
    log.access_log = logging.getLogger("skydrift.test.access")
    log.access_log.handlers[:] = [sink]
    log.access_log.propagate = False
    log.access_log.setLevel(logging.INFO)
    log._access_log_enabled = True  # as gunicorn computes it when an access log is set
    log.lines = sink.lines
    return log


def _request(query="", request_ids=("abc-1",), user_agent="curl/8.5"):
    resp = types.SimpleNamespace(
        status="201 CREATED",
        headers=[("Content-Type", "application/json")]
        + [("X-Request-ID", rid) for rid in request_ids],
        sent=1234,
    )
    req = types.SimpleNamespace(headers=[("HOST", "localhost"), ("USER-AGENT", user_agent)])
    environ = {
        "REMOTE_ADDR": "192.0.2.7",
        "REQUEST_METHOD": "POST",
        "RAW_URI": "/v1/propagation" + (f"?{query}" if query else ""),
        "PATH_INFO": "/v1/propagation",
        "QUERY_STRING": query,
        "SERVER_PROTOCOL": "HTTP/1.1",
        "HTTP_USER_AGENT": user_agent,
    }
    return resp, req, environ, datetime.timedelta(seconds=2, microseconds=345_678)


@pytest.mark.parametrize(
    "query, request_ids",
    [("", ("abc-1",)), ("format=csv&x=é", ("first", "second")), ("", ())],
    ids=["plain", "query-and-two-ids", "no-id"],
)
def test_access_line_has_the_fields_of_gunicorns_atoms(logger, query, request_ids):
    resp, req, environ, took = _request(query, request_ids)
    logger.access(resp, req, environ, took)
    (line,) = logger.lines
    entry = json.loads(line)
    atoms = Logger.atoms(logger, resp, req, environ, took)  # gunicorn's reading: the reference
    assert entry["type"] == "access"
    assert entry["remote"] == atoms["h"] == "192.0.2.7"
    assert entry["method"] == atoms["m"] == "POST"
    assert entry["path"] == atoms["U"]
    assert entry["query"] == (atoms["q"] or None)
    assert entry["protocol"] == atoms["H"]
    assert entry["status"] == int(atoms["s"]) == 201
    assert entry["bytes"] == atoms["B"] == 1234
    assert entry["duration_ms"] == round(atoms["D"] / 1000.0, 3) == 2345.678
    assert entry["request_id"] == atoms.get("{x-request-id}o")
    assert entry["user_agent"] == atoms["a"] == "curl/8.5"
    when = datetime.datetime.fromisoformat(entry["time"])
    assert abs(when - datetime.datetime.now(datetime.UTC)) < datetime.timedelta(minutes=1)


def test_access_line_off_when_disabled(logger):
    logger._access_log_enabled = False
    logger.access(*_request())
    assert logger.lines == []


def test_access_line_failure_goes_to_the_error_log(logger, monkeypatch):
    errors = []
    monkeypatch.setattr(logger, "error", errors.append)
    resp, req, environ, took = _request()
    resp.status = "not-a-status"
    logger.access(resp, req, environ, took)
    assert logger.lines == []
    assert "ValueError" in errors[0]


def test_exception_python_drops_is_one_json_line(capsys, monkeypatch):
    # Python prints an exception raised in a __del__ or a weakref callback as an "Exception
    # ignored in" block on standard error, outside the JSON log (seen with the request time
    # limit's exception under load). The logger gunicorn sets up now logs it as one line.
    from service.api.access import RequestTimeLimit

    root = logging.getLogger()
    handlers, level = list(root.handlers), root.level
    monkeypatch.setattr(sys, "unraisablehook", sys.unraisablehook)  # put back afterwards
    try:
        JsonLogger(Config())  # its JSON handler writes to the standard error of this test

        class Chart:
            def __del__(self):
                raise RequestTimeLimit()

        capsys.readouterr()
        chart = Chart()
        del chart  # CPython runs __del__ here and passes the exception to the hook
        err = capsys.readouterr().err
    finally:
        root.handlers[:] = handlers
        root.setLevel(level)
    assert err.startswith("{") and len(err.splitlines()) == 1  # not Python's own block
    line = json.loads(err)
    assert line["level"] == "WARNING" and line["logger"] == "skydrift.unraisable"
    # the object, the exception's type and message, as Python's block says them
    assert line["message"].startswith("Exception ignored in: <function ")
    assert "Chart.__del__" in line["message"]
    assert "service.api.access.RequestTimeLimit: 503 Service Unavailable: " in line["message"]
    assert "time limit" in line["message"]
    assert "raise RequestTimeLimit()" in line["exception"]  # the traceback, inside the line


def test_dropped_exception_with_an_unprintable_object_is_still_logged(caplog):
    from service.api.observability import log_unraisable

    class Unprintable:
        def __repr__(self):
            raise RuntimeError("no repr")

    args = types.SimpleNamespace(
        exc_type=KeyError, exc_value=None, exc_traceback=None, err_msg=None, object=Unprintable()
    )
    with caplog.at_level(logging.WARNING, logger="skydrift.unraisable"):
        log_unraisable(args)
    assert caplog.messages == ["Exception ignored in: <object repr() failed>: KeyError"]


def test_access_line_written_to_gunicorns_file_handler_as_logging_writes_it(logger, tmp_path):
    """The access line goes straight to gunicorn's own handler (a file, message only)
    without a log record: the file must hold what the logging module would have written,
    one JSON object per line, lines of concurrent requests whole."""
    path = tmp_path / "access.log"
    handler = logging.FileHandler(path)
    handler.setFormatter(logging.Formatter("%(message)s"))  # gunicorn's access format
    logger.access_log.handlers[:] = [handler]
    try:
        logger.access(*_request())
        logger.access(*_request(query="a=1", request_ids=("second",)))
        entries = [json.loads(line) for line in path.read_text().splitlines()]
        assert [e["request_id"] for e in entries] == ["abc-1", "second"]
        # The logging module, given the same line, writes the same bytes.
        path.write_text("")
        text = json.dumps(entries[0], separators=(",", ":"), ensure_ascii=False)
        logger._write_access(text)
        direct = path.read_text()
        path.write_text("")
        logger.access_log.info(text)
        assert direct == path.read_text() == text + "\n"
    finally:
        handler.close()


def test_access_line_through_logging_for_other_handlers_and_formats(logger, tmp_path):
    """A handler that is not gunicorn's plain one, or one with another format, gets the
    line through the logging module (its format applied)."""
    path = tmp_path / "access.log"
    handler = logging.FileHandler(path)
    handler.setFormatter(logging.Formatter("access %(levelname)s %(message)s"))
    logger.access_log.handlers[:] = [handler]
    try:
        logger.access(*_request())
        (line,) = path.read_text().splitlines()
        assert line.startswith("access INFO {")
        assert json.loads(line.removeprefix("access INFO "))["request_id"] == "abc-1"
    finally:
        handler.close()
