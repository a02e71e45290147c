"""gunicorn settings for Skydrift; every value can be overridden from the environment.

gunicorn --config deploy/gunicorn.conf.py service.wsgi:app
"""

import multiprocessing
import os

#: Address to listen on: SKYDRIFT_BIND (default loopback only; a container sets 0.0.0.0:8000).
bind = os.environ.get("SKYDRIFT_BIND", "127.0.0.1:8000")

#: Worker processes: SKYDRIFT_WORKERS, default one per CPU (the work is CPU-bound numpy).
workers = int(os.environ.get("SKYDRIFT_WORKERS", multiprocessing.cpu_count()))

#: Synchronous workers: each request is CPU-bound, so threads would only share one core.
#: The project's sync worker adds limits on how slowly a client may send its request
#: (SKYDRIFT_CLIENT_IDLE_TIMEOUT_S, default 10; SKYDRIFT_REQUEST_READ_TIMEOUT_S, default 60),
#: so slow clients cannot hold a worker until `timeout` (see service/workers.py).
worker_class = os.environ.get("SKYDRIFT_WORKER_CLASS", "service.workers.ReadDeadlineSyncWorker")

#: Threads per worker (only used by the gthread worker class).
threads = int(os.environ.get("SKYDRIFT_THREADS", 1))

#: Seconds a worker may spend on one request before it is restarted (a million-star batch
#: takes a few seconds; the default leaves a wide margin).
timeout = int(os.environ.get("SKYDRIFT_TIMEOUT_S", 120))

#: Seconds to finish in-flight requests after SIGTERM before workers are stopped.
graceful_timeout = int(os.environ.get("SKYDRIFT_GRACEFUL_TIMEOUT_S", 60))

#: Seconds to keep an idle client connection open.
keepalive = int(os.environ.get("SKYDRIFT_KEEPALIVE_S", 5))

#: Restart workers after this many requests (plus jitter) to bound any slow growth.
max_requests = int(os.environ.get("SKYDRIFT_MAX_REQUESTS", 20000))
max_requests_jitter = int(os.environ.get("SKYDRIFT_MAX_REQUESTS_JITTER", 2000))

#: Load the application once in the master so tables are read once and shared.
preload_app = True

#: Request line and header limits (defaults of gunicorn, stated for visibility).
limit_request_line = 8190
limit_request_fields = 100

accesslog = os.environ.get("SKYDRIFT_ACCESS_LOG", "-")
errorlog = "-"
loglevel = os.environ.get("SKYDRIFT_LOG_LEVEL", "info").lower()
access_log_format = (
    '{"time":"%(t)s","remote":"%(h)s","request":"%(r)s","status":%(s)s,'
    '"bytes":"%(B)s","duration_us":%(D)s,"request_id":"%({x-request-id}o)s"}'
)
