"""Skydrift: stellar epoch transformation as an HTTP service.

``service.core`` holds the pure, vectorised computation; ``service.api`` is the thin
HTTP layer over it.
"""

__version__ = "0.1.0"
