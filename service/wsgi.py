"""WSGI entry point for gunicorn: ``gunicorn service.wsgi:app``."""

from .api import create_app
from .config import ConfigError
from .core import constellations

try:
    app = create_app()
except ConfigError as exc:
    # One line naming the setting, not a traceback (gunicorn prints it and exits 1).
    raise SystemExit(f"skydrift: bad setting: {exc}") from None

# A served process also computes the default outlines' vertices at start, so that no
# request pays for them: in gunicorn's master (preload_app), whose workers and their
# replacements share them. The command line's local mode builds the application without
# this module and does not pay for them.
constellations.warm_up_outlines()
