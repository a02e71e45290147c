"""Propagation of stellar astrometry and its covariance between epochs.

Two models are offered:

``standard``
    Straight-line motion at constant barycentric velocity in the rigorous formulation of the
    Hipparcos Catalogue (ESA 1997, Vol. 1, section 1.5.5): scaled quantities, with the radial
    proper motion ``mu_r = v_r * parallax / A`` (A = 1 au per Julian year in km/s), which
    stays finite when the parallax is zero. All six parameters are propagated, perspective
    acceleration included. Epochs are Julian epochs on the TDB scale; no light-time
    correction (as in the catalogue's own definition of astrometric parameters).
``light_time``
    The same straight-line motion, but with the light-time correction of the IAU SOFA
    routines starpm/pmsafe (called through pyerfa), which relate the times at which light
    left the star (ESA 1997 Vol. 1 sec 1.2.8; Kaplan et al. 1989; Stumpff 1985).

Covariances propagate through the analytic Jacobian of the standard model (see
:func:`standard_jacobian`).

Vectorisation: every argument broadcasts against the others; use shapes (N, 1) for stars and
(M,) for epochs to get (N, M) results.

Units (Note 1 of every function): ra, dec in degrees; parallax in mas; proper motions in
mas/yr with the RA component including cos(dec) (this is NOT SOFA's dRA/dt); radial velocity
in km/s; epochs as Julian epochs (TDB), years.

References
----------
ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200, Vol. 1, section 1.5.5
    (equations 1.5.8 to 1.5.19 for the model, Table 1.5.3 structure for its Jacobian).
Butkevich, A.G. & Lindegren, L. 2014, A&A 570, A62 (rigorous propagation, light time).
IAU SOFA / ERFA routines starpm, pmsafe (pyerfa).
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

import numpy as np
from erfa import ufunc as erfa_ufunc

from .constants import (
    AU_PER_JULIAN_YEAR_KM_S,
    DEG_PER_RAD,
    IMPLAUSIBLE_PARALLAX_MAS,
    IMPLAUSIBLE_PROPER_MOTION_MAS_YR,
    IMPLAUSIBLE_RADIAL_VELOCITY_KM_S,
    IMPLAUSIBLE_SPACE_VELOCITY_KM_S,
    MAS_PER_RAD,
    RAD_PER_DEG,
)
from .epochs import julian_epoch_to_jd
from .floating import overflow_to_infinity

MODELS = ("standard", "light_time")

#: Distance from a celestial pole below which a position counts as at the pole, radians
#: (1e-12 rad = 0.2 microarcsecond; a declination of exactly +-90 degrees in double
#: precision is ~6e-17 rad from the pole, so it is caught).
AT_POLE_RAD = 1e-12


class PropagationFlag(enum.IntFlag):
    """Per-star report of what was assumed, replaced or found implausible."""

    #: Parallax not given: distance unknown, so the radial velocity cannot act (radial
    #: proper motion taken as zero, no perspective acceleration); parallax out is unknown.
    PARALLAX_MISSING = 1
    #: Parallax zero or negative: no physical distance, radial proper motion taken as zero;
    #: the parallax out is the formal value, not a distance (carried along by the standard
    #: model; the light-time model returns it as given).
    PARALLAX_NOT_POSITIVE = 2
    #: Radial velocity not given: taken as zero for the motion (no perspective acceleration
    #: from it); the radial velocity out is unknown.
    RADIAL_VELOCITY_MISSING = 4
    #: Total proper motion above 10.4 arcsec/yr (more than any known star): probably a unit
    #: mistake. Computed as given.
    PROPER_MOTION_IMPLAUSIBLE = 8
    #: Space velocity implied by parallax, proper motion and radial velocity above half the
    #: speed of light: the inputs are inconsistent (light-time model caps it, as SOFA does).
    SPACE_VELOCITY_IMPLAUSIBLE = 16
    #: Position at a celestial pole (within AT_POLE_RAD of it) at the catalogue epoch or the
    #: target epoch: right ascension and the orientation of the proper-motion components
    #: are undefined there. From a catalogue position at a pole the directions of the
    #: proper motion are taken from the right ascension given (as the limit along that
    #: meridian). Covariance entries a pole leaves without meaning are NaN (Note 5 of
    #: propagate): ra*cos(dec) from a catalogue position at a pole (a change of it there
    #: turns the motion about the pole), the proper motions at a target at a pole.
    AT_POLE = 32
    #: Light-time model: the parallax was too small for the motion and SOFA replaced the
    #: distance by a minimum value (pmsafe status 1).
    DISTANCE_REPLACED = 64
    #: Light-time model: the light-time iteration did not converge (pmsafe status 4).
    NOT_CONVERGED = 128
    #: Radial velocity given but parallax missing or not positive: the radial velocity is
    #: passed through unchanged (no perspective change can be computed).
    RADIAL_VELOCITY_UNCHANGED = 256
    #: Radial velocity above 5,000 km/s in size (more than any star's measured radial
    #: velocity): probably m/s given as km/s. Computed as given.
    RADIAL_VELOCITY_IMPLAUSIBLE = 512
    #: Uncertainties propagated (covariance given): at the target epoch the standard error
    #: of the star's position vector exceeds NONLINEAR_RELATIVE_ERROR of its distance from
    #: the Sun (across the line of sight: the position error in radians; along it: the
    #: relative error of the distance), as near a close passage of the Sun. The linear
    #: propagation through the Jacobian is then not a valid description of the spread
    #: (it can be wrong by orders of magnitude); use Monte Carlo draws of the inputs.
    UNCERTAINTIES_NONLINEAR = 1024
    #: Parallax above 1,000 mas (nearer than 1 pc; IMPLAUSIBLE_PARALLAX_MAS), more than any
    #: known star's (the largest is about 768 mas): probably microarcseconds given as
    #: milliarcseconds. Computed as given.
    PARALLAX_IMPLAUSIBLE = 2048


#: The flags about implausible inputs (unit mistakes, inconsistent values): the answers of
#: every endpoint that moves stars name these per star and warn about them.
IMPLAUSIBLE_INPUT_FLAGS = (
    PropagationFlag.PROPER_MOTION_IMPLAUSIBLE
    | PropagationFlag.RADIAL_VELOCITY_IMPLAUSIBLE
    | PropagationFlag.SPACE_VELOCITY_IMPLAUSIBLE
    | PropagationFlag.PARALLAX_IMPLAUSIBLE
)


@dataclass(frozen=True)
class Astrometry:
    """Six astrometric parameters of stars at one or more epochs (arrays broadcast).

    Attributes
    ----------
    ra_deg, dec_deg : ndarray
        ICRS right ascension in [0, 360) and declination, degrees.
    parallax_mas : ndarray
        Parallax, mas (NaN where unknown).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : ndarray
        Proper motion in RA (times cos dec) and in Dec, mas/yr.
    radial_velocity_km_s : ndarray
        Radial velocity, km/s (NaN where unknown).
    """

    ra_deg: np.ndarray
    dec_deg: np.ndarray
    parallax_mas: np.ndarray
    pm_ra_cosdec_mas_yr: np.ndarray
    pm_dec_mas_yr: np.ndarray
    radial_velocity_km_s: np.ndarray


@dataclass(frozen=True)
class PropagationResult:
    """Result of :func:`propagate`.

    Attributes
    ----------
    astrometry : Astrometry
        The six parameters at the target epoch(s).
    flags : ndarray of int64
        :class:`PropagationFlag` bits per star and epoch.
    covariance : ndarray or None
        Covariance at the target epoch(s), shape (..., 6, 6), parameter order
        (ra*cos(dec) [mas], dec [mas], parallax [mas], pm_ra_cosdec [mas/yr],
        pm_dec [mas/yr], radial velocity [km/s]); rows/columns of unknown parameters NaN.
    """

    astrometry: Astrometry
    flags: np.ndarray
    covariance: np.ndarray | None


#: One mas (or mas/yr) in radians (rad/yr).
_RAD_PER_MAS = 1.0 / MAS_PER_RAD

#: Relative error of the propagated position vector (its standard error over the star's
#: distance from the Sun) above which linear propagation of the uncertainties is flagged
#: UNCERTAINTIES_NONLINEAR: 0.2, the relative error of a parallax at signal-to-noise 5,
#: below which 1/parallax and linear error propagation are taken to fail (common practice;
#: kinematics.LOW_PARALLAX_SNR_DEFAULT).
NONLINEAR_RELATIVE_ERROR = 0.2

#: Squared thresholds for :func:`input_flags` (squares avoid square roots per star).
_PM_LIMIT_SQ = IMPLAUSIBLE_PROPER_MOTION_MAS_YR**2
_A_SQ = AU_PER_JULIAN_YEAR_KM_S**2
_V_LIMIT_SQ = IMPLAUSIBLE_SPACE_VELOCITY_KM_S**2


def input_flags(parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s):
    """Flags that depend on the inputs only (missing, non-positive, implausible).

    Parameters
    ----------
    parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s : array_like
        As in :func:`propagate` (NaN = unknown parallax or radial velocity).

    Returns
    -------
    ndarray of int64
        :class:`PropagationFlag` bits.

    Notes
    -----
    1. The thresholds are compared as squares: total proper motion mu^2 = mu_a*^2 + mu_d^2
       against IMPLAUSIBLE_PROPER_MOTION_MAS_YR^2; the space velocity, where the parallax
       is positive, as A^2 mu^2 + v_r^2 plx^2 > v_max^2 plx^2 (v_t = A mu / plx; an unknown
       radial velocity counts as zero here); the radial velocity in size against
       IMPLAUSIBLE_RADIAL_VELOCITY_KM_S; the parallax against IMPLAUSIBLE_PARALLAX_MAS.
    """
    plx = np.asarray(parallax_mas, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    pma = np.asarray(pm_ra_cosdec_mas_yr, dtype=float)
    pmd = np.asarray(pm_dec_mas_yr, dtype=float)
    shape = _broadcast_shape(plx, rv, pma, pmd)
    if plx.size == rv.size == pma.size == pmd.size == 1:
        # One star: the same comparisons on Python floats (same IEEE arithmetic, less
        # overhead than a dozen array operations).
        bits = _input_flags_one(plx.item(), pma.item(), pmd.item(), rv.item())
        return np.full(shape, bits, dtype=np.int64)
    F = PropagationFlag
    plx_missing = np.isnan(plx)
    rv_missing = np.isnan(rv)
    plx_positive = plx > 0  # False for NaN
    pm_sq = pma * pma + pmd * pmd
    plx_sq = plx * plx
    vt_sq_plx_sq = _A_SQ * pm_sq  # v_t^2 plx^2
    limit = _V_LIMIT_SQ * plx_sq
    # NaN radial velocity makes the second comparison False; the first then decides.
    too_fast = (vt_sq_plx_sq > limit) | (vt_sq_plx_sq + rv * rv * plx_sq > limit)
    # Bits are assembled on 16-bit integers (cheaper than masked writes into int64).
    flags = np.zeros(shape, dtype=np.uint16)
    for mask, bit in (
        (plx_missing, F.PARALLAX_MISSING),
        (~(plx_positive | plx_missing), F.PARALLAX_NOT_POSITIVE),
        (rv_missing, F.RADIAL_VELOCITY_MISSING),
        (pm_sq > _PM_LIMIT_SQ, F.PROPER_MOTION_IMPLAUSIBLE),
        (~(rv_missing | plx_positive), F.RADIAL_VELOCITY_UNCHANGED),
        (too_fast & plx_positive, F.SPACE_VELOCITY_IMPLAUSIBLE),
        (np.abs(rv) > IMPLAUSIBLE_RADIAL_VELOCITY_KM_S, F.RADIAL_VELOCITY_IMPLAUSIBLE),
        (plx > IMPLAUSIBLE_PARALLAX_MAS, F.PARALLAX_IMPLAUSIBLE),  # False for NaN
    ):
        flags |= np.left_shift(mask, int(bit).bit_length() - 1, dtype=np.uint16)
    flags = flags.astype(np.int64)
    return flags


def implausible_input_flags(parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s):
    """The implausible-input bits alone (IMPLAUSIBLE_INPUT_FLAGS) of :func:`input_flags`: what
    an endpoint or job that may not move the stars (constellation lookups) names per star,
    judged on the inputs as given (NaN, an unknown value, raises none)."""
    flags = input_flags(parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s)
    return flags & int(IMPLAUSIBLE_INPUT_FLAGS)


def _input_flags_one(plx: float, pma: float, pmd: float, rv: float) -> int:
    """:func:`input_flags` of one star, as an int (the same tests, in the same order)."""
    F = PropagationFlag
    plx_missing = math.isnan(plx)
    rv_missing = math.isnan(rv)
    plx_positive = plx > 0
    pm_sq = pma * pma + pmd * pmd
    plx_sq = plx * plx
    vt_sq_plx_sq = _A_SQ * pm_sq
    limit = _V_LIMIT_SQ * plx_sq
    too_fast = (vt_sq_plx_sq > limit) or (vt_sq_plx_sq + rv * rv * plx_sq > limit)
    bits = 0
    for cond, bit in (
        (plx_missing, F.PARALLAX_MISSING),
        (not (plx_positive or plx_missing), F.PARALLAX_NOT_POSITIVE),
        (rv_missing, F.RADIAL_VELOCITY_MISSING),
        (pm_sq > _PM_LIMIT_SQ, F.PROPER_MOTION_IMPLAUSIBLE),
        (not (rv_missing or plx_positive), F.RADIAL_VELOCITY_UNCHANGED),
        (too_fast and plx_positive, F.SPACE_VELOCITY_IMPLAUSIBLE),
        (abs(rv) > IMPLAUSIBLE_RADIAL_VELOCITY_KM_S, F.RADIAL_VELOCITY_IMPLAUSIBLE),
        (plx > IMPLAUSIBLE_PARALLAX_MAS, F.PARALLAX_IMPLAUSIBLE),
    ):
        if cond:
            bits |= int(bit)
    return bits


@dataclass
class _Local:
    """The standard model evaluated in the local triad of the catalogue position.

    Internal; all angles in radians, motions in rad/yr. See :func:`propagate_standard`,
    Notes 3-4, for the definitions.
    """

    sd: np.ndarray  # sin(dec0)
    cd: np.ndarray  # cos(dec0)
    mua: np.ndarray  # mu_a* (rad/yr)
    mud: np.ndarray  # mu_d (rad/yr)
    mur: np.ndarray  # mu_r (rad/yr), zero where not usable
    tau: np.ndarray  # epoch difference (yr)
    sx: np.ndarray  # s on p0
    sy: np.ndarray  # s on q0
    sz: np.ndarray  # s on r0
    X: np.ndarray  # s on the horizontal unit vector towards alpha0 (cos a0, sin a0, 0)
    Z: np.ndarray  # s on the celestial pole
    H: np.ndarray  # |s| cos(dec1) = hypot(X, sx)
    hinv: np.ndarray  # 1/H (0 at a pole)
    s2: np.ndarray  # |s|^2
    f: np.ndarray  # 1/|s|
    VX: np.ndarray  # v on (cos a0, sin a0, 0); v on p0 is mua
    VZ: np.ndarray  # v on the pole
    pa: np.ndarray  # mu_a* at the target (rad/yr)
    pd: np.ndarray  # mu_d at the target (rad/yr)
    tpm2: np.ndarray  # tau (mu_a*^2 + mu_d^2) (rad^2/yr)
    sv: np.ndarray  # s . v = tpm2 + sz mu_r (rad/yr)
    mur1: np.ndarray  # mu_r at the target (rad/yr)


def _advance_local(dec_rad, pma_mas, pmd_mas, mur_mas, tau) -> _Local:
    """Evaluate the straight-line model in the local triad (see propagate_standard).

    :func:`_standard_one` repeats these operations, in this order, for one star on Python
    floats: a change here must be made there too (a test compares the two bit for bit)."""
    sd = np.sin(dec_rad)
    cd = np.cos(dec_rad)
    mua = pma_mas * _RAD_PER_MAS
    mud = pmd_mas * _RAD_PER_MAS
    mur = mur_mas * _RAD_PER_MAS
    sx = tau * mua
    sy = tau * mud
    sz = 1.0 + tau * mur
    X = cd * sz - sd * sy
    Z = cd * sy + sd * sz
    h2 = X * X + sx * sx
    s2 = h2 + Z * Z
    H = np.sqrt(h2)
    f = 1.0 / np.sqrt(s2)
    with np.errstate(divide="ignore"):
        hinv = 1.0 / H
    if not (H > 0.0).all():  # at a pole: no RA frame; components set to zero (flag AT_POLE)
        hinv = np.where(H > 0.0, hinv, 0.0)
    VX = cd * mur - sd * mud
    VZ = cd * mud + sd * mur
    pa = f * (X * mua - sx * VX) * hinv
    pd = f * f * (VZ * h2 - Z * (X * VX + sx * mua)) * hinv
    tpm2 = tau * (mua * mua + mud * mud)
    sv = tpm2 + sz * mur
    mur1 = f * f * sv
    return _Local(
        sd, cd, mua, mud, mur, tau, sx, sy, sz, X, Z, H, hinv, s2, f, VX, VZ, pa, pd, tpm2, sv,
        mur1,
    )  # fmt: skip


def _radial_proper_motion_mas_yr(parallax_mas, radial_velocity_km_s):
    """mu_r = v_r * parallax / A where both are known and the parallax positive, else 0."""
    plx = np.asarray(parallax_mas, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    usable = (plx > 0) & np.isfinite(rv)
    return np.where(usable, rv * plx * (1.0 / AU_PER_JULIAN_YEAR_KM_S), 0.0), usable


def _wrap_360(angle_deg):
    """Angle in degrees reduced to [0, 360) (as np.mod, at a third of its cost)."""
    out = angle_deg - 360.0 * np.floor(angle_deg * (1.0 / 360.0))
    return np.where(out >= 360.0, out - 360.0, out)  # -1e-17 -> 360 - 1e-17 rounds to 360


def _standard_outputs(ra_deg, dec_deg, plx, pma, pmd, rv, tau):
    """Standard model for broadcast-compatible arrays.

    Returns (Astrometry, flags, _Local, usable, g): ``usable`` marks stars whose radial
    proper motion is used; ``g`` (km/s) is v_r1 / f there (Note 4 of propagate_standard).
    :func:`_standard_one` is the same for one star on Python floats (change both).
    """
    flags = input_flags(plx, pma, pmd, rv)
    mur_mas, usable = _radial_proper_motion_mas_yr(plx, rv)
    loc = _advance_local(dec_deg * RAD_PER_DEG, pma, pmd, mur_mas, tau)
    # numpy's arctan2, not the cheaper forms of core.angles: those differ from it in the last
    # bits and are taken only for large arrays, so that a star's result would depend on how
    # many stars share its call, and whole-catalogue runs in chunks must equal one call bit
    # for bit (tests/test_batch.py).
    ra1 = _wrap_360(ra_deg + np.arctan2(loc.sx, loc.X) * DEG_PER_RAD)
    dec1 = np.arctan2(loc.Z, loc.H) * DEG_PER_RAD
    plx1 = plx * loc.f
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # v_r1 = f g with g = (A/plx) tau mu^2 + v_r (1 + tau mu_r) (Note 4). The first
        # term is zero where tau mu^2 is (no motion across the sky, or the catalogue epoch
        # itself), also when A/plx overflows for a parallax below about 1e-299 mas: inf * 0
        # would make the radial velocity given unknown, without a flag.
        transverse = (AU_PER_JULIAN_YEAR_KM_S * MAS_PER_RAD) / plx * loc.tpm2
        g = np.where(loc.tpm2 == 0.0, 0.0, transverse) + rv * loc.sz
    rv1 = np.where(usable, loc.f * g, rv)
    at_pole = (loc.H * loc.f < AT_POLE_RAD) | (loc.cd < AT_POLE_RAD)  # target, catalogue
    if at_pole.any():
        flags = flags | np.where(at_pole, int(PropagationFlag.AT_POLE), 0)
    ast = Astrometry(
        ra_deg=ra1,
        dec_deg=dec1,
        parallax_mas=plx1,
        pm_ra_cosdec_mas_yr=loc.pa * MAS_PER_RAD,
        pm_dec_mas_yr=loc.pd * MAS_PER_RAD,
        radial_velocity_km_s=rv1,
    )
    return ast, flags, loc, usable, g


#: Constants of the one-star path (:func:`_standard_one`), as the array path forms them.
_INV_A = 1.0 / AU_PER_JULIAN_YEAR_KM_S
_A_MAS_PER_RAD = AU_PER_JULIAN_YEAR_KM_S * MAS_PER_RAD


def _standard_one(ra_deg, dec_deg, plx, pma, pmd, rv, tau):
    """:func:`_standard_outputs` of one star on Python floats: (ra, dec, parallax,
    pm_ra_cosdec, pm_dec, radial velocity, flags), the last an int.

    Notes
    -----
    1. The same IEEE operations in the same order as the array path, with numpy's own
       ``sin``, ``cos`` and ``arctan2`` (whose last bits may differ from the C library's), so
       each result equals the array path's bit for bit (tests/core/test_propagation.py compares
       them on random stars and on every edge the array path handles). A dozen numpy calls
       on one-element arrays cost ten times these operations: this is what a one-star
       request (a telescope before a slew) waits for.
    2. Python raises where numpy returns infinity or NaN; those cases are taken out by hand
       as numpy gives them: 1/|s| at |s| = 0 (a star through the Sun) is infinite, and the
       right ascension of a NaN or infinite input is NaN.
    """
    flags = _input_flags_one(plx, pma, pmd, rv)
    usable = plx > 0.0 and math.isfinite(rv)
    mur_mas = rv * plx * _INV_A if usable else 0.0
    dec_rad = dec_deg * RAD_PER_DEG
    if math.isfinite(dec_rad):
        sd = float(np.sin(dec_rad))
        cd = float(np.cos(dec_rad))
    else:  # numpy's NaN, without its warning (this path runs outside np.errstate)
        sd = cd = math.nan
    mua = pma * _RAD_PER_MAS
    mud = pmd * _RAD_PER_MAS
    mur = mur_mas * _RAD_PER_MAS
    sx = tau * mua
    sy = tau * mud
    sz = 1.0 + tau * mur
    X = cd * sz - sd * sy
    Z = cd * sy + sd * sz
    h2 = X * X + sx * sx
    s2 = h2 + Z * Z
    H = math.sqrt(h2)
    norm = math.sqrt(s2)
    f = 1.0 / norm if norm != 0.0 else math.inf
    hinv = 1.0 / H if H > 0.0 else 0.0  # at a pole (flag AT_POLE), as _advance_local
    VX = cd * mur - sd * mud
    VZ = cd * mud + sd * mur
    pa = f * (X * mua - sx * VX) * hinv
    pd = f * f * (VZ * h2 - Z * (X * VX + sx * mua)) * hinv
    tpm2 = tau * (mua * mua + mud * mud)
    ra = ra_deg + float(np.arctan2(sx, X)) * DEG_PER_RAD
    if math.isfinite(ra):  # as _wrap_360 (where NaN and infinity give NaN)
        ra1 = ra - 360.0 * math.floor(ra * (1.0 / 360.0))
        if ra1 >= 360.0:
            ra1 -= 360.0
    else:
        ra1 = math.nan
    dec1 = float(np.arctan2(Z, H)) * DEG_PER_RAD
    if usable:  # v_r1 = f g (Note 4 of propagate_standard); the parallax is positive here
        transverse = 0.0 if tpm2 == 0.0 else _A_MAS_PER_RAD / plx * tpm2
        rv1 = f * (transverse + rv * sz)
    else:
        rv1 = rv
    if H * f < AT_POLE_RAD or cd < AT_POLE_RAD:
        flags |= int(PropagationFlag.AT_POLE)
    return ra1, dec1, plx * f, pa * MAS_PER_RAD, pd * MAS_PER_RAD, rv1, flags


def propagate_standard(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
) -> tuple[Astrometry, np.ndarray]:
    """Propagate the six astrometric parameters with the Hipparcos straight-line model.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        ICRS position at the catalogue epoch, degrees (Note 1).
    parallax_mas : array_like
        Parallax, mas; NaN if unknown (Note 2).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : array_like
        Proper motion, mas/yr; the RA component includes cos(dec) (Note 1).
    radial_velocity_km_s : array_like
        Radial velocity, km/s; NaN if unknown (Note 2).
    epoch_from_jyear, epoch_to_jyear : array_like
        Catalogue and target epochs, Julian epochs (TDB), years.

    Returns
    -------
    astrometry : Astrometry
        The parameters at the target epoch(s).
    flags : ndarray of int64
        :class:`PropagationFlag` bits.

    Notes
    -----
    1. Units are those of the module docstring; the RA proper motion is
       mu_alpha* = dRA/dt * cos(dec), not dRA/dt.
    2. The radial proper motion mu_r = v_r * parallax / A is used only where both the
       parallax (> 0) and the radial velocity are known; otherwise it is zero and the
       star's flags say so. The parallax out is NaN where the parallax in is NaN; the
       radial velocity out is NaN where unknown, and unchanged where known but the parallax
       is not usable (flag RADIAL_VELOCITY_UNCHANGED).
    3. With s = r0 + v tau (position in units of the initial distance, v = r0 mu_r + mu0,
       tau the epoch difference), f = 1/|s|, the model is u = f s, parallax = parallax0 f,
       mu = f (v - u (u.v)), mu_r = f (u.v): ESA 1997 Vol. 1 eqs. 1.5.12-1.5.19 written in
       vector form.
    4. The vectors are taken on the normal triad (p0, q0, r0) of the catalogue position
       (as in ESA 1997 Vol. 1 section 1.5.5), where r0 = (0, 0, 1), v = (mu_a*, mu_d, mu_r) and
       s = (tau mu_a*, tau mu_d, 1 + tau mu_r); the celestial pole is (0, cos d0, sin d0).
       On the rotated basis (cos a0, sin a0, 0), p0, pole the position is
       (X, tau mu_a*, Z) with X = cos d0 s_r - sin d0 s_q and Z = cos d0 s_q + sin d0 s_r,
       so alpha = alpha0 + atan2(tau mu_a*, X) and delta = atan2(Z, hypot(X, tau mu_a*)):
       only the declination needs a sine and cosine. The radial velocity out is
       v_r f (1 + tau mu_r) + f (A / parallax0) tau (mu_a*^2 + mu_d^2), free of the
       cancellation of mu_r / parallax for small parallaxes.
    """
    args = [
        np.asarray(x, dtype=float)
        for x in (
            ra_deg,
            dec_deg,
            parallax_mas,
            pm_ra_cosdec_mas_yr,
            pm_dec_mas_yr,
            radial_velocity_km_s,
        )
    ]
    tau = np.asarray(epoch_to_jyear, dtype=float) - np.asarray(epoch_from_jyear, dtype=float)
    *args, tau = np.broadcast_arrays(*args, tau)
    with np.errstate(divide="ignore", invalid="ignore"):
        ast, flags, _, _, _ = _standard_outputs(*args, tau)
    return ast, flags


#: Positions (i, j) of the entries of the standard model's Jacobian that are not zero by
#: construction (standard_jacobian, Note 3); all others are exactly zero.
JACOBIAN_NONZERO = (
    ((0, 0), (0, 1), (0, 2), (0, 3), (0, 4), (0, 5))
    + ((1, 1), (1, 2), (1, 3), (1, 4), (1, 5))
    + ((2, 2), (2, 3), (2, 4), (2, 5))
    + ((3, 1), (3, 2), (3, 3), (3, 4), (3, 5))
    + ((4, 1), (4, 2), (4, 3), (4, 4), (4, 5))
    + ((5, 2), (5, 3), (5, 4), (5, 5))
)


def _jacobian_entries(loc: _Local, plx_mas, rv, usable, g, out):
    """Write the nonzero entries of the standard model's Jacobian into ``out[i, j]``.

    ``out`` has shape (6, 6) + the stars' shape, entry-major; the entries listed in
    JACOBIAN_NONZERO are written (units of :func:`standard_jacobian`), the others are left
    as they are (the caller keeps them zero). Rows/columns of unknown parameters are not
    masked here.
    """
    f, hinv, tau, Z = loc.f, loc.hinv, loc.tau, loc.Z
    sd, cd, sx, sy, sz, s2 = loc.sd, loc.cd, loc.sx, loc.sy, loc.sz, loc.s2
    pa, pd, mur, mur1 = loc.pa, loc.pd, loc.mur, loc.mur1
    fh = f * hinv
    ffh = f * fh
    t1 = Z * hinv  # tan(dec1)
    kp = pd * t1 - mur1  # coefficient of d alpha1* in d mu_a*1
    kd = pa * t1  # coefficient of d alpha1* in d mu_d1 (with minus sign)
    mfft = -f * f * tau  # (df/f) per unit of s.e / tau
    # Column 0 (alpha*): a rotation about the pole; only alpha* changes (Note 3).
    out[0, 0, ...] = f / (cd * hinv)
    # Column 1 (delta): ds = (0, sz, -sy), dv = (0, mu_r, -mu_d), s.ds = 0.
    j01 = fh * sx * Z
    out[0, 1, ...] = j01
    j11 = loc.X * hinv
    out[1, 1, ...] = j11
    out[3, 1, ...] = fh * sx * loc.VZ + kp * j01
    out[4, 1, ...] = ffh * (s2 * loc.VX - Z * (sy * mur - sz * loc.mud)) - kd * j01 - mur1 * j11
    # Responses to a unit change of the velocity along e = p0, q0, r0 (ds = tau e), from
    # f p1.e, f q1.e and s.e. Those along p0, q0 are columns 3, 4 (mu_a*, mu_d) and are
    # written in place; the one along r0 is scaled into columns 2 and 5 below.
    z_resp = [np.empty_like(f) for _ in range(4)]
    col3, col4 = ([out[i, col, ...] for i in (0, 1, 3, 4)] for col in (3, 4))
    dffs = []
    for dst, pe, qe, se in (
        (col3, loc.X, -Z * sx, sx),
        (col4, sd * sx, s2 * cd - Z * sy, sy),
        (z_resp, -cd * sx, s2 * sd - Z * sz, sz),
    ):
        a = fh * pe
        b = ffh * qe
        dff = mfft * se  # df/f
        j0 = np.multiply(tau, a, out=dst[0])
        j1 = np.multiply(tau, b, out=dst[1])
        j3 = np.multiply(dff, pa, out=dst[2])
        j3 += a
        j3 += kp * j0
        j4 = np.multiply(dff, pd, out=dst[3])
        j4 += b
        j4 -= kd * j0
        j4 -= mur1 * j1
        dffs.append(dff)
    plx_f = plx_mas * _RAD_PER_MAS * f  # parallax in rad, as the motions
    # Usable radial proper motion: A/plx and g are finite; elsewhere row 5 is the identity.
    f_row5 = np.where(usable, f * _RAD_PER_MAS, 0.0)  # row 5 per mas instead of per rad
    a_over_plx = np.where(usable, AU_PER_JULIAN_YEAR_KM_S * MAS_PER_RAD / plx_mas, 0.0)
    g = np.where(usable, g, 0.0)
    two_a_tau = 2.0 * a_over_plx * tau
    # Columns 3, 4, rows 2 and 5: dg = 2 (A/plx) tau mu.
    for col, dff, mu in ((3, dffs[0], loc.mua), (4, dffs[1], loc.mud)):
        np.multiply(plx_f, dff, out=out[2, col, ...])
        np.multiply(f_row5, dff * g + two_a_tau * mu, out=out[5, col, ...])
    # Columns 2, 5 (parallax, v_r): dv = e_z d mu_r, d mu_r = (v_r/A) d plx + (plx/A) d v_r
    # (column 5 in mas per km/s: plx in mas).
    dff = dffs[2]
    c_plx = np.where(usable, rv * (1.0 / AU_PER_JULIAN_YEAR_KM_S), 0.0)
    c_rv = np.where(usable, plx_mas * (1.0 / AU_PER_JULIAN_YEAR_KM_S), 0.0)
    for col, c in ((2, c_plx), (5, c_rv)):
        for row, resp in zip((0, 1, 3, 4), z_resp, strict=True):
            np.multiply(resp, c, out=out[row, col, ...])
    plx_f_dff = plx_f * dff
    np.add(f, plx_f_dff * c_plx, out=out[2, 2, ...])
    np.multiply(plx_f_dff, c_rv, out=out[2, 5, ...])
    # dg/dplx = v_r tau v_r/A - (A/plx^2) tau mu^2, with A/plx^2 = (A/plx)^2 / A (finite,
    # zero, where the parallax is not usable).
    dg_plx = rv * tau * c_plx - a_over_plx * a_over_plx * (1.0 / AU_PER_JULIAN_YEAR_KM_S) * loc.tpm2
    np.multiply(f_row5, dff * c_plx * g + dg_plx, out=out[5, 2, ...])
    out[5, 5, ...] = np.where(
        usable, f * (dff * (c_rv * _RAD_PER_MAS) * g + 1.0 + 2.0 * tau * mur), 1.0
    )


#: Order of parameters in Jacobians and covariances (units mas, mas, mas, mas/yr, mas/yr,
#: km/s); documentation only.
COVARIANCE_ORDER = (
    "ra_cosdec_mas",
    "dec_mas",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)


def standard_jacobian(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
):
    """Analytic Jacobian of the standard model, d(params at target)/d(params at catalogue).

    Parameters
    ----------
    (as :func:`propagate_standard`)

    Returns
    -------
    ndarray, shape (..., 6, 6)
        J[i, j] = d out_i / d in_j with the parameter order
        (ra*cos(dec) [mas], dec [mas], parallax [mas], pm_ra_cosdec [mas/yr],
        pm_dec [mas/yr], radial velocity [km/s]) on both sides (Note 1).

    Notes
    -----
    1. Position offsets are local tangent-plane offsets (Delta alpha* = Delta alpha cos dec),
       the convention of the Hipparcos and Gaia catalogues.
    2. The derivatives are those of the vector form of the model (Note 3 of
       :func:`propagate_standard`) taken on the local triad (p0, q0, r0) of the catalogue
       position, using dp/dalpha* = -r + q tan(dec), dq/dalpha* = -p tan(dec),
       dr/dalpha* = p, dq/ddec = -r, dr/ddec = q, and the same relations at the target
       for (p1, q1): d mu_a*1 = f p1.dv + (df/f) mu_a*1 + (mu_d1 tan(dec1) - mu_r1) d alpha1*,
       d mu_d1 = f q1.dv + (df/f) mu_d1 - mu_a*1 tan(dec1) d alpha1* - mu_r1 d delta1,
       with d alpha1* = f p1.ds, d delta1 = f q1.ds and df = -f^3 s.ds. They are equivalent
       to the element-by-element expressions of ESA 1997 Vol. 1 section 1.5.5 (Table 1.5.3
       and eqs. 1.5.20-1.5.21) and are tested against finite differences.
    3. Known zeros are used, not computed: a change of alpha0 rotates the whole motion about
       the pole, so column 0 is (cos dec1 / cos dec0, 0, 0, 0, 0, 0); a change of position
       leaves |s| unchanged (s.ds = 0), so the parallax and radial-velocity rows do not
       depend on position; d delta1/d alpha0* = 0.
    4. Where the radial velocity is unknown (or the parallax not positive) the radial
       proper motion is held at zero and has no variance; the radial-velocity row and column
       are then NaN (unknown) or the identity (passed through unchanged, flag
       RADIAL_VELOCITY_UNCHANGED). Where the parallax is unknown its row and column are NaN.
    """
    args = [
        np.asarray(x, dtype=float)
        for x in (
            ra_deg,
            dec_deg,
            parallax_mas,
            pm_ra_cosdec_mas_yr,
            pm_dec_mas_yr,
            radial_velocity_km_s,
        )
    ]
    tau = np.asarray(epoch_to_jyear, dtype=float) - np.asarray(epoch_from_jyear, dtype=float)
    shape = _broadcast_shape(*args, tau)
    ra, dec, plx, pma, pmd, rv = (np.broadcast_to(x, shape) for x in args)
    tau = np.broadcast_to(tau, shape)
    entry_major = np.zeros((6, 6) + shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        _, _, loc, usable, g = _standard_outputs(ra, dec, plx, pma, pmd, rv, tau)
        _jacobian_entries(loc, plx, rv, usable, g, entry_major)
    jac = np.moveaxis(entry_major, (0, 1), (-2, -1)).copy()
    rv_unknown = np.isnan(rv)
    plx_unknown = np.isnan(plx)
    if rv_unknown.any():
        jac[..., 5, :] = np.where(rv_unknown[..., None], np.nan, jac[..., 5, :])
        jac[..., :, 5] = np.where(rv_unknown[..., None], np.nan, jac[..., :, 5])
    if plx_unknown.any():
        jac[..., 2, :] = np.where(plx_unknown[..., None], np.nan, jac[..., 2, :])
        jac[..., :, 2] = np.where(plx_unknown[..., None], np.nan, jac[..., :, 2])
    return jac


def propagate_covariance(jacobian, covariance):
    """Carry a covariance through a Jacobian: C' = J C J^T, ignoring unknown parameters.

    Parameters
    ----------
    jacobian : ndarray, shape (..., 6, 6)
        From :func:`standard_jacobian` (NaN row and column 5 where the radial velocity is
        unknown, NaN row and column 2 where the parallax is unknown).
    covariance : ndarray, shape (..., 6, 6)
        Covariance at the catalogue epoch in the same parameter order and units
        (NaN row and column 5 where the radial velocity is unknown).

    Returns
    -------
    ndarray, shape (..., 6, 6)
        Covariance at the target epoch, exactly symmetric; row and column 5 (2) are NaN
        where the radial velocity (parallax) is unknown (Note 1).

    Notes
    -----
    1. Unknown parameters contribute nothing (their NaN entries count as zero), so the
       remaining block is the propagation of the known parameters alone (the 5x5 result
       when the radial velocity is unknown).
    """
    jac = np.asarray(jacobian, dtype=float)
    cov = np.asarray(covariance, dtype=float)
    rv_unknown = np.isnan(jac[..., 5, 5]) | np.isnan(cov[..., 5, 5])
    plx_unknown = np.isnan(jac[..., 2, 2]) | np.isnan(cov[..., 2, 2])
    j0 = np.where(np.isnan(jac), 0.0, jac)
    c0 = np.where(np.isnan(cov), 0.0, cov)
    out = j0 @ c0 @ np.swapaxes(j0, -1, -2)
    out = 0.5 * (out + np.swapaxes(out, -1, -2))
    for k, unknown in ((5, rv_unknown), (2, plx_unknown)):
        mask = unknown[..., None]
        out[..., k, :] = np.where(mask, np.nan, out[..., k, :])
        out[..., :, k] = np.where(mask, np.nan, out[..., :, k])
    return out


def _covariance_block(entry_major, cov_block, plx_unknown, rv_unknown, bufs, out):
    """out = J C J^T for one block of B stars, exactly symmetric.

    ``entry_major`` is the Jacobian as a (6, 6, B) array (from :func:`_jacobian_entries`,
    zero outside JACOBIAN_NONZERO); ``bufs`` holds three (>= 36 B,) work arrays and one of
    (>= 12 B,).

    Element by element over the B stars, on entry-major (6, 6, B) arrays: T = J C over the
    Jacobian's 29 nonzero entries, then the upper triangle of T J^T, mirrored. A batched
    6x6 matmul does the zeros' work too and costs some 60 % more here; each entry is summed
    in a fixed order, so the result does not depend on B. Each numpy call works on several
    entries at once (rows of J with the same nonzero columns, and a column of the upper
    triangle), so one star takes some 100 calls rather than 250; every entry still gets
    the same products, added in the same order.
    """
    b = cov_block.shape[0]
    c_em, t, c_out = (x[: 36 * b].reshape(6, 6, b) for x in bufs[:3])
    nan_in = np.isnan(cov_block)
    if nan_in.any():  # unknown entries count as zero (Note 3 of propagate)
        cov_block = np.where(nan_in, 0.0, cov_block)
    np.copyto(c_em, cov_block.transpose(1, 2, 0))
    jac = entry_major
    for lo, hi, js in _JACOBIAN_ROW_GROUPS:  # T[i, :] = sum_j J[i, j] C[j, :]
        rows = t[lo:hi]
        scratch = bufs[3][: (hi - lo) * 6 * b].reshape(hi - lo, 6, b)
        np.multiply(jac[lo:hi, js[0], None], c_em[js[0]], out=rows)
        for j in js[1:]:
            rows += np.multiply(jac[lo:hi, j, None], c_em[j], out=scratch)
    for k, ks in enumerate(_JACOBIAN_ROWS):  # C'[i, k] = sum_m T[i, m] J[k, m], i <= k
        o = c_out[: k + 1, k]
        scratch = bufs[3][: (k + 1) * b].reshape(k + 1, b)
        np.multiply(t[: k + 1, ks[0]], jac[k, ks[0]], out=o)
        for m in ks[1:]:
            o += np.multiply(t[: k + 1, m], jac[k, m], out=scratch)
        np.copyto(c_out[k, :k], c_out[:k, k])  # exactly symmetric
    np.copyto(out, c_out.transpose(2, 0, 1))
    for k, unknown in ((5, rv_unknown), (2, plx_unknown)):
        if unknown.any():
            out[unknown, k, :] = np.nan
            out[unknown, :, k] = np.nan


#: For each row of the standard model's Jacobian, the columns of its nonzero entries.
_JACOBIAN_ROWS = tuple(tuple(j for (i, j) in JACOBIAN_NONZERO if i == r) for r in range(6))


def _row_groups(rows):
    """Runs of neighbouring rows with the same columns: (first row, last row + 1, columns)."""
    groups = []
    for r, cols in enumerate(rows):
        if groups and groups[-1][2] == cols:
            groups[-1] = (groups[-1][0], r + 1, cols)
        else:
            groups.append((r, r + 1, cols))
    return tuple(groups)


#: The Jacobian's rows in runs that have the same nonzero columns (:func:`_covariance_block`).
_JACOBIAN_ROW_GROUPS = _row_groups(_JACOBIAN_ROWS)


def propagate_light_time(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
) -> tuple[Astrometry, np.ndarray]:
    """Propagate with the light-time correction of SOFA/ERFA pmsafe (through pyerfa).

    Parameters
    ----------
    (as :func:`propagate_standard`)

    Returns
    -------
    astrometry : Astrometry
    flags : ndarray of int64

    Notes
    -----
    1. pmsafe takes dRA/dt (not times cos dec) in rad/yr, parallax in arcsec, and the
       epochs as two-part TDB Julian dates; the conversions are done here.
    2. A missing or non-positive parallax, or a missing radial velocity, is passed to pmsafe
       as zero (its documented convention: the distance is then replaced by a minimum value,
       flag DISTANCE_REPLACED); the parallax and radial velocity out are reported as unknown
       where they were unknown in. A radial velocity without a usable parallax is passed as
       zero too: at the replaced distance it would move the star by a made-up amount
       (arcseconds in thousands of years); it is returned unchanged (flag
       RADIAL_VELOCITY_UNCHANGED), as in the standard model.
    3. pmsafe status bits map to flags: 1 -> DISTANCE_REPLACED, 2 ->
       SPACE_VELOCITY_IMPLAUSIBLE, 4 -> NOT_CONVERGED. AT_POLE is set where the position
       in or out is within AT_POLE_RAD of a pole, as in the standard model.
    """
    ra = np.asarray(ra_deg, dtype=float) * RAD_PER_DEG
    dec = np.asarray(dec_deg, dtype=float) * RAD_PER_DEG
    plx = np.asarray(parallax_mas, dtype=float)
    pma = np.asarray(pm_ra_cosdec_mas_yr, dtype=float)
    pmd = np.asarray(pm_dec_mas_yr, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    flags = input_flags(plx, pma, pmd, rv)
    with np.errstate(invalid="ignore", divide="ignore"):
        plx_ok = plx > 0
        pmr = pma / MAS_PER_RAD / np.cos(dec)
    px_arcsec = np.where(plx_ok, plx / 1000.0, 0.0)
    rv_in = np.where(np.isfinite(rv) & plx_ok, rv, 0.0)  # Note 2
    e1a, e1b = julian_epoch_to_jd(epoch_from_jyear)
    e2a, e2b = julian_epoch_to_jd(epoch_to_jyear)
    # The ufunc form returns pmsafe's status per element (the wrapper turns it into a
    # warning); the status is decoded into flags below.
    ra2, dec2, pmr2, pmd2, px2, rv2, status = erfa_ufunc.pmsafe(
        ra, dec, pmr, pmd / MAS_PER_RAD, px_arcsec, rv_in, e1a, e1b, e2a, e2b
    )
    status = np.asarray(status, dtype=np.int64)
    flags = flags | np.where(status & 1, int(PropagationFlag.DISTANCE_REPLACED), 0)
    flags = flags | np.where(status & 2, int(PropagationFlag.SPACE_VELOCITY_IMPLAUSIBLE), 0)
    flags = flags | np.where(status & 4, int(PropagationFlag.NOT_CONVERGED), 0)
    # At a pole as the standard model judges it (cos(dec) = |s| cos(dec1) / |s| there).
    at_pole = (np.cos(dec2) < AT_POLE_RAD) | (np.cos(dec) < AT_POLE_RAD)
    flags = flags | np.where(at_pole, int(PropagationFlag.AT_POLE), 0)
    ast = Astrometry(
        ra_deg=np.mod(np.degrees(ra2), 360.0),
        dec_deg=np.degrees(dec2),
        parallax_mas=np.where(np.isnan(plx), np.nan, np.where(plx_ok, px2 * 1000.0, plx)),
        pm_ra_cosdec_mas_yr=pmr2 * np.cos(dec2) * MAS_PER_RAD,
        pm_dec_mas_yr=pmd2 * MAS_PER_RAD,
        radial_velocity_km_s=np.where(np.isfinite(rv), np.where(plx_ok, rv2, rv), np.nan),
    )
    return ast, flags


#: Number of stars processed together by :func:`propagate`. Blocks of this size keep numpy's
#: temporaries in the CPU cache; measured on a 2-core machine (CPU time per million stars,
#: 1024 to 16384 tried), 8192 is near the optimum with and without covariance, and blocks
#: of a million are several times slower per star.
BLOCK_SIZE = 8192


def propagate(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
    *,
    model: str = "standard",
    covariance=None,
    block_size: int = BLOCK_SIZE,
) -> PropagationResult:
    """Propagate astrometry (and optionally its covariance) to target epoch(s).

    Parameters
    ----------
    ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr,
    radial_velocity_km_s, epoch_from_jyear, epoch_to_jyear : array_like
        As :func:`propagate_standard`; all broadcast to one shape S.
    model : {"standard", "light_time"}
        The motion model (module docstring).
    covariance : array_like, shape S + (6, 6) or broadcastable to it, optional
        Covariance at the catalogue epoch, order and units as :func:`standard_jacobian`
        (Note 3).
    block_size : int
        Stars per block (Note 2).

    Returns
    -------
    PropagationResult
        Arrays of shape S (covariance S + (6, 6)).

    Notes
    -----
    1. The covariance is propagated with the standard model's Jacobian for both models;
       the light-time correction changes the Jacobian by terms of order v/c, v the space
       velocity. Measured against central differences of pyerfa ``pmsafe`` (space
       velocities up to 800 km/s, 10 to 1000 years), each propagated uncertainty changes by
       at most about 2 v/c relative (4.2e-3 for a nearby star at 720 km/s over 1000 years)
       and each correlation by less than 2e-3; entries that carry at least a tenth of an
       output's uncertainty change by under 2 v/c too, while entries that carry little or
       nothing (near-zero ones such as d dec/d alpha* or d parallax/d proper motion) can
       change by tens of percent of themselves, without effect on the covariance.
       Negligible for uncertainties.
    2. The work is done in blocks of ``block_size`` stars so that temporaries stay in the
       CPU cache; results do not depend on the block size. Within a block only the
       nonzero entries of the Jacobian are computed, one array per entry (Note 3 of
       :func:`standard_jacobian` lists the known zeros), and written into a reused
       (B, 6, 6) array whose zeros never change; C' = J C J^T is then two stacked 6x6
       matrix products.
    3. NaN entries of the input covariance count as zero. The result is made exactly
       symmetric (its upper triangle is mirrored); its row and column 5 are NaN where the
       radial velocity (or its variance) is unknown, and row and column 2 where the
       parallax (or its variance) is unknown.
    4. A positive parallax within a few orders of magnitude of the smallest double (for
       example 1e-300 mas) overflows the implied transverse velocity and some Jacobian terms
       to infinity (and infinity times zero to NaN in the covariance). That is allowed to
       happen silently: the star is flagged SPACE_VELOCITY_IMPLAUSIBLE, and the affected
       outputs are infinite or NaN (unknown).
    5. At a pole (flag AT_POLE) the local triad, and with it the meaning of ra*cos(dec) and
       of the proper-motion components, is fixed only by the right ascension given or
       computed: a change of position there turns it through any angle. For a star that
       moves across the sky from a catalogue position at a pole, row and column 0 (the
       error of ra*cos(dec) and its correlations) of the covariance are NaN; for a star
       that moves onto a pole at the target, rows and columns 3 and 4 (the proper motions).
       Linear propagation would give them as about 1e16 times the input errors.
    6. One star without covariance in the standard model is computed on Python floats
       (:func:`_standard_one`), with the same result bit for bit as in an array of stars.
    """
    values = (ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr,
              radial_velocity_km_s, epoch_from_jyear, epoch_to_jyear)  # fmt: skip
    if model == "standard" and covariance is None:
        one = _one_star(*values)
        if one is not None:
            return one
    return _propagate_arrays(
        *values,
        model=model,
        covariance=covariance,
        block_size=block_size,
    )


def _one_star(*values) -> PropagationResult | None:
    """The standard model for one star (Note 6 of :func:`propagate`), or None when the
    arguments are not one star: each must be a float or a float64 array of one element.
    The result has the shape they broadcast to, (1, 1) for arrays of shape (1, 1)."""
    shape = ()
    floats = []
    for v in values:
        if type(v) is np.ndarray and v.size == 1 and v.dtype == np.float64:
            if v.ndim > len(shape):
                shape = v.shape  # all ones: they broadcast to the longest
            floats.append(v.item())
        elif isinstance(v, float):  # numpy's float64 too
            floats.append(float(v))
        else:
            return None
    *star, epoch_from, epoch_to = floats
    *out, bits = _standard_one(*star, epoch_to - epoch_from)
    out = np.array(out).reshape((6,) + shape)
    return PropagationResult(Astrometry(*out), np.full(shape, bits, dtype=np.int64), None)


@overflow_to_infinity  # Note 4 of propagate
def _propagate_arrays(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    epoch_from_jyear,
    epoch_to_jyear,
    *,
    model: str,
    covariance,
    block_size: int,
) -> PropagationResult:
    """:func:`propagate` for any arrays (its parameters, results and Notes)."""
    if model not in MODELS:
        raise ValueError(f"unknown model {model!r}; choose one of {MODELS}")
    args = [
        np.asarray(x, dtype=float)
        for x in (
            ra_deg,
            dec_deg,
            parallax_mas,
            pm_ra_cosdec_mas_yr,
            pm_dec_mas_yr,
            radial_velocity_km_s,
        )
    ]
    tau = np.asarray(epoch_to_jyear, dtype=float) - np.asarray(epoch_from_jyear, dtype=float)
    shape = _broadcast_shape(*args, tau)
    flat = [_flatten(x, shape) for x in (*args, tau)]
    n = flat[0].shape[0]
    cov_flat = None
    if covariance is not None:
        cov_flat = np.broadcast_to(np.asarray(covariance, dtype=float), shape + (6, 6))
        cov_flat = cov_flat.reshape(-1, 6, 6)
    if model == "light_time":
        e_from, e_to = (
            _flatten(np.asarray(e, dtype=float), shape) for e in (epoch_from_jyear, epoch_to_jyear)
        )
    if model == "standard" and cov_flat is None and 0 < n <= max(int(block_size), 1):
        # One block, no covariance: the outputs are new arrays already (no copies needed).
        # (Division by zero and NaN results are already silent here: Note 4.)
        ast, fl, _, _, _ = _standard_outputs(*flat)
        return PropagationResult(
            Astrometry(*(o.reshape(shape) for o in _fields(ast))), fl.reshape(shape), None
        )
    outs = [np.empty(n) for _ in range(6)]
    flags = np.empty(n, dtype=np.int64)
    cov_out = None
    if cov_flat is not None:
        cov_out = np.empty((n, 6, 6))
        bmax = min(n, max(int(block_size), 1))
        bufs = (np.empty(36 * bmax), np.empty(36 * bmax), np.empty(36 * bmax), np.empty(12 * bmax))
        entry_major = np.zeros((6, 6, bmax))
    step = max(int(block_size), 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        for start in range(0, n, step):
            sl = slice(start, start + step)
            ra, dec, plx, pma, pmd, rv, tau_b = (x[sl] for x in flat)
            if model == "standard" or cov_out is not None:
                ast, fl, loc, usable, g = _standard_outputs(ra, dec, plx, pma, pmd, rv, tau_b)
            if model == "light_time":
                ast, fl = propagate_light_time(ra, dec, plx, pma, pmd, rv, e_from[sl], e_to[sl])
            for dst, src in zip(outs, _fields(ast), strict=True):
                dst[sl] = src
            flags[sl] = fl
            if cov_out is not None:
                em = entry_major[:, :, : plx.shape[0]]
                _jacobian_entries(loc, plx, rv, usable, g, em)
                cb = cov_flat[sl]
                rv_unknown = np.isnan(rv) | np.isnan(cb[:, 5, 5])
                plx_unknown = np.isnan(plx) | np.isnan(cb[:, 2, 2])
                _covariance_block(em, cb, plx_unknown, rv_unknown, bufs, cov_out[sl])
                _null_at_pole(loc, cov_out[sl])
                # The standard model's parallax: the Jacobian's (Note 1 holds for both).
                nonlinear = _nonlinear(em, cb, plx, plx * loc.f, cov_out[sl])
                flags[sl] |= np.where(nonlinear, int(PropagationFlag.UNCERTAINTIES_NONLINEAR), 0)
    ast = Astrometry(*(o.reshape(shape) for o in outs))
    if cov_out is not None:
        cov_out = cov_out.reshape(shape + (6, 6))
    return PropagationResult(ast, flags.reshape(shape), cov_out)


def _null_at_pole(loc: _Local, cov_out):
    """Blank (NaN) the covariance rows and columns that a pole leaves without meaning (Note 5
    of propagate).

    A star that moves across the sky from a catalogue position at a pole: the right
    ascension row and column (the model's response to a change of ra*cos(dec) is a rotation
    about the pole by that change over cos(dec0), about 1e16 times the change). A star that
    moves onto a pole at the target: the proper-motion rows and columns (their response to
    a change of position carries tan(dec1), as large). A star that does not move keeps its
    covariance (the catalogue epoch itself: the values given).
    """
    moved = (loc.sx != 0.0) | (loc.sy != 0.0)
    rows = []
    ra_void = moved & (loc.cd < AT_POLE_RAD)
    if ra_void.any():
        rows.append((ra_void, (0,)))
    pm_void = moved & (loc.H * loc.f < AT_POLE_RAD)
    if pm_void.any():
        rows.append((pm_void, (3, 4)))
    for void, ks in rows:
        void = np.broadcast_to(void, cov_out.shape[:1])
        for k in ks:
            cov_out[void, k, :] = np.nan
            cov_out[void, :, k] = np.nan


def _nonlinear(entry_major, cov_block, plx0, plx1, cov_out):
    """Where linear propagation of the covariance fails (flag UNCERTAINTIES_NONLINEAR).

    Notes
    -----
    1. With s the position vector in units of the catalogue distance (Note 3 of
       :func:`propagate_standard`), the model is linear in s, and its Jacobian is a valid
       description of the spread only while the error of s is small against |s|. Across the
       line of sight that ratio is the position error in radians; along it, the relative
       error of |s| = 1/f, from d ln f = d plx1 / plx1 - d plx0 / plx0 (plx1 = plx0 f), so
       var(ln f) = g C g^T with g_j = J[2, j] / plx1 - delta_2j / plx0. Without a positive
       parallax, |s| follows from the proper motion alone and only the position error is
       used.
    2. Either ratio above NONLINEAR_RELATIVE_ERROR flags the star at that epoch.
    """
    b = cov_block.shape[0]
    # mas^2; an unknown variance (NaN: at a pole, Note 5 of propagate) counts as zero
    var_pos = _nan_as_zero(cov_out[:, 0, 0]) + _nan_as_zero(cov_out[:, 1, 1])
    nonlinear = var_pos > (NONLINEAR_RELATIVE_ERROR * MAS_PER_RAD) ** 2
    usable = (plx0 > 0.0) & np.isfinite(plx1) & (plx1 > 0.0)
    if usable.any():
        with np.errstate(divide="ignore", invalid="ignore"):
            g = entry_major[2, 2:, :b] / plx1  # (4, b): parallax, proper motions, v_r
            g[0] -= 1.0 / plx0
        g = np.where(usable & np.isfinite(g), g, 0.0)
        # g C g^T over the symmetric 4x4 block, element by element on (b,) rows: some
        # three times quicker than an einsum over (b, 4, 4) (NaN: an unknown term, 0).
        c = cov_block[:, 2:, 2:].transpose(1, 2, 0)
        var_lnf = np.zeros(b)
        for i in range(4):
            row = _nan_as_zero(c[i, i]) * g[i]
            for j in range(i + 1, 4):
                row += 2.0 * _nan_as_zero(c[i, j]) * g[j]
            var_lnf += row * g[i]
        nonlinear |= var_lnf > NONLINEAR_RELATIVE_ERROR**2
    return nonlinear


def _nan_as_zero(x):
    return np.where(np.isnan(x), 0.0, x)


def _broadcast_shape(*arrays) -> tuple:
    """The shape the arrays broadcast to; when they all have one shape (the common case,
    one star included) it is taken as it is, without numpy's broadcasting machinery."""
    shapes = {a.shape for a in arrays}
    return shapes.pop() if len(shapes) == 1 else np.broadcast_shapes(*shapes)


def _flatten(x, shape):
    """``x`` broadcast to ``shape`` and raveled (a view where possible)."""
    if x.shape == shape:
        return x.reshape(-1)
    return np.broadcast_to(x, shape).reshape(-1)


def _fields(ast: Astrometry):
    return (
        ast.ra_deg,
        ast.dec_deg,
        ast.parallax_mas,
        ast.pm_ra_cosdec_mas_yr,
        ast.pm_dec_mas_yr,
        ast.radial_velocity_km_s,
    )
