"""WSGI entry point for gunicorn: ``gunicorn service.wsgi:app``."""

from .api import create_app

app = create_app()
