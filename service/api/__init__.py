"""The HTTP layer: converts JSON to numpy arrays and back, and does no astronomy."""

from .app import create_app

__all__ = ["create_app"]
