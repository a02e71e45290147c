"""The core's arctangents and reductions modulo 2 pi (service.core.angles) against numpy's."""

import numpy as np
import pytest

from service.core import angles as A


@pytest.mark.parametrize("n", [A.ATAN2_BY_QUOTIENT_MIN, 5000])
def test_atan2_by_quotient_equals_numpy_arctan2(n):
    # The arctangent of two arguments (numpy's arctan of the quotient plus the quadrant,
    # used from ATAN2_BY_QUOTIENT_MIN values on; below, numpy's own) against numpy's arctan2
    # itself: to 4.5e-16 rad (one unit in the last place of pi, 4.44e-16), in every
    # quadrant, with the signed zeros of both arguments (arctan2(+-0, -0) = +-pi,
    # arctan2(+-0, +0) = +-0), both arguments zero, x zero (y/x infinite), and quotients
    # near the overflow and underflow limits.
    rng = np.random.default_rng(n)
    y = rng.normal(size=n) * 10.0 ** rng.integers(-300, 300, n)
    x = rng.normal(size=n) * 10.0 ** rng.integers(-300, 300, n)
    specials = [0.0, -0.0, 1.0, -1.0, 1e-320, -1e-320, 1e300, -1e300]
    pairs = np.array([(a, b) for a in specials for b in specials])
    y[: len(pairs)], x[: len(pairs)] = pairs[:, 0], pairs[:, 1]
    out, tmp = np.empty(n), np.empty(n)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        A.atan2_into(y, x, out, tmp)
    ref = np.arctan2(y, x)
    assert np.max(np.abs(out - ref)) <= 4.5e-16
    zero = ref == 0.0
    np.testing.assert_array_equal(np.signbit(out[zero]), np.signbit(ref[zero]))


@pytest.mark.parametrize("n", [A.ATAN2_BY_QUOTIENT_MIN, 5000])
def test_wrap_two_pi_equals_numpy_mod(n):
    # The reduction of longitudes (radians, between -2 pi and 4 pi: arctan2's
    # range less the equation of the origins) against numpy's mod itself, value for value:
    # -0.0 becomes +0.0, -tiny becomes 2 pi (its nearest double), 2 pi becomes 0; the
    # negative subnormals whose quotient by 2 pi underflows give 0 (np.mod: 2 pi, the same
    # direction). Sizes from ATAN2_BY_QUOTIENT_MIN on: below it the functions are numpy's.
    rng = np.random.default_rng(n)
    a = rng.uniform(-2.0 * np.pi, 4.0 * np.pi, n)
    edges = [0.0, -0.0, -1e-20, 1e-300, -np.pi, np.pi, 2.0 * np.pi, -2.0 * np.pi,
             np.nextafter(2.0 * np.pi, 0.0), np.nextafter(0.0, -1.0)]  # fmt: skip
    a[: len(edges)] = edges
    ref = np.mod(a, 2.0 * np.pi)
    ours = A.wrap_two_pi(a.copy(), np.empty(n))
    ref[len(edges) - 1] = 0.0  # -5e-324
    np.testing.assert_array_equal(ours, ref)
    np.testing.assert_array_equal(np.signbit(ours), np.signbit(ref))


@pytest.mark.parametrize("n", [A.ATAN2_BY_QUOTIENT_MIN, 5000])
def test_latitude_equals_numpy_arctan2(n):
    # atan2(z, h) for h >= 0 as the arctangent of the quotient against numpy's arctan2: to
    # 2.3e-16 rad (one unit in the last place of pi/2, 2.22e-16), with h = +0.0 (+-pi/2,
    # and 0 for 0/0 as arctan2), signed zeros of z, and quotients near the overflow and
    # underflow limits.
    rng = np.random.default_rng(n)
    z = rng.normal(size=n) * 10.0 ** rng.integers(-300, 300, n)
    h = np.abs(rng.normal(size=n)) * 10.0 ** rng.integers(-300, 300, n)
    specials = [0.0, -0.0, 1.0, -1.0, 1e-320, -1e-320, 1e300]
    pairs = np.array([(a, abs(b)) for a in specials for b in specials])
    z[: len(pairs)], h[: len(pairs)] = pairs[:, 0], pairs[:, 1]
    out = np.empty(n)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        A.latitude_into(z, h, out)
        ref = np.arctan2(z, h)
        assert np.max(np.abs(out - ref)) <= 2.3e-16
        zero = ref == 0.0
        np.testing.assert_array_equal(np.signbit(out[zero]), np.signbit(ref[zero]))
