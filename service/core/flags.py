"""Per-star flags: bit masks in the core, lists of names at the edge.

Each core module declares its flags as an :class:`enum.IntFlag`; results carry one
unsigned-integer mask per star. :func:`flag_names` turns masks into lists of names for
responses. Flags report what was assumed or replaced, so that nothing is silent.
"""

from __future__ import annotations

import enum
import functools

import numpy as np


def flag_names(mask, flag_type: type[enum.IntFlag]) -> list[tuple[str, ...]]:
    """Names of the set bits of each mask, in declaration order.

    Parameters
    ----------
    mask : array_like of int, shape (N,)
        One bit mask per star.
    flag_type : IntFlag subclass
        The enumeration the bits belong to; member names are lower-cased for output.

    Returns
    -------
    list of tuple of str
        One tuple of flag names per star (empty where no bit is set). Stars with the same
        mask share one tuple (Note 1).

    Notes
    -----
    1. A million stars carry only a handful of distinct masks; naming each distinct mask
       once and sharing the (immutable) tuple avoids creating a million objects, which
       costs seconds in Python's garbage collector.
    """
    mask = np.atleast_1d(np.asarray(mask, dtype=np.int64))
    members = _members(flag_type)
    if mask.shape[0] == 1:
        u = int(mask[0])
        return [tuple(name for name, bit in members if u & bit)]
    if not mask.any():
        return [()] * mask.shape[0]
    unique, inverse = np.unique(mask, return_inverse=True)
    named = [tuple(name for name, bit in members if int(u) & bit) for u in unique]
    return [named[k] for k in inverse.ravel().tolist()]


def present_flag_names(mask, flag_type: type[enum.IntFlag]) -> set[str]:
    """The set of flag names set in any of the masks (for a response's list of meanings)."""
    union = int(np.bitwise_or.reduce(np.atleast_1d(np.asarray(mask, dtype=np.int64)), axis=None))
    return {name for name, bit in _members(flag_type) if union & bit}


@functools.lru_cache(maxsize=64)
def _members(flag_type: type[enum.IntFlag]) -> tuple:
    """(lower-case name, value) of each member, in declaration order."""
    return tuple((m.name.lower(), int(m.value)) for m in flag_type)
