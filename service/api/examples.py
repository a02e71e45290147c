"""Request examples for the OpenAPI document, taken from the invented demo scenario.

The demo scenario lives in the project's ``shared/demo/`` folder (fictional observatory,
fictional catalogue). An example that cannot be found (the service installed without the
project folder) is simply omitted from the document.
"""

from __future__ import annotations

import json
import pathlib

DEMO_DIR = pathlib.Path(__file__).resolve().parents[2] / "shared" / "demo"


def load_example(name: str):
    """The JSON example ``shared/demo/examples/<name>``, or None if absent."""
    path = DEMO_DIR / "examples" / name
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None
