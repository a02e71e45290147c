"""The service as `make serve` runs it: gunicorn with deploy/gunicorn.conf.py, real sockets."""

import signal

import pytest
import requests

from tests.reliability.server import Server

pytestmark = pytest.mark.server


@pytest.fixture(scope="module")
def server():
    srv = Server(workers=2).start()
    yield srv.url, srv.proc
    srv.stop()


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
