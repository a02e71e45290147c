"""Epochs: parse the ways users write a moment in time, and convert between them.

Accepted forms (case-insensitive, surrounding blanks ignored):

========================  ==================================================================
``"J2016.0"``, ``2016.0``  Julian epoch, TDB (a bare number is a Julian epoch)
``"B1950.0"``              Besselian epoch (Lieske 1979), TDB
``"JD2451545.0"``          Julian date, TDB unless a scale follows: ``"JD2460000.5 UTC"``
``"MJD51544.5"``           modified Julian date, TDB unless a scale follows (TDB, TT, TAI, UTC)
``"2026-12-02T03:04:05Z"`` ISO 8601 calendar date and time, UTC (a zone offset is applied;
                           no offset means UTC; a date alone means 0h UTC)
``"now"``                  the current time of the system clock, UTC
========================  ==================================================================

Every parsed epoch is returned as a Julian epoch on the TDB scale, the convention of
astrometric catalogues (Julian epochs count Julian years of 365.25 days of TDB/TT from
J2000.0 = JD 2451545.0 TT; the TT-TDB difference, below 2 ms, is applied where a scale
conversion makes it meaningful).

References
----------
IAU 1976 System of Astronomical Constants; Lieske, J.H. 1979, A&A 73, 282 (Besselian epoch);
IAU SOFA/ERFA routines epj, epj2jd, epb, epb2jd, dtf2d, d2dtf, utctai, taiutc, taitt, tttai,
dtdb (Explanatory Supplement to the Astronomical Almanac, 3rd ed., 2013, ch. 3).
"""

from __future__ import annotations

import datetime as _dt
import decimal
import enum
import re
from dataclasses import dataclass

import erfa
import numpy as np
from erfa import ufunc as erfa_ufunc

from .constants import DAY_S, JD_J2000, JULIAN_YEAR_DAYS, MJD_ZERO_JD
from .offline import leap_second_expiry_mjd, leap_second_table

#: Range of Julian epochs the service accepts anywhere, years. Generous enough for
#: boundary-crossing searches of +-100,000 years around any catalogue epoch; beyond it the
#: linear space-motion model is meaningless.
EPOCH_MIN_JYEAR = -200_000.0
EPOCH_MAX_JYEAR = 202_000.0

#: Calendar years for which an ISO 8601 UTC rendering is given. Outside this range (and
#: before 1960, where UTC is not defined with today's meaning) times are still exact on
#: TDB, but the UTC rendering is flagged as approximate or omitted.
ISO_MIN_YEAR = 1
ISO_MAX_YEAR = 9999


class EpochError(ValueError):
    """An epoch that cannot be understood; the message says why and how to write it."""


class TimeNote(enum.IntFlag):
    """What the UTC rendering of an epoch could not know exactly."""

    #: UTC before 1960 or beyond the leap-second table: leap seconds unknown (erfa
    #: "dubious year"); the UTC figure is approximate at the level of seconds to minutes.
    UTC_APPROXIMATE = 1
    #: Outside calendar years 1..9999: no ISO rendering.
    NO_CALENDAR_DATE = 2


_SCALES = ("TDB", "TT", "TAI", "UTC")

_PREFIXED = re.compile(
    r"^(?P<kind>J|B|JD|MJD)\s*(?P<num>[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?)"
    r"(\s+(?P<scale>[A-Za-z]+))?$",
    re.IGNORECASE,
)
#: A plain decimal number, ASCII digits only (Python's float() would also take "2016_0",
#: "nan", "infinity" and other scripts' digits).
PLAIN_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$", re.ASCII)
_ISO = re.compile(
    r"^(?P<y>[+-]?\d{4,6})-(?P<mo>\d{2})-(?P<d>\d{2})"
    r"(?:[T ](?P<h>\d{2}):(?P<mi>\d{2})(?::(?P<s>\d{2}(?:\.\d+)?))?)?"
    r"(?P<tz>Z|[+-]\d{2}:?\d{2})?$",
    re.IGNORECASE,
)


def julian_epoch_to_jd(jyear):
    """Julian epoch to a two-part Julian date on the same time scale.

    Parameters
    ----------
    jyear : array_like
        Julian epoch, years (e.g. 2016.0).

    Returns
    -------
    jd1, jd2 : ndarray
        Two-part Julian date (jd1 = 2400000.5 exactly; the split keeps precision), days.

    Notes
    -----
    1. JD = 2451545.0 + (jyear - 2000) x 365.25 (IAU 1976; SOFA/ERFA epj2jd).
    """
    jyear = np.asarray(jyear, dtype=float)
    jd1 = np.full_like(jyear, MJD_ZERO_JD)
    jd2 = (JD_J2000 - MJD_ZERO_JD) + (jyear - 2000.0) * JULIAN_YEAR_DAYS
    return jd1, jd2


def jd_to_julian_epoch(jd1, jd2):
    """Two-part Julian date to Julian epoch on the same time scale (SOFA/ERFA epj).

    Parameters
    ----------
    jd1, jd2 : array_like
        Two-part Julian date, days.

    Returns
    -------
    ndarray
        Julian epoch, years.
    """
    jd1 = np.asarray(jd1, dtype=float)
    jd2 = np.asarray(jd2, dtype=float)
    return 2000.0 + ((jd1 - JD_J2000) + jd2) / JULIAN_YEAR_DAYS


def besselian_epoch_to_julian_epoch(byear):
    """Besselian epoch to Julian epoch (both on one time scale; ERFA epb2jd then epj).

    Parameters
    ----------
    byear : array_like
        Besselian epoch, years (e.g. 1950.0).

    Returns
    -------
    ndarray
        Julian epoch, years.

    Notes
    -----
    1. JD = 2415020.31352 + (byear - 1900) x 365.242198781 (Lieske 1979).
    """
    d1, d2 = erfa.epb2jd(np.asarray(byear, dtype=float))
    return jd_to_julian_epoch(d1, d2)


def julian_epoch_to_besselian_epoch(jyear):
    """Julian epoch to Besselian epoch (ERFA epj2jd then epb)."""
    d1, d2 = julian_epoch_to_jd(jyear)
    return erfa.epb(d1, d2)


def _to_tdb_jd(jd1, jd2, scale: str):
    """Two-part JD on ``scale`` to two-part JD on TDB (scalars or arrays).

    Returns ``(jd1, jd2, notes)``: :class:`TimeNote` bits, UTC_APPROXIMATE where a UTC date is
    approximate (ERFA utctai's dubious year, before 1960, beyond the leap-second table).
    Raises :class:`EpochError` where UTC is undefined (ERFA utctai
    status -1: a date that no calendar routine of ERFA accepts).

    The ERFA ufuncs are called directly (status per element instead of Python warnings):
    this runs for every epoch string a request carries.
    """
    leap_second_table()
    scale = scale.upper()
    notes = 0
    if scale == "UTC":
        u1, u2 = jd1, jd2
        jd1, jd2, status = erfa_ufunc.utctai(jd1, jd2)
        if np.any(status < 0):
            raise EpochError(
                "UTC is not defined for that date (ERFA utctai: unacceptable date); give "
                "dates that far from the present on the TT or TDB scale"
            )
        if np.any(_utc_approximate(u1, u2, status)):
            notes |= TimeNote.UTC_APPROXIMATE
        scale = "TAI"
    if scale == "TAI":
        jd1, jd2, _ = erfa_ufunc.taitt(jd1, jd2)  # always status 0
        scale = "TT"
    if scale == "TT":
        # TDB - TT at the geocentre (Fairhead & Bretagnon 1990 series in ERFA dtdb);
        # below 2 ms, UT1 approximated by TT for the argument (effect ~1e-12 s).
        dt = erfa_ufunc.dtdb(jd1, jd2, np.asarray(jd2) % 1.0, 0.0, 0.0, 0.0)
        jd2 = jd2 + dt / DAY_S
    return jd1, jd2, notes


def tdb_jd_to_utc_jd(jd1, jd2):
    """Two-part JD on TDB to two-part JD on UTC, with ERFA's per-element dubious status.

    The status is ERFA dat's: before 1960 (no UTC as defined today) or more than five
    years after the release of the ERFA leap-second table ("dubious year").
    """
    leap_second_table()
    dt = erfa_ufunc.dtdb(jd1, jd2, np.asarray(jd2) % 1.0, 0.0, 0.0, 0.0)
    t1, t2 = jd1, jd2 - dt / DAY_S
    a1, a2, _ = erfa_ufunc.tttai(t1, t2)  # always status 0
    # The ufunc form returns the status per element instead of one warning for all.
    u1, u2, status = erfa_ufunc.taiutc(a1, a2)
    return u1, u2, _utc_approximate(u1, u2, status)


#: 1960 January 1, 0h UTC as an MJD: the first entry of ERFA's TAI-UTC table (ERFA dat);
#: UTC as defined today does not reach before it.
UTC_START_MJD = 36934.0


def _utc_approximate(u1, u2, status):
    """Where a UTC date is approximate: ERFA's dubious-year status (1), a date before 1960
    (ERFA reports status 0 for 31 December 1959, a day it stretches by the 0.94 s step of
    TAI-UTC to its first table entry), or a date beyond the expiry of the packaged
    leap-second table, which may miss a leap second added since."""
    mjd = (u1 - MJD_ZERO_JD) + u2
    outside = (mjd < UTC_START_MJD) | (mjd > leap_second_expiry_mjd())
    return (np.asarray(status) == 1) | outside


@dataclass(frozen=True)
class _Reading:
    """One epoch as read: its Julian epoch (TDB), notes, and, where the text gives a date on
    a time scale, that date as a two-part JD in full (a float Julian epoch near the present
    resolves only 2**-42 years, 7.2 microseconds)."""

    jyear: float
    notes: int
    scale: str | None = None
    jd1: float = 0.0
    jd2: float = 0.0


def _split_decimal(text: str) -> tuple[float, float]:
    """A decimal number as (whole part, fraction), each a float, without losing the digits
    a single float of the sum would drop (a JD near 2.46e6 resolves only 40 us)."""
    d = decimal.Decimal(text)
    whole = d.to_integral_value(rounding=decimal.ROUND_FLOOR)
    return float(whole), float(d - whole)


#: The tropical year of ERFA epb2jd (Lieske 1979), days.
_BESSELIAN_YEAR_DAYS = 365.242198781


def _check_rough(rough: float) -> None:
    """EpochError where a Julian epoch, roughly (to a year), is outside the supported range:
    refused before any exact conversion, which may overflow far outside it."""
    if not (EPOCH_MIN_JYEAR - 1.0 <= rough <= EPOCH_MAX_JYEAR + 1.0):
        raise EpochError(
            f"epoch {rough:g} is outside the supported range {EPOCH_MIN_JYEAR:g} to "
            f"{EPOCH_MAX_JYEAR:g} (Julian years)"
        )


def _read(value, now: _dt.datetime | None) -> _Reading:
    """Parse one epoch (see :func:`parse_epoch`) into a :class:`_Reading`."""
    if isinstance(value, bool):
        raise EpochError("an epoch must be a number or a string, not a boolean")
    if isinstance(value, int | float | np.floating | np.integer):
        jyear = float(value)
        if not np.isfinite(jyear):
            raise EpochError("an epoch must be finite")
        return _Reading(jyear, 0)
    if not isinstance(value, str):
        raise EpochError("an epoch must be a number (Julian epoch) or a string")
    text = value.strip()
    if not text:
        raise EpochError("empty epoch")
    if len(text) > 64:
        raise EpochError("epoch string too long (at most 64 characters)")
    if not text.isascii():
        raise EpochError("an epoch is written in ASCII characters only")
    if text.lower() == "now":
        moment = now or _dt.datetime.now(_dt.UTC)
        return _read_calendar_utc(
            moment.year,
            moment.month,
            moment.day,
            moment.hour,
            moment.minute,
            moment.second + moment.microsecond * 1e-6,
        )
    if PLAIN_NUMBER.match(text):
        return _Reading(float(text), 0)
    m = _PREFIXED.match(text)
    if m:
        kind = m.group("kind").upper()
        num = float(m.group("num"))
        if not np.isfinite(num):
            raise EpochError("an epoch must be finite")
        scale = (m.group("scale") or "TDB").upper()
        if scale not in _SCALES:
            raise EpochError(f"unknown time scale {m.group('scale')!r}: use one of {_SCALES}")
        if kind in ("J", "B") and m.group("scale"):
            raise EpochError("Julian and Besselian epochs take no time scale (they are TDB)")
        if kind == "J":
            return _Reading(num, 0)
        if kind == "B":
            # Refused before ERFA epb2jd, which overflows (with a warning) near 1e305 years.
            _check_rough(2000.0 + (num - 2000.0) * (_BESSELIAN_YEAR_DAYS / JULIAN_YEAR_DAYS))
            return _Reading(float(besselian_epoch_to_julian_epoch(num)), 0)
        jd1, jd2 = (MJD_ZERO_JD, num) if kind == "MJD" else (num, 0.0)
        _check_rough(2000.0 + ((jd1 - JD_J2000) + jd2) / JULIAN_YEAR_DAYS)
        whole, part = _split_decimal(m.group("num"))
        jd1, jd2 = (MJD_ZERO_JD + whole, part) if kind == "MJD" else (whole, part)
        if scale == "TDB":
            return _Reading(float(jd_to_julian_epoch(jd1, jd2)), 0, scale, jd1, jd2)
        t1, t2, notes = _to_tdb_jd(np.float64(jd1), np.float64(jd2), scale)
        return _Reading(float(jd_to_julian_epoch(t1, t2)), int(notes), scale, jd1, jd2)
    m = _ISO.match(text)
    if m:
        y, mo, d = int(m.group("y")), int(m.group("mo")), int(m.group("d"))
        h = int(m.group("h") or 0)
        mi = int(m.group("mi") or 0)
        s = float(m.group("s") or 0.0)
        whole_s = int((m.group("s") or "0")[:2])
        if s >= whole_s + 1:
            # Many fraction digits (RFC 3339 5.6: any number) round up to the next whole
            # second as one double ("59.99999999999999999" -> 60.0): keep the second written.
            s = float(np.nextafter(whole_s + 1.0, 0.0))
        tz = m.group("tz")
        offset_min = 0
        if tz and tz.upper() != "Z":
            sign = -1 if tz[0] == "-" else 1
            digits = tz[1:].replace(":", "")
            oh, om = int(digits[:2]), int(digits[2:])
            if oh > 23 or om > 59:  # ISO 8601 / RFC 3339: offsets -23:59 to +23:59
                raise EpochError(f"invalid UTC offset {tz!r}: at most 23 hours 59 minutes")
            offset_min = sign * (oh * 60 + om)
        if s >= 60.0 and not (s < 61.0 and h == 23 and mi == 59 and offset_min == 0):
            raise EpochError(
                f"invalid time: second {s:g}; seconds run 0 to 59.999..., and 60 only in "
                "23:59:60 UTC at the end of a day with a leap second"
            )
        return _read_calendar_utc(y, mo, d, h, mi, s, offset_min)
    if _ISO.match(_PLUS_AS_SPACE.sub(r"+\1", text)):
        raise EpochError(
            f"cannot read epoch {value!r}: a space stands where the '+' of a UTC offset "
            "belongs; in a URL query string '+' reads as a space, write it as %2B"
        )
    raise EpochError(f"cannot read epoch {value!r}: {EPOCH_FORMS}")


#: The forms of epoch taken, told with an epoch that cannot be read (an answer listing many
#: such epochs tells them once: service.api.errors).
EPOCH_FORMS = (
    "write a Julian epoch (2016.0 or 'J2016.0'), 'B1950.0', 'JD2451545.0', 'MJD51544.5', "
    "an ISO 8601 UTC time ('2026-12-02T03:04:05Z') or 'now'"
)


#: A UTC offset whose '+' became a space (a URL query string decodes '+' as a space).
_PLUS_AS_SPACE = re.compile(r" (\d{2}:?\d{2})$")


#: ERFA dtf2d status codes below zero: what was wrong with the calendar date or time.
_DTF2D_ERRORS = {
    -1: "bad year",
    -2: "bad month",
    -3: "bad day of the month",
    -4: "bad hour",
    -5: "bad minute",
    -6: "bad second",
}


def _read_calendar_utc(y, mo, d, h, mi, s, offset_min: int = 0) -> _Reading:
    leap_second_table()
    notes = 0
    u1, u2, status = erfa_ufunc.dtf2d("UTC", y, mo, d, h, mi, s)
    status = int(status)
    if status < 0:
        raise EpochError(f"invalid calendar date or time: {_DTF2D_ERRORS[status]}")
    if status >= 2:  # ERFA dtf2d: "time is after end of day"
        raise EpochError(
            f"invalid time: second {s:g} lies after the end of that UTC day (second 60 "
            "exists only at the end of a day with a leap second)"
        )
    if offset_min:
        # Local time less the offset, as a UTC date and time of day. Not the local date's
        # quasi-JD less offset/1440: a UTC day with a leap second has 86,401 SI seconds in
        # its quasi-JD day (ERFA dtf2d, utctai), so that would miss by up to a second where
        # the local or the UTC date is such a day. Seconds are below 60 here (60 is taken
        # with a zero offset only).
        days, minute = divmod(h * 60 + mi - offset_min, 1440)
        d0, d1, _ = erfa_ufunc.cal2jd(y, mo, d)
        y, mo, d, _, _ = erfa_ufunc.jd2cal(d0, d1 + days)
        u1, u2, status = erfa_ufunc.dtf2d("UTC", y, mo, d, minute // 60, minute % 60, s)
        status = int(status)
        if status < 0:
            raise EpochError(f"invalid calendar date or time: {_DTF2D_ERRORS[status]}")
    if status == 1:  # dubious year: before 1960, or far beyond the leap-second table
        notes |= TimeNote.UTC_APPROXIMATE
    t1, t2, more = _to_tdb_jd(u1, u2, "UTC")
    return _Reading(
        float(jd_to_julian_epoch(t1, t2)), int(notes | more), "UTC", float(u1), float(u2)
    )


def parse_epoch(value, *, now: _dt.datetime | None = None) -> float:
    """Parse one epoch in any accepted form to a Julian epoch (TDB).

    Parameters
    ----------
    value : str or float
        The epoch as the user wrote it (see the module documentation).
    now : datetime, optional
        The moment meant by "now" (default: the system clock, UTC). Tests pass a fixed time.

    Returns
    -------
    float
        Julian epoch, TDB, years.

    Raises
    ------
    EpochError
        If the value cannot be read or lies outside the supported range
        (EPOCH_MIN_JYEAR..EPOCH_MAX_JYEAR).
    """
    jyear, _ = parse_epoch_with_notes(value, now=now)
    return jyear


def parse_epoch_with_notes(value, *, now: _dt.datetime | None = None) -> tuple[float, int]:
    """As :func:`parse_epoch`, also returning :class:`TimeNote` bits about the input."""
    r = _read(value, now)
    _check_range(r.jyear)
    return r.jyear, r.notes


def _check_range(jyear: float) -> None:
    if not (EPOCH_MIN_JYEAR <= jyear <= EPOCH_MAX_JYEAR):
        raise EpochError(
            f"epoch {jyear:g} is outside the supported range "
            f"{EPOCH_MIN_JYEAR:g} to {EPOCH_MAX_JYEAR:g} (Julian years)"
        )


@dataclass(frozen=True)
class Instant:
    """An epoch read as an instant of observation, with its UTC date in full.

    Attributes
    ----------
    julian_epoch_tdb : float
        Julian epoch, TDB, years (as :func:`parse_epoch` gives it).
    utc_jd1, utc_jd2 : float
        The same instant as a two-part UTC quasi Julian date (SOFA convention), days: as
        written where the epoch is on the UTC scale (ISO 8601, "now", a JD or MJD followed
        by UTC); converted from the two-part date where a JD or MJD is on another scale;
        from the Julian epoch where only that was given.
    notes : int
        :class:`TimeNote` bits about the input.

    Notes
    -----
    1. The Earth turns 15 arcseconds a second, so an instant must keep its digits: a float
       Julian epoch near the present resolves 2**-42 years (7.2 microseconds), which is up to
       0.05 mas of Earth rotation once rounded; the two-part UTC date keeps nanoseconds.
    """

    julian_epoch_tdb: float
    utc_jd1: float
    utc_jd2: float
    notes: int


def parse_instant(value, *, now: _dt.datetime | None = None) -> Instant:
    """Parse one epoch as an instant of observation (:class:`Instant`).

    Accepts every form of :func:`parse_epoch` and raises :class:`EpochError` as it does.
    """
    r = _read(value, now)
    _check_range(r.jyear)
    if r.scale == "UTC":
        return Instant(r.jyear, r.jd1, r.jd2, r.notes)
    if r.scale is None:
        t1, t2 = erfa_ufunc.epj2jd(r.jyear)
    elif r.scale == "TDB":
        t1, t2 = r.jd1, r.jd2
    else:
        t1, t2, _ = _to_tdb_jd(np.float64(r.jd1), np.float64(r.jd2), r.scale)
    u1, u2, _ = tdb_jd_to_utc_jd(t1, t2)
    return Instant(r.jyear, float(u1), float(u2), r.notes)


#: What is wrong with a range's count of 1 where its start and stop differ (numpy's linspace
#: would answer the start alone, dropping the stop without a word).
COUNT_OF_ONE_TEXT = (
    "must be at least 2 to include both start and stop (count 1 only where start equals stop)"
)


def instant_range(start: Instant, stop: Instant, count: int) -> list[Instant]:
    """``count`` instants from ``start`` to ``stop`` inclusive, in equal steps of elapsed
    time (a track for the night, say).

    The steps are equal on the TAI scale, in SI seconds, as a clock at the telescope counts
    them: a leap second inside the range takes its second like any other (its instants are
    written 23:59:60.x in UTC), so the UTC times of day may not step evenly across it. The
    first and last instants are ``start`` and ``stop`` themselves, as given. ``stop`` may
    come before ``start`` (the instants then go backwards); ``count`` 1 takes only an
    unchanging range (``start`` equal to ``stop``).

    Raises :class:`EpochError` for a count below 1, or 1 where start and stop differ.

    Each instant is a two-part UTC date within tens of picoseconds of its place on the grid
    (33 ps at most, measured; tests/core/test_epochs.py holds it to 1 ns in exact rationals
    and against astropy).
    """
    if count < 1:
        raise EpochError("count must be at least 1")
    leap_second_table()
    a1, a2, _ = erfa_ufunc.utctai(start.utc_jd1, start.utc_jd2)
    b1, b2, _ = erfa_ufunc.utctai(stop.utc_jd1, stop.utc_jd2)
    # The span in whole days (an integer) and the rest: differences of the parts, exact.
    whole = round(float(b1 - a1))
    rest = float((b1 - a1) - whole) + float(b2 - a2)
    if count == 1:
        if whole + rest != 0.0:
            raise EpochError(f"count {COUNT_OF_ONE_TEXT}")
        return [start]
    # Step k of n = count - 1 is whole k / n + rest k / n days: the whole days of the first
    # term by integer division go to the large part of the two-part date, exactly; the
    # small part keeps the remainder to tens of picoseconds, whatever the span (a single
    # double of the offset would round it by up to 2**-53 of the span: 0.15 us over 40
    # years).
    n = count - 1
    k = np.arange(1, n)
    days, left = np.divmod(whole * k, n)
    t1 = float(a1) + days.astype(float)
    t2 = float(a2) + (left.astype(float) + rest * k) / n
    u1, u2, status = erfa_ufunc.taiutc(t1, t2)
    d1, d2, _ = _to_tdb_jd(u1, u2, "UTC")
    jyears = jd_to_julian_epoch(d1, d2)
    approximate = _utc_approximate(u1, u2, status)
    inner = [
        Instant(float(j), float(x1), float(x2), int(TimeNote.UTC_APPROXIMATE) if a else 0)
        for j, x1, x2, a in zip(jyears, u1, u2, approximate, strict=True)
    ]
    return [start, *inner, stop]


def epoch_range(start: float, stop: float, count: int) -> np.ndarray:
    """Evenly spaced Julian epochs from ``start`` to ``stop`` inclusive (``count`` >= 1)."""
    if count < 1:
        raise EpochError("count must be at least 1")
    return np.linspace(start, stop, count)


#: 1972 January 2, 0h UTC as a JD: no day from here on ends with a step of TAI-UTC other
#: than a whole leap second (ERFA dat's table).
_LAST_SMALL_STEP_END_JD = 2441318.5


def _render_small_steps(u1, u2, iy, im, iday, hmsf) -> None:
    """Correct, in place, ERFA d2dtf's calendar form (3 decimals) of UTC dates on the days
    that end with a step of TAI-UTC smaller than half a second (1961 to 1971: -0.05 s to
    +0.107758 s).

    ERFA dtf2d and utctai give such a day its 86,400 s plus the step, but d2dtf scales the
    fraction of a day by the step only where it exceeds 0.5 s (a leap second), so it renders
    UTC 12:00:00 on 1971 December 31 as 11:59:59.946 and 23:59:60.05 as 23:59:59.942.
    Here the time of day is the fraction of the day's own length, and the last tenth of a
    second of a day with a positive step is 23:59:60.xxx, as ERFA writes a leap second.
    """
    early = np.flatnonzero(u1 + u2 < _LAST_SMALL_STEP_END_JD)
    if not early.size:
        return
    a1, a2 = u1[early], u2[early]
    y0, m0, d0, fd, _ = erfa_ufunc.jd2cal(a1, a2)
    dat0, _ = erfa_ufunc.dat(y0, m0, d0, 0.0)
    dat12, _ = erfa_ufunc.dat(y0, m0, d0, 0.5)
    y1, m1, d1, _, _ = erfa_ufunc.jd2cal(a1 + 1.5, a2 - fd)
    dat24, _ = erfa_ufunc.dat(y1, m1, d1, 0.0)
    step = dat24 - (2.0 * dat12 - dat0)  # as ERFA d2dtf separates it, seconds
    for j in np.flatnonzero((step != 0.0) & (np.abs(step) <= 0.5)):
        k = early[j]
        ms = int(np.floor(fd[j] * (DAY_S + step[j]) * 1000.0 + 0.5))
        if ms < 86_400_000:
            hmsf[k] = (ms // 3_600_000, ms // 60_000 % 60, ms // 1000 % 60, ms % 1000)
            iy[k], im[k], iday[k] = y0[j], m0[j], d0[j]
        elif ms < 86_400_000 + int(np.floor(step[j] * 1000.0 + 0.5)):
            hmsf[k] = (23, 59, 60, ms - 86_400_000)
            iy[k], im[k], iday[k] = y0[j], m0[j], d0[j]
        else:
            hmsf[k] = (0, 0, 0, 0)
            iy[k], im[k], iday[k] = y1[j], m1[j], d1[j]


@dataclass(frozen=True)
class EpochLabels:
    """Human-readable forms of Julian epochs (TDB).

    Attributes
    ----------
    julian_epoch_tdb : ndarray
        Julian epoch, TDB, years (the input).
    jd_tdb : ndarray
        Julian date, TDB, days.
    iso_utc : list of str or None
        ISO 8601 UTC with millisecond precision, or None outside calendar years 1..9999.
    notes : ndarray of int
        :class:`TimeNote` bits per epoch.
    """

    julian_epoch_tdb: np.ndarray
    jd_tdb: np.ndarray
    iso_utc: list
    notes: np.ndarray


def label_epochs(jyear, utc_jd=None) -> EpochLabels:
    """Render Julian epochs (TDB) as Julian dates and ISO 8601 UTC strings.

    Parameters
    ----------
    jyear : array_like, shape (M,)
        Julian epochs, TDB, years.
    utc_jd : (array_like, array_like), optional
        The same epochs as two-part UTC dates (:class:`Instant`); the ISO rendering is then
        made from them rather than from the Julian epochs.

    Returns
    -------
    EpochLabels

    Notes
    -----
    1. TDB -> TT with ERFA dtdb at the geocentre, TT -> TAI -> UTC with ERFA tttai and
       taiutc (leap seconds from ERFA's built-in table); ERFA d2dtf gives the calendar form.
    2. Where ERFA reports a dubious year (before 1960, or more than five years after the
       release of its leap-second table: ERFA dat, Note 1), the date lies before 1960 (ERFA
       passes 31 December 1959), or beyond the expiry of the packaged leap-second table
       (astropy-iers-data), UTC is flagged approximate.
    3. ISO 8601 writes years 0000 to 9999 in four digits and others only in an expanded
       form agreed between the parties; a date whose calendar year (proleptic Gregorian,
       after rounding to the millisecond) lies outside 1 to 9999 gets no ISO rendering and
       is flagged NO_CALENDAR_DATE (ISO 8601-1:2019, calendar dates: four-digit years,
       expanded years by mutual agreement; from memory).
    """
    jyear = np.atleast_1d(np.asarray(jyear, dtype=float))
    d1, d2 = julian_epoch_to_jd(jyear)
    notes = np.zeros(jyear.shape, dtype=np.int64)
    iso: list = [None] * jyear.size
    # A first cut on the Julian epoch, wide enough for every date of calendar years 1 to
    # 9999 (the Julian epoch runs ahead of the Gregorian year by up to 0.04 years before
    # year 1 and behind it by up to 0.06 years after 9999); the calendar year of each date
    # decides below (Note 3).
    inside = (jyear > ISO_MIN_YEAR - 0.5) & (jyear < ISO_MAX_YEAR + 1.5)
    notes[~inside] |= int(TimeNote.NO_CALENDAR_DATE)
    idx = np.flatnonzero(inside)
    if idx.size:
        if utc_jd is None:
            u1, u2, dubious = tdb_jd_to_utc_jd(d1[idx], d2[idx])
        else:
            u1, u2 = (np.atleast_1d(np.asarray(p, dtype=float))[idx] for p in utc_jd)
        iy, im, iday, ihmsf, status = erfa_ufunc.d2dtf("UTC", 3, u1, u2)
        if utc_jd is not None:
            dubious = _utc_approximate(u1, u2, status)
        hmsf = np.array(ihmsf.view((np.int32, 4)) if ihmsf.dtype.names else ihmsf)
        iy, im, iday = np.array(iy), np.array(im), np.array(iday)
        _render_small_steps(u1, u2, iy, im, iday, hmsf)
        for k, i in enumerate(idx):
            if not ISO_MIN_YEAR <= int(iy[k]) <= ISO_MAX_YEAR:
                notes[i] |= int(TimeNote.NO_CALENDAR_DATE)
                continue
            h, mi, s, ms = (int(x) for x in hmsf[k])
            iso[i] = (
                f"{int(iy[k]):04d}-{int(im[k]):02d}-{int(iday[k]):02d}T{h:02d}:{mi:02d}:{s:02d}.{ms:03d}Z"
            )
            if dubious[k]:
                notes[i] |= int(TimeNote.UTC_APPROXIMATE)
    return EpochLabels(jyear, d1 + d2, iso, notes)
