"""Per-star flags: bit masks in the core, lists of names at the edge.

Each core module declares its flags as an :class:`enum.IntFlag`; results carry one
unsigned-integer mask per star. :func:`flag_names` turns masks into lists of names for
responses. Flags report what was assumed or replaced, so that nothing is silent.
"""

from __future__ import annotations

import enum

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
    # Few distinct masks occur in practice: name each once, then copy per star.
    unique, inverse = np.unique(mask, return_inverse=True)
    members = [(m.name.lower(), int(m.value)) for m in flag_type]
    named = [[name for name, bit in members if int(u) & bit] for u in unique]
    return [list(named[k]) for k in inverse.tolist()]
