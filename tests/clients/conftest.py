"""A real Skydrift service (gunicorn on loopback) for the client and command-line tests."""

import pytest

from tests.reliability.server import Server


def start_service(extra_env=None):
    """Start gunicorn with the deploy configuration (one worker); return (url, server)."""
    srv = Server(workers=1, **(extra_env or {})).start()
    return srv.url, srv


def stop_service(srv) -> None:
    srv.stop()


@pytest.fixture(scope="session")
def live_service():
    """URL of a Skydrift service started for this test session."""
    url, proc = start_service()
    yield url
    stop_service(proc)
