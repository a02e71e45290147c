"""gunicorn workers that give each client a deadline to send its request.

gunicorn's workers read a request with a blocking socket and no timeout. A client that sends
its headers or body slowly ("slow loris") holds a sync worker until the master's worker
``timeout`` (120 s here) kills and replaces it, and holds a gthread thread for ever (the
master only watches the worker's main loop, which keeps running); a handful of such clients
stop the service. :class:`ReadDeadlineThreadWorker` (gthread, the deploy default) and
:class:`ReadDeadlineSyncWorker` (sync) add two limits on reading each request:

- ``SKYDRIFT_CLIENT_IDLE_TIMEOUT_S`` (default 10): longest wait for the next bytes;
- ``SKYDRIFT_REQUEST_READ_TIMEOUT_S`` (default 60): longest time to receive the whole request,
  headers and body, counted from the connection being accepted or, on a kept-alive
  connection, from the moment a thread takes up its next request.

A client that misses either is answered 408 (when the application was already reading the
body; ``errors.handle_client_timeout``) or disconnected (while still sending headers), the
event is logged on one line, and the worker is free at once. Sending
the response is bounded by the worker ``timeout`` as before. Behind a buffering reverse proxy
these limits are never reached.

Both workers send an answer's header block with the first piece of its body, in one
``sendall`` (gunicorn writes them in two): on a one-star request the second system call, and
the second wake-up of the client, were about a tenth of the worker's time. See
:class:`_ReadDeadlineSocket` (``send_held``).

Both workers also answer the requests gunicorn itself refuses (a malformed request line or
header, a URL or header block over the limits) with an RFC 9457 problem, as the application
answers every other error, instead of gunicorn's HTML page (:func:`write_problem_error`).
"""

from __future__ import annotations

import errno
import json
import os
import sys
import time

from gunicorn import util
from gunicorn.http.errors import NoMoreData
from gunicorn.workers.gthread import TConn, ThreadWorker
from gunicorn.workers.sync import SyncWorker

from .numbers import setting_number


class ClientTooSlow(NoMoreData, TimeoutError):
    """The client did not send its request within the configured limits.

    A NoMoreData for gunicorn (a client gone: no traceback in the log) and a TimeoutError
    for the application (answered 408 if it was reading the body).
    """

    def __init__(self, message: str):
        super().__init__(None)
        self.message = message

    def __str__(self):
        return self.message


def seconds_setting(name: str, default: float) -> float:
    """A time setting of the workers, seconds; a bad value stops with one line naming it
    (also read by deploy/gunicorn.conf.py, so that it stops the start, not each worker)."""
    raw = os.environ.get(name, "")
    # float() would also read "1_0", "nan", "inf" and other scripts' digits.
    value = setting_number(raw, whole=False, signed=False) if raw else default
    if value is None:
        raise SystemExit(f"{name}={raw!r}: expected a number of seconds in ASCII digits")
    if not 0.1 <= value <= 3600:
        raise SystemExit(f"{name}={value}: must be between 0.1 and 3600 seconds")
    return value


#: Largest first body piece sent together with the header block held before it (a copy of
#: both is made); a larger one follows the header block in a call of its own.
COALESCE_MAX_BYTES = 64 * 1024


def _is_header_block(data) -> bool:
    """Whether ``data`` is an answer's status line and headers as gunicorn writes them."""
    return type(data) is bytes and data.startswith(b"HTTP/") and data.endswith(b"\r\n\r\n")


class _ReadDeadlineSocket:
    """A client socket whose reads are bounded by an idle timeout and a total deadline, and
    whose answers go out with their header block and first body piece in one call.

    gunicorn sends the header block of an answer in one ``sendall`` and the body in the
    next. Here the header block is held and sent with the next ``sendall`` (one system call
    and one segment instead of two). Whatever else is done with the socket first sends what
    is held: ``recv``, ``send``, ``sendfile``, ``shutdown``, ``close``, and ``send_held``,
    which the workers call when gunicorn has finished a request (an answer without a body,
    to HEAD or with status 204 or 304, has no next ``sendall``). The bytes on the wire are
    the same, in the same order.
    """

    def __init__(self, sock, idle_s: float, total_s: float, send_s: float, log=None):
        self._sock = sock
        self._log = log
        self._idle_s = idle_s
        self._total_s = total_s
        self._send_s = send_s
        self._deadline = time.monotonic() + total_s
        self._held = None  # a header block not yet sent

    def send_held(self) -> None:
        """Send the header block held back, if any."""
        held = self._held
        if held is not None:
            self._held = None
            self._sending().sendall(held)

    def restart_deadline(self) -> None:
        """A new request starts (kept-alive connection): the total limit counts from now."""
        self._deadline = time.monotonic() + self._total_s

    def recv(self, size, *flags):
        if self._held is not None:
            self.send_held()
        left = self._deadline - time.monotonic()
        if left <= 0:
            raise self._too_slow(f"request not received within {self._total_s:g} s")
        wait = min(self._idle_s, left)
        self._sock.settimeout(wait)
        try:
            return self._sock.recv(size, *flags)
        except TimeoutError:
            raise self._too_slow(f"no data from the client for {wait:.3g} s") from None

    def _too_slow(self, message: str) -> ClientTooSlow:
        if self._log is not None:
            try:
                peer = self._sock.getpeername()
            except OSError:
                peer = "?"
            self._log.info("client %s too slow, disconnected: %s", peer, message)
            self._log = None  # once per connection (the close drains with recv as well)
        return ClientTooSlow(message)

    def _sending(self):
        self._sock.settimeout(self._send_s)
        return self._sock

    def send(self, data, *flags):
        self.send_held()
        return self._sending().send(data, *flags)

    def sendall(self, data, *flags):
        held = self._held
        if held is not None:
            self._held = None
            if len(data) <= COALESCE_MAX_BYTES:
                data = held + data
            else:
                self._sending().sendall(held)
        elif not flags and _is_header_block(data):
            self._held = data
            return None
        return self._sending().sendall(data, *flags)

    def sendfile(self, *args, **kwargs):
        self.send_held()
        return self._sending().sendfile(*args, **kwargs)

    def shutdown(self, how):
        self._send_held_before_closing()
        return self._sock.shutdown(how)

    def close(self):
        self._send_held_before_closing()
        return self._sock.close()

    def _send_held_before_closing(self) -> None:
        try:
            self.send_held()
        except OSError:  # the client is gone: nothing more can reach it
            pass

    def __getattr__(self, name):
        return getattr(self._sock, name)


def _send_held(sock) -> None:
    """At the end of a request: send the header block the socket may still hold (an answer
    without a body). When the request failed, the error already on its way is the one to
    report, so a client gone by now is not another."""
    if isinstance(sock, _ReadDeadlineSocket) and sock._held is not None:
        if sys.exc_info()[1] is None:
            sock.send_held()
        else:
            sock._send_held_before_closing()


def write_problem_error(sock, status_int, reason, mesg):
    """gunicorn's error answer (a request it refused before the application saw it: a
    malformed request line or header, a URL or header block over the limits) as an RFC 9457
    problem, like every other error answer of the service, instead of gunicorn's HTML page.
    Same signature and delivery as ``gunicorn.util.write_error``, which it replaces in the
    worker processes (:func:`_answer_errors_as_problems`)."""
    body = json.dumps(
        {"type": "about:blank", "title": reason, "status": status_int, "detail": mesg or reason}
    ).encode()
    head = (
        f"HTTP/1.1 {status_int} {reason}\r\nConnection: close\r\n"
        f"Content-Type: application/problem+json\r\nContent-Length: {len(body)}\r\n\r\n"
    )
    util.write_nonblock(sock, head.encode("latin-1") + body)


def _answer_errors_as_problems() -> None:
    """In a worker process: gunicorn's own error answers become problems. gunicorn's worker
    base class calls ``util.write_error`` by module attribute, so this is where it can be
    swapped; the process is a worker of this service and nothing else."""
    util.write_error = write_problem_error


class ReadDeadlineSyncWorker(SyncWorker):
    """gunicorn's sync worker with per-client read limits (module docstring)."""

    def init_process(self):
        self.client_idle_s = seconds_setting("SKYDRIFT_CLIENT_IDLE_TIMEOUT_S", 10.0)
        self.request_read_s = seconds_setting("SKYDRIFT_REQUEST_READ_TIMEOUT_S", 60.0)
        _answer_errors_as_problems()
        super().init_process()

    def accept(self, listener):
        client, addr = listener.accept()
        client.setblocking(True)
        util.close_on_exec(client)
        send_s = float(self.cfg.timeout or 120)
        wrapped = _ReadDeadlineSocket(
            client, self.client_idle_s, self.request_read_s, send_s, self.log
        )
        self.handle(listener, wrapped, addr)

    def handle_request(self, listener, req, client, addr):
        try:
            return super().handle_request(listener, req, client, addr)
        finally:
            _send_held(client)


class ReadDeadlineThreadWorker(ThreadWorker):
    """gunicorn's gthread worker with per-request read limits (module docstring)."""

    def init_process(self):
        self.client_idle_s = seconds_setting("SKYDRIFT_CLIENT_IDLE_TIMEOUT_S", 10.0)
        self.request_read_s = seconds_setting("SKYDRIFT_REQUEST_READ_TIMEOUT_S", 60.0)
        _answer_errors_as_problems()
        super().init_process()

    def accept(self, listener):
        # ThreadWorker.accept, with the client socket wrapped.
        try:
            client_sock, client_addr = listener.accept()
            self.nr_conns += 1
            client_sock.setblocking(True)
            send_s = float(self.cfg.timeout or 120)
            wrapped = _ReadDeadlineSocket(
                client_sock, self.client_idle_s, self.request_read_s, send_s, self.log
            )
            conn = TConn(self.cfg, wrapped, client_addr, listener.getsockname())
            self.enqueue_req(conn)
        except OSError as e:
            if e.errno not in (errno.EAGAIN, errno.ECONNABORTED, errno.EWOULDBLOCK):
                raise

    def handle(self, conn):
        if isinstance(conn.sock, _ReadDeadlineSocket):
            conn.sock.restart_deadline()
        return super().handle(conn)

    def handle_request(self, req, conn):
        try:
            return super().handle_request(req, conn)
        finally:  # before the connection goes back to the poller
            _send_held(conn.sock)

    def set_accept_enabled(self, enabled):
        super().set_accept_enabled(enabled)
        if not enabled and not self.alive:
            # Shutting down (SIGTERM): drop this process's copies of the listening sockets
            # now, not after the in-flight requests. Once the master has closed its own (it
            # does so first), new connections are refused at once instead of waiting in the
            # backlog for a worker that will never accept them.
            for listener in self.sockets:
                listener.close()
