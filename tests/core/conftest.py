"""Fixtures shared by the core's tests."""

import pytest

from service.core import observed


@pytest.fixture(scope="module")
def astropy_with_our_table():
    """astropy with the Earth-orientation table the core reads (never downloaded)."""
    from astropy.utils import iers

    iers.conf.auto_download = False
    table = iers.IERS_A.open(observed.earth_orientation().primary.path)
    with iers.earth_orientation_table.set(table):
        yield
