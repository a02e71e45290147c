"""Numbers written as text (service.numbers, the client's counts): what str.strip takes away
around a number is taken away before it is read."""

import argparse

import pytest

from service.client import _whole
from service.numbers import decimal, whole


@pytest.mark.parametrize("pad", [" ", "\t", "\x1f", "\x1c"])
def test_padding_around_a_number_is_stripped_before_reading(pad):
    # Python's str.strip takes the separators \x1c to \x1f away; float() and int() keep
    # them and raised ValueError on text the pattern had accepted.
    assert decimal(f"{pad}12.5{pad}") == 12.5
    assert whole(f"{pad}-3{pad}") == -3
    assert _whole(f"{pad}73{pad}") == 73


def test_other_text_is_still_refused():
    for bad in ("1_0", "\u0661\u0660", "nan", "0x10", ""):
        with pytest.raises(argparse.ArgumentTypeError):
            decimal(bad)
        with pytest.raises(argparse.ArgumentTypeError):
            whole(bad)
        with pytest.raises(ValueError, match="range count"):
            _whole(bad)
