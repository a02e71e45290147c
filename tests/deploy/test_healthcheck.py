"""deploy/healthcheck.py (the image's HEALTHCHECK): 0 when /health answers 200, else 1."""

import http.server
import os
import pathlib
import socket
import subprocess
import sys
import threading

ROOT = pathlib.Path(__file__).resolve().parents[2]
SCRIPT = str(ROOT / "deploy" / "healthcheck.py")


def run(bind):
    env = dict(os.environ, SKYDRIFT_BIND=bind)
    return subprocess.run([sys.executable, SCRIPT], env=env, capture_output=True, timeout=30)


class Health(http.server.BaseHTTPRequestHandler):
    status = 200

    def do_GET(self):
        self.send_response(self.status if self.path == "/health" else 404)
        self.end_headers()

    def log_message(self, *args):
        pass


def serve(status):
    handler = type("H", (Health,), {"status": status})
    server = http.server.HTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server


def test_healthy_when_health_answers_200_on_any_bind_address():
    server = serve(200)
    try:
        port = server.server_address[1]
        assert run(f"127.0.0.1:{port}").returncode == 0
        assert run(f"0.0.0.0:{port}").returncode == 0  # the image's bind: asks on loopback
    finally:
        server.shutdown()
        server.server_close()


def test_unhealthy_when_health_fails_or_nothing_listens():
    server = serve(503)
    try:
        assert run(f"127.0.0.1:{server.server_address[1]}").returncode == 1
    finally:
        server.shutdown()
        server.server_close()
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        free = s.getsockname()[1]
    assert run(f"127.0.0.1:{free}").returncode == 1
