"""Floating-point policy shared by the core's entry points.

Inputs at the edges of what the API accepts (a parallax of 1e-300 mas, a distance of 1e-300
pc) make intermediate quotients overflow to infinity, products underflow to zero and then
divide by it, and infinity times zero gives NaN.
Both are meaningful in the core's conventions (infinite means "beyond any finite value",
NaN means unknown, and the affected stars are flagged), so the entry points let them happen
silently instead of emitting numpy RuntimeWarnings, which are noise in a server's log and
errors in the test suite.
"""

from __future__ import annotations

import functools

import numpy as np


def overflow_to_infinity(func):
    """Decorator: run ``func`` with overflow, division by zero and NaN results silent."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            return func(*args, **kwargs)

    return wrapper
