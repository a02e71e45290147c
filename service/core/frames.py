"""Celestial reference frames with motion: ICRS, FK5, FK4 (with E-terms), galactic, ecliptic.

Every conversion carries the six astrometric parameters (position, proper motion, parallax,
radial velocity) from one frame to another at a stated epoch of the astrometry. ICRS is the
hub: every conversion goes ``from_frame -> ICRS -> to_frame``.

Methods (each a published one):

- FK4 B1950.0 <-> FK5 J2000.0: the Standish (1982) / Aoki et al. (1983) matrix method as
  implemented by SOFA ``fk425`` (called through pyerfa). The reverse direction starts from
  SOFA ``fk524`` and is refined so that it is the exact inverse of ``fk425`` (Note 3).
- FK4 other equinoxes: E-terms of aberration removed for the catalogue equinox, Newcomb
  precession (Andoyer/Kinoshita development) to B1950.0, E-terms restored.
- FK5 J2000.0 <-> ICRS: the Hipparcos frame rotation and spin of SOFA ``fk52h``/``h2fk5``
  (orientation at J2000.0 and spin, Note 4), with the orientation evaluated at the epoch of
  the astrometry as in SOFA ``fk5hz``.
- FK5 other equinoxes: IAU 1976 precession (SOFA ``pmat76``).
- Galactic: the ICRS-to-galactic matrix of SOFA ``icrs2g`` (Hipparcos, ESA 1997, Vol. 1,
  section 1.5.3).
- Ecliptic: mean ecliptic and equinox of a date, IAU 2006 (SOFA ``ecm06``), for J2000.0 or any
  other date ("of date" = the epoch of the astrometry).

Vectorisation: all array arguments broadcast; scalar in gives scalar-shaped out.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass

import erfa
import numpy as np

from service.core.constants import (
    ARCSEC_PER_RAD,
    AU_PER_JULIAN_YEAR_KM_S,
    JD_J2000,
    JULIAN_YEAR_DAYS,
    MAS_PER_RAD,
    RAD_PER_DEG,
    TROPICAL_YEAR_DAYS_LIESKE1979,
)
from service.core.floating import overflow_to_infinity
from service.core.propagation import AT_POLE_RAD

# ---------------------------------------------------------------------------------------------
# Constants of this module (unit and source beside each)
# ---------------------------------------------------------------------------------------------

#: Julian epoch (TDB) of the Besselian epoch B1950.0, years: B1950.0 = JD 2433282.42345905
#: (Lieske 1979 definition as used by SOFA ``epb2jd``), expressed with SOFA ``epj``.
JEPOCH_B1950 = float(erfa.epj(*erfa.epb2jd(1950.0)))

#: Julian epoch J2000.0, years (definition).
JEPOCH_J2000 = 2000.0

#: Constant of aberration used for the E-terms, radians: 20.49552 arcsec (IAU 1976 value,
#: as in the Explanatory Supplement, Seidelmann 1992, section 3.53; from memory). With the
#: eccentricity and perihelion below it reproduces SOFA's B1950.0 E-terms vector of ``fk425``
#: to 1e-11 rad (checked in tests).
ABERRATION_CONSTANT_IAU1976_RAD = 20.49552 / ARCSEC_PER_RAD

#: Proper motion per Julian year -> per tropical year (factor on rad/yr values), for the FK4
#: routines that take motions per tropical year (SOFA fk425/fk524 Note: "rad/trop.yr").
JULIAN_TO_TROPICAL_YEAR = TROPICAL_YEAR_DAYS_LIESKE1979 / JULIAN_YEAR_DAYS

#: Parallax below which a star is treated as infinitely distant in the Cartesian formulation,
#: mas. Positive values below this are kept as given but carry no perspective effects.
TINY_PARALLAX_MAS = 1e-9


class FrameFlag(enum.IntFlag):
    """Per-star flags of a frame conversion (what was assumed or replaced)."""

    #: Parallax not given: star treated as infinitely distant; output parallax missing.
    PARALLAX_MISSING = 1
    #: Parallax zero or negative: treated as infinitely distant; output parallax as given.
    PARALLAX_NOT_POSITIVE = 2
    #: Radial velocity not given: taken as zero for the geometry; output radial velocity
    #: missing.
    RADIAL_VELOCITY_MISSING = 4
    #: Proper motion not given: taken as zero.
    PROPER_MOTION_MISSING = 8
    #: Position within AT_POLE_RAD of a pole of the input frame (as given) or of the output
    #: frame (as converted): the longitude is a convention there, and the proper-motion
    #: components are along the east and north of the longitude given (input) or computed
    #: (output, set by rounding at the pole itself). Note 6 of :func:`convert`.
    AT_POLE = 16


def _year_text(year: float) -> str:
    """An equinox in a label with the digits it has (to 1e-9 yr, as the API rounds it):
    1950.0, 1949.999786 (B1950.0 as a Julian year); not rounded to 0.1 year (36 days)."""
    text = f"{year:.9f}".rstrip("0")
    return text + "0" if text.endswith(".") else text


#: Frame names understood by :func:`make_frame`.
FRAME_NAMES = ("icrs", "fk5", "fk4", "galactic", "ecliptic")


@dataclass(frozen=True)
class Frame:
    """A celestial reference frame.

    Attributes
    ----------
    name : str
        One of :data:`FRAME_NAMES`.
    equinox : float or None
        Julian epoch (TT) for ``fk5`` and ``ecliptic``; Besselian epoch for ``fk4``; None for
        ``icrs`` and ``galactic``, and for an ecliptic "of date" (Note 1 of :func:`convert`).
    """

    name: str
    equinox: float | None = None

    @property
    def of_date(self) -> bool:
        """True for the ecliptic of date (equinox = epoch of the astrometry)."""
        return self.name == "ecliptic" and self.equinox is None

    def describe(self) -> str:
        """Short human-readable label, e.g. ``FK4 B1950.0``."""
        if self.name == "fk4":
            return f"FK4 B{_year_text(self.equinox)}"
        if self.name == "fk5":
            return f"FK5 J{_year_text(self.equinox)}"
        if self.name == "ecliptic":
            return "ecliptic of date" if self.of_date else f"ecliptic J{_year_text(self.equinox)}"
        return self.name.upper() if self.name == "icrs" else self.name


def make_frame(name: str, equinox: float | str | None = None) -> Frame:
    """Build and validate a :class:`Frame`.

    Parameters
    ----------
    name : str
        ``icrs``, ``fk5``, ``fk4``, ``galactic`` or ``ecliptic`` (case-insensitive).
    equinox : float, "of_date" or None
        For ``fk5``: Julian epoch (default 2000.0). For ``fk4``: Besselian epoch (default
        1950.0). For ``ecliptic``: Julian epoch (default 2000.0) or ``"of_date"``. Must be
        None for ``icrs`` and ``galactic``.

    Returns
    -------
    Frame

    Raises
    ------
    ValueError
        Unknown name, equinox given where none applies, or equinox outside 1000-3000.
    """
    key = str(name).strip().lower()
    if key not in FRAME_NAMES:
        raise ValueError(f"unknown frame {name!r}; expected one of {', '.join(FRAME_NAMES)}")
    if key in ("icrs", "galactic"):
        if equinox is not None:
            raise ValueError(f"frame {key} takes no equinox")
        return Frame(key, None)
    if isinstance(equinox, str) and equinox.strip().lower() == "of_date":
        if key != "ecliptic":
            raise ValueError(f"equinox 'of_date' is for the ecliptic frame only, not {key}")
        return Frame(key, None)
    if equinox is None:
        equinox = 1950.0 if key == "fk4" else 2000.0
    try:
        value = float(equinox)
    except (TypeError, ValueError):
        raise ValueError(f"equinox must be a number of years, got {equinox!r}") from None
    if not 1000.0 <= value <= 3000.0:
        raise ValueError("equinox must be between 1000 and 3000")
    return Frame(key, value)


@dataclass(frozen=True)
class FrameConversion:
    """Astrometry converted to another frame (arrays broadcast to one shape).

    Attributes
    ----------
    ra_deg, dec_deg : ndarray
        Longitude-like and latitude-like angle in the target frame, degrees (right ascension
        and declination; galactic l, b; ecliptic longitude and latitude); longitude in
        [0, 360).
    parallax_mas : ndarray
        Parallax, mas (NaN where not known).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : ndarray
        Proper motion along the two axes of the target frame, mas per Julian year (the first
        includes the cos(latitude) factor).
    radial_velocity_km_s : ndarray
        Radial velocity, km/s (NaN where not known).
    epoch_jyear : ndarray
        Julian epoch (TDB) at which the position holds, years.
    flags : ndarray of uint32
        :class:`FrameFlag` bits per star.
    """

    ra_deg: np.ndarray
    dec_deg: np.ndarray
    parallax_mas: np.ndarray
    pm_ra_cosdec_mas_yr: np.ndarray
    pm_dec_mas_yr: np.ndarray
    radial_velocity_km_s: np.ndarray
    epoch_jyear: np.ndarray
    flags: np.ndarray


# ---------------------------------------------------------------------------------------------
# Cartesian state: unit direction p, velocity per unit distance w (rad/yr), parallax, rv
# ---------------------------------------------------------------------------------------------


@dataclass
class _State:
    p: np.ndarray  # (..., 3) unit vector
    w: np.ndarray  # (..., 3) space velocity divided by distance, rad per Julian year
    px_mas: np.ndarray  # parallax as given (NaN missing)
    rv_km_s: np.ndarray  # radial velocity as given (NaN missing)
    distant: np.ndarray  # bool: no usable parallax (missing, non-positive or tiny)


def pole_flags(lat_deg) -> np.ndarray:
    """:class:`FrameFlag` AT_POLE where a latitude (degrees) is within AT_POLE_RAD of a pole,
    else 0 (uint32, the shape of ``lat_deg``)."""
    near = np.cos(np.asarray(lat_deg, dtype=float) * RAD_PER_DEG) < AT_POLE_RAD
    return np.where(near, np.uint32(FrameFlag.AT_POLE), np.uint32(0))


def _tangent_basis(ra, dec):
    sr, cr, sd, cd = np.sin(ra), np.cos(ra), np.sin(dec), np.cos(dec)
    zero = np.zeros_like(sr)
    p = np.stack([cd * cr, cd * sr, sd], axis=-1)
    e_ra = np.stack([-sr, cr, zero], axis=-1)
    e_dec = np.stack([-sd * cr, -sd * sr, cd], axis=-1)
    return p, e_ra, e_dec


def _to_state(ra_deg, dec_deg, parallax_mas, pmra, pmdec, rv):
    """Spherical astrometry -> Cartesian state (ESA 1997, Vol. 1, section 1.5.5, eq. 1.5.63)."""
    ra = np.asarray(ra_deg, dtype=float) * RAD_PER_DEG
    dec = np.asarray(dec_deg, dtype=float) * RAD_PER_DEG
    ra, dec, px, pmra, pmdec, rv = np.broadcast_arrays(
        ra,
        dec,
        np.asarray(parallax_mas, dtype=float),
        np.asarray(pmra, dtype=float),
        np.asarray(pmdec, dtype=float),
        np.asarray(rv, dtype=float),
    )
    flags = (
        np.where(np.isnan(px), np.uint32(FrameFlag.PARALLAX_MISSING), np.uint32(0))
        | np.where(px <= 0.0, np.uint32(FrameFlag.PARALLAX_NOT_POSITIVE), np.uint32(0))
        | np.where(np.isnan(rv), np.uint32(FrameFlag.RADIAL_VELOCITY_MISSING), np.uint32(0))
        | np.where(
            np.isnan(pmra) | np.isnan(pmdec),
            np.uint32(FrameFlag.PROPER_MOTION_MISSING),
            np.uint32(0),
        )
    ).astype(np.uint32)
    distant = ~(px > TINY_PARALLAX_MAS)
    p, e_ra, e_dec = _tangent_basis(ra, dec)
    mu_a = np.nan_to_num(pmra) / MAS_PER_RAD
    mu_d = np.nan_to_num(pmdec) / MAS_PER_RAD
    # Radial motion per unit distance: zeta = v_r / (A d) = v_r * parallax(rad) / A, 1/yr.
    zeta = np.where(distant, 0.0, np.nan_to_num(rv) * px / MAS_PER_RAD / AU_PER_JULIAN_YEAR_KM_S)
    w = mu_a[..., None] * e_ra + mu_d[..., None] * e_dec + zeta[..., None] * p
    return _State(p, w, px.copy(), rv.copy(), distant), flags


def _from_state(s: _State):
    p = s.p
    ra = np.arctan2(p[..., 1], p[..., 0])
    dec = np.arctan2(p[..., 2], np.sqrt(p[..., 0] ** 2 + p[..., 1] ** 2))
    _, e_ra, e_dec = _tangent_basis(ra, dec)
    pmra = np.sum(s.w * e_ra, axis=-1) * MAS_PER_RAD
    pmdec = np.sum(s.w * e_dec, axis=-1) * MAS_PER_RAD
    zeta = np.sum(s.w * p, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        rv_geom = zeta * AU_PER_JULIAN_YEAR_KM_S * MAS_PER_RAD / s.px_mas
    rv = np.where(s.distant | np.isnan(s.rv_km_s), s.rv_km_s, rv_geom)
    ra_deg = np.mod(ra / RAD_PER_DEG, 360.0)
    ra_deg = np.where(ra_deg >= 360.0, ra_deg - 360.0, ra_deg)  # -1e-15 -> 360 - 1e-15 -> 360
    return ra_deg, dec / RAD_PER_DEG, s.px_mas, pmra, pmdec, rv


def _rotate(s: _State, m) -> _State:
    m = np.asarray(m, dtype=float)
    p = np.einsum("...ij,...j->...i", m, s.p)
    w = np.einsum("...ij,...j->...i", m, s.w)
    return _State(p, w, s.px_mas, s.rv_km_s, s.distant)


def _propagate(s: _State, dt_yr) -> _State:
    """Uniform space motion over ``dt_yr`` Julian years.

    Rigorous linear motion in Cartesian coordinates (ESA 1997, Vol. 1, section 1.5.5,
    eqs. 1.5.17-1.5.20, with the velocity divided by the distance): ``u = p + dt w``,
    new direction ``u/|u|``, parallax divided by ``|u|``. For a star without usable parallax
    the radial term is zero and the motion is the tangent-plane motion of an infinitely
    distant point, as in SOFA ``pmpx``.
    """
    dt = np.asarray(dt_yr, dtype=float)[..., None]
    if not np.any(dt):
        return s
    u = s.p + dt * s.w
    n = np.sqrt(np.sum(u * u, axis=-1))
    p = u / n[..., None]
    w = s.w / n[..., None]
    px = np.where(s.distant, s.px_mas, s.px_mas / n)
    return _State(p, w, px, s.rv_km_s, s.distant)


# ---------------------------------------------------------------------------------------------
# Fixed matrices and rotations
# ---------------------------------------------------------------------------------------------


def _galactic_matrix() -> np.ndarray:
    """ICRS -> galactic rotation matrix, built from SOFA ``icrs2g`` applied to the axes."""
    lon, lat = erfa.icrs2g(np.array([0.0, np.pi / 2, 0.0]), np.array([0.0, 0.0, np.pi / 2]))
    cols = np.stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)], axis=-1)
    return cols.T.copy()


#: ICRS -> galactic (Hipparcos, ESA 1997, Vol. 1, section 1.5.3, eq. 1.5.11; via SOFA icrs2g).
ICRS_TO_GALACTIC = _galactic_matrix()

#: FK5 -> Hipparcos/ICRS orientation at J2000.0 and spin (rad, rad per Julian year);
#: SOFA ``fk5hip`` (Mignard & Froeschle 2000).
_R5H, _S5H = erfa.fk5hip()


def _jepoch_to_jd(epoch):
    return erfa.epj2jd(np.asarray(epoch, dtype=float))


def fk5_to_icrs_matrix(epoch_jyear):
    """Orientation of FK5 J2000.0 with respect to ICRS at an epoch, as in SOFA ``fk5hz``.

    Parameters
    ----------
    epoch_jyear : array_like
        Julian epoch (TDB) of the astrometry, years.

    Returns
    -------
    ndarray, shape (..., 3, 3)
        Matrix R such that p_ICRS = R p_FK5 (Note 1).

    Notes
    -----
    1. R(t) = R5h rv2m(s (t - J2000.0)), with R5h and s the FK5-to-Hipparcos orientation and
       spin of SOFA ``fk5hip``; at J2000.0 it is the ``fk52h`` rotation.

    References
    ----------
    Mignard, F. & Froeschle, M. 2000, A&A 354, 732 (Table 2).
    SOFA routines ``fk5hip``, ``fk5hz`` (IAU SOFA Board, 2023 release).
    """
    dt = np.asarray(epoch_jyear, dtype=float) - JEPOCH_J2000
    spin = erfa.rv2m(dt[..., None] * _S5H)
    return np.einsum("ij,...jk->...ik", _R5H, spin)


def _fk5_to_icrs(s: _State, epoch) -> _State:
    r = fk5_to_icrs_matrix(epoch)
    # Velocity: w_h = R (w_5 + p_5 x s); the spin term is the apparent rotation of FK5.
    w5 = s.w + np.cross(s.p, _S5H)
    p = np.einsum("...ij,...j->...i", r, s.p)
    w = np.einsum("...ij,...j->...i", r, w5)
    return _State(p, w, s.px_mas, s.rv_km_s, s.distant)


def _icrs_to_fk5(s: _State, epoch) -> _State:
    rt = np.swapaxes(fk5_to_icrs_matrix(epoch), -1, -2)
    p = np.einsum("...ij,...j->...i", rt, s.p)
    w = np.einsum("...ij,...j->...i", rt, s.w) - np.cross(p, _S5H)
    return _State(p, w, s.px_mas, s.rv_km_s, s.distant)


def newcomb_precession_matrix(bepoch_from, bepoch_to):
    """Newcomb (FK4) precession matrix between two Besselian epochs.

    Parameters
    ----------
    bepoch_from, bepoch_to : array_like
        Besselian epochs of the mean equinoxes, years.

    Returns
    -------
    ndarray, shape (..., 3, 3)
        Matrix P with p(to) = P p(from) (Note 1).

    Notes
    -----
    1. Euler angles zeta, z, theta in Kinoshita's development of Andoyer's expressions for
       Newcomb's precession, polynomials in tropical centuries from B1850.0; matrix
       R3(-z) R2(theta) R3(-zeta).
    2. The coefficients (2303.5548, 1.39720, 0.000059, 0.30242, ...) are those of SLALIB's
       PREBN (from memory); tests compare with astropy's independent Newcomb matrix.

    References
    ----------
    Kinoshita, H. 1975, SAO Special Report No. 364.
    Smith, C.A. et al. 1989, AJ 97, 265 (section 2).
    """
    b0 = np.asarray(bepoch_from, dtype=float)
    b1 = np.asarray(bepoch_to, dtype=float)
    big_t = (b0 - 1850.0) / 100.0
    t = (b1 - b0) / 100.0
    tas2r = t / ARCSEC_PER_RAD
    w = 2303.5548 + (1.39720 + 0.000059 * big_t) * big_t
    zeta = (w + (0.30242 - 0.000269 * big_t + 0.017996 * t) * t) * tas2r
    z = (w + (1.09478 + 0.000387 * big_t + 0.018324 * t) * t) * tas2r
    theta = (
        2005.1125
        + (-0.85294 - 0.000365 * big_t) * big_t
        + (-0.42647 - 0.000365 * big_t - 0.041802 * t) * t
    ) * tas2r
    return _rz(-z) @ _ry(theta) @ _rz(-zeta)


def _rz(a):
    a = np.asarray(a, dtype=float)
    c, s = np.cos(a), np.sin(a)
    o, z = np.ones_like(a), np.zeros_like(a)
    return np.stack(
        [np.stack([c, s, z], -1), np.stack([-s, c, z], -1), np.stack([z, z, o], -1)], -2
    )


def _ry(a):
    a = np.asarray(a, dtype=float)
    c, s = np.cos(a), np.sin(a)
    o, z = np.ones_like(a), np.zeros_like(a)
    return np.stack(
        [np.stack([c, z, -s], -1), np.stack([z, o, z], -1), np.stack([s, z, c], -1)], -2
    )


#: E-terms vector of SOFA ``fk425``/``fk524`` for B1950.0, radians (Seidelmann 1992, 3.591-2).
E_TERMS_B1950_SOFA_RAD = np.array([-1.62557e-6, -0.31919e-6, -0.13843e-6])


def _e_terms_formula(bepoch_equinox):
    d1, d2 = erfa.epb2jd(np.asarray(bepoch_equinox, dtype=float))
    t = ((d1 - JD_J2000) + d2) / 36525.0
    ecc = 0.016708634 - 0.000042037 * t - 0.0000001267 * t * t
    peri = (102.93735 + 1.71946 * t + 0.00046 * t * t) * RAD_PER_DEG
    eps = erfa.obl80(d1, d2)
    k = ABERRATION_CONSTANT_IAU1976_RAD * ecc
    return np.stack(
        [-k * np.sin(peri), k * np.cos(peri) * np.cos(eps), k * np.cos(peri) * np.sin(eps)], -1
    )


def fk4_e_terms(bepoch_equinox):
    """E-terms of aberration vector of an FK4 equinox, radians (SOFA ``fk425`` sign).

    Parameters
    ----------
    bepoch_equinox : array_like
        Besselian epoch of the equinox, years.

    Returns
    -------
    ndarray, shape (..., 3)
        Vector A such that a catalogue (E-terms included) direction p relates to the
        E-terms-free direction by p - A + (p.A) p (SOFA ``fk425``; Seidelmann 1992, 3.591-2).

    Notes
    -----
    1. The slow change of A with the equinox follows A = kappa e (-sin w, cos w cos eps,
       cos w sin eps), kappa the constant of aberration, e the eccentricity and w the
       longitude of perihelion of the Earth's orbit, eps the mean obliquity (IAU 1980,
       SOFA ``obl80``); e = 0.016708634 - 0.000042037 T - 0.0000001267 T^2 and
       w = 102.93735 + 1.71946 T + 0.00046 T^2 degrees, T in Julian centuries from J2000.0
       (Meeus 1998, Astronomical Algorithms, 2nd ed., chapter 25; from memory).
    2. The formula is anchored to SOFA's fixed B1950.0 vector: A(B) = A_SOFA + f(B) - f(1950),
       so that equinox B1950.0 is exactly the SOFA ``fk425`` case (the bare formula differs
       from SOFA's rounded vector by less than 1e-10 rad).
    """
    return E_TERMS_B1950_SOFA_RAD + (_e_terms_formula(bepoch_equinox) - _e_terms_formula(1950.0))


def _remove_e_terms(s: _State, a) -> _State:
    pa = np.sum(s.p * a, axis=-1)[..., None]
    q = s.p - a + pa * s.p
    n = np.sqrt(np.sum(q * q, axis=-1))[..., None]
    # Differential effect on the motion: d/dt of the same expression.
    wa = np.sum(s.w * a, axis=-1)[..., None]
    wq = s.w + wa * s.p + pa * s.w
    return _State(q / n, wq / n, s.px_mas, s.rv_km_s, s.distant)


def _add_e_terms(s: _State, a) -> _State:
    """Exact inverse of :func:`_remove_e_terms` by fixed-point iteration (A ~ 1.7e-6 rad)."""
    target = s
    guess = _State(
        s.p + a - np.sum(s.p * a, -1)[..., None] * s.p, s.w, s.px_mas, s.rv_km_s, s.distant
    )
    for _ in range(4):
        got = _remove_e_terms(guess, a)
        p = guess.p + (target.p - got.p)
        p = p / np.sqrt(np.sum(p * p, axis=-1))[..., None]
        w = guess.w + (target.w - got.w)
        guess = _State(p, w, s.px_mas, s.rv_km_s, s.distant)
    return guess


def _fk4_equinox_to_b1950(s: _State, bepoch) -> _State:
    if bepoch == 1950.0:
        return s
    s = _remove_e_terms(s, fk4_e_terms(bepoch))
    s = _rotate(s, newcomb_precession_matrix(bepoch, 1950.0))
    return _add_e_terms(s, fk4_e_terms(1950.0))


def _fk4_b1950_to_equinox(s: _State, bepoch) -> _State:
    if bepoch == 1950.0:
        return s
    s = _remove_e_terms(s, fk4_e_terms(1950.0))
    s = _rotate(s, newcomb_precession_matrix(1950.0, bepoch))
    return _add_e_terms(s, fk4_e_terms(bepoch))


# ---------------------------------------------------------------------------------------------
# FK4 B1950.0 <-> FK5 J2000.0 (SOFA fk425 / fk524)
# ---------------------------------------------------------------------------------------------


#: Parallax that stands in for an unknown or non-positive one in the SOFA catalogue routines,
#: arcsec (Note 1 of :func:`_erfa_args`). Any positive value gives the same directions.
STAND_IN_PARALLAX_ARCSEC = 1.0


def _erfa_args(s: _State):
    """State -> SOFA catalogue arguments (rad, rad/yr as dRA/dt, arcsec, km/s).

    Notes
    -----
    1. The whole space motion is passed, its radial part included, whether or not the
       radial velocity or the parallax was given: a missing radial velocity is zero at the
       epoch of the catalogue, not at B1950.0 or J2000.0, and fk425/fk524 carry the state
       from one of those epochs to the other. The radial velocity passed is the one the
       state's radial motion implies (zeta A / parallax). A star without a usable parallax
       gets :data:`STAND_IN_PARALLAX_ARCSEC`: with a zero parallax fk425 and fk524 drop the
       radial part of the motion (their "px > TINY" branch), which then moves the star
       along another line (0.07 mas at B1950.0 for a star of 2.9 arcsec/yr whose radial
       velocity was missing, 3 mas at 10 arcsec/yr). With a positive one the directions and
       motions come out independent of its value; the parallax reported stays the one given.
    """
    ra, dec, _px, pmra, pmdec, _rv = _from_state(s)
    r = ra * RAD_PER_DEG
    d = dec * RAD_PER_DEG
    dr = pmra / MAS_PER_RAD / np.cos(d)
    dd = pmdec / MAS_PER_RAD
    pxa = np.where(s.distant, STAND_IN_PARALLAX_ARCSEC, s.px_mas / 1000.0)
    zeta = np.sum(s.w * s.p, axis=-1)  # radial motion per unit distance, 1/yr
    v = zeta * AU_PER_JULIAN_YEAR_KM_S * MAS_PER_RAD / (pxa * 1000.0)
    return r, d, dr, dd, pxa, v


def _from_erfa(r, d, dr, dd, pxa, v, template: _State) -> _State:
    """SOFA catalogue values -> state: the geometry from all of them (Note 1 of
    :func:`_erfa_args`); the parallax and radial velocity reported stay unknown where the
    template's were."""
    s, _ = _to_state(
        r / RAD_PER_DEG, d / RAD_PER_DEG, pxa * 1000.0, dr * np.cos(d) * MAS_PER_RAD,
        dd * MAS_PER_RAD, v,
    )  # fmt: skip
    s.distant = template.distant
    s.px_mas = np.where(template.distant, template.px_mas, pxa * 1000.0)
    s.rv_km_s = np.where(template.distant | np.isnan(template.rv_km_s), template.rv_km_s, v)
    return s


def fk425_catalogue(r, d, dr, dd, pxa, v):
    """SOFA ``fk425`` with the proper motion per Julian year on input (Note 1).

    Parameters
    ----------
    r, d : array_like
        FK4 B1950.0 right ascension and declination at epoch B1950.0, radians.
    dr, dd : array_like
        Proper motion dRA/dt (not times cos dec) and dDec/dt, radians per Julian year.
    pxa : array_like
        Parallax, arcsec (0 = infinitely distant).
    v : array_like
        Radial velocity, km/s.

    Returns
    -------
    tuple of ndarray
        FK5 J2000.0 at epoch J2000.0: RA, Dec (rad), dRA/dt, dDec/dt (rad per Julian year),
        parallax (arcsec), radial velocity (km/s).

    Notes
    -----
    1. SOFA takes FK4 proper motions per tropical year; the conversion factor is
       365.242198781/365.25 (Lieske 1979 tropical year).
    """
    f = JULIAN_TO_TROPICAL_YEAR
    return erfa.fk425(r, d, dr * f, dd * f, pxa, v)


def fk524_exact_inverse(r, d, dr, dd, pxa, v):
    """FK5 J2000.0 -> FK4 B1950.0: SOFA ``fk524`` refined to invert ``fk425`` exactly.

    Parameters and returns mirror :func:`fk425_catalogue` (FK4 motions per Julian year).

    Notes
    -----
    1. SOFA's ``fk524`` uses the published inverse matrix, whose rounding makes
       ``fk524(fk425(x))`` differ from x by up to about 30 microarcseconds in position
       (measured on random stars). Two fixed-point steps x <- x + g(y) - g(f(x)), with f =
       fk425 and g = fk524, remove this, so that FK4 -> ICRS -> FK4 round trips hold to
       well below a microarcsecond.
    2. The corrections are added to the direction and tangential motion as vectors, not to
       RA, Dec and dRA/dt: near a pole a small change of direction is a large change of RA,
       and corrections added to the angles put the proper motion on the axes of another RA
       (1.5 arcsec/yr wrong for a star of 1.7 arcsec/yr given exactly at the FK4 pole, 2
       mas/yr at 0.1 mas from it).
    """
    f = JULIAN_TO_TROPICAL_YEAR
    y = (r, d, dr, dd, pxa, v)
    gy = _catalogue_vectors(*erfa.fk524(*y))
    x = gy
    for _ in range(2):
        gfx = _catalogue_vectors(*erfa.fk524(*erfa.fk425(*_catalogue_angles(*x))))
        x = tuple(xk + (gk - hk) for xk, gk, hk in zip(x, gy, gfx, strict=True))
    r4, d4, dr4, dd4, px4, v4 = _catalogue_angles(*x)
    return r4, d4, dr4 / f, dd4 / f, px4, v4


def _catalogue_vectors(r, d, dr, dd, pxa, v):
    """SOFA catalogue angles -> direction and tangential motion vectors (rad, rad/yr), parallax
    and radial velocity: a parametrisation without the singularity of RA at the poles, where
    the refinement of :func:`fk524_exact_inverse` adds its corrections (Note 2 there)."""
    p, e_ra, e_dec = _tangent_basis(np.asarray(r, dtype=float), np.asarray(d, dtype=float))
    mu_a = np.asarray(dr, dtype=float) * np.cos(d)
    w = mu_a[..., None] * e_ra + np.asarray(dd, dtype=float)[..., None] * e_dec
    return p, w, np.asarray(pxa, dtype=float), np.asarray(v, dtype=float)


def _catalogue_angles(p, w, pxa, v):
    """Inverse of :func:`_catalogue_vectors` (the direction normalised, the motion projected on
    the tangent plane at it)."""
    p = p / np.sqrt(np.sum(p * p, axis=-1))[..., None]
    r = np.mod(np.arctan2(p[..., 1], p[..., 0]), 2 * np.pi)
    d = np.arctan2(p[..., 2], np.hypot(p[..., 0], p[..., 1]))
    _, e_ra, e_dec = _tangent_basis(r, d)
    with np.errstate(divide="ignore", invalid="ignore"):
        dr = np.sum(w * e_ra, axis=-1) / np.cos(d)
    return r, d, dr, np.sum(w * e_dec, axis=-1), pxa, v


# ---------------------------------------------------------------------------------------------
# Frame -> ICRS and back, at the epoch of the astrometry
# ---------------------------------------------------------------------------------------------


def _ecliptic_matrix(frame: Frame, epoch):
    equinox = epoch if frame.of_date else frame.equinox
    d1, d2 = _jepoch_to_jd(equinox)
    return erfa.ecm06(d1, d2)


def _to_icrs(s: _State, frame: Frame, epoch) -> _State:
    if frame.name == "icrs":
        return s
    if frame.name == "galactic":
        return _rotate(s, ICRS_TO_GALACTIC.T)
    if frame.name == "ecliptic":
        return _rotate(s, np.swapaxes(_ecliptic_matrix(frame, epoch), -1, -2))
    if frame.name == "fk5":
        if frame.equinox != 2000.0:
            pm = erfa.pmat76(*_jepoch_to_jd(frame.equinox))
            s = _rotate(s, pm.T)
        return _fk5_to_icrs(s, epoch)
    # FK4: to equinox B1950.0, to epoch B1950.0, fk425, FK5 -> ICRS at J2000.0, to epoch.
    s = _fk4_equinox_to_b1950(s, frame.equinox)
    s = _propagate(s, JEPOCH_B1950 - np.asarray(epoch, dtype=float))
    out = fk425_catalogue(*_erfa_args(s))
    s = _from_erfa(*out, template=s)
    s = _fk5_to_icrs(s, JEPOCH_J2000)
    return _propagate(s, np.asarray(epoch, dtype=float) - JEPOCH_J2000)


def _from_icrs(s: _State, frame: Frame, epoch) -> _State:
    if frame.name == "icrs":
        return s
    if frame.name == "galactic":
        return _rotate(s, ICRS_TO_GALACTIC)
    if frame.name == "ecliptic":
        return _rotate(s, _ecliptic_matrix(frame, epoch))
    if frame.name == "fk5":
        s = _icrs_to_fk5(s, epoch)
        if frame.equinox != 2000.0:
            s = _rotate(s, erfa.pmat76(*_jepoch_to_jd(frame.equinox)))
        return s
    s = _propagate(s, JEPOCH_J2000 - np.asarray(epoch, dtype=float))
    s = _icrs_to_fk5(s, JEPOCH_J2000)
    out = fk524_exact_inverse(*_erfa_args(s))
    s = _from_erfa(*out, template=s)
    s = _propagate(s, np.asarray(epoch, dtype=float) - JEPOCH_B1950)
    return _fk4_b1950_to_equinox(s, frame.equinox)


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def convert(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_jyear,
    from_frame: Frame,
    to_frame: Frame,
) -> FrameConversion:
    """Convert astrometry with motion from one frame to another at the same epoch.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        Position in ``from_frame`` at ``epoch_jyear``, degrees (for galactic: l, b; for
        ecliptic: longitude, latitude).
    parallax_mas : array_like
        Parallax, mas; NaN = not known (Note 2).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : array_like
        Proper motion, mas per Julian year, the first including cos(dec) (Note 3); NaN = not
        known, taken as zero and flagged.
    radial_velocity_km_s : array_like
        Radial velocity, km/s, positive receding; NaN = not known.
    epoch_jyear : array_like
        Julian epoch (TDB) at which the position holds, years (Note 4).
    from_frame, to_frame : Frame
        See :func:`make_frame`.

    Returns
    -------
    FrameConversion
        Astrometry in ``to_frame`` at the same epoch, with :class:`FrameFlag` bits.

    Notes
    -----
    1. FK5 and FK4 frames of another equinox are the J2000.0 / B1950.0 frames precessed as
       fixed frames (the precession is a rotation of the axes, applied to position and proper
       motion alike). The ecliptic "of date" uses the mean ecliptic and equinox of the epoch
       of the astrometry, likewise as a fixed frame.
    2. Stars without a usable parallax (missing, zero or negative) are treated as infinitely
       distant: no radial motion and no perspective effects; the output parallax is the
       input one and the output radial velocity is passed through.
    3. All proper motions are per Julian year, FK4 ones included (SOFA's FK4 routines take
       motions per tropical year; the factor is applied inside). FK4 catalogue motions given
       per tropical century must be divided by 100 x 365.242198781/365.25 by the caller.
    4. FK4 astrometry at an epoch other than B1950.0 is first carried to epoch B1950.0 in
       FK4 with uniform space motion (E-terms kept), as the Standish/Aoki matrix requires
       epoch and equinox B1950.0 (SOFA ``fk425`` Note 3); the result is carried from J2000.0
       back to the requested epoch in ICRS.
    5. Conversions with FK4 include the fictitious proper motion of distant objects caused by
       the E-terms (SOFA ``fk425`` Note 2).
    6. At a pole of either frame (within AT_POLE_RAD, flag AT_POLE) east and north, and with
       them the proper-motion components, follow the longitude: the one given at a pole of
       ``from_frame`` (the limit along that meridian), the one computed at a pole of
       ``to_frame`` (where rounding sets it). The motion itself is converted in Cartesian
       form, without the singularity.

    References
    ----------
    Standish, E.M. 1982, A&A 115, 20. Aoki, S. et al. 1983, A&A 128, 263.
    Seidelmann, P.K. (ed) 1992, Explanatory Supplement to the Astronomical Almanac, 3.59.
    ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200, Vol. 1, sections 1.5.3, 1.5.5.
    Mignard, F. & Froeschle, M. 2000, A&A 354, 732.
    Hilton, J.L. et al. 2006, Celest. Mech. Dyn. Astr. 94, 351 (IAU 2006 ecliptic).
    """
    epoch = np.asarray(epoch_jyear, dtype=float)
    state, flags = _to_state(
        ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s
    )
    epoch = np.broadcast_to(epoch, state.p.shape[:-1])
    if from_frame != to_frame:
        # No warnings filter here: none of the ERFA routines on this path (epj2jd, epb2jd,
        # pmat76, ecm06, obl80, fk425, fk524, fk5hip, rv2m, icrs2g) has a status that pyerfa
        # turns into a warning ("dubious year" comes from the UTC routines only), and
        # warnings.catch_warnings() changes process-wide state, unsafe under threaded workers.
        state = _to_icrs(state, from_frame, epoch)
        state = _from_icrs(state, to_frame, epoch)
    ra, dec, px, pmra, pmdec, rv = _from_state(state)
    flags = flags | pole_flags(dec_deg) | pole_flags(dec)
    return FrameConversion(
        ra_deg=ra,
        dec_deg=dec,
        parallax_mas=px,
        pm_ra_cosdec_mas_yr=pmra,
        pm_dec_mas_yr=pmdec,
        radial_velocity_km_s=rv,
        epoch_jyear=np.array(epoch, dtype=float),
        flags=flags,
    )


def propagate_uniform(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
):
    """Carry astrometry from one epoch to another with uniform space motion.

    Parameters
    ----------
    ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s
        As in :func:`convert` (degrees, mas, mas per Julian year, km/s; NaN = not known).
    epoch_from_jyear, epoch_to_jyear : array_like
        Julian epochs (TDB), years.

    Returns
    -------
    tuple of ndarray
        ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr,
        radial_velocity_km_s at ``epoch_to_jyear``, and :class:`FrameFlag` bits.

    Notes
    -----
    1. Rigorous linear motion in Cartesian coordinates without light-time terms (ESA 1997,
       Vol. 1, section 1.5.5, eqs. 1.5.17-1.5.20). Stars without usable parallax move on the
       tangent plane as in SOFA ``pmpx``.
    """
    state, flags = _to_state(
        ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s
    )
    dt = np.asarray(epoch_to_jyear, dtype=float) - np.asarray(epoch_from_jyear, dtype=float)
    state = _propagate(state, np.broadcast_to(dt, state.p.shape[:-1]))
    return (*_from_state(state), flags)
