"""Start and stop the service under its production gunicorn configuration, for benchmarks.

One gunicorn master with ``deploy/gunicorn.conf.py`` on a free loopback port, access log
off, any further ``SKYDRIFT_*`` settings from the caller; it is ready when ``/ready``
answers 200.
"""

from __future__ import annotations

import os
import pathlib
import re
import signal
import socket
import subprocess
import sys
import time

import requests

ROOT = pathlib.Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start(app: str = "service.wsgi:app", wait_s: float = 60.0, **settings):
    """(base URL, master process) of gunicorn serving ``app``; ``settings`` are
    environment variables (values made text), such as ``SKYDRIFT_WORKERS=1``."""
    port = free_port()
    env = dict(
        os.environ,
        SKYDRIFT_BIND=f"127.0.0.1:{port}",
        SKYDRIFT_ACCESS_LOG="/dev/null",
        **{k: str(v) for k, v in settings.items()},
    )
    proc = subprocess.Popen(
        [sys.executable, "-m", "gunicorn", "-c", str(ROOT / "deploy" / "gunicorn.conf.py"), app],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + wait_s
    while time.monotonic() < deadline:
        try:
            if requests.get(url + "/ready", timeout=5).ok:
                return url, proc
        except requests.ConnectionError:
            time.sleep(0.1)
    proc.kill()
    raise RuntimeError(f"gunicorn serving {app} did not become ready in {wait_s:g} s")


def stop(proc: subprocess.Popen, timeout_s: float = 90.0) -> None:
    """SIGTERM (graceful shutdown), then kill if it has not ended in ``timeout_s``."""
    proc.send_signal(signal.SIGTERM)
    try:
        proc.wait(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


def worker_memory_mb(master_pid: int, field: str = "VmRSS") -> dict[int, float]:
    """A memory figure of each worker process of the gunicorn master ``master_pid``, MB, by
    pid: ``VmRSS`` (resident now) or ``VmHWM`` (peak resident), from /proc (Linux)."""
    out = {}
    for child in pathlib.Path("/proc").iterdir():
        if not child.name.isdigit():
            continue
        try:
            status = (child / "status").read_text()
        except OSError:
            continue
        if f"PPid:\t{master_pid}\n" in status:
            m = re.search(rf"{field}:\s+(\d+) kB", status)
            if m:
                out[int(child.name)] = int(m.group(1)) / 1024
    return out
