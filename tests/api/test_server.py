"""The service as `make serve` runs it: gunicorn with deploy/gunicorn.conf.py, real sockets."""

import os
import pathlib
import signal
import socket
import subprocess
import sys
import time

import pytest
import requests

ROOT = pathlib.Path(__file__).resolve().parents[2]
pytestmark = pytest.mark.server


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server():
    port = _free_port()
    env = dict(os.environ, SKYDRIFT_BIND=f"127.0.0.1:{port}", SKYDRIFT_WORKERS="2")
    proc = subprocess.Popen(
        [sys.executable, "-m", "gunicorn", "-c", "deploy/gunicorn.conf.py", "service.wsgi:app"],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
    )
    url = f"http://127.0.0.1:{port}"
    for _ in range(300):
        try:
            if requests.get(url + "/ready", timeout=1).status_code == 200:
                break
        except requests.ConnectionError:
            time.sleep(0.1)
    else:
        proc.kill()
        output = proc.stdout.read().decode()[-2000:]
        proc.stdout.close()
        pytest.fail("gunicorn did not become ready: " + output)
    yield url, proc
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=60)
    proc.stdout.close()


def test_served_with_no_settings(server):
    url, _ = server
    assert requests.get(url + "/health", timeout=5).json()["status"] == "ok"


def test_propagation_over_the_wire(server, demo_catalogue):
    url, _ = server
    body = {
        "stars": demo_catalogue["stars"],
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["now"],
    }
    r = requests.post(url + "/v1/propagation", json=body, timeout=30)
    assert r.status_code == 200
    assert r.json()["star_count"] == len(demo_catalogue["stars"])


def test_bad_input_over_the_wire_is_problem_json(server):
    url, _ = server
    r = requests.post(
        url + "/v1/propagation", data=b"{not json", headers={"Content-Type": "application/json"}
    )
    assert r.status_code == 400
    assert r.headers["Content-Type"].startswith("application/problem+json")


def test_arrow_in_and_out_over_the_wire(server, demo_catalogue):
    # The Arrow body is read and the Arrow answer sent by gunicorn itself (bytes only).
    import pyarrow as pa

    url, _ = server
    stars = demo_catalogue["stars"]
    names = list(dict.fromkeys(k for s in stars for k in s))
    table = pa.table({k: [s.get(k) for s in stars] for k in names})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    arrow = "application/vnd.apache.arrow.stream"
    r = requests.post(
        url + "/v1/propagation?catalogue_epoch=J2016.0&target_epochs=J2016.0,J2100.0",
        data=sink.getvalue().to_pybytes(),
        headers={"Content-Type": arrow, "Accept": arrow},
        timeout=30,
    )
    assert r.status_code == 200, r.text[:500]
    assert r.headers["Content-Type"] == arrow
    answer = pa.ipc.open_stream(r.content).read_all()
    assert answer.num_rows == 2 * len(stars)
    assert answer.column("id").to_pylist()[::2] == [s["id"] for s in stars]


def test_sigterm_stops_cleanly(server):
    _, proc = server
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=60) == 0
