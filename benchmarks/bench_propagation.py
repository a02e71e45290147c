"""Core propagation speed against the naive routes, as ratios measured in one run.

1,000,000 random stars, all six parameters out, catalogue epoch J2016.0 to J2116.0:

1. ``service.core.propagation.propagate`` (standard model) against astropy's
   ``SkyCoord.apply_space_motion`` (building the SkyCoord and reading the six parameters
   back included: the route a user would take) and against pyerfa's ``pmsafe`` called once
   on the whole arrays (inputs already in its units: the unit conversions are not charged
   to pyerfa, so that ratio is conservative).
2. The same with the full 6x6 covariance propagated: stars per second per core.

Times are the best of a few repetitions. Both wall-clock and CPU time of this process are
printed; ratios use CPU time, which is less disturbed by other load on a shared machine
(numpy's elementwise work here is single-threaded, so CPU time is time on one core).

Run: ``python -m benchmarks.run propagation`` (or ``python -m benchmarks.bench_propagation``).
"""

from __future__ import annotations

import time
import warnings

import numpy as np

N_STARS = 1_000_000
EPOCH_FROM = 2016.0
EPOCH_TO = 2116.0
REPEATS = 5
#: Targets from the project's issue tracker (printed beside the measured ratios).
TARGET_VS_ASTROPY = 5.0
TARGET_VS_PMSAFE = 2.0
TARGET_STARS_PER_CPU_S = 1_000_000


def random_catalogue(n: int, seed: int = 2016):
    """Catalogue-like random stars: uniform on the sky, parallaxes 0.1 to 100 mas (positive,
    so that astropy accepts them), velocity components of 40 km/s dispersion."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    plx = 10 ** rng.uniform(-1.0, 2.0, n)
    # Proper motion from transverse velocity: mu = v_t plx / A (A = 4.74047 km/s per au/yr).
    pma, pmd = rng.normal(0.0, 40.0, (2, n)) * plx / 4.740470463533348
    rv = rng.normal(0.0, 40.0, n)
    sig = np.array([0.05, 0.04, 0.06, 0.07, 0.05, 1.0])
    g = rng.normal(size=(n, 6, 6)) / np.sqrt(6.0)
    corr_like = g @ np.swapaxes(g, -1, -2)
    d = np.sqrt(np.einsum("nii->ni", corr_like))
    cov = corr_like / (d[:, :, None] * d[:, None, :]) * np.outer(sig, sig)
    return ra, dec, plx, pma, pmd, rv, cov


def best_time(fn, repeats: int = REPEATS):
    """(best wall s, best CPU s, last result) over ``repeats`` calls."""
    wall = cpu = float("inf")
    result = None
    for _ in range(repeats):
        w0, c0 = time.perf_counter(), time.process_time()
        result = fn()
        wall = min(wall, time.perf_counter() - w0)
        cpu = min(cpu, time.process_time() - c0)
    return wall, cpu, result


def warn_free(fn, *args):
    """Call ``fn`` with ERFA's warnings silenced: pmsafe (also inside astropy) warns when it
    replaces a small parallax, which does not matter for timing."""
    import erfa

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", erfa.ErfaWarning)
        return fn(*args)


def main() -> None:
    import astropy.units as u
    import erfa
    from astropy.coordinates import Distance, SkyCoord
    from astropy.time import Time
    from astropy.utils import iers

    from service.core.constants import MAS_PER_RAD
    from service.core.propagation import propagate

    iers.conf.auto_download = False
    n = N_STARS
    ra, dec, plx, pma, pmd, rv, cov = random_catalogue(n)

    def core():
        res = propagate(ra, dec, plx, pma, pmd, rv, EPOCH_FROM, EPOCH_TO)
        return res.astrometry

    def core_cov():
        return propagate(ra, dec, plx, pma, pmd, rv, EPOCH_FROM, EPOCH_TO, covariance=cov)

    t_from = Time(EPOCH_FROM, format="jyear", scale="tdb")
    t_to = Time(EPOCH_TO, format="jyear", scale="tdb")

    def with_astropy():
        return warn_free(_with_astropy)

    def _with_astropy():
        c = SkyCoord(
            ra=ra * u.deg,
            dec=dec * u.deg,
            distance=Distance(parallax=plx * u.mas),
            pm_ra_cosdec=pma * u.mas / u.yr,
            pm_dec=pmd * u.mas / u.yr,
            radial_velocity=rv * u.km / u.s,
            obstime=t_from,
        )
        m = c.apply_space_motion(new_obstime=t_to)
        return (
            m.ra.deg,
            m.dec.deg,
            m.distance.parallax.to_value(u.mas),
            m.pm_ra_cosdec.to_value(u.mas / u.yr),
            m.pm_dec.to_value(u.mas / u.yr),
            m.radial_velocity.to_value(u.km / u.s),
        )

    dec_rad = np.radians(dec)
    pm_args = (
        np.radians(ra),
        dec_rad,
        pma / MAS_PER_RAD / np.cos(dec_rad),
        pmd / MAS_PER_RAD,
        plx / 1000.0,
        rv,
        *erfa.epj2jd(EPOCH_FROM),
        *erfa.epj2jd(EPOCH_TO),
    )

    def with_pmsafe():
        return warn_free(erfa.pmsafe, *pm_args)

    print(
        f"{n:,} stars, J{EPOCH_FROM} -> J{EPOCH_TO}, six parameters out; best of {REPEATS} "
        "(pmsafe 3, astropy 1)"
    )
    w_core, c_core, ast = best_time(core)
    w_pms, c_pms, pms = best_time(with_pmsafe, repeats=3)
    w_ast, c_ast, apy = best_time(with_astropy, repeats=1)
    w_cov, c_cov, _ = best_time(core_cov)

    # Sanity: the routes agree. astropy's apply_space_motion calls pmsafe, so both differ
    # from the standard model by the light-time terms only.
    for name, ra2, dec2 in (
        ("astropy", apy[0], apy[1]),
        ("pmsafe", np.degrees(pms[0]), np.degrees(pms[1])),
    ):
        cosd = np.cos(np.radians(dec2))
        dra = ((ast.ra_deg - ra2 + 180.0) % 360.0 - 180.0) * cosd
        sep_mas = np.hypot(dra, ast.dec_deg - dec2) * 3.6e6
        print(f"  check: core vs {name}: positions differ by at most {sep_mas.max():.3g} mas")

    rows = [
        ("core propagate, standard", w_core, c_core),
        ("pyerfa pmsafe (whole arrays)", w_pms, c_pms),
        ("astropy SkyCoord.apply_space_motion", w_ast, c_ast),
        ("core propagate + 6x6 covariance", w_cov, c_cov),
    ]
    print(f"  {'route':40s} {'wall s':>8s} {'CPU s':>8s}")
    for name, w, c in rows:
        print(f"  {name:40s} {w:8.3f} {c:8.3f}")
    r_ast = c_ast / c_core
    r_pms = c_pms / c_core
    rate = n / c_cov
    print(f"  ratio astropy / core (CPU): {r_ast:6.1f}x   (target >= {TARGET_VS_ASTROPY:g}x)")
    print(f"  ratio pmsafe / core (CPU):  {r_pms:6.1f}x   (target >= {TARGET_VS_PMSAFE:g}x)")
    print(
        f"  with covariance: {rate:,.0f} stars per CPU second "
        f"(target >= {TARGET_STARS_PER_CPU_S:,}); wall: {n / w_cov:,.0f} stars/s"
    )


if __name__ == "__main__":
    main()
