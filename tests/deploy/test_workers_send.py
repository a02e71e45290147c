"""service/workers.py: an answer's header block goes out with its first body piece.

gunicorn writes the header block and the body in two ``sendall`` calls; the project's
workers hold the header block back and send it with the next one. Checked here on a
recording socket (what is sent, in which calls, in which order) and on the wire under
gunicorn with both worker classes: answers with and without a body (HEAD), a kept-alive
connection, and a body larger than the pieces joined.
"""

from __future__ import annotations

import socket

import pytest

from service.workers import COALESCE_MAX_BYTES, _ReadDeadlineSocket, _send_held
from tests.reliability.server import Server

HEADERS = b"HTTP/1.1 200 OK\r\nContent-Length: 2\r\n\r\n"


class _Recorder:
    """A socket that records the calls made on it."""

    def __init__(self, fail_sending: bool = False):
        self.calls = []
        self.fail_sending = fail_sending

    def settimeout(self, value):
        pass

    def sendall(self, data, *flags):
        if self.fail_sending:
            raise BrokenPipeError("client gone")
        self.calls.append(("sendall", bytes(data)))

    def send(self, data, *flags):
        self.calls.append(("send", bytes(data)))
        return len(data)

    def recv(self, size, *flags):
        self.calls.append(("recv", size))
        return b""

    def sendfile(self, *args, **kwargs):
        self.calls.append(("sendfile",))

    def shutdown(self, how):
        self.calls.append(("shutdown", how))

    def close(self):
        self.calls.append(("close",))


def _wrapped(**kwargs):
    raw = _Recorder(**kwargs)
    return raw, _ReadDeadlineSocket(raw, idle_s=10.0, total_s=60.0, send_s=120.0)


def test_header_block_goes_out_with_the_first_body_piece():
    raw, sock = _wrapped()
    sock.sendall(HEADERS)
    assert raw.calls == []
    sock.sendall(b"{}")
    sock.sendall(b"more")
    assert raw.calls == [("sendall", HEADERS + b"{}"), ("sendall", b"more")]


def test_a_large_first_body_piece_follows_in_its_own_call():
    raw, sock = _wrapped()
    body = b"x" * (COALESCE_MAX_BYTES + 1)
    sock.sendall(HEADERS)
    sock.sendall(body)
    assert raw.calls == [("sendall", HEADERS), ("sendall", body)]


@pytest.mark.parametrize(
    ("operation", "then"),
    [
        (lambda s: s.send_held(), []),
        (lambda s: s.recv(10), [("recv", 10)]),
        (lambda s: s.send(b"x"), [("send", b"x")]),
        (lambda s: s.sendfile(None), [("sendfile",)]),
        (lambda s: s.shutdown(socket.SHUT_WR), [("shutdown", socket.SHUT_WR)]),
        (lambda s: s.close(), [("close",)]),
    ],
    ids=["send_held", "recv", "send", "sendfile", "shutdown", "close"],
)
def test_anything_else_sends_the_held_block_first(operation, then):
    raw, sock = _wrapped()
    sock.sendall(HEADERS)
    operation(sock)
    assert raw.calls == [("sendall", HEADERS), *then]
    sock.send_held()  # nothing is sent twice
    assert raw.calls == [("sendall", HEADERS), *then]


def test_other_data_is_never_held():
    raw, sock = _wrapped()
    for data in (b"{}", b"HTTP/1.1 200 OK\r\n", b"0\r\n\r\n", memoryview(HEADERS)):
        sock.sendall(data)
    assert [d for _, d in raw.calls] == [b"{}", b"HTTP/1.1 200 OK\r\n", b"0\r\n\r\n", HEADERS]


def test_closing_when_the_client_is_gone_raises_nothing():
    raw, sock = _wrapped(fail_sending=True)
    sock.sendall(HEADERS)
    sock.close()
    assert raw.calls == [("close",)]


def test_end_of_request_sends_the_block_and_reports_a_gone_client_only_on_success():
    raw, sock = _wrapped(fail_sending=True)
    sock.sendall(HEADERS)
    with pytest.raises(BrokenPipeError):
        _send_held(sock)  # a request that succeeded: the failed send is the error
    sock.sendall(HEADERS)
    try:
        raise ValueError("the request failed")
    except ValueError:
        _send_held(sock)  # the request's own error is the one reported
    assert sock._held is None


# ------------------------------------------------------------------ on the wire


def _read_answer(sock: socket.socket, *, head: bool = False, limit_s: float = 5.0) -> bytes:
    """One answer: its header block, and unless it answers HEAD the body its Content-Length
    gives. A read that waits ``limit_s`` fails the test (socket timeout)."""
    sock.settimeout(limit_s)
    data = b""
    while b"\r\n\r\n" not in data or not head and len(data) < _answer_size(data):
        chunk = sock.recv(65536)
        assert chunk, f"connection closed after {len(data)} bytes"
        data += chunk
    return data[: data.index(b"\r\n\r\n") + 4] if head else data[: _answer_size(data)]


def _answer_size(data: bytes) -> int:
    """Header block plus Content-Length, once the header block is complete."""
    head_end = data.find(b"\r\n\r\n")
    if head_end < 0:
        return len(data) + 1
    lengths = [int(line.split(b":")[1]) for line in data[:head_end].split(b"\r\n")
               if line.lower().startswith(b"content-length:")]  # fmt: skip
    return head_end + 4 + (lengths[0] if lengths else 0)


@pytest.mark.server
@pytest.mark.parametrize(
    "worker_class",
    ["service.workers.ReadDeadlineThreadWorker", "service.workers.ReadDeadlineSyncWorker"],
    ids=["gthread", "sync"],
)
def test_answers_with_and_without_a_body_arrive_whole(worker_class):
    """GET and HEAD on one kept-alive connection (gthread; sync closes after each answer):
    every answer arrives at once, the HEAD answer's headers too (it has no body piece to
    travel with), and a body larger than COALESCE_MAX_BYTES arrives whole. Kept-alive
    connections are held 30 s here, so a header block held back until the connection closes
    could not arrive within the 5 s each read is given."""
    server = Server(workers=1, SKYDRIFT_WORKER_CLASS=worker_class, SKYDRIFT_KEEPALIVE_S=30)
    with server as srv:
        port = srv.port
        get = b"GET /health HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n"
        head = b"HEAD /health HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n"
        keep_alive = "Thread" in worker_class
        requests_ = [get, head, get] if keep_alive else [get, head]
        answers = []
        for req in requests_:
            if not answers or not keep_alive:
                conn = socket.create_connection(("127.0.0.1", port))
            conn.sendall(req)
            answers.append(_read_answer(conn, head=req is head))
            if not keep_alive:
                conn.close()
        conn.close()
        assert [a.split(b"\r\n", 1)[0] for a in answers] == [b"HTTP/1.1 200 OK"] * len(answers)
        assert answers[0].endswith(b"}")  # the GET answer's JSON body
        assert answers[1].endswith(b"\r\n\r\n")  # HEAD: headers only
        # A large answer (the OpenAPI document) arrives whole.
        conn = socket.create_connection(("127.0.0.1", port))
        conn.sendall(b"GET /openapi.json HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        big = _read_answer(conn, limit_s=10.0)
        conn.close()
        body = big.split(b"\r\n\r\n", 1)[1]
        assert len(body) > COALESCE_MAX_BYTES
        assert body.rstrip().endswith(b"}")
