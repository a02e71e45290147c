"""Astrometric, apparent and observed places at a site, with Earth orientation and safety.

From catalogue astrometry (ICRS at a catalogue epoch) to where a telescope must point at a
site and instant, following the IAU 2006/2000A models as the SOFA routines implement them:
the star-independent quantities of ``apco13`` (Earth position and velocity, precession
-nutation, Earth rotation, polar motion, refraction constants; :func:`star_independent`)
and the per-star chain of ``atciq`` (space motion and parallax, light deflection by the Sun,
aberration, to CIRS) and ``atioq`` (CIRS to hour angle, azimuth and refracted altitude),
carried out here in numpy for many stars at once (Note 1 of :func:`observed_places`).

Earth orientation (UT1-UTC and polar motion) comes from the IERS tables packaged with
astropy-iers-data, read with ``astropy.utils.iers`` with downloads switched off, loaded once
and cached; an operator may point at a newer finals2000A file (:func:`earth_orientation`).

Safety figures (Sun altitude, Sun-target separation, altitude against a horizon limit) are
advisory only: the facility's own interlocks and safety rules decide whether a telescope may
point somewhere.
"""

from __future__ import annotations

import difflib
import enum
import functools
import math
import os
import sys
import types
from dataclasses import dataclass, field

import erfa
import numpy as np
from erfa import ufunc as erfa_ufunc

from service.core.angles import atan2_into, latitude_into, wrap_two_pi
from service.core.constants import ARCSEC_PER_RAD as _ARCSEC_PER_RAD
from service.core.constants import (
    AU_M,
    AU_PER_JULIAN_YEAR_KM_S,
    C_KM_S,
    DEG_PER_RAD,
    GM_SUN_M3_S2,
    MAS_PER_RAD,
    RAD_PER_DEG,
)
from service.core.floating import overflow_to_infinity

# ---------------------------------------------------------------------------------------------
# Constants of this module
# ---------------------------------------------------------------------------------------------

#: Schwarzschild radius of the Sun, au (2 G M_sun / c^2; SOFA ``ERFA_SRS``).
SCHWARZSCHILD_RADIUS_SUN_AU = 1.97412574336e-8

#: Light time for one au, Julian years (SOFA ERFA_AULT = au/c = 499.004783836 s).
LIGHT_TIME_AU_YR = 149_597_870_700.0 / 299_792_458.0 / 86_400.0 / 365.25

TWO_PI = 2.0 * np.pi

#: SOFA ``atioq`` refraction guards: minimum cos(altitude) and sin(altitude) used in the
#: tan z model (``CELMIN``, ``SELMIN`` of atioq), dimensionless.
ATIOQ_CELMIN = 1e-6
ATIOQ_SELMIN = 0.05

#: US Standard Atmosphere 1976 (NOAA/NASA/USAF, 1976), troposphere layer (0-11 km
#: geopotential): sea-level pressure (hPa), temperature (K), lapse rate (K per geopotential
#: metre), g0 (m/s^2), molar mass of air (kg/mol), gas constant R* (J/(mol K)), and the Earth
#: radius used for geopotential height (m). Equations 18 and 33a of the 1976 document.
USSA1976_P0_HPA = 1013.25
USSA1976_T0_K = 288.15
USSA1976_LAPSE_K_PER_M = -0.0065
USSA1976_G0_M_S2 = 9.80665
USSA1976_M0_KG_MOL = 0.0289644
USSA1976_RSTAR_J_MOL_K = 8.31432
USSA1976_R0_M = 6_356_766.0
USSA1976_TROPOPAUSE_M = 11_000.0

#: Default Sun avoidance angle, degrees. A PLACEHOLDER: the operator must set the facility's
#: own figure. Advisory only.
DEFAULT_SUN_AVOIDANCE_DEG = 30.0

#: Default horizon limit for the target's observed altitude, degrees (geometric horizon).
DEFAULT_HORIZON_LIMIT_DEG = 0.0

#: Supported span of observation instants, Julian epochs of the UTC date (2000 + (UTC JD -
#: 2451545) / 365.25): UTC is defined from 1960, and the Earth ephemeris of SOFA epv00 (used
#: by apco13) is valid 1900-2100 AD.
SUPPORTED_EPOCH_MIN = 1960.0
SUPPORTED_EPOCH_MAX = 2100.0
#: The supported span in words (Julian epochs begin at noon: 1960.0 is 1960-01-01T12:00).
SUPPORTED_SPAN_TEXT = (
    f"must lie between {SUPPORTED_EPOCH_MIN:.0f}-01-01T12:00 and "
    f"{SUPPORTED_EPOCH_MAX:.0f}-01-01T12:00 UTC, the end excluded"
)

#: Supported wavelength ranges for refraction, micrometres: optical/IR 0.3-2.0 (SOFA refco
#: model tested 0.4-2 um, Note 2 of refco) and radio 100 um - 1 m (refco radio case).
WAVELENGTH_OPTICAL_UM = (0.3, 2.0)
WAVELENGTH_RADIO_UM = (100.0, 1.0e6)

#: Accepted site height range, metres; pressure range, hPa; temperature range, deg C (SOFA
#: refco clamps temperature to -150..200 C; we refuse values outside a plausible range).
HEIGHT_RANGE_M = (-500.0, 10_000.0)
PRESSURE_RANGE_HPA = (0.0, 1_200.0)
TEMPERATURE_RANGE_C = (-100.0, 60.0)

#: Pressure a site's real air can have, as fractions of the US Standard Atmosphere 1976
#: pressure at its height; a given pressure outside is flagged PRESSURE_IMPLAUSIBLE (not
#: refused). The recorded sea-level extremes are 870 hPa (Typhoon Tip, 1979) and 1083.8 hPa
#: (Agata, 1968; 1089.1 hPa reduced from 846.5 hPa at 1,725 m, Tosontsengel, 2004), WMO
#: Archive of Weather and Climate Extremes (from memory, checked against a copy of its
#: pages): 0.859 to 1.075 of 1013.25 hPa. Mountain air stays within that spread of the
#: standard pressure: Tosontsengel's 846.5 hPa is 1.03 of it, the 337 hPa measured on the
#: summit of Everest 1.07 (West et al. 1983, J. Appl. Physiol. 54, 1188; from memory). The
#: band leaves room on each side: its lower end lies between the lowest real air (0.859)
#: and the highest air given in mmHg as if hPa (1089.1 / 1.333224 / 1013.25 = 0.806).
PRESSURE_PLAUSIBLE_FRACTION = (0.83, 1.15)

#: Units a pressure given as hPa may really be in, hPa per unit: kilopascal (SI), standard
#: atmosphere (exact by definition), conventional inch and millimetre of mercury (NIST
#: SP 811, 2008 edition, Appendix B.8: 3.386389e3 Pa and 1.333224e2 Pa). Pascals need no
#: entry: any real pressure in Pa exceeds PRESSURE_RANGE_HPA and is refused with a hint.
PRESSURE_UNITS_HPA = {"kPa": 10.0, "atm": 1013.25, "inHg": 33.8639, "mmHg": 1.333224}

#: Default atmosphere when not given: relative humidity (0-1) and wavelength (um).
DEFAULT_RELATIVE_HUMIDITY = 0.5
DEFAULT_WAVELENGTH_UM = 0.55

#: Uncertainty assumed for UT1-UTC, seconds, by source: final (IERS B / C04) and rapid
#: (IERS A measured) values (common practice, order of magnitude); unavailable values are
#: taken as zero and |UT1-UTC| < 0.9 s by the definition of UTC (ITU-R TF.460-6).
UT1_SIGMA_FINAL_S = 2e-5
UT1_SIGMA_RAPID_S = 1e-4
UT1_SIGMA_UNAVAILABLE_S = 0.9

#: IERS Bulletin A prediction accuracy, printed in every issue under "PREDICTIONS": "The
#: accuracy may be estimated from the expressions: S x,y = 0.00068 (MJD-MJD0)**0.80
#: S t = 0.00025 (MJD-MJD0)**0.75", MJD0 the issue's last day of combined (measured) values;
#: S x,y in arcsec holds for each pole coordinate, x and y alike, S t in seconds for UT1-UTC
#: (IERS Bulletin A Vol. XXVI No. 036, 5 September 2013, MJD0 = 56540; the same expressions
#: in the 2023 and 2024 issues, MJD0 = 60180 and 60411). The issues tabulate them: polar
#: coordinates 0.004, 0.007, 0.010, 0.013 arcsec and UT1-UTC 0.0014, 0.0024, 0.0032, 0.0040 s
#: at 10, 20, 30, 40 days.
BULLETIN_A_UT1_COEFF_S = 0.00025
BULLETIN_A_UT1_POWER = 0.75
BULLETIN_A_POLE_COEFF_ARCSEC = 0.00068  # per coordinate (x or y), not the pole position
BULLETIN_A_POLE_POWER = 0.80

#: Polar motion uncertainty, arcsec, per coordinate (x or y), by source: final (IERS B / C04;
#: common practice, order of magnitude) and rapid (IERS A measured; Bulletin A prints
#: 0.00009 to 0.00010 arcsec in its x and y error columns). The pole position error is the
#: two coordinates' errors in quadrature (:func:`pole_position_sigma_arcsec`).
POLE_SIGMA_FINAL_ARCSEC = 5e-5
POLE_SIGMA_RAPID_ARCSEC = 1e-4

#: Pole position error bound, arcsec, where no table answers and the pole is taken as zero:
#: the largest distance of the pole from the reference origin in the IERS C04 series packaged
#: here, 1962 onwards, is 0.600 arcsec (x = 0.066, y = 0.596 arcsec on MJD 50235, 1996;
#: eopc04.1962-now of astropy-iers-data).
POLE_SIGMA_UNAVAILABLE_ARCSEC = 0.6

#: Earth rotation, arcsec of sky per second of UT1 (360 deg in one sidereal day, ~15.04).
ARCSEC_PER_UT1_SECOND = 15.04107

#: Accuracy classes of the observed place implied by the Earth-orientation data, by the
#: estimated pointing error (arcsec): below the first bound "milliarcsecond", below the
#: second "sub_arcsecond", else "arcseconds".
ACCURACY_CLASS_BOUNDS_ARCSEC = (0.01, 1.0)

#: Environment variable with an operator-supplied finals2000A-format file.
EOP_PATH_ENV = "SKYDRIFT_EOP_FILE"


class ObservedInputError(ValueError):
    """Invalid request-level input (site, atmosphere, instant); ``field`` names it."""

    def __init__(self, field: str, message: str):
        super().__init__(f"{field}: {message}")
        self.field = field
        self.message = message


class ObservedFlag(enum.IntFlag):
    """Per-star, per-instant flags of an observed-place computation."""

    #: Parallax missing: star treated as infinitely distant (no parallax shift).
    PARALLAX_MISSING = 1
    #: Parallax zero or negative: treated as infinitely distant.
    PARALLAX_NOT_POSITIVE = 2
    #: Radial velocity missing: taken as zero (no perspective acceleration).
    RADIAL_VELOCITY_MISSING = 4
    #: Proper motion missing: taken as zero.
    PROPER_MOTION_MISSING = 8
    #: Target's observed altitude below the configured horizon limit (advisory).
    BELOW_HORIZON_LIMIT = 16
    #: Target closer to the Sun than the configured avoidance angle (advisory).
    WITHIN_SUN_AVOIDANCE = 32
    #: The Sun's centre above the horizon at the site: its observed (refracted) altitude
    #: above 0 (its upper limb is up a few minutes before and after).
    SUN_ABOVE_HORIZON = 64
    #: UT1-UTC / polar motion from IERS predictions, not measurements.
    EARTH_ORIENTATION_PREDICTED = 128
    #: Instant outside the Earth-orientation tables: UT1-UTC and polar motion taken as zero.
    EARTH_ORIENTATION_UNAVAILABLE = 256
    #: Instant beyond the leap-second table's validity: TAI-UTC taken as its last value.
    LEAP_SECONDS_EXTRAPOLATED = 512
    #: Target below the geometric horizon: airmass undefined (NaN).
    AIRMASS_UNDEFINED = 1024
    #: Refraction on and the observed altitude below REFRACTION_UNCERTAIN_BELOW_DEG, where
    #: the refraction model is good only to arcminutes (SOFA atioq, Note 2); below the
    #: horizon, where no refraction is seen, the model still raises the place by up to its
    #: value held at 2.9 deg altitude (:func:`_refraction_change`).
    REFRACTION_UNCERTAIN = 2048
    #: Given pressure outside PRESSURE_PLAUSIBLE_FRACTION of the standard atmosphere's at
    #: the site height (probably a unit mistake); used as given (:func:`pressure_warning`).
    PRESSURE_IMPLAUSIBLE = 4096


# Plain-int copies of the flag bits for the inner loops (enum attribute access is slow).
_F_MISSING_PARALLAX = int(ObservedFlag.PARALLAX_MISSING)
_F_NON_POSITIVE_PARALLAX = int(ObservedFlag.PARALLAX_NOT_POSITIVE)
_F_MISSING_RADIAL_VELOCITY = int(ObservedFlag.RADIAL_VELOCITY_MISSING)
_F_MISSING_PROPER_MOTION = int(ObservedFlag.PROPER_MOTION_MISSING)
_F_BELOW_HORIZON_LIMIT = int(ObservedFlag.BELOW_HORIZON_LIMIT)
_F_WITHIN_SUN_AVOIDANCE = int(ObservedFlag.WITHIN_SUN_AVOIDANCE)
_F_AIRMASS_UNDEFINED = int(ObservedFlag.AIRMASS_UNDEFINED)
_F_REFRACTION_UNCERTAIN = int(ObservedFlag.REFRACTION_UNCERTAIN)

#: Observed altitude (deg) below which refraction is flagged uncertain. SOFA atioq (Note 2)
#: states the A tan z + B tan^3 z model good to 0.05 arcsec (optical) below 70 deg zenith
#: distance, 30 arcsec at 85 deg and only 20 arcmin (optical) or 30 arcmin (radio) at the
#: horizon; below about 2.9 deg altitude it holds the refraction at its value there
#: (sin(altitude) floored at 0.05), some 18 arcmin short of Bennett's (1982) formula at
#: 0.5 deg.
REFRACTION_UNCERTAIN_BELOW_DEG = 5.0


class EarthOrientationStatus(enum.IntEnum):
    """Source of the UT1-UTC and polar motion values of one instant."""

    MEASURED_FINAL = 0  # IERS B / EOP C04 values (or B values inside finals2000A)
    MEASURED_RAPID = 1  # IERS A (Bulletin A) measured values
    PREDICTED = 2  # IERS A predictions
    UNAVAILABLE = 3  # outside the tables: UT1-UTC and polar motion taken as zero


#: Plain words for each status, as used in responses.
STATUS_WORDS = {
    EarthOrientationStatus.MEASURED_FINAL: "measured",
    EarthOrientationStatus.MEASURED_RAPID: "measured",
    EarthOrientationStatus.PREDICTED: "predicted",
    EarthOrientationStatus.UNAVAILABLE: "unavailable",
}


# ---------------------------------------------------------------------------------------------
# Earth orientation tables
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class EarthOrientationTable:
    """UT1-UTC and polar motion on daily nodes, with the source of each node.

    Attributes
    ----------
    name : str
        Table description, e.g. ``IERS-A finals2000A.all``.
    path : str
        File the values were read from.
    mjd : ndarray
        Node dates, MJD (UTC).
    ut1_utc_s : ndarray
        UT1-UTC at the nodes, seconds.
    pm_x_arcsec, pm_y_arcsec : ndarray
        Polar motion at the nodes, arcsec.
    status : ndarray of int
        :class:`EarthOrientationStatus` per node (UT1-UTC source).
    last_measured_mjd : float
        Last node with a measured (not predicted) UT1-UTC value.
    ut1_sigma_s, pole_sigma_arcsec : ndarray or None
        The table's own uncertainty of UT1-UTC and of the pole (the two components' errors
        in quadrature) at the nodes, seconds and arcsec; None where the table gives none.
    """

    name: str
    path: str
    mjd: np.ndarray
    ut1_utc_s: np.ndarray
    pm_x_arcsec: np.ndarray
    pm_y_arcsec: np.ndarray
    status: np.ndarray
    last_measured_mjd: float
    ut1_sigma_s: np.ndarray | None = None
    pole_sigma_arcsec: np.ndarray | None = None

    @functools.cached_property
    def node_values(self) -> np.ndarray:
        """(nodes, 3): UT1-UTC, pm_x, pm_y per node (one array, for interpolation)."""
        out = np.stack([self.ut1_utc_s, self.pm_x_arcsec, self.pm_y_arcsec], axis=-1)
        out.setflags(write=False)
        return out

    @functools.cached_property
    def interval_sigmas(self) -> np.ndarray | None:
        """(nodes, 2): for the interval between nodes i - 1 and i, the larger of the two
        nodes' UT1-UTC and pole uncertainties, 0 where the table gives none (NaN counted
        as none); row 0 is unused. None where the table has no uncertainties."""
        if self.ut1_sigma_s is None or self.pole_sigma_arcsec is None:
            return None
        out = np.zeros((len(self.mjd), 2))
        for col, sig in enumerate((self.ut1_sigma_s, self.pole_sigma_arcsec)):
            out[1:, col] = np.nan_to_num(np.fmax(sig[:-1], sig[1:]), nan=0.0)
        out.setflags(write=False)
        return out

    @property
    def first_mjd(self) -> float:
        return float(self.mjd[0])

    @property
    def last_mjd(self) -> float:
        return float(self.mjd[-1])


def _configure_astropy_offline():
    """astropy.utils.iers, configured never to download (service.core.offline)."""
    from astropy.utils import iers

    from service.core import offline  # noqa: F401  (configures astropy on import)

    return iers


def _read_finals2000a(path: str) -> EarthOrientationTable:
    iers = _configure_astropy_offline()
    t = iers.IERS_A.open(path)
    flags = np.asarray(t["UT1Flag"]).astype(str)
    status = np.where(
        flags == "B",
        EarthOrientationStatus.MEASURED_FINAL,
        np.where(
            flags == "I", EarthOrientationStatus.MEASURED_RAPID, EarthOrientationStatus.PREDICTED
        ),
    ).astype(int)
    mjd = np.asarray(t["MJD"].value, dtype=float)
    measured = status != EarthOrientationStatus.PREDICTED
    return EarthOrientationTable(
        name=f"IERS-A {os.path.basename(path)}",
        path=path,
        mjd=mjd,
        ut1_utc_s=np.asarray(t["UT1_UTC"].to_value("s"), dtype=float),
        pm_x_arcsec=np.asarray(t["PM_x"].to_value("arcsec"), dtype=float),
        pm_y_arcsec=np.asarray(t["PM_y"].to_value("arcsec"), dtype=float),
        status=status,
        last_measured_mjd=float(mjd[measured][-1]) if measured.any() else float(mjd[0]),
        ut1_sigma_s=np.asarray(t["e_UT1_UTC_A"].to_value("s"), dtype=float),
        pole_sigma_arcsec=np.hypot(
            np.asarray(t["e_PM_x_A"].to_value("arcsec"), dtype=float),
            np.asarray(t["e_PM_y_A"].to_value("arcsec"), dtype=float),
        ),
    )


def _read_iers_b(path: str) -> EarthOrientationTable:
    iers = _configure_astropy_offline()
    t = iers.IERS_B.open(path)
    mjd = np.asarray(t["MJD"].value, dtype=float)
    return EarthOrientationTable(
        name=f"IERS-B {os.path.basename(path)}",
        path=path,
        mjd=mjd,
        ut1_utc_s=np.asarray(t["UT1_UTC"].to_value("s"), dtype=float),
        pm_x_arcsec=np.asarray(t["PM_x"].to_value("arcsec"), dtype=float),
        pm_y_arcsec=np.asarray(t["PM_y"].to_value("arcsec"), dtype=float),
        status=np.full(mjd.shape, int(EarthOrientationStatus.MEASURED_FINAL)),
        last_measured_mjd=float(mjd[-1]),
        ut1_sigma_s=np.asarray(t["e_UT1_UTC"].to_value("s"), dtype=float),
        pole_sigma_arcsec=np.hypot(
            np.asarray(t["e_PM_x"].to_value("arcsec"), dtype=float),
            np.asarray(t["e_PM_y"].to_value("arcsec"), dtype=float),
        ),
    )


@dataclass(frozen=True)
class EarthOrientation:
    """The tables in use: a primary finals2000A table and the IERS-B table before it."""

    primary: EarthOrientationTable
    fallback: EarthOrientationTable | None
    leap_second_expiry_mjd: float

    @functools.cached_property
    def table_names(self) -> np.ndarray:
        """Names by the index :func:`earth_orientation_at` keeps: primary, none, fallback."""
        return np.array(
            [self.primary.name, "none", self.fallback.name if self.fallback is not None else "none"]
        )

    def describe(self) -> dict:
        """Provenance for responses: table names, files, spans and leap-second expiry."""
        out = {
            "primary_table": self.primary.name,
            "primary_span_mjd": [self.primary.first_mjd, self.primary.last_mjd],
            "last_measured_mjd": self.primary.last_measured_mjd,
            "leap_seconds_valid_until_mjd": self.leap_second_expiry_mjd,
        }
        if self.fallback is not None:
            out["fallback_table"] = self.fallback.name
            out["fallback_span_mjd"] = [self.fallback.first_mjd, self.fallback.last_mjd]
        return out


@functools.lru_cache(maxsize=4)
def earth_orientation(path: str | None = None) -> EarthOrientation:
    """Load the Earth-orientation and leap-second tables once (cached per path).

    Parameters
    ----------
    path : str, optional
        A finals2000A-format file (IERS Rapid Service/Prediction Centre) to use instead of
        the one packaged with astropy-iers-data; default: the environment variable
        ``SKYDRIFT_EOP_FILE`` if set, else the packaged file (Note 1).

    Returns
    -------
    EarthOrientation

    Notes
    -----
    1. Nothing is ever downloaded: ``astropy.utils.iers.conf.auto_download`` is switched off
       and only the named or packaged files are read. The packaged IERS-B (EOP C04) table
       answers dates before the start of the finals2000A table.
    2. ERFA's leap-second table is replaced by the one packaged with astropy-iers-data
       (``service.core.offline.leap_second_table``), so that UTC->TAI is right up to that
       file's expiry date.
    """
    iers = _configure_astropy_offline()
    if path is None:
        path = os.environ.get(EOP_PATH_ENV) or iers.IERS_A_FILE
    primary = _read_finals2000a(path)
    fallback = _read_iers_b(iers.IERS_B_FILE)
    from service.core.offline import leap_second_expiry_mjd

    return EarthOrientation(primary, fallback, leap_second_expiry_mjd())


def no_earth_orientation() -> EarthOrientation:
    """Placeholder tables with no usable node, for a service whose tables cannot be read.

    Every instant falls outside them, so UT1-UTC and polar motion are taken as zero and each
    answer carries EarthOrientationStatus.UNAVAILABLE (see :func:`earth_orientation_at`).
    """
    node = np.array([-1.0e9, -1.0e9 + 1.0])  # MJD: long before any instant asked for
    table = EarthOrientationTable(
        name="none (Earth-orientation tables could not be read)",
        path="",
        mjd=node,
        ut1_utc_s=np.zeros(2),
        pm_x_arcsec=np.zeros(2),
        pm_y_arcsec=np.zeros(2),
        status=np.full(2, int(EarthOrientationStatus.UNAVAILABLE)),
        last_measured_mjd=float(node[0]),
    )
    try:
        from service.core.offline import leap_second_expiry_mjd

        expiry_mjd = leap_second_expiry_mjd()
    except Exception:  # the leap-second file may be what is broken
        expiry_mjd = float("inf")
    return EarthOrientation(table, None, expiry_mjd)


def _interval(table: EarthOrientationTable, mjd_int):
    """(i, i1): the count of the table's nodes at or before each day (``searchsorted``),
    and the later node of the interval each day falls in (the first or last interval
    outside the table)."""
    i = np.searchsorted(table.mjd, mjd_int, side="right")
    return i, np.minimum(np.maximum(i, 1), len(table.mjd) - 1)  # np.clip, without its overhead


def _interp_table(table: EarthOrientationTable, mjd_int, day_fraction):
    """Linear interpolation between daily nodes, as ``astropy.utils.iers.IERS._interpolate``.

    UT1-UTC steps at leap seconds are removed from the node difference by rounding it to
    whole seconds, exactly as astropy does, so results agree with astropy's own lookup.
    """
    mjd = table.mjd
    i, i1 = _interval(table, mjd_int)
    i0 = i1 - 1
    frac = (mjd_int - mjd[i0] + day_fraction) / (mjd[i1] - mjd[i0])
    # The three columns (UT1-UTC, pm_x, pm_y) at once, on the last axis.
    vals = table.node_values
    v0 = vals[i0]
    d = vals[i1] - v0
    d[..., 0] -= np.rint(d[..., 0])  # UT1-UTC only: leap-second steps removed (np.round)
    v = v0 + frac[..., None] * d
    before = i == 0
    after = i == len(mjd)
    if before.any() or after.any():
        v = np.where(before[..., None], vals[0], v)
        v = np.where(after[..., None], vals[-1], v)
    # Source: the node at or before the instant, the later one if it is predicted.
    status = np.maximum(table.status[i0], table.status[i1])
    inside = ~(before | after)
    return v[..., 0], v[..., 1], v[..., 2], status, inside, i1


def _table_sigmas(table: EarthOrientationTable, i1):
    """The table's own uncertainties (UT1-UTC s, pole arcsec) at instants: the larger of the
    two nodes around each (0 where the table gives none, NaN counted as none); ``i1`` the
    later node of each instant's interval, as :func:`_interp_table` returns it."""
    sig = table.interval_sigmas
    if sig is None:
        zero = np.zeros(np.shape(i1))
        return zero, zero
    both = sig[i1]
    return both[..., 0], both[..., 1]


@dataclass(frozen=True)
class EarthOrientationValues:
    """UT1-UTC and polar motion at instants, with provenance.

    Attributes
    ----------
    ut1_utc_s : ndarray
        UT1-UTC, seconds (0 where unavailable).
    pm_x_arcsec, pm_y_arcsec : ndarray
        Polar motion, arcsec (0 where unavailable).
    status : ndarray of int
        :class:`EarthOrientationStatus` per instant.
    table : ndarray of str
        Name of the table each value came from ("none" where unavailable).
    ut1_sigma_s, pole_sigma_arcsec : ndarray
        Uncertainty assumed for UT1-UTC (seconds) and for the pole position (arcsec, the two
        coordinates' errors in quadrature), see :func:`earth_orientation_at`.
    pointing_error_arcsec : ndarray
        Resulting pointing uncertainty estimate, arcsec.
    accuracy_class : ndarray of str
        ``milliarcsecond``, ``sub_arcsecond`` or ``arcseconds``.
    """

    ut1_utc_s: np.ndarray
    pm_x_arcsec: np.ndarray
    pm_y_arcsec: np.ndarray
    status: np.ndarray
    table: np.ndarray
    ut1_sigma_s: np.ndarray
    pole_sigma_arcsec: np.ndarray
    pointing_error_arcsec: np.ndarray
    accuracy_class: np.ndarray


def bulletin_a_prediction_sigmas(days_ahead):
    """Accuracy of IERS Bulletin A predictions, by the expressions each issue prints.

    Parameters
    ----------
    days_ahead : array_like
        Days from the issue's last day of measured values (MJD0) to the predicted day, >= 0.

    Returns
    -------
    ut1_sigma_s : ndarray
        S t = 0.00025 (MJD - MJD0)^0.75, uncertainty of UT1-UTC, seconds.
    pole_sigma_xy_arcsec : ndarray
        S x,y = 0.00068 (MJD - MJD0)^0.80, uncertainty of each pole coordinate (x, and
        likewise y), arcsec; the pole position error is :func:`pole_position_sigma_arcsec`
        of the two, sqrt(2) times this.

    References
    ----------
    IERS Bulletin A, section "PREDICTIONS" (e.g. Vol. XXVI No. 036, 5 September 2013):
    "The accuracy may be estimated from the expressions: S x,y = 0.00068 (MJD-56540)**0.80
    S t = 0.00025 (MJD-56540)**0.75".
    """
    d = np.asarray(days_ahead, dtype=float)
    return (
        BULLETIN_A_UT1_COEFF_S * d**BULLETIN_A_UT1_POWER,
        BULLETIN_A_POLE_COEFF_ARCSEC * d**BULLETIN_A_POLE_POWER,
    )


def pole_position_sigma_arcsec(sigma_x_arcsec, sigma_y_arcsec):
    """Uncertainty of the pole position from those of its two coordinates, arcsec.

    Notes
    -----
    1. An error (dx, dy) in the pole coordinates tilts the terrestrial frame by the small
       angle |(dx, dy)| = sqrt(dx^2 + dy^2) about an axis in the equator plane; a direction on
       the sky moves by that angle times the sine of its distance from the tilt axis, at most
       the angle itself. With independent errors of standard deviations sigma_x, sigma_y the
       rms tilt is sqrt(sigma_x^2 + sigma_y^2): sqrt(2) sigma for equal ones, as the Bulletin
       A prediction accuracy S x,y (one figure for each coordinate).
    """
    return np.hypot(sigma_x_arcsec, sigma_y_arcsec)


#: Pole position error of rapid (measured) values, arcsec (both coordinates, Note 4 of
#: :func:`earth_orientation_at`).
_POLE_SIGMA_RAPID_POSITION_ARCSEC = float(
    pole_position_sigma_arcsec(POLE_SIGMA_RAPID_ARCSEC, POLE_SIGMA_RAPID_ARCSEC)
)

#: Fixed uncertainties by EarthOrientationStatus (final, rapid, predicted: Bulletin A growth
#: instead, unavailable): UT1-UTC in seconds, pole position in arcsec (Note 4 of
#: :func:`earth_orientation_at`).
_UT1_SIGMA_BY_STATUS = np.array(
    [UT1_SIGMA_FINAL_S, UT1_SIGMA_RAPID_S, 0.0, UT1_SIGMA_UNAVAILABLE_S]
)
_POLE_SIGMA_BY_STATUS = np.array([
    pole_position_sigma_arcsec(POLE_SIGMA_FINAL_ARCSEC, POLE_SIGMA_FINAL_ARCSEC),
    _POLE_SIGMA_RAPID_POSITION_ARCSEC,
    0.0,
    POLE_SIGMA_UNAVAILABLE_ARCSEC,
])  # fmt: skip
for _a in (_UT1_SIGMA_BY_STATUS, _POLE_SIGMA_BY_STATUS):
    _a.setflags(write=False)

#: EarthOrientationStatus.PREDICTED and UNAVAILABLE as plain ints (numpy compares an array
#: with an enum member by a slow path).
_PREDICTED = int(EarthOrientationStatus.PREDICTED)
_UNAVAILABLE = int(EarthOrientationStatus.UNAVAILABLE)

#: Accuracy classes by pointing error, below / between / above ACCURACY_CLASS_BOUNDS_ARCSEC.
_ACCURACY_CLASSES = np.array(["milliarcsecond", "sub_arcsecond", "arcseconds"])


def earth_orientation_at(utc_jd1, utc_jd2, eop: EarthOrientation | None = None):
    """UT1-UTC and polar motion at UTC instants, with source and accuracy class.

    Parameters
    ----------
    utc_jd1, utc_jd2 : array_like
        UTC as a two-part quasi Julian date (SOFA convention), days.
    eop : EarthOrientation, optional
        Tables; default :func:`earth_orientation`.

    Returns
    -------
    EarthOrientationValues

    Notes
    -----
    1. The primary (finals2000A) table is used inside its span, the IERS-B table before it;
       outside both the values are taken as zero and the status is ``UNAVAILABLE``.
    2. Predicted values carry the Bulletin A accuracy expressions
       (:func:`bulletin_a_prediction_sigmas`) evaluated at the number of days past the last
       measured node: S t for UT1-UTC, S x,y for each pole coordinate.
    3. Inside a table, the uncertainties are at least the table's own (columns e_UT1_UTC and
       e_PM_x, e_PM_y of IERS-B; their Bulletin A counterparts in finals2000A), and on the
       days the IERS-B (C04) table also covers, at least its own too: for those days the
       finals2000A values in use are its Bulletin B columns (astropy takes them where
       present), whose errors are the C04 ones, not the Bulletin A columns'. That is some
       milliseconds of UT1 and tens of mas of pole in the 1960s and 1970s (C04: 1.9 ms and
       15 mas per coordinate up to 1979, where finals2000A's Bulletin A columns say 0.2 to
       0.6 ms), far above the fixed values by source.
    4. ``pole_sigma_arcsec`` is the error of the pole position, the two coordinates' errors
       in quadrature (:func:`pole_position_sigma_arcsec`); where no table answers, the pole is
       taken as zero and its error is the largest pole distance on record (0.6 arcsec).
    5. The pointing error estimate is 15.04 arcsec/s x sigma(UT1) + sigma(pole position): an
       error in UT1 turns the sky about the pole axis (a star at declination d moves by
       15.04 arcsec/s x dUT1 x cos d), a pole error tilts it about an axis in the equator;
       the displacement of any direction is at most the sum of the two angles. The class
       follows ``ACCURACY_CLASS_BOUNDS_ARCSEC``.
    """
    eop = eop or earth_orientation()
    jd1 = np.asarray(utc_jd1, dtype=float)
    jd2 = np.asarray(utc_jd2, dtype=float)
    if jd1.shape != jd2.shape:
        jd1, jd2 = np.broadcast_arrays(jd1, jd2)
    # Split into integer MJD and day fraction, as astropy's mjd_utc does.
    mjd_full = (jd1 - 2400000.5) + jd2
    mjd_int = np.floor(mjd_full)
    frac = ((jd1 - 2400000.5) - mjd_int) + jd2
    dut, px, py, status, inside, i1 = _interp_table(eop.primary, mjd_int, frac)
    tab_ut1, tab_pole = _table_sigmas(eop.primary, i1)
    # Which table each value came from, as an index into the names (strings only at the end).
    names = eop.table_names
    table = np.where(inside, 0, 1)
    if eop.fallback is not None:
        use_b = ~inside & (mjd_full < eop.primary.first_mjd)
        if use_b.any():
            bd, bx, by, bs, binside, b_i1 = _interp_table(eop.fallback, mjd_int, frac)
            take = use_b & binside
            dut = np.where(take, bd, dut)
            px = np.where(take, bx, px)
            py = np.where(take, by, py)
            status = np.where(take, bs, status)
            b_ut1, b_pole = _table_sigmas(eop.fallback, b_i1)
            tab_ut1 = np.where(take, b_ut1, tab_ut1)
            tab_pole = np.where(take, b_pole, tab_pole)
            inside = inside | take
            table = np.where(take, 2, table)
        # Days of the primary table that IERS-B covers too: at least IERS-B's errors (Note 3).
        both = (table == 0) & (mjd_full >= eop.fallback.first_mjd)
        both &= mjd_full <= eop.fallback.last_mjd
        if both.any():
            b_ut1, b_pole = _table_sigmas(eop.fallback, _interval(eop.fallback, mjd_int)[1])
            tab_ut1 = np.where(both, np.fmax(tab_ut1, b_ut1), tab_ut1)
            tab_pole = np.where(both, np.fmax(tab_pole, b_pole), tab_pole)
    status = np.where(inside, status, _UNAVAILABLE)
    dut = np.where(inside, dut, 0.0)
    px = np.where(inside, px, 0.0)
    py = np.where(inside, py, 0.0)
    days_ahead = np.maximum(mjd_full - eop.primary.last_measured_mjd, 0.0)
    # Fixed sigmas by status (final, rapid, predicted placeholder, unavailable), then the
    # Bulletin A growth for predicted values; pole errors as position errors (Note 4).
    status = np.asarray(status, dtype=np.int64)
    predicted = status == _PREDICTED
    pred_ut1, pred_pole_xy = bulletin_a_prediction_sigmas(days_ahead)
    ut1_sigma = np.where(
        predicted, np.maximum(pred_ut1, UT1_SIGMA_RAPID_S), _UT1_SIGMA_BY_STATUS[status]
    )
    pred_pole_xy = np.maximum(pred_pole_xy, POLE_SIGMA_RAPID_ARCSEC)
    pole_sigma = np.where(
        predicted,
        pole_position_sigma_arcsec(pred_pole_xy, pred_pole_xy),
        _POLE_SIGMA_BY_STATUS[status],
    )
    # At least the table's own uncertainties where its values are used (Note 3).
    ut1_sigma = np.where(inside, np.fmax(ut1_sigma, tab_ut1), ut1_sigma)
    pole_sigma = np.where(inside, np.fmax(pole_sigma, tab_pole), pole_sigma)
    err = ARCSEC_PER_UT1_SECOND * ut1_sigma + pole_sigma
    lo, hi = ACCURACY_CLASS_BOUNDS_ARCSEC
    cls = _ACCURACY_CLASSES[2 - (err < lo).astype(np.intp) - (err < hi)]  # NaN: "arcseconds"
    return EarthOrientationValues(
        ut1_utc_s=dut,
        pm_x_arcsec=px,
        pm_y_arcsec=py,
        status=status.astype(int),
        table=names[table],
        ut1_sigma_s=ut1_sigma,
        pole_sigma_arcsec=pole_sigma,
        pointing_error_arcsec=err,
        accuracy_class=cls,
    )


# ---------------------------------------------------------------------------------------------
# Site, atmosphere, standard atmosphere, airmass
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Site:
    """An observing site on the WGS84 ellipsoid.

    Attributes
    ----------
    latitude_deg : float
        Geodetic latitude, degrees, north positive, in [-90, 90].
    longitude_deg : float
        Longitude, degrees, east positive (values in [-180, 360] accepted).
    height_m : float
        Height above the WGS84 ellipsoid, metres.
    name : str or None
        Name from the operator's site list, if it came from one.
    """

    latitude_deg: float
    longitude_deg: float
    height_m: float = 0.0
    name: str | None = None


def site_problems(latitude_deg, longitude_deg, height_m) -> dict[str, str]:
    """Every invalid coordinate of a site: {member name: message}, empty when all are valid.

    The checks of :func:`make_site`, all of them at once, so that an answer can name every
    invalid member together.
    """
    problems = {}
    lo, hi = HEIGHT_RANGE_M
    for key, val, low, high, text in (
        ("latitude_deg", latitude_deg, -90.0, 90.0, "must be between -90 and 90"),
        ("longitude_deg", longitude_deg, -180.0, 360.0, "must be between -180 and 360"),
        ("height_m", height_m, lo, hi, f"must be between {lo:g} and {hi:g}"),
    ):
        try:
            v = float(val)
        except (TypeError, ValueError):
            problems[key] = "must be a number"
            continue
        if not np.isfinite(v):
            problems[key] = "must be finite"
        elif not low <= v <= high:
            problems[key] = text
    return problems


def make_site(latitude_deg, longitude_deg, height_m=0.0, name=None, *, prefix="site") -> Site:
    """Validate and build a :class:`Site` (raises :class:`ObservedInputError` naming the
    first invalid member; :func:`site_problems` gives them all)."""
    problems = site_problems(latitude_deg, longitude_deg, height_m)
    if problems:
        key, message = next(iter(problems.items()))
        raise ObservedInputError(f"{prefix}.{key}", message)
    return Site(float(latitude_deg), float(longitude_deg), float(height_m), name)


#: Up to this many names, an unknown site's message lists the whole site list.
SITE_NAMES_LISTED = 12


def listed_site_name(given: str, sites: dict, prefix: str = "site") -> str:
    """The name of the site list that ``given`` stands for: itself, or the one listed name
    that differs from it in letter case only ("Kestrel-Ridge" for "kestrel-ridge"): a
    site's name names one place in any case.

    Raises
    ------
    ObservedInputError
        No such name (with the likely ones: the names it is close to, and the whole list
        when it is short), or several names in other letter case (the list's own
        ambiguity: both are named).
    """
    if given in sites:
        return given
    same = sorted(n for n in sites if n.casefold() == given.casefold())
    if len(same) == 1:
        return same[0]
    shown = given if len(given) <= 64 else given[:61] + "..."  # a client's text, cut
    if same:
        raise ObservedInputError(
            f"{prefix}.name",
            f"site {shown!r} is in the site list in several letter cases ("
            + ", ".join(repr(n) for n in same)
            + "): give one as written there",
        )
    # Up to three listed names as similar as the API's spelling hints ask (difflib's ratio
    # of at least 0.75, letter case aside), the most similar first, ties alphabetical.
    matcher = difflib.SequenceMatcher(b=given.casefold())
    ranked = []
    for name in sites:
        matcher.set_seq1(name.casefold())
        ranked.append((-matcher.ratio(), name))
    close = [name for score, name in sorted(ranked) if -score >= 0.75][:3]
    if not sites:
        known = "known: none configured"
    elif len(sites) <= SITE_NAMES_LISTED:
        known = "known: " + ", ".join(sorted(sites))
    else:
        known = f"{len(sites)} sites are known: GET /v1/sites lists them"
    hint = ""
    if close:
        others = ", ".join(repr(n) for n in close[:-1])
        hint = f"did you mean {others + ' or ' if others else ''}{close[-1]!r}? "
    raise ObservedInputError(f"{prefix}.name", f"unknown site {shown!r} ({hint}{known})")


def resolve_site(spec, sites: dict | None = None, *, prefix="site") -> Site:
    """A site from a name in the operator's list, or from latitude/longitude/height.

    Parameters
    ----------
    spec : str, Site or mapping
        A site name, a :class:`Site`, or a mapping with ``latitude_deg``, ``longitude_deg``
        and ``height_m`` (all required), or ``name`` alone.
    sites : mapping of str to mapping, optional
        The operator-configured site list: name -> {latitude_deg, longitude_deg, height_m}.

    Raises
    ------
    ObservedInputError
        Unknown name or invalid coordinates (the field is named).
    """
    if isinstance(spec, Site):
        return make_site(spec.latitude_deg, spec.longitude_deg, spec.height_m, spec.name)
    if isinstance(spec, dict) and set(spec) <= {"name"} and "name" in spec:
        spec = spec["name"]
    if isinstance(spec, str):
        sites = sites or {}
        name = listed_site_name(spec, sites, prefix)
        entry = sites[name]
        return make_site(
            entry["latitude_deg"],
            entry["longitude_deg"],
            entry.get("height_m", 0.0),
            name=name,
            prefix=prefix,
        )
    if isinstance(spec, dict):
        # The height is required: it sets the pressure (hence refraction) when none is
        # given, and a silent sea-level default would overestimate refraction at altitude.
        for key in ("latitude_deg", "longitude_deg", "height_m"):
            if key not in spec or spec[key] is None:
                raise ObservedInputError(f"{prefix}.{key}", "is required")
        return make_site(
            spec["latitude_deg"],
            spec["longitude_deg"],
            spec["height_m"],
            name=spec.get("name"),
            prefix=prefix,
        )
    raise ObservedInputError(prefix, "must be a site name or latitude/longitude/height")


def standard_atmosphere(height_m):
    """Pressure and temperature of the US Standard Atmosphere 1976 at a height.

    Parameters
    ----------
    height_m : array_like
        Geometric height above mean sea level, metres (Note 1).

    Returns
    -------
    pressure_hpa : ndarray
        Pressure, hPa.
    temperature_c : ndarray
        Temperature, degrees Celsius.

    Notes
    -----
    1. Geometric height z becomes geopotential height H = r0 z / (r0 + z), r0 = 6356766 m
       (eq. 18). In the troposphere (H < 11 km) T = T0 + L H and
       P = P0 [T0 / (T0 + L H)]^(g0 M0 / (R* L)) (eq. 33a), with P0 = 1013.25 hPa,
       T0 = 288.15 K, L = -0.0065 K/m, g0 = 9.80665 m/s^2, M0 = 0.0289644 kg/mol,
       R* = 8.31432 J/(mol K); the exponent is 5.25588. Heights above 11 km are clipped
       to 11 km (no observatory is that high).
    2. The site height is taken above the ellipsoid; the difference from mean sea level
       (the geoid, tens of metres) changes the pressure by a few hPa at most, which moves
       refraction at 45 degrees altitude by well under 0.2 arcsec.

    References
    ----------
    NOAA, NASA, USAF 1976, U.S. Standard Atmosphere, 1976, NOAA-S/T 76-1562, eqs. 18, 23, 33a.
    """
    z = np.minimum(np.asarray(height_m, dtype=float), USSA1976_TROPOPAUSE_M)
    h = USSA1976_R0_M * z / (USSA1976_R0_M + z)
    t = USSA1976_T0_K + USSA1976_LAPSE_K_PER_M * h
    exponent = (
        USSA1976_G0_M_S2 * USSA1976_M0_KG_MOL / (USSA1976_RSTAR_J_MOL_K * USSA1976_LAPSE_K_PER_M)
    )
    p = USSA1976_P0_HPA * (USSA1976_T0_K / t) ** exponent
    return p, t - 273.15


def airmass_young1994(cos_true_zenith):
    """Relative airmass from the true (unrefracted) zenith distance, Young (1994).

    Parameters
    ----------
    cos_true_zenith : array_like
        Cosine of the topocentric zenith distance before refraction, dimensionless.

    Returns
    -------
    ndarray
        Airmass relative to the zenith (1 at the zenith, about 31.7 at the geometric
        horizon); NaN below the geometric horizon (Note 2).

    Notes
    -----
    1. X = (1.002432 c^2 + 0.148386 c + 0.0096467) /
       (c^3 + 0.149864 c^2 + 0.0102963 c + 0.000303978), c = cos z_true. The coefficients
       were checked against a published implementation citing Young (1994), pvlib-python's
       ``pvlib.atmosphere.get_relative_airmass`` (model ``young1994``, "requires true
       zenith"), and agree to 0.07 % up to z = 80 deg and 0.6 % at the horizon with the
       Kasten & Young (1989) formula for their airmass table, taken at the apparent zenith
       distance (tests). Quoted maximum error 0.0037 air masses at the horizon (from memory,
       not checked).
    2. The formula is for a star above the horizon; below it the airmass is undefined.

    References
    ----------
    Young, A.T. 1994, Applied Optics 33, 1108-1110 ("Air mass and refraction").
    Kasten, F., Young, A.T. 1989, Applied Optics 28, 4735 ("Revised optical air mass tables
    and approximation formula").
    """
    c = np.asarray(cos_true_zenith, dtype=float)
    num = (1.002432 * c + 0.148386) * c + 0.0096467
    den = ((c + 0.149864) * c + 0.0102963) * c + 0.000303978
    with np.errstate(invalid="ignore", divide="ignore"):
        x = num / den
    below = c < 0.0
    if np.ndim(x) == 0:
        return np.nan if below else x
    if below.any():
        x[below] = np.nan
    return x


@dataclass(frozen=True)
class Atmosphere:
    """Conditions at the site used for refraction.

    Attributes
    ----------
    pressure_hpa : float or None
        Air pressure at the site, hPa; None = estimate from the site height with the standard
        atmosphere; 0 = no refraction.
    temperature_c : float or None
        Air temperature, degrees Celsius; None = standard atmosphere at the site height.
    relative_humidity : float or None
        Relative humidity, 0-1; None = 0.5.
    wavelength_um : float or None
        Effective wavelength, micrometres; None = 0.55.
    """

    pressure_hpa: float | None = None
    temperature_c: float | None = None
    relative_humidity: float | None = None
    wavelength_um: float | None = None


def make_atmosphere(
    pressure_hpa=None,
    temperature_c=None,
    relative_humidity=None,
    wavelength_um=None,
    *,
    prefix="atmosphere",
) -> Atmosphere:
    """Validate and build an :class:`Atmosphere` (raises :class:`ObservedInputError`)."""

    def num(key, val):
        if val is None:
            return None
        try:
            v = float(val)
        except (TypeError, ValueError):
            raise ObservedInputError(f"{prefix}.{key}", "must be a number") from None
        if not np.isfinite(v):
            raise ObservedInputError(f"{prefix}.{key}", "must be finite")
        return v

    p = num("pressure_hpa", pressure_hpa)
    t = num("temperature_c", temperature_c)
    rh = num("relative_humidity", relative_humidity)
    wl = num("wavelength_um", wavelength_um)
    if p is not None and not PRESSURE_RANGE_HPA[0] <= p <= PRESSURE_RANGE_HPA[1]:
        raise ObservedInputError(
            f"{prefix}.pressure_hpa",
            f"must be between {PRESSURE_RANGE_HPA[0]:g} and {PRESSURE_RANGE_HPA[1]:g}",
        )
    if t is not None and not TEMPERATURE_RANGE_C[0] <= t <= TEMPERATURE_RANGE_C[1]:
        raise ObservedInputError(
            f"{prefix}.temperature_c",
            f"must be between {TEMPERATURE_RANGE_C[0]:g} and {TEMPERATURE_RANGE_C[1]:g}",
        )
    if rh is not None and not 0.0 <= rh <= 1.0:
        raise ObservedInputError(f"{prefix}.relative_humidity", "must be between 0 and 1")
    if wl is not None and not (
        WAVELENGTH_OPTICAL_UM[0] <= wl <= WAVELENGTH_OPTICAL_UM[1]
        or WAVELENGTH_RADIO_UM[0] <= wl <= WAVELENGTH_RADIO_UM[1]
    ):
        raise ObservedInputError(
            f"{prefix}.wavelength_um",
            "must be 0.3-2.0 (optical/infrared) or 100-1000000 (radio) micrometres",
        )
    return Atmosphere(p, t, rh, wl)


@dataclass(frozen=True)
class RefractionSettings:
    """The atmosphere actually used, and how it was obtained.

    Attributes
    ----------
    mode : str
        ``given_pressure``, ``standard_atmosphere_pressure`` or ``off`` (pressure zero).
    pressure_hpa, temperature_c, relative_humidity, wavelength_um : float
        Values passed to the refraction model (SOFA ``refco``); a radio wavelength (100 um
        and above) reaches refco as 1e6 um, inside its radio case, whose formula does not
        depend on the wavelength.
    temperature_source : str
        ``given`` or ``standard_atmosphere``.
    refa_rad, refb_rad : float
        Refraction constants A and B of dZ = A tan Z + B tan^3 Z, radians.
    pressure_warning : str or None
        Why a given pressure looks wrong for the site height (:func:`pressure_warning`);
        None when it does not, or the pressure is not given.
    """

    mode: str
    pressure_hpa: float
    temperature_c: float
    relative_humidity: float
    wavelength_um: float
    temperature_source: str
    refa_rad: float
    refb_rad: float
    pressure_warning: str | None = None


def refraction_settings(site: Site, atmosphere: Atmosphere | None) -> RefractionSettings:
    """Resolve missing atmosphere values (Note 1) and compute SOFA ``refco`` constants.

    Notes
    -----
    1. Missing pressure: US Standard Atmosphere 1976 at the site height
       (:func:`standard_atmosphere`); missing temperature likewise; pressure 0 switches
       refraction off.
    2. Results are cached per exact site height and atmosphere.
    3. Air that cannot exist is refused with :class:`ObservedInputError` on
       ``atmosphere.relative_humidity``: a humidity above 0 where the saturation vapour
       pressure of water at the temperature is not below the pressure, so that refco's
       water-vapour pressure is not below the total pressure
       (:func:`refco_saturation_pressure_hpa`, Note 2).
    """
    atm = atmosphere or Atmosphere()
    return _refraction_settings_cached(
        _float_key(site.height_m),
        *(
            None if v is None else _float_key(v)
            for v in (atm.pressure_hpa, atm.temperature_c, atm.relative_humidity, atm.wavelength_um)
        ),
    )


@functools.lru_cache(maxsize=256)
def _refraction_settings_cached(height_key, *atm_keys) -> RefractionSettings:
    height_m = float.fromhex(height_key)
    atm = Atmosphere(*(None if k is None else float.fromhex(k) for k in atm_keys))
    return _refraction_settings(height_m, atm)


def _refraction_settings(height_m: float, atm: Atmosphere) -> RefractionSettings:
    p_std, t_std = standard_atmosphere(height_m)
    if atm.pressure_hpa is None:
        mode, p = "standard_atmosphere_pressure", float(p_std)
    elif atm.pressure_hpa == 0.0:
        mode, p = "off", 0.0
    else:
        mode, p = "given_pressure", float(atm.pressure_hpa)
    if atm.temperature_c is None:
        t, t_src = float(t_std), "standard_atmosphere"
    else:
        t, t_src = float(atm.temperature_c), "given"
    rh = DEFAULT_RELATIVE_HUMIDITY if atm.relative_humidity is None else atm.relative_humidity
    wl = DEFAULT_WAVELENGTH_UM if atm.wavelength_um is None else atm.wavelength_um
    # SOFA refco takes its optical formula up to and including 100 um (optic = wl <= 100),
    # but the radio range here begins at 100 um; the radio formula does not depend on the
    # wavelength, so every radio wavelength goes to refco as the range's upper end.
    wl_refco = WAVELENGTH_RADIO_UM[1] if wl >= WAVELENGTH_RADIO_UM[0] else wl
    ps = refco_saturation_pressure_hpa(p, t) if p > 0.0 else 0.0
    if rh > 0.0 and ps >= p > 0.0:
        raise ObservedInputError(
            "atmosphere.relative_humidity", _no_such_air(p, t, t_src, atm, height_m)
        )
    refa, refb = _refco_cached(p, t, float(rh), float(wl_refco))
    if not (math.isfinite(refa) and math.isfinite(refb)):  # dry air exactly at ps = p: 0/0
        raise ObservedInputError(
            "atmosphere.relative_humidity", _no_such_air(p, t, t_src, atm, height_m)
        )
    warning = pressure_warning(p, height_m) if mode == "given_pressure" else None
    return RefractionSettings(mode, p, t, float(rh), float(wl), t_src, refa, refb, warning)


def pressure_warning(pressure_hpa, height_m):
    """Why a given air pressure looks wrong for the site height, in one sentence, or None.

    Parameters
    ----------
    pressure_hpa : float
        Air pressure given for the site, hPa (above 0).
    height_m : float
        Site height, metres.

    Returns
    -------
    str or None
        None when the pressure lies within PRESSURE_PLAUSIBLE_FRACTION of the US Standard
        Atmosphere 1976 pressure at the height (Note 1); otherwise a sentence giving both
        pressures and the likely mistake (Note 2).

    Notes
    -----
    1. Real air at a site stays within 0.859 to 1.075 of the standard pressure at its
       height (the recorded sea-level extremes; see PRESSURE_PLAUSIBLE_FRACTION); the band
       0.83-1.15 adds room, so weather never leaves it. Refraction is proportional to the
       pressure (about 5 arcmin at 10 degrees altitude at sea level), so a unit mistake
       misplaces a target low in the sky by arcminutes. A pressure chamber or a deliberate
       test may mean it all the same: it is used as given, and only flagged.
    2. The likely mistake is the unit of PRESSURE_UNITS_HPA in which the value falls
       within the band (kPa, atm, inHg, mmHg: their bands do not overlap), else, for a
       value too high that falls within the band of the sea-level pressure, a weather
       report's pressure reduced to sea level given for a high site.
    """
    p = float(pressure_hpa)
    std = float(standard_atmosphere(height_m)[0])
    lo, hi = PRESSURE_PLAUSIBLE_FRACTION
    if lo * std <= p <= hi * std:
        return None
    hint = _likely_pressure_mistake(p, std) or "check its unit (hPa) and the site height"
    return (
        f"pressure {p:g} hPa is far from any weather at a site {float(height_m):g} m high "
        f"(standard atmosphere there {std:.6g} hPa; real weather there stays within "
        f"{lo * std:.0f}-{hi * std:.0f} hPa): {hint}. Refraction is computed with the "
        f"pressure as given, {p / std:.3g} times the standard atmosphere's"
    )


def _likely_pressure_mistake(p: float, std: float) -> str | None:
    """The likely mistake behind a pressure p (hPa) outside the band about the standard
    pressure std (hPa) at the site, in words (Note 2 of :func:`pressure_warning`), or None."""
    lo, hi = PRESSURE_PLAUSIBLE_FRACTION
    for unit, hpa in PRESSURE_UNITS_HPA.items():
        if lo * std <= p * hpa <= hi * std:
            return f"probably in {unit} ({p:g} {unit} is {p * hpa:.1f} hPa)"
    if p > hi * std and lo * USSA1976_P0_HPA <= p <= hi * USSA1976_P0_HPA:
        return (
            "probably a pressure reduced to sea level (as weather reports give it), "
            "not the pressure at the site"
        )
    return None


def refco_saturation_pressure_hpa(pressure_hpa, temperature_c):
    """Saturation vapour pressure of water over a flat surface, as SOFA ``refco`` has it.

    Parameters
    ----------
    pressure_hpa : float
        Total air pressure, hPa (within refco's safe range 0-10000, which it would clamp).
    temperature_c : float
        Air temperature, degrees Celsius (within refco's safe range -150 to 200).

    Returns
    -------
    float
        Saturation vapour pressure ps, hPa.

    Notes
    -----
    1. ps = 10^((0.7859 + 0.03477 t) / (1 + 0.00412 t)) (1 + p (4.5e-6 + 6e-10 t^2)),
       t in deg C, p in hPa (Gill 1982, eqs. A4.5-A4.7, as written in refco).
    2. refco turns the relative humidity r into the water-vapour pressure
       pw = r ps / (1 - (1 - r) ps / p) (Crane 1976, eq. 2.5.5). For r > 0, pw lies in
       (0, p) exactly when ps < p; where ps >= p (water would boil: at 60 C below about 201
       hPa, at 20 C below 23.4 hPa, at 0 C below 6.1 hPa) pw is at or above the total
       pressure, infinite or negative, and so are the refraction constants built on it
       (an optical refraction of -1.35 arcsec at 45 deg for 60 C, 1 hPa, r = 1). Dry air
       (r = 0) has pw = 0 at any pressure. Realistic air (-40 to +50 C, 500-1100 hPa)
       has ps below 125 hPa, far from the limit.

    References
    ----------
    IAU SOFA Board, SOFA routine refco (source and its Note 5), 2023 release.
    Gill, A.E. 1982, Atmosphere-Ocean Dynamics, Academic Press, eqs. A4.5-A4.7.
    Crane, R.K. 1976, in Methods of Experimental Physics 12B, Academic Press, eq. 2.5.5.
    """
    t = float(temperature_c)
    # refco's coefficients (Gill 1982): log10 of ps over water in hPa, and the enhancement
    # factor of moist air at total pressure p, hPa^-1 and hPa^-1 K^-2.
    return 10.0 ** ((0.7859 + 0.03477 * t) / (1.0 + 0.00412 * t)) * (
        1.0 + float(pressure_hpa) * (4.5e-6 + 6e-10 * t * t)
    )


def _no_such_air(p, t, t_src, atm: Atmosphere, height_m: float) -> str:
    """Why refco's water-vapour pressure is impossible here, in one sentence (for 422).

    The pressure is a given one: the standard atmosphere's (265 hPa and above up to the
    highest accepted site) is above the saturation pressure at any accepted temperature.
    """
    rh = DEFAULT_RELATIVE_HUMIDITY if atm.relative_humidity is None else atm.relative_humidity
    ps = refco_saturation_pressure_hpa(p, t)
    d = 1.0 - (1.0 - rh) * ps / p
    if d > 0.0:
        pw = f"{rh * ps / d:.4g} hPa"
    else:  # refco divides by d: zero (0/0 for dry air) or negative
        pw = "negative" if d < 0.0 else ("undefined" if rh == 0.0 else "infinite")
    std = " (standard atmosphere)"
    # A pressure in another unit (1.0 atm given as hPa) is a likely cause: named where the
    # value fits one at the site height, as in pressure_warning.
    mistake = _likely_pressure_mistake(p, float(standard_atmosphere(height_m)[0]))
    fix = (
        f"The pressure is {mistake}: give it in hPa"
        if mistake is not None and mistake.startswith("probably in ")
        else "Give pressure in hPa, a lower temperature or humidity 0 (dry air)"
    )
    return (
        f"relative humidity {rh:g}{' (default)' if atm.relative_humidity is None else ''} "
        f"at {t:.4g} C{std if t_src != 'given' else ''} and {p:.4g} hPa: SOFA refco's "
        f"water-vapour pressure, {pw} "
        f"(saturation {ps:.4g} hPa), is not below the total pressure; no such air (water "
        f"boils). {fix}"
    )


# ---------------------------------------------------------------------------------------------
# The per-star chain (numpy form of SOFA pmpx, ldsun, ab, atioq)
# ---------------------------------------------------------------------------------------------


def _dot(a, b):
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def _sincos(x, reduce=True):
    """Sine and cosine of angles in radians, from one tangent of the quarter angle.

    numpy's float64 tan is vectorised (SIMD) while sin and cos are not on common builds;
    with t = tan(x/4), |x| <= pi after reduction: s2 = 2t/(1+t^2), c2 = (1-t^2)/(1+t^2) are
    sin and cos of x/2, and sin x = 2 s2 c2, cos x = (c2 - s2)(c2 + s2). Agreement with
    np.sin/np.cos is within 2e-15 (checked in tests). ``reduce=False`` skips the reduction
    to [-pi, pi] for arguments known to lie there (declinations); ``reduce="shift"`` is for
    arguments in [0, 2 pi] (right ascensions): x - pi, with both signs flipped.
    """
    shifted = reduce == "shift"
    if shifted:
        x = x - np.pi
    elif reduce:
        x = x - TWO_PI * np.round(x * (1.0 / TWO_PI))
    t = np.tan(0.25 * x)
    t2 = t * t
    d = 1.0 / (1.0 + t2)
    sh = (2.0 * d) * t  # sin(x/2)
    ch = (1.0 - t2) * d  # cos(x/2)
    if shifted:  # sin(x + pi) = -sin x, cos(x + pi) = -cos x
        return (-2.0 * sh) * ch, (sh - ch) * (sh + ch)
    return (2.0 * sh) * ch, (ch - sh) * (ch + sh)


def _nan0(a):
    """NaN -> 0 (missing proper motion or radial velocity taken as zero, flagged elsewhere)."""
    if np.ndim(a) == 0:
        return 0.0 if np.isnan(a) else float(a)
    nan = np.isnan(a)
    return np.where(nan, 0.0, a) if (nan.item() if nan.size == 1 else nan.any()) else a


def _star_vectors(ra_deg, dec_deg, parallax_mas, pmra, pmdec, rv, dt_yr, eb_au):
    """Direction from the observer, BCRS, after space motion and parallax (SOFA ``pmpx``).

    The star at the catalogue epoch is the unit vector p with space motion w per unit
    distance; its position relative to the observer, in units of its catalogue distance, is
    p + dt' w - parallax(rad) * eb with dt' = dt + (p.eb)/c (SOFA pmpx, Note 3 of
    :func:`observed_places`).
    """
    ra = np.asarray(ra_deg, dtype=float) * RAD_PER_DEG
    in_range = ra.min() >= 0.0 and ra.max() <= TWO_PI if ra.ndim else 0.0 <= ra <= TWO_PI
    sr, cr = _sincos(ra, reduce="shift" if in_range else True)
    sd, cd = _sincos(np.asarray(dec_deg, dtype=float) * RAD_PER_DEG, reduce=False)
    x = cd * cr
    y = cd * sr
    z = sd
    # fmax maps NaN (missing parallax) to 0 as well as non-positive values.
    pxr = np.fmax(parallax_mas, 0.0) * (1.0 / MAS_PER_RAD)
    mu_a = _nan0(pmra) * (1.0 / MAS_PER_RAD)
    mu_d = _nan0(pmdec) * (1.0 / MAS_PER_RAD)
    zeta = _nan0(rv) * (1.0 / AU_PER_JULIAN_YEAR_KM_S) * pxr
    e0, e1, e2 = eb_au
    if np.ndim(mu_a) == np.ndim(mu_d) == np.ndim(zeta) == 0 and mu_a == mu_d == zeta == 0.0:
        # No space motion: only the parallax shift remains.
        ux = x - pxr * e0
        uy = y - pxr * e1
        uz = z - pxr * e2
    else:
        # Light-time across the observer's offset from the barycentre (Roemer effect, pmpx).
        dt_yr = dt_yr + (x * e0 + y * e1 + z * e2) * LIGHT_TIME_AU_YR
        a = dt_yr * mu_a
        b = dt_yr * mu_d
        c = 1.0 + dt_yr * zeta
        bz = b * sd
        ux = c * x - a * sr - bz * cr - pxr * e0
        uy = c * y + a * cr - bz * sr - pxr * e1
        uz = c * z + b * cd - pxr * e2
    n = 1.0 / np.sqrt(ux * ux + uy * uy + uz * uz)
    return [ux * n, uy * n, uz * n]


def _deflect_and_aberrate(q, eh, em, v, bm1, deflect=True):
    """SOFA ``ldsun`` (light deflection by the Sun) then ``ab`` (aberration).

    Returns the unit vector of the proper direction (SOFA ``ab`` output).
    """
    em = float(em) if np.ndim(em) == 0 else em
    bm1 = float(bm1) if np.ndim(bm1) == 0 else bm1
    if deflect:
        dlim = 1e-6 / np.maximum(em * em, 1.0)
        qe = q[0] * eh[0] + q[1] * eh[1] + q[2] * eh[2]
        w = (SCHWARZSCHILD_RADIUS_SUN_AU / em) / np.maximum(qe + 1.0, dlim)
        wqe = w * qe
        # q + w (e - (q.e) q) = (1 - w q.e) q + w e
        k = 1.0 - wqe
        q = [k * q[0] + w * eh[0], k * q[1] + w * eh[1], k * q[2] + w * eh[2]]
    pdv = q[0] * v[0] + q[1] * v[1] + q[2] * v[2]
    w2 = SCHWARZSCHILD_RADIUS_SUN_AU / em
    # p = bm1 q + w1 v + w2 (v - pdv q) = (bm1 - w2 pdv) q + (1 + pdv/(1+bm1) + w2) v
    k1 = bm1 - w2 * pdv
    k2 = (1.0 + w2) + pdv * (1.0 / (1.0 + bm1))
    p0 = k1 * q[0] + k2 * v[0]
    p1 = k1 * q[1] + k2 * v[1]
    p2 = k1 * q[2] + k2 * v[2]
    n = 1.0 / np.sqrt(p0 * p0 + p1 * p1 + p2 * p2)
    return [p0 * n, p1 * n, p2 * n]


def _rot(m, p):
    if m.ndim == 2:
        m = [[float(m[i, j]) for j in range(3)] for i in range(3)]
        return [m[i][0] * p[0] + m[i][1] * p[1] + m[i][2] * p[2] for i in range(3)]
    return [m[..., i, 0] * p[0] + m[..., i, 1] * p[1] + m[..., i, 2] * p[2] for i in range(3)]


def _observing_matrix(astrom):
    """BCRS (aberrated) direction -> Cartesian azimuth/elevation (S=0, E=90), as atioq.

    Product A W R3(eral) BPN: CIO-based bias-precession-nutation, Earth rotation angle with
    longitude, polar motion, then hour angle/declination to azimuth/elevation (SOFA atioq).
    """
    if np.ndim(astrom["eral"]) == 0:
        return _observing_matrix_scalar(astrom)
    eral = astrom["eral"]
    ce, se = np.cos(eral), np.sin(eral)
    o, z = np.ones_like(eral), np.zeros_like(eral)
    r3 = np.stack(
        [np.stack([ce, se, z], -1), np.stack([-se, ce, z], -1), np.stack([z, z, o], -1)], -2
    )
    sx, cx = np.sin(astrom["xpl"]), np.cos(astrom["xpl"])
    sy, cy = np.sin(astrom["ypl"]), np.cos(astrom["ypl"])
    w = np.stack(
        [
            np.stack([cx, z, sx], -1),
            np.stack([sx * sy, cy, -cx * sy], -1),
            np.stack([-sx * cy, sy, cx * cy], -1),
        ],
        -2,
    )
    sp, cp = astrom["sphi"], astrom["cphi"]
    a = np.stack(
        [np.stack([sp, z, -cp], -1), np.stack([z, o, z], -1), np.stack([cp, z, sp], -1)], -2
    )
    return a @ w @ r3 @ astrom["bpn"]


def _observing_matrix_scalar(astrom):
    """:func:`_observing_matrix` for one instant, with Python floats (less overhead)."""
    e = float(astrom["eral"])
    ce, se = math.cos(e), math.sin(e)
    xp, yp = float(astrom["xpl"]), float(astrom["ypl"])
    sx, cx, sy, cy = math.sin(xp), math.cos(xp), math.sin(yp), math.cos(yp)
    sp, cp = float(astrom["sphi"]), float(astrom["cphi"])
    r3 = np.array([[ce, se, 0.0], [-se, ce, 0.0], [0.0, 0.0, 1.0]])
    w = np.array([[cx, 0.0, sx], [sx * sy, cy, -cx * sy], [-sx * cy, sy, cx * cy]])
    a = np.array([[sp, 0.0, -cp], [0.0, 1.0, 0.0], [cp, 0.0, sp]])
    return a @ w @ r3 @ astrom["bpn"]


def _refract(aet, refa, refb):
    """SOFA ``atioq`` refraction: unrefracted az/el vector -> observed vector and angle."""
    xaet, yaet, zaet = aet
    r0 = np.sqrt(xaet * xaet + yaet * yaet)
    r = np.maximum(r0, ATIOQ_CELMIN)
    zz = np.maximum(zaet, ATIOQ_SELMIN)
    tz = r / zz
    w = refb * tz * tz
    dl = (refa + w) * tz / (1.0 + (refa + 3.0 * w) / (zz * zz))
    cosdel = 1.0 - dl * dl * 0.5
    f = cosdel - dl * zz / r
    zaeo = cosdel * zaet + dl * r
    return f, zaeo, r0, dl


def _refraction_change(r0, z, af, zaeo, inv_length):
    """Refraction as the answers give it, unrefracted minus observed zenith distance, rad.

    From its sine. The unrefracted unit vector has sin zd0 = r0 and cos zd0 = z; SOFA atioq's
    observed direction is (|f| r0, zaeo) / L in the same vertical plane, L = hypot(|f| r0,
    zaeo) (:func:`_refract`). So sin(zd0 - zd) = r0 (zaeo - z |f|) / L = s, and
    asin s = s (1 + s^2/6 + 3 s^4/40) to within 5 s^7/112: below 2e-16 rad for the largest
    refraction the accepted air gives (about 0.0085 rad, 1200 hPa at -100 C). It holds where
    atioq keeps its model at the 2.9 deg value (lower, and below the horizon, where the
    observed vector is not of unit length and the change is not the model's angle) as
    everywhere else, and needs no trigonometric function. ``af`` (|f|) and ``inv_length``
    (1/L) are those of :func:`_observed_scale`.
    """
    sin_change = r0 * (zaeo - z * af) * inv_length
    s2 = sin_change * sin_change
    return sin_change * (1.0 + s2 * (1.0 / 6.0 + s2 * (3.0 / 40.0)))


@dataclass
class _Instant:
    """Star-independent quantities of one or more instants (arrays of the instants' shape)."""

    eb: list
    eh: list
    v: list
    em: np.ndarray
    bm1: np.ndarray
    m: np.ndarray
    sphi: np.ndarray
    cphi: np.ndarray
    refa: np.ndarray
    refb: np.ndarray
    eral: np.ndarray
    sun_obs: list
    sun_az: np.ndarray
    sun_zd: np.ndarray
    m_eh: list = None
    m_v: list = None
    ehv: np.ndarray = None
    srs_over_em: np.ndarray = None
    dlim: np.ndarray = None
    k2_const: np.ndarray = None
    inv_1_bm1: np.ndarray = None
    # One-instant matrix form (None for arrays of instants).
    a2: np.ndarray = None
    b5: np.ndarray = None
    eb_row: np.ndarray = None
    eb_col: np.ndarray = None


def _instant_quantities(astrom) -> _Instant:
    eb = [astrom["eb"][..., i] for i in range(3)]
    eh = [astrom["eh"][..., i] for i in range(3)]
    v = [astrom["v"][..., i] for i in range(3)]
    m = _observing_matrix(astrom)
    # Sun: BCRS direction from the observer is -eh; aberration, no self-deflection.
    sun = _deflect_and_aberrate(
        [-eh[0], -eh[1], -eh[2]], eh, astrom["em"], v, astrom["bm1"], deflect=False
    )
    sun_aet = _rot(m, sun)
    f, zaeo, r0, _ = _refract(sun_aet, astrom["refa"], astrom["refb"])
    sun_az = np.mod(np.arctan2(sun_aet[1], -sun_aet[0]), TWO_PI)
    af, inv_length = _observed_scale(f, zaeo, r0)
    sun_zd = np.arctan2(af * r0, zaeo)
    # The Sun's observed (refracted) unit vector, as the targets' (:func:`_observed_unit`).
    sun_obs = _observed_unit(sun_aet, af, zaeo, inv_length)
    em, bm1 = astrom["em"], astrom["bm1"]
    return _Instant(
        eb, eh, v, em, bm1, m, astrom["sphi"], astrom["cphi"],
        astrom["refa"], astrom["refb"], astrom["eral"], sun_obs, sun_az, sun_zd,
        m_eh=_rot(m, eh), m_v=_rot(m, v), ehv=eh[0] * v[0] + eh[1] * v[1] + eh[2] * v[2],
        srs_over_em=SCHWARZSCHILD_RADIUS_SUN_AU / em, dlim=1e-6 / np.maximum(em * em, 1.0),
        k2_const=1.0 + SCHWARZSCHILD_RADIUS_SUN_AU / em, inv_1_bm1=1.0 / (1.0 + bm1),
        **_one_instant_matrices(m, eb, eh, v, [sun_obs[0], sun_obs[1], 0.0]),
    )  # fmt: skip


def _observed_scale(f, zaeo, r0):
    """|f| and 1/L, L = hypot(|f| r0, zaeo): the length of SOFA atioq's observed vector.

    atioq's observed vector is (f x, f y, zaeo) for the unrefracted unit vector (x, y, z)
    (:func:`_refract`); it is not of unit length where the model is held (below about 2.9
    deg altitude). With |f|, as the zenith distance is taken, the azimuth is the
    unrefracted one.
    """
    af = np.abs(f)
    return af, 1.0 / np.hypot(af * r0, zaeo)


def _observed_unit(aet, af, zaeo, inv_length):
    """The observed (refracted) unit vector, from :func:`_observed_scale`'s |f| and 1/L."""
    return [aet[0] * af * inv_length, aet[1] * af * inv_length, zaeo * inv_length]


def _one_instant_matrices(m, eb, eh, v, sun=None):
    """Matrices for :func:`_apparent_into` (only for a single instant).

    ``a2`` (2, 3): rows e and v, giving u.e and u.v; ``b5`` (3, 5): [M | M e | M v], so
    that M (s u + t e + k v) = b5 @ (s u, t, k); with ``sun`` (a vector in the frame of M:
    the horizontal part of the Sun's observed unit vector) a fourth row sun.b5 gives the
    dot product with it as well.
    """
    if np.ndim(m) != 2:
        return {}
    a2 = np.array([[float(c) for c in eh], [float(c) for c in v]])
    eh, v = a2
    eb = np.array([float(c) for c in eb])
    m = np.asarray(m, dtype=float)
    # [M | M e | M v], with the Sun's row below it: filled in place (no stacking).
    b5 = np.empty((3 if sun is None else 4, 5))
    b5[:3, :3] = m
    np.matmul(m, eh, out=b5[:3, 3])
    np.matmul(m, v, out=b5[:3, 4])
    if sun is not None:
        np.matmul(np.array([float(c) for c in sun]), b5[:3], out=b5[3])
    return {"a2": a2, "b5": b5, "eb_row": eb, "eb_col": eb[:, None].copy()}


def _apparent_aet(q, ins: _Instant):
    """Deflection (ldsun), aberration (ab) and the rotation to azimuth/elevation, fused.

    With q the unit BCRS direction, SOFA ldsun gives q' = (1 - w q.e) q + w e and ab gives
    p = k1 q' + k2 v (normalised); the rotation M to azimuth/elevation is linear, so
    M p = k1 (1 - w q.e) (M q) + k1 w (M e) + k2 (M v), with M e and M v computed once per
    instant. The result is the unit vector of the unrefracted topocentric direction.
    """
    eh, v, bm1 = ins.eh, ins.v, ins.bm1
    qe = q[0] * eh[0] + q[1] * eh[1] + q[2] * eh[2]
    qv = q[0] * v[0] + q[1] * v[1] + q[2] * v[2]
    w = ins.srs_over_em / np.maximum(qe + 1.0, ins.dlim)
    g = 1.0 - w * qe
    pdv = g * qv + w * ins.ehv  # q'.v
    k1 = bm1 - ins.srs_over_em * pdv
    k2 = ins.k2_const + pdv * ins.inv_1_bm1
    a = k1 * g
    b = k1 * w
    mq = _rot(ins.m, q)
    me, mv = ins.m_eh, ins.m_v
    p0 = a * mq[0] + b * me[0] + k2 * mv[0]
    p1 = a * mq[1] + b * me[1] + k2 * mv[1]
    p2 = a * mq[2] + b * me[2] + k2 * mv[2]
    n = 1.0 / np.sqrt(p0 * p0 + p1 * p1 + p2 * p2)
    return [p0 * n, p1 * n, p2 * n]


#: Outputs of the per-star chain, in order, with their dtypes.
_CHAIN_FIELDS = (
    ("azimuth_deg", float),
    ("zenith_distance_deg", float),
    ("altitude_deg", float),
    ("hour_angle_deg", float),
    ("observed_dec_deg", float),
    ("observed_ra_cio_deg", float),
    ("parallactic_angle_deg", float),
    ("airmass", float),
    ("refraction_arcsec", float),
    ("sun_separation_deg", float),
    ("flags", np.uint32),
)


def _chain(ra_deg, dec_deg, px, pmra, pmdec, rv, dt, ins: _Instant, limits, detail=True, out=None):
    """Catalogue astrometry -> observed quantities (degrees) and per-star flag bits.

    ``detail=False`` skips the hour angle, observed declination and RA and the parallactic
    angle (returned as NaN). ``out``, a list of arrays in :data:`_CHAIN_FIELDS` order, lets
    the results be written in place (the caller copies any result that is not its array).
    """

    def dst(k):
        return None if out is None else out[k]

    q = _star_vectors(ra_deg, dec_deg, px, pmra, pmdec, rv, dt, ins.eb)
    aet = _apparent_aet(q, ins)
    xaet, yaet, zaet = aet
    vector = np.ndim(xaet) > 0
    # atan2(-y, x) + pi is the azimuth atan2(y, -x) of atioq mapped into [0, 2pi].
    if vector:
        az = np.arctan2(-yaet, xaet, out=dst(0))
        az *= DEG_PER_RAD
        az += 180.0
        np.subtract(az, 360.0, out=az, where=az >= 360.0)
    else:
        az = np.arctan2(-yaet, xaet) * DEG_PER_RAD + 180.0
        az = az - 360.0 if az >= 360.0 else az
    f, zaeo, r0, _ = _refract(aet, ins.refa, ins.refb)
    af, inv_length = _observed_scale(f, zaeo, r0)
    zd = np.arctan2(af * r0, zaeo, out=dst(1) if vector else None)
    zd *= DEG_PER_RAD
    alt = np.subtract(90.0, zd, out=dst(2) if vector else None)
    if detail:
        xaeo = xaet * f
        yaeo = yaet * f
        sp, cp = ins.sphi, ins.cphi
        v0 = sp * xaeo + cp * zaeo
        v2 = sp * zaeo - cp * xaeo
        h2 = v0 * v0 + yaeo * yaeo
        ha = np.multiply(np.arctan2(-yaeo, v0), DEG_PER_RAD, out=dst(3) if vector else None)
        dec = np.multiply(np.arctan2(v2, np.sqrt(h2)), DEG_PER_RAD, out=dst(4) if vector else None)
        ra = np.subtract(ins.eral * DEG_PER_RAD, ha, out=dst(5) if vector else None)
        ra -= 360.0 * np.floor(ra * (1.0 / 360.0))
        # Parallactic angle (SOFA hd2pa) from the same vector: sin q cos d = cos(phi) sin h,
        # cos q cos d = sin(phi) cos^2 d - cos(phi) sin d cos d cos h, for a unit vector. The
        # vector is not one where refraction is held at its limit (below about 3 degrees,
        # SOFA atioq), so the first is scaled by its length L as the second is by L^2.
        length = np.sqrt(h2 + v2 * v2)
        pa = np.multiply(
            np.arctan2(-cp * yaeo * length, sp * h2 - cp * v2 * v0),
            DEG_PER_RAD,
            out=dst(6) if vector else None,
        )
    else:
        ha = dec = ra = pa = np.nan
    airmass = airmass_young1994(zaet)
    # Sun separation between the observed (refracted) places of the target and the Sun,
    # from the chord between their unit vectors: 2 asin(|a-b|/2), |a-b|^2 = 2 - 2 a.b
    # (precision about 1e-8 rad near zero separation, ample here).
    s = ins.sun_obs
    o = _observed_unit(aet, af, zaeo, inv_length)
    half_chord2 = 0.5 - 0.5 * (o[0] * s[0] + o[1] * s[1] + o[2] * s[2])
    sep = np.multiply(
        np.arcsin(np.sqrt(np.maximum(half_chord2, 0.0))),
        2.0 * DEG_PER_RAD,
        out=dst(9) if vector else None,
    )
    # The change of zenith distance (:func:`_refraction_change`).
    refraction = np.multiply(
        _refraction_change(r0, zaet, af, zaeo, inv_length),
        _ARCSEC_PER_RAD,
        out=dst(8) if vector else None,
    )
    horizon_limit, avoidance = limits
    flags = _any_bits(
        (np.isnan(px), _F_MISSING_PARALLAX),
        (px <= 0.0, _F_NON_POSITIVE_PARALLAX),
        (np.isnan(rv), _F_MISSING_RADIAL_VELOCITY),
        (np.isnan(pmra) | np.isnan(pmdec), _F_MISSING_PROPER_MOTION),
        (alt < horizon_limit, _F_BELOW_HORIZON_LIMIT),
        (sep < avoidance, _F_WITHIN_SUN_AVOIDANCE),
        (zaet < 0.0, _F_AIRMASS_UNDEFINED),
        ((alt < REFRACTION_UNCERTAIN_BELOW_DEG) & (ins.refa != 0.0), _F_REFRACTION_UNCERTAIN),
    )
    return az, zd, alt, ha, dec, ra, pa, airmass, refraction, sep, flags


#: Stars per block when many stars share one instant. Measured on a 2-core machine
#: (benchmarks/bench_observed.py, CPU time for 100,000 stars, blocks of 4096 to 32768):
#: 16384 is near the optimum, 8 % faster than 8192 and 20 % faster than 4096 (fewer numpy
#: calls per star); the work arrays take about 6 MB.
CHAIN_BLOCK = 16384

#: Outputs of the chain that ``hour_angle=False`` leaves out (NaN).
_DETAIL_FIELDS = frozenset(
    ("hour_angle_deg", "observed_dec_deg", "observed_ra_cio_deg", "parallactic_angle_deg")
)


# ---------------------------------------------------------------------------------------------
# Many stars (or one) at one instant: the same chain, written as in-place numpy operations
# ---------------------------------------------------------------------------------------------

#: Byte offset, within a uint32 flag word, of the byte holding bits 8-15 (native byte
#: order): the airmass bit is set there through a uint8 view (no cast).
_FLAG_BYTE1 = 1 if sys.byteorder == "little" else 2


class _Scratch:
    """Work arrays for :func:`_observe_block`, for blocks of ``n`` stars.

    One is made per call of :func:`observed_places` (concurrent requests never share one)
    and reused for every block of that call, so that the chain allocates nothing per block.
    """

    def __init__(self, n: int):
        self.n = n
        f = np.empty((48, n))
        self.ang, self.t2, self.d, self.sh, self.sin, self.cos = (
            f[i : i + 2] for i in range(0, 12, 2)
        )
        self.p0, self.p, self.t3 = f[12:15], f[15:18], f[18:21]
        self.r = f[21:25]  # direction (3 rows) and its dot product with the Sun's
        self.q = f[25:27]
        self.x5 = f[27:32]
        self.motion = f[40:43]  # space motion per unit distance (3 rows)
        (
            self.pxr, self.uu, self.w, self.g, self.pdv, self.k1, self.tmp, self.tmp2,
        ) = f[32:40]  # fmt: skip
        self.r0, self.rr, self.zz, self.f = f[44:48]
        # Rows reused after the apparent direction is known (their first use is over).
        (self.tz, self.wr, self.dl, self.cosdel, self.zaeo, self.xo, self.yo, self.v0,
         self.v2, self.h2) = f[0:10]  # fmt: skip
        self.mask = np.empty((4, n), dtype=bool)
        self.u8 = np.empty((2, n), dtype=np.uint8)


def _bit_index(flag: int) -> int:
    """Position of a single-bit flag (16 -> 4)."""
    return flag.bit_length() - 1


def _angles_sincos(ra_deg, dec_deg, ws: _Scratch):
    """Sines and cosines of RA and Dec (degrees) into ``ws.sin``, ``ws.cos`` (rows RA, Dec).

    RA: from the tangent of the quarter angle as :func:`_sincos` (double-angle formulae
    applied twice, in the combined form below); RA in [0, 360] is shifted by pi (both
    signs flipped), other values are reduced to [-pi, pi].
    Dec: the tangent of the half angle, t = tan(d/2) with |t| <= 1 for |d| <= 90 deg:
    sin d = 2t / (1 + t^2), cos d = (1 - t^2) / (1 + t^2).
    """
    t, t2, d, t4 = ws.ang[0], ws.t2[0], ws.d[0], ws.sh[0]
    (sr, sd), (cr, cd) = ws.sin, ws.cos
    np.multiply(ra_deg, 0.25 * RAD_PER_DEG, out=t)  # a quarter of the RA, radians
    if ws.n == 1:
        in_range = 0.0 <= t.item() <= 0.25 * TWO_PI
    else:
        in_range = t.min() >= 0.0 and t.max() <= 0.25 * TWO_PI
    if in_range:
        t -= 0.25 * np.pi
    else:
        np.multiply(t, 4.0 / TWO_PI, out=t2)
        np.round(t2, out=t2)
        t2 *= 0.25 * TWO_PI
        t -= t2
    np.tan(t, out=t)  # t = tan(x / 4), |x| <= pi
    np.multiply(t, t, out=t2)
    np.add(t2, 1.0, out=d)
    np.divide(1.0, d, out=d)
    np.multiply(d, d, out=d)  # 1 / (1 + t^2)^2
    np.multiply(t2, 4.0, out=t4)
    omt = np.subtract(1.0, t2, out=t2)  # 1 - t^2
    # sin x = 4 t (1 - t^2) / (1 + t^2)^2, cos x = ((1 - t^2)^2 - 4 t^2) / (1 + t^2)^2;
    # for x = RA - pi, sin RA = -sin x and cos RA = -cos x.
    np.multiply(t, -4.0 if in_range else 4.0, out=sr)
    sr *= omt
    sr *= d
    np.multiply(omt, omt, out=cr)
    if in_range:
        np.subtract(t4, cr, out=cr)
    else:
        cr -= t4
    cr *= d

    t, t2, d = ws.ang[1], ws.t2[1], ws.d[1]
    np.multiply(dec_deg, 0.5 * RAD_PER_DEG, out=t)
    np.tan(t, out=t)  # tan(d / 2)
    np.multiply(t, t, out=t2)
    np.add(t2, 1.0, out=d)
    np.divide(1.0, d, out=d)
    np.multiply(d, 2.0, out=sd)
    sd *= t
    np.subtract(1.0, t2, out=cd)
    cd *= d


def _space_motion(mu_a, mu_d, zeta, ws: _Scratch):
    """Space motion per unit distance w = mu_a* e_a + mu_d e_d + zeta p0, into ``ws.motion``.

    ``ws.p0`` holds the catalogue direction p0 and ``ws.sin``/``ws.cos`` its angles; e_a =
    (-sin a, cos a, 0) and e_d = (-sin d cos a, -sin d sin a, cos d) are the directions of
    increasing RA and Dec; mu_a* (RA component times cos d) and mu_d in radians per year,
    zeta = radial velocity x parallax / A in radians per year (SOFA ``pmpx``).
    """
    (sr, sd), (cr, cd) = ws.sin, ws.cos
    w, tmp, md_sd = ws.motion, ws.tmp, ws.tmp2
    np.multiply(ws.p0, zeta, out=w)
    np.multiply(sd, mu_d, out=md_sd)
    w[0] -= np.multiply(sr, mu_a, out=tmp)
    w[0] -= np.multiply(md_sd, cr, out=tmp)
    w[1] += np.multiply(cr, mu_a, out=tmp)
    w[1] -= np.multiply(md_sd, sr, out=tmp)
    w[2] += np.multiply(cd, mu_d, out=tmp)


def _toward_star(moving, dt, ins, ws: _Scratch):
    """Direction from the observer, unnormalised, into ``ws.p`` (SOFA ``pmpx``).

    u = p0 + dt' w - parallax eb, with ``ws.p0`` the catalogue direction, ``ws.motion`` its
    space motion w (:func:`_space_motion`, used if ``moving``), ``ws.pxr`` the parallax in
    radians and dt' = dt + (p0.eb)/c the interval with the light time across the
    observer's offset from the barycentre. As :func:`_star_vectors`.
    """
    p0, p = ws.p0, ws.p
    shift = np.multiply(ins.eb_col, ws.pxr, out=ws.t3)  # parallax eb
    if not moving:
        np.subtract(p0, shift, out=p)
        return
    t = np.matmul(ins.eb_row, p0, out=ws.tmp)
    t *= LIGHT_TIME_AU_YR
    t += dt
    np.multiply(ws.motion, t, out=p)
    p += p0
    p -= shift


def _sum_squares(rows, out, tmp):
    """Sum over the first axis of ``rows`` squared, into ``out`` (``tmp``: work rows)."""
    if rows.shape[1] >= 64:
        return np.einsum("ij,ij->j", rows, rows, out=out)
    sq = np.multiply(rows, rows, out=tmp[: rows.shape[0]])
    return np.add.reduce(sq, axis=0, out=out)


def _apparent_into(ins, ws: _Scratch, with_sun=False):
    """Light deflection (ldsun), aberration (ab) and the rotation of the instant, fused.

    From the unnormalised direction u in ``ws.p``, the unit vector of the aberrated
    direction rotated by the instant's matrix M (to the azimuth/elevation frame for the
    observer, the bias-precession-nutation for the geocentre) goes into ``ws.r[:3]``, and
    with ``with_sun`` its dot product with the instant's Sun vector (the horizontal part of
    the Sun's observed unit vector, :func:`_one_instant_matrices`) into ``ws.r[3]``. The
    arithmetic of :func:`_apparent_aet`: with q = u/|u|, q' = (1 - w q.e) q + w e (ldsun)
    and p = k1 q' + k2 v (ab), M p = M (k1 (1 - w q.e) q + k1 w e + k2 v), one product of
    the instant's ``b5`` with the stacked coefficients (:func:`_one_instant_matrices`).
    """
    p, q, x = ws.p, ws.q, ws.x5
    np.matmul(ins.a2, p, out=q)  # rows: u.eh, u.v
    inv = _sum_squares(p, ws.uu, ws.t3)
    np.sqrt(inv, out=inv)
    np.divide(1.0, inv, out=inv)
    qe = np.multiply(q[0], inv, out=q[0])
    qv = np.multiply(q[1], inv, out=q[1])
    w, g, pdv, k1, tmp = ws.w, ws.g, ws.pdv, ws.k1, ws.tmp
    np.add(qe, 1.0, out=w)
    np.maximum(w, ins.dlim, out=w)
    np.divide(ins.srs_over_em, w, out=w)
    np.multiply(w, qe, out=g)
    np.subtract(1.0, g, out=g)
    np.multiply(g, qv, out=pdv)
    pdv += np.multiply(w, ins.ehv, out=tmp)
    np.multiply(pdv, ins.srs_over_em, out=k1)
    np.subtract(ins.bm1, k1, out=k1)
    k2 = np.multiply(pdv, ins.inv_1_bm1, out=x[4])
    k2 += ins.k2_const
    np.multiply(k1, g, out=tmp)
    tmp *= inv
    np.multiply(p, tmp, out=x[:3])  # k1 (1 - w q.e) q
    np.multiply(k1, w, out=x[3])
    r = ws.r if with_sun else ws.r[:3]
    np.matmul(ins.b5, x, out=r)
    norm = _sum_squares(r[:3], tmp, ws.t3)
    np.sqrt(norm, out=norm)
    np.divide(1.0, norm, out=norm)
    r *= norm


def _observe_block(stars, dt, ins: _Instant, limits, detail, out, ws: _Scratch, geo=None,
                   gout=None):  # fmt: skip
    """:func:`_chain` (and :func:`_geocentric_places`) for 1-D star arrays at one instant.

    The same formulae, written as in-place numpy operations on the work arrays
    ``ws``, writing into ``out`` (arrays in :data:`_CHAIN_FIELDS` order; with ``detail``
    False the hour angle, observed declination and RA and parallactic angle are left alone)
    and, with ``geo`` (the geocentric instant) given, the geocentric places into ``gout``
    (astrometric RA, Dec, apparent RA, Dec, CIO-based RA). The star-only terms are computed
    once for both observers. The number of numpy calls does not depend on the number of
    stars, which keeps one star cheap, and nothing is allocated per star, which keeps many
    stars fast.
    """
    ra_deg, dec_deg, px, pmra, pmdec, rv = stars
    _angles_sincos(ra_deg, dec_deg, ws)
    (sr, sd), (cr, cd) = ws.sin, ws.cos
    p0 = ws.p0
    np.multiply(cd, cr, out=p0[0])
    np.multiply(cd, sr, out=p0[1])
    np.copyto(p0[2], sd)
    pxr = np.fmax(px, 0.0, out=ws.pxr)  # NaN (missing) and non-positive parallax: none
    pxr *= 1.0 / MAS_PER_RAD
    mu_a, mu_d, zeta = _nan0(pmra), _nan0(pmdec), _nan0(rv)
    motion = not (
        np.ndim(mu_a) == np.ndim(mu_d) == np.ndim(zeta) == 0 and mu_a == mu_d == zeta == 0
    )
    if motion:
        _space_motion(
            mu_a * (1.0 / MAS_PER_RAD),
            mu_d * (1.0 / MAS_PER_RAD),
            zeta * (1.0 / AU_PER_JULIAN_YEAR_KM_S) * pxr,
            ws,
        )

    if geo is not None:
        _toward_star(motion, dt, geo, ws)
        u = ws.p
        a_ra, a_dec, app_ra, app_dec, ra_cio = gout
        tmp, work = ws.tmp, ws.pdv
        # Arctangents and reductions modulo 2 pi in the forms of core.angles, as below.
        atan2_into(u[1], u[0], a_ra, work)
        wrap_two_pi(a_ra, work)
        a_ra *= DEG_PER_RAD
        np.multiply(u[0], u[0], out=tmp)
        tmp += np.multiply(u[1], u[1], out=ws.tmp2)
        np.sqrt(tmp, out=tmp)
        latitude_into(u[2], tmp, a_dec)
        a_dec *= DEG_PER_RAD
        _apparent_into(geo, ws)
        pi = ws.r
        ri = atan2_into(pi[1], pi[0], ws.tmp2, work)
        np.multiply(pi[0], pi[0], out=tmp)
        tmp += np.multiply(pi[1], pi[1], out=ws.k1)
        np.sqrt(tmp, out=tmp)
        latitude_into(pi[2], tmp, app_dec)
        app_dec *= DEG_PER_RAD
        np.copyto(ra_cio, ri)
        wrap_two_pi(ra_cio, work)
        ra_cio *= DEG_PER_RAD
        np.subtract(ri, geo.eo, out=app_ra)
        wrap_two_pi(app_ra, work)
        app_ra *= DEG_PER_RAD

    _toward_star(motion, dt, ins, ws)
    _apparent_into(ins, ws, with_sun=True)
    x, y, z, sun_dot = ws.r
    tmp, tmp2 = ws.tmp, ws.tmp2
    # atan2(-y, x) + pi is the azimuth atan2(y, -x) of atioq mapped into [0, 2pi].
    az = atan2_into(y, x, out[0], ws.pdv)
    az *= -DEG_PER_RAD  # atan2(-y, x) = -atan2(y, x)
    az += 180.0
    big = np.greater_equal(az, 360.0, out=ws.mask[0])
    np.subtract(az, 360.0, out=az, where=big)

    # Refraction as :func:`_refract`.
    r0, r, zz, tz, wr, dl, cosdel, f, zaeo = (
        ws.r0, ws.rr, ws.zz, ws.tz, ws.wr, ws.dl, ws.cosdel, ws.f, ws.zaeo,
    )  # fmt: skip
    np.multiply(x, x, out=r0)
    r0 += np.multiply(y, y, out=tmp)
    np.sqrt(r0, out=r0)
    np.maximum(r0, ATIOQ_CELMIN, out=r)
    np.maximum(z, ATIOQ_SELMIN, out=zz)
    np.divide(r, zz, out=tz)
    np.multiply(tz, ins.refb, out=wr)
    wr *= tz
    np.add(wr, ins.refa, out=dl)
    dl *= tz
    np.multiply(wr, 3.0, out=tmp)
    tmp += ins.refa
    tmp /= np.multiply(zz, zz, out=tmp2)
    tmp += 1.0
    dl /= tmp
    np.multiply(dl, dl, out=cosdel)
    cosdel *= 0.5
    np.subtract(1.0, cosdel, out=cosdel)
    np.multiply(dl, zz, out=f)
    f /= r
    np.subtract(cosdel, f, out=f)
    np.multiply(cosdel, z, out=zaeo)
    zaeo += np.multiply(dl, r, out=tmp)

    # The altitude atan2(zaeo, |f| r0), |f| r0 >= 0, by core.angles (for large blocks the
    # arctangent of the quotient, half the cost of arctan2 without AVX-512).
    np.absolute(f, out=tmp)
    tmp *= r0
    alt = latitude_into(zaeo, tmp, out[2])
    alt *= DEG_PER_RAD
    np.subtract(90.0, alt, out=out[1])
    if detail:
        sp, cp = ins.sphi, ins.cphi
        xo, yo, v0, v2, h2 = ws.xo, ws.yo, ws.v0, ws.v2, ws.h2
        np.multiply(x, f, out=xo)
        np.multiply(y, f, out=yo)
        np.multiply(xo, sp, out=v0)
        v0 += np.multiply(zaeo, cp, out=tmp)
        np.multiply(zaeo, sp, out=v2)
        v2 -= np.multiply(xo, cp, out=tmp)
        np.multiply(v0, v0, out=h2)
        h2 += np.multiply(yo, yo, out=tmp)
        ha = atan2_into(yo, v0, out[3], ws.pdv)
        ha *= -DEG_PER_RAD  # atan2(-y, v0) = -atan2(y, v0)
        np.sqrt(h2, out=tmp)
        dec = latitude_into(v2, tmp, out[4])  # atan2(v2, sqrt(h2)), as the altitude above
        dec *= DEG_PER_RAD
        ra = np.subtract(ins.eral * DEG_PER_RAD, ha, out=out[5])
        np.multiply(ra, 1.0 / 360.0, out=tmp)
        np.floor(tmp, out=tmp)
        tmp *= 360.0
        ra -= tmp
        # Parallactic angle (SOFA hd2pa) from the same vector, as in :func:`_chain`.
        np.multiply(v2, v2, out=tmp2)
        tmp2 += h2
        np.sqrt(tmp2, out=tmp2)  # length of the vector
        np.multiply(yo, -cp, out=tmp)
        tmp *= tmp2
        np.multiply(h2, sp, out=tmp2)
        tmp2 -= np.multiply(np.multiply(v2, cp, out=v2), v0, out=v2)
        pa = atan2_into(tmp, tmp2, out[6], ws.pdv)
        pa *= DEG_PER_RAD

    # Airmass as :func:`airmass_young1994` (NaN below the geometric horizon).
    airmass, den = out[7], tmp
    np.multiply(z, 1.002432, out=airmass)
    airmass += 0.148386
    airmass *= z
    airmass += 0.0096467
    np.add(z, 0.149864, out=den)
    den *= z
    den += 0.0102963
    den *= z
    den += 0.000303978
    airmass /= den
    below = np.less(z, 0.0, out=ws.mask[1])
    np.putmask(airmass, below, np.nan)

    # Sun separation between the observed places, as :func:`_chain`: the observed unit
    # vector is (|f| x, |f| y, zaeo) / L, L = hypot(|f| r0, zaeo); ``sun_dot`` holds
    # x sx + y sy for the Sun's observed unit vector s (the row of ``b5``).
    af, length = ws.w, ws.g
    np.absolute(f, out=af)
    np.multiply(af, r0, out=length)
    length *= length
    length += np.multiply(zaeo, zaeo, out=tmp)
    np.sqrt(length, out=length)
    np.multiply(af, sun_dot, out=tmp)
    tmp += np.multiply(zaeo, ins.sun_obs[2], out=tmp2)
    tmp /= length  # the dot product of the observed unit vectors
    hc = np.multiply(tmp, 0.5, out=tmp)
    np.subtract(0.5, hc, out=hc)
    np.maximum(hc, 0.0, out=hc)
    np.sqrt(hc, out=hc)
    sep = np.arcsin(hc, out=out[9])
    sep *= 2.0 * DEG_PER_RAD
    # The change of zenith distance, as :func:`_refraction_change`: s = r0 (zaeo - z |f|) / L
    # (``af`` |f| and ``length`` L from above), asin s = s (1 + s^2/6 + 3 s^4/40).
    refraction = np.multiply(z, af, out=out[8])
    np.subtract(zaeo, refraction, out=refraction)
    refraction *= r0
    refraction /= length
    s2 = np.multiply(refraction, refraction, out=tmp)
    np.multiply(s2, 3.0 / 40.0, out=tmp2)
    tmp2 += 1.0 / 6.0
    tmp2 *= s2
    tmp2 += 1.0
    refraction *= tmp2
    refraction *= _ARCSEC_PER_RAD

    # Flags: bits 0-7 gathered in a uint8 row, bits 10 and 11 written into the second byte.
    horizon_limit, avoidance = limits
    bits, tmp8 = ws.u8
    np.left_shift(
        np.less(alt, horizon_limit, out=ws.mask[2]).view(np.uint8),
        _bit_index(_F_BELOW_HORIZON_LIMIT),
        out=bits,
    )
    bits |= np.left_shift(
        np.less(sep, avoidance, out=ws.mask[3]).view(np.uint8),
        _bit_index(_F_WITHIN_SUN_AVOIDANCE),
        out=tmp8,
    )
    scalar_bits = 0
    for value, test, bit in (
        (px, np.isnan, _bit_index(_F_MISSING_PARALLAX)),
        (px, None, _bit_index(_F_NON_POSITIVE_PARALLAX)),  # None: the test value <= 0
        (rv, np.isnan, _bit_index(_F_MISSING_RADIAL_VELOCITY)),
        (pmra, np.isnan, _bit_index(_F_MISSING_PROPER_MOTION)),
        (pmdec, np.isnan, _bit_index(_F_MISSING_PROPER_MOTION)),
    ):
        if np.ndim(value) == 0:
            scalar_bits |= bool(value <= 0.0 if test is None else test(value)) << bit
        else:
            m = ws.mask[3]
            if test is None:
                np.less_equal(value, 0.0, out=m)
            else:
                test(value, out=m)
            bits |= np.left_shift(m.view(np.uint8), bit, out=tmp8)
    if scalar_bits:
        bits |= scalar_bits
    flags = out[10]
    np.copyto(flags, bits)
    byte1 = flags.view(np.uint8)[_FLAG_BYTE1::4]
    np.left_shift(below.view(np.uint8), _bit_index(_F_AIRMASS_UNDEFINED) - 8, out=byte1)
    if ins.refa != 0.0:
        low = np.less(alt, REFRACTION_UNCERTAIN_BELOW_DEG, out=ws.mask[2])
        byte1 |= np.left_shift(
            low.view(np.uint8), _bit_index(_F_REFRACTION_UNCERTAIN) - 8, out=tmp8
        )


# ---------------------------------------------------------------------------------------------
# Rates for tracking: how fast the observed azimuth, altitude, parallactic angle, hour angle
# and declination change
# ---------------------------------------------------------------------------------------------

#: Rate of the Earth rotation angle, rad per second of UT1: 2 pi x 1.00273781191135448 per
#: UT1 day (IERS Conventions 2010, eq. 5.15, as SOFA era00 computes the angle; quoted from
#: memory, checked against pyerfa era00 in tests/core/test_tracking_rates.py).
ERA_RATE_RAD_S = TWO_PI * 1.00273781191135448 / 86_400.0


def _rotation_axis_aet(xpl, ypl, sphi, cphi):
    """The Earth's rotation axis (the CIP) in the azimuth/elevation frame of SOFA atioq
    (x south, y east, z up): A W z of :func:`_observing_matrix`, polar motion included."""
    sx, cx, sy, cy = np.sin(xpl), np.cos(xpl), np.sin(ypl), np.cos(ypl)
    return (sphi * sx - cphi * cx * cy, -cx * sy, cphi * sx + sphi * cx * cy)


def _aberration_drift_aet(site: Site, m, ehp, axis):
    """How the aberration moves every star within a second, in the azimuth/elevation frame:
    the observer's acceleration over c, rad/s (the g of :func:`tracking_rates`).

    Two accelerations count: the site's, turning with the Earth (omega^2 rho, rho its
    distance from the axis, directed along P x east; 2.3e-5 arcsec/s at the equator), and
    the Earth's toward the Sun (GM/r^2, 4e-6 arcsec/s). ``m`` is the observing matrix, ``ehp``
    the Earth's heliocentric position (au), ``axis`` the rotation axis in the frame.
    """
    xyz = erfa.gd2gc(1, site.longitude_deg * RAD_PER_DEG, site.latitude_deg * RAD_PER_DEG,
                     site.height_m)  # fmt: skip
    k = ERA_RATE_RAD_S * ERA_RATE_RAD_S * math.hypot(xyz[0], xyz[1]) / (C_KM_S * 1000.0)
    ehp = np.asarray(ehp, dtype=float)
    dist = np.sqrt(np.sum(ehp * ehp, axis=-1, keepdims=True))
    accel = ehp * (-GM_SUN_M3_S2 / (AU_M * AU_M * C_KM_S * 1000.0)) / dist**3
    g = np.einsum("...ij,...j->...i", np.asarray(m, dtype=float), accel)
    px, _, pz = axis
    return (g[..., 0] - k * pz, g[..., 1], g[..., 2] + k * px)


def _observed_zd_slope(r0, z, refa, refb):
    """d(observed zenith distance) / d(unrefracted zenith distance) of SOFA atioq's
    refraction, exactly as :func:`_refract` and the answers compute the observed zenith
    distance, atan2(|f| r0, zaeo), its guards included (where a guard holds a term, its
    derivative is zero); 1 with refraction off. ``r0`` and ``z`` are the sine and cosine
    of the unrefracted zenith distance."""
    # The values themselves from _refract (a vertical through azimuth 0), their
    # derivatives here.
    f, y, _, dl = _refract((-r0, 0.0 * r0, z), refa, refb)
    r = np.maximum(r0, ATIOQ_CELMIN)
    zz = np.maximum(z, ATIOQ_SELMIN)
    dr = z * (r0 > ATIOQ_CELMIN)  # 0 where the guard holds r
    dzz = -r0 * (z > ATIOQ_SELMIN)
    tz = r / zz
    dtz = (dr - tz * dzz) / zz
    w = refb * tz * tz
    dw = 2.0 * refb * tz * dtz
    inv_zz2 = 1.0 / (zz * zz)
    den = 1.0 + (refa + 3.0 * w) * inv_zz2
    dden = 3.0 * dw * inv_zz2 - 2.0 * (refa + 3.0 * w) * dzz * inv_zz2 / zz
    ddl = (dw * tz + (refa + w) * dtz - dl * dden) / den
    cosdel = 1.0 - 0.5 * dl * dl
    dcosdel = -dl * ddl
    df = dcosdel - (ddl * zz + dl * dzz) / r + dl * zz * dr / (r * r)
    sign = np.copysign(1.0, f)
    x = sign * f * r0
    dx = sign * (df * r0 + f * z)
    dy = dcosdel * z - cosdel * r0 + ddl * r + dl * dr
    return (y * dx - x * dy) / (x * x + y * y)


def tracking_rates(
    azimuth_deg, zenith_distance_deg, refraction_arcsec, axis, sphi, cphi, refa, refb,
    drift=(0.0, 0.0, 0.0),
):  # fmt: skip
    """Rates of change of the observed azimuth, altitude, parallactic angle, hour angle and
    declination, arcsec/s.

    Parameters
    ----------
    azimuth_deg, zenith_distance_deg, refraction_arcsec : array_like
        The observed place as :func:`observed_places` gives it (the unrefracted zenith
        distance is the observed one plus the refraction).
    axis : sequence of three array_like
        The Earth's rotation axis in the azimuth/elevation frame
        (:func:`_rotation_axis_aet`).
    sphi, cphi : array_like
        Sine and cosine of the site's latitude (the pole of the observed hour angle and
        declination, as SOFA atioq and hd2pa take it).
    refa, refb : array_like
        Refraction constants, radians (0 with refraction off).
    drift : sequence of three array_like
        The observer's acceleration over c in the same frame, rad/s
        (:func:`_aberration_drift_aet`): how aberration moves the stars.

    Returns
    -------
    azimuth_rate, altitude_rate, parallactic_angle_rate : ndarray
        Arcsec per second of time; the azimuth's rate is that of the coordinate (times the
        cosine of the altitude for the motion across the sky). NaN at the zenith, where
        the azimuth and the parallactic angle are not defined.
    hour_angle_rate, declination_rate : ndarray
        Arcsec per second of time, of the observed hour angle and declination (the place
        an equatorial mount points at, refraction included, as SOFA atioq gives them); the
        hour angle's rate is that of the coordinate (times the cosine of the declination
        for the motion across the sky). Not finite at the pole of the hour angle; finite
        at the exact zenith too, where the azimuth's rate is not.

    Notes
    -----
    The unrefracted direction u turns with the Earth and is moved by the aberration of
    the observer's changing velocity: du/dt = -omega P x u + g - (g.u) u, with omega the
    rate of the Earth rotation angle (:data:`ERA_RATE_RAD_S`), P the rotation axis and g
    the drift (first order in v/c). The refraction keeps the azimuth and changes the zenith
    distance by the slope of :func:`_observed_zd_slope`; the parallactic angle's rate is
    the derivative of the answer's own formula (SOFA hd2pa of the observed place) along
    the observed direction's motion, and so are the hour angle's and the declination's
    (the observed direction turned to the site's equator, as atioq turns it). Held within
    the second: precession-nutation, the star's own motion and parallax, the Sun's light
    deflection (together about 1e-6 arcsec/s; the deflection's change grows as the inverse
    square of the distance from the Sun, 7e-6 at a degree, 7e-5 at its limb:
    tests/core/test_tracking_rates.py); a UT1 second differs from an SI second by the excess
    length of day (about 1e-8 of the rate).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        az = np.asarray(azimuth_deg, dtype=float) * RAD_PER_DEG
        zd_obs = np.asarray(zenith_distance_deg, dtype=float) * RAD_PER_DEG
        zd0 = zd_obs + np.asarray(refraction_arcsec, dtype=float) / _ARCSEC_PER_RAD
        sa, ca = np.sin(az), np.cos(az)
        r0, z = np.sin(zd0), np.cos(zd0)
        u = (-r0 * ca, r0 * sa, z)
        px, py, pz = axis
        w = -ERA_RATE_RAD_S
        gx, gy, gz = drift
        gu = gx * u[0] + gy * u[1] + gz * u[2]
        ud = (
            w * (py * u[2] - pz * u[1]) + gx - gu * u[0],
            w * (pz * u[0] - px * u[2]) + gy - gu * u[1],
            w * (px * u[1] - py * u[0]) + gz - gu * u[2],
        )
        across = ca * ud[1] + sa * ud[0]  # rad/s along the almucantar
        slope = _observed_zd_slope(r0, z, refa, refb)
        az_rate = across / r0
        zd_rate = -ud[2] / r0 * slope
        # The observed direction and its motion.
        so, co = np.sin(zd_obs), np.cos(zd_obs)
        o = (-so * ca, so * sa, co)
        so_az_rate, od_zd_rate = so * az_rate, zd_rate
        zenith = r0 == 0.0
        if np.any(zenith):
            # Exactly at the zenith the azimuth and zenith distance have no rates, but the
            # direction moves all the same: across the sky as everywhere, and by the
            # refraction's slope (the limit of sin(zd_obs) / sin(zd0)) toward the azimuth
            # the answer gives, whatever it is (the sum below is slope * ud, tangential).
            so_az_rate = np.where(zenith, slope * across, so_az_rate)
            od_zd_rate = np.where(zenith, slope * (sa * ud[1] - ca * ud[0]), od_zd_rate)
        od = (
            so_az_rate * sa - co * ca * od_zd_rate,
            so_az_rate * ca + co * sa * od_zd_rate,
            -so * od_zd_rate,
        )
        # hd2pa of the observed direction, as the answers' parallactic angle:
        # q = atan2(n, d), n = -cos(phi) y, d = sin(phi) (v0^2 + y^2) - cos(phi) v2 v0.
        v0 = sphi * o[0] + cphi * o[2]
        v2 = sphi * o[2] - cphi * o[0]
        v0d = sphi * od[0] + cphi * od[2]
        v2d = sphi * od[2] - cphi * od[0]
        n = -cphi * o[1]
        d = sphi * (v0 * v0 + o[1] * o[1]) - cphi * v2 * v0
        nd = -cphi * od[1]
        dd = 2.0 * sphi * (v0 * v0d + o[1] * od[1]) - cphi * (v2d * v0 + v2 * v0d)
        pa_rate = (d * nd - n * dd) / (n * n + d * d)
        # The observed hour angle atan2(-y, v0) and declination atan2(v2, sqrt(v0^2 + y^2))
        # of the unit vector o, as the answers compute them.
        h2 = v0 * v0 + o[1] * o[1]
        ha_rate = (o[1] * v0d - v0 * od[1]) / h2
        dec_rate = v2d / np.sqrt(h2)
    k = _ARCSEC_PER_RAD
    return az_rate * k, -zd_rate * k, pa_rate * k, ha_rate * k, dec_rate * k


# ---------------------------------------------------------------------------------------------
# Instants
# ---------------------------------------------------------------------------------------------


def _check_instants(utc_jd1, utc_jd2):
    jd1 = np.asarray(utc_jd1, dtype=float)
    jd2 = np.asarray(utc_jd2, dtype=float)
    if jd1.ndim == jd2.ndim == 0:  # one instant: the same tests on Python floats
        d1, d2 = jd1.item(), jd2.item()
        if not (math.isfinite(d1) and math.isfinite(d2)):
            raise ObservedInputError("instants", "must be finite dates")
        ep = 2000.0 + ((d1 - 2451545.0) + d2) / 365.25
        if not SUPPORTED_EPOCH_MIN <= ep < SUPPORTED_EPOCH_MAX:
            raise ObservedInputError(
                "instants",
                SUPPORTED_SPAN_TEXT,
            )
        return jd1, jd2
    if not (np.all(np.isfinite(jd1)) and np.all(np.isfinite(jd2))):
        raise ObservedInputError("instants", "must be finite dates")
    ep = 2000.0 + ((jd1 - 2451545.0) + jd2) / 365.25
    if np.any(ep < SUPPORTED_EPOCH_MIN) or np.any(ep >= SUPPORTED_EPOCH_MAX):
        raise ObservedInputError(
            "instants",
            SUPPORTED_SPAN_TEXT,
        )
    if jd1.shape == jd2.shape:
        return jd1, jd2
    return np.broadcast_arrays(jd1, jd2)


def _raise_erfa_errors(status, name: str) -> None:
    """Raise ``erfa.ErfaError`` where an ERFA status is negative, as pyerfa's wrappers do."""
    if (status < 0) if np.ndim(status) == 0 else np.any(status < 0):
        raise erfa.ErfaError(f'ERFA function "{name}" returned an error status')


# ---------------------------------------------------------------------------------------------
# Star-independent quantities: apco13 with the precession-nutation interpolated from a cache
# ---------------------------------------------------------------------------------------------

#: Spacing of the cached precession-nutation nodes, days (15 minutes of TT).
CIP_NODE_STEP_DAYS = 1.0 / 96.0


@functools.lru_cache(maxsize=4096)
def _cip_node(k: int):
    """CIP X, Y, CIO locator s and equation of the origins at node k (TT = k * step, JD).

    IAU 2006/2000A as SOFA ``apco13`` computes them: ``pnm06a``, ``bpn2xy``, ``s06``,
    ``eors``.
    """
    d1 = k * CIP_NODE_STEP_DAYS
    d1i = np.floor(d1)
    d2 = d1 - d1i
    r = erfa.pnm06a(d1i, d2)
    x, y = erfa.bpn2xy(r)
    s = erfa.s06(d1i, d2, x, y)
    return float(x), float(y), float(s), float(erfa.eors(r, s))


def _cip_interpolated(tt1, tt2):
    """X, Y, s, eo at TT instants by 3-point (quadratic) interpolation between cached nodes.

    Notes
    -----
    1. The shortest periods in IAU 2000A nutation are a few days (largest short-period
       terms ~0.2 arcsec at 13.66 d); with 15-minute nodes the quadratic interpolation error
       is below 1e-8 arcsec, far below the 1e-12 rad to which the SOFA atco13 test values are
       reproduced (checked in tests).
    """
    tt1 = np.asarray(tt1, dtype=float)
    tt2 = np.asarray(tt2, dtype=float)
    if tt1.size == 1 and tt2.size == 1:
        # One instant: the same operations on Python floats (IEEE doubles both ways, so the
        # same numbers as the array form below), without a dozen one-element arrays.
        t1, t2 = float(tt1.reshape(-1)[0]), float(tt2.reshape(-1)[0])
        base = math.floor(t1 / CIP_NODE_STEP_DAYS)
        frac = (t1 - base * CIP_NODE_STEP_DAYS + t2) / CIP_NODE_STEP_DAYS
        shift = math.floor(frac)
        k, t = int(base + shift), frac - shift
        shape = np.broadcast_shapes(tt1.shape, tt2.shape)
        vals = [
            np.full(shape, b + 0.5 * t * (c - a) + 0.5 * t * t * (c - 2.0 * b + a))
            for a, b, c in zip(_cip_node(k - 1), _cip_node(k), _cip_node(k + 1), strict=True)
        ]
        return tuple(vals)
    base = np.floor(tt1 / CIP_NODE_STEP_DAYS)
    frac = (tt1 - base * CIP_NODE_STEP_DAYS + tt2) / CIP_NODE_STEP_DAYS
    shift = np.floor(frac)
    k0 = (base + shift).astype(np.int64)
    u = frac - shift  # in [0, 1): between node k0 and k0 + 1
    flat_k = k0.reshape(-1)
    flat_u = u.reshape(-1)
    out = np.empty((flat_k.size, 4))
    for i, (k, t) in enumerate(zip(flat_k.tolist(), flat_u.tolist(), strict=True)):
        a = np.array(_cip_node(k - 1))
        b = np.array(_cip_node(k))
        c = np.array(_cip_node(k + 1))
        # Lagrange through t = -1, 0, 1.
        out[i] = b + 0.5 * t * (c - a) + 0.5 * t * t * (c - 2.0 * b + a)
    out = out.reshape(k0.shape + (4,))
    return out[..., 0], out[..., 1], out[..., 2], out[..., 3]


@functools.lru_cache(maxsize=256)
def _refco_cached(p, t, rh, wl):
    refa, refb = erfa.refco(p, t, rh, wl)
    return float(refa), float(refb)


def star_independent(jd1, jd2, dut1, xp, yp, site: Site, refr: RefractionSettings):
    """SOFA ``apco13``, with the precession-nutation taken from :func:`_cip_interpolated`.

    Parameters
    ----------
    jd1, jd2 : array_like
        UTC, two-part quasi JD.
    dut1 : array_like
        UT1-UTC, seconds.
    xp, yp : array_like
        Polar motion, radians.
    site : Site
    refr : RefractionSettings

    Returns
    -------
    astrom : ERFA ASTROM structured array
    eo : ndarray
        Equation of the origins, radians.
    tt1, tt2 : ndarray
        TT, two-part JD.
    ebpv, ehp : ndarray
        Earth barycentric position/velocity and heliocentric position (SOFA ``epv00``).

    Notes
    -----
    1. The sequence is that of ``apco13``: UTC -> TAI -> TT and UT1, ``epv00``, CIP X, Y and
       s, ``era00``, ``sp00``, refraction constants from ``refco``, then ``apco``.
    """
    # The ERFA ufuncs themselves (pyerfa's wrappers call the same ufuncs, then turn the
    # status codes into exceptions and warnings): errors are raised as pyerfa would; the
    # warnings (dubious year, epv00 outside 1900-2100) are reported by flags instead.
    tai1, tai2, st_tai = erfa_ufunc.utctai(jd1, jd2)
    tt1, tt2, _ = erfa_ufunc.taitt(tai1, tai2)
    u1, u2, st_ut1 = erfa_ufunc.utcut1(jd1, jd2, dut1)
    ehpv, ebpv, _ = erfa_ufunc.epv00(tt1, tt2)
    _raise_erfa_errors(st_tai, "utctai")
    _raise_erfa_errors(st_ut1, "utcut1")
    x, y, s, eo = _cip_interpolated(tt1, tt2)
    theta = erfa_ufunc.era00(u1, u2)
    sp = erfa_ufunc.sp00(tt1, tt2)
    refa, refb = (refr.refa_rad, refr.refb_rad)
    astrom = erfa_ufunc.apco(
        tt1, tt2, ebpv, ehpv["p"], x, y, s, theta,
        site.longitude_deg * RAD_PER_DEG, site.latitude_deg * RAD_PER_DEG, site.height_m,
        xp, yp, sp, refa, refb,
    )  # fmt: skip
    return astrom, eo, tt1, tt2, ebpv, ehpv["p"]


# ---------------------------------------------------------------------------------------------
# Result and main entry point
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ObservedPlaces:
    """Places of stars at a site and instants (arrays broadcast over stars and instants).

    Angles in degrees unless named otherwise. Safety figures are advisory only: the
    facility's own interlocks and safety rules decide.

    Attributes
    ----------
    astrometric_ra_deg, astrometric_dec_deg : ndarray
        Geocentric astrometric place (ICRS; space motion and parallax, no aberration).
    apparent_ra_deg, apparent_dec_deg : ndarray
        Geocentric apparent place, true equator and equinox of date (RA = CIRS RA - equation
        of the origins).
    apparent_ra_cio_deg : ndarray
        Geocentric apparent RA referred to the CIO (CIRS).
    azimuth_deg : ndarray
        Observed azimuth, north = 0, east = 90, in [0, 360).
    altitude_deg, zenith_distance_deg : ndarray
        Observed (refracted) altitude and zenith distance.
    hour_angle_deg, observed_dec_deg, observed_ra_cio_deg : ndarray
        Observed hour angle (west positive, [-180, 180)), declination and CIO-based RA.
    parallactic_angle_deg : ndarray
        Parallactic angle of the observed place (SOFA hd2pa): the position angle of the
        zenith at the target, from north through east, in [-180, 180]; positive west of
        the meridian.
    airmass : ndarray
        Young (1994) airmass from the unrefracted zenith distance (NaN below the horizon).
    refraction_arcsec : ndarray
        Refraction applied (unrefracted minus observed zenith distance), arcsec: SOFA
        atioq turns the place by atan2(dl, 1 - dl^2/2) for its model angle dl, and by less
        where it holds the model (:func:`_refraction_change`).
    sun_altitude_deg, sun_azimuth_deg : ndarray
        Observed place of the Sun's centre (per instant, broadcast).
    sun_separation_deg : ndarray
        Angle between the observed (refracted) places of the target and the Sun's centre,
        topocentric, degrees: the telescope points at the one, sunlight arrives from the
        other (with refraction off, the unrefracted places).
    flags : ndarray of uint32
        :class:`ObservedFlag` bits.
    epoch_tt_jyear : ndarray
        Instants as Julian epochs (TT), years (per instant).
    eop : EarthOrientationValues
        UT1-UTC and polar motion used, per instant, with source and accuracy class.
    refraction : RefractionSettings
    site : Site
    horizon_limit_deg, sun_avoidance_deg : float
        Limits used for the advisory flags.
    provenance : dict
        Tables used (names, spans, leap-second validity).
    azimuth_rate_arcsec_s, altitude_rate_arcsec_s, parallactic_angle_rate_arcsec_s : ndarray
        Rates of change of the observed azimuth, altitude and parallactic angle, arcsec per
        second of time (:func:`tracking_rates`); None unless asked for (``rates``).
    hour_angle_rate_arcsec_s, observed_dec_rate_arcsec_s : ndarray
        Rates of change of the observed hour angle and declination, arcsec per second of
        time, for an equatorial mount; None unless asked for.
    """

    astrometric_ra_deg: np.ndarray
    astrometric_dec_deg: np.ndarray
    apparent_ra_deg: np.ndarray
    apparent_dec_deg: np.ndarray
    apparent_ra_cio_deg: np.ndarray
    azimuth_deg: np.ndarray
    altitude_deg: np.ndarray
    zenith_distance_deg: np.ndarray
    hour_angle_deg: np.ndarray
    observed_dec_deg: np.ndarray
    observed_ra_cio_deg: np.ndarray
    parallactic_angle_deg: np.ndarray
    airmass: np.ndarray
    refraction_arcsec: np.ndarray
    sun_altitude_deg: np.ndarray
    sun_azimuth_deg: np.ndarray
    sun_separation_deg: np.ndarray
    flags: np.ndarray
    epoch_tt_jyear: np.ndarray
    eop: EarthOrientationValues
    refraction: RefractionSettings
    site: Site
    horizon_limit_deg: float
    sun_avoidance_deg: float
    provenance: dict = field(default_factory=dict)
    azimuth_rate_arcsec_s: np.ndarray | None = None
    altitude_rate_arcsec_s: np.ndarray | None = None
    parallactic_angle_rate_arcsec_s: np.ndarray | None = None
    hour_angle_rate_arcsec_s: np.ndarray | None = None
    observed_dec_rate_arcsec_s: np.ndarray | None = None


def _shaped(x, shape):
    """``x`` as an array of ``shape`` (a broadcast view only when needed)."""
    if type(x) is np.ndarray:
        return x if x.shape == shape else np.broadcast_to(x, shape)
    if isinstance(x, np.generic):  # a numpy scalar (one star at one instant), shape ()
        if shape == ():
            return x
        # A new one-element array, by the scalar's own method (np.reshape's dispatch costs
        # three times as much, and this runs some twenty times per one-star call).
        return x.reshape(shape) if math.prod(shape) == 1 else np.broadcast_to(x, shape)
    if np.shape(x) == shape:
        return x
    if math.prod(shape) == 1:
        return np.reshape(x, shape)  # one scalar: a new one-element array (cheaper)
    return np.broadcast_to(x, shape)


def _bits(mask, flag):
    if np.ndim(mask) == 0:  # one instant: no array needed
        return np.uint32(int(flag)) if mask else np.uint32(0)
    return np.where(mask, np.uint32(int(flag)), np.uint32(0))


def _any_bits(*pairs):
    """OR of flag bits where each condition holds; conditions that never hold cost little."""
    out = np.uint32(0)
    for mask, flag in pairs:
        if np.ndim(mask) == 0:
            if mask:
                out = out | np.uint32(flag)
        elif mask.item() if mask.size == 1 else mask.any():
            out = out | np.where(mask, np.uint32(flag), np.uint32(0))
    return out


class _InstantState:
    """Everything about one instant (or array of instants) that no star depends on.

    For a single instant it is cached
    (:func:`_instant_state_cached`), so its arrays are read-only.
    """

    def __init__(self, jd1, jd2, site: Site, refr: RefractionSettings, eop, eop_values):
        eo_vals = earth_orientation_at(jd1, jd2, eop)
        if eop_values is not None:
            dut, pmx, pmy = (
                np.broadcast_to(np.asarray(x, dtype=float), jd1.shape) for x in eop_values
            )
            eo_vals = EarthOrientationValues(
                ut1_utc_s=dut,
                pm_x_arcsec=pmx,
                pm_y_arcsec=pmy,
                status=np.full(jd1.shape, int(EarthOrientationStatus.MEASURED_RAPID)),
                table=np.full(jd1.shape, "given"),
                ut1_sigma_s=np.full(jd1.shape, UT1_SIGMA_RAPID_S),
                pole_sigma_arcsec=np.full(jd1.shape, _POLE_SIGMA_RAPID_POSITION_ARCSEC),
                pointing_error_arcsec=np.full(
                    jd1.shape,
                    ARCSEC_PER_UT1_SECOND * UT1_SIGMA_RAPID_S + _POLE_SIGMA_RAPID_POSITION_ARCSEC,
                ),
                accuracy_class=np.full(jd1.shape, "milliarcsecond"),
            )
        xp = eo_vals.pm_x_arcsec / _ARCSEC_PER_RAD
        yp = eo_vals.pm_y_arcsec / _ARCSEC_PER_RAD
        astrom, eo, tt1, tt2, ebpv, ehp = star_independent(
            jd1, jd2, eo_vals.ut1_utc_s, xp, yp, site, refr
        )
        self.eo_vals = eo_vals
        self.astrom, self.eo, self.tt1, self.tt2, self.ebpv, self.ehp = (
            astrom, eo, tt1, tt2, ebpv, ehp,
        )  # fmt: skip
        self.epoch_tt = np.asarray(erfa_ufunc.epj(tt1, tt2))
        mjd_utc = (jd1 - 2400000.5) + jd2
        self.ins = ins = _instant_quantities(astrom)
        self.sun_alt_deg = sun_alt_deg = 90.0 - ins.sun_zd * DEG_PER_RAD
        status = eo_vals.status
        instant_flags = (
            _bits(sun_alt_deg > 0.0, ObservedFlag.SUN_ABOVE_HORIZON)
            | _bits(status == _PREDICTED, ObservedFlag.EARTH_ORIENTATION_PREDICTED)
            | _bits(status == _UNAVAILABLE, ObservedFlag.EARTH_ORIENTATION_UNAVAILABLE)
            | _bits(mjd_utc > eop.leap_second_expiry_mjd, ObservedFlag.LEAP_SECONDS_EXTRAPOLATED)
            | _bits(refr.pressure_warning is not None, ObservedFlag.PRESSURE_IMPLAUSIBLE)
        )
        self.instant_flags = instant_flags if instant_flags.any() else None
        self.site = site
        self._geo = None
        self._tracking = None

    def geocentric(self):
        """Star-independent quantities for the geocentric places (computed once).

        A cached state is shared by the threads of a worker: it is stored only once
        complete, so another thread never sees it without its equation of the origins (two
        threads may both compute it the first time; they get the same numbers).
        """
        geo = self._geo
        if geo is None:
            geo = _geocentric_astrom(self.tt1, self.tt2, self.astrom, self.ebpv, self.ehp)
            if "fast" in geo:  # one instant: the equation of the origins goes with it
                geo["fast"].eo = float(self.eo)
            self._geo = geo
        return geo

    def tracking(self) -> tuple:
        """The star-independent terms of :func:`tracking_rates` (computed once): the
        rotation axis, the sine and cosine of the latitude, the refraction constants and
        the aberration's drift; Python floats for one instant."""
        terms = self._tracking
        if terms is None:
            a = self.astrom
            sphi, cphi = a["sphi"], a["cphi"]
            axis = _rotation_axis_aet(a["xpl"], a["ypl"], sphi, cphi)
            drift = _aberration_drift_aet(self.site, self.ins.m, self.ehp, axis)
            terms = (axis, sphi, cphi, a["refa"], a["refb"], drift)
            if np.ndim(sphi) == 0:
                terms = tuple(
                    tuple(float(c) for c in t) if isinstance(t, tuple) else float(t) for t in terms
                )
            self._tracking = terms
        return terms


#: The rates of :func:`tracking_rates`, in its order, as :class:`ObservedPlaces` names them.
RATE_NAMES = (
    "azimuth_rate_arcsec_s",
    "altitude_rate_arcsec_s",
    "parallactic_angle_rate_arcsec_s",
    "hour_angle_rate_arcsec_s",
    "observed_dec_rate_arcsec_s",
)

#: Places per block of :func:`_rates_of` (bounds its temporaries' memory; blocks of 2,048 to
#: 16,384 measured alike for 100,000 places, within the runs' spread).
RATES_BLOCK = 16384


def _rates_of(res: dict, shape: tuple, terms: tuple) -> dict:
    """:func:`tracking_rates` of the places in ``res`` (``_CHAIN_FIELDS`` arrays of
    ``shape``) with the instant's ``terms`` (:meth:`_InstantState.tracking`): on Python
    floats for one place (a one-star request makes some 100 numpy calls less costly), and
    block by block for many stars at one instant."""
    places = [res[k] for k in ("azimuth_deg", "zenith_distance_deg", "refraction_arcsec")]
    one_instant = isinstance(terms[1], float)  # sin(latitude): a float for one instant
    if one_instant and math.prod(shape) == 1:
        rates = tracking_rates(*(float(np.reshape(x, -1)[0]) for x in places), *terms)
        return {k: np.full(shape, r) for k, r in zip(RATE_NAMES, rates, strict=True)}
    if not one_instant or len(shape) != 1:
        rates = tracking_rates(*places, *terms)
        return {k: _shaped(r, shape) for k, r in zip(RATE_NAMES, rates, strict=True)}
    out = {k: np.empty(shape) for k in RATE_NAMES}
    for i in range(0, shape[0], RATES_BLOCK):
        sl = slice(i, i + RATES_BLOCK)
        rates = tracking_rates(*(x[sl] for x in places), *terms)
        for k, r in zip(RATE_NAMES, rates, strict=True):
            out[k][sl] = r
    return out


class _ByIdentity:
    """Hashable wrapper comparing its object by identity (for cache keys)."""

    __slots__ = ("obj",)

    def __init__(self, obj):
        self.obj = obj

    def __hash__(self):
        return id(self.obj)

    def __eq__(self, other):
        return isinstance(other, _ByIdentity) and other.obj is self.obj


def _float_key(x) -> str:
    """Exact cache key of a float: its hexadecimal form (keeps -0.0 apart from 0.0)."""
    return float(x).hex()


def _site_key(site: Site) -> tuple:
    """Cache key of a site: the exact coordinates it is used for, and the site."""
    return (
        _float_key(site.latitude_deg),
        _float_key(site.longitude_deg),
        _float_key(site.height_m),
        site,
    )


def _refr_key(refr: RefractionSettings) -> tuple:
    """Cache key of refraction settings: the exact constants used, and the settings."""
    return (_float_key(refr.refa_rad), _float_key(refr.refb_rad), refr)


#: Instants (with site, atmosphere and Earth-orientation tables) whose star-independent
#: quantities are kept: one-star requests for the same instant then skip that work.
INSTANT_CACHE_SIZE = 256


@functools.lru_cache(maxsize=INSTANT_CACHE_SIZE)
def _instant_state_cached(jd1_key, jd2_key, site_key, refr_key, eop_key) -> _InstantState:
    """The :class:`_InstantState` of one instant, cached on the exact values (Note 6 of
    :func:`observed_places`); the cached arrays are made read-only."""
    jd1 = np.asarray(float.fromhex(jd1_key))
    jd2 = np.asarray(float.fromhex(jd2_key))
    st = _InstantState(jd1, jd2, site_key[3], refr_key[2], eop_key.obj, None)
    for a in (*vars(st.eo_vals).values(), st.epoch_tt):
        if isinstance(a, np.ndarray):
            a.setflags(write=False)
    return st


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def observed_places(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_jyear,
    utc_jd1,
    utc_jd2,
    site: Site,
    atmosphere: Atmosphere | None = None,
    *,
    eop: EarthOrientation | None = None,
    eop_values: tuple | None = None,
    horizon_limit_deg: float = DEFAULT_HORIZON_LIMIT_DEG,
    sun_avoidance_deg: float = DEFAULT_SUN_AVOIDANCE_DEG,
    geocentric: bool = True,
    hour_angle: bool = True,
    rates: bool = False,
) -> ObservedPlaces:
    """Astrometric, apparent and observed places of stars at a site and instants.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        ICRS position at the catalogue epoch, degrees.
    parallax_mas : array_like
        Parallax, mas; NaN, zero or negative = no parallax shift (flagged).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : array_like
        Proper motion, mas per Julian year (RA component times cos dec); NaN = zero, flagged.
    radial_velocity_km_s : array_like
        Radial velocity, km/s; NaN = zero, flagged.
    epoch_jyear : array_like
        Catalogue epoch, Julian epoch (TDB), years.
    utc_jd1, utc_jd2 : array_like
        Instants of observation, UTC as a two-part quasi Julian date (SOFA convention).
        Their shape broadcasts with the star arrays: many stars at one instant, one star at
        many instants, or star-by-instant pairs (Note 4).
    site : Site
        Observing site (:func:`make_site`, :func:`resolve_site`).
    atmosphere : Atmosphere, optional
        Conditions for refraction (:func:`make_atmosphere`); missing pressure comes from the
        standard atmosphere, pressure 0 turns refraction off.
    eop : EarthOrientation, optional
        Earth-orientation tables; default :func:`earth_orientation`.
    eop_values : tuple (ut1_utc_s, pm_x_arcsec, pm_y_arcsec), optional
        Values to use instead of the tables (e.g. from the facility's own service); they are
        reported with status ``MEASURED_RAPID`` and table name ``given``.
    horizon_limit_deg : float
        Altitude below which the target is flagged BELOW_HORIZON_LIMIT, degrees.
    sun_avoidance_deg : float
        Sun-target separation below which the target is flagged WITHIN_SUN_AVOIDANCE,
        degrees. The default of 30 is a placeholder the operator must set.
    geocentric : bool
        Also compute the geocentric astrometric and apparent places (default True); False
        fills them with NaN and saves their cost.
    hour_angle : bool
        Also compute the observed hour angle, declination, RA and the parallactic angle
        (default True); False fills them with NaN and saves their cost.
    rates : bool
        Also compute the rates of change of the observed azimuth, altitude, parallactic
        angle, hour angle and declination, for tracking (:func:`tracking_rates`; default
        False: they are None).

    Returns
    -------
    ObservedPlaces

    Notes
    -----
    1. The star-independent quantities are those of SOFA ``apco13`` (IAU 2006/2000A
       precession-nutation, Earth ephemeris ``epv00``, ERA, polar motion, refraction
       constants ``refco``), computed once per instant by :func:`star_independent`, with the
       precession-nutation interpolated from cached 15-minute nodes. The per-star chain is
       SOFA ``atciq`` (with ``pmpx``, ``ldsun``, ``ab``) and ``atioq``, written in numpy: the
       CIRS to azimuth rotations are combined into one matrix per instant. Tests check the
       result against the SOFA atco13 test values, ``erfa.apco13`` and astropy's AltAz.
    2. The geocentric places use SOFA ``apci`` with the same precession-nutation and the
       Earth's barycentric position and velocity from ``epv00``; the equinox-based apparent
       RA is the CIRS RA minus the equation of the origins.
    3. Space motion from the catalogue epoch to the instant (TT, which differs from TDB by
       under 2 ms) is uniform motion in Cartesian coordinates as in SOFA ``pmpx``, including
       its light-time (Roemer) adjustment of the interval for the observer's offset from
       the barycentre.
    4. The safety figures (Sun altitude and separation, horizon limit) are ADVISORY: the
       facility's own interlocks and safety rules decide.
    5. Refraction uses the A tan z + B tan^3 z model with the near-horizon guards of SOFA
       ``atioq``; below about 5 degrees altitude its error grows (refco Note 2).
    6. For a single instant the star-independent quantities (Note 1, with the Earth
       orientation and the Sun's place) are cached, keyed on the exact UTC date, site
       coordinates, refraction constants and tables (``INSTANT_CACHE_SIZE`` entries), so
       that repeated requests for one instant, one star at a time, compute them once. Keys
       are exact (no rounding), so results are the same with and without the cache; the
       cached arrays returned (``eop``, ``epoch_tt_jyear``) are read-only.
    7. Stars along one axis at one instant (two or more) go through
       :func:`_observe_block`: the formulae of the general path, written as
       in-place numpy operations on work arrays reused block by block (``CHAIN_BLOCK``
       stars), so that the number of numpy calls does not grow with the number of stars
       and nothing is allocated per star; the star-only terms are shared by the observed
       and geocentric places. The linear steps are small matrix
       products and the declination's sine and cosine come from the tangent of the half
       angle, so results differ from the general path by rounding only: within 1e-12
       relative or 1 nanoarcsecond (tested), except where the quantity itself is
       ill-conditioned (the azimuth within arcseconds of the zenith; the Sun separation
       within a degree or so of the Sun, whose chord form loses digits there). One star
       at one instant takes the general path on numpy scalars, which costs less than the
       block path's calls on one-element arrays (about 0.21 against 0.3 ms, measured in
       process), so a star alone and the same star among others differ by that rounding.

    References
    ----------
    IAU SOFA Board, SOFA Astrometry Tools (routines apco13, atciq, atioq, pmpx, ldsun, ab,
    refco, hd2pa), 2023 release. Kaplan, G.H. 2005, USNO Circular 179, chapters 6-7.
    """
    eop = eop or earth_orientation()
    jd1, jd2 = _check_instants(utc_jd1, utc_jd2)
    refr = refraction_settings(site, atmosphere)
    if jd1.ndim == 0 and eop_values is None:
        st = _instant_state_cached(
            _float_key(jd1), _float_key(jd2), _site_key(site), _refr_key(refr), _ByIdentity(eop)
        )
    else:
        st = _InstantState(jd1, jd2, site, refr, eop, eop_values)
    eo_vals, ins = st.eo_vals, st.ins

    stars = [
        np.asarray(a, dtype=float)
        for a in (
            ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr,
            radial_velocity_km_s, epoch_jyear,
        )
    ]  # fmt: skip
    star_shape = np.broadcast_shapes(*(a.shape for a in stars))
    shape = np.broadcast_shapes(star_shape, jd1.shape)
    dt = st.epoch_tt - stars[6]
    limits = (float(horizon_limit_deg), float(sun_avoidance_deg))
    a_ra = a_dec = app_ra = app_dec = app_ra_cio = np.nan
    if jd1.ndim == 0 and shape == (1,):
        # One star at one instant: the general path on numpy scalars (Note 7), whose
        # arithmetic costs a fraction of a one-element array operation.
        stars = [a.reshape(-1)[0] for a in stars]
        dt = np.reshape(dt, -1)[0]
    if jd1.ndim == 0 and len(shape) == 1 and shape[0] > 1:
        # Stars along one axis at one instant: in-place chain, block by block (Note 7);
        # scalars stay scalars (cheaper, and the no-motion case is recognised).
        n = shape[0]
        full = [
            a if a.ndim == 0 or a.shape == shape else np.broadcast_to(a, shape) for a in stars[:6]
        ]
        full_dt = dt if np.ndim(dt) == 0 or dt.shape == shape else np.broadcast_to(dt, shape)
        missing = np.broadcast_to(np.nan, shape)  # one read-only view for what is skipped
        out = [
            np.empty(shape, dtype=dt_) if hour_angle or name not in _DETAIL_FIELDS else missing
            for name, dt_ in _CHAIN_FIELDS
        ]
        geo = gout = None
        if geocentric:
            geo = st.geocentric()["fast"]
            gout = [np.empty(shape) for _ in range(5)]
        else:
            a_ra = a_dec = app_ra = app_dec = app_ra_cio = missing
        if n <= CHAIN_BLOCK:  # one block: no slicing
            _observe_block(full, full_dt, ins, limits, hour_angle, out, _Scratch(n), geo, gout)
        else:
            ws = _Scratch(CHAIN_BLOCK)
            for i in range(0, n, CHAIN_BLOCK):
                sl = slice(i, i + CHAIN_BLOCK)
                if n - i < ws.n:
                    ws = _Scratch(n - i)
                _observe_block(
                    [a if a.ndim == 0 else a[sl] for a in full],
                    full_dt if np.ndim(full_dt) == 0 else full_dt[sl],
                    ins, limits, hour_angle, [o[sl] for o in out], ws, geo,
                    None if gout is None else [g[sl] for g in gout],
                )  # fmt: skip
        if geocentric:
            a_ra, a_dec, app_ra, app_dec, app_ra_cio = gout
    else:
        chain = _chain(*stars[:6], dt, ins, limits, hour_angle)
        out = [_shaped(r, shape) for r in chain]
        if geocentric:
            a_ra, a_dec, app_ra, app_dec, app_ra_cio = _geocentric_places(
                *stars[:6], dt, st.geocentric(), st.eo
            )
    res = dict(zip((name for name, _ in _CHAIN_FIELDS), out, strict=True))

    sun_alt_deg, instant_flags = st.sun_alt_deg, st.instant_flags
    if instant_flags is not None:
        flags = res["flags"]
        if type(flags) is np.ndarray and flags.shape == shape and flags.flags.writeable:
            flags |= instant_flags
        else:
            res["flags"] = _shaped(flags | instant_flags, shape).astype(np.uint32)

    rate_values = _rates_of(res, shape, st.tracking()) if rates else {}

    return ObservedPlaces(
        astrometric_ra_deg=_shaped(a_ra, shape),
        astrometric_dec_deg=_shaped(a_dec, shape),
        apparent_ra_deg=_shaped(app_ra, shape),
        apparent_dec_deg=_shaped(app_dec, shape),
        apparent_ra_cio_deg=_shaped(app_ra_cio, shape),
        **res,
        sun_altitude_deg=_shaped(sun_alt_deg, shape),
        sun_azimuth_deg=_shaped(ins.sun_az * DEG_PER_RAD, shape),
        epoch_tt_jyear=st.epoch_tt,
        eop=eo_vals,
        refraction=refr,
        site=site,
        horizon_limit_deg=float(horizon_limit_deg),
        sun_avoidance_deg=float(sun_avoidance_deg),
        provenance=eop.describe(),
        **rate_values,
    )


def _geocentric_astrom(tt1, tt2, astrom_obs, ebpv, ehp):
    """Star-independent quantities for a geocentric observer (SOFA ``apci``)."""
    bpn = astrom_obs["bpn"]
    x, y = bpn[..., 2, 0], bpn[..., 2, 1]
    _, _, s, _ = _cip_interpolated(tt1, tt2)
    geo = erfa_ufunc.apci(tt1, tt2, ebpv, ehp, x, y, s)
    out = {
        "eb": [geo["eb"][..., i] for i in range(3)],
        "eh": [geo["eh"][..., i] for i in range(3)],
        "v": [geo["v"][..., i] for i in range(3)],
        "em": geo["em"],
        "bm1": geo["bm1"],
        "bpn": bpn,
    }
    if np.ndim(bpn) == 2:
        em, bm1 = float(geo["em"]), float(geo["bm1"])
        eh = np.array([float(c) for c in out["eh"]])
        v = np.array([float(c) for c in out["v"]])
        out["fast"] = types.SimpleNamespace(
            bm1=bm1,
            ehv=float(eh @ v),
            srs_over_em=SCHWARZSCHILD_RADIUS_SUN_AU / em,
            dlim=1e-6 / max(em * em, 1.0),
            k2_const=1.0 + SCHWARZSCHILD_RADIUS_SUN_AU / em,
            inv_1_bm1=1.0 / (1.0 + bm1),
            **_one_instant_matrices(bpn, out["eb"], out["eh"], out["v"]),
        )
    return out


def _geocentric_places(ra_deg, dec_deg, px, pmra, pmdec, rv, dt, geo, eo):
    """Geocentric astrometric (SOFA atccq) and apparent (atciq with apci) places, degrees."""
    q = _star_vectors(ra_deg, dec_deg, px, pmra, pmdec, rv, dt, geo["eb"])
    a_ra = np.mod(np.arctan2(q[1], q[0]), TWO_PI) * DEG_PER_RAD
    a_dec = np.arctan2(q[2], np.sqrt(q[0] * q[0] + q[1] * q[1])) * DEG_PER_RAD
    ppr = _deflect_and_aberrate(q, geo["eh"], geo["em"], geo["v"], geo["bm1"])
    pi = _rot(geo["bpn"], ppr)
    ri = np.arctan2(pi[1], pi[0])
    di = np.arctan2(pi[2], np.sqrt(pi[0] * pi[0] + pi[1] * pi[1]))
    ra_cio = np.mod(ri, TWO_PI) * DEG_PER_RAD
    ra_eq = np.mod(ri - eo, TWO_PI) * DEG_PER_RAD
    return a_ra, a_dec, ra_eq, di * DEG_PER_RAD, ra_cio
