"""Faults: a worker killed, the master stopped, Earth-orientation tables unusable, no network.

The process faults run against the real server (gunicorn with deploy/gunicorn.conf.py) under
a small load from threads in this process, each request on a new connection so that a
failure belongs to exactly one request.
"""

from __future__ import annotations

import http.client
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time

import orjson
import pytest
import requests

from service.api import create_app
from service.config import Settings

from .server import ROOT, Server

DOC = json.loads((ROOT / "openapi" / "openapi.json").read_text())
ONE_STAR = {
    "stars": [{"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0, "pm_dec_mas_yr": 2.0}],
    "catalogue_epoch": 2016.0,
    "target_epochs": [2026.0],
}
#: The pool must be whole again within this many seconds of a worker being killed (issue 7).
REPLACED_WITHIN_S = 5.0


class Load:
    """Client threads sending one-star requests, each on a new connection, recording outcomes."""

    def __init__(self, url: str, threads: int = 4, body: dict | None = None, timeout: float = 30):
        self.url = url
        self.body = body or ONE_STAR
        self.timeout = timeout
        self.stop = threading.Event()
        self.outcomes: list[tuple[float, float, object]] = []  # (start, end, status or error)
        self.lock = threading.Lock()
        self.threads = [threading.Thread(target=self._run, daemon=True) for _ in range(threads)]

    def _run(self):
        while not self.stop.is_set():
            t0 = time.monotonic()
            try:
                r = requests.post(
                    self.url + "/v1/propagation",
                    json=self.body,
                    headers={"Connection": "close"},
                    timeout=self.timeout,
                )
                outcome: object = r.status_code
            except requests.RequestException as exc:
                outcome = type(exc).__name__
            with self.lock:
                self.outcomes.append((t0, time.monotonic(), outcome))

    def __enter__(self) -> Load:
        for t in self.threads:
            t.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        for t in self.threads:
            t.join(timeout=60)

    def failures(self) -> list:
        return [o for o in self.outcomes if o[2] != 200]


# ------------------------------------------------------------------ kill -9 a worker


@pytest.mark.server
def test_killed_worker_costs_at_most_its_requests_and_is_replaced():
    with Server(workers=2) as srv:
        with Load(srv.url, threads=4) as load:
            time.sleep(2.0)
            before = srv.worker_pids()
            assert len(before) == 2
            victim = before[0]
            killed_at = time.monotonic()
            os.kill(victim, signal.SIGKILL)
            whole_after = None
            while time.monotonic() - killed_at < 30:
                pids = srv.worker_pids()
                if len(pids) == 2 and victim not in pids:
                    whole_after = time.monotonic() - killed_at
                    break
                time.sleep(0.05)
            time.sleep(2.0)  # keep loading the replaced pool
        failures = load.failures()
        sent = len(load.outcomes)
    print(
        f"\nworker kill: {sent} requests, {len(failures)} failed "
        f"({[f[2] for f in failures]}), pool whole after {whole_after:.2f} s"
    )
    assert whole_after is not None and whole_after < REPLACED_WITHIN_S
    # At most the requests in flight on the killed worker: no more than one per client
    # thread, and only requests that were running when it died.
    assert len(failures) <= len(load.threads)
    assert all(start <= killed_at + 0.5 for start, _, _ in failures)
    late = [o for o in load.outcomes if o[0] > killed_at + whole_after]
    assert late and all(o[2] == 200 for o in late)


# ------------------------------------------------------------------ SIGTERM the master


@pytest.mark.server
def test_sigterm_finishes_in_flight_requests_then_refuses_connections():
    big = {
        "stars": {
            "ra_deg": [float(i % 360) for i in range(200_000)],
            "dec_deg": [0.0] * 200_000,
            "pm_ra_cosdec_mas_yr": [1.0] * 200_000,
            "pm_dec_mas_yr": [1.0] * 200_000,
        },
        "catalogue_epoch": 2016.0,
        "target_epochs": [2026.0],
        "layout": "columns",
    }
    payload = orjson.dumps(big)
    srv = Server(workers=2).start()
    try:
        results: list = []
        sent = [threading.Event() for _ in range(2)]

        def slow_request(done_sending: threading.Event):
            conn = http.client.HTTPConnection("127.0.0.1", srv.port, timeout=120)
            try:
                conn.request(
                    "POST",
                    "/v1/propagation",
                    body=payload,
                    headers={"Content-Type": "application/json"},
                )
                done_sending.set()  # the whole body is with the server: in flight
                r = conn.getresponse()
                results.append((r.status, orjson.loads(r.read())["star_count"]))
            except OSError as exc:
                done_sending.set()
                results.append(type(exc).__name__)
            finally:
                conn.close()

        threads = [threading.Thread(target=slow_request, args=(e,)) for e in sent]
        for t in threads:
            t.start()
        for e in sent:
            assert e.wait(timeout=60)
        workers_at_stop = srv.worker_pids()
        stopped_at = time.monotonic()
        srv.proc.send_signal(signal.SIGTERM)
        refused_after = None
        while time.monotonic() - stopped_at < 30:
            try:
                with socket.create_connection(("127.0.0.1", srv.port), timeout=1):
                    pass
            except ConnectionRefusedError:
                refused_after = time.monotonic() - stopped_at
                break
            time.sleep(0.05)
        for t in threads:
            t.join(timeout=120)
        code = srv.proc.wait(timeout=90)
    finally:
        srv.stop()
    print(f"\nSIGTERM: in-flight results {results}, new connections refused after {refused_after}")
    assert results == [(200, 200_000), (200, 200_000)]
    # Refused while the in-flight requests were still running, not only once they ended
    # (service.workers.ReadDeadlineThreadWorker drops the listening sockets at once).
    # On failure, say which workers there were and what gunicorn logged (seen once, on a
    # machine loaded by other test runs, and not since: new connections accepted for 30 s).
    why = f"workers at SIGTERM {workers_at_stop}; gunicorn log (end):\n{srv.output()[-4000:]}"
    assert refused_after is not None and refused_after < 5.0, why
    assert code == 0, why


# ------------------------------------------------------------------ Earth orientation


def _observed_example() -> dict:
    return DOC["paths"]["/v1/observed"]["post"]["requestBody"]["content"]["application/json"][
        "example"
    ]


@pytest.mark.parametrize("kind", ["missing", "corrupt", "empty"])
def test_unusable_earth_orientation_table_degrades_the_service(tmp_path, kind):
    path = tmp_path / "finals2000A.all"
    if kind == "corrupt":
        path.write_text("this is not\nan IERS finals2000A file\n")
    elif kind == "empty":
        path.write_text("")
    app = create_app({"SKYDRIFT_SETTINGS": Settings(eop_file=str(path)), "TESTING": True})
    client = app.test_client()
    # The service started; readiness says degraded and why.
    r = client.get("/ready")
    assert r.status_code == 503
    assert r.json["status"] == "degraded"
    check = r.json["checks"]["earth_orientation"]
    assert check["ok"] is False and str(path) in check["detail"]
    # Observed places are still answered, each instant saying the tables were unavailable.
    r = client.post("/v1/observed", json=_observed_example())
    assert r.status_code == 200
    instants = r.json["instants"]
    assert instants and all(i["earth_orientation"]["status"] == "unavailable" for i in instants)
    # Everything that does not need the tables is unaffected.
    assert client.post("/v1/propagation", json=ONE_STAR).status_code == 200


def test_readable_table_is_ready(client):
    r = client.get("/ready")
    assert r.status_code == 200
    assert r.json["checks"]["earth_orientation"]["ok"] is True


# ------------------------------------------------------------------ no network


def _example_requests():
    for path, ops in sorted(DOC["paths"].items()):
        for method, op in ops.items():
            if method not in ("get", "post"):
                continue  # path-level keys such as "parameters"
            if method == "post":
                body = op["requestBody"]["content"]["application/json"].get("example")
                yield method, path, body
            elif "{" not in path:
                yield method, path, None
            else:
                params = [
                    p
                    for p in ops.get("parameters", []) + op.get("parameters", [])
                    if p.get("in") == "path"
                ]
                filled = path
                for p in params:
                    filled = filled.replace("{" + p["name"] + "}", str(p.get("example", "x")))
                yield method, filled, None


def test_no_request_tries_the_network(monkeypatch):
    """Every documented operation, with its example, with every outgoing connection refused.

    socket.connect, connect_ex and getaddrinfo are replaced for the whole test: any attempt
    to reach a host other than loopback is recorded and fails. Nothing may try.
    """
    attempts = []
    real_connect = socket.socket.connect
    real_connect_ex = socket.socket.connect_ex
    real_getaddrinfo = socket.getaddrinfo

    def is_local(address) -> bool:
        host = address[0] if isinstance(address, tuple) else address
        return isinstance(host, str) and (
            host in ("localhost", "::1") or host.startswith("127.") or host.startswith("/")
        )

    def guarded_connect(self, address):
        if not is_local(address):
            attempts.append(("connect", address))
            raise OSError("network disabled in this test")
        return real_connect(self, address)

    def guarded_connect_ex(self, address):
        if not is_local(address):
            attempts.append(("connect_ex", address))
            return 101  # ENETUNREACH
        return real_connect_ex(self, address)

    def guarded_getaddrinfo(host, *args, **kwargs):
        if not is_local((host,)):
            attempts.append(("getaddrinfo", host))
            raise socket.gaierror("network disabled in this test")
        return real_getaddrinfo(host, *args, **kwargs)

    monkeypatch.setattr(socket.socket, "connect", guarded_connect)
    monkeypatch.setattr(socket.socket, "connect_ex", guarded_connect_ex)
    monkeypatch.setattr(socket, "getaddrinfo", guarded_getaddrinfo)
    app = create_app({"SKYDRIFT_SETTINGS": Settings(), "TESTING": True})
    client = app.test_client()
    statuses = {}
    for method, path, body in _example_requests():
        r = client.open(path, method=method.upper(), json=body)
        statuses[f"{method.upper()} {path}"] = r.status_code
    assert attempts == []
    assert all(code < 500 for code in statuses.values()), statuses
    assert statuses["POST /v1/observed"] == 200


def _unshare_works() -> bool:
    if not shutil.which("unshare") or not shutil.which("ip"):
        return False
    return (
        subprocess.run(["unshare", "-n", "true"], capture_output=True, check=False).returncode == 0
    )


NETNS_SCRIPT = """
import json, sys
sys.path.insert(0, {root!r})
from tests.reliability.server import Server
import requests
doc = json.load(open({doc!r}))
out = {{}}
with Server(workers=1) as srv:
    for path, ops in sorted(doc["paths"].items()):
        op = ops.get("post")
        if op:
            body = op["requestBody"]["content"]["application/json"]["example"]
            out[path] = requests.post(srv.url + path, json=body, timeout=60).status_code
    out["/ready"] = requests.get(srv.url + "/ready", timeout=10).status_code
print("@@" + json.dumps(out))
"""


@pytest.mark.server
@pytest.mark.skipif(not _unshare_works(), reason="needs unshare -n (a network namespace)")
def test_served_in_a_network_namespace_with_only_loopback():
    """gunicorn in a namespace with no interface but loopback: every example still answers."""
    script = NETNS_SCRIPT.format(root=str(ROOT), doc=str(ROOT / "openapi" / "openapi.json"))
    proc = subprocess.run(
        [
            "unshare",
            "-n",
            "sh",
            "-c",
            'ip link set lo up && exec "$0" -c "$1"',
            sys.executable,
            script,
        ],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=ROOT,
        check=False,
    )
    line = [x for x in proc.stdout.splitlines() if x.startswith("@@")]
    assert line, proc.stdout[-2000:] + proc.stderr[-2000:]
    statuses = json.loads(line[0][2:])
    assert statuses["/ready"] == 200
    assert all(code == 200 for code in statuses.values()), statuses
