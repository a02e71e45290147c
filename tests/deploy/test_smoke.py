"""deploy/smoke.sh: the service started as the container starts it, every endpoint once,
SIGTERM during a slow batch (the batch completes), exit status 0."""

import pathlib
import subprocess
import sys

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]
pytestmark = pytest.mark.server


def test_smoke_script_passes():
    r = subprocess.run(
        ["bash", str(ROOT / "deploy" / "smoke.sh")],
        cwd=ROOT,
        env={"PATH": "/usr/bin:/bin", "PYTHON": sys.executable},
        capture_output=True,
        text=True,
        timeout=240,
    )
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-3000:]
    assert "smoke test passed" in r.stdout
    assert "batch completed" in r.stdout


def test_smoke_script_fails_when_the_service_cannot_start():
    # A bad setting stops gunicorn at start: the script must say so with a non-zero status.
    r = subprocess.run(
        ["bash", str(ROOT / "deploy" / "smoke.sh")],
        cwd=ROOT,
        env={
            "PATH": "/usr/bin:/bin",
            "PYTHON": sys.executable,
            "SMOKE_READY_S": "20",
            "SKYDRIFT_MAX_STARS": "-5",
        },
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert r.returncode != 0
