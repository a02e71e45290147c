"""Numbers written as text (command-line and query options): ASCII decimals only.

Python's ``float()`` and ``int()`` (and so argparse's ``type=float``) also read "1_0" as 10
and other scripts' digits ("١٠") as numbers. The service refuses both wherever a number
comes as text: query options (api.csvio, api.common.QueryFloat) and command-line options
(:func:`decimal`, :func:`whole`).
"""

from __future__ import annotations

import argparse
import re

#: A decimal number: optional sign, digits with an optional fraction, optional exponent.
DECIMAL_TEXT = re.compile(r"[+-]?([0-9]+(\.[0-9]*)?|\.[0-9]+)([eE][+-]?[0-9]+)?\Z")
#: A whole number: optional sign and ASCII digits.
WHOLE_TEXT = re.compile(r"[+-]?[0-9]+\Z")


def decimal(text: str) -> float:
    """argparse type: a decimal number written with ASCII digits ("12.5", "-2e3")."""
    if not DECIMAL_TEXT.match(text.strip()):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a number written with ASCII digits (such as 12.5 or 2e-3)"
        )
    return float(text)


def whole(text: str) -> int:
    """argparse type: a whole number written with ASCII digits ("12", "-3")."""
    if not WHOLE_TEXT.match(text.strip()):
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number in ASCII digits")
    return int(text)
