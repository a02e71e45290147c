"""Numbers written as text (command-line and query options, settings): ASCII decimals only.

Python's ``float()`` and ``int()`` (and so argparse's ``type=float``) also read "1_0" as 10
and other scripts' digits ("١٠") as numbers. The service refuses both wherever a number
comes as text: query options (api.csvio, api.common.QueryFloat), command-line options
(:func:`decimal`, :func:`whole`) and the settings read from the environment
(:func:`setting_number`).
"""

from __future__ import annotations

import argparse
import re

#: A decimal number: optional sign, digits with an optional fraction, optional exponent.
DECIMAL_TEXT = re.compile(r"[+-]?([0-9]+(\.[0-9]*)?|\.[0-9]+)([eE][+-]?[0-9]+)?\Z")
#: A whole number: optional sign and ASCII digits.
WHOLE_TEXT = re.compile(r"[+-]?[0-9]+\Z")
#: The same two without a sign, for settings that cannot be negative.
UNSIGNED_DECIMAL_TEXT = re.compile(r"([0-9]+(\.[0-9]*)?|\.[0-9]+)([eE][+-]?[0-9]+)?\Z")
UNSIGNED_WHOLE_TEXT = re.compile(r"[0-9]+\Z")


def setting_number(text: str, *, whole: bool, signed: bool) -> int | float | None:
    """A number setting as written in the environment, or None if it is not written as an
    ASCII decimal (a whole number if ``whole``; a sign only if ``signed``): "1_000", "١٠",
    "nan", "inf" and "0x10" are typing mistakes to be refused, not numbers."""
    text = text.strip()
    if whole:
        pattern = WHOLE_TEXT if signed else UNSIGNED_WHOLE_TEXT
    else:
        pattern = DECIMAL_TEXT if signed else UNSIGNED_DECIMAL_TEXT
    if not pattern.match(text):
        return None
    return int(text) if whole else float(text)


def decimal(text: str) -> float:
    """argparse type: a decimal number written with ASCII digits ("12.5", "-2e3")."""
    if not DECIMAL_TEXT.match(text.strip()):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a number written with ASCII digits (such as 12.5 or 2e-3)"
        )
    return float(text.strip())  # float() keeps what strip() takes away (\x1c to \x1f)


def whole(text: str) -> int:
    """argparse type: a whole number written with ASCII digits ("12", "-3")."""
    if not WHOLE_TEXT.match(text.strip()):
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number in ASCII digits")
    return int(text.strip())
