"""Observed place of many stars at one site and instant: the core against astropy's AltAz.

Run: ``PYTHONPATH=. python -m benchmarks.bench_observed`` (prints times and ratios).

Figures: the core with the outputs astropy's AltAz gives (azimuth, altitude; plus our
refraction, airmass, Sun separation and flags), the core with all observed quantities (hour
angle, observed declination and RA, parallactic angle too), with the tracking rates too
(what asking for them costs, as a ratio to the same call without), and with the geocentric
places as well. Both sides get the same stars (ICRS positions with parallax, at the
instant, no proper motion, since astropy's AltAz transform does not apply space motion), the
same site, the same atmosphere and the same Earth-orientation table. Each figure is the best
of several interleaved runs, so that load from other processes affects both sides alike.

Fairness: astropy recomputes its star-independent work (Earth position and velocity,
precession-nutation, Earth rotation, refraction constants) in every call, so every timed
call of ours starts with the core's caches of that work emptied (the per-instant state, the
precession-nutation nodes and the refraction constants, :func:`_forget_instants`): both sides
do all of it in every timed call. The Earth-orientation table is read once by both sides.
"""

from __future__ import annotations

import time
import warnings

import numpy as np


def _setup(n, seed=2016):
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    parallax = rng.uniform(0.2, 200.0, n)
    return ra, dec, parallax


def _forget_instants():
    """Empty the core's caches of star-independent work (see the module docstring)."""
    from service.core import observed

    for cached in (
        observed._instant_state_cached,
        observed._cip_node,
        observed._refraction_settings_cached,
        observed._refco_cached,
    ):
        cached.cache_clear()


def _best(func, repeats):
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


def main(n: int = 100_000, repeats: int = 15) -> dict:
    from astropy import units as u
    from astropy.coordinates import AltAz, EarthLocation, SkyCoord
    from astropy.time import Time
    from astropy.utils import iers

    from service.core import observed

    iers.conf.auto_download = False
    eop = observed.earth_orientation()
    table = iers.IERS_A.open(eop.primary.path)
    ra, dec, parallax = _setup(n)
    site = observed.make_site(-24.6, -70.4, 2600.0)
    atm = observed.make_atmosphere(745.0, 8.0, 0.2, 0.6)
    instant = Time("2025-03-20T04:00:00", scale="utc")
    location = EarthLocation.from_geodetic(
        site.longitude_deg * u.deg, site.latitude_deg * u.deg, site.height_m * u.m
    )
    frame = AltAz(
        obstime=instant,
        location=location,
        pressure=atm.pressure_hpa * u.hPa,
        temperature=atm.temperature_c * u.deg_C,
        relative_humidity=atm.relative_humidity,
        obswl=atm.wavelength_um * u.micron,
    )
    epoch = float(instant.tt.jyear)

    def ours(geocentric, hour_angle=True, rates=False):
        _forget_instants()
        return observed.observed_places(
            ra, dec, parallax, 0.0, 0.0, 0.0, epoch, instant.jd1, instant.jd2, site, atm,
            eop=eop, geocentric=geocentric, hour_angle=hour_angle, rates=rates,
        )  # fmt: skip

    def theirs():
        # The naive route from arrays to arrays: build the SkyCoord, transform, read out.
        stars = SkyCoord(ra * u.deg, dec * u.deg, distance=(1000.0 / parallax) * u.pc)
        altaz = stars.transform_to(frame)
        return altaz.az.deg, altaz.alt.deg

    def naive_erfa():
        # atco13 on arrays redoes the star-independent work for every star (the naive erfa
        # route); timed on the first n_erfa stars and scaled to n.
        import erfa

        ut1 = observed.earth_orientation_at(instant.jd1, instant.jd2, eop)
        k = slice(0, n_erfa)
        return erfa.atco13(
            np.radians(ra[k]), np.radians(dec[k]), 0.0, 0.0, parallax[k] / 1000.0, 0.0,
            instant.jd1, instant.jd2, ut1.ut1_utc_s, np.radians(site.longitude_deg),
            np.radians(site.latitude_deg), site.height_m, ut1.pm_x_arcsec / 206264.806,
            ut1.pm_y_arcsec / 206264.806, atm.pressure_hpa, atm.temperature_c,
            atm.relative_humidity, atm.wavelength_um,
        )  # fmt: skip

    n_erfa = min(n, 2000)
    with iers.earth_orientation_table.set(table), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        theirs()
        ours(False)
        t_obs = t_all = t_astropy = t_erfa = t_altaz = t_rates = float("inf")
        for _ in range(repeats):
            t_altaz = min(t_altaz, _best(lambda: ours(False, False), 1))
            t_obs = min(t_obs, _best(lambda: ours(False), 1))
            t_rates = min(t_rates, _best(lambda: ours(False, rates=True), 1))
            t_astropy = min(t_astropy, _best(theirs, 1))
            t_all = min(t_all, _best(lambda: ours(True), 1))
            t_erfa = min(t_erfa, _best(naive_erfa, 1) * n / n_erfa)
        check = theirs()
        mine = ours(False)
    dalt = np.abs(mine.altitude_deg - check[1]) * 3.6e6
    out = {
        "stars": n,
        "core_altaz_refraction_safety_s": t_altaz,
        "core_observed_s": t_obs,
        "core_observed_and_geocentric_s": t_all,
        "core_observed_with_rates_s": t_rates,
        "astropy_altaz_s": t_astropy,
        "erfa_atco13_per_star_s_scaled": t_erfa,
        "ratio_altaz_outputs_vs_astropy": t_astropy / t_altaz,
        "ratio_observed_vs_astropy": t_astropy / t_obs,
        "ratio_all_places_vs_astropy": t_astropy / t_all,
        "ratio_observed_vs_erfa_atco13": t_erfa / t_obs,
        "ratio_with_rates_vs_without": t_rates / t_obs,
        "max_altitude_difference_mas": float(dalt.max()),
    }
    for key, val in out.items():
        print(f"{key:36s} {val:.4g}" if isinstance(val, float) else f"{key:36s} {val}")
    return out


if __name__ == "__main__":
    main()
