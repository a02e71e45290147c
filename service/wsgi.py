"""WSGI entry point for gunicorn: ``gunicorn service.wsgi:app``."""

from .api import create_app
from .config import ConfigError

try:
    app = create_app()
except ConfigError as exc:
    # One line naming the setting, not a traceback (gunicorn prints it and exits 1).
    raise SystemExit(f"skydrift: bad setting: {exc}") from None
