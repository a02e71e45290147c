"""Propagation of stellar astrometry and its covariance between epochs.

Two models are offered:

``standard``
    Straight-line motion at constant barycentric velocity in the rigorous formulation of the
    Hipparcos Catalogue (ESA 1997, Vol. 1, section 1.5.5): scaled quantities, with the radial
    proper motion ``mu_r = v_r * parallax / A`` (A = 1 au per Julian year in km/s), which
    stays finite when the parallax is zero. All six parameters are propagated, perspective
    acceleration included. Epochs are barycentric coordinate times (TDB Julian epochs); no
    light-time correction (as in the catalogue's own definition of astrometric parameters).
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
import functools
from dataclasses import dataclass

import numpy as np
from erfa import ufunc as erfa_ufunc

from .constants import (
    AU_PER_JULIAN_YEAR_KM_S,
    C_KM_S,
    IMPLAUSIBLE_PROPER_MOTION_MAS_YR,
    MAS_PER_RAD,
    RAD_PER_DEG,
)
from .epochs import julian_epoch_to_jd

#: The models offered; the first is the default.
MODELS = ("standard", "light_time")

#: Space velocity above which an input is implausible: half the speed of light, the
#: threshold SOFA/ERFA starpm uses to cap the speed ("excessive speed", status 2), km/s.
IMPLAUSIBLE_SPACE_VELOCITY_KM_S = 0.5 * C_KM_S


class PropagationFlag(enum.IntFlag):
    """Per-star report of what was assumed, replaced or found implausible."""

    #: Parallax not given: distance unknown, so the radial velocity cannot act (radial
    #: proper motion taken as zero, no perspective acceleration); parallax out is unknown.
    PARALLAX_MISSING = 1
    #: Parallax zero or negative: no physical distance, radial proper motion taken as zero;
    #: the parallax out is the formal value propagated, not a distance.
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
    #: Position at a celestial pole: right ascension and its motion are undefined there.
    AT_POLE = 32
    #: Light-time model: the parallax was too small for the motion and SOFA replaced the
    #: distance by a minimum value (pmsafe status 1).
    DISTANCE_REPLACED = 64
    #: Light-time model: the light-time iteration did not converge (pmsafe status 4).
    NOT_CONVERGED = 128
    #: Radial velocity given but parallax missing or not positive: the radial velocity is
    #: passed through unchanged (no perspective change can be computed).
    RADIAL_VELOCITY_UNCHANGED = 256


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
    """
    plx = np.asarray(parallax_mas, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    pma = np.asarray(pm_ra_cosdec_mas_yr, dtype=float)
    pmd = np.asarray(pm_dec_mas_yr, dtype=float)
    shape = np.broadcast_shapes(plx.shape, rv.shape, pma.shape, pmd.shape)
    flags = np.zeros(shape, dtype=np.int64)
    plx_missing = np.isnan(plx)
    with np.errstate(invalid="ignore"):
        plx_nonpos = plx <= 0
        rv_missing = np.isnan(rv)
        pm_total = np.hypot(pma, pmd)
        flags |= np.where(plx_missing, int(PropagationFlag.PARALLAX_MISSING), 0)
        flags |= np.where(plx_nonpos, int(PropagationFlag.PARALLAX_NOT_POSITIVE), 0)
        flags |= np.where(rv_missing, int(PropagationFlag.RADIAL_VELOCITY_MISSING), 0)
        flags |= np.where(
            pm_total > IMPLAUSIBLE_PROPER_MOTION_MAS_YR,
            int(PropagationFlag.PROPER_MOTION_IMPLAUSIBLE),
            0,
        )
        flags |= np.where(
            ~rv_missing & (plx_missing | plx_nonpos),
            int(PropagationFlag.RADIAL_VELOCITY_UNCHANGED),
            0,
        )
        # Space velocity from parallax (only where a distance exists).
        good = plx > 0
        vt = np.where(good, AU_PER_JULIAN_YEAR_KM_S * pm_total / np.where(good, plx, 1.0), 0.0)
        v = np.hypot(vt, np.where(rv_missing, 0.0, rv))
        flags |= np.where(
            v > IMPLAUSIBLE_SPACE_VELOCITY_KM_S,
            int(PropagationFlag.SPACE_VELOCITY_IMPLAUSIBLE),
            0,
        )
    return flags


def _radial_proper_motion_mas_yr(parallax_mas, radial_velocity_km_s):
    """mu_r = v_r * parallax / A where both are known and the parallax positive, else 0."""
    plx = np.asarray(parallax_mas, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    with np.errstate(invalid="ignore"):
        usable = (plx > 0) & np.isfinite(rv)
    return np.where(usable, rv * plx / AU_PER_JULIAN_YEAR_KM_S, 0.0), usable


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
    """
    ra = np.asarray(ra_deg, dtype=float) * RAD_PER_DEG
    dec = np.asarray(dec_deg, dtype=float) * RAD_PER_DEG
    plx = np.asarray(parallax_mas, dtype=float)
    pma = np.asarray(pm_ra_cosdec_mas_yr, dtype=float)
    pmd = np.asarray(pm_dec_mas_yr, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    tau = np.asarray(epoch_to_jyear, dtype=float) - np.asarray(epoch_from_jyear, dtype=float)

    flags = input_flags(plx, pma, pmd, rv)
    mur_mas, usable = _radial_proper_motion_mas_yr(plx, rv)
    state = _State.from_inputs(ra, dec, pma, pmd, mur_mas)
    out = state.advance(tau)

    plx_out = plx * out.f
    with np.errstate(invalid="ignore", divide="ignore"):
        rv_moved = out.mur * MAS_PER_RAD * AU_PER_JULIAN_YEAR_KM_S / plx_out
    rv_out = np.where(usable, rv_moved, rv)
    at_pole = out.h == 0.0
    flags = flags | np.where(at_pole, int(PropagationFlag.AT_POLE), 0)
    ast = Astrometry(
        ra_deg=out.ra_deg,
        dec_deg=out.dec_deg,
        parallax_mas=plx_out,
        pm_ra_cosdec_mas_yr=out.pma * MAS_PER_RAD,
        pm_dec_mas_yr=out.pmd * MAS_PER_RAD,
        radial_velocity_km_s=rv_out,
    )
    return ast, flags


@dataclass
class _Advanced:
    """Quantities of the standard model at the target epoch (radians, rad/yr)."""

    ux: np.ndarray
    uy: np.ndarray
    uz: np.ndarray
    h: np.ndarray
    f: np.ndarray
    ur: np.ndarray
    mux: np.ndarray
    muy: np.ndarray
    muz: np.ndarray
    mur: np.ndarray
    pma: np.ndarray
    pmd: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray


@dataclass
class _State:
    """Unit vector r0 and scaled space velocity v = r0 mu_r + mu0 (rad/yr) at the start."""

    sa: np.ndarray
    ca: np.ndarray
    sd: np.ndarray
    cd: np.ndarray
    pma: np.ndarray  # rad/yr
    pmd: np.ndarray  # rad/yr
    mur: np.ndarray  # rad/yr
    vx: np.ndarray
    vy: np.ndarray
    vz: np.ndarray

    @classmethod
    def from_inputs(cls, ra_rad, dec_rad, pma_mas, pmd_mas, mur_mas):
        sa, ca = np.sin(ra_rad), np.cos(ra_rad)
        sd, cd = np.sin(dec_rad), np.cos(dec_rad)
        pma = pma_mas / MAS_PER_RAD
        pmd = pmd_mas / MAS_PER_RAD
        mur = mur_mas / MAS_PER_RAD
        # v = r0 mu_r + p mu_a* + q mu_d with p = (-sa, ca, 0), q = (-sd ca, -sd sa, cd).
        vx = cd * ca * mur - sa * pma - sd * ca * pmd
        vy = cd * sa * mur + ca * pma - sd * sa * pmd
        vz = sd * mur + cd * pmd
        return cls(sa, ca, sd, cd, pma, pmd, mur, vx, vy, vz)

    def advance(self, tau) -> _Advanced:
        sx = self.cd * self.ca + self.vx * tau
        sy = self.cd * self.sa + self.vy * tau
        sz = self.sd + self.vz * tau
        f = 1.0 / np.sqrt(sx * sx + sy * sy + sz * sz)
        ux, uy, uz = sx * f, sy * f, sz * f
        ur = ux * self.vx + uy * self.vy + uz * self.vz
        mux = f * (self.vx - ux * ur)
        muy = f * (self.vy - uy * ur)
        muz = f * (self.vz - uz * ur)
        h = np.hypot(ux, uy)
        with np.errstate(invalid="ignore", divide="ignore"):
            hinv = np.where(h > 0, 1.0 / h, 0.0)
        pma = (ux * muy - uy * mux) * hinv
        pmd = muz * h - uz * (ux * mux + uy * muy) * hinv
        ra = np.arctan2(uy, ux)
        ra_deg = np.mod(np.degrees(ra), 360.0)
        dec_deg = np.degrees(np.arctan2(uz, h))
        return _Advanced(ux, uy, uz, h, f, ur, mux, muy, muz, f * ur, pma, pmd, ra_deg, dec_deg)


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
    2. The derivatives are obtained by differentiating the vector form of the model
       (Note 3 of :func:`propagate_standard`) in forward mode, using dp/dalpha* =
       -r + q tan(dec), dq/dalpha* = -p tan(dec), dr/dalpha* = p, dq/ddec = -r, dr/ddec = q.
       They are equivalent to the element-by-element expressions of ESA 1997 Vol. 1
       section 1.5.5 (Table 1.5.3 and eqs. 1.5.20-1.5.21) and are tested against finite
       differences.
    3. Where the radial velocity is unknown (or the parallax not positive) the radial
       proper motion is held at zero and has no variance; the radial-velocity row and column
       are then NaN (unknown) or the identity (passed through unchanged, flag
       RADIAL_VELOCITY_UNCHANGED).
    """
    ra = np.asarray(ra_deg, dtype=float) * RAD_PER_DEG
    dec = np.asarray(dec_deg, dtype=float) * RAD_PER_DEG
    plx = np.asarray(parallax_mas, dtype=float)
    pma_mas = np.asarray(pm_ra_cosdec_mas_yr, dtype=float)
    pmd_mas = np.asarray(pm_dec_mas_yr, dtype=float)
    rv = np.asarray(radial_velocity_km_s, dtype=float)
    tau = np.asarray(epoch_to_jyear, dtype=float) - np.asarray(epoch_from_jyear, dtype=float)
    shape = np.broadcast_shapes(
        ra.shape, dec.shape, plx.shape, pma_mas.shape, pmd_mas.shape, rv.shape, tau.shape
    )
    ra, dec, plx, pma_mas, pmd_mas, rv, tau = (
        np.broadcast_to(x, shape)[..., None] for x in (ra, dec, plx, pma_mas, pmd_mas, rv, tau)
    )
    mur_mas, usable = _radial_proper_motion_mas_yr(plx, rv)
    st = _State.from_inputs(ra, dec, pma_mas, pmd_mas, mur_mas)
    out = st.advance(tau)
    k = 1.0 / MAS_PER_RAD  # one mas (or mas/yr) in rad (rad/yr)
    a = AU_PER_JULIAN_YEAR_KM_S
    sa, ca, sd, cd = st.sa, st.ca, st.sd, st.cd
    with np.errstate(invalid="ignore", divide="ignore"):
        td = sd / cd
    p = (-sa, ca, np.zeros_like(sa))
    q = (-sd * ca, -sd * sa, cd)
    r = (cd * ca, cd * sa, sd)
    one = np.ones(shape + (1,))
    zero = np.zeros(shape + (1,))
    # Tangent directions j = 0..5, stacked on the last axis (length 6).
    sel = [np.zeros(6) for _ in range(6)]
    for j in range(6):
        sel[j][j] = 1.0
    d_alpha = sel[0] * k
    d_delta = sel[1] * k
    d_plx0 = sel[2] * one
    d_pma = sel[3] * k
    d_pmd = sel[4] * k
    d_rv = sel[5] * one
    # d r0 = p d_alpha* + q d_delta
    dr0 = [p[i] * d_alpha + q[i] * d_delta for i in range(3)]
    # d mu0 = [tan(d)(q mu_a* - p mu_d) - r mu_a*] d_alpha* - r mu_d d_delta + p dmu_a* + q dmu_d
    coef_a = [td * (q[i] * st.pma - p[i] * st.pmd) - r[i] * st.pma for i in range(3)]
    dm = [
        coef_a[i] * d_alpha - r[i] * st.pmd * d_delta + p[i] * d_pma + q[i] * d_pmd
        for i in range(3)
    ]
    # d mu_r (rad/yr): mu_r = rv * plx / A
    dmur = np.where(usable, (rv * d_plx0 + plx * d_rv) / a * k, 0.0 * zero)
    dv = [r[i] * dmur + st.mur * dr0[i] + dm[i] for i in range(3)]
    v = (st.vx, st.vy, st.vz)
    u = (out.ux, out.uy, out.uz)
    ds = [dr0[i] + tau * dv[i] for i in range(3)]
    u_ds = u[0] * ds[0] + u[1] * ds[1] + u[2] * ds[2]
    df = -out.f * out.f * u_ds
    du = [out.f * (ds[i] - u[i] * u_ds) for i in range(3)]
    dur = sum(du[i] * v[i] + u[i] * dv[i] for i in range(3))
    mu = (out.mux, out.muy, out.muz)
    dmu = [
        df * (v[i] - u[i] * out.ur) + out.f * (dv[i] - du[i] * out.ur - u[i] * dur)
        for i in range(3)
    ]
    dmur1 = df * out.ur + out.f * dur
    plx1 = plx * out.f
    dplx1 = d_plx0 * out.f + plx * df
    # Frame at the target: p1 = (-uy, ux, 0)/h, q1 = (-uz ux/h, -uz uy/h, h).
    with np.errstate(invalid="ignore", divide="ignore"):
        hinv = 1.0 / out.h
        td1 = out.uz * hinv
    p1 = (-out.uy * hinv, out.ux * hinv, zero)
    q1 = (-out.uz * out.ux * hinv, -out.uz * out.uy * hinv, out.h)
    da1 = sum(p1[i] * du[i] for i in range(3))
    dd1 = sum(q1[i] * du[i] for i in range(3))
    pma1 = sum(p1[i] * mu[i] for i in range(3))
    pmd1 = sum(q1[i] * mu[i] for i in range(3))
    dpma1 = sum(p1[i] * dmu[i] for i in range(3)) + pmd1 * td1 * da1
    dpmd1 = sum(q1[i] * dmu[i] for i in range(3)) - pma1 * td1 * da1
    with np.errstate(invalid="ignore", divide="ignore"):
        rv1 = out.mur * MAS_PER_RAD * a / plx1
        drv1 = a / plx1 * dmur1 * MAS_PER_RAD - rv1 / plx1 * dplx1
    drv1 = np.where(usable, drv1, np.where(np.isfinite(rv), d_rv, np.nan))
    rows = [da1 / k, dd1 / k, dplx1, dpma1 / k, dpmd1 / k, drv1]
    jac = np.stack([np.broadcast_to(rw, shape + (6,)) for rw in rows], axis=-2)
    # Unknown radial velocity: its column is meaningless (no variance enters) -> NaN.
    rv_unknown = ~np.isfinite(rv[..., 0])
    jac[..., :, 5] = np.where(rv_unknown[..., None], np.nan, jac[..., :, 5])
    return jac


def propagate_covariance(jacobian, covariance):
    """Carry a covariance through a Jacobian: C' = J C J^T, ignoring unknown parameters.

    Parameters
    ----------
    jacobian : ndarray, shape (..., 6, 6)
        From :func:`standard_jacobian` (NaN column 5 where the radial velocity is unknown).
    covariance : ndarray, shape (..., 6, 6)
        Covariance at the catalogue epoch in the same parameter order and units
        (NaN row and column 5 where the radial velocity is unknown).

    Returns
    -------
    ndarray, shape (..., 6, 6)
        Covariance at the target epoch; row and column 5 are NaN where the radial velocity
        is unknown (the 5x5 block is then the 5-parameter result).
    """
    jac = np.asarray(jacobian, dtype=float)
    cov = np.asarray(covariance, dtype=float)
    rv_unknown = np.isnan(jac[..., 5, 5]) | np.isnan(cov[..., 5, 5])
    j0 = np.where(np.isnan(jac), 0.0, jac)
    c0 = np.where(np.isnan(cov), 0.0, cov)
    out = j0 @ c0 @ np.swapaxes(j0, -1, -2)
    mask = rv_unknown[..., None]
    out[..., 5, :] = np.where(mask, np.nan, out[..., 5, :])
    out[..., :, 5] = np.where(mask, np.nan, out[..., :, 5])
    return out


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
       where they were unknown in.
    3. pmsafe status bits map to flags: 1 -> DISTANCE_REPLACED, 2 ->
       SPACE_VELOCITY_IMPLAUSIBLE, 4 -> NOT_CONVERGED.
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
    rv_in = np.where(np.isfinite(rv), rv, 0.0)
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
#: temporaries in the CPU cache; measured on a 2-core machine, 8192 is near the optimum
#: (benchmarks/bench_propagation.py), and much larger blocks are 3-8x slower per star.
BLOCK_SIZE = 8192


def _overflow_to_infinity(func):
    """Run ``func`` with overflow to infinity, and inf * 0 to NaN, silent (Note 3)."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with np.errstate(over="ignore", invalid="ignore"):
            return func(*args, **kwargs)

    return wrapper


@_overflow_to_infinity
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
        Covariance at the catalogue epoch, order and units as :func:`standard_jacobian`.
    block_size : int
        Stars per block (Note 2).

    Returns
    -------
    PropagationResult
        Arrays of shape S (covariance S + (6, 6)).

    Notes
    -----
    1. The covariance is propagated with the standard model's Jacobian for both models;
       the light-time correction changes the Jacobian by terms of order v/c (below 1e-3
       relative for any star), negligible for uncertainties.
    2. The work is done in blocks of ``block_size`` stars so that temporaries stay in the
       CPU cache; results do not depend on the block size.
    3. A positive parallax within a few orders of magnitude of the smallest double (for
       example 1e-300 mas) overflows the implied transverse velocity and some Jacobian terms
       to infinity (and infinity times zero to NaN in the covariance). That is allowed to
       happen silently: the star is flagged SPACE_VELOCITY_IMPLAUSIBLE, and the affected
       outputs are infinite or NaN (unknown).
    """
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
            epoch_from_jyear,
            epoch_to_jyear,
        )
    ]
    shape = np.broadcast_shapes(*(x.shape for x in args))
    step = propagate_standard if model == "standard" else propagate_light_time
    if int(np.prod(shape)) <= block_size:  # one block: no copies needed
        ast, flags = step(*args)
        ast = Astrometry(*(np.broadcast_to(f, shape) for f in _fields(ast)))
        cov_out = None
        if covariance is not None:
            cov_out = propagate_covariance(standard_jacobian(*args), covariance)
        return PropagationResult(ast, np.broadcast_to(flags, shape), cov_out)
    flat = [np.broadcast_to(x, shape).reshape(-1) for x in args]
    n = flat[0].shape[0]
    cov_flat = None
    if covariance is not None:
        cov_flat = np.broadcast_to(np.asarray(covariance, dtype=float), shape + (6, 6))
        cov_flat = cov_flat.reshape(-1, 6, 6)
    outs = [np.empty(n) for _ in range(6)]
    flags = np.empty(n, dtype=np.int64)
    cov_out = np.empty((n, 6, 6)) if cov_flat is not None else None
    for start in range(0, n, max(int(block_size), 1)):
        sl = slice(start, start + block_size)
        part = [x[sl] for x in flat]
        ast, fl = step(*part)
        for dst, src in zip(outs, _fields(ast), strict=True):
            dst[sl] = src
        flags[sl] = fl
        if cov_out is not None:
            cov_out[sl] = propagate_covariance(standard_jacobian(*part), cov_flat[sl])
    ast = Astrometry(*(o.reshape(shape) for o in outs))
    if cov_out is not None:
        cov_out = cov_out.reshape(shape + (6, 6))
    return PropagationResult(ast, flags.reshape(shape), cov_out)


def _fields(ast: Astrometry):
    return (
        ast.ra_deg,
        ast.dec_deg,
        ast.parallax_mas,
        ast.pm_ra_cosdec_mas_yr,
        ast.pm_dec_mas_yr,
        ast.radial_velocity_km_s,
    )
