"""Velocity decomposition and stellar kinematics.

Turns astrometry (position, parallax or distance, proper motion) and radial velocity into
velocities with uncertainties:

* :func:`space_velocity` -- transverse velocity and its equatorial components, radial and
  total space velocity, position angle of the proper motion, angle between the space velocity
  and the line of sight, heliocentric (optionally LSR) galactic U, V, W with their
  covariance, perspective acceleration and closest approach to the Sun;
* :func:`observables_from_velocity` -- the inverse: the proper motion and radial velocity a
  star at a given place and distance must show for given U, V, W;
* :func:`astrometric_covariance` -- a 5x5 astrometric covariance from catalogue errors and
  correlation coefficients;
* :data:`ICRS_TO_GALACTIC_HIPPARCOS` -- the ICRS to galactic rotation matrix of the Hipparcos
  Catalogue, built from its three defining angles.

Vectorisation rule (the whole core): inputs broadcast against each other, vector axes are
last, a scalar star gives scalar-shaped results.

Conventions
-----------
U points towards the Galactic centre (l = 0, b = 0), V in the direction of Galactic rotation
(l = 90 deg, b = 0), W towards the north Galactic pole (b = +90 deg): a right-handed triad.
U, V, W are heliocentric (velocity relative to the Sun) unless relative to the local standard
of rest (LSR) is asked for; then the Sun's motion relative to the LSR is added.

Agreement with other implementations
------------------------------------
The galactic axes are those of the Hipparcos Catalogue; ERFA ``icrs2g`` uses the same
definition (agreement 3e-16). astropy's ``Galactic`` frame is defined from the FK4 B1950
pole through FK5 and differs from it by a rotation of about 1.2e-7 rad (matrix elements
differ by up to 9.7e-8, about 20 mas): U, V, W agree with astropy to about 1.2e-7 of the
speed (4e-4 km/s at 3000 km/s), far below any measurement error, and speeds agree to
rounding. The seven XHIP stars used in astropy's own tests agree to their published 0.1 km/s.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

import numpy as np

from service.core.constants import (
    AU_PER_JULIAN_YEAR_KM_S,
    DEG_PER_RAD,
    IMPLAUSIBLE_PARALLAX_MAS,
    IMPLAUSIBLE_PROPER_MOTION_MAS_YR,
    IMPLAUSIBLE_RADIAL_VELOCITY_KM_S,
    IMPLAUSIBLE_SPACE_VELOCITY_KM_S,
    JULIAN_YEAR_S,
    MAS_PER_RAD,
    PC_KM,
    RAD_PER_DEG,
)
from service.core.floating import overflow_to_infinity
from service.core.propagation import AT_POLE_RAD

# ---------------------------------------------------------------------------------------
# Constants specific to this module (unit and source beside each)
# ---------------------------------------------------------------------------------------

#: ICRS right ascension of the north Galactic pole, degrees; exact by convention.
#: Hipparcos Catalogue (ESA 1997) Vol. 1, section 1.5.3.
GALACTIC_POLE_RA_DEG_HIPPARCOS = 192.85948

#: ICRS declination of the north Galactic pole, degrees; exact by convention.
#: Hipparcos Catalogue (ESA 1997) Vol. 1, section 1.5.3.
GALACTIC_POLE_DEC_DEG_HIPPARCOS = 27.12825

#: Galactic longitude of the ascending node of the Galactic plane on the ICRS equator,
#: degrees; exact by convention. Hipparcos Catalogue (ESA 1997) Vol. 1, section 1.5.3.
GALACTIC_NODE_LONGITUDE_DEG_HIPPARCOS = 32.93192

#: Velocity of the Sun relative to the local standard of rest (U, V, W), km/s.
#: Schoenrich, Binney & Dehnen 2010, MNRAS 403, 1829, section 5 (abstract values).
V_SUN_LSR_SCHOENRICH2010_KM_S = (11.1, 12.24, 7.25)

#: Parallax signal-to-noise below which a star is flagged: 1/parallax is then a strongly
#: biased distance and linear error propagation fails (common practice, e.g. Bailer-Jones
#: 2015, PASP 127, 994, section 5, discusses 1/parallax bias at fractional errors > ~0.2).
LOW_PARALLAX_SNR_DEFAULT = 5.0

#: Percentiles of a normal distribution at -1 and +1 standard deviation, percent
#: (100 * Phi(-1), 100 * Phi(+1)); used for the Monte Carlo intervals.
PERCENTILE_MINUS_ONE_SIGMA = 15.865525393145708
PERCENTILE_PLUS_ONE_SIGMA = 84.13447460685429

#: Default number of Monte Carlo draws per star (common practice: enough for percentiles
#: at the 1% level of the interval width).
MONTE_CARLO_DRAWS_DEFAULT = 10_000

#: Stars per block in the vectorised linear path. Blocks of this size keep the working set
#: in the processor cache, which is several times faster than whole-array passes.
_BLOCK = 8_192

#: Upper bound on stars x draws held in memory at once by the Monte Carlo path (arrays of
#: this size are reused from the heap instead of being mapped afresh each time).
_MONTE_CARLO_ELEMENTS = 65_536


def _rotation_z(angle_rad: float) -> np.ndarray:
    """Rotation of the reference frame about the z axis by a positive angle (SOFA eraRz)."""
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return np.array([[c, s, 0.0], [-s, c, 0.0], [0.0, 0.0, 1.0]])


def _rotation_x(angle_rad: float) -> np.ndarray:
    """Rotation of the reference frame about the x axis by a positive angle (SOFA eraRx)."""
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, s], [0.0, -s, c]])


def galactic_rotation_matrix(
    pole_ra_deg: float = GALACTIC_POLE_RA_DEG_HIPPARCOS,
    pole_dec_deg: float = GALACTIC_POLE_DEC_DEG_HIPPARCOS,
    node_longitude_deg: float = GALACTIC_NODE_LONGITUDE_DEG_HIPPARCOS,
) -> np.ndarray:
    """ICRS to galactic rotation matrix from the three defining angles.

    Parameters
    ----------
    pole_ra_deg, pole_dec_deg : float
        ICRS right ascension and declination of the north Galactic pole, degrees.
    node_longitude_deg : float
        Galactic longitude of the ascending node of the Galactic plane on the ICRS
        equator, degrees.

    Returns
    -------
    ndarray, shape (3, 3)
        Matrix ``M`` with ``x_galactic = M @ x_icrs``; its rows are the U, V, W directions
        expressed in the ICRS.

    Notes
    -----
    1. ``M = R3(-l_node) R1(90 deg - dec_pole) R3(90 deg + ra_pole)`` with SOFA's frame
       rotation convention (eraRz, eraRx). The default angles are the Hipparcos ones and
       the result is the transpose of the matrix ``A_G`` printed in the Hipparcos Catalogue
       Vol. 1, section 1.5.3 (printed to 10 decimals, about 20 micro-arcsec).
    2. ERFA ``icrs2g`` uses the same definition.

    References
    ----------
    ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200, Vol. 1, section 1.5.3,
    (the three angles and the matrix A_G).
    """
    return (
        _rotation_z(-node_longitude_deg * RAD_PER_DEG)
        @ _rotation_x((90.0 - pole_dec_deg) * RAD_PER_DEG)
        @ _rotation_z((90.0 + pole_ra_deg) * RAD_PER_DEG)
    )


#: ICRS -> galactic rotation matrix of the Hipparcos Catalogue (Vol. 1, section 1.5.3),
#: computed from the three defining angles above. ``uvw = ICRS_TO_GALACTIC_HIPPARCOS @ v``.
ICRS_TO_GALACTIC_HIPPARCOS = galactic_rotation_matrix()
ICRS_TO_GALACTIC_HIPPARCOS.setflags(write=False)


class KinematicsFlag(enum.IntFlag):
    """Per-star flags of the kinematics core: what was missing, assumed or replaced."""

    #: Neither a usable parallax nor a distance: distance-dependent outputs are null.
    PARALLAX_MISSING = 1
    #: Parallax is zero or negative: no distance from it; velocities are null. The parallax
    #: signal-to-noise is given where a parallax error is, null without one.
    PARALLAX_NOT_POSITIVE = 2
    #: Parallax signal-to-noise below the threshold: 1/parallax is a biased distance and
    #: linear uncertainties are unreliable (use the Monte Carlo option or a better distance).
    PARALLAX_LOW_SNR = 4
    #: No radial velocity: radial and total velocity, U, V, W, the line-of-sight angle,
    #: proper-motion rates and closest approach are null; the transverse velocity and the
    #: radial-velocity rate (v_t^2 / d, which needs none) are still given.
    RADIAL_VELOCITY_MISSING = 8
    #: An explicit distance was used instead of the parallax (no parallax signal-to-noise).
    DISTANCE_GIVEN = 16
    #: Some input uncertainty is missing: the uncertainties that depend on it are null (and
    #: the parallax signal-to-noise, without a parallax error).
    UNCERTAINTIES_MISSING = 32
    #: Total proper motion above about 10.4 arcsec/yr: larger than any known star's;
    #: probably a unit mistake.
    PROPER_MOTION_IMPLAUSIBLE = 64
    #: Uncertainties come from Monte Carlo draws instead of linear propagation.
    MONTE_CARLO_UNCERTAINTIES = 128
    #: Radial velocity above 5,000 km/s in size (more than any star's measured radial
    #: velocity): probably m/s given as km/s.
    RADIAL_VELOCITY_IMPLAUSIBLE = 256
    #: Space velocity above half the speed of light, the limit the propagation core uses:
    #: no star moves so fast; probably a unit mistake or an unusable parallax. Forward: the
    #: speed from the distance, proper motion and radial velocity (the transverse speed
    #: without a radial velocity); inverse: U, V, W as given.
    SPACE_VELOCITY_IMPLAUSIBLE = 512
    #: Parallax positive but too small for a distance: 1000 / parallax overflows a double
    #: (below about 5.6e-306 mas), so distance-dependent outputs are null (in the inverse,
    #: the distance; the proper motions, proportional to the parallax, are given). The
    #: parallax signal-to-noise is given where a parallax error is, null without one.
    PARALLAX_TOO_SMALL = 1024
    #: Parallax used (no distance given in its place) above 1,000 mas, nearer than 1 pc
    #: (IMPLAUSIBLE_PARALLAX_MAS), more than any known star's (the largest is about
    #: 768 mas): probably microarcseconds given as milliarcseconds. Computed as given.
    PARALLAX_IMPLAUSIBLE = 2048
    #: The correlations given among the parallax (or distance), the proper motions and the
    #: radial velocity cannot all hold at once (their matrix is not positive
    #: semi-definite): the uncertainties are null (correlations_inconsistent). The API
    #: refuses such input; the batch jobs flag the row.
    CORRELATIONS_INCONSISTENT = 4096
    #: Total proper motion exactly zero: no direction of motion, so the position angle is
    #: null, and so are the closest-approach proper motion and parallax (no transverse
    #: motion). The linear transverse-velocity error is null: the derivative of |mu| is
    #: undefined at mu = 0 (the linear error's limit there depends on the direction from
    #: which mu approaches zero); Monte Carlo gives one. With a radial velocity of exactly
    #: zero too the star is at rest relative to the Sun: the line-of-sight angle, the linear
    #: total-velocity error and the closest-approach time, epoch and distance are null as
    #: well.
    PROPER_MOTION_ZERO = 8192
    #: Parallax error given as zero (no distance given in its place): the parallax
    #: signal-to-noise is infinite (undefined for a zero parallax) and is null.
    PARALLAX_ERROR_ZERO = 16384
    #: Position at a celestial pole (within AT_POLE_RAD of it): the directions east and
    #: north, and with them the proper-motion components and the transverse velocity's
    #: east and north parts, are those of the right ascension given (the limit along that
    #: meridian); the rates of the proper-motion components carry tan(dec), infinite
    #: there, and are null (the rate of the total proper motion is given).
    AT_POLE = 32768


@dataclass(frozen=True)
class SpaceVelocity:
    """Velocities of a set of stars; shapes are the broadcast input shape ``S``.

    Null (unknown) values are NaN; :attr:`flags` says why.
    """

    #: Distance used, pc (1000 / parallax, or the explicit distance). Shape S.
    distance_pc: np.ndarray
    #: Parallax signal-to-noise (parallax / parallax error); NaN if unknown or if the
    #: parallax error is zero (flag PARALLAX_ERROR_ZERO). Shape S.
    parallax_snr: np.ndarray
    #: Position angle of the proper motion, degrees east of north in [0, 360); NaN
    #: without proper motion (no direction). Shape S.
    pm_position_angle_deg: np.ndarray
    #: Total proper motion, mas/yr. Shape S.
    pm_total_mas_yr: np.ndarray
    #: Transverse velocity, km/s. Shape S.
    transverse_velocity_km_s: np.ndarray
    #: Transverse velocity towards east (along increasing RA), km/s. Shape S.
    transverse_velocity_ra_km_s: np.ndarray
    #: Transverse velocity towards north (along increasing Dec), km/s. Shape S.
    transverse_velocity_dec_km_s: np.ndarray
    #: Radial velocity, km/s, positive receding (the input). Shape S.
    radial_velocity_km_s: np.ndarray
    #: Total space velocity (speed) relative to the Sun, km/s. Shape S.
    total_velocity_km_s: np.ndarray
    #: Angle between the space velocity and the outward line of sight, degrees in
    #: [0, 180]: 0 moving straight away, 90 purely transverse, 180 straight towards us;
    #: NaN for a star at rest relative to the Sun.
    velocity_line_of_sight_angle_deg: np.ndarray
    #: Heliocentric U, V, W, km/s. Shape S + (3,).
    uvw_km_s: np.ndarray
    #: U, V, W relative to the LSR, km/s (None unless asked for). Shape S + (3,).
    uvw_lsr_km_s: np.ndarray | None
    #: Covariance of U, V, W, km^2/s^2 (same for heliocentric and LSR), packed as its six
    #: distinct elements UU, UV, UW, VV, VW, WW. Shape S + (6,). See
    #: :attr:`uvw_covariance_km2_s2` for the full matrices.
    uvw_covariance_packed_km2_s2: np.ndarray
    #: 15.87th and 84.13th percentiles (-1 and +1 sigma) of heliocentric U, V, W from the
    #: Monte Carlo draws, km/s; NaN for stars with linear uncertainties, None when no star
    #: used Monte Carlo. Shape S + (3, 2). See :attr:`uvw_interval_km_s`.
    uvw_monte_carlo_interval_km_s: np.ndarray | None
    #: Standard error of the transverse velocity, km/s; NaN (linear) where the proper
    #: motion is zero (flag PROPER_MOTION_ZERO). Shape S.
    transverse_velocity_error_km_s: np.ndarray
    #: Standard error of the total velocity, km/s. Shape S.
    total_velocity_error_km_s: np.ndarray
    #: Rate of change of the proper motion in RA (times cos Dec), mas/yr^2. Shape S.
    pm_ra_cosdec_rate_mas_yr2: np.ndarray
    #: Rate of change of the proper motion in Dec, mas/yr^2. Shape S.
    pm_dec_rate_mas_yr2: np.ndarray
    #: Rate of change of the total proper motion, mas/yr^2. Shape S.
    pm_total_rate_mas_yr2: np.ndarray
    #: Rate of change of the radial velocity (v_t^2 / d), km/s per Julian year. Shape S.
    radial_velocity_rate_km_s_yr: np.ndarray
    #: Time of closest approach to the Sun from the catalogue epoch, Julian years. Shape S.
    closest_approach_time_yr: np.ndarray
    #: Epoch of closest approach, Julian epoch (TDB); NaN if no epoch was given. Shape S.
    closest_approach_epoch_jyear: np.ndarray
    #: Minimum distance from the Sun, pc. Shape S.
    closest_approach_distance_pc: np.ndarray
    #: Speed relative to the Sun at closest approach, km/s. Shape S.
    closest_approach_speed_km_s: np.ndarray
    #: Total proper motion at closest approach, mas/yr: the largest the star shows on its
    #: straight line (mu = v_t / d peaks there, where the whole speed is transverse and d
    #: least). NaN for a star moving straight toward or away from the Sun. Shape S.
    closest_approach_pm_mas_yr: np.ndarray
    #: Parallax at closest approach (1000 / minimum distance), mas: the largest. Shape S.
    closest_approach_parallax_mas: np.ndarray
    #: Per-star :class:`KinematicsFlag` bit masks. Shape S, uint32.
    flags: np.ndarray

    @property
    def uvw_covariance_km2_s2(self) -> np.ndarray:
        """Covariance of U, V, W as full symmetric matrices, km^2/s^2. Shape S + (3, 3)."""
        return unpack_symmetric(self.uvw_covariance_packed_km2_s2)

    @property
    def uvw_error_km_s(self) -> np.ndarray:
        """Standard errors of U, V, W, km/s. Shape S + (3,)."""
        return np.sqrt(self.uvw_covariance_packed_km2_s2[..., [0, 3, 5]])

    @property
    def uvw_correlation(self) -> np.ndarray:
        """Correlation coefficients of (U,V), (U,W), (V,W). Shape S + (3,)."""
        c = self.uvw_covariance_packed_km2_s2
        e = self.uvw_error_km_s
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.stack(
                [
                    c[..., 1] / (e[..., 0] * e[..., 1]),
                    c[..., 2] / (e[..., 0] * e[..., 2]),
                    c[..., 4] / (e[..., 1] * e[..., 2]),
                ],
                axis=-1,
            )

    @property
    def uvw_interval_km_s(self) -> np.ndarray:
        """-1 and +1 sigma bounds of heliocentric U, V, W, km/s. Shape S + (3, 2).

        Monte Carlo percentiles where available, otherwise value -/+ standard error.
        """
        e = self.uvw_error_km_s
        linear = np.stack([self.uvw_km_s - e, self.uvw_km_s + e], axis=-1)
        if self.uvw_monte_carlo_interval_km_s is None:
            return linear
        mc = self.uvw_monte_carlo_interval_km_s
        return np.where(np.isnan(mc[..., :1, :1]), linear, mc)


@dataclass(frozen=True)
class GalacticVelocity:
    """U, V, W and their covariance only (see :func:`galactic_velocity`); shapes ``S``."""

    #: Heliocentric U, V, W, km/s. Shape S + (3,).
    uvw_km_s: np.ndarray
    #: U, V, W relative to the LSR, km/s (None unless asked for). Shape S + (3,).
    uvw_lsr_km_s: np.ndarray | None
    #: Packed covariance UU, UV, UW, VV, VW, WW, km^2/s^2. Shape S + (6,).
    uvw_covariance_packed_km2_s2: np.ndarray
    #: Per-star :class:`KinematicsFlag` bit masks, uint32. Shape S.
    flags: np.ndarray

    uvw_covariance_km2_s2 = SpaceVelocity.uvw_covariance_km2_s2
    uvw_error_km_s = SpaceVelocity.uvw_error_km_s
    uvw_correlation = SpaceVelocity.uvw_correlation


@dataclass(frozen=True)
class ObservablesFromVelocity:
    """Proper motion and radial velocity implied by a space velocity; shapes ``S``."""

    #: Proper motion in RA times cos(Dec), mas/yr.
    pm_ra_cosdec_mas_yr: np.ndarray
    #: Proper motion in Dec, mas/yr.
    pm_dec_mas_yr: np.ndarray
    #: Radial velocity, km/s (needs no distance).
    radial_velocity_km_s: np.ndarray
    #: Distance used, pc.
    distance_pc: np.ndarray
    #: Per-star :class:`KinematicsFlag` bit masks, uint32.
    flags: np.ndarray


# ---------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------


#: Quadrant tables for :func:`sin_cos_deg`: sin(90 k + r) = s A[k] + c B[k] and
#: cos(90 k + r) = c A[k] - s B[k] with s = sin r, c = cos r, k = 0..3.
_QUADRANT_SIN_FROM_SIN = np.array([1.0, 0.0, -1.0, 0.0])
_QUADRANT_SIN_FROM_COS = np.array([0.0, 1.0, 0.0, -1.0])


def sin_cos_deg(angle_deg):
    """Sine and cosine of an angle in degrees with one transcendental call.

    Parameters
    ----------
    angle_deg : array_like
        Angle, degrees (any range).

    Returns
    -------
    sin, cos : ndarray
        Same shape as the input.

    Notes
    -----
    1. The angle is reduced exactly to ``90 k + r`` with ``|r| <= 45`` degrees; ``sin r``
       is evaluated, ``cos r = sqrt(1 - sin^2 r)`` is well conditioned there (cos r >=
       0.707), and the quadrant ``k mod 4`` permutes and signs the pair. Accuracy is a few
       units in the last place, and exact multiples of 90 degrees give exact 0 and +-1.
    2. About twice as fast as calling ``sin`` and ``cos`` separately; the velocity core
       spends much of its time in trigonometry.
    """
    angle_deg = np.asarray(angle_deg, dtype=np.float64)
    k = np.rint(angle_deg * (1.0 / 90.0))
    r = (angle_deg - 90.0 * k) * RAD_PER_DEG
    s = np.sin(r)
    c = np.sqrt(1.0 - s * s)
    # Quadrant k mod 4 as an index into sign tables (floor-based: exact for integers).
    q = (k - 4.0 * np.floor(k * 0.25)).astype(np.intp)
    sin_out = s * _QUADRANT_SIN_FROM_SIN[q] + c * _QUADRANT_SIN_FROM_COS[q]
    cos_out = c * _QUADRANT_SIN_FROM_SIN[q] - s * _QUADRANT_SIN_FROM_COS[q]
    return sin_out, cos_out


def astrometric_covariance(
    ra_error_mas,
    dec_error_mas,
    parallax_error_mas,
    pm_ra_cosdec_error_mas_yr,
    pm_dec_error_mas_yr,
    correlations=None,
):
    """5x5 astrometric covariance from standard errors and correlation coefficients.

    Parameters
    ----------
    ra_error_mas : array_like
        Standard error of RA times cos(Dec) (a great-circle error), mas.
    dec_error_mas : array_like
        Standard error of Dec, mas.
    parallax_error_mas : array_like
        Standard error of the parallax, mas.
    pm_ra_cosdec_error_mas_yr, pm_dec_error_mas_yr : array_like
        Standard errors of the proper motion components, mas/yr.
    correlations : array_like, shape (..., 10), optional
        Correlation coefficients in the order of ``numpy.triu_indices(5, 1)`` over
        (ra, dec, parallax, pm_ra_cosdec, pm_dec): (ra,dec), (ra,parallax), (ra,pm_ra),
        (ra,pm_dec), (dec,parallax), (dec,pm_ra), (dec,pm_dec), (parallax,pm_ra),
        (parallax,pm_dec), (pm_ra,pm_dec). Zero if omitted.

    Returns
    -------
    ndarray, shape (..., 5, 5)
        Covariance in mas^2, mas^2/yr, mas^2/yr^2, order (ra*, dec, parallax,
        pm_ra_cosdec, pm_dec).
    """
    errors = np.stack(
        np.broadcast_arrays(
            *(
                np.asarray(x, dtype=np.float64)
                for x in (
                    ra_error_mas,
                    dec_error_mas,
                    parallax_error_mas,
                    pm_ra_cosdec_error_mas_yr,
                    pm_dec_error_mas_yr,
                )
            )
        ),
        axis=-1,
    )
    corr = np.broadcast_to(np.eye(5), errors.shape[:-1] + (5, 5)).copy()
    if correlations is not None:
        rho = np.asarray(correlations, dtype=np.float64)
        i, j = np.triu_indices(5, 1)
        rho = np.broadcast_to(rho, errors.shape[:-1] + (10,))
        corr[..., i, j] = rho
        corr[..., j, i] = rho
    return corr * errors[..., :, None] * errors[..., None, :]


def _optional(x, fill=np.nan):
    return np.asarray(fill if x is None else x, dtype=np.float64)


# ---------------------------------------------------------------------------------------
# Forward: astrometry -> velocities
# ---------------------------------------------------------------------------------------


def _prepare(
    ra_deg,
    dec_deg,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    parallax_mas,
    radial_velocity_km_s,
    distance_pc,
    parallax_error_mas,
    pm_ra_cosdec_error_mas_yr,
    pm_dec_error_mas_yr,
    parallax_pm_ra_cosdec_corr,
    parallax_pm_dec_corr,
    pm_ra_cosdec_pm_dec_corr,
    astrometric_covariance_mas,
    radial_velocity_error_km_s,
    distance_error_pc,
    epoch_jyear,
    solar_motion_km_s,
    radial_velocity_corr=(None, None, None),
):
    """Broadcast and flatten the inputs of :func:`space_velocity`.

    ``radial_velocity_corr`` holds the correlations of the radial velocity with the parallax
    and the two proper motions (None: 0); they come last in the flattened list.
    """
    if astrometric_covariance_mas is not None:
        cov = np.asarray(astrometric_covariance_mas, dtype=np.float64)
        if cov.shape[-2:] != (5, 5):
            raise ValueError("astrometric_covariance_mas must have shape (..., 5, 5)")
        sig_p = np.sqrt(cov[..., 2, 2])
        sig_a = np.sqrt(cov[..., 3, 3])
        sig_d = np.sqrt(cov[..., 4, 4])
        with np.errstate(invalid="ignore", divide="ignore"):
            rho_pa = cov[..., 2, 3] / (sig_p * sig_a)
            rho_pd = cov[..., 2, 4] / (sig_p * sig_d)
            rho_ad = cov[..., 3, 4] / (sig_a * sig_d)
        # A zero error makes the coefficient 0/0; its covariance term is zero anyway.
        rho_pa, rho_pd, rho_ad = (
            np.where(np.isfinite(r), r, 0.0) for r in (rho_pa, rho_pd, rho_ad)
        )
    else:
        sig_p = _optional(parallax_error_mas)
        sig_a = _optional(pm_ra_cosdec_error_mas_yr)
        sig_d = _optional(pm_dec_error_mas_yr)
        rho_pa = _optional(parallax_pm_ra_cosdec_corr, 0.0)
        rho_pd = _optional(parallax_pm_dec_corr, 0.0)
        rho_ad = _optional(pm_ra_cosdec_pm_dec_corr, 0.0)

    arrays = np.broadcast_arrays(
        np.asarray(ra_deg, dtype=np.float64),
        np.asarray(dec_deg, dtype=np.float64),
        np.asarray(pm_ra_cosdec_mas_yr, dtype=np.float64),
        np.asarray(pm_dec_mas_yr, dtype=np.float64),
        _optional(parallax_mas),
        _optional(radial_velocity_km_s),
        _optional(distance_pc),
        sig_p,
        sig_a,
        sig_d,
        rho_pa,
        rho_pd,
        rho_ad,
        _optional(radial_velocity_error_km_s),
        _optional(distance_error_pc),
        _optional(epoch_jyear),
        *(_optional(r, 0.0) for r in radial_velocity_corr),
    )
    shape = arrays[0].shape
    n = arrays[0].size
    # Inputs broadcast from a single value stay 0-d (no N-sized copies); the rest 1-D.
    flat = [np.asarray(a.flat[0]) if n and not any(a.strides) else np.ravel(a) for a in arrays]
    sun = np.asarray(solar_motion_km_s, dtype=np.float64)
    if sun.shape[-1:] != (3,):
        raise ValueError("solar_motion_km_s must have a last axis of length 3")

    return shape, flat, n, sun


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def space_velocity(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s=None,
    *,
    distance_pc=None,
    parallax_error_mas=None,
    pm_ra_cosdec_error_mas_yr=None,
    pm_dec_error_mas_yr=None,
    parallax_pm_ra_cosdec_corr=None,
    parallax_pm_dec_corr=None,
    pm_ra_cosdec_pm_dec_corr=None,
    astrometric_covariance_mas=None,
    radial_velocity_error_km_s=None,
    parallax_radial_velocity_corr=None,
    pm_ra_cosdec_radial_velocity_corr=None,
    pm_dec_radial_velocity_corr=None,
    distance_error_pc=None,
    epoch_jyear=None,
    relative_to_lsr=False,
    solar_motion_km_s=V_SUN_LSR_SCHOENRICH2010_KM_S,
    low_snr_threshold=LOW_PARALLAX_SNR_DEFAULT,
    uncertainty_method="linear",
    monte_carlo_draws=MONTE_CARLO_DRAWS_DEFAULT,
    seed=None,
) -> SpaceVelocity:
    """Space velocity of stars: decomposition, U V W, uncertainties, secular quantities.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        ICRS right ascension and declination, degrees.
    parallax_mas : array_like or None
        Parallax, mas. NaN or None means unknown; zero or negative is flagged (Note 3).
    pm_ra_cosdec_mas_yr : array_like
        Proper motion in RA *including* the cos(Dec) factor, mas/yr (Note 1).
    pm_dec_mas_yr : array_like
        Proper motion in Dec, mas/yr.
    radial_velocity_km_s : array_like, optional
        Barycentric radial velocity, km/s, positive receding. NaN/omitted means unknown.
    distance_pc : array_like, optional
        Explicit distance, pc; where finite it replaces 1/parallax (Note 4).
    parallax_error_mas, pm_ra_cosdec_error_mas_yr, pm_dec_error_mas_yr : array_like, optional
        Standard errors, mas and mas/yr.
    parallax_pm_ra_cosdec_corr, parallax_pm_dec_corr, pm_ra_cosdec_pm_dec_corr : array_like
        Optional correlation coefficients between parallax and proper motions (default 0).
    astrometric_covariance_mas : array_like, shape (..., 5, 5), optional
        Full astrometric covariance in the order (ra*, dec, parallax, pm_ra_cosdec,
        pm_dec), mas and mas/yr (see :func:`astrometric_covariance`). When given it
        replaces the error and correlation arguments above (Note 5).
    radial_velocity_error_km_s : array_like, optional
        Standard error of the radial velocity, km/s.
    parallax_radial_velocity_corr, pm_ra_cosdec_radial_velocity_corr,
    pm_dec_radial_velocity_corr : array_like, optional
        Correlation coefficients of the radial velocity with the parallax and the proper
        motions (default 0; a covariance propagated to another epoch has them, through the
        perspective acceleration).
    distance_error_pc : array_like, optional
        Standard error of an explicit distance, pc (uncorrelated with the proper motions
        and the radial velocity).
    epoch_jyear : array_like, optional
        Catalogue epoch, Julian epoch (TDB), e.g. 2016.0; only used to date the closest
        approach.
    relative_to_lsr : bool
        Also give U, V, W relative to the local standard of rest.
    solar_motion_km_s : sequence of 3 floats or array_like (..., 3)
        Sun's velocity relative to the LSR (U, V, W), km/s; default Schoenrich, Binney &
        Dehnen (2010).
    low_snr_threshold : float
        Parallax signal-to-noise below which stars are flagged ``PARALLAX_LOW_SNR``.
    uncertainty_method : {"linear", "monte_carlo", "auto"}
        Linear propagation for all stars, Monte Carlo for all, or Monte Carlo only for the
        stars flagged ``PARALLAX_LOW_SNR`` (Note 6).
    monte_carlo_draws : int
        Draws per star for the Monte Carlo method.
    seed : int or numpy.random.Generator, optional
        Seed of the Monte Carlo generator, for reproducible results.

    Returns
    -------
    SpaceVelocity
        Frozen dataclass of arrays; see its field descriptions. NaN means null.

    Notes
    -----
    1. The RA proper motion is mu_alpha* = dRA/dt cos(Dec), as in the Hipparcos and Gaia
       catalogues, not dRA/dt.
    2. Transverse velocity components are ``A mu / parallax`` with ``A`` one au per Julian
       year in km/s from the exact IAU 2012 au (4.740470463533348 km/s). The space velocity
       is ``v = p v_ra + q v_dec + r v_rad`` with the local triad (p east, q north, r
       outward), and ``(U, V, W) = M v`` with ``M`` the Hipparcos ICRS->galactic matrix:
       the Johnson & Soderblom (1987) method carried out in the ICRS.
    3. Zero or negative parallaxes give no distance: the star is flagged and its
       distance-dependent outputs are NaN, the rest of the batch is unaffected. Where the
       parallax signal-to-noise is below ``low_snr_threshold`` the star is flagged:
       1/parallax is a biased estimate of distance there (the inverse of a noisy quantity),
       and a prior-based distance passed as ``distance_pc`` is better.
    4. An explicit distance is converted to an equivalent parallax ``1000 / d`` mas with
       error ``1000 sigma_d / d^2`` and no correlation with the proper motions.
    5. Position errors are ignored: they only rotate the local triad, by
       ``sigma_pos / 1 rad`` (about 5e-9 for 1 mas), so their effect on the velocities is
       below 1e-8 of the speed. Only the (parallax, pm_ra_cosdec, pm_dec) block of the
       covariance is used, with the radial velocity's error and its correlations with
       those three.
    6. Linear propagation: ``C_uvw = G S G^T`` with ``S`` the covariance of the local
       components (v_ra, v_dec, v_rad) from the Jacobian of ``(A mu / parallax, v_rad)``
       with respect to (parallax, mu_ra*, mu_dec, v_rad), and ``G``
       the rotation from the local triad to U, V, W. The speed errors use the gradient of
       the norm, undefined at zero speed. Monte Carlo: draws of (parallax, mu, v_rad) from
       the Gaussian; draws with non-positive parallax (or distance) are discarded. The
       intervals are the 15.87th and 84.13th percentiles of the kept draws, the errors half
       their width (robust: small parallax draws give a heavy tail that makes the sample
       standard deviation meaningless), the correlations the sample correlations, and the
       covariance ``rho_ij sigma_i sigma_j``.
    7. Secular quantities of the straight-line model (uniform motion in a straight line,
       as in ERFA pmsafe Note 5): d(mu_ra*)/dt = -2 mu_r mu_ra* + tan(dec) mu_ra* mu_dec,
       d(mu_dec)/dt = -2 mu_r mu_dec - tan(dec) mu_ra*^2, d|mu|/dt = -2 mu_r |mu|,
       d(v_rad)/dt = v_t^2 / d, with mu_r = v_rad / d the radial proper motion. Closest
       approach: t = -d v_rad / |v|^2, minimum distance d v_t / |v|, speed |v|. At a
       celestial pole (flag AT_POLE) the component rates are undefined (NaN); the total
       rate is not.
    8. The light-time (Roemer) correction between apparent and true motions (a factor
       1 - v_rad/c, below 1e-3) is not applied.

    References
    ----------
    Johnson, D.R.H. & Soderblom, D.R. 1987, AJ 93, 864 (the matrices T, A and B = T A).
    ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200, Vol. 1, section 1.5.3 (galactic
    matrix), section 1.2.8 (perspective acceleration), section 1.5.5 (rigorous propagation).
    Schoenrich, R., Binney, J. & Dehnen, W. 2010, MNRAS 403, 1829 (solar motion).
    IAU 2012 Resolution B2 (astronomical unit).
    """
    if uncertainty_method not in ("linear", "monte_carlo", "auto"):
        raise ValueError(f"unknown uncertainty_method {uncertainty_method!r}")
    shape, flat, n, sun = _prepare(
        ra_deg,
        dec_deg,
        pm_ra_cosdec_mas_yr,
        pm_dec_mas_yr,
        parallax_mas,
        radial_velocity_km_s,
        distance_pc,
        parallax_error_mas,
        pm_ra_cosdec_error_mas_yr,
        pm_dec_error_mas_yr,
        parallax_pm_ra_cosdec_corr,
        parallax_pm_dec_corr,
        pm_ra_cosdec_pm_dec_corr,
        astrometric_covariance_mas,
        radial_velocity_error_km_s,
        distance_error_pc,
        epoch_jyear,
        solar_motion_km_s,
        (
            parallax_radial_velocity_corr,
            pm_ra_cosdec_radial_velocity_corr,
            pm_dec_radial_velocity_corr,
        ),
    )

    out = _allocate(n)
    for start in range(0, n, _BLOCK):
        sl = slice(start, min(start + _BLOCK, n))
        _velocity_block([a[sl] if a.ndim else a for a in flat], low_snr_threshold, out, sl)

    if uncertainty_method != "linear" and n:
        # parallax, distance and parallax error, in _prepare's order (_velocity_block)
        plx, dist, sig_p = (np.broadcast_to(flat[k], (n,)) for k in (4, 6, 7))
        index = np.flatnonzero(
            monte_carlo_stars(plx, sig_p, dist, uncertainty_method, low_snr_threshold)
        )
        if index.size:
            rng = np.random.default_rng(seed)
            _monte_carlo(flat, index, out, int(monte_carlo_draws), rng)

    uvw = out["uvw_km_s"].reshape(shape + (3,))
    uvw_lsr = None
    if relative_to_lsr:
        uvw_lsr = uvw + sun

    def shaped(name, tail=()):
        return out[name].reshape(shape + tail)

    return SpaceVelocity(
        distance_pc=shaped("distance_pc"),
        parallax_snr=shaped("parallax_snr"),
        pm_position_angle_deg=shaped("pm_position_angle_deg"),
        pm_total_mas_yr=shaped("pm_total_mas_yr"),
        transverse_velocity_km_s=shaped("transverse_velocity_km_s"),
        transverse_velocity_ra_km_s=shaped("transverse_velocity_ra_km_s"),
        transverse_velocity_dec_km_s=shaped("transverse_velocity_dec_km_s"),
        radial_velocity_km_s=shaped("radial_velocity_km_s"),
        total_velocity_km_s=shaped("total_velocity_km_s"),
        velocity_line_of_sight_angle_deg=shaped("velocity_line_of_sight_angle_deg"),
        uvw_km_s=uvw,
        uvw_lsr_km_s=uvw_lsr,
        uvw_covariance_packed_km2_s2=shaped("uvw_covariance_packed", (6,)),
        uvw_monte_carlo_interval_km_s=(
            out["uvw_monte_carlo_interval"].reshape(shape + (3, 2))
            if "uvw_monte_carlo_interval" in out
            else None
        ),
        transverse_velocity_error_km_s=shaped("transverse_velocity_error_km_s"),
        total_velocity_error_km_s=shaped("total_velocity_error_km_s"),
        pm_ra_cosdec_rate_mas_yr2=shaped("pm_ra_cosdec_rate_mas_yr2"),
        pm_dec_rate_mas_yr2=shaped("pm_dec_rate_mas_yr2"),
        pm_total_rate_mas_yr2=shaped("pm_total_rate_mas_yr2"),
        radial_velocity_rate_km_s_yr=shaped("radial_velocity_rate_km_s_yr"),
        closest_approach_time_yr=shaped("closest_approach_time_yr"),
        closest_approach_epoch_jyear=shaped("closest_approach_epoch_jyear"),
        closest_approach_distance_pc=shaped("closest_approach_distance_pc"),
        closest_approach_speed_km_s=shaped("closest_approach_speed_km_s"),
        closest_approach_pm_mas_yr=shaped("closest_approach_pm_mas_yr"),
        closest_approach_parallax_mas=shaped("closest_approach_parallax_mas"),
        flags=shaped("flags"),
    )


def correlations_inconsistent(r_pa, r_pd, r_ad, r_pr=0.0, r_ar=0.0, r_dr=0.0) -> np.ndarray:
    """True where correlation coefficients of (parallax, mu_ra*, mu_dec, v_rad), each in
    [-1, 1] (NaN read as 0), cannot hold together: their matrix is not positive
    semi-definite.

    A 3x3 correlation matrix is positive semi-definite exactly when its determinant is not
    negative (its other principal minors, 1 and 1 - r^2, are then non-negative already): a
    closed form, fast for a million stars. Stars with correlations of the radial velocity
    have the 4x4 matrix checked by its eigenvalues. Tolerances: -1e-12 on the determinant,
    -1e-9 on the smallest eigenvalue (rounding of coefficients given to 1e-16).
    """
    r12, r13, r23, r14, r24, r34 = (
        np.nan_to_num(np.asarray(r, dtype=float), nan=0.0)
        for r in (r_pa, r_pd, r_ad, r_pr, r_ar, r_dr)
    )
    r12, r13, r23, r14, r24, r34 = np.broadcast_arrays(r12, r13, r23, r14, r24, r34)
    det = 1.0 + 2.0 * r12 * r13 * r23 - r12 * r12 - r13 * r13 - r23 * r23
    bad = np.array(det < -1e-12)
    with_rv = np.flatnonzero((r14 != 0.0) | (r24 != 0.0) | (r34 != 0.0))
    if with_rv.size:
        corr = np.broadcast_to(np.eye(4), (with_rv.size, 4, 4)).copy()
        pairs = ((0, 1), (0, 2), (1, 2), (0, 3), (1, 3), (2, 3))
        for (i, j), r in zip(pairs, (r12, r13, r23, r14, r24, r34), strict=True):
            corr[:, i, j] = corr[:, j, i] = r.ravel()[with_rv]
        flat = bad.reshape(-1)
        flat[with_rv] |= np.linalg.eigvalsh(corr)[:, 0] < -1e-9
    return bad


def _may_be_inconsistent(*coefficients) -> bool:
    """False when no matrix of these correlation coefficients (3 or 6 arrays) can fail to
    be positive semi-definite: every coefficient within 1/(d - 1) in size, d the matrix
    size, so that each row's off-diagonal sum is at most 1 and Gershgorin's circle theorem
    puts every eigenvalue at 0 or above. Six reductions instead of the test itself for the
    usual catalogue (NaN answers True)."""
    bound = 0.5 if len(coefficients) == 3 else 1.0 / 3.0
    return not all(np.max(r) <= bound and np.min(r) >= -bound for r in coefficients)


def monte_carlo_stars(
    parallax_mas, parallax_error_mas, distance_pc, uncertainty_method, low_snr_threshold
):
    """Which stars :func:`space_velocity` draws for (Note 6), as a boolean array.

    ``monte_carlo``: every star with a distance (one given, or a positive parallax). ``auto``:
    the stars flagged ``PARALLAX_LOW_SNR`` (a positive parallax below ``low_snr_threshold``
    in signal-to-noise, and no distance given). ``linear``: none. The one rule for the core
    and for callers that must size a request before running it.
    """
    plx = np.asarray(parallax_mas, dtype=float)
    given = np.isfinite(np.asarray(distance_pc, dtype=float))
    if uncertainty_method == "linear":
        return np.zeros(np.broadcast(plx, given).shape, dtype=bool)
    positive = plx > 0.0
    if uncertainty_method == "monte_carlo":
        return given | positive
    if uncertainty_method != "auto":
        raise ValueError(f"unknown uncertainty_method {uncertainty_method!r}")
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # edge values
        low = positive & (plx / np.asarray(parallax_error_mas, dtype=float) < low_snr_threshold)
    return low & ~given


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def galactic_velocity(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s=None,
    *,
    distance_pc=None,
    parallax_error_mas=None,
    pm_ra_cosdec_error_mas_yr=None,
    pm_dec_error_mas_yr=None,
    parallax_pm_ra_cosdec_corr=None,
    parallax_pm_dec_corr=None,
    pm_ra_cosdec_pm_dec_corr=None,
    astrometric_covariance_mas=None,
    radial_velocity_error_km_s=None,
    parallax_radial_velocity_corr=None,
    pm_ra_cosdec_radial_velocity_corr=None,
    pm_dec_radial_velocity_corr=None,
    distance_error_pc=None,
    relative_to_lsr=False,
    solar_motion_km_s=V_SUN_LSR_SCHOENRICH2010_KM_S,
    low_snr_threshold=LOW_PARALLAX_SNR_DEFAULT,
) -> GalacticVelocity:
    """U, V, W with their linear covariance, and nothing else.

    The lean form of :func:`space_velocity` for large catalogues that only need galactic
    velocities: same parameters (without the Monte Carlo and epoch options), same
    conventions, same values, flags and Notes; the decomposition and secular quantities
    are not computed.

    Returns
    -------
    GalacticVelocity

    References
    ----------
    As :func:`space_velocity`.
    """
    shape, flat, n, sun = _prepare(
        ra_deg,
        dec_deg,
        pm_ra_cosdec_mas_yr,
        pm_dec_mas_yr,
        parallax_mas,
        radial_velocity_km_s,
        distance_pc,
        parallax_error_mas,
        pm_ra_cosdec_error_mas_yr,
        pm_dec_error_mas_yr,
        parallax_pm_ra_cosdec_corr,
        parallax_pm_dec_corr,
        pm_ra_cosdec_pm_dec_corr,
        astrometric_covariance_mas,
        radial_velocity_error_km_s,
        distance_error_pc,
        None,
        solar_motion_km_s,
        (
            parallax_radial_velocity_corr,
            pm_ra_cosdec_radial_velocity_corr,
            pm_dec_radial_velocity_corr,
        ),
    )
    out = _allocate(n, full=False)
    for start in range(0, n, _BLOCK):
        sl = slice(start, min(start + _BLOCK, n))
        args = [a[sl] if a.ndim else a for a in flat]
        _velocity_block(args, low_snr_threshold, out, sl, full=False)
    uvw = out["uvw_km_s"].reshape(shape + (3,))
    return GalacticVelocity(
        uvw_km_s=uvw,
        uvw_lsr_km_s=uvw + sun if relative_to_lsr else None,
        uvw_covariance_packed_km2_s2=out["uvw_covariance_packed"].reshape(shape + (6,)),
        flags=out["flags"].reshape(shape),
    )


_SCALAR_OUTPUTS = (
    "distance_pc",
    "parallax_snr",
    "pm_position_angle_deg",
    "pm_total_mas_yr",
    "transverse_velocity_km_s",
    "transverse_velocity_ra_km_s",
    "transverse_velocity_dec_km_s",
    "radial_velocity_km_s",
    "total_velocity_km_s",
    "velocity_line_of_sight_angle_deg",
    "transverse_velocity_error_km_s",
    "total_velocity_error_km_s",
    "pm_ra_cosdec_rate_mas_yr2",
    "pm_dec_rate_mas_yr2",
    "pm_total_rate_mas_yr2",
    "radial_velocity_rate_km_s_yr",
    "closest_approach_time_yr",
    "closest_approach_epoch_jyear",
    "closest_approach_distance_pc",
    "closest_approach_speed_km_s",
    "closest_approach_pm_mas_yr",
    "closest_approach_parallax_mas",
)

#: Index pairs (i, j), i <= j, of the six distinct elements of a symmetric 3x3 matrix, in
#: the order used for packed covariances: (0,0) (0,1) (0,2) (1,1) (1,2) (2,2).
_PACKED_PAIRS = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))


def _packed_rotation(m: np.ndarray) -> np.ndarray:
    """Matrix ``T`` (6x6) with ``packed(M C M^T) = packed(C) @ T`` for symmetric C."""
    t = np.zeros((6, 6))
    for col, (i, j) in enumerate(_PACKED_PAIRS):
        for row, (p, q) in enumerate(_PACKED_PAIRS):
            t[row, col] = m[i, p] * m[j, q] + (m[i, q] * m[j, p] if p != q else 0.0)
    return t


_PACKED_ICRS_TO_GALACTIC = _packed_rotation(ICRS_TO_GALACTIC_HIPPARCOS)


def unpack_symmetric(packed):
    """Full symmetric matrices (..., 3, 3) from packed elements (..., 6) (see _PACKED_PAIRS)."""
    packed = np.asarray(packed)
    full = np.empty(packed.shape[:-1] + (3, 3), dtype=packed.dtype)
    for col, (i, j) in enumerate(_PACKED_PAIRS):
        full[..., i, j] = packed[..., col]
        full[..., j, i] = packed[..., col]
    return full


def _allocate(n, full=True):
    out = {name: np.empty(n) for name in _SCALAR_OUTPUTS} if full else {}
    out["uvw_km_s"] = np.empty((n, 3))
    out["uvw_covariance_packed"] = np.empty((n, 6))
    out["flags"] = np.zeros(n, dtype=np.uint32)
    return out


def _galactic_triad(ra_deg, dec_deg):
    """Local triad (p east, q north, r outward) rotated to galactic axes.

    Returns three lists of 3 arrays ``g_p, g_q, g_r`` (``g_x[i]`` is the i-th galactic
    component, i.e. along U, V, W, of the ICRS unit vector x) and ``sin dec, cos dec``.
    """
    sa, ca = sin_cos_deg(ra_deg)
    sd, cd = sin_cos_deg(dec_deg)
    m = ICRS_TO_GALACTIC_HIPPARCOS
    g_p, g_q, g_r = [], [], []
    for i in range(3):
        # R (cos a, sin a, 0): the equatorial-plane direction of the star.
        e = m[i, 0] * ca + m[i, 1] * sa
        g_p.append(m[i, 1] * ca - m[i, 0] * sa)
        g_q.append(m[i, 2] * cd - sd * e)
        g_r.append(m[i, 2] * sd + cd * e)
    return g_p, g_q, g_r, sd, cd


def _velocity_block(args, low_snr_threshold, out, sl, full=True):
    """Linear path for one block of 1-D arrays; writes into ``out[...][sl]``.

    The velocity and its covariance are built in the ICRS by two plane rotations of the
    local triad (by Dec in the north-radial plane, by RA in the equatorial plane) and then
    taken to U, V, W with the constant galactic matrix in one matrix product per block.
    ``full=False`` computes only U, V, W, their covariance and the flags.
    """
    (ra, dec, pmra, pmdec, plx, rv, dist, sig_p, sig_a, sig_d, rho_pa, rho_pd, rho_ad, sig_rv,
     sig_dist, epoch, rho_pr, rho_ar, rho_dr) = args  # fmt: skip

    # --- distance: explicit distance where finite, else parallax (Notes 3, 4) ----------
    # Flags are built arithmetically (mask * bit), and only where some star needs them:
    # much faster than masked assignment.
    n = sl.stop - sl.start
    given = np.isfinite(dist)
    positive = plx > 0.0
    flags = np.zeros(n, dtype=np.uint32)
    plx_eq = plx
    with np.errstate(divide="ignore", invalid="ignore"):
        if not positive.all():
            plx_known = np.isfinite(plx)
            flags |= (plx_known & ~positive) * np.uint32(KinematicsFlag.PARALLAX_NOT_POSITIVE)
            flags |= ~plx_known * np.uint32(KinematicsFlag.PARALLAX_MISSING)
            plx_eq = np.where(positive, plx, np.nan)
        snr = plx / sig_p
        # A zero parallax error: signal-to-noise infinite or 0/0, null and flagged.
        err_zero = (sig_p == 0.0) & np.isfinite(plx) & ~given
        if err_zero.any():
            flags |= err_zero * np.uint32(KinematicsFlag.PARALLAX_ERROR_ZERO)
            snr = np.where(sig_p == 0.0, np.nan, snr)
        sig_plx_eq = sig_p
        if given.any():
            flags &= ~(
                given
                * np.uint32(KinematicsFlag.PARALLAX_NOT_POSITIVE | KinematicsFlag.PARALLAX_MISSING)
            )
            flags |= given * np.uint32(KinematicsFlag.DISTANCE_GIVEN)
            plx_eq = np.where(given, 1000.0 / dist, plx_eq)
            snr = np.where(given, np.nan, snr)
            sig_plx_eq = np.where(given, 1000.0 * sig_dist / (dist * dist), sig_p)
            rho_pa = np.where(given, 0.0, rho_pa)
            rho_pd = np.where(given, 0.0, rho_pd)
            rho_pr = np.where(given, 0.0, rho_pr)
    low = positive & (snr < low_snr_threshold)
    if low.any():
        flags |= low * np.uint32(KinematicsFlag.PARALLAX_LOW_SNR)
    # The parallax as given, where no distance replaces it (False for NaN).
    plx_implausible = (plx > IMPLAUSIBLE_PARALLAX_MAS) & ~given
    if plx_implausible.any():
        flags |= plx_implausible * np.uint32(KinematicsFlag.PARALLAX_IMPLAUSIBLE)

    inv_plx = 1.0 / plx_eq
    distance = 1000.0 * inv_plx
    # A positive parallax below about 5.6e-306 mas gives no distance (1000 / parallax
    # overflows); inf * 0 would null the velocities of a star without proper motion unsaid.
    overflow = np.isinf(distance)
    if overflow.any():
        flags |= overflow * np.uint32(KinematicsFlag.PARALLAX_TOO_SMALL)
        inv_plx = np.where(overflow, np.nan, inv_plx)
        distance = np.where(overflow, np.nan, distance)
    k = AU_PER_JULIAN_YEAR_KM_S * inv_plx  # km/s per mas/yr

    # --- decomposition -------------------------------------------------------------------
    pm_total = np.sqrt(pmra * pmra + pmdec * pmdec)
    pm_zero = pm_total == 0.0
    if pm_zero.any():
        flags |= pm_zero * np.uint32(KinematicsFlag.PROPER_MOTION_ZERO)
    implausible = pm_total > IMPLAUSIBLE_PROPER_MOTION_MAS_YR
    if implausible.any():
        flags |= implausible * np.uint32(KinematicsFlag.PROPER_MOTION_IMPLAUSIBLE)
    rv_missing = np.isnan(rv)
    if rv_missing.any():
        flags |= rv_missing * np.uint32(KinematicsFlag.RADIAL_VELOCITY_MISSING)
    rv_implausible = np.abs(rv) > IMPLAUSIBLE_RADIAL_VELOCITY_KM_S  # False for NaN
    if rv_implausible.any():
        flags |= rv_implausible * np.uint32(KinematicsFlag.RADIAL_VELOCITY_IMPLAUSIBLE)
    va = k * pmra
    vd = k * pmdec
    # Speed above half the speed of light (the propagation's limit for the same astrometry):
    # a tiny parallax or a unit mistake. Without a radial velocity, the transverse speed.
    vt2 = va * va + vd * vd
    too_fast = np.fmax(vt2, vt2 + rv * rv) > IMPLAUSIBLE_SPACE_VELOCITY_KM_S**2
    if too_fast.any():
        flags |= too_fast * np.uint32(KinematicsFlag.SPACE_VELOCITY_IMPLAUSIBLE)

    # --- velocity vector: local triad -> ICRS -> U, V, W ---------------------------------
    sa, ca = sin_cos_deg(ra)
    sd, cd = sin_cos_deg(dec)
    at_pole = cd < AT_POLE_RAD
    if at_pole.any():
        flags |= at_pole * np.uint32(KinematicsFlag.AT_POLE)
    # Rotation by Dec: (north, radial) -> (equatorial-plane direction e, pole z).
    v_e = cd * rv - sd * vd
    v_z = sd * rv + cd * vd
    # Rotation by RA: (east, e) -> (x, y).
    v_icrs = np.empty((n, 3))
    v_icrs[:, 0] = ca * v_e - sa * va
    v_icrs[:, 1] = sa * v_e + ca * va
    v_icrs[:, 2] = v_z
    uvw = v_icrs @ ICRS_TO_GALACTIC_HIPPARCOS.T
    out["uvw_km_s"][sl] = uvw

    # --- linear uncertainties (Notes 5, 6) -----------------------------------------------
    # Covariance of the local components (v_ra, v_dec, v_rad) from the Jacobian of
    # A mu / parallax with respect to (parallax, mu_ra*, mu_dec).
    c_pp = sig_plx_eq * sig_plx_eq
    k_c_pa = k * (rho_pa * sig_plx_eq * sig_a)
    k_c_pd = k * (rho_pd * sig_plx_eq * sig_d)
    kk = k * k
    a = va * inv_plx
    b = vd * inv_plx
    s_aa = a * (a * c_pp - 2.0 * k_c_pa) + kk * (sig_a * sig_a)
    s_dd = b * (b * c_pp - 2.0 * k_c_pd) + kk * (sig_d * sig_d)
    s_ad = a * (b * c_pp - k_c_pd) - b * k_c_pa + kk * (rho_ad * sig_a * sig_d)
    s_rr = sig_rv * sig_rv
    if rv_missing.any():  # no U, V, W: no errors of them either (an error given alone)
        s_rr = np.where(rv_missing, np.nan, s_rr)
    # Correlations of the radial velocity with the parallax and proper motions (zero unless
    # given: the terms are then skipped).
    rv_corr = bool(np.any(rho_pr) or np.any(rho_ar) or np.any(rho_dr))
    if rv_corr:
        c_pr = rho_pr * sig_plx_eq * sig_rv
        s_ar = k * (rho_ar * sig_a * sig_rv) - a * c_pr
        s_dr = k * (rho_dr * sig_d * sig_rv) - b * c_pr
    missing_err = np.isnan(s_aa + s_dd + s_ad) | (np.isnan(s_rr) & ~rv_missing)
    if missing_err.any():
        flags |= (missing_err & np.isfinite(distance)) * np.uint32(
            KinematicsFlag.UNCERTAINTIES_MISSING
        )
    # Correlations that cannot hold together give no uncertainties (the API refuses them;
    # a batch row is flagged). Checked only where some coefficient could make them so.
    if _may_be_inconsistent(rho_pa, rho_pd, rho_ad, *((rho_pr, rho_ar, rho_dr) if rv_corr else ())):
        inconsistent = correlations_inconsistent(rho_pa, rho_pd, rho_ad, rho_pr, rho_ar, rho_dr)
        if inconsistent.any():
            flags |= inconsistent * np.uint32(KinematicsFlag.CORRELATIONS_INCONSISTENT)
            s_aa, s_dd, s_ad, s_rr = (
                np.where(inconsistent, np.nan, x) for x in (s_aa, s_dd, s_ad, s_rr)
            )
            if rv_corr:
                s_ar, s_dr = (np.where(inconsistent, np.nan, x) for x in (s_ar, s_dr))
    # Rotation by Dec of the (north, radial) block.
    s_pe = -sd * s_ad
    s_pz = cd * s_ad
    sd2 = sd * sd
    cd2 = cd * cd
    s_ee = sd2 * s_dd + cd2 * s_rr
    s_ez = sd * cd * (s_rr - s_dd)
    s_zz = cd2 * s_dd + sd2 * s_rr
    if rv_corr:
        s_pe = s_pe + cd * s_ar
        s_pz = s_pz + sd * s_ar
        two_sc_dr = 2.0 * sd * cd * s_dr
        s_ee = s_ee - two_sc_dr
        s_ez = s_ez + (cd2 - sd2) * s_dr
        s_zz = s_zz + two_sc_dr
    # Rotation by RA of the (east, e) block.
    sa2 = sa * sa
    ca2 = ca * ca
    two_sc_pe = 2.0 * sa * ca * s_pe
    cov_icrs = np.empty((n, 6))
    cov_icrs[:, 0] = sa2 * s_aa - two_sc_pe + ca2 * s_ee
    cov_icrs[:, 1] = sa * ca * (s_ee - s_aa) + (ca2 - sa2) * s_pe
    cov_icrs[:, 2] = ca * s_ez - sa * s_pz
    cov_icrs[:, 3] = ca2 * s_aa + two_sc_pe + sa2 * s_ee
    cov_icrs[:, 4] = sa * s_ez + ca * s_pz
    cov_icrs[:, 5] = s_zz
    cov = cov_icrs @ _PACKED_ICRS_TO_GALACTIC
    out["uvw_covariance_packed"][sl] = cov
    if not full:
        out["flags"][sl] = flags
        return
    vt = k * pm_total
    vt2 = vt * vt
    speed2 = vt2 + rv * rv
    speed = np.sqrt(speed2)
    with np.errstate(divide="ignore", invalid="ignore"):
        vt_var = va * (va * s_aa + 2.0 * vd * s_ad) + vd * vd * s_dd
        out["transverse_velocity_error_km_s"][sl] = np.sqrt(vt_var) / vt
        sp_var = vt_var + rv * rv * s_rr
        if rv_corr:
            sp_var = sp_var + 2.0 * rv * (va * s_ar + vd * s_dr)
        out["total_velocity_error_km_s"][sl] = np.sqrt(sp_var) / speed

    # --- secular quantities (Note 7) -----------------------------------------------------
    # Radial proper motion mu_r = v_rad / d, per year (Hipparcos Vol. 1 section 1.2.8 gives it
    # in mas/yr as v_rad * parallax / A).
    mu_r_per_yr = rv / (k * MAS_PER_RAD)
    # -2 mu_r, and 0 rather than -0.0 where v_r = 0 (+ 0.0 turns -0.0 into 0): the rates
    # and the closest-approach time below are then 0, not -0.0 ("just past" to a reader).
    minus_two_mu_r = -2.0 * mu_r_per_yr + 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        # At a celestial pole the component rates are undefined: null (flag AT_POLE).
        tan_dec_per_rad = np.where(at_pole, np.nan, sd / (cd * MAS_PER_RAD))
        out["pm_ra_cosdec_rate_mas_yr2"][sl] = pmra * (minus_two_mu_r + tan_dec_per_rad * pmdec)
        out["pm_dec_rate_mas_yr2"][sl] = minus_two_mu_r * pmdec - tan_dec_per_rad * pmra * pmra
    out["pm_total_rate_mas_yr2"][sl] = minus_two_mu_r * pm_total
    d_km = distance * PC_KM
    out["radial_velocity_rate_km_s_yr"][sl] = vt2 * (JULIAN_YEAR_S / d_km)
    with np.errstate(divide="ignore", invalid="ignore"):
        t_yr = (d_km / JULIAN_YEAR_S) * (-rv + 0.0) / speed2
        out["closest_approach_distance_pc"][sl] = distance * vt / speed
        # At closest approach d = d0 v_t / v and the whole speed v is transverse, so the
        # proper motion v / (k d) = mu0 (v / v_t)^2 and the parallax plx0 v / v_t. A star
        # without transverse motion passes through the Sun: both undefined (NaN).
        ratio = np.where(vt > 0.0, speed / vt, np.nan)
        out["closest_approach_pm_mas_yr"][sl] = pm_total * ratio * ratio
        out["closest_approach_parallax_mas"][sl] = 1000.0 / distance * ratio
    out["closest_approach_time_yr"][sl] = t_yr
    out["closest_approach_epoch_jyear"][sl] = epoch + t_yr
    out["closest_approach_speed_km_s"][sl] = speed

    out["distance_pc"][sl] = distance
    out["parallax_snr"][sl] = snr
    pa = np.arctan2(pmra, pmdec) * DEG_PER_RAD
    pa += (pa < 0.0) * 360.0
    pa = np.where(pa >= 360.0, 0.0, pa)  # -1e-17 + 360 rounds to 360: the range is [0, 360)
    # No motion has no direction: arctan2(+-0, +-0) would say 0 or 180 by the zeros' signs.
    out["pm_position_angle_deg"][sl] = np.where(pm_total == 0.0, np.nan, pa)
    out["pm_total_mas_yr"][sl] = pm_total
    out["transverse_velocity_km_s"][sl] = vt
    out["transverse_velocity_ra_km_s"][sl] = va
    out["transverse_velocity_dec_km_s"][sl] = vd
    out["radial_velocity_km_s"][sl] = rv
    out["total_velocity_km_s"][sl] = speed
    out["velocity_line_of_sight_angle_deg"][sl] = np.where(
        speed == 0.0, np.nan, np.arctan2(vt, rv) * DEG_PER_RAD
    )
    out["flags"][sl] = flags


def _sample_quantile(sorted_x, n_valid, q_percent):
    """Linear-interpolated percentile along the last axis of sorted rows with NaN at the
    end; ``n_valid`` valid entries per row."""
    pos = (n_valid - 1) * (q_percent / 100.0)
    lo = np.floor(pos).astype(np.int64)
    hi = np.minimum(lo + 1, n_valid - 1)
    frac = pos - lo
    lo = np.clip(lo, 0, None)
    hi = np.clip(hi, 0, None)
    x_lo = np.take_along_axis(sorted_x, lo[..., None], axis=-1)[..., 0]
    x_hi = np.take_along_axis(sorted_x, hi[..., None], axis=-1)[..., 0]
    return x_lo + (x_hi - x_lo) * frac


def _monte_carlo(flat, index, out, draws, rng):
    """Monte Carlo uncertainties for the stars ``index`` (Note 6 of space_velocity)."""
    flat = [np.broadcast_to(a, (out["flags"].size,)) for a in flat]
    (ra, dec, pmra, pmdec, plx, rv, dist, sig_p, sig_a, sig_d, rho_pa, rho_pd, rho_ad, sig_rv,
     sig_dist, _epoch, rho_pr, rho_ar, rho_dr) = flat  # fmt: skip
    per_chunk = max(1, _MONTE_CARLO_ELEMENTS // max(draws, 1))
    for start in range(0, index.size, per_chunk):
        idx = index[start : start + per_chunk]
        m = idx.size
        given = np.isfinite(dist[idx])
        # First variable: the parallax (mas) or, where given, the distance (pc).
        x0 = np.where(given, dist[idx], plx[idx])
        s0 = np.where(given, sig_dist[idx], sig_p[idx])
        r_pa = np.where(given, 0.0, rho_pa[idx])
        r_pd = np.where(given, 0.0, rho_pd[idx])
        r_pr = np.where(given, 0.0, rho_pr[idx])
        sa_, sd_ = sig_a[idx], sig_d[idx]
        # A radial velocity given without its error leaves U, V, W and the speed without
        # errors (blanked below), not the transverse velocity: draw it with no spread.
        srv = np.where(np.isnan(rv[idx]), 0.0, sig_rv[idx])
        rv_error_missing = ~np.isfinite(srv)
        srv = np.where(rv_error_missing, 0.0, srv)
        # (first variable, mu_a*, mu_d, v_rad); the radial velocity's correlations as given.
        cov = np.empty((m, 4, 4))
        cov[:, 0, 0] = s0 * s0
        cov[:, 1, 1] = sa_ * sa_
        cov[:, 2, 2] = sd_ * sd_
        cov[:, 3, 3] = srv * srv
        cov[:, 0, 1] = cov[:, 1, 0] = r_pa * s0 * sa_
        cov[:, 0, 2] = cov[:, 2, 0] = r_pd * s0 * sd_
        cov[:, 1, 2] = cov[:, 2, 1] = rho_ad[idx] * sa_ * sd_
        cov[:, 0, 3] = cov[:, 3, 0] = r_pr * s0 * srv
        cov[:, 1, 3] = cov[:, 3, 1] = rho_ar[idx] * sa_ * srv
        cov[:, 2, 3] = cov[:, 3, 2] = rho_dr[idx] * sd_ * srv
        ok = np.isfinite(cov).all(axis=(1, 2))
        ok &= ~correlations_inconsistent(r_pa, r_pd, rho_ad[idx], r_pr, rho_ar[idx], rho_dr[idx])
        cov[~ok] = 0.0
        # Square root of the (semi-definite) covariance through its eigen-decomposition.
        w, v = np.linalg.eigh(cov)
        root = v * np.sqrt(np.clip(w, 0.0, None))[:, None, :]
        # Draws component-major: each (m, draws) slice is contiguous.
        z = rng.standard_normal((4, m, draws))
        col = [root[:, i, :, None] for i in range(4)]  # (m, 4, 1) rows of the root
        drawn = [sum(c[:, j] * z[j] for j in range(4)) for c in col]
        first = x0[:, None] + drawn[0]
        mu_a = pmra[idx][:, None] + drawn[1]
        mu_d = pmdec[idx][:, None] + drawn[2]
        rv_missing = np.isnan(rv[idx])
        # Without a radial velocity only the transverse velocity has draws; a zero stands
        # in for v_rad and the U, V, W and speed results are blanked below.
        v_r = np.where(rv_missing, 0.0, rv[idx])[:, None] + drawn[3]
        del z, drawn
        with np.errstate(divide="ignore", invalid="ignore"):
            k = np.where(
                given[:, None],
                (AU_PER_JULIAN_YEAR_KM_S / 1000.0) * first,
                AU_PER_JULIAN_YEAR_KM_S / first,
            )
            k[first <= 0.0] = np.nan
        va = k * mu_a
        vd = k * mu_d
        valid = np.isfinite(k)
        n_valid = valid.sum(axis=-1)
        g_p, g_q, g_r, _, _ = _galactic_triad(ra[idx][:, None], dec[idx][:, None])
        # U, V, W, v_t, speed per draw (NaN for discarded draws).
        vt2 = va * va + vd * vd
        samples = [g_p[i] * va + g_q[i] * vd + g_r[i] * v_r for i in range(3)]
        samples.append(np.sqrt(vt2))
        samples.append(np.sqrt(vt2 + v_r * v_r))
        # Sample covariance of U, V, W about the linear values (well conditioned sums).
        centre = out["uvw_km_s"][idx]
        with np.errstate(divide="ignore", invalid="ignore"):
            dev = [np.where(valid, samples[i] - centre[:, i, None], 0.0) for i in range(3)]
            mean = [d.sum(axis=-1) / n_valid for d in dev]
            scov = np.empty((m, 3, 3))
            for i in range(3):
                for j in range(i, 3):
                    c = np.einsum("mn,mn->m", dev[i], dev[j]) / n_valid - mean[i] * mean[j]
                    scov[:, i, j] = scov[:, j, i] = c * (n_valid / (n_valid - 1))
        lo_q = np.empty((m, 5))
        hi_q = np.empty((m, 5))
        for i, x in enumerate(samples):
            x.sort(axis=-1)  # NaN (discarded draws) sort to the end
            lo_q[:, i] = _sample_quantile(x, n_valid, PERCENTILE_MINUS_ONE_SIGMA)
            hi_q[:, i] = _sample_quantile(x, n_valid, PERCENTILE_PLUS_ONE_SIGMA)

        bad = ~ok | (n_valid < 2)
        # Robust errors: half the -1/+1 sigma percentile width (Note 6); correlations from
        # the sample; covariance = rho_ij sigma_i sigma_j.
        sigma = 0.5 * (hi_q - lo_q)  # (m, 5): U, V, W, v_t, speed
        with np.errstate(divide="ignore", invalid="ignore"):
            sd_sample = np.sqrt(np.diagonal(scov, axis1=1, axis2=2))
            rho = scov / (sd_sample[:, :, None] * sd_sample[:, None, :])
        i_idx = np.array([0, 0, 0, 1, 1, 2])
        j_idx = np.array([0, 1, 2, 1, 2, 2])
        packed = rho[:, i_idx, j_idx] * sigma[:, i_idx] * sigma[:, j_idx]
        packed[:, [0, 3, 5]] = sigma[:, :3] ** 2
        interval = np.stack([lo_q[:, :3], hi_q[:, :3]], axis=-1)
        vt_err = sigma[:, 3]
        sp_err = sigma[:, 4]
        vt_err[bad] = np.nan
        blank = bad | rv_missing | rv_error_missing
        for arr in (packed, interval, sp_err):
            arr[blank] = np.nan
        out["uvw_covariance_packed"][idx] = packed
        if "uvw_monte_carlo_interval" not in out:
            out["uvw_monte_carlo_interval"] = np.full((out["flags"].size, 3, 2), np.nan)
        out["uvw_monte_carlo_interval"][idx] = interval
        out["transverse_velocity_error_km_s"][idx] = vt_err
        out["total_velocity_error_km_s"][idx] = sp_err
        done = idx[~bad]
        out["flags"][done] |= np.uint32(KinematicsFlag.MONTE_CARLO_UNCERTAINTIES)


# ---------------------------------------------------------------------------------------
# Inverse: velocities -> observables
# ---------------------------------------------------------------------------------------


@overflow_to_infinity  # edge inputs overflow to inf / NaN, flagged (core.floating)
def observables_from_velocity(
    ra_deg,
    dec_deg,
    uvw_km_s,
    parallax_mas=None,
    *,
    distance_pc=None,
    relative_to_lsr=False,
    solar_motion_km_s=V_SUN_LSR_SCHOENRICH2010_KM_S,
) -> ObservablesFromVelocity:
    """Proper motion and radial velocity that a star with given U, V, W must show.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        ICRS right ascension and declination, degrees.
    uvw_km_s : array_like, shape (..., 3)
        U (towards the Galactic centre), V (Galactic rotation), W (north Galactic pole),
        km/s; heliocentric unless ``relative_to_lsr``.
    parallax_mas : array_like, optional
        Parallax, mas; zero, negative or NaN gives null proper motions and a flag.
    distance_pc : array_like, optional
        Explicit distance, pc; where finite it replaces 1/parallax.
    relative_to_lsr : bool
        ``uvw_km_s`` is relative to the local standard of rest; the Sun's motion is
        subtracted first.
    solar_motion_km_s : sequence of 3 floats or array_like (..., 3)
        Sun's velocity relative to the LSR, km/s (Schoenrich, Binney & Dehnen 2010 default).

    Returns
    -------
    ObservablesFromVelocity

    Notes
    -----
    1. Exact inverse of :func:`space_velocity`: ``v = M^T (U, V, W)`` in the ICRS, then
       ``v_ra = p.v``, ``v_dec = q.v``, ``v_rad = r.v`` and ``mu = v_t / (A / parallax)``.
    2. The radial velocity needs no distance and is always given.
    3. At a celestial pole (within AT_POLE_RAD, flag AT_POLE) east and north, and with them
       the proper-motion components, are those of the right ascension given (the limit
       along that meridian), as in :func:`space_velocity`.

    References
    ----------
    Johnson, D.R.H. & Soderblom, D.R. 1987, AJ 93, 864.
    ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200, Vol. 1, section 1.5.3.
    """
    uvw = np.asarray(uvw_km_s, dtype=np.float64)
    if uvw.shape[-1:] != (3,):
        raise ValueError("uvw_km_s must have a last axis of length 3")
    if relative_to_lsr:
        uvw = uvw - np.asarray(solar_motion_km_s, dtype=np.float64)
    ra, dec, u, v, w, plx, dist = np.broadcast_arrays(
        np.asarray(ra_deg, dtype=np.float64),
        np.asarray(dec_deg, dtype=np.float64),
        uvw[..., 0],
        uvw[..., 1],
        uvw[..., 2],
        _optional(parallax_mas),
        _optional(distance_pc),
    )
    flags = np.zeros(ra.shape, dtype=np.uint32)
    given = np.isfinite(dist)
    flags[given] |= np.uint32(KinematicsFlag.DISTANCE_GIVEN)
    flags[~given & np.isfinite(plx) & (plx <= 0.0)] |= np.uint32(
        KinematicsFlag.PARALLAX_NOT_POSITIVE
    )
    flags[~given & ~np.isfinite(plx)] |= np.uint32(KinematicsFlag.PARALLAX_MISSING)
    flags[~given & (plx > IMPLAUSIBLE_PARALLAX_MAS)] |= np.uint32(
        KinematicsFlag.PARALLAX_IMPLAUSIBLE
    )
    speed2 = u * u + v * v + w * w
    flags[speed2 > IMPLAUSIBLE_SPACE_VELOCITY_KM_S**2] |= np.uint32(
        KinematicsFlag.SPACE_VELOCITY_IMPLAUSIBLE
    )
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        plx_eq = np.where(given, 1000.0 / dist, np.where(plx > 0.0, plx, np.nan))
        overflow = ~given & np.isinf(1000.0 / plx_eq)  # a parallax below about 5.6e-306 mas
    flags[overflow] |= np.uint32(KinematicsFlag.PARALLAX_TOO_SMALL)  # proper motions kept
    g_p, g_q, g_r, _, cd = _galactic_triad(ra, dec)
    flags[cd < AT_POLE_RAD] |= np.uint32(KinematicsFlag.AT_POLE)
    va = g_p[0] * u + g_p[1] * v + g_p[2] * w
    vd = g_q[0] * u + g_q[1] * v + g_q[2] * w
    vr = g_r[0] * u + g_r[1] * v + g_r[2] * w
    inv_k = plx_eq / AU_PER_JULIAN_YEAR_KM_S
    return ObservablesFromVelocity(
        pm_ra_cosdec_mas_yr=va * inv_k,
        pm_dec_mas_yr=vd * inv_k,
        radial_velocity_km_s=vr,
        distance_pc=np.where(given, dist, 1000.0 / plx_eq),
        flags=flags,
    )
