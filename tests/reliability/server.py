"""Start and stop the service under gunicorn with the deploy configuration, on loopback."""

from __future__ import annotations

import os
import pathlib
import signal
import socket
import subprocess
import sys
import time

import requests

ROOT = pathlib.Path(__file__).resolve().parents[2]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """gunicorn -c deploy/gunicorn.conf.py service.wsgi:app on a free loopback port."""

    def __init__(self, workers: int = 2, app: str = "service.wsgi:app", **env):
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.env = dict(
            os.environ,
            SKYDRIFT_BIND=f"127.0.0.1:{self.port}",
            SKYDRIFT_WORKERS=str(workers),
            SKYDRIFT_ACCESS_LOG="/dev/null",
            **{k: str(v) for k, v in env.items()},
        )
        self.app = app
        self.proc = None

    def start(self, wait_ready: bool = True, timeout_s: float = 60.0) -> Server:
        import tempfile

        self.log = tempfile.TemporaryFile()
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "gunicorn", "-c", "deploy/gunicorn.conf.py", self.app],
            cwd=ROOT,
            env=self.env,
            stdout=self.log,
            stderr=subprocess.STDOUT,
        )
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("gunicorn exited at start:\n" + self.output())
            try:
                r = requests.get(self.url + "/health", timeout=1)
                if r.status_code == 200 and (not wait_ready or len(self.worker_pids()) > 0):
                    return self
            except requests.ConnectionError:
                pass
            time.sleep(0.1)
        self.stop()
        raise RuntimeError("gunicorn did not answer in time:\n" + self.output())

    def output(self) -> str:
        if self.log.closed:
            return self._final_output
        self.log.seek(0)
        return self.log.read().decode(errors="replace")

    def worker_pids(self) -> list[int]:
        """PIDs of the live worker processes (children of the master)."""
        out = []
        for child in pathlib.Path("/proc").iterdir():
            if not child.name.isdigit():
                continue
            try:
                status = (child / "status").read_text()
            except OSError:
                continue
            if f"PPid:\t{self.proc.pid}\n" in status and "State:\tZ" not in status:
                out.append(int(child.name))
        return sorted(out)

    def stop(self, timeout_s: float = 60.0) -> int | None:
        if self.proc is None:
            return None
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        if not self.log.closed:
            self._final_output = self.output()
            self.log.close()
        return self.proc.returncode

    def __enter__(self) -> Server:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()
