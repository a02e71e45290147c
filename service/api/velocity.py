"""POST /v1/velocity and POST /v1/velocity/observables: stellar space velocities.

``/v1/velocity`` turns astrometry and radial velocity into velocities: transverse, radial
and total, U V W (heliocentric and relative to the local standard of rest) with their
uncertainties, perspective acceleration and closest approach to the Sun.
``/v1/velocity/observables`` is the inverse: the proper motion and radial velocity a star
with given U V W, place and distance must show.
"""

from __future__ import annotations

import itertools

import marshmallow as ma
import numpy as np
from flask import current_app
from flask_smorest import abort

from ..core import kinematics as core
from ..core.constants import C_KM_S
from ..core.flags import (
    PARALLAX_IMPLAUSIBLE_MEANING,
    PROPER_MOTION_IMPLAUSIBLE_MEANING,
    RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
    flag_names,
)
from ..core.propagation import AT_POLE_RAD
from .common import (
    PARALLAX_WARNING,
    PROPER_MOTION_WARNING,
    RADIAL_VELOCITY_WARNING,
    WARNINGS_LIMIT_TEXT,
    Blueprint,
    Choice,
    EpochField,
    EpochOutSchema,
    StrictBoolean,
    StrictFloat,
    always_present,
    epochs_out,
    flag_meanings_field,
    flag_warnings,
    flags_field,
    id_field,
    index_field,
    layout_field,
    number_field,
    proper_motion_field,
    star_count_field,
    units_field,
)
from .examples import load_example
from .observability import count_stars
from .tables import (
    MAX_ABS_MAS,
    MAX_DISTANCE_PC,
    MIN_DISTANCE_PC,
    IgnoredColumnsField,
    RowCheck,
    StarTableField,
)

blp = Blueprint(
    "velocity",
    __name__,
    url_prefix="/v1",
    description="Space velocities of stars: transverse, radial, total, galactic U V W with "
    "uncertainties, perspective acceleration, closest approach; and the inverse.",
)

#: Most Monte Carlo samples (stars drawn x draws per star) in one request; beyond: 413.
MAX_MONTE_CARLO_SAMPLES = 20_000_000

UVW_CONVENTION = (
    "U points towards the Galactic centre, V in the direction of Galactic rotation, W towards "
    "the north Galactic pole (right-handed). Heliocentric: velocity relative to the Sun. "
    "Galactic axes of the Hipparcos Catalogue (ESA 1997, Vol. 1, section 1.5.3), method of "
    "Johnson & Soderblom (1987, AJ 93, 864) carried out in the ICRS. LSR: the Sun's motion "
    "relative to the local standard of rest is added (default Schoenrich, Binney & Dehnen "
    "2010: U, V, W = 11.1, 12.24, 7.25 km/s)."
)

# ---------------------------------------------------------------------------- the stars

_PARAMS = ("ra", "dec", "parallax", "pm_ra", "pm_dec", "radial_velocity")
_CORRELATION_FIELDS = tuple(
    f"correlation_{_PARAMS[i]}_{_PARAMS[j]}" for i, j in itertools.combinations(range(6), 2)
)
#: Correlations among the astrometric parameters that enter the velocities.
_USED_CORRELATIONS = (
    "correlation_parallax_pm_ra",
    "correlation_parallax_pm_dec",
    "correlation_pm_ra_pm_dec",
)
#: Correlations of the radial velocity that enter them (those with the position do not).
_RV_CORRELATIONS = (
    "correlation_parallax_radial_velocity",
    "correlation_pm_ra_radial_velocity",
    "correlation_pm_dec_radial_velocity",
)


_num = number_field


_POSITION_ERROR_NOTE = (
    " Accepted so that catalogue records can be sent unchanged; not used: position errors "
    "change the velocities by about their size in radians (5e-9 of the speed per mas)."
)

_VELOCITY_STAR_FIELDS = {
    "id": ma.fields.Raw(
        allow_none=True,
        metadata={"description": "Your identifier for the star (string or integer), echoed."},
    ),
    "ra_deg": _num("ICRS right ascension, degrees.", required=True, lo=0.0, hi=360.0),
    "dec_deg": _num("ICRS declination, degrees.", required=True, lo=-90.0, hi=90.0),
    "parallax_mas": _num(
        "Parallax, mas. Null if unknown; zero or negative values are accepted, flagged, and "
        "give null velocities (no distance); values above 1,000 mas (nearer than any known "
        "star) are computed as given and flagged parallax_implausible.",
        lo=-MAX_ABS_MAS,
        hi=MAX_ABS_MAS,
    ),
    "distance_pc": _num(
        "Distance, pc, when you have a better one than 1/parallax (e.g. a prior-based "
        "estimate). Replaces the parallax where given.",
        lo=MIN_DISTANCE_PC,
        hi=MAX_DISTANCE_PC,
    ),
    "pm_ra_cosdec_mas_yr": proper_motion_field(
        "Proper motion in right ascension times cos(dec), mas/yr.",
        lo=-MAX_ABS_MAS,
        hi=MAX_ABS_MAS,
    ),
    "pm_dec_mas_yr": proper_motion_field(
        "Proper motion in declination, mas/yr.",
        lo=-MAX_ABS_MAS,
        hi=MAX_ABS_MAS,
    ),
    "radial_velocity_km_s": _num(
        "Radial velocity, km/s, positive receding. Null if unknown (then U, V, W and the "
        "total velocity are null; the transverse velocity is still given).",
        lo=-C_KM_S,
        hi=C_KM_S,
        min_inclusive=False,
        max_inclusive=False,
    ),
    "ra_error_mas": _num(
        "Standard error of ra*cos(dec), mas." + _POSITION_ERROR_NOTE, lo=0.0, hi=MAX_ABS_MAS
    ),
    "dec_error_mas": _num(
        "Standard error of dec, mas." + _POSITION_ERROR_NOTE, lo=0.0, hi=MAX_ABS_MAS
    ),
    "parallax_error_mas": _num("Standard error of the parallax, mas.", lo=0.0, hi=MAX_ABS_MAS),
    "distance_error_pc": _num(
        "Standard error of distance_pc, pc (taken as uncorrelated with the proper motions and "
        "the radial velocity: the parallax correlations do not apply to it).",
        lo=0.0,
        hi=MAX_DISTANCE_PC,
    ),
    "pm_ra_cosdec_error_mas_yr": _num(
        "Standard error of pm_ra_cosdec, mas/yr.", lo=0.0, hi=MAX_ABS_MAS
    ),
    "pm_dec_error_mas_yr": _num("Standard error of pm_dec, mas/yr.", lo=0.0, hi=MAX_ABS_MAS),
    "radial_velocity_error_km_s": _num(
        "Standard error of the radial velocity, km/s.", lo=0.0, hi=C_KM_S
    ),
}
for _name in _CORRELATION_FIELDS:
    _VELOCITY_STAR_FIELDS[_name] = _num(
        "Correlation coefficient of the errors named in the field, dimensionless, -1 to 1. "
        + (
            "Null or absent: taken as 0. A star with standard errors but none of "
            "correlation_parallax_pm_ra, correlation_parallax_pm_dec and "
            "correlation_pm_ra_pm_dec is flagged correlations_assumed_zero."
            if _name in _USED_CORRELATIONS
            else "Null or absent: taken as 0 (a covariance propagated to another epoch has "
            "these, through the perspective acceleration)."
            if _name in _RV_CORRELATIONS
            else "Accepted so that catalogue records can be sent unchanged; not used "
            "(position errors change the velocities by about their size in radians, 5e-9 "
            "of the speed per mas)."
        ),
        lo=-1.0,
        hi=1.0,
    )

#: One star's astrometry for the velocity endpoint.
VelocityStarSchema = ma.Schema.from_dict(_VELOCITY_STAR_FIELDS, name="VelocityStarSchema")


#: Message on a star whose correlations cannot all hold at once.
_NOT_POSITIVE_SEMIDEFINITE = (
    "the correlations of parallax, proper motions and radial velocity do not form a "
    "positive semi-definite matrix (they cannot all hold at once)"
)


def _impossible_correlations(table, usable):
    """RowCheck of the star table: the stars whose correlations cannot hold together (not
    positive semi-definite; core.correlations_inconsistent, which flags them in batch
    runs)."""
    names = (*_USED_CORRELATIONS, *_RV_CORRELATIONS)
    if not table.given.intersection(names):
        return []
    rows = np.flatnonzero(usable)
    c = table.columns
    bad = core.correlations_inconsistent(*(c[name][rows] for name in names))
    return [(rows[bad], "correlation_*", _NOT_POSITIVE_SEMIDEFINITE)]


#: The checks of each star's values together, run with the star table's own.
_STAR_CHECKS = (RowCheck((*_USED_CORRELATIONS, *_RV_CORRELATIONS), _impossible_correlations),)


def _solar_motion_needs_lsr(data) -> None:
    """A request schema's check: solar_motion only with relative_to_lsr true (ignored, it
    would leave U, V, W meant relative to the LSR taken as heliocentric)."""
    if data.get("solar_motion") is not None and data.get("relative_to_lsr") is False:
        raise ma.ValidationError(
            "is used only with relative_to_lsr true; give both, or neither", "solar_motion"
        )


class SolarMotionSchema(ma.Schema):
    u_km_s = StrictFloat(
        required=True,
        allow_nan=False,
        validate=ma.validate.Range(min=-C_KM_S, max=C_KM_S),
        metadata={"description": "Sun's velocity relative to the LSR towards the Galactic "
                  "centre, km/s."},
    )  # fmt: skip
    v_km_s = StrictFloat(
        required=True,
        allow_nan=False,
        validate=ma.validate.Range(min=-C_KM_S, max=C_KM_S),
        metadata={"description": "Sun's velocity relative to the LSR in the direction of "
                  "Galactic rotation, km/s."},
    )  # fmt: skip
    w_km_s = StrictFloat(
        required=True,
        allow_nan=False,
        validate=ma.validate.Range(min=-C_KM_S, max=C_KM_S),
        metadata={"description": "Sun's velocity relative to the LSR towards the north "
                  "Galactic pole, km/s."},
    )  # fmt: skip


_SOLAR_MOTION_DESCRIPTION = (
    "Sun's velocity relative to the local standard of rest; only with relative_to_lsr true. "
    "Default: Schoenrich, Binney & Dehnen 2010 (MNRAS 403, 1829): U, V, W = 11.1, 12.24, "
    "7.25 km/s."
)


class VelocityRequestSchema(ma.Schema):
    stars = StarTableField(
        VelocityStarSchema,
        checks=_STAR_CHECKS,
        required=True,
        metadata={"description": "The stars: a list of records, or an object of columns."},
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        load_default=None,
        allow_none=True,
        metadata={
            "description": "Epoch of the astrometry; only used to date the closest approach "
            "(closest_approach_epoch_jyear is null without it). " + "Any accepted epoch form."
        },
    )
    relative_to_lsr = StrictBoolean(
        load_default=False,
        metadata={"description": "Also give U, V, W relative to the local standard of rest."},
    )
    solar_motion = ma.fields.Nested(
        SolarMotionSchema, load_default=None, metadata={"description": _SOLAR_MOTION_DESCRIPTION}
    )
    uncertainty_method = Choice(
        ("linear", "monte_carlo", "auto"),
        load_default="linear",
        metadata={
            "description": "linear: first-order propagation of the covariance (exact for "
            "U, V, W as functions of the proper motion and radial velocity; poor where the "
            "parallax signal-to-noise is low). monte_carlo: random draws for every star with "
            "a distance. auto: draws only for stars flagged parallax_low_snr."
        },
    )
    monte_carlo_draws = ma.fields.Integer(
        strict=True,  # 2.5 is refused, not truncated to 2
        load_default=core.MONTE_CARLO_DRAWS_DEFAULT,
        validate=ma.validate.Range(min=100, max=1_000_000),
        metadata={
            "description": "Number of draws per star for the Monte Carlo method. At most "
            f"{MAX_MONTE_CARLO_SAMPLES:,} samples (stars drawn x draws) per request; more is "
            "refused with 413."
        },
    )
    seed = ma.fields.Integer(
        strict=True,  # 2.5 is refused, not truncated to 2
        load_default=None,
        allow_none=True,
        validate=ma.validate.Range(min=0, max=2**63 - 1),
        metadata={
            "description": "Seed of the Monte Carlo draws, a whole number (dimensionless): "
            "the same seed and request give the same answer. Null or absent: a fresh seed "
            "each request."
        },
    )
    low_snr_threshold = StrictFloat(
        load_default=None,
        allow_none=True,
        allow_nan=False,
        validate=ma.validate.Range(min=0.0, max=1e6, min_inclusive=False),
        metadata={
            "description": "Parallax signal-to-noise (parallax / its standard error, "
            "dimensionless) below which a star is flagged "
            "parallax_low_snr (1/parallax is then a biased distance). Default (absent or "
            "null): the service's setting SKYDRIFT_LOW_PARALLAX_SNR, 5 (common practice) "
            "unless its operator chose another."
        },
    )
    layout = Choice(
        ("records", "columns"),
        load_default=None,
        allow_none=True,
        metadata={
            "description": "Response layout: one record per star, or columns. Default: "
            "the layout of the request's stars."
        },
    )

    @ma.validates_schema(skip_on_field_errors=False)
    def _solar_motion_with_lsr(self, data, **kwargs):
        _solar_motion_needs_lsr(data)


# ---------------------------------------------------------------------------- responses

#: Output quantities in order, with their units (the response's ``units`` object).
VELOCITY_OUTPUTS = {
    "distance_pc": "pc",
    "parallax_snr": "dimensionless (parallax / parallax error)",
    "pm_total_mas_yr": "mas/yr",
    "pm_position_angle_deg": "deg, east of north, 0 to 360",
    "transverse_velocity_km_s": "km/s",
    "transverse_velocity_ra_km_s": "km/s (towards east)",
    "transverse_velocity_dec_km_s": "km/s (towards north)",
    "radial_velocity_km_s": "km/s (positive receding)",
    "total_velocity_km_s": "km/s",
    "velocity_line_of_sight_angle_deg": "deg, 0 receding along the line of sight, 180 approaching",
    "u_km_s": "km/s (heliocentric, towards the Galactic centre)",
    "v_km_s": "km/s (heliocentric, direction of Galactic rotation)",
    "w_km_s": "km/s (heliocentric, towards the north Galactic pole)",
    "u_lsr_km_s": "km/s (relative to the LSR)",
    "v_lsr_km_s": "km/s (relative to the LSR)",
    "w_lsr_km_s": "km/s (relative to the LSR)",
    "u_error_km_s": "km/s",
    "v_error_km_s": "km/s",
    "w_error_km_s": "km/s",
    "correlation_u_v": "dimensionless",
    "correlation_u_w": "dimensionless",
    "correlation_v_w": "dimensionless",
    "u_interval_km_s": "km/s, [15.87th, 84.13th] percentile (-1 and +1 sigma)",
    "v_interval_km_s": "km/s, [15.87th, 84.13th] percentile (-1 and +1 sigma)",
    "w_interval_km_s": "km/s, [15.87th, 84.13th] percentile (-1 and +1 sigma)",
    "transverse_velocity_error_km_s": "km/s",
    "total_velocity_error_km_s": "km/s",
    "pm_ra_cosdec_rate_mas_yr2": "mas/yr^2",
    "pm_dec_rate_mas_yr2": "mas/yr^2",
    "pm_total_rate_mas_yr2": "mas/yr^2",
    "radial_velocity_rate_km_s_yr": "km/s per Julian year",
    "closest_approach_time_yr": "Julian years from the catalogue epoch",
    "closest_approach_epoch_jyear": "Julian epoch (TDB)",
    "closest_approach_distance_pc": "pc",
    "closest_approach_speed_km_s": "km/s",
    "closest_approach_pm_mas_yr": "mas/yr",
    "closest_approach_parallax_mas": "mas",
}

_OUTPUT_DESCRIPTIONS = {
    "distance_pc": "Distance used: distance_pc if given, else 1000/parallax.",
    "parallax_snr": "Parallax signal-to-noise, parallax / its standard error "
    "(dimensionless); null without a parallax error (uncertainties_missing, or with "
    "parallax_not_positive or parallax_too_small), where distance_pc replaces the parallax "
    "(distance_given), or where the parallax error is zero (parallax_error_zero).",
    "pm_total_mas_yr": "Total proper motion, mas/yr.",
    "pm_position_angle_deg": "Position angle of the proper motion, degrees east of north; "
    "null without proper motion (proper_motion_zero).",
    "transverse_velocity_km_s": "Transverse velocity A*mu/parallax, km/s (A = 1 au per "
    "Julian year = 4.740470463533348 km/s, IAU 2012 au).",
    "transverse_velocity_ra_km_s": "Transverse velocity towards east, km/s.",
    "transverse_velocity_dec_km_s": "Transverse velocity towards north, km/s.",
    "radial_velocity_km_s": "Radial velocity (as given), km/s.",
    "total_velocity_km_s": "Total space velocity relative to the Sun, km/s.",
    "velocity_line_of_sight_angle_deg": "Angle between the space velocity and the outward "
    "line of sight, degrees (0 receding, 90 transverse, 180 approaching); null for a star "
    "at rest relative to the Sun.",
    "u_km_s": "Heliocentric U, km/s.",
    "v_km_s": "Heliocentric V, km/s.",
    "w_km_s": "Heliocentric W, km/s.",
    "u_lsr_km_s": "U relative to the LSR, km/s (only with relative_to_lsr).",
    "v_lsr_km_s": "V relative to the LSR, km/s (only with relative_to_lsr).",
    "w_lsr_km_s": "W relative to the LSR, km/s (only with relative_to_lsr).",
    "u_error_km_s": "Standard error of U, km/s (also of U relative to the LSR).",
    "v_error_km_s": "Standard error of V, km/s.",
    "w_error_km_s": "Standard error of W, km/s.",
    "correlation_u_v": "Correlation coefficient of the errors of U and V, dimensionless.",
    "correlation_u_w": "Correlation coefficient of the errors of U and W, dimensionless.",
    "correlation_v_w": "Correlation coefficient of the errors of V and W, dimensionless.",
    "u_interval_km_s": "-1 and +1 sigma bounds of U, km/s: Monte Carlo percentiles, or U -/+ "
    "its error for linear propagation.",
    "v_interval_km_s": "-1 and +1 sigma bounds of V, km/s.",
    "w_interval_km_s": "-1 and +1 sigma bounds of W, km/s.",
    "transverse_velocity_error_km_s": "Standard error of the transverse velocity, km/s; "
    "null with linear uncertainties where the proper motion is zero (proper_motion_zero).",
    "total_velocity_error_km_s": "Standard error of the total velocity, km/s.",
    "pm_ra_cosdec_rate_mas_yr2": "Rate of change of pm_ra_cosdec at the catalogue epoch, "
    "mas/yr^2 (straight-line model, as POST /v1/propagation moves the star): the perspective "
    "acceleration -2 mu_r pm_ra_cosdec plus tan(dec) pm_ra_cosdec pm_dec from the turning "
    "of the east and north directions along the path (mu_r = radial velocity / distance; "
    "in these products every rate in radians per year); null at a celestial pole (at_pole).",
    "pm_dec_rate_mas_yr2": "Rate of change of pm_dec at the catalogue epoch, mas/yr^2: the "
    "perspective acceleration -2 mu_r pm_dec minus tan(dec) pm_ra_cosdec^2 from the turning "
    "of the east and north directions; null at a celestial pole (at_pole).",
    "pm_total_rate_mas_yr2": "Rate of change of the total proper motion, mas/yr^2.",
    "radial_velocity_rate_km_s_yr": "Rate of change of the radial velocity, v_t^2/d, km/s per "
    "Julian year.",
    "closest_approach_time_yr": "Time of closest approach to the Sun from the catalogue "
    "epoch (negative: in the past), Julian years (straight-line model).",
    "closest_approach_epoch_jyear": "Epoch of closest approach, Julian epoch (TDB); null "
    "without catalogue_epoch.",
    "closest_approach_distance_pc": "Minimum distance from the Sun, pc.",
    "closest_approach_speed_km_s": "Speed relative to the Sun at closest approach, km/s.",
    "closest_approach_pm_mas_yr": "Total proper motion at closest approach, mas/yr: the "
    "largest the star shows (straight-line model); null for a star without transverse motion.",
    "closest_approach_parallax_mas": "Parallax at closest approach (1000 / minimum distance), "
    "mas: the largest; null for a star without transverse motion.",
}

#: What a star without a distance is answered with (flags parallax_missing,
#: parallax_not_positive, parallax_too_small).
_NO_DISTANCE_NULLS = (
    "the distance and every quantity that needs it are null: the transverse, total and U, V, "
    "W velocities and their errors, the line-of-sight angle, the proper-motion and "
    "radial-velocity rates and the closest approach; the total proper motion, its position "
    "angle and the radial velocity are given."
)

FLAG_MEANINGS = {
    "parallax_missing": "No parallax and no distance: " + _NO_DISTANCE_NULLS,
    "parallax_not_positive": "Parallax zero or negative: no distance; "
    + _NO_DISTANCE_NULLS
    + " parallax_snr is given where a parallax error is, null without one.",
    "parallax_too_small": "Parallax positive but too small for a distance (1000/parallax "
    "overflows, below about 5.6e-306 mas): " + _NO_DISTANCE_NULLS + " parallax_snr is given "
    "where a parallax error is, null without one.",
    "parallax_low_snr": "Parallax signal-to-noise below the threshold: 1/parallax is a biased "
    "distance and linear uncertainties are unreliable; prefer uncertainty_method auto or a "
    "better distance in distance_pc.",
    "radial_velocity_missing": "No radial velocity: U, V, W, total velocity, line-of-sight "
    "angle, proper-motion rates and closest approach are null; transverse velocity and "
    "radial-velocity rate (v_t^2/d) given.",
    "distance_given": "distance_pc used instead of the parallax; parallax_snr is null.",
    "uncertainties_missing": "Some needed standard error not given: uncertainties are null "
    "(and parallax_snr, without a parallax error). They need parallax_error_mas (or "
    "distance_error_pc with distance_pc), pm_ra_cosdec_error_mas_yr and "
    "pm_dec_error_mas_yr, and with a radial velocity radial_velocity_error_km_s.",
    "proper_motion_implausible": PROPER_MOTION_IMPLAUSIBLE_MEANING,
    "radial_velocity_implausible": RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
    "space_velocity_implausible": "Space velocity above half the speed of light (from the "
    "parallax or distance, proper motion and radial velocity; in the inverse, U, V, W as "
    "given): no star moves so fast; probably a unit mistake or an unusable parallax. "
    "Computed as given.",
    "parallax_implausible": PARALLAX_IMPLAUSIBLE_MEANING + " Computed as given; not set "
    "where distance_pc replaces the parallax.",
    "monte_carlo_uncertainties": "Uncertainties from Monte Carlo draws.",
    "correlations_inconsistent": "The correlations given cannot all hold at once (not "
    "positive semi-definite): uncertainties are null. Refused by this API; set in batch "
    "runs.",
    "correlations_assumed_zero": "Standard errors given without correlations: correlations "
    "taken as zero.",
    "proper_motion_zero": "Total proper motion exactly zero: no direction of motion, so "
    "pm_position_angle_deg, closest_approach_pm_mas_yr and closest_approach_parallax_mas are "
    "null. With linear uncertainties transverse_velocity_error_km_s is null: the derivative "
    "of the total proper motion is undefined at zero (the linear error's limit depends on "
    "the direction from which the motion approaches zero); uncertainty_method monte_carlo "
    "gives one. With a radial velocity of exactly zero too (at rest relative to the Sun) "
    "velocity_line_of_sight_angle_deg, closest_approach_time_yr, "
    "closest_approach_epoch_jyear, closest_approach_distance_pc and, with linear "
    "uncertainties, total_velocity_error_km_s are null as well.",
    "at_pole": f"At a celestial pole (within {AT_POLE_RAD:g} rad): east and north, and with them "
    "the proper-motion components and transverse_velocity_ra_km_s and "
    "transverse_velocity_dec_km_s, are those of the right ascension given; "
    "pm_ra_cosdec_rate_mas_yr2 and pm_dec_rate_mas_yr2 carry tan(dec), infinite there, and "
    "are null (pm_total_rate_mas_yr2 is given).",
    "parallax_error_zero": "Parallax error given as zero: parallax_snr is infinite "
    "(undefined for a zero parallax) and is null; not set where distance_pc replaces the "
    "parallax.",
}


#: The inverse answer's meanings, for the flags it raises (core.observables_from_velocity):
#: its answer has the distance, the proper motions and the radial velocity, no velocities
#: computed from a distance and no parallax_snr, so the forward texts do not fit it.
OBSERVABLES_FLAG_MEANINGS = {
    "parallax_missing": "No parallax and no distance: distance_pc, pm_ra_cosdec_mas_yr and "
    "pm_dec_mas_yr are null (they need a distance); radial_velocity_km_s needs none and is "
    "given.",
    "parallax_not_positive": "Parallax zero or negative: no distance; distance_pc, "
    "pm_ra_cosdec_mas_yr and pm_dec_mas_yr are null; radial_velocity_km_s is given.",
    "parallax_too_small": "Parallax positive but too small for a distance (1000/parallax "
    "overflows, below about 5.6e-306 mas): distance_pc is null; pm_ra_cosdec_mas_yr and "
    "pm_dec_mas_yr, proportional to the parallax, are given.",
    "distance_given": "distance_pc used instead of the parallax.",
    "space_velocity_implausible": "U, V, W as given make a speed above half the speed of "
    "light: no star moves so fast; probably a unit mistake (km/s). Computed as given.",
    "parallax_implausible": FLAG_MEANINGS["parallax_implausible"],
    "at_pole": f"At a celestial pole (within {AT_POLE_RAD:g} rad): east and north, and with them "
    "pm_ra_cosdec_mas_yr and pm_dec_mas_yr, are those of the right ascension given (the "
    "limit along that meridian); the total proper motion does not depend on it.",
}


def _float_list(description):
    return ma.fields.List(ma.fields.Float(allow_none=True), metadata={"description": description})


_RESULT_FIELDS = {
    "index": index_field(),
    "id": id_field(),
    "flags": flags_field(),
}
for _name, _desc in _OUTPUT_DESCRIPTIONS.items():
    if _name.endswith("_interval_km_s"):
        _RESULT_FIELDS[_name] = _float_list(_desc)
    else:
        _RESULT_FIELDS[_name] = ma.fields.Float(allow_none=True, metadata={"description": _desc})
VelocityResultSchema = always_present(
    ma.Schema.from_dict(_RESULT_FIELDS, name="VelocityResultSchema"),
    unless=("u_lsr_km_s", "v_lsr_km_s", "w_lsr_km_s"),  # only with relative_to_lsr
)


@always_present
class VelocityWarningSchema(ma.Schema):
    index = index_field()
    id = id_field()
    message = ma.fields.String(
        metadata={
            "description": "What looks wrong with the star, in words, and what to check; "
            "the star is computed as given."
        }
    )


@always_present(unless=("stars", "columns"))
class VelocityResponseSchema(ma.Schema):
    star_count = star_count_field()
    layout = layout_field()
    uvw_convention = ma.fields.String(metadata={"description": UVW_CONVENTION})
    solar_motion_km_s = ma.fields.List(
        ma.fields.Float(),
        allow_none=True,
        metadata={"description": "U, V, W of the Sun relative to the LSR used; null unless "
                  "relative_to_lsr."},
    )  # fmt: skip
    catalogue_epoch = ma.fields.Nested(
        EpochOutSchema,
        allow_none=True,
        metadata={"description": "Epoch of the astrometry; null when the request gave none."},
    )
    uncertainty_method = ma.fields.String(
        metadata={"description": "The uncertainty method used: linear, monte_carlo or auto."}
    )
    low_snr_threshold = ma.fields.Float(
        metadata={
            "description": "Parallax signal-to-noise threshold used for parallax_low_snr "
            "(dimensionless)."
        }
    )
    units = units_field()
    flag_meanings = flag_meanings_field()
    warnings = ma.fields.List(
        ma.fields.Nested(VelocityWarningSchema),
        metadata={"description": "Per-star warnings. " + WARNINGS_LIMIT_TEXT},
    )
    stars = ma.fields.List(
        ma.fields.Nested(VelocityResultSchema),
        metadata={"description": "layout=records: one entry per star."},
    )
    columns = ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.Raw(),
        metadata={"description": "layout=columns: one array per quantity, one value per star."},
    )


# ---------------------------------------------------------------------------- helpers


def _solar_motion(args):
    """The Sun's motion relative to the LSR: solar_motion (the request schema allows it
    only with relative_to_lsr), else Schoenrich, Binney & Dehnen 2010."""
    sm = args.get("solar_motion")
    if sm is None:
        return core.V_SUN_LSR_SCHOENRICH2010_KM_S
    return (sm["u_km_s"], sm["v_km_s"], sm["w_km_s"])


#: Flag of the API layer only, in a bit above those of the core.
_CORRELATIONS_ASSUMED_ZERO_BIT = 1 << 16


def _flag_lists(mask) -> tuple[list[list[str]], set[str]]:
    """Per-star lists of flag names, and the set of names used. Stars share one list per
    distinct mask (few distinct masks even in a million stars): much faster than one list
    per star."""
    uniq, inverse = np.unique(np.asarray(mask, dtype=np.int64), return_inverse=True)
    lists = []
    for m in uniq.tolist():
        names = list(flag_names([m & ~_CORRELATIONS_ASSUMED_ZERO_BIT], core.KinematicsFlag)[0])
        if m & _CORRELATIONS_ASSUMED_ZERO_BIT:
            names.append("correlations_assumed_zero")
        lists.append(names)
    used = {name for names in lists for name in names}
    return [lists[i] for i in inverse.ravel().tolist()], used


def _records(names, arrays, table, flags, n):
    """Columns -> list of per-star dicts (NaN is written as null by the JSON layer)."""
    lists = [a.tolist() for a in arrays]
    ids = table.ids
    out = []
    for i in range(n):
        rec = {"index": i, "id": None if ids is None else ids[i], "flags": flags[i]}
        rec.update(zip(names, (col[i] for col in lists), strict=True))
        out.append(rec)
    return out


#: Per-star warnings: flag -> message.
_WARNING_TEXTS = {
    core.KinematicsFlag.PROPER_MOTION_IMPLAUSIBLE: PROPER_MOTION_WARNING,
    core.KinematicsFlag.RADIAL_VELOCITY_IMPLAUSIBLE: RADIAL_VELOCITY_WARNING,
    core.KinematicsFlag.SPACE_VELOCITY_IMPLAUSIBLE: "parallax (or distance), proper motion "
    "and radial velocity imply a space velocity above half the speed of light: check the "
    "parallax and its unit (mas), or the distance (pc)",
    core.KinematicsFlag.PARALLAX_IMPLAUSIBLE: PARALLAX_WARNING,
}

#: Per-star warnings of the inverse (observables) answer.
_OBSERVABLES_WARNING_TEXTS = {
    core.KinematicsFlag.SPACE_VELOCITY_IMPLAUSIBLE: "space velocity (U, V, W) exceeds half "
    "the speed of light: check the unit (km/s)",
    core.KinematicsFlag.PARALLAX_IMPLAUSIBLE: PARALLAX_WARNING,
}


# ---------------------------------------------------------------------------- views


@blp.route("/velocity", methods=["POST"])
@blp.doc(operationId="computeVelocities")
@blp.arguments(VelocityRequestSchema(), example=load_example("velocity_request.json"))
@blp.response(200, VelocityResponseSchema)
def velocity(args):
    """Velocities of stars from their astrometry.

    For each star: transverse velocity (and its east and north components), radial and total
    velocity, position angle of the proper motion, angle between the space velocity and the
    line of sight, galactic U, V, W (heliocentric, and relative to the local standard of rest
    on request) with standard errors and correlations from the full parallax and
    proper-motion covariance plus the radial-velocity error and its correlations (linear
    propagation, or Monte Carlo draws where the parallax is too noisy for it), perspective
    acceleration, and the closest approach to the Sun. Stars without a usable distance or
    radial velocity get null values and flags, never an error for the whole batch.
    """
    table = args["stars"]
    n = table.size
    method = args["uncertainty_method"]
    draws = args["monte_carlo_draws"]
    c = table.columns
    if args["low_snr_threshold"] is None:  # the operator's default
        low_snr = current_app.config["SKYDRIFT_SETTINGS"].low_parallax_snr
        args = {**args, "low_snr_threshold": low_snr}
    drawn = int(
        np.count_nonzero(
            core.monte_carlo_stars(
                c["parallax_mas"],
                c["parallax_error_mas"],
                c["distance_pc"],
                method,
                args["low_snr_threshold"],
            )
        )
    )
    if drawn * draws > MAX_MONTE_CARLO_SAMPLES:
        abort(
            413,
            errors=[
                {
                    "field": "monte_carlo_draws",
                    "message": f"{drawn} stars drawn x {draws} draws exceeds the limit of "
                    f"{MAX_MONTE_CARLO_SAMPLES} samples per request; use fewer draws or fewer "
                    "stars" + (", or uncertainty_method auto" if method == "monte_carlo" else ""),
                }
            ],
        )
    errs_given = np.isfinite(c["parallax_error_mas"]) | np.isfinite(c["distance_error_pc"])
    errs_given |= np.isfinite(c["pm_ra_cosdec_error_mas_yr"])
    corr_given = np.zeros(n, dtype=bool)
    for name in _USED_CORRELATIONS:
        corr_given |= np.isfinite(c[name])
    sun = _solar_motion(args)
    result = core.space_velocity(
        c["ra_deg"],
        c["dec_deg"],
        c["parallax_mas"],
        c["pm_ra_cosdec_mas_yr"],
        c["pm_dec_mas_yr"],
        c["radial_velocity_km_s"],
        distance_pc=c["distance_pc"],
        parallax_error_mas=c["parallax_error_mas"],
        pm_ra_cosdec_error_mas_yr=c["pm_ra_cosdec_error_mas_yr"],
        pm_dec_error_mas_yr=c["pm_dec_error_mas_yr"],
        parallax_pm_ra_cosdec_corr=np.nan_to_num(c["correlation_parallax_pm_ra"], nan=0.0),
        parallax_pm_dec_corr=np.nan_to_num(c["correlation_parallax_pm_dec"], nan=0.0),
        pm_ra_cosdec_pm_dec_corr=np.nan_to_num(c["correlation_pm_ra_pm_dec"], nan=0.0),
        radial_velocity_error_km_s=c["radial_velocity_error_km_s"],
        parallax_radial_velocity_corr=np.nan_to_num(
            c["correlation_parallax_radial_velocity"], nan=0.0
        ),
        pm_ra_cosdec_radial_velocity_corr=np.nan_to_num(
            c["correlation_pm_ra_radial_velocity"], nan=0.0
        ),
        pm_dec_radial_velocity_corr=np.nan_to_num(c["correlation_pm_dec_radial_velocity"], nan=0.0),
        distance_error_pc=c["distance_error_pc"],
        epoch_jyear=np.nan if args["catalogue_epoch"] is None else args["catalogue_epoch"],
        relative_to_lsr=args["relative_to_lsr"],
        solar_motion_km_s=sun,
        low_snr_threshold=args["low_snr_threshold"],
        uncertainty_method=method,
        monte_carlo_draws=draws,
        seed=args["seed"],
    )
    mask = result.flags.astype(np.int64)
    mask |= (errs_given & ~corr_given) * _CORRELATIONS_ASSUMED_ZERO_BIT
    names, used = _flag_lists(mask)

    err = result.uvw_error_km_s
    corr = result.uvw_correlation
    interval = result.uvw_interval_km_s
    columns = {
        "distance_pc": result.distance_pc,
        "parallax_snr": result.parallax_snr,
        "pm_total_mas_yr": result.pm_total_mas_yr,
        "pm_position_angle_deg": result.pm_position_angle_deg,
        "transverse_velocity_km_s": result.transverse_velocity_km_s,
        "transverse_velocity_ra_km_s": result.transverse_velocity_ra_km_s,
        "transverse_velocity_dec_km_s": result.transverse_velocity_dec_km_s,
        "radial_velocity_km_s": result.radial_velocity_km_s,
        "total_velocity_km_s": result.total_velocity_km_s,
        "velocity_line_of_sight_angle_deg": result.velocity_line_of_sight_angle_deg,
        "u_km_s": result.uvw_km_s[:, 0],
        "v_km_s": result.uvw_km_s[:, 1],
        "w_km_s": result.uvw_km_s[:, 2],
    }
    if result.uvw_lsr_km_s is not None:
        columns["u_lsr_km_s"] = result.uvw_lsr_km_s[:, 0]
        columns["v_lsr_km_s"] = result.uvw_lsr_km_s[:, 1]
        columns["w_lsr_km_s"] = result.uvw_lsr_km_s[:, 2]
    columns.update(
        u_error_km_s=err[:, 0],
        v_error_km_s=err[:, 1],
        w_error_km_s=err[:, 2],
        correlation_u_v=corr[:, 0],
        correlation_u_w=corr[:, 1],
        correlation_v_w=corr[:, 2],
        u_interval_km_s=interval[:, 0, :],
        v_interval_km_s=interval[:, 1, :],
        w_interval_km_s=interval[:, 2, :],
        transverse_velocity_error_km_s=result.transverse_velocity_error_km_s,
        total_velocity_error_km_s=result.total_velocity_error_km_s,
        pm_ra_cosdec_rate_mas_yr2=result.pm_ra_cosdec_rate_mas_yr2,
        pm_dec_rate_mas_yr2=result.pm_dec_rate_mas_yr2,
        pm_total_rate_mas_yr2=result.pm_total_rate_mas_yr2,
        radial_velocity_rate_km_s_yr=result.radial_velocity_rate_km_s_yr,
        closest_approach_time_yr=result.closest_approach_time_yr,
        closest_approach_epoch_jyear=result.closest_approach_epoch_jyear,
        closest_approach_distance_pc=result.closest_approach_distance_pc,
        closest_approach_speed_km_s=result.closest_approach_speed_km_s,
        closest_approach_pm_mas_yr=result.closest_approach_pm_mas_yr,
        closest_approach_parallax_mas=result.closest_approach_parallax_mas,
    )
    layout = args["layout"] or table.form
    body = {
        "star_count": n,
        "layout": layout,
        "uvw_convention": UVW_CONVENTION,
        "solar_motion_km_s": list(sun) if args["relative_to_lsr"] else None,
        "catalogue_epoch": None
        if args["catalogue_epoch"] is None
        else epochs_out([args["catalogue_epoch"]])[0],
        "uncertainty_method": method,
        "low_snr_threshold": args["low_snr_threshold"],
        "units": {k: v for k, v in VELOCITY_OUTPUTS.items() if k in columns},
        "flag_meanings": {k: v for k, v in FLAG_MEANINGS.items() if k in used},
        "warnings": flag_warnings(result.flags, table, _WARNING_TEXTS),
    }
    if layout == "columns":
        contiguous = {k: np.ascontiguousarray(v) for k, v in columns.items()}
        body["columns"] = {"id": table.ids, "flags": names, **contiguous}
    else:
        body["stars"] = _records(list(columns), list(columns.values()), table, names, n)
    count_stars("/v1/velocity", n)
    return current_app.json.response(body)


# ---------------------------------------------------------------------------- inverse

_OBSERVABLES_STAR_FIELDS = {
    "id": _VELOCITY_STAR_FIELDS["id"],
    "ra_deg": _num("ICRS right ascension, degrees.", required=True, lo=0.0, hi=360.0),
    "dec_deg": _num("ICRS declination, degrees.", required=True, lo=-90.0, hi=90.0),
    "u_km_s": _num("U (towards the Galactic centre), km/s.", required=True, lo=-C_KM_S, hi=C_KM_S),
    "v_km_s": _num(
        "V (direction of Galactic rotation), km/s.", required=True, lo=-C_KM_S, hi=C_KM_S
    ),
    "w_km_s": _num(
        "W (towards the north Galactic pole), km/s.", required=True, lo=-C_KM_S, hi=C_KM_S
    ),
    "parallax_mas": _num(
        "Parallax, mas. Null if unknown (then only the radial velocity is given); zero or "
        "negative is flagged, and so is a value above 1,000 mas (parallax_implausible: nearer "
        "than any known star).",
        lo=-MAX_ABS_MAS,
        hi=MAX_ABS_MAS,
    ),
    "distance_pc": _num(
        "Distance, pc; replaces the parallax where given.",
        lo=MIN_DISTANCE_PC,
        hi=MAX_DISTANCE_PC,
    ),
}
ObservablesStarSchema = ma.Schema.from_dict(_OBSERVABLES_STAR_FIELDS, name="ObservablesStarSchema")


class ObservablesRequestSchema(ma.Schema):
    stars = StarTableField(
        ObservablesStarSchema,
        required=True,
        metadata={"description": "The stars: a list of records, or an object of columns."},
    )
    ignored_columns = IgnoredColumnsField()
    relative_to_lsr = StrictBoolean(
        load_default=False,
        metadata={
            "description": "The given U, V, W are relative to the local standard of rest "
            "(else heliocentric)."
        },
    )
    solar_motion = ma.fields.Nested(
        SolarMotionSchema, load_default=None, metadata={"description": _SOLAR_MOTION_DESCRIPTION}
    )
    layout = VelocityRequestSchema._declared_fields["layout"]

    @ma.validates_schema(skip_on_field_errors=False)
    def _solar_motion_with_lsr(self, data, **kwargs):
        _solar_motion_needs_lsr(data)


OBSERVABLES_OUTPUTS = {
    "distance_pc": "pc",
    "pm_ra_cosdec_mas_yr": "mas/yr (includes cos(dec))",
    "pm_dec_mas_yr": "mas/yr",
    "radial_velocity_km_s": "km/s (positive receding)",
}

ObservablesResultSchema = always_present(
    ma.Schema.from_dict(
        {
            "index": _RESULT_FIELDS["index"],
            "id": _RESULT_FIELDS["id"],
            "flags": _RESULT_FIELDS["flags"],
            "distance_pc": ma.fields.Float(
                allow_none=True,
                metadata={
                    "description": "Distance used, pc: distance_pc if given, else "
                    "1000/parallax; null without either (or with a parallax not positive)."
                },
            ),
            "pm_ra_cosdec_mas_yr": ma.fields.Float(
                allow_none=True,
                metadata={
                    "description": "Proper motion in RA times cos(dec) the star must show, "
                    "mas/yr; null without a distance. At a celestial pole (at_pole) along the "
                    "east of the ra_deg given."
                },
            ),  # fmt: skip
            "pm_dec_mas_yr": ma.fields.Float(
                allow_none=True,
                metadata={
                    "description": "Proper motion in Dec, mas/yr; null without a distance. At a "
                    "celestial pole (at_pole) along the north of the ra_deg given."
                },
            ),
            "radial_velocity_km_s": ma.fields.Float(
                allow_none=True,
                metadata={"description": "Radial velocity, km/s (needs no distance)."},
            ),
        },
        name="ObservablesResultSchema",
    )
)


@always_present(unless=("stars", "columns"))
class ObservablesResponseSchema(ma.Schema):
    star_count = star_count_field()
    layout = layout_field()
    uvw_convention = ma.fields.String(metadata={"description": UVW_CONVENTION})
    solar_motion_km_s = VelocityResponseSchema._declared_fields["solar_motion_km_s"]
    units = units_field()
    flag_meanings = flag_meanings_field()
    warnings = ma.fields.List(
        ma.fields.Nested(VelocityWarningSchema),
        metadata={"description": "Per-star warnings. " + WARNINGS_LIMIT_TEXT},
    )
    stars = ma.fields.List(
        ma.fields.Nested(ObservablesResultSchema),
        metadata={"description": "layout=records: one entry per star."},
    )
    columns = ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.Raw(),
        metadata={
            "description": "layout=columns: id and flags, and one array per quantity, one "
            "value per star."
        },
    )


@blp.route("/velocity/observables", methods=["POST"])
@blp.doc(operationId="computeObservablesFromUvw")
@blp.arguments(
    ObservablesRequestSchema(), example=load_example("velocity_observables_request.json")
)
@blp.response(200, ObservablesResponseSchema)
def observables(args):
    """Proper motion and radial velocity implied by U, V, W.

    The inverse of POST /v1/velocity: from galactic U, V, W (heliocentric or relative to the
    local standard of rest), the position and the distance (or parallax), the proper motion
    and radial velocity the star must show. Useful to predict the astrometry of members of a
    moving group or to test a kinematic hypothesis. Without a distance only the radial
    velocity is given.
    """
    table = args["stars"]
    n = table.size
    c = table.columns
    sun = _solar_motion(args)
    uvw = np.stack([c["u_km_s"], c["v_km_s"], c["w_km_s"]], axis=-1)
    result = core.observables_from_velocity(
        c["ra_deg"],
        c["dec_deg"],
        uvw,
        c["parallax_mas"],
        distance_pc=c["distance_pc"],
        relative_to_lsr=args["relative_to_lsr"],
        solar_motion_km_s=sun,
    )
    names, used = _flag_lists(result.flags)
    columns = {
        "distance_pc": result.distance_pc,
        "pm_ra_cosdec_mas_yr": result.pm_ra_cosdec_mas_yr,
        "pm_dec_mas_yr": result.pm_dec_mas_yr,
        "radial_velocity_km_s": result.radial_velocity_km_s,
    }
    layout = args["layout"] or table.form
    body = {
        "star_count": n,
        "layout": layout,
        "uvw_convention": UVW_CONVENTION,
        "solar_motion_km_s": list(sun) if args["relative_to_lsr"] else None,
        "units": OBSERVABLES_OUTPUTS,
        "flag_meanings": {k: v for k, v in OBSERVABLES_FLAG_MEANINGS.items() if k in used},
        "warnings": flag_warnings(result.flags, table, _OBSERVABLES_WARNING_TEXTS),
    }
    if layout == "columns":
        contiguous = {k: np.ascontiguousarray(v) for k, v in columns.items()}
        body["columns"] = {"id": table.ids, "flags": names, **contiguous}
    else:
        body["stars"] = _records(list(columns), list(columns.values()), table, names, n)
    count_stars("/v1/velocity/observables", n)
    return current_app.json.response(body)


def register(app, api):
    api.spec.components.schema("VelocityStar", schema=VelocityStarSchema)
    api.spec.components.schema("ObservablesStar", schema=ObservablesStarSchema)
    api.register_blueprint(blp)
