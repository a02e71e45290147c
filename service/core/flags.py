"""Per-star flags: bit masks in the core, lists of names at the edge.

Each core module declares its flags as an :class:`enum.IntFlag`; results carry one
unsigned-integer mask per star. :func:`flag_names` turns masks into lists of names for
responses. Flags report what was assumed or replaced, so that nothing is silent.
"""

from __future__ import annotations

import enum
import functools

import numpy as np


def flag_names(mask, flag_type: type[enum.IntFlag]) -> list[list[str]]:
    """Names of the set bits of each mask, in declaration order.

    Parameters
    ----------
    mask : array_like of int, shape (N,)
        One bit mask per star.
    flag_type : IntFlag subclass
        The enumeration the bits belong to; member names are lower-cased for output.

    Returns
    -------
    list of list of str
        One list of flag names per star (empty where no bit is set).
    """
    mask = np.atleast_1d(np.asarray(mask, dtype=np.int64))
    if not mask.any():
        return [[] for _ in range(mask.shape[0])]
    members = _members(flag_type)
    if mask.shape[0] == 1:
        u = int(mask[0])
        return [[name for name, bit in members if u & bit]]
    # Few distinct masks occur in practice: name each once, then copy per star.
    unique, inverse = np.unique(mask, return_inverse=True)
    named = [[name for name, bit in members if int(u) & bit] for u in unique]
    return [list(named[k]) for k in inverse.tolist()]


@functools.lru_cache(maxsize=64)
def _members(flag_type: type[enum.IntFlag]) -> tuple:
    """(lower-case name, value) of each member, in declaration order."""
    return tuple((m.name.lower(), int(m.value)) for m in flag_type)
