"""Request bodies sent without a Content-Length (chunked transfer coding), under gunicorn.

RFC 9112 section 7.1 defines the chunked coding: each chunk is its size in hexadecimal, CRLF,
the data, CRLF; a chunk of size 0 ends the body. A body sent that way has no declared length,
so the size limit (SKYDRIFT_MAX_BODY_BYTES) must be applied while reading: a body over it is
refused whole (413), never cut at the limit and answered as if complete, and a malformed
chunk is the client's error (400), not the service's (500).
"""

import socket

import orjson
import pytest
import requests

from tests.reliability.server import Server

pytestmark = pytest.mark.server

#: Small enough that a few hundred CSV rows exceed it (the setting's lowest value is 1,024).
LIMIT = 4000


@pytest.fixture(scope="module")
def server():
    srv = Server(workers=1, SKYDRIFT_MAX_BODY_BYTES=LIMIT).start()
    yield srv.url, srv.port
    srv.stop()


def _csv_rows(n: int) -> bytes:
    rows = [b"id,ra_deg,dec_deg,pm_ra_cosdec_mas_yr,pm_dec_mas_yr"]
    rows += [b"S%d,10.5,20.25,5.0,-3.0" % k for k in range(n)]
    return b"\n".join(rows) + b"\n"


def _chunks(data: bytes, size: int = 500):
    for k in range(0, len(data), size):
        yield data[k : k + size]


CSV_QUERY = "/v1/propagation?catalogue_epoch=J2016.0&target_epochs=J2026.0"


def test_chunked_body_within_the_limit_is_read_whole(server):
    url, _ = server
    data = _csv_rows(100)  # about 2,700 bytes, in six chunks
    assert len(data) < LIMIT
    r = requests.post(
        url + CSV_QUERY, data=_chunks(data), headers={"Content-Type": "text/csv"}, timeout=30
    )
    assert r.status_code == 200, r.text
    assert r.json()["star_count"] == 100


def test_chunked_json_body_within_the_limit(server):
    url, _ = server
    body = {
        "stars": [{"ra_deg": 10.0, "dec_deg": 20.0, "pm_ra_cosdec_mas_yr": 1.0,
                   "pm_dec_mas_yr": 2.0}] * 20,
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["J2026.0"],
    }  # fmt: skip
    data = orjson.dumps(body)
    r = requests.post(
        url + "/v1/propagation",
        data=_chunks(data, 300),
        headers={"Content-Type": "application/json"},
        timeout=30,
    )
    assert r.status_code == 200, r.text
    assert r.json()["star_count"] == 20


@pytest.mark.parametrize("content_type", ["text/csv", "application/json"])
def test_chunked_body_over_the_limit_is_refused_not_cut(server, content_type):
    # 300 rows, about 7,700 bytes: before, the first 4,000 bytes (ending at a row) were
    # read as the whole table and answered 200 with the stars they held.
    url, _ = server
    path, data = CSV_QUERY, _csv_rows(300)
    if content_type == "application/json":
        path, data = "/v1/propagation", orjson.dumps({"stars": [], "pad": "x" * 2 * LIMIT})
    r = requests.post(
        url + path, data=_chunks(data), headers={"Content-Type": content_type}, timeout=30
    )
    assert r.status_code == 413, r.text
    assert r.headers["Content-Type"].startswith("application/problem+json")


def _raw_post(port: int, chunked_body: bytes) -> tuple[int, bytes]:
    head = (
        b"POST /v1/propagation HTTP/1.1\r\nHost: test\r\nContent-Type: application/json\r\n"
        b"Transfer-Encoding: chunked\r\nConnection: close\r\n\r\n"
    )
    with socket.create_connection(("127.0.0.1", port), timeout=30) as s:
        s.sendall(head + chunked_body)
        answer = b""
        while chunk := s.recv(65536):
            answer += chunk
    status = int(answer.split(b" ", 2)[1])
    return status, answer.partition(b"\r\n\r\n")[2]


@pytest.mark.parametrize(
    "chunked_body",
    [
        b"ZZ\r\nabc\r\n0\r\n\r\n",  # chunk size not hexadecimal
        b"-5\r\nabcde\r\n0\r\n\r\n",  # negative chunk size
        b"3\r\nabcXX0\r\n\r\n",  # chunk data not followed by CRLF
    ],
    ids=["size_not_hex", "size_negative", "no_terminator"],
)
def test_malformed_chunk_is_400_not_500(server, chunked_body):
    _, port = server
    status, body = _raw_post(port, chunked_body)
    assert status == 400, body
    problem = orjson.loads(body)
    assert "chunked request body is malformed" in problem["detail"]


def test_well_formed_chunks_over_a_raw_socket(server):
    # The same framing, well formed, is read (the test above fails on the framing alone).
    _, port = server
    body = orjson.dumps(
        {"stars": [{"ra_deg": 1.0, "dec_deg": 2.0, "pm_ra_cosdec_mas_yr": 0.0,
                    "pm_dec_mas_yr": 0.0}], "catalogue_epoch": 2016.0, "target_epochs": [2017.0]}
    )  # fmt: skip
    chunked = b"%x\r\n%s\r\n0\r\n\r\n" % (len(body), body)
    status, answer = _raw_post(port, chunked)
    assert status == 200, answer


def _raw(port: int, request: bytes) -> tuple[bytes, bytes]:
    with socket.create_connection(("127.0.0.1", port), timeout=30) as s:
        s.sendall(request)
        answer = b""
        while chunk := s.recv(65536):
            answer += chunk
    head, _, body = answer.partition(b"\r\n\r\n")
    return head, body


@pytest.mark.parametrize(
    ("request_bytes", "status"),
    [
        (b"POST /v1/propagation HTTP/1.1\r\nHost: t\r\nContent-Length: abc\r\n\r\n", 400),
        (b"POST /v1/propagation HTTP/1.1\r\nHost: t\r\nContent-Length: 5\r\n"
         b"Content-Length: 6\r\n\r\nhello", 400),
        (b"GET /health?" + b"x" * 10_000 + b" HTTP/1.1\r\nHost: t\r\n\r\n", 414),
    ],
    ids=["length-not-a-number", "two-lengths", "url-too-long"],
)  # fmt: skip
def test_requests_gunicorn_refuses_are_answered_as_problems(server, request_bytes, status):
    # Refused before the application sees them; gunicorn answered these with an HTML page.
    _, port = server
    head, body = _raw(port, request_bytes)
    assert head.split(b" ", 2)[1] == str(status).encode(), head
    assert b"Content-Type: application/problem+json" in head
    problem = orjson.loads(body)
    assert problem["status"] == status and problem["title"] and problem["detail"]
