"""Metrics (``GET /metrics``, Prometheus text format) and structured JSON logs.

Metrics
-------
Under gunicorn every worker is its own process. With ``PROMETHEUS_MULTIPROC_DIR`` set (the
gunicorn configuration does it, before the application is imported) prometheus-client keeps
each worker's figures in files there and ``/metrics`` adds them up, so a scrape answered by
any worker shows the whole service. Without it (tests, ``flask run``) the figures are those
of the one process.

- ``skydrift_http_requests_total{endpoint,method,status}``: requests answered; ``endpoint`` is
  the route template (``/v1/propagation``), or ``(unmatched)`` for unknown paths.
- ``skydrift_http_request_duration_seconds{endpoint,method,status}``: latency histogram.
- ``skydrift_stars_processed_total{endpoint}``: stars computed (blueprints call
  :func:`count_stars`).
- ``skydrift_validation_failures_total{endpoint}``: requests rejected as bad input (400, 422).
- ``skydrift_earth_orientation_table_age_days``: days since the last measured (not predicted)
  day of the Earth-orientation table in use (``source`` label: packaged or the file of
  SKYDRIFT_EOP_FILE). Computed at scrape time from a date read once; no sample when no
  table is usable (an unreadable file; /ready then says why).

``/metrics`` is not part of the OpenAPI document: it is not JSON and belongs to operators.

Logs
----
:class:`JsonFormatter` writes one JSON object per line with the request id of the request
being served (``request_id``), so a client's X-Request-ID finds its log lines. Under gunicorn
the logger class of service.gunicorn_log installs it for every logger and writes the access
log as JSON too.
"""

from __future__ import annotations

import contextlib
import datetime
import fcntl
import functools
import json
import logging
import os
import re
import sys
import time

from flask import Response, current_app, g, request

#: Latency buckets, seconds: one star takes about a millisecond, a million a few seconds.
LATENCY_BUCKETS_S = (
    0.001,
    0.0025,
    0.005,
    0.01,
    0.025,
    0.05,
    0.1,
    0.25,
    0.5,
    1.0,
    2.5,
    5.0,
    10.0,
    30.0,
    60.0,
    120.0,
)

#: The endpoint label of requests that matched no route (keeps the label set bounded).
UNMATCHED = "(unmatched)"

#: MJD of the Unix epoch 1970-01-01T00:00 UTC, days (JD 2440587.5; MJD = JD - 2400000.5).
MJD_UNIX_EPOCH = 40587.0


@functools.lru_cache(maxsize=1)
def _metrics():
    """Create the metric objects once per process (after PROMETHEUS_MULTIPROC_DIR is set)."""
    from prometheus_client import Counter, Histogram

    labels = ("endpoint", "method", "status")
    return {
        # The mode is fixed when the metric objects are made: files in this folder, or memory.
        "folder": multiprocess_dir(),
        "requests": Counter(
            "skydrift_http_requests", "HTTP requests answered.", labels, registry=None
        ),
        "latency": Histogram(
            "skydrift_http_request_duration_seconds",
            "Time to answer an HTTP request, seconds.",
            labels,
            buckets=LATENCY_BUCKETS_S,
            registry=None,
        ),
        "stars": Counter(
            "skydrift_stars_processed", "Stars computed.", ("endpoint",), registry=None
        ),
        "invalid": Counter(
            "skydrift_validation_failures",
            "Requests rejected as bad input (400 or 422).",
            ("endpoint",),
            registry=None,
        ),
    }


def multiprocess_dir() -> str | None:
    """The prometheus-client multiprocess folder in use, or None (single process)."""
    path = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    return path if path and os.path.isdir(path) else None


#: Kinds of prometheus-client files whose figures outlive their worker (a dead worker's
#: counts still count); live gauges are removed with the worker instead.
_SUMMED_KINDS = ("counter", "histogram")


@contextlib.contextmanager
def _folder_lock(folder: str, exclusive: bool):
    """Readers (``/metrics``) share it; folding a dead worker's files takes it alone, so a
    scrape never sees a worker's figures twice or not at all, nor a file vanish mid-read."""
    with open(os.path.join(folder, "folding.lock"), "a+") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH)
        yield


def fold_dead_worker(pid: int, folder: str | None = None) -> None:
    """Mark worker ``pid`` dead for the metrics, adding its counts into one file per kind.

    prometheus-client keeps the counter and histogram files of every dead worker, so that
    its counts still count. Workers are restarted every SKYDRIFT_MAX_REQUESTS requests, so
    those files (about 30 kB a worker) added up without end in a /tmp of 64 MiB (the
    container's tmpfs), which then filled, and /metrics read more files at every scrape.
    Here they are added into ``<kind>_deadworkers.db`` (the collector sums every file of
    a kind) and removed; live gauge files are removed as prometheus-client does.
    """
    from prometheus_client import multiprocess
    from prometheus_client.mmap_dict import MmapedDict

    folder = folder or multiprocess_dir()
    if not folder:
        return
    multiprocess.mark_process_dead(pid, folder)
    with _folder_lock(folder, exclusive=True):
        for kind in _SUMMED_KINDS:
            path = os.path.join(folder, f"{kind}_{pid}.db")
            if not os.path.exists(path):
                continue
            if os.path.getsize(path) == 0:  # made but never sized: holds no figure
                os.unlink(path)
                continue
            total = MmapedDict(os.path.join(folder, f"{kind}_deadworkers.db"))
            try:
                for key, value, _, _ in MmapedDict.read_all_values_from_file(path):
                    total.write_value(key, total.read_value(key)[0] + value, 0.0)
            finally:
                total.close()
            os.unlink(path)


_RULE_VARIABLE = re.compile(r"<(?:[^:<>]+:)?([^<>]+)>")


def _endpoint() -> str:
    """The route template in OpenAPI form (``/v1/constellations/{abbreviation}/outline``)."""
    rule = request.url_rule
    if rule is None:
        return UNMATCHED
    label = _ENDPOINT_LABELS.get(rule.rule)
    if label is None:
        label = _ENDPOINT_LABELS[rule.rule] = _RULE_VARIABLE.sub(r"{\1}", rule.rule)
    return label


#: Endpoint labels by route rule (one per route of the application).
_ENDPOINT_LABELS: dict[str, str] = {}

#: Labelled metrics by (metric, labels), as ``labels()`` gives them, kept so that a request
#: does not take the metric's lock and check its labels each time. The label sets are
#: bounded (routes, methods, statuses), and so is this (MAX_KEPT_CHILDREN).
_CHILDREN: dict[tuple, object] = {}
MAX_KEPT_CHILDREN = 4096


def _child(metric: str, *labels: str):
    """``_metrics()[metric].labels(*labels)``, kept (_CHILDREN)."""
    key = (metric, labels)
    child = _CHILDREN.get(key)
    if child is None:
        child = _metrics()[metric].labels(*labels)
        if len(_CHILDREN) < MAX_KEPT_CHILDREN:
            _CHILDREN[key] = child
    return child


def count_stars(endpoint: str, n: int) -> None:
    """Add ``n`` stars computed by ``endpoint`` (route template, e.g. ``/v1/propagation``)."""
    if n > 0:
        _child("stars", endpoint).inc(n)


# --- Earth-orientation table age -------------------------------------------------------


class _EopAgeCollector:
    """Custom collector: the age of the Earth-orientation table in use, at scrape time
    (nothing stored in worker files). ``in_use`` is what the observed-place blueprint
    reads: (source label, MJD of the last measured day), or None when no table is usable,
    and then there is no sample (an age of a table not in use would mislead an alert)."""

    def __init__(self, in_use):
        self.in_use = in_use

    def collect(self):
        from prometheus_client.core import GaugeMetricFamily

        family = GaugeMetricFamily(
            "skydrift_earth_orientation_table_age_days",
            "Days since the last measured (not predicted) day of the Earth-orientation "
            "table in use; no sample when no table is usable (see /ready).",
            labels=["source"],
        )
        if self.in_use is not None:
            source, mjd = self.in_use
            now_mjd = time.time() / 86400.0 + MJD_UNIX_EPOCH
            family.add_metric([source], now_mjd - mjd)
        yield family


def metrics_view():
    """``GET /metrics``: the Prometheus text exposition of the whole service."""
    from prometheus_client import (
        CONTENT_TYPE_LATEST,
        GC_COLLECTOR,
        PLATFORM_COLLECTOR,
        PROCESS_COLLECTOR,
        CollectorRegistry,
        generate_latest,
    )
    from prometheus_client import multiprocess as prom_mp

    folder = _metrics()["folder"]
    if folder:
        registry = CollectorRegistry()
        prom_mp.MultiProcessCollector(registry, path=folder)
    else:
        registry = CollectorRegistry()
        for name in ("requests", "latency", "stars", "invalid"):
            registry.register(_metrics()[name])
        # One process: its own process, platform and garbage-collector figures too.
        for collector in (PROCESS_COLLECTOR, PLATFORM_COLLECTOR, GC_COLLECTOR):
            registry.register(collector)
    in_use = current_app.extensions.get("skydrift_eop_in_use")
    registry.register(_EopAgeCollector(in_use() if in_use is not None else None))
    with _folder_lock(folder, exclusive=False) if folder else contextlib.nullcontext():
        text = generate_latest(registry)
    return Response(text, mimetype=CONTENT_TYPE_LATEST.split(";")[0])


# --- JSON logs ----------------------------------------------------------------------------


class JsonFormatter(logging.Formatter):
    """One JSON object per log record, with the request id when inside a request."""

    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "time": datetime.datetime.fromtimestamp(record.created, datetime.UTC).isoformat(
                timespec="milliseconds"
            ),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = getattr(record, "request_id", None)
        if request_id is None:
            try:
                request_id = g.get("request_id")
            except RuntimeError:  # outside an application context
                request_id = None
        if request_id:
            entry["request_id"] = request_id
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        return json.dumps(entry, ensure_ascii=False, default=str)


def log_unraisable(unraisable) -> None:
    """``sys.unraisablehook``: an exception Python drops (one raised in a ``__del__`` or a
    weakref callback, such as the request time limit's RequestTimeLimit arriving there) as
    one JSON log line, not Python's "Exception ignored in" block on standard error.

    The line keeps what that block says: the object, the exception's type and message (the
    message of the line) and its traceback (``exception``). Installed by the gunicorn logger
    (service.gunicorn_log), in the master before the workers fork.
    """
    try:
        try:
            where = repr(unraisable.object) if unraisable.object is not None else None
        except Exception:
            where = "<object repr() failed>"
        heading = unraisable.err_msg or "Exception ignored in"
        exc_type, exc = unraisable.exc_type, unraisable.exc_value
        what = exc_type.__qualname__
        if exc_type.__module__ not in ("builtins", "__main__"):  # named as Python names it
            what = f"{exc_type.__module__}.{what}"
        text = str(exc) if exc is not None else ""
        what += f": {text}" if text else ""
        logging.getLogger("skydrift.unraisable").warning(
            "%s%s: %s",
            heading,
            f": {where}" if where is not None else "",
            what,
            exc_info=(exc_type, exc, unraisable.exc_traceback)
            if unraisable.exc_traceback is not None
            else None,
        )
    except Exception:  # never lose it: Python's own block, as before
        sys.__unraisablehook__(unraisable)


# --- wiring ---------------------------------------------------------------------------------


def register(app) -> None:
    """Count every request and serve ``/metrics``. Call early in create_app.

    Also puts SKYDRIFT_EOP_FILE, when set, in use as astropy's Earth-orientation table, and
    adds a readiness check naming the table and its last measured day.
    """
    _metrics()  # made in the gunicorn master when preloaded, before the workers fork
    settings = app.config["SKYDRIFT_SETTINGS"]
    if getattr(settings, "eop_file", ""):
        from ..core.offline import use_earth_orientation_file

        try:
            use_earth_orientation_file(settings.eop_file)
        except Exception:  # missing or corrupt: observed.py serves degraded and says why
            logging.getLogger("skydrift.observed").error(
                "SKYDRIFT_EOP_FILE=%r cannot be read; astropy keeps its packaged table",
                settings.eop_file,
            )
    # The Earth-orientation readiness check belongs to the observed-place blueprint, which
    # reads the table it uses; here the table is only put in use and its age exported.
    access_log = logging.getLogger("skydrift.request")

    @app.after_request
    def _observe(resp):
        start = g.get("start")
        if start is None:
            return resp
        endpoint = _endpoint()
        labels = (endpoint, request.method, str(resp.status_code))
        _child("requests", *labels).inc()
        _child("latency", *labels).observe(time.perf_counter() - start)
        if resp.status_code in (400, 422):
            _child("invalid", endpoint).inc()
        if resp.status_code >= 500:
            access_log.warning("answered %s %s %d", request.method, endpoint, resp.status_code)
        return resp

    app.add_url_rule("/metrics", "metrics", metrics_view, methods=["GET"])
