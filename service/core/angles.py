"""Arctangents and reductions modulo 2 pi for large arrays, at half the cost of numpy's own.

numpy computes ``arctan2`` and ``mod`` one value at a time on processors where it has no SIMD
loop for them (x86-64 without AVX-512: 21 ns and 11 ns per value, against 10 ns for the
one-argument ``arctan`` and under 1 ns for a product or a floor; numpy 2.4 on an AMD EPYC).
The forms here give the same values to within one unit in the last place of pi (the
arctangents) or exactly (the reduction), with the signed zeros and 0/0 of numpy's own
functions, and take numpy's own functions for arrays smaller than
:data:`ATAN2_BY_QUOTIENT_MIN`, where the extra numpy calls cost more than they save.

A value's last bits therefore depend on the size of the array it is computed in. The
observed place takes these forms (its results already depend on the block size in the last
bits); the propagation does not, because whole-catalogue runs in chunks must equal one call
on the whole catalogue bit for bit. Taking the forms for every size instead costs a
one-star propagation about 40 microseconds (a third more), measured.
"""

from __future__ import annotations

import math

import numpy as np

#: From this many values on, the arctangent of two arguments is that of their quotient plus
#: the quadrant; below it numpy's arctan2 is cheaper (the quadrant's five extra numpy calls
#: cost about 4 microseconds). Crossover measured near 1,500 values (numpy 2.4, AMD EPYC
#: without AVX-512).
ATAN2_BY_QUOTIENT_MIN = 2048

TWO_PI = 2.0 * math.pi


def atan2_into(y, x, out, tmp):
    """atan2(y, x), radians, into ``out``; ``tmp`` a work array of the same shape.

    ``y`` and ``x`` broadcast to ``out``'s shape and must not share memory with ``out`` or
    ``tmp``. For :data:`ATAN2_BY_QUOTIENT_MIN` values or more: arctan(y / x), plus pi with
    the sign of y where x is negative or -0.0. The result equals arctan2 to within one unit
    in the last place of pi (4.4e-16 rad, 1e-10 arcsec), signed zeros of y included; where x
    is zero (+0.0 or -0.0) it is arctan2's own value, so that 0/0 gives arctan2's 0 or pi
    and not NaN.
    """
    if out.size < ATAN2_BY_QUOTIENT_MIN:
        return np.arctan2(y, x, out=out)
    with np.errstate(divide="ignore", invalid="ignore"):
        np.divide(y, x, out=out)
    np.arctan(out, out=out)
    np.copysign(0.5, x, out=tmp)
    np.subtract(0.5, tmp, out=tmp)  # 1 where x < 0 or x is -0.0, else 0
    np.copysign(tmp, y, out=tmp)
    tmp *= np.pi
    out += tmp
    if not np.all(x):
        np.arctan2(y, x, out=out, where=np.equal(x, 0.0))
    return out


def latitude_into(z, h, out):
    """atan2(z, h) for h >= 0 (a latitude from its sine and cosine parts), into ``out``.

    The arctangent of the quotient for :data:`ATAN2_BY_QUOTIENT_MIN` values or more (h = 0
    gives +-inf and so +-pi/2, as arctan2; where h is zero arctan2's own value, so that 0/0
    gives 0 and not NaN); the same values as arctan2 to within one unit in the last place
    of pi/2 (2.2e-16 rad). ``z`` and ``h`` must not share memory with ``out``.
    """
    if out.size < ATAN2_BY_QUOTIENT_MIN:
        return np.arctan2(z, h, out=out)
    with np.errstate(divide="ignore", invalid="ignore"):
        np.divide(z, h, out=out)
    np.arctan(out, out=out)
    if not np.all(h):
        np.arctan2(z, h, out=out, where=np.equal(h, 0.0))
    return out


def wrap_two_pi(a, tmp):
    """``a`` modulo 2 pi, in place, as ``np.mod(a, 2 pi)``: into [0, 2 pi], -0.0 to +0.0.

    For :data:`ATAN2_BY_QUOTIENT_MIN` values or more as a - 2 pi floor(a / 2 pi): the same
    values as np.mod for angles between -2 pi and 4 pi (tested), except for negative
    subnormals (above -3e-323), which give 0 where np.mod gives 2 pi (the same direction).
    ``tmp``: a work array of the same shape.
    """
    if a.size < ATAN2_BY_QUOTIENT_MIN:
        return np.mod(a, TWO_PI, out=a)
    np.divide(a, TWO_PI, out=tmp)
    np.floor(tmp, out=tmp)
    tmp *= TWO_PI
    a -= tmp  # -0.0 - (-0.0) = +0.0, as np.mod
    # The negative subnormals whose quotient underflows to -0.0 (floor 0) stay negative: 0.
    return np.fmax(a, 0.0, out=a)
