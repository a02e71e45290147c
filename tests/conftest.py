"""Shared test fixtures."""

import json
import pathlib

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
DEMO = ROOT / "shared" / "demo"


@pytest.fixture(scope="session")
def settings():
    from service.config import Settings

    return Settings(max_stars=1000, max_body_bytes=2_000_000, max_results=5000, max_epochs=100)


@pytest.fixture(scope="session")
def app(settings):
    from service.api import create_app

    return create_app({"SKYDRIFT_SETTINGS": settings, "TESTING": True})


@pytest.fixture()
def client(app):
    return app.test_client()


@pytest.fixture(scope="session")
def demo_catalogue():
    return json.loads((DEMO / "catalogue.json").read_text())
