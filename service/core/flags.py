"""Per-star flags: bit masks in the core, lists of names at the edge.

Each core module declares its flags as an :class:`enum.IntFlag`; results carry one
unsigned-integer mask per star. :func:`flag_names` turns masks into lists of names for
responses. Flags report what was assumed or replaced, so that nothing is silent.
"""

from __future__ import annotations

import enum
import functools

import numpy as np

from .propagation import AT_POLE_RAD

#: What the implausible-input flags of the propagation and velocity results mean (the
#: answers' flag meanings and the batch jobs' metadata use these texts).
PROPER_MOTION_IMPLAUSIBLE_MEANING = (
    "Total proper motion above 10.4 arcsec/yr, more than any known star: probably a unit mistake."
)
PARALLAX_IMPLAUSIBLE_MEANING = (
    "Parallax above 1,000 mas (nearer than 1 pc), more than any known star's (the largest "
    "is about 768 mas): probably microarcseconds given as milliarcseconds."
)
RADIAL_VELOCITY_IMPLAUSIBLE_MEANING = (
    "Radial velocity above 5,000 km/s in size, more than any star's measured radial "
    "velocity: probably m/s given as km/s."
)

#: What the at_pole flag of the constellation answers means (ConstellationFlag.AT_POLE; the
#: lookup, margins and crossing answers and the constellations batch job use this text).
CONSTELLATION_AT_POLE_MEANING = (
    f"Given within {AT_POLE_RAD:g} rad of a pole of the frame of the positions and moved by "
    "its proper motion: the proper motion is taken along the east and north of the "
    "longitude given there (the limit along that meridian), which sets the direction in "
    "which the star moves, and with it the constellation it reaches and when it crosses a "
    "boundary (the same components given with right ascensions 90 deg apart move it in "
    "directions 90 deg apart)."
)


class FlagNameList(list):
    """The list :func:`flag_names` returns, which also knows which stars share a mask.

    Attributes
    ----------
    codes : ndarray of int or None
        Per star, the index of its tuple in ``distinct``; None once the list has been
        changed in place (a caller added a name to some stars), so that it is never stale.
    distinct : list of tuple of str
        The distinct tuples of names.

    Writers of columnar formats use ``codes`` to encode a million stars' flags without
    looking at a million list entries; JSON writers see a plain list.
    """

    __slots__ = ("codes", "distinct")

    def __init__(self, items, codes=None, distinct=()):
        super().__init__(items)
        self.codes = codes
        self.distinct = list(distinct)


def _invalidating(name):
    method = getattr(list, name)

    def changed(self, *args):
        self.codes = None
        return method(self, *args)

    changed.__name__ = name
    return changed


for _name in ("__setitem__", "__delitem__", "__iadd__", "__imul__", "append", "extend",
              "insert", "pop", "remove", "clear", "sort", "reverse"):  # fmt: skip
    setattr(FlagNameList, _name, _invalidating(_name))


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
    FlagNameList (a list) of tuple of str
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
        return FlagNameList([()] * mask.shape[0], np.zeros(mask.shape[0], np.intp), [()])
    unique, inverse = np.unique(mask, return_inverse=True)
    named = [tuple(name for name, bit in members if int(u) & bit) for u in unique]
    inverse = inverse.ravel()
    return FlagNameList([named[k] for k in inverse.tolist()], inverse, named)


def present_flag_names(mask, flag_type: type[enum.IntFlag]) -> set[str]:
    """The set of flag names set in any of the masks (for a response's list of meanings)."""
    union = int(np.bitwise_or.reduce(np.atleast_1d(np.asarray(mask, dtype=np.int64)), axis=None))
    return {name for name, bit in _members(flag_type) if union & bit}


@functools.lru_cache(maxsize=64)
def _members(flag_type: type[enum.IntFlag]) -> tuple:
    """(lower-case name, value) of each member, in declaration order."""
    return tuple((m.name.lower(), int(m.value)) for m in flag_type)
