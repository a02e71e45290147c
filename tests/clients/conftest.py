"""A real Skydrift service (gunicorn on loopback) for the client and command-line tests."""

import os
import signal
import socket
import subprocess
import sys
import tempfile
import time

import pytest
import requests

from tests.conftest import ROOT


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_service(extra_env=None):
    """Start gunicorn with the deploy configuration; return (url, process)."""
    port = free_port()
    env = dict(
        os.environ,
        SKYDRIFT_BIND=f"127.0.0.1:{port}",
        SKYDRIFT_WORKERS="1",
        SKYDRIFT_ACCESS_LOG="/dev/null",
        PYTHONPATH=str(ROOT),
    )
    env.update(extra_env or {})
    log = tempfile.TemporaryFile()
    proc = subprocess.Popen(
        [sys.executable, "-m", "gunicorn", "-c", "deploy/gunicorn.conf.py", "service.wsgi:app"],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=log,
    )
    proc.log = log
    url = f"http://127.0.0.1:{port}"
    for _ in range(300):
        try:
            if requests.get(url + "/health", timeout=1).status_code == 200:
                return url, proc
        except requests.ConnectionError:
            time.sleep(0.1)
    proc.kill()
    proc.wait()
    log.close()
    pytest.fail("gunicorn did not start")


def stop_service(proc) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=60)
    proc.log.close()


@pytest.fixture(scope="session")
def live_service():
    """URL of a Skydrift service started for this test session."""
    url, proc = start_service()
    yield url
    stop_service(proc)
