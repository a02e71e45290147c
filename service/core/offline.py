"""Keep astropy offline: packaged tables only, never a download.

Importing this module configures astropy once for the whole process: no automatic IERS or
leap-second downloads, and no complaints about the age of the packaged tables (their
provenance and whether values are measured or predicted are reported per answer instead).
"""

from __future__ import annotations

import functools

from astropy.utils import data as _astropy_data
from astropy.utils import iers as _iers

_iers.conf.auto_download = False
_iers.conf.auto_max_age = None
_iers.conf.iers_degraded_accuracy = "warn"
_astropy_data.conf.allow_internet = False


@functools.lru_cache(maxsize=1)
def leap_second_table():
    """The leap-second table from the packaged files, installed into ERFA once.

    Returns
    -------
    astropy.utils.iers.LeapSeconds
        The table (its ``expires`` attribute says until when it is known to be complete).
    """
    table = _iers.LeapSeconds.auto_open()
    import erfa

    erfa.leap_seconds.update(table)
    return table


@functools.lru_cache(maxsize=1)
def leap_second_expiry_mjd() -> float:
    """MJD (UTC) until which the installed leap-second table is known to be complete.

    Read once from :func:`leap_second_table` (the table's ``expires`` is an astropy Time,
    whose conversion to MJD costs tens of microseconds; epoch labelling asks per request).
    Infinity when the table states no expiry.
    """
    expires = leap_second_table().expires
    return float(expires.mjd) if hasattr(expires, "mjd") else float("inf")


@functools.lru_cache(maxsize=4)
def use_earth_orientation_file(path: str):
    """Make an operator's IERS finals2000A file astropy's Earth-orientation table.

    Called once at start when SKYDRIFT_EOP_FILE is set (a newer table than the packaged
    one). Everything that asks astropy for UT1-UTC or polar motion then uses it.

    Parameters
    ----------
    path : str
        An IERS Bulletin A file in the finals2000A layout (as published by the IERS Rapid
        Service/Prediction Centre).

    Returns
    -------
    astropy.utils.iers.IERS_A
        The table now in use.
    """
    table = _iers.IERS_A.open(path)
    _iers.earth_orientation_table.set(table)
    return table
