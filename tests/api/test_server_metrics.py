"""The service under gunicorn with two workers: figures and counts shared by the workers.

/metrics is parsed with prometheus-client's text parser (the reference reader of the format).
"""

import concurrent.futures
import pathlib
import socket

import pytest
import requests
from prometheus_client.parser import text_string_to_metric_families

from tests.reliability.server import Server

pytestmark = pytest.mark.server

N_STARS = 500
BODY = {
    "catalogue_epoch": "J2016.0",
    "target_epochs": ["J2026.0"],
    "layout": "columns",
    "stars": {
        "ra_deg": [(7.3 * i) % 360 for i in range(N_STARS)],
        "dec_deg": [((3.1 * i) % 170) - 85 for i in range(N_STARS)],
        "pm_ra_cosdec_mas_yr": [float(i % 50) for i in range(N_STARS)],
        "pm_dec_mas_yr": [float(-(i % 30)) for i in range(N_STARS)],
    },
}


@pytest.fixture(scope="module")
def two_workers(tmp_path_factory):
    folder = tmp_path_factory.mktemp("metrics")
    srv = Server(workers=2, PROMETHEUS_MULTIPROC_DIR=str(folder)).start()
    yield srv.url, folder
    srv.stop()


def scrape(url):
    r = requests.get(url + "/metrics", timeout=10)
    assert r.status_code == 200
    out = {}
    for family in text_string_to_metric_families(r.text):
        for s in family.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def pids_with_request_counts(folder):
    return {p.stem.split("_")[-1] for p in pathlib.Path(folder).glob("counter_*.db")}


def test_metrics_add_up_across_two_workers(two_workers):
    url, folder = two_workers
    sent = 0
    with concurrent.futures.ThreadPoolExecutor(8) as pool:
        # Concurrent requests on separate connections until both workers have served some.
        for _ in range(10):
            codes = list(
                pool.map(
                    lambda _: requests.post(url + "/v1/propagation", json=BODY, timeout=60),
                    range(16),
                )
            )
            assert all(r.status_code == 200 for r in codes)
            sent += len(codes)
            if len(pids_with_request_counts(folder)) >= 2:
                break
    assert len(pids_with_request_counts(folder)) >= 2, "one worker served everything"
    key = frozenset({"endpoint": "/v1/propagation", "method": "POST", "status": "200"}.items())
    stars_key = frozenset({"endpoint": "/v1/propagation"}.items())
    # Whichever worker answers the scrape, the totals are those of the whole service.
    for _ in range(6):
        samples = scrape(url)
        assert samples[("skydrift_http_requests_total", key)] == sent
        assert samples[("skydrift_http_request_duration_seconds_count", key)] == sent
        assert samples[("skydrift_stars_processed_total", stars_key)] == sent * N_STARS


def test_oversized_body_answered_413_over_the_wire_without_sending_it(two_workers):
    """Only the headers are sent (Content-Length 1 GB over the limit): gunicorn and the app
    answer 413 at once, without waiting for a body that never comes."""
    url, _ = two_workers
    host, port = url.removeprefix("http://").split(":")
    head = (
        "POST /v1/propagation HTTP/1.1\r\n"
        f"Host: {host}\r\n"
        "Content-Type: application/json\r\n"
        f"Content-Length: {(1 << 30) + 268_435_456}\r\n"
        "X-Request-ID: too-large\r\n\r\n"
    )
    with socket.create_connection((host, int(port)), timeout=10) as sock:
        sock.sendall(head.encode())
        answer = b""
        while b"\r\n\r\n" not in answer or not answer.rstrip().endswith(b"}"):
            chunk = sock.recv(65536)
            if not chunk:
                break
            answer += chunk
    status_line, _, rest = answer.partition(b"\r\n")
    assert status_line.split()[1] == b"413", answer[:500]
    assert b"application/problem+json" in rest
    assert b'"request_id":"too-large"' in rest


def test_fail_first_n_counted_across_workers():
    """SKYDRIFT_TEST_FAIL_FIRST_N=3 (test only): exactly 3 of 12 concurrent requests, on
    separate connections served by either worker, answer 503 with Retry-After."""
    srv = Server(workers=2, SKYDRIFT_TEST_FAIL_FIRST_N="3", SKYDRIFT_TEST_FAIL_RETRY_AFTER_S="2")
    url = srv.start().url
    try:
        with concurrent.futures.ThreadPoolExecutor(6) as pool:
            answers = list(
                pool.map(lambda _: requests.get(url + "/openapi.json", timeout=30), range(12))
            )
    finally:
        srv.stop()
    failed = [r for r in answers if r.status_code == 503]
    assert len(failed) == 3
    assert all(r.headers["Retry-After"] == "2" for r in failed)
    assert sum(r.status_code == 200 for r in answers) == 9


def test_restarted_workers_leave_one_file_per_kind_and_their_counts(tmp_path):
    # Workers restarted every 3 requests. prometheus-client keeps each dead worker's counter
    # and histogram files (about 30 kB each here): one pair per restart without end, in a
    # /tmp of 64 MiB in the container. Their counts are now added into one file per kind.
    srv = Server(
        workers=2,
        PROMETHEUS_MULTIPROC_DIR=str(tmp_path),
        SKYDRIFT_MAX_REQUESTS="3",
        SKYDRIFT_MAX_REQUESTS_JITTER="0",
    ).start()
    try:
        sent = 0
        for _ in range(30):
            assert requests.post(srv.url + "/v1/propagation", json=BODY, timeout=60).ok
            sent += 1
        key = frozenset({"endpoint": "/v1/propagation", "method": "POST", "status": "200"}.items())
        # Every restart so far is folded once the master has reaped it; the scrapes are
        # requests too and restart workers, so the count is read with that in mind.
        samples = scrape(srv.url)
        assert samples[("skydrift_http_requests_total", key)] == sent
        assert (
            samples[
                (
                    "skydrift_stars_processed_total",
                    frozenset({"endpoint": "/v1/propagation"}.items()),
                )
            ]
            == sent * N_STARS
        )
        counters = sorted(p.name for p in tmp_path.glob("counter_*.db"))
        # At most the two live workers, a worker being replaced, and the folded total.
        assert len(counters) <= 4, counters
        assert "counter_deadworkers.db" in counters
    finally:
        srv.stop()
