"""Rates of the observed place for tracking: the azimuth, altitude, parallactic angle,
observed hour angle and declination's change per second (core.observed.tracking_rates,
observed_places(rates=True)).

Checked against the places themselves (central differences in time), pyerfa's atco13 (the
SOFA observed place) and astropy's AltAz transform differenced the same way, and the
closed forms of spherical astronomy.
"""

import warnings

import erfa
import numpy as np
import pytest

from service.core import observed as O
from service.core.constants import ARCSEC_PER_RAD

SECOND = 1.0 / 86_400.0  # days
OMEGA = O.ERA_RATE_RAD_S * ARCSEC_PER_RAD  # arcsec of Earth rotation per second


def _stars(n, seed):
    rng = np.random.default_rng(seed)
    return dict(
        ra=rng.uniform(0.0, 360.0, n),
        dec=np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n))),
        px=rng.uniform(0.1, 300.0, n),
        pmra=rng.normal(0.0, 300.0, n),
        pmdec=rng.normal(0.0, 300.0, n),
        rv=rng.normal(0.0, 40.0, n),
    )


def _observe(s, jd1, jd2, site, atm=None, **kw):
    return O.observed_places(s["ra"], s["dec"], s["px"], s["pmra"], s["pmdec"], s["rv"],
                             2016.0, jd1, jd2, site, atm, **kw)  # fmt: skip


def _wrap(x):
    return (x + 180.0) % 360.0 - 180.0


def _differences(s, jd1, jd2, site, atm, half_step_s, **kw):
    """Central differences of azimuth, altitude and parallactic angle, arcsec/s."""
    after = _observe(s, jd1, jd2 + half_step_s * SECOND, site, atm, **kw)
    before = _observe(s, jd1, jd2 - half_step_s * SECOND, site, atm, **kw)
    k = 3600.0 / (2.0 * half_step_s)
    return (
        _wrap(after.azimuth_deg - before.azimuth_deg) * k,
        (after.altitude_deg - before.altitude_deg) * k,
        _wrap(after.parallactic_angle_deg - before.parallactic_angle_deg) * k,
    )


# Refraction held at its 2.9 deg value below it (SOFA atioq): the rate has a step there, so
# a difference across it is not a derivative. Places within 0.02 deg of it are left out.
HELD_BELOW_DEG = np.degrees(np.arcsin(O.ATIOQ_SELMIN))


def _unrefracted_altitude(res):
    return res.altitude_deg + res.refraction_arcsec / 3600.0


@pytest.mark.parametrize(
    "lat, lon, height, pressure",
    [
        (38.4127, -7.6543, 1460.0, None),  # standard atmosphere at the site height
        (-29.26, -70.73, 2400.0, 770.0),
        (19.82, -155.47, 4200.0, 0.0),  # refraction off
        (0.0, 10.0, 0.0, 1013.25),
        (89.99, 0.0, 0.0, 1013.25),
        (-90.0, 30.0, 2835.0, 690.0),  # at a pole
    ],
)
def test_rates_are_the_derivatives_of_the_places(lat, lon, height, pressure):
    """The rates against central differences of the answers' own places at +-0.05 s.

    What the rates hold for the second is the precession-nutation, the star's motion and
    the Sun's light deflection; measured: within 1.1e-6 arcsec/s more than 5 deg from the
    Sun, 7e-6 within a degree of it (the deflection changes fastest there). Tolerances
    2e-6 and 1e-5 arcsec/s of motion on the sky: for the altitude as given, for the azimuth
    times the sine of the zenith distance (it grows as 1 / sin z near the zenith, and so
    does its difference), for the parallactic angle times that and the cosine of the
    declination (it is not defined at the pole either).
    """
    s = _stars(3000, seed=int(abs(lat) * 100 + abs(lon)))
    site = O.make_site(lat, lon, height)
    atm = None if pressure is None else O.make_atmosphere(pressure_hpa=pressure)
    jd1, jd2 = erfa.dtf2d("UTC", 2026, 12, 4, 22, 0, 0.0)
    res = _observe(s, jd1, jd2, site, atm, rates=True)
    d_az, d_alt, d_pa = _differences(s, jd1, jd2, site, atm, 0.05)
    keep = np.abs(_unrefracted_altitude(res) - HELD_BELOW_DEG) > 0.02
    sin_z = np.sin(np.radians(res.zenith_distance_deg))
    sin_p = np.cos(np.radians(res.observed_dec_deg))
    far = keep & (res.sun_separation_deg > 5.0)
    assert keep.sum() > 2900 and far.sum() > 2800
    misses = (
        np.abs(res.altitude_rate_arcsec_s - d_alt),
        np.abs(res.azimuth_rate_arcsec_s - d_az) * sin_z,
        np.abs(res.parallactic_angle_rate_arcsec_s - d_pa) * sin_z * sin_p,
    )
    for miss in misses:
        assert miss[keep].max() < 1e-5
        assert miss[far].max() < 2e-6
    # Not trivially small: the Earth's rotation shows (the azimuth's rate times sin z is
    # the motion along the horizon's parallel; the largest altitude rate is omega cos(lat)).
    assert np.abs(res.altitude_rate_arcsec_s).max() == pytest.approx(
        OMEGA * np.cos(np.radians(lat)), rel=0.02, abs=1e-4
    )


@pytest.mark.parametrize(
    "lat, lon, height, pressure",
    [
        (-29.25, -70.73, 2400.0, 760.0),
        (61.5, 24.0, 120.0, 1005.0),
        (0.4, 120.0, 10.0, 0.0),  # refraction off
    ],
)
def test_rates_match_erfa_atco13_differenced(lat, lon, height, pressure):
    """An outside reference for all five rates: pyerfa atco13 (the SOFA observed place:
    azimuth, zenith distance, observed hour angle and declination) at +-0.5 s around the
    instant, differenced, with the same Earth orientation and air, for moving stars at
    epoch J2000.0; the parallactic angle from those by pyerfa hd2pa. What the rates hold
    for the second is the precession-nutation (up to 1.6e-6 arcsec/s), the star's motion and
    the light deflection's change: measured within 9.4e-7 arcsec/s more than 5 deg from the
    Sun. Tolerance 2e-6 arcsec/s of motion on the sky there, 1e-5 nearer, times (1 deg / d)^2
    within a degree of the Sun (longitudes times the cosine of their latitude, the
    parallactic angle times sin z cos dec, as in the test of the places above)."""
    rng = np.random.default_rng(int(abs(lat) * 10))
    n = 1500
    s = _stars(n, seed=int(abs(lon)))
    site = O.make_site(lat, lon, height)
    atm = O.make_atmosphere(pressure_hpa=pressure, temperature_c=8.0, relative_humidity=0.4,
                            wavelength_um=0.55)  # fmt: skip
    jd1, jd2 = 2461378.5, rng.uniform(0.0, 1.0)
    dut, xp_as, yp_as = 0.071, 0.13, 0.38
    stars = (s["ra"], s["dec"], s["px"], s["pmra"], s["pmdec"], s["rv"])
    res = O.observed_places(*stars, 2000.0, jd1, jd2, site, atm, eop_values=(dut, xp_as, yp_as),
                            rates=True)  # fmt: skip
    dec_r = np.radians(s["dec"])
    as_rad = 1.0 / ARCSEC_PER_RAD

    def atco13(dt_s):
        with warnings.catch_warnings():  # "dubious year": beyond the leap-second table
            warnings.simplefilter("ignore", erfa.ErfaWarning)
            aob, zob, hob, dob = erfa.atco13(
                np.radians(s["ra"]), dec_r,
                s["pmra"] * 1e-3 * as_rad / np.cos(dec_r), s["pmdec"] * 1e-3 * as_rad,
                s["px"] / 1000.0, s["rv"], jd1, jd2 + dt_s / 86_400.0, dut,
                np.radians(lon), np.radians(lat), height, xp_as * as_rad, yp_as * as_rad,
                pressure, 8.0, 0.4, 0.55,
            )[:4]  # fmt: skip
        return np.array([aob, zob, hob, dob, erfa.hd2pa(hob, dob, np.radians(lat))])

    after, before = atco13(0.05), atco13(-0.05)
    turn = np.angle(np.exp(1j * (after - before))) * (ARCSEC_PER_RAD / 0.1)  # arcsec/s
    d_az, d_alt, d_pa, d_ha, d_dec = turn[0], -turn[1], turn[4], turn[2], turn[3]
    keep = np.abs(_unrefracted_altitude(res) - HELD_BELOW_DEG) > 0.02
    far = keep & (res.sun_separation_deg > 5.0)
    assert keep.sum() > 1450 and far.sum() > 1400
    sin_z = np.sin(np.radians(res.zenith_distance_deg))
    cos_dec = np.cos(np.radians(res.observed_dec_deg))
    misses = {
        "altitude": np.abs(res.altitude_rate_arcsec_s - d_alt),
        "azimuth": np.abs(res.azimuth_rate_arcsec_s - d_az) * sin_z,
        "parallactic angle": np.abs(res.parallactic_angle_rate_arcsec_s - d_pa) * sin_z * cos_dec,
        "hour angle": np.abs(res.hour_angle_rate_arcsec_s - d_ha) * cos_dec,
        "declination": np.abs(res.observed_dec_rate_arcsec_s - d_dec),
    }
    # Near the Sun its light deflection's change, held, grows as the inverse square of the
    # distance: about 1.7 arcsec x (0.27 deg / d) changing as the Sun moves 0.04 arcsec/s
    # across the stars (7e-5 arcsec/s at the limb, measured 7.4e-5 at 0.28 deg).
    near_sun = 1e-5 * np.maximum(1.0, (1.0 / res.sun_separation_deg) ** 2)
    for name, miss in misses.items():
        assert np.all(miss[keep] < near_sun[keep]), name
        assert miss[far].max() < 2e-6, name
    # The hour angle turns at about the Earth's rate (refraction and aberration aside),
    # which is not the rate of a solar clock: 15.04 arcsec/s, not 15.00.
    assert np.median(res.hour_angle_rate_arcsec_s[far]) == pytest.approx(OMEGA, abs=0.05)
    if pressure > 0.0:  # refraction slows the hour angle low in the sky (common practice
        # in tracking: a star low in the east rises more slowly than sidereal)
        low = keep & (res.altitude_deg > 5.0) & (res.altitude_deg < 20.0)
        assert np.any(np.abs(res.hour_angle_rate_arcsec_s[low] - OMEGA) > 0.01)


def test_rates_match_astropy_altaz_differenced(astropy_with_our_table):
    """An outside reference: astropy's AltAz transform (same Earth-orientation table and
    air) at +-0.5 s, differenced. astropy moves no star in time here (the stars are given
    at the instant, without motion). Measured: within 5e-6 arcsec/s; tolerance 2e-5
    arcsec/s of motion on the sky (astropy's places are within about 1e-6 arcsec of
    ours, and a difference over 1 s carries that)."""
    from astropy import units as u
    from astropy.coordinates import AltAz, EarthLocation, SkyCoord
    from astropy.time import Time, TimeDelta

    rng = np.random.default_rng(41)
    n = 400
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    px = rng.uniform(0.5, 200.0, n)
    lat, lon, h = -24.63, -70.40, 2635.0
    p, tc, rh, wl = 743.0, 12.0, 0.2, 0.65
    t = Time("2025-03-11T03:30:00", scale="utc")
    site = O.make_site(lat, lon, h)
    atm = O.make_atmosphere(p, tc, rh, wl)
    res = O.observed_places(ra, dec, px, 0.0, 0.0, 0.0, t.jyear, t.jd1, t.jd2, site, atm,
                            rates=True)  # fmt: skip
    star = SkyCoord(ra * u.deg, dec * u.deg, distance=(1000.0 / px) * u.pc)
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, h * u.m)

    def altaz(when):
        return star.transform_to(
            AltAz(obstime=when, location=loc, pressure=p * u.hPa, temperature=tc * u.deg_C,
                  relative_humidity=rh, obswl=wl * u.micron)
        )  # fmt: skip

    half = TimeDelta(0.5, format="sec")
    after, before = altaz(t + half), altaz(t - half)
    d_az = _wrap(after.az.deg - before.az.deg) * 3600.0
    d_alt = (after.alt.deg - before.alt.deg) * 3600.0
    keep = np.abs(_unrefracted_altitude(res) - HELD_BELOW_DEG) > 0.02
    sin_z = np.sin(np.radians(res.zenith_distance_deg))
    assert np.abs(res.altitude_rate_arcsec_s - d_alt)[keep].max() < 2e-5
    assert (np.abs(res.azimuth_rate_arcsec_s - d_az) * sin_z)[keep].max() < 2e-5


def test_rates_match_the_closed_forms_of_spherical_astronomy():
    """Without refraction and polar motion, for a direction fixed on the sky, at latitude
    phi, azimuth A (from north through east) and altitude a (standard results, obtained by
    differentiating the hour angle/declination to azimuth/altitude transformation; e.g.
    W. M. Smart, Textbook on Spherical Astronomy, chapter II; quoted from memory):
        da/dt = omega cos(phi) sin(A)
        dA/dt = omega (sin(phi) - cos(phi) cos(A) tan(a))
        dq/dt = -omega cos(phi) cos(A) / cos(a)   (q, the parallactic angle)
        dH/dt = omega, d(delta)/dt = 0            (hour angle and declination)
    omega from the Earth rotation angle (IERS Conventions 2010, eq. 5.15), checked here
    against pyerfa era00 over a day. Tolerance 3e-5 arcsec/s of motion on the sky (what the
    closed forms leave out: aberration's change, up to 2.3e-5 arcsec/s)."""
    # omega: ERA advances by 2 pi x 1.00273781191135448 per UT1 day (era00, to 1e-12).
    turn = erfa.era00(2461000.5, 1.0) - erfa.era00(2461000.5, 0.0)
    assert O.ERA_RATE_RAD_S * 86400.0 % (2 * np.pi) == pytest.approx(turn % (2 * np.pi), abs=1e-12)

    s = _stars(2000, seed=7)
    s.update(px=np.full(2000, np.nan), pmra=0.0, pmdec=0.0, rv=np.nan)
    for lat in (52.0, -33.9, 5.0):
        site = O.make_site(lat, 100.0, 300.0)
        jd1, jd2 = erfa.dtf2d("UTC", 2024, 5, 1, 1, 0, 0.0)
        res = _observe(s, jd1, jd2, site, O.make_atmosphere(pressure_hpa=0.0),
                       eop_values=(0.0, 0.0, 0.0), rates=True)  # fmt: skip
        phi = np.radians(lat)
        az, alt = np.radians(res.azimuth_deg), np.radians(res.altitude_deg)
        sin_z = np.cos(alt)
        alt_rate = OMEGA * np.cos(phi) * np.sin(az)
        az_rate = OMEGA * (np.sin(phi) - np.cos(phi) * np.cos(az) * np.tan(alt))
        pa_rate = -OMEGA * np.cos(phi) * np.cos(az) / np.cos(alt)
        assert np.abs(res.altitude_rate_arcsec_s - alt_rate).max() < 3e-5
        assert (np.abs(res.azimuth_rate_arcsec_s - az_rate) * sin_z).max() < 3e-5
        sin_p = np.cos(np.radians(res.observed_dec_deg))
        assert (np.abs(res.parallactic_angle_rate_arcsec_s - pa_rate) * sin_z * sin_p).max() < 3e-5
        # The hour angle of a fixed direction grows at the Earth's rate; its declination
        # stays (dH/dt = omega, d(delta)/dt = 0).
        assert (np.abs(res.hour_angle_rate_arcsec_s - OMEGA) * sin_p).max() < 3e-5
        assert np.abs(res.observed_dec_rate_arcsec_s).max() < 3e-5


@pytest.mark.parametrize("refraction", [True, False])
def test_refraction_slope_is_the_derivative_of_the_observed_zenith_distance(refraction):
    """_observed_zd_slope against a central difference of the observed zenith distance as
    the answers compute it (SOFA atioq's model, _refract), over zenith distances from the
    zenith to 30 deg below the horizon, through both of atioq's guards. Tolerance 1e-8
    (a difference over 1e-6 rad carries about 1e-10 of rounding and 1e-9 of curvature;
    within 1e-6 rad of the zenith, a tenth of the distance from it)."""
    settings = O.refraction_settings(
        O.make_site(0.0, 0.0, 0.0),
        O.make_atmosphere(pressure_hpa=1013.25 if refraction else 0.0, temperature_c=0.0),
    )
    refa, refb = settings.refa_rad, settings.refb_rad
    zd0 = np.radians(np.concatenate([np.linspace(1e-4, 119.0, 4001), [3e-5, 0.5e-6]]))
    zd0 = zd0[np.abs(np.degrees(zd0) - (90.0 - HELD_BELOW_DEG)) > 1e-3]

    def observed_zd(z0):
        r0, z = np.sin(z0), np.cos(z0)
        f, zaeo, r0, _ = O._refract((-r0, 0.0 * r0, z), refa, refb)
        return np.arctan2(np.abs(f) * r0, zaeo)

    h = np.minimum(1e-6, zd0 / 10.0)
    numeric = (observed_zd(zd0 + h) - observed_zd(zd0 - h)) / (2 * h)
    slope = O._observed_zd_slope(np.sin(zd0), np.cos(zd0), refa, refb)
    assert np.abs(slope - numeric).max() < 1e-8
    if refraction:  # the slope differs from 1 (refraction grows toward the horizon)
        assert slope[np.degrees(zd0) > 80.0].min() < 0.99
    else:
        assert np.abs(slope - 1.0).max() < 1e-15


def test_track_rates_equal_those_of_each_instant_alone():
    """One star at many instants (the general path) and at each instant alone (the block
    path): the same rates, to rounding (1e-9 arcsec/s)."""
    s = _stars(1, seed=3)
    site = O.make_site(38.4127, -7.6543, 1460.0)
    jd2 = 0.5 + np.arange(0.0, 0.5, 0.05)
    track = _observe(s, 2461378.5, jd2, site, rates=True)
    for k, j2 in enumerate(jd2):
        one = _observe(s, 2461378.5, j2, site, rates=True)
        for name in O.RATE_NAMES:
            assert getattr(track, name)[k] == pytest.approx(getattr(one, name)[0], abs=1e-9)


def test_rates_at_the_zenith_and_none_unless_asked():
    site = O.make_site(38.4127, -7.6543, 1460.0)
    jd1, jd2 = erfa.dtf2d("UTC", 2026, 12, 4, 22, 0, 0.0)
    plain = O.observed_places(10.0, 20.0, 1.0, 0.0, 0.0, 0.0, 2016.0, jd1, jd2, site)
    assert plain.azimuth_rate_arcsec_s is None and plain.parallactic_angle_rate_arcsec_s is None
    # The rates at the zenith: tracking_rates on the zenith direction itself, at a latitude
    # of 0.7 rad, with refraction off and on (refa, refb of a sea-level atmosphere, about
    # 58 arcsec and -0.07 arcsec, from memory).
    sphi, cphi = np.sin(0.7), np.cos(0.7)
    axis = O._rotation_axis_aet(0.0, 0.0, sphi, cphi)
    for refa, refb in ((0.0, 0.0), (2.8e-4, -3.3e-7)):
        for az in (0.0, 77.0, 301.0):  # whatever azimuth the answer gives there
            at = O.tracking_rates(az, 0.0, 0.0, axis, sphi, cphi, refa, refb)
            # the azimuth, altitude and parallactic angle have no rate there
            assert not np.any(np.isfinite(at[:3]))
            # the hour angle and declination have: those a nanodegree away (its refraction
            # as atioq's model gives it there, the zenith distance scaled by the slope),
            # which are those of a direction that turns with the Earth (omega and 0) but for
            # the refraction (offsets from the zenith, and their rates, scaled by 1 - refa)
            slope = O._observed_zd_slope(0.0, 1.0, refa, refb)
            refraction = 1e-9 * 3600.0 * (1.0 / slope - 1.0)
            near = O.tracking_rates(az, 1e-9, refraction, axis, sphi, cphi, refa, refb)
            assert at[3] == pytest.approx(near[3], abs=1e-9)
            assert at[4] == pytest.approx(near[4], abs=1e-9)
            # (1 - refa to first order; atioq's model's slope there is 1 - refa / (1 + refa),
            # refa^2 = 7.8e-8 from it)
            assert at[3] == pytest.approx(OMEGA * (1.0 - refa), rel=1e-7) and abs(at[4]) < 1e-9
    # Away from the zenith a nanodegree, all five rates are finite.
    for az in (0.0, 77.0, 301.0):
        rates = O.tracking_rates(az, 1e-9, 0.0, axis, sphi, cphi, 0.0, 0.0)
        assert np.all(np.isfinite(rates))
        assert rates[3] == pytest.approx(OMEGA, abs=1e-9) and abs(rates[4]) < 1e-9


def test_rates_of_many_stars_block_by_block_equal_the_whole_arrays():
    """Many stars at one instant are taken RATES_BLOCK at a time: the same rates as
    tracking_rates on the whole arrays at once (to rounding, 1e-9 arcsec/s)."""
    n = 2 * O.RATES_BLOCK + 123
    s = _stars(n, seed=11)
    site = O.make_site(-29.26, -70.73, 2400.0)
    jd1, jd2 = erfa.dtf2d("UTC", 2026, 12, 4, 3, 0, 0.0)
    res = _observe(s, jd1, jd2, site, rates=True)
    state = O._instant_state_cached(
        O._float_key(jd1), O._float_key(jd2), O._site_key(site),
        O._refr_key(O.refraction_settings(site, None)), O._ByIdentity(O.earth_orientation()),
    )  # fmt: skip
    whole = O.tracking_rates(res.azimuth_deg, res.zenith_distance_deg, res.refraction_arcsec,
                             *state.tracking())  # fmt: skip
    for got, want in zip((getattr(res, name) for name in O.RATE_NAMES), whole, strict=True):
        assert got.shape == (n,)
        assert np.abs(got - want).max() < 1e-9
