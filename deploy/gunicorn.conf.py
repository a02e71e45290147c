"""gunicorn settings for Skydrift; every value can be overridden from the environment.

gunicorn --config deploy/gunicorn.conf.py service.wsgi:app

The container runs exactly this (deploy/Dockerfile), and so do `make serve`, deploy/smoke.sh
and the server tests.
"""

import atexit
import math
import os
import shutil
import tempfile


def _cpu_count() -> int:
    """CPUs this process may use: affinity mask, and the cgroup v2 quota in a container."""
    try:
        n = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        n = os.cpu_count() or 1
    try:
        with open("/sys/fs/cgroup/cpu.max") as fh:
            quota, period = fh.read().split()[:2]
        if quota != "max":
            n = min(n, max(1, math.ceil(int(quota) / int(period))))
    except (OSError, ValueError):
        pass
    return max(1, n)


def _whole(name: str, default: int, lo: int, hi: int) -> int:
    """A whole-number setting; a bad value stops the start with one line naming it."""
    from service.numbers import setting_number

    raw = os.environ.get(name) or ""
    # int() would also read "1_000" and other scripts' digits; no setting here is negative.
    value = setting_number(raw, whole=True, signed=False) if raw else default
    if value is None:
        raise SystemExit(f"{name}={raw!r}: expected a whole number in ASCII digits, without a sign")
    if not lo <= value <= hi:
        raise SystemExit(f"{name}={value}: must be between {lo} and {hi}")
    return value


def _checked(name: str, value: str, check) -> str:
    """``value`` if gunicorn's own ``check`` takes it; otherwise stop with one line naming
    the setting (gunicorn would stop with a traceback, or a message naming no setting)."""
    try:
        check(value)
    except Exception as exc:  # whatever gunicorn raises: one line
        reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise SystemExit(f"{name}={value!r}: {reason}") from None
    return value


def _check_address(value: str) -> None:
    from gunicorn.util import parse_address

    address = parse_address(value)
    if isinstance(address, tuple) and not 0 <= address[1] <= 65535:
        raise ValueError("the port must be between 0 and 65535")


def _check_worker_class(value: str) -> None:
    from gunicorn.util import load_class

    try:
        load_class(value)
    except Exception:  # gunicorn's message is a whole traceback
        raise ValueError(
            "not a gunicorn worker class that can be loaded (gthread, sync, or module.Class)"
        ) from None


def _check_addresses(value: str) -> None:
    from gunicorn.config import validate_string_to_addr_list

    validate_string_to_addr_list(value)


def _check_log_file(value: str) -> None:
    if value != "-":
        try:
            with open(value, "a"):  # what gunicorn does next; it would name no setting
                pass
        except OSError as exc:
            raise ValueError(f"cannot write to it ({exc.strerror})") from None


#: Address to listen on: SKYDRIFT_BIND (default loopback only; the image sets 0.0.0.0:8000).
bind = _checked(
    "SKYDRIFT_BIND", os.environ.get("SKYDRIFT_BIND") or "127.0.0.1:8000", _check_address
)

#: Worker processes: SKYDRIFT_WORKERS, default one per usable CPU (the work is CPU-bound
#: numpy; in a container the CPU limit counts, not the host's CPUs).
workers = _whole("SKYDRIFT_WORKERS", _cpu_count(), 1, 1024)

#: Threaded workers, chosen by measurement (README, "Choosing the worker class"; run
#: `python -m benchmarks.bench_http workers`): with keep-alive clients, gthread with 2
#: threads answered 1.2-2x the requests/s of sync workers, for one star and for 1,000-star
#: batches alike (the parsing and JSON work of one request overlaps the network wait of
#: another; numpy releases the GIL). Two threads, not more: each thread may hold a large
#: batch in memory, so threads x workers bounds the peak memory of a pod.
#: The project's subclass of gthread adds limits on how slowly a client may send a request
#: (SKYDRIFT_CLIENT_IDLE_TIMEOUT_S, default 10; SKYDRIFT_REQUEST_READ_TIMEOUT_S, default 60),
#: so slow clients cannot hold a thread (gthread threads are never reclaimed by `timeout`;
#: see service/workers.py). SKYDRIFT_WORKER_CLASS=gthread gives the plain worker.
worker_class = _checked(
    "SKYDRIFT_WORKER_CLASS",
    os.environ.get("SKYDRIFT_WORKER_CLASS") or "service.workers.ReadDeadlineThreadWorker",
    _check_worker_class,
)


# The workers read these two (service/workers.py); checked here too, by the same function: a
# bad value must stop the start, not make every worker exit as it boots, over and over.
from service.workers import seconds_setting  # noqa: E402

seconds_setting("SKYDRIFT_CLIENT_IDLE_TIMEOUT_S", 10.0)
seconds_setting("SKYDRIFT_REQUEST_READ_TIMEOUT_S", 60.0)

#: Threads per worker (gthread only).
threads = _whole("SKYDRIFT_THREADS", 2, 1, 1024)

#: Seconds a worker may go without a heartbeat before gunicorn kills and replaces it (a hung
#: process; a sync worker also stops answering during one long request). A slow request in
#: a threaded worker is bounded by SKYDRIFT_REQUEST_TIMEOUT_S (service/api/access.py)
#: instead. Kept at least 10 s above it so the application's own 503 answer comes first.
#: (SKYDRIFT_REQUEST_TIMEOUT_S itself is checked by service/config.py, which names a bad
#: value when the application loads; here such a value counts as 0.)
try:
    _soft_s = float(os.environ.get("SKYDRIFT_REQUEST_TIMEOUT_S") or 0)
except ValueError:
    _soft_s = 0.0
if not 0.0 <= _soft_s <= 86400.0:  # also NaN
    _soft_s = 0.0
timeout = max(_whole("SKYDRIFT_TIMEOUT_S", 120, 1, 86400), math.ceil(_soft_s) + 10)

#: Graceful shutdown: on SIGTERM (what Docker and Kubernetes send) the master stops
#: accepting connections and each worker finishes its in-flight request, for at most this
#: many seconds, before it is stopped. Keep the orchestrator's grace period above it
#: (deploy/k8s: terminationGracePeriodSeconds 75; compose: stop_grace_period 75s).
graceful_timeout = _whole("SKYDRIFT_GRACEFUL_TIMEOUT_S", 60, 0, 86400)

#: Seconds to keep an idle client connection open (gthread; sync closes after each request).
keepalive = _whole("SKYDRIFT_KEEPALIVE_S", 5, 0, 3600)

#: Restart each worker after this many requests, plus a random 0..jitter so that the
#: workers do not all restart at once, to bound any slow growth of memory.
max_requests = _whole("SKYDRIFT_MAX_REQUESTS", 20000, 0, 1_000_000_000)
max_requests_jitter = _whole("SKYDRIFT_MAX_REQUESTS_JITTER", 2000, 0, 1_000_000_000)

#: CPU priority of the workers: SKYDRIFT_WORKER_NICE, 0 (default, unchanged) to 19 (lowest).
#: For a pool that serves bulk work on the same host as a pool serving single-star pointing
#: requests: with the bulk workers at a higher nice value the kernel runs pointing requests
#: first when both want the CPU (README, "Separate pools for pointing and bulk work").
#: Raising the value needs no privilege; a value outside 0..19 stops the start.
worker_nice = _whole("SKYDRIFT_WORKER_NICE", 0, 0, 19)

#: Load the application once in the master before forking, so the tables (leap seconds,
#: Earth orientation, constellation boundaries) are read once and shared copy-on-write.
preload_app = True

#: Heartbeat files of the workers on a memory file system when there is one (a read-only
#: root and a slow disk must not stall the heartbeat).
worker_tmp_dir = os.environ.get("SKYDRIFT_WORKER_TMP_DIR") or (
    "/dev/shm" if os.access("/dev/shm", os.W_OK) else None
)
if os.environ.get("SKYDRIFT_WORKER_TMP_DIR") and not (
    os.path.isdir(worker_tmp_dir) and os.access(worker_tmp_dir, os.W_OK | os.X_OK)
):  # gunicorn would stop with a traceback as the first worker boots
    raise SystemExit(f"SKYDRIFT_WORKER_TMP_DIR={worker_tmp_dir!r}: not a writable folder")

#: No control socket (gunicorn 24+): signals are the interface orchestrators use, and a
#: socket under $HOME would collide between instances and need a writable home.
control_socket_disable = True

#: Request line and header limits (defaults of gunicorn, stated for visibility).
limit_request_line = 8190
limit_request_fields = 100

#: Address of trusted proxies whose X-Forwarded-* gunicorn believes (the application also
#: has SKYDRIFT_FORWARDED_HOPS). Default: loopback only, gunicorn's default.
forwarded_allow_ips = _checked(
    "SKYDRIFT_FORWARDED_ALLOW_IPS",
    os.environ.get("SKYDRIFT_FORWARDED_ALLOW_IPS") or "127.0.0.1,::1",
    _check_addresses,
)

#: Logs: one JSON object per line on standard output (access) and standard error (the
#: rest), with the request id (service/gunicorn_log.py). SKYDRIFT_ACCESS_LOG=/dev/null or a
#: file path to redirect the access log.
logger_class = "service.gunicorn_log.JsonLogger"
accesslog = _checked(
    "SKYDRIFT_ACCESS_LOG", os.environ.get("SKYDRIFT_ACCESS_LOG") or "-", _check_log_file
)
errorlog = "-"
loglevel = os.environ.get("SKYDRIFT_LOG_LEVEL", "info").lower()

# --- Prometheus metrics across workers ------------------------------------------------------
# prometheus-client's multiprocess mode: each worker writes its figures to files in
# PROMETHEUS_MULTIPROC_DIR and GET /metrics adds them up. The folder must be set before the
# application (and prometheus_client) is imported, which is why it is set here. It lives under
# the system temporary folder (/tmp, a tmpfs in the container) and is private to this master.
_metrics_dir_owned = not os.environ.get("PROMETHEUS_MULTIPROC_DIR")
try:
    if _metrics_dir_owned:
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="skydrift-metrics-")
    os.makedirs(os.environ["PROMETHEUS_MULTIPROC_DIR"], exist_ok=True)
    if not os.access(os.environ["PROMETHEUS_MULTIPROC_DIR"], os.W_OK | os.X_OK):
        raise PermissionError("not writable")
except OSError as exc:  # e.g. a read-only root with no tmpfs on /tmp: one line, no traceback
    _where = os.environ.get("PROMETHEUS_MULTIPROC_DIR") or "(unset: a new folder under /tmp)"
    raise SystemExit(
        f"PROMETHEUS_MULTIPROC_DIR={_where}: cannot make a writable metrics folder "
        f"({getattr(exc, 'strerror', None) or exc}); give the service a writable /tmp (a tmpfs "
        "in a container) or set PROMETHEUS_MULTIPROC_DIR to a writable folder"
    ) from None
_master_pid = os.getpid()


@atexit.register
def _remove_metrics_dir():
    # Also when the start fails before on_exit could run; only in the master, never in a
    # worker (they share the folder).
    if _metrics_dir_owned and os.getpid() == _master_pid:
        shutil.rmtree(os.environ["PROMETHEUS_MULTIPROC_DIR"], ignore_errors=True)


def on_starting(server):
    """Start with an empty metrics folder (figures of an earlier run must not be counted)."""
    folder = os.environ["PROMETHEUS_MULTIPROC_DIR"]
    for name in os.listdir(folder):
        if name.endswith(".db"):
            os.unlink(os.path.join(folder, name))


def post_fork(server, worker):
    """In each new worker: lower its CPU priority when SKYDRIFT_WORKER_NICE asks for it."""
    if worker_nice:
        current = os.getpriority(os.PRIO_PROCESS, 0)
        os.setpriority(os.PRIO_PROCESS, 0, max(current, worker_nice))  # never raises priority


def child_exit(server, worker):
    """A worker ended (max-requests restart, crash, shutdown): mark it dead for metrics, its
    counts added into one file per kind so that the folder does not grow with every restart."""
    from service.api.observability import fold_dead_worker

    fold_dead_worker(worker.pid)


def on_exit(server):
    """Remove the metrics folder this configuration created."""
    _remove_metrics_dir()
