"""Checks of service.core.epochs against the IAU definitions, ERFA and astropy.

Sources:
- IAU definitions: J2000.0 = JD 2451545.0 TT (IAU 1976 / 2006); B1950.0 =
  JD 2433282.4235 (Lieske 1979, A&A 73, 282; the value quoted to 4 decimals in the
  Explanatory Supplement, 3rd ed., 2013, ch. 3); the Julian year is 365.25 days exactly;
- the ERFA test suite, liberfa/erfa src/t_erfa_c.c: t_epb, t_epb2jd, t_epj, t_epj2jd;
- pyerfa's epj, epj2jd, epb, epb2jd and astropy.time.Time, run inside the test.
"""

from __future__ import annotations

import datetime as dt
import warnings
from fractions import Fraction

import erfa
import numpy as np
import pytest
from astropy.time import Time
from astropy.utils import iers
from hypothesis import given, settings
from hypothesis import strategies as st

from service.core.epochs import (
    EPOCH_MAX_JYEAR,
    EPOCH_MIN_JYEAR,
    EpochError,
    EpochLabels,
    Instant,
    TimeNote,
    besselian_epoch_to_julian_epoch,
    epoch_range,
    instant_range,
    jd_to_julian_epoch,
    julian_epoch_to_besselian_epoch,
    julian_epoch_to_jd,
    label_epochs,
    parse_epoch,
    parse_epoch_with_notes,
    parse_instant,
)

iers.conf.auto_download = False  # offline: packaged tables only

#: Tolerance on Julian epochs, years. A double near 2000 resolves 2.3e-13 yr (7 us); the
#: conversions add a few roundings, so 1e-12 yr (32 microseconds) is the honest limit.
JYEAR_TOL = 1e-12
#: Tolerance on Julian dates, days (ERFA's own tolerance in t_epb2jd/t_epj2jd).
JD_TOL_DAYS = 1e-9
#: Tolerance on Besselian epochs, years (ERFA's tolerance in t_epb is 1e-12).
BYEAR_TOL = 1e-12
#: Time-scale conversions (UTC/TT/TDB) against astropy, seconds. Bounded by the double
#: resolution of a Julian epoch (7 microseconds near 2000).
SCALE_TOL_S = 5e-5
YEAR_S = 365.25 * 86400.0


# --- IAU definitions -------------------------------------------------------------------


def test_j2000_is_jd_2451545_tt():
    jd1, jd2 = julian_epoch_to_jd(2000.0)
    assert jd1 + jd2 == 2451545.0  # IAU 1976 / 2006: J2000.0 = JD 2451545.0 TT
    assert parse_epoch("J2000.0") == 2000.0
    assert parse_epoch("JD2451545.0") == 2000.0
    assert parse_epoch("MJD51544.5") == 2000.0  # MJD = JD - 2400000.5


def test_julian_year_is_365_25_days():
    for a, b in [(2000.0, 2001.0), (1991.25, 2016.0), (-4712.0, 2000.0)]:
        d1a, d2a = julian_epoch_to_jd(a)
        d1b, d2b = julian_epoch_to_jd(b)
        days = (d1b - d1a) + (d2b - d2a)
        assert days == pytest.approx((b - a) * 365.25, abs=JD_TOL_DAYS)  # IAU: 365.25 d


def test_b1950_is_jd_2433282_4235():
    jyear = besselian_epoch_to_julian_epoch(1950.0)
    jd1, jd2 = julian_epoch_to_jd(jyear)
    # B1950.0 = JD 2433282.4235 (Lieske 1979; quoted to 4 decimals: half a unit tolerance).
    assert abs((jd1 - 2433282.4235) + jd2) <= 0.5e-4
    assert parse_epoch("B1950.0") == pytest.approx(jyear, abs=0)
    # B1900.0 = JD 2415020.31352 (Lieske 1979, the origin of the Besselian epoch).
    jd1, jd2 = julian_epoch_to_jd(besselian_epoch_to_julian_epoch(1900.0))
    assert abs((jd1 - 2415020.31352) + jd2) <= JD_TOL_DAYS


# --- ERFA test suite values ------------------------------------------------------------


def test_erfa_t_epj():
    # t_erfa_c.c t_epj: eraEpj(2451545, -7392.5) = 1979.760438056125941 (tol 1e-12)
    assert abs(jd_to_julian_epoch(2451545.0, -7392.5) - 1979.760438056125941) <= JYEAR_TOL


def test_erfa_t_epj2jd():
    # t_erfa_c.c t_epj2jd: 1996.8 -> djm0 = 2400000.5, djm = 50375.7 (tol 1e-9)
    jd1, jd2 = julian_epoch_to_jd(1996.8)
    assert abs(jd1 - 2400000.5) <= JD_TOL_DAYS
    assert abs(jd2 - 50375.7) <= JD_TOL_DAYS


def test_erfa_t_epb():
    # t_erfa_c.c t_epb: eraEpb(2415019.8135, 30103.18648) = 1982.418424159278580 (tol 1e-12)
    jyear = jd_to_julian_epoch(2415019.8135, 30103.18648)
    assert abs(julian_epoch_to_besselian_epoch(jyear) - 1982.418424159278580) <= BYEAR_TOL


def test_erfa_t_epb2jd():
    # t_erfa_c.c t_epb2jd: 1957.3 -> djm0 = 2400000.5, djm = 35948.1915101513 (tol 1e-9)
    jd1, jd2 = julian_epoch_to_jd(besselian_epoch_to_julian_epoch(1957.3))
    assert abs((jd1 - 2400000.5) + (jd2 - 35948.1915101513)) <= JD_TOL_DAYS


# --- pyerfa on random inputs -----------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(jyear=st.floats(-4000.0, 8000.0))
def test_julian_epoch_matches_pyerfa(jyear):
    d1, d2 = julian_epoch_to_jd(jyear)
    e1, e2 = erfa.epj2jd(jyear)
    assert abs((d1 - e1) + (d2 - e2)) <= JD_TOL_DAYS
    assert abs(jd_to_julian_epoch(d1, d2) - erfa.epj(e1, e2)) <= JYEAR_TOL * 10
    assert abs(jd_to_julian_epoch(d1, d2) - jyear) <= JYEAR_TOL * 10  # round trip


@settings(max_examples=200, deadline=None)
@given(byear=st.floats(-4000.0, 8000.0))
def test_besselian_epoch_matches_pyerfa(byear):
    d1, d2 = julian_epoch_to_jd(besselian_epoch_to_julian_epoch(byear))
    e1, e2 = erfa.epb2jd(byear)
    assert abs((d1 - e1) + (d2 - e2)) <= JD_TOL_DAYS
    back = julian_epoch_to_besselian_epoch(besselian_epoch_to_julian_epoch(byear))
    assert abs(back - byear) <= JYEAR_TOL * 10  # round trip


def test_vectorised_conversions_keep_shape():
    jy = np.linspace(1900.0, 2100.0, 12).reshape(3, 4)
    d1, d2 = julian_epoch_to_jd(jy)
    assert d1.shape == d2.shape == (3, 4)
    np.testing.assert_allclose(jd_to_julian_epoch(d1, d2), jy, rtol=0, atol=JYEAR_TOL)
    np.testing.assert_allclose(
        julian_epoch_to_besselian_epoch(jy),
        erfa.epb(*erfa.epj2jd(jy)),
        rtol=0,
        atol=BYEAR_TOL * 10,
    )


# --- parsing and time scales (checked against astropy.time) -----------------------------


def astropy_jyear_tdb(value, fmt, scale):
    return Time(value, format=fmt, scale=scale).tdb.jyear


@pytest.mark.parametrize(
    "text,fmt,value,scale",
    [
        ("JD2460000.5 UTC", "jd", 2460000.5, "utc"),
        ("JD2460000.5 TT", "jd", 2460000.5, "tt"),
        ("JD2451545.0 TAI", "jd", 2451545.0, "tai"),
        ("MJD59000.25 UTC", "mjd", 59000.25, "utc"),
        ("mjd 59000.25 tt", "mjd", 59000.25, "tt"),
    ],
)
def test_scales_match_astropy(text, fmt, value, scale):
    jyear, notes = parse_epoch_with_notes(text)
    assert abs(jyear - astropy_jyear_tdb(value, fmt, scale)) * YEAR_S <= SCALE_TOL_S
    assert notes == 0


@pytest.mark.parametrize(
    "text,iso",
    [
        ("2000-01-01T11:58:55.816Z", "2000-01-01T11:58:55.816"),  # J2000.0 TT, in UTC
        ("2016-12-31T23:59:60Z", "2016-12-31T23:59:60"),  # a leap second
        ("2026-12-02T03:04:05+02:00", "2026-12-02T01:04:05"),  # zone offset applied
        # Offsets across a day with a leap second (86,401 s): once off by up to 1 s, the
        # offset having been taken from the local date's quasi-JD as 1/24 day an hour.
        ("2017-01-01T00:30:00+01:00", "2016-12-31T23:30:00"),
        ("2016-12-31T23:30:00-01:00", "2017-01-01T00:30:00"),
        ("2016-12-31T13:00:00+01:00", "2016-12-31T12:00:00"),
        ("2017-01-01T00:59:59.5+01:00", "2016-12-31T23:59:59.5"),
        ("2026-12-02", "2026-12-02T00:00:00"),  # date alone: 0h UTC
        ("1999-06-15 12:30", "1999-06-15T12:30:00"),
    ],
)
def test_iso_utc_matches_astropy(text, iso):
    jyear, _ = parse_epoch_with_notes(text)
    assert abs(jyear - astropy_jyear_tdb(iso, "isot", "utc")) * YEAR_S <= SCALE_TOL_S


def test_bare_numbers_and_prefixes_are_julian_epochs():
    assert parse_epoch(2016.0) == 2016.0
    assert parse_epoch(np.float32(2016.5)) == 2016.5
    assert parse_epoch("2016.0") == 2016.0
    assert parse_epoch(" j2016.5 ") == 2016.5
    assert parse_epoch(2016) == 2016.0


def test_now_uses_given_clock():
    moment = dt.datetime(2026, 12, 2, 3, 4, 5, tzinfo=dt.UTC)
    jyear = parse_epoch("now", now=moment)
    assert abs(jyear - astropy_jyear_tdb("2026-12-02T03:04:05", "isot", "utc")) * YEAR_S <= (
        SCALE_TOL_S
    )
    # "now" without a clock is the system time: within a minute of astropy's now.
    assert abs(parse_epoch("now") - Time.now().tdb.jyear) * YEAR_S < 60.0


@pytest.mark.parametrize(
    "bad",
    [
        "",
        "   ",
        "yesterday",
        "J2000 TT",  # Julian epochs are TDB by definition: no scale
        "JD2451545 GPS",  # unknown scale
        "2026-13-01",  # month 13
        "2026-02-30T00:00:00Z",
        "x" * 100,
        float("nan"),
        float("inf"),
        True,
        None,
        [2016.0],
        EPOCH_MAX_JYEAR + 1.0,
        EPOCH_MIN_JYEAR - 1.0,
        "J1e9",
        # Far outside the range: refused before ERFA epb2jd, whose arithmetic overflowed
        # with a RuntimeWarning (found by the property test below).
        "B4.92192069e+305",
        "B-1e300",
        # UTC is undefined where ERFA utctai rejects the date (status -1): once an
        # uncaught ErfaError (HTTP 500).
        "MJD-3000000 UTC",
        "JD-1000000 UTC",
    ],
)
def test_bad_epochs_raise_epoch_error(bad):
    with pytest.raises(EpochError):
        parse_epoch(bad)


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("2026-02-30T00:00:00Z", "bad day of the month"),
        ("2026-12-01T25:00:00Z", "bad hour"),
        ("2026-12-01T23:61:00Z", "bad minute"),
        # Seconds run 0 to 59.999..., 60 only at 23:59:60 UTC on a day ending with a leap
        # second (ERFA dtf2d status +2, "time is after end of day", was once only a note).
        ("2026-12-01T00:00:75Z", "second 75"),
        ("2026-12-01T00:00:60Z", "second 60"),
        ("2026-12-01T23:59:60Z", "after the end of that UTC day"),
        ("2016-12-31T23:59:61Z", "second 61"),
        ("2026-12-01T00:00:00-99:99", "invalid UTC offset"),
        ("2026-12-01T00:00:00+24:00", "invalid UTC offset"),
    ],
)
def test_invalid_calendar_dates_say_what_is_wrong(text, reason):
    with pytest.raises(EpochError, match=reason):
        parse_epoch(text)


def test_leap_second_with_zero_offset_and_largest_offsets():
    assert parse_epoch("2016-12-31T23:59:60.5+00:00") == parse_epoch("2016-12-31T23:59:60.5Z")
    # 00:00 at +23:59 is 00:01 UTC of the previous day (astropy Time as the reference).
    expected = Time("2026-11-30T00:01:00", scale="utc").tdb.jyear
    assert parse_epoch("2026-12-01T00:00:00+23:59") == pytest.approx(expected, abs=JYEAR_TOL)


def test_same_dates_on_tt_are_accepted_where_utc_is_undefined():
    # ERFA utctai rejects the date; on TT (no leap seconds involved) it is a plain date.
    # Check value: the Julian epoch of JD -1000000 on TT by the IAU definition (J2000.0 =
    # JD 2451545.0, 365.25 days a year); ours is on TDB, which differs from TT by less than
    # 2 ms (Fairhead & Bretagnon 1990, as in ERFA dtdb's documentation).
    tt_epoch = 2000.0 + (-1000000.0 - 2451545.0) / 365.25
    tdb_minus_tt_max_yr = 2e-3 / (365.25 * 86400.0)
    assert parse_epoch("JD-1000000 TT") == pytest.approx(
        tt_epoch, abs=tdb_minus_tt_max_yr + JYEAR_TOL
    )


_NUMBERS = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.integers(-(10**12), 10**12).map(str),
    st.builds(lambda m, e: f"{m}e{e}", st.integers(-999, 999), st.integers(-400, 400)),
)
_EPOCH_TEXTS = st.one_of(
    st.builds(
        lambda kind, num, scale: f"{kind}{num}{scale}",
        st.sampled_from(["J", "B", "JD", "MJD", "jd ", "mjd"]),
        _NUMBERS,
        st.sampled_from(["", " UTC", " TAI", " TT", " TDB", " utc", " GPS"]),
    ),
    st.builds(
        lambda y, mo, d, h, mi, sec, tz: f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{sec}{tz}",
        st.integers(0, 9999),
        st.integers(0, 99),
        st.integers(0, 99),
        st.integers(0, 99),
        st.integers(0, 99),
        st.sampled_from(["00", "59", "59.999", "60", "60.5", "61", "99.9"]),
        st.sampled_from(["Z", "", "+00:00", "-23:59", "+24:00", "+0530", "-99:99"]),
    ),
)


@given(text=_EPOCH_TEXTS)
@settings(max_examples=400, deadline=None)
def test_any_epoch_text_parses_in_range_or_raises_epoch_error(text):
    # Grammar-shaped strings with extreme numbers and out-of-range fields: the answer is an
    # epoch in the supported range or an EpochError (a 422 at the API), never another error.
    try:
        jyear, notes = parse_epoch_with_notes(text)
    except EpochError:
        return
    assert EPOCH_MIN_JYEAR <= jyear <= EPOCH_MAX_JYEAR
    assert notes in (0, int(TimeNote.UTC_APPROXIMATE))


def test_epoch_error_is_a_value_error():
    assert issubclass(EpochError, ValueError)


def test_epoch_range():
    np.testing.assert_array_equal(epoch_range(2000.0, 2010.0, 3), [2000.0, 2005.0, 2010.0])
    np.testing.assert_array_equal(epoch_range(2016.0, 2016.0, 1), [2016.0])
    with pytest.raises(EpochError):
        epoch_range(2000.0, 2001.0, 0)


# --- labels: Julian epoch -> JD and ISO UTC -------------------------------------------


def test_labels_match_astropy_utc():
    jy = np.array([1975.3, 2000.0, 2016.0, 2026.9171])
    labels = label_epochs(jy)
    assert isinstance(labels, EpochLabels)
    np.testing.assert_array_equal(labels.julian_epoch_tdb, jy)
    np.testing.assert_allclose(labels.jd_tdb, 2451545.0 + (jy - 2000.0) * 365.25, atol=1e-9)
    for k, y in enumerate(jy):
        expected = Time(y, format="jyear", scale="tdb").utc.isot  # millisecond precision
        got = labels.iso_utc[k]
        assert got.endswith("Z")
        # Compare as times (rounding of the last millisecond may differ by one unit).
        diff = (Time(got[:-1], format="isot", scale="utc") - Time(expected, scale="utc")).sec
        assert abs(diff) <= 1.5e-3
    assert np.all(labels.notes == 0)


def test_labels_round_trip_through_parse():
    jy = np.array([1980.5, 2016.0, 2030.25])
    for y, iso in zip(jy, label_epochs(jy).iso_utc, strict=True):
        # ISO at millisecond precision: the round trip is good to half a millisecond.
        assert abs(parse_epoch(iso) - y) * YEAR_S <= 0.5e-3 + SCALE_TOL_S


def test_labels_flag_approximate_and_missing_calendar():
    labels = label_epochs([1900.0, 2016.0, 20000.0, -5000.0])
    notes = labels.notes
    assert notes[0] & TimeNote.UTC_APPROXIMATE  # before 1960: UTC not defined as today
    assert notes[1] == 0
    assert notes[2] & TimeNote.NO_CALENDAR_DATE and labels.iso_utc[2] is None
    assert notes[3] & TimeNote.NO_CALENDAR_DATE and labels.iso_utc[3] is None
    assert labels.iso_utc[0].startswith("1899-12-31") or labels.iso_utc[0].startswith("1900")


def test_parse_flags_approximate_utc_before_1960():
    _, notes = parse_epoch_with_notes("1900-01-01T00:00:00Z")
    assert notes & TimeNote.UTC_APPROXIMATE
    _, notes = parse_epoch_with_notes("2020-01-01T00:00:00Z")
    assert notes == 0


# --- instants: the UTC date in full ------------------------------------------------------


@pytest.mark.parametrize(
    "text, ymdhms",
    [
        ("2026-06-11T17:17:57.898065Z", (2026, 6, 11, 17, 17, 57.898065)),
        ("2026-12-02T22:30:00Z", (2026, 12, 2, 22, 30, 0.0)),
        ("2016-12-31T23:59:60.5Z", (2016, 12, 31, 23, 59, 60.5)),  # in a leap second
    ],
)
def test_instant_keeps_the_iso_utc_date_as_erfa_dtf2d_reads_it(text, ymdhms):
    got = parse_instant(text)
    assert isinstance(got, Instant)
    # ERFA dtf2d, run here: the two-part UTC date of the calendar date and time, exactly.
    assert (got.utc_jd1, got.utc_jd2) == tuple(erfa.dtf2d("UTC", *ymdhms))
    assert got.julian_epoch_tdb == parse_epoch(text)
    assert got.notes == 0


def test_instant_keeps_the_digits_of_a_utc_julian_date():
    # A single double near JD 2.46e6 resolves 4.7e-10 day (40 us): the parts are kept apart.
    got = parse_instant("JD2461377.437499988 UTC")
    assert (got.utc_jd1, got.utc_jd2) == (2461377.0, 0.437499988)
    got = parse_instant("MJD61376.937499988 UTC")
    assert (got.utc_jd1, got.utc_jd2) == (2400000.5 + 61376.0, 0.937499988)
    got = parse_instant("jd 2461377.5e0 utc")
    assert (got.utc_jd1, got.utc_jd2) == (2461377.0, 0.5)


def test_instant_on_other_scales_matches_erfa_and_astropy():
    # JD on TT: ERFA tttai then taiutc on the same parts (run here), to 1 ns.
    want = erfa.taiutc(*erfa.tttai(2461377.0, 0.437499988))
    got = parse_instant("JD2461377.437499988 TT")
    assert abs((got.utc_jd1 - want[0]) + (got.utc_jd2 - want[1])) * 86400.0 < 1e-9
    # A Julian epoch (TDB): astropy Time's TDB -> UTC (geocentric TDB - TT), to 1 ns.
    t = Time(2026.9171, format="jyear", scale="tdb").utc
    got = parse_instant(2026.9171)
    assert abs((got.utc_jd1 - t.jd1) + (got.utc_jd2 - t.jd2)) * 86400.0 < 1e-9
    assert got.julian_epoch_tdb == 2026.9171


#: Instants of a range against exact rational arithmetic on ERFA's TAI dates, seconds.
RANGE_TOL_S = 1e-9

RANGES = [
    ("2026-12-06T18:00:00Z", "2026-12-07T06:00:00Z", 73),  # a night, every 10 minutes
    ("2016-12-31T23:00:00Z", "2017-01-01T01:00:00Z", 7),  # across the leap second
    ("2017-01-01T01:00:00Z", "2016-12-31T23:00:00Z", 7),  # the same, backwards
    ("1972-06-30T23:59:59.5Z", "1972-07-01T00:00:00.5Z", 5),  # the 1972 leap second
    ("1985-03-01T00:00:00.125Z", "2028-10-01T12:00:00Z", 1001),  # 43 years, 16 leaps
    ("JD2461381.437499988 UTC", "2026-12-08T00:00:00Z", 10),  # parts split otherwise
]


def _tai_fraction(utc_jd1, utc_jd2):
    """A UTC date as TAI (ERFA utctai), as an exact rational number of days."""
    t1, t2 = erfa.utctai(utc_jd1, utc_jd2)
    return Fraction(float(t1)) + Fraction(float(t2))


@pytest.mark.parametrize("start, stop, count", RANGES)
def test_instant_range_steps_equal_elapsed_time_exactly(start, stop, count):
    # Each instant k of n + 1 lies k/n of the elapsed TAI time from the start: checked in
    # exact rationals (fractions.Fraction) on ERFA's TAI of the start, stop and instants.
    got = instant_range(parse_instant(start), parse_instant(stop), count)
    assert len(got) == count
    a = _tai_fraction(got[0].utc_jd1, got[0].utc_jd2)
    span = _tai_fraction(got[-1].utc_jd1, got[-1].utc_jd2) - a
    n = count - 1
    for k, t in enumerate(got):
        miss = _tai_fraction(t.utc_jd1, t.utc_jd2) - a - span * k / n
        assert abs(float(miss)) * 86400.0 < RANGE_TOL_S, k
    # The ends are the instants given, untouched.
    assert got[0] == parse_instant(start) and got[-1] == parse_instant(stop)


@pytest.mark.parametrize("start, stop, count", RANGES[:5])
def test_instant_range_matches_astropy_time_arithmetic(start, stop, count):
    # astropy Time differences and sums of UTC times are taken on TAI (astropy.time
    # documentation, "Time Deltas"): an independent count of elapsed seconds. Its product of
    # a TimeDelta by a float rounds to about 2**-53 of the span (0.15 us over 43 years), so
    # the tolerance is that or 1 ns, whichever is larger.
    got = instant_range(parse_instant(start), parse_instant(stop), count)
    a, b = Time(start.rstrip("Z"), scale="utc"), Time(stop.rstrip("Z"), scale="utc")
    want = a + (b - a) * np.linspace(0.0, 1.0, count)
    u1 = np.array([t.utc_jd1 for t in got])
    u2 = np.array([t.utc_jd2 for t in got])
    miss_s = np.abs((u1 - want.jd1) + (u2 - want.jd2)) * 86400.0
    tol_s = max(RANGE_TOL_S, 2.0**-52 * abs((b - a).sec))
    assert miss_s.max() < tol_s
    # The Julian epochs (TDB) of the instants, as astropy's TDB of the same instants.
    tdb = want.tdb.jyear
    assert np.abs(np.array([t.julian_epoch_tdb for t in got]) - tdb).max() < JYEAR_TOL


def test_instant_range_inside_a_leap_second_is_second_60():
    got = instant_range(
        parse_instant("2016-12-31T23:59:59Z"), parse_instant("2017-01-01T00:00:01Z"), 5
    )
    # Elapsed seconds 0, 0.75, 1.5, 2.25, 3 from 23:59:59 on a day of 86,401 s (ERFA d2dtf).
    labels = [erfa.d2dtf("UTC", 3, t.utc_jd1, t.utc_jd2) for t in got]
    assert [tuple(int(x) for x in hms) for _, _, _, hms in labels] == [
        (23, 59, 59, 0),
        (23, 59, 59, 750),
        (23, 59, 60, 500),
        (0, 0, 0, 250),
        (0, 0, 1, 0),
    ]


def test_instant_range_notes_as_the_same_instant_written():
    # Beyond the leap-second table UTC is approximate (TimeNote.UTC_APPROXIMATE), for an
    # instant of a range as for the same instant written out: 2029-12-06 is halfway.
    got = instant_range(
        parse_instant("2026-12-06T00:00:00Z"), parse_instant("2032-12-06T00:00:00Z"), 3
    )
    written = parse_instant("2029-12-06T00:00:00Z")
    assert got[1].notes == written.notes == int(TimeNote.UTC_APPROXIMATE)
    assert abs((got[1].utc_jd1 - written.utc_jd1) + (got[1].utc_jd2 - written.utc_jd2)) < 1e-14
    assert got[0].notes == 0


def test_instant_range_count_one_only_for_one_instant():
    t = parse_instant("2026-12-06T18:00:00Z")
    assert instant_range(t, parse_instant("JD2461381.25 UTC"), 1) == [t]
    with pytest.raises(EpochError, match="at least 2"):
        instant_range(t, parse_instant("2026-12-06T18:00:00.000001Z"), 1)
    with pytest.raises(EpochError, match="at least 1"):
        instant_range(t, t, 0)


def test_instant_refuses_what_parse_epoch_refuses():
    for bad in (True, "2026-02-30T00:00:00Z", "JD9e9 UTC", "soon"):
        with pytest.raises(EpochError):
            parse_instant(bad)


def test_labels_from_utc_dates_render_them_as_erfa_d2dtf_does():
    texts = ["2026-06-11T17:17:57.8985Z", "2026-12-02T22:30:00Z", "2045-01-01T00:00:00Z"]
    got = [parse_instant(t) for t in texts]
    labels = label_epochs(
        [t.julian_epoch_tdb for t in got],
        ([t.utc_jd1 for t in got], [t.utc_jd2 for t in got]),
    )
    for t, iso in zip(got, labels.iso_utc, strict=True):
        # ERFA d2dtf with 3 decimals (run here) on the same UTC date.
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", erfa.ErfaWarning)  # 2045: "dubious year"
            y, mo, d, (h, mi, sec, ms) = erfa.d2dtf("UTC", 3, t.utc_jd1, t.utc_jd2)
        assert iso == f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{sec:02d}.{ms:03d}Z"
    # 2045 lies beyond the packaged leap-second table: approximate, as for Julian epochs.
    assert list(labels.notes) == [0, 0, TimeNote.UTC_APPROXIMATE]
    assert labels.notes[2] == label_epochs([got[2].julian_epoch_tdb]).notes[0]


def test_utc_of_31_december_1959_is_flagged_approximate():
    # UTC as defined today begins on 1960 January 1 (the first entry of ERFA dat's TAI-UTC
    # table); ERFA dat, run here, calls 1959-12-31 a dubious year ...
    assert erfa.ufunc.dat(1959, 12, 31, 0.5)[1] == 1
    # ... but ERFA dtf2d and taiutc pass that day with status 0, stretched by the 0.94 s step
    # to TAI-UTC on 1960 January 1: astropy (run here) renders JD 2436934.0 UTC, read back
    # from TDB, as 12:00:00.472. The service flagged neither the reading nor the label.
    assert Time(2436934.0, format="jd", scale="utc").tdb.utc.isot == "1959-12-31T12:00:00.472"
    for text in ("1959-12-31T12:00:00Z", "JD2436934.0 UTC", "1960-01-01T05:30:00+06:00"):
        _, notes = parse_epoch_with_notes(text)
        assert notes & TimeNote.UTC_APPROXIMATE, text
        t = parse_instant(text)
        labels = label_epochs([t.julian_epoch_tdb], ([t.utc_jd1], [t.utc_jd2]))
        assert labels.notes[0] & TimeNote.UTC_APPROXIMATE, text
        assert label_epochs([t.julian_epoch_tdb]).notes[0] & TimeNote.UTC_APPROXIMATE, text
    # the first day of the table is not approximate
    assert parse_epoch_with_notes("1960-01-01T00:00:00Z")[1] == 0
    assert label_epochs([parse_epoch("1960-01-01T00:00:01Z")]).notes[0] == 0


@pytest.mark.parametrize(
    "jyear, iso",
    [
        (1.0, None),  # 0000-12-17 (proleptic Gregorian, ERFA d2dtf): year 0
        (1.02, None),  # 0000-12-24: year 0, though past the Julian epoch 1.01
        (1.05, "0001-01-04T00:17:27.815Z"),
        (9999.5, "9999-08-31T20:58:50.815Z"),
        (9999.9, None),  # 10000-01-24: five digits, no longer ISO 8601's basic year
        (10000.5, None),
    ],
)
def test_iso_text_only_for_calendar_years_1_to_9999(jyear, iso):
    # The dates: astropy Time(jyear, format="jyear", scale="tdb").utc (run here) agrees to
    # the millisecond where it renders them; the answer described "null outside years 1 to
    # 9999" but wrote "0000-12-24T..." and "10000-01-24T...".
    labels = label_epochs([jyear])
    assert labels.iso_utc[0] == iso
    assert bool(labels.notes[0] & TimeNote.NO_CALENDAR_DATE) == (iso is None)
    if iso is not None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", erfa.ErfaWarning)  # dubious year
            want = Time(jyear, format="jyear", scale="tdb").utc
            ymd, hms = iso[:-1].split("T")
            h, mi, sec = hms.split(":")
            got = erfa.dtf2d("UTC", *map(int, ymd.split("-")), int(h), int(mi), float(sec))
        assert abs((got[0] - want.jd1) + (got[1] - want.jd2)) * 86400.0 <= 0.5e-3


def test_iso_rounding_into_year_10000_gives_no_text():
    # 9999-12-31T23:59:59.9996 rounds to the millisecond into the year 10000.
    t = parse_instant("9999-12-31T23:59:59.9996Z")
    labels = label_epochs([t.julian_epoch_tdb], ([t.utc_jd1], [t.utc_jd2]))
    assert labels.iso_utc == [None]
    assert labels.notes[0] & TimeNote.NO_CALENDAR_DATE


@pytest.mark.parametrize(
    "text, next_second",
    [
        ("2026-01-01T12:00:59.99999999999999999Z", (2026, 1, 1, 12, 1, 0.0)),
        ("2016-12-31T23:59:60.99999999999999999Z", (2017, 1, 1, 0, 0, 0.0)),  # leap second
        ("2026-01-01T18:29:59.999999999999999999999+05:30", (2026, 1, 1, 13, 0, 0.0)),
    ],
)
def test_many_fraction_digits_keep_their_second(text, next_second):
    # RFC 3339, 5.6: time-secfrac = "." 1*DIGIT, any number of digits. As one double,
    # "59.99999999999999999" is 60.0, and the second was refused as 60 (or 61); it is the
    # instant 1e-17 s before the next second: ERFA dtf2d of that second (run here), to 1 ns.
    got = parse_instant(text)
    want = erfa.dtf2d("UTC", *next_second)
    assert abs((got.utc_jd1 - want[0]) + (got.utc_jd2 - want[1])) * 86400.0 < 1e-9
    assert abs(parse_epoch(text) - got.julian_epoch_tdb) == 0.0
    for bad in ("2026-01-01T12:00:60Z", "2016-12-31T23:59:61Z", "2026-01-01T12:00:60.0Z"):
        with pytest.raises(EpochError, match="second"):
            parse_epoch(bad)


@pytest.mark.parametrize(
    "text",
    [
        "1971-12-31T12:00:00.000Z",  # the day ends with a +0.107758 s step of TAI-UTC
        "1971-12-31T23:59:59.000Z",
        "1971-12-31T23:59:60.050Z",  # inside that step: 23:59:60.0 to 60.107758
        "1963-10-31T23:59:60.050Z",  # +0.1 s step
        "1968-01-31T12:00:00.000Z",  # -0.1 s step
        "1968-01-31T23:59:59.899Z",
        "1971-12-31T00:00:00.000Z",
        "1972-01-01T00:00:00.000Z",
    ],
)
def test_iso_text_on_days_with_a_small_step_of_tai_utc(text):
    # Such days last 86,400 s plus the step (ERFA dtf2d, utctai); ERFA d2dtf renders them as
    # 86,400 s days (it scales only for steps above 0.5 s), and wrote 12:00:00 on 1971
    # December 31 as 11:59:59.946 (astropy's Time(...).isot, run on ERFA, does the same).
    t = parse_instant(text)
    for labels in (
        label_epochs([t.julian_epoch_tdb], ([t.utc_jd1], [t.utc_jd2])),
        label_epochs([t.julian_epoch_tdb]),
    ):
        assert labels.iso_utc == [text]
        assert labels.notes[0] == 0


def test_utc_of_1971_december_31_against_the_published_tai_utc():
    # USNO tai-utc.dat (from memory): from 1968 Feb 1, TAI-UTC = 4.2131700 s +
    # (MJD - 39126) x 0.002592 s; from 1972 Jan 1, 10.0 s. At 12:00 UTC on 1971 Dec 31
    # (MJD 41316.5) TAI is therefore 12:00:09.890946, to 1 us.
    t = parse_instant("1971-12-31T12:00:00Z")
    tai = erfa.utctai(t.utc_jd1, t.utc_jd2)
    tai_s = ((tai[0] - 2441316.5) + tai[1]) * 86400.0
    assert abs(tai_s - (43200.0 + 4.21317 + (41316.5 - 39126.0) * 0.002592)) < 1e-6
    assert label_epochs([t.julian_epoch_tdb]).iso_utc == ["1971-12-31T12:00:00.000Z"]


def test_iso_text_round_trips_on_every_day_of_1960_to_1972():
    # Every day from 1960 January 1 to 1972 February 4 (ERFA dat's rubber-second era and
    # the first month after it), at one random millisecond and at 23:59:59.950: read as
    # ISO UTC and answered again (from the UTC date and through the Julian epoch, TDB), the
    # text comes back unchanged. The old rendering failed on 11 of those days.
    rng = np.random.default_rng(1960)
    texts = []
    for mjd in range(36934, 41352):
        y, m, d, _ = erfa.jd2cal(2400000.5, mjd)
        for ms in (int(rng.integers(0, 86_400_000)), 86_399_950):
            h, mi, s, f = ms // 3_600_000, ms // 60_000 % 60, ms // 1000 % 60, ms % 1000
            texts.append(f"{y:04d}-{m:02d}-{d:02d}T{h:02d}:{mi:02d}:{s:02d}.{f:03d}Z")
    instants = []
    for text in texts:
        try:
            instants.append((text, parse_instant(text)))
        except EpochError:  # 23:59:59.950 on a day shortened by 0.05 or 0.1 s
            assert text.endswith("T23:59:59.950Z")
    assert len(instants) >= len(texts) - 4
    jyear = np.array([t.julian_epoch_tdb for _, t in instants])
    utc = ([t.utc_jd1 for _, t in instants], [t.utc_jd2 for _, t in instants])
    want = [text for text, _ in instants]
    assert label_epochs(jyear, utc).iso_utc == want
    assert label_epochs(jyear).iso_utc == want
