"""Slow clients ("slow loris") against the real server: gunicorn with deploy/gunicorn.conf.py.

gunicorn's plain sync worker reads with no timeout, so one client sending its body slowly
holds a worker until the master kills it (``timeout``, 120 s). The deploy configuration uses
service.workers.ReadDeadlineSyncWorker, which bounds the wait for the next bytes and the time
to receive the whole request. These tests run one worker (so a held worker would show at
once) with short limits, and check that every kind of slow client is cut off and that the
worker then serves the next request.
"""

from __future__ import annotations

import socket
import time

import pytest
import requests

from .server import Server

pytestmark = pytest.mark.server

IDLE_S = 1.0  # SKYDRIFT_CLIENT_IDLE_TIMEOUT_S for these tests
TOTAL_S = 3.0  # SKYDRIFT_REQUEST_READ_TIMEOUT_S for these tests
#: Allowance for scheduling on a loaded machine when checking that a limit was applied
#: (the limits are what is tested, not the speed of the machine).
SLACK_S = 5.0

HEAD = (
    b"POST /v1/propagation HTTP/1.1\r\nHost: 127.0.0.1\r\n"
    b"Content-Type: application/json\r\nContent-Length: %d\r\n\r\n"
)


@pytest.fixture(scope="module")
def server():
    srv = Server(
        workers=1,
        SKYDRIFT_CLIENT_IDLE_TIMEOUT_S=IDLE_S,
        SKYDRIFT_REQUEST_READ_TIMEOUT_S=TOTAL_S,
    ).start()
    yield srv
    srv.stop()


def _read_answer(sock: socket.socket, limit_s: float) -> tuple[bytes, float]:
    """Wait for the server to answer or close; return (bytes received, seconds waited)."""
    t0 = time.monotonic()
    sock.settimeout(limit_s)
    data = b""
    try:
        while True:
            chunk = sock.recv(65536)
            if not chunk:
                break
            data += chunk
    except TimeoutError:
        pytest.fail(f"server still holding the connection after {limit_s} s")
    except ConnectionResetError:
        pass
    return data, time.monotonic() - t0


def _worker_is_free(server) -> None:
    r = requests.get(server.url + "/health", timeout=IDLE_S + SLACK_S)
    assert r.status_code == 200


def test_stalled_body_gets_408_after_the_idle_limit(server):
    with socket.create_connection(("127.0.0.1", server.port)) as s:
        s.sendall(HEAD % 1000 + b'{"stars": [')
        data, waited = _read_answer(s, IDLE_S + SLACK_S)
    assert data.startswith(b"HTTP/1.1 408"), data[:200]
    assert b"application/problem+json" in data
    assert waited < IDLE_S + SLACK_S
    _worker_is_free(server)


def test_drip_fed_body_gets_408_at_the_total_deadline(server):
    """One byte every 0.4 s never trips the idle limit; the total deadline ends it."""
    t0 = time.monotonic()
    with socket.create_connection(("127.0.0.1", server.port)) as s:
        s.sendall(HEAD % 100_000)
        s.setblocking(False)
        data = b""
        while time.monotonic() - t0 < TOTAL_S + SLACK_S:
            try:
                s.send(b" ")
            except (BrokenPipeError, ConnectionResetError, BlockingIOError):
                pass
            time.sleep(0.4)
            try:
                chunk = s.recv(65536)
            except BlockingIOError:
                continue
            except ConnectionResetError:
                break
            data += chunk
            if not chunk or data.startswith(b"HTTP/"):
                break
        elapsed = time.monotonic() - t0
    assert data.startswith(b"HTTP/1.1 408"), data[:200]
    assert TOTAL_S - 0.5 <= elapsed < TOTAL_S + SLACK_S
    _worker_is_free(server)


def test_slow_headers_are_disconnected(server):
    with socket.create_connection(("127.0.0.1", server.port)) as s:
        s.sendall(b"POST /v1/propagation HTTP/1.1\r\nHost: 127.0.0.1\r\n")
        t0 = time.monotonic()
        s.settimeout(0.5)
        closed = False
        while time.monotonic() - t0 < TOTAL_S + SLACK_S:
            try:
                s.sendall(b"X-Slow: 1\r\n")
                if s.recv(65536) == b"":
                    closed = True
                    break
            except TimeoutError:
                continue
            except (BrokenPipeError, ConnectionResetError):
                closed = True
                break
        elapsed = time.monotonic() - t0
    assert closed, "server kept a client that never finished its headers"
    assert elapsed < TOTAL_S + SLACK_S
    _worker_is_free(server)


def test_a_normal_request_after_slow_clients(server):
    """The single worker was never lost: same process, still answering."""
    before = server.worker_pids()
    body = {
        "stars": [{"ra_deg": 10, "dec_deg": 20, "pm_ra_cosdec_mas_yr": 1, "pm_dec_mas_yr": 2}],
        "catalogue_epoch": 2016.0,
        "target_epochs": [2026.0],
    }
    r = requests.post(server.url + "/v1/propagation", json=body, timeout=30)
    assert r.status_code == 200
    assert server.worker_pids() == before
    assert "too slow, disconnected" in server.output()
