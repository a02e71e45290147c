"""The batch jobs: the core's functions described for partition-wise runs.

Each job names its inputs (canonical field names with units), its outputs and its flags,
and wraps one core function so that a partition's arrays go in and columns come out. The
core function is called exactly as a user would call it on the whole catalogue, so results
do not depend on how the catalogue is partitioned (every core function is element-wise).
"""

from __future__ import annotations

import enum

import numpy as np

from ..core import constellations as _constellations
from ..core import kinematics as _kinematics
from ..core import propagation as _propagation
from ..core.constants import C_KM_S, MAX_ABS_MAS, MAX_DISTANCE_PC, MIN_DISTANCE_PC
from ..core.flags import (
    CONSTELLATION_AT_POLE_MEANING,
    PARALLAX_IMPLAUSIBLE_MEANING,
    PROPER_MOTION_IMPLAUSIBLE_MEANING,
    RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
)
from ..core.propagation import AT_POLE_RAD
from ..numbers import DECIMAL_TEXT, decimal
from .spec import (
    CATALOGUE_EPOCH_FIELD,
    FLAG_DTYPE,
    BatchInputError,
    BatchJob,
    InputField,
    OutputColumn,
    catalogue_epoch_record,
    catalogue_epoch_values,
    check_catalogue_epoch,
    epoch_record,
    parse_epoch_option,
)

# ---------------------------------------------------------------------------------------
# Shared input fields
# ---------------------------------------------------------------------------------------

RA = InputField("ra_deg", "deg", "ICRS right ascension", True, 0.0, 360.0)
DEC = InputField("dec_deg", "deg", "ICRS declination", True, -90.0, 90.0)
# Parallaxes, proper motions and distances are bounded as the API's star tables bound them
# (core.constants): beyond, the models overflow into answers that mean nothing.
PARALLAX = InputField(
    "parallax_mas",
    "mas",
    "parallax; NaN = unknown, zero or negative accepted and flagged",
    False,
    -MAX_ABS_MAS,
    MAX_ABS_MAS,
    placeholder=np.nan,
)
PM_RA = InputField(
    "pm_ra_cosdec_mas_yr",
    "mas/yr",
    "proper motion in right ascension times cos(dec)",
    True,
    -MAX_ABS_MAS,
    MAX_ABS_MAS,
)
PM_DEC = InputField(
    "pm_dec_mas_yr", "mas/yr", "proper motion in declination", True, -MAX_ABS_MAS, MAX_ABS_MAS
)
#: Proper motions where a star without them is taken as fixed (and flagged by the core).
PM_RA_OPTIONAL = InputField(
    PM_RA.name, PM_RA.unit, PM_RA.description + "; NaN = unknown", False, PM_RA.low,
    PM_RA.high, placeholder=np.nan,
)  # fmt: skip
PM_DEC_OPTIONAL = InputField(
    PM_DEC.name, PM_DEC.unit, PM_DEC.description + "; NaN = unknown", False, PM_DEC.low,
    PM_DEC.high, placeholder=np.nan,
)  # fmt: skip
RADIAL_VELOCITY = InputField(
    "radial_velocity_km_s",
    "km/s",
    "radial velocity, positive receding; NaN = unknown",
    False,
    -C_KM_S,
    C_KM_S,
    placeholder=np.nan,
)


def _optional(name, unit, description, low=-np.inf, high=np.inf):
    return InputField(name, unit, description, False, low, high, placeholder=np.nan)


def _float_outputs(rows) -> tuple[OutputColumn, ...]:
    return tuple(OutputColumn(name, "float64", unit, text) for name, unit, text in rows)


def _catalogue_epoch_option(parser, note: str = "") -> None:
    parser.add_argument(
        "--catalogue-epoch",
        help="epoch of the input astrometry, e.g. J2016.0, for every row; or map a per-row "
        f"column to catalogue_epoch_jyear{note}",
    )


# ---------------------------------------------------------------------------------------
# propagate
# ---------------------------------------------------------------------------------------

_PROPAGATED = (
    ("ra_deg", "deg", "ICRS right ascension at the target epoch"),
    ("dec_deg", "deg", "ICRS declination at the target epoch"),
    ("parallax_mas", "mas", "parallax at the target epoch (NaN where unknown)"),
    ("pm_ra_cosdec_mas_yr", "mas/yr", "proper motion in RA times cos(dec) at the target epoch"),
    ("pm_dec_mas_yr", "mas/yr", "proper motion in declination at the target epoch"),
    ("radial_velocity_km_s", "km/s", "radial velocity at the target epoch (NaN where unknown)"),
)

_PF = _propagation.PropagationFlag
PROPAGATION_FLAG_MEANINGS = {
    _PF.PARALLAX_MISSING: "No parallax: distance unknown, radial velocity not applied, "
    "parallax out unknown.",
    _PF.PARALLAX_NOT_POSITIVE: "Parallax zero or negative: no distance; radial velocity not "
    "applied; parallax out is the formal value (carried along by the standard model, as "
    "given by the light_time model).",
    _PF.RADIAL_VELOCITY_MISSING: "No radial velocity: taken as zero for the motion (no "
    "perspective acceleration); radial velocity out unknown.",
    _PF.PROPER_MOTION_IMPLAUSIBLE: PROPER_MOTION_IMPLAUSIBLE_MEANING,
    _PF.SPACE_VELOCITY_IMPLAUSIBLE: "Implied space velocity above half the speed of light: "
    "inconsistent inputs.",
    _PF.AT_POLE: f"At a celestial pole (within {AT_POLE_RAD:g} rad) at the catalogue epoch or "
    "the target epoch: right ascension, and the directions of the proper-motion components, "
    "are undefined there and taken from the right ascension given (or computed).",
    _PF.DISTANCE_REPLACED: "Light-time model: distance replaced by a minimum value (SOFA pmsafe).",
    _PF.NOT_CONVERGED: "Light-time model: iteration did not converge.",
    _PF.RADIAL_VELOCITY_UNCHANGED: "Radial velocity given without a usable parallax: passed "
    "through unchanged.",
    _PF.RADIAL_VELOCITY_IMPLAUSIBLE: RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
    _PF.UNCERTAINTIES_NONLINEAR: "Uncertainties propagated: their linear propagation fails "
    "(position error above 0.2 of the distance); not set by this job, which propagates no "
    "uncertainties.",
    _PF.PARALLAX_IMPLAUSIBLE: PARALLAX_IMPLAUSIBLE_MEANING + " Computed as given.",
}


def _propagate_compute(inputs: dict, params: dict) -> dict:
    result = _propagation.propagate(
        inputs["ra_deg"],
        inputs["dec_deg"],
        inputs["parallax_mas"],
        inputs["pm_ra_cosdec_mas_yr"],
        inputs["pm_dec_mas_yr"],
        inputs["radial_velocity_km_s"],
        catalogue_epoch_values(inputs, params),
        params["target_epoch_jyear"],
        model=params["model"],
    )
    ast = result.astrometry
    out = {name: getattr(ast, name) for name, _, _ in _PROPAGATED}
    out["propagation_flags"] = result.flags
    return out


def _propagate_options(parser) -> None:
    _catalogue_epoch_option(parser)
    parser.add_argument("--target-epoch", required=True, help="epoch to move the stars to")
    parser.add_argument(
        "--model",
        default="standard",
        type=str.lower,
        choices=_propagation.MODELS,
        help="motion model: standard (Hipparcos straight-line model) or light_time (SOFA "
        "pmsafe); default standard",
    )


def _propagate_params(args) -> tuple[dict, dict]:
    params = {
        "catalogue_epoch_jyear": parse_epoch_option(args.catalogue_epoch, "--catalogue-epoch"),
        "target_epoch_jyear": parse_epoch_option(args.target_epoch, "--target-epoch"),
        "model": args.model,
    }
    given = {"catalogue_epoch": args.catalogue_epoch, "target_epoch": args.target_epoch}
    return params, given


def _propagate_check(params: dict, mapping) -> dict:
    params = dict(params)
    params.setdefault("model", "standard")
    params.setdefault("catalogue_epoch_jyear", None)
    if params["model"] not in _propagation.MODELS:
        raise BatchInputError(
            f"unknown model {params['model']!r}; choose one of {_propagation.MODELS}"
        )
    if params.get("target_epoch_jyear") is None:
        raise BatchInputError("a target epoch is needed (--target-epoch)")
    check_catalogue_epoch(params, mapping, required=True)
    return params


def _propagate_describe(params: dict, mapping, given) -> dict:
    return {
        "model": params["model"],
        "catalogue_epoch": catalogue_epoch_record(params, mapping, given),
        "target_epoch": epoch_record(given.get("target_epoch"), params["target_epoch_jyear"]),
    }


PROPAGATE = BatchJob(
    name="propagate",
    summary="move every star's astrometry to one target epoch",
    fields=(RA, DEC, PARALLAX, PM_RA, PM_DEC, RADIAL_VELOCITY, CATALOGUE_EPOCH_FIELD),
    outputs=_float_outputs(_PROPAGATED)
    + (
        OutputColumn(
            "propagation_flags", FLAG_DTYPE, "bit mask", "PropagationFlag bits (see metadata)"
        ),
    ),
    flag_columns={"propagation_flags": (_PF, PROPAGATION_FLAG_MEANINGS)},
    compute=_propagate_compute,
    frames={"input": "ICRS", "output": "ICRS"},
    add_options=_propagate_options,
    params_from_args=_propagate_params,
    check_params=_propagate_check,
    describe_params=_propagate_describe,
)

# ---------------------------------------------------------------------------------------
# velocity
# ---------------------------------------------------------------------------------------

_VELOCITY_INPUTS = (
    RA,
    DEC,
    PARALLAX,
    _optional(
        "distance_pc",
        "pc",
        "distance; where finite it replaces 1000/parallax",
        MIN_DISTANCE_PC,
        MAX_DISTANCE_PC,
    ),  # fmt: skip
    PM_RA,
    PM_DEC,
    RADIAL_VELOCITY,
    _optional("parallax_error_mas", "mas", "standard error of the parallax", 0.0, MAX_ABS_MAS),
    _optional("distance_error_pc", "pc", "standard error of distance_pc", 0.0, MAX_DISTANCE_PC),
    _optional(
        "pm_ra_cosdec_error_mas_yr", "mas/yr", "standard error of pm_ra_cosdec", 0.0, MAX_ABS_MAS
    ),
    _optional("pm_dec_error_mas_yr", "mas/yr", "standard error of pm_dec", 0.0, MAX_ABS_MAS),
    _optional("radial_velocity_error_km_s", "km/s", "standard error of the radial velocity", 0.0),
    _optional(
        "correlation_parallax_pm_ra",
        "1",
        "correlation of the parallax and pm_ra_cosdec errors (NaN or absent: 0)",
        -1.0,
        1.0,
    ),
    _optional(
        "correlation_parallax_pm_dec",
        "1",
        "correlation of the parallax and pm_dec errors (NaN or absent: 0)",
        -1.0,
        1.0,
    ),
    _optional(
        "correlation_pm_ra_pm_dec",
        "1",
        "correlation of the pm_ra_cosdec and pm_dec errors (NaN or absent: 0)",
        -1.0,
        1.0,
    ),
    *(
        _optional(
            f"correlation_{name}_radial_velocity",
            "1",
            f"correlation of the {name} and radial velocity errors (NaN or absent: 0)",
            -1.0,
            1.0,
        )
        for name in ("parallax", "pm_ra", "pm_dec")
    ),
    CATALOGUE_EPOCH_FIELD,
)

_VELOCITIES = (
    ("distance_pc", "pc", "distance used: distance_pc if given, else 1000/parallax"),
    ("parallax_snr", "1", "parallax / parallax error (NaN without an error or with a zero one)"),
    ("pm_total_mas_yr", "mas/yr", "total proper motion"),
    ("pm_position_angle_deg", "deg", "position angle of the proper motion, east of north"),
    ("transverse_velocity_km_s", "km/s", "transverse velocity A mu / parallax"),
    ("transverse_velocity_ra_km_s", "km/s", "transverse velocity towards east"),
    ("transverse_velocity_dec_km_s", "km/s", "transverse velocity towards north"),
    ("total_velocity_km_s", "km/s", "total space velocity relative to the Sun"),
    (
        "velocity_line_of_sight_angle_deg",
        "deg",
        "angle between space velocity and outward line of sight (0 receding, 180 approaching)",
    ),
    ("u_km_s", "km/s", "heliocentric U, towards the Galactic centre"),
    ("v_km_s", "km/s", "heliocentric V, direction of Galactic rotation"),
    ("w_km_s", "km/s", "heliocentric W, towards the north Galactic pole"),
    ("u_lsr_km_s", "km/s", "U relative to the LSR"),
    ("v_lsr_km_s", "km/s", "V relative to the LSR"),
    ("w_lsr_km_s", "km/s", "W relative to the LSR"),
    ("u_error_km_s", "km/s", "standard error of U (also of U relative to the LSR)"),
    ("v_error_km_s", "km/s", "standard error of V"),
    ("w_error_km_s", "km/s", "standard error of W"),
    ("correlation_u_v", "1", "correlation coefficient of the errors of U and V"),
    ("correlation_u_w", "1", "correlation coefficient of the errors of U and W"),
    ("correlation_v_w", "1", "correlation coefficient of the errors of V and W"),
    ("transverse_velocity_error_km_s", "km/s", "standard error of the transverse velocity"),
    ("total_velocity_error_km_s", "km/s", "standard error of the total velocity"),
    ("pm_ra_cosdec_rate_mas_yr2", "mas/yr^2", "rate of change of pm_ra_cosdec"),
    ("pm_dec_rate_mas_yr2", "mas/yr^2", "rate of change of pm_dec"),
    ("pm_total_rate_mas_yr2", "mas/yr^2", "rate of change of the total proper motion"),
    ("radial_velocity_rate_km_s_yr", "km/s/yr", "rate of change of the radial velocity"),
    ("closest_approach_time_yr", "yr", "time of closest approach from the catalogue epoch"),
    ("closest_approach_epoch_jyear", "Julian epoch (TDB)", "epoch of closest approach"),
    ("closest_approach_distance_pc", "pc", "minimum distance from the Sun"),
    ("closest_approach_speed_km_s", "km/s", "speed relative to the Sun at closest approach"),
    ("closest_approach_pm_mas_yr", "mas/yr", "total proper motion at closest approach"),
    ("closest_approach_parallax_mas", "mas", "parallax at closest approach"),
)

_KF = _kinematics.KinematicsFlag
#: What a star without a distance is given (as the API's velocity answer says it).
_NO_DISTANCE_NANS = (
    "the distance and every quantity that needs it are NaN: the transverse, total and U, V, "
    "W velocities and their errors, the line-of-sight angle, the proper-motion and "
    "radial-velocity rates and the closest approach; the total proper motion, its position "
    "angle and the radial velocity are given."
)
VELOCITY_FLAG_MEANINGS = {
    _KF.PARALLAX_MISSING: "No parallax and no distance: " + _NO_DISTANCE_NANS,
    _KF.PARALLAX_NOT_POSITIVE: "Parallax zero or negative: no distance; "
    + _NO_DISTANCE_NANS
    + " parallax_snr is given where a parallax error is, NaN without one.",
    _KF.PARALLAX_TOO_SMALL: "Parallax positive but too small for a distance (1000/parallax "
    "overflows, below about 5.6e-306 mas): " + _NO_DISTANCE_NANS + " parallax_snr is given "
    "where a parallax error is, NaN without one.",
    _KF.PARALLAX_LOW_SNR: "Parallax signal-to-noise below the threshold: 1/parallax is a "
    "biased distance and linear uncertainties are unreliable.",
    _KF.RADIAL_VELOCITY_MISSING: "No radial velocity: U, V, W, total velocity, line-of-sight "
    "angle, proper-motion rates and closest approach are NaN; transverse velocity and "
    "radial-velocity rate (v_t^2/d) given.",
    _KF.DISTANCE_GIVEN: "distance_pc used instead of the parallax; parallax_snr is NaN.",
    _KF.UNCERTAINTIES_MISSING: "Some needed standard error not given: uncertainties NaN (and "
    "parallax_snr, without a parallax error).",
    _KF.PROPER_MOTION_IMPLAUSIBLE: PROPER_MOTION_IMPLAUSIBLE_MEANING,
    _KF.MONTE_CARLO_UNCERTAINTIES: "Uncertainties from Monte Carlo draws (not used in batch runs).",
    _KF.RADIAL_VELOCITY_IMPLAUSIBLE: RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
    _KF.SPACE_VELOCITY_IMPLAUSIBLE: "Space velocity from the parallax or distance, proper "
    "motion and radial velocity above half the speed of light: probably a unit mistake or "
    "an unusable parallax. Computed as given.",
    _KF.PARALLAX_IMPLAUSIBLE: PARALLAX_IMPLAUSIBLE_MEANING + " Computed as given; not set "
    "where distance_pc replaces the parallax.",
    _KF.CORRELATIONS_INCONSISTENT: "The correlations given cannot all hold at once (their "
    "matrix is not positive semi-definite): uncertainties NaN.",
    _KF.PROPER_MOTION_ZERO: "Total proper motion exactly zero: no direction of motion, so "
    "pm_position_angle_deg, closest_approach_pm_mas_yr and closest_approach_parallax_mas are "
    "NaN, and so is transverse_velocity_error_km_s (the derivative of the total proper motion "
    "is undefined at zero: the linear error's limit depends on the direction from which the "
    "motion approaches zero). With a radial velocity of exactly zero too (at rest relative "
    "to the Sun) velocity_line_of_sight_angle_deg, total_velocity_error_km_s, "
    "closest_approach_time_yr, closest_approach_epoch_jyear and closest_approach_distance_pc "
    "are NaN as well.",
    _KF.AT_POLE: f"At a celestial pole (within {AT_POLE_RAD:g} rad): "
    "east and north, and with them the "
    "proper-motion components and the transverse velocity's east and north parts, are those "
    "of the right ascension given; pm_ra_cosdec_rate_mas_yr2 and pm_dec_rate_mas_yr2 carry "
    "tan(dec), infinite there, and are NaN (pm_total_rate_mas_yr2 is given).",
    _KF.PARALLAX_ERROR_ZERO: "Parallax error given as zero: parallax_snr is infinite "
    "(undefined for a zero parallax) and is NaN; not set where distance_pc replaces the "
    "parallax.",
}

_CORRELATIONS = (
    "correlation_parallax_pm_ra",
    "correlation_parallax_pm_dec",
    "correlation_pm_ra_pm_dec",
    "correlation_parallax_radial_velocity",
    "correlation_pm_ra_radial_velocity",
    "correlation_pm_dec_radial_velocity",
)


def _velocity_compute(inputs: dict, params: dict) -> dict:
    corr = {name: np.nan_to_num(inputs[name], nan=0.0) for name in _CORRELATIONS}
    result = _kinematics.space_velocity(
        inputs["ra_deg"],
        inputs["dec_deg"],
        inputs["parallax_mas"],
        inputs["pm_ra_cosdec_mas_yr"],
        inputs["pm_dec_mas_yr"],
        inputs["radial_velocity_km_s"],
        distance_pc=inputs["distance_pc"],
        parallax_error_mas=inputs["parallax_error_mas"],
        pm_ra_cosdec_error_mas_yr=inputs["pm_ra_cosdec_error_mas_yr"],
        pm_dec_error_mas_yr=inputs["pm_dec_error_mas_yr"],
        parallax_pm_ra_cosdec_corr=corr["correlation_parallax_pm_ra"],
        parallax_pm_dec_corr=corr["correlation_parallax_pm_dec"],
        pm_ra_cosdec_pm_dec_corr=corr["correlation_pm_ra_pm_dec"],
        radial_velocity_error_km_s=inputs["radial_velocity_error_km_s"],
        parallax_radial_velocity_corr=corr["correlation_parallax_radial_velocity"],
        pm_ra_cosdec_radial_velocity_corr=corr["correlation_pm_ra_radial_velocity"],
        pm_dec_radial_velocity_corr=corr["correlation_pm_dec_radial_velocity"],
        distance_error_pc=inputs["distance_error_pc"],
        epoch_jyear=catalogue_epoch_values(inputs, params),
        relative_to_lsr=True,
        solar_motion_km_s=tuple(params["solar_motion_km_s"]),
        low_snr_threshold=params["low_snr_threshold"],
        uncertainty_method="linear",
    )
    return velocity_columns(result)


def velocity_columns(result) -> dict:
    """The velocity job's output columns from a :class:`~service.core.kinematics.SpaceVelocity`."""
    out = {name: getattr(result, name) for name, _, _ in _VELOCITIES if hasattr(result, name)}
    for k, axis in enumerate("uvw"):
        out[f"{axis}_km_s"] = result.uvw_km_s[..., k]
        out[f"{axis}_lsr_km_s"] = result.uvw_lsr_km_s[..., k]
        out[f"{axis}_error_km_s"] = result.uvw_error_km_s[..., k]
    corr = result.uvw_correlation
    for k, pair in enumerate(("u_v", "u_w", "v_w")):
        out[f"correlation_{pair}"] = corr[..., k]
    out["velocity_flags"] = result.flags
    return out


def _velocity_options(parser) -> None:
    _catalogue_epoch_option(parser, " (optional: only dates the closest approach)")
    parser.add_argument(
        "--low-snr-threshold",
        type=decimal,
        default=_kinematics.LOW_PARALLAX_SNR_DEFAULT,
        help="parallax signal-to-noise below which a star is flagged parallax_low_snr "
        f"(default {_kinematics.LOW_PARALLAX_SNR_DEFAULT:g})",
    )
    parser.add_argument(
        "--solar-motion",
        default=None,
        help="Sun's motion relative to the LSR as U,V,W in km/s (default Schoenrich, Binney "
        "& Dehnen 2010: {:g},{:g},{:g})".format(*_kinematics.V_SUN_LSR_SCHOENRICH2010_KM_S),
    )


def _velocity_params(args) -> tuple[dict, dict]:
    params = {
        "catalogue_epoch_jyear": parse_epoch_option(args.catalogue_epoch, "--catalogue-epoch"),
        "low_snr_threshold": args.low_snr_threshold,
    }
    if args.solar_motion is not None:
        parts = [x.strip() for x in args.solar_motion.split(",")]
        sun = [float(x) for x in parts] if all(DECIMAL_TEXT.match(x) for x in parts) else []
        if len(sun) != 3 or not all(np.isfinite(sun)):
            raise BatchInputError("--solar-motion: give three numbers U,V,W in km/s")
        params["solar_motion_km_s"] = sun
    return params, {"catalogue_epoch": args.catalogue_epoch}


def _velocity_check(params: dict, mapping) -> dict:
    params = dict(params)
    params.setdefault("catalogue_epoch_jyear", None)
    params.setdefault("low_snr_threshold", _kinematics.LOW_PARALLAX_SNR_DEFAULT)
    params.setdefault("solar_motion_km_s", list(_kinematics.V_SUN_LSR_SCHOENRICH2010_KM_S))
    if not np.isfinite(params["low_snr_threshold"]) or params["low_snr_threshold"] < 0:
        raise BatchInputError("--low-snr-threshold must be a non-negative number")
    check_catalogue_epoch(params, mapping, required=False)
    return params


def _velocity_describe(params: dict, mapping, given) -> dict:
    default_sun = list(_kinematics.V_SUN_LSR_SCHOENRICH2010_KM_S)
    return {
        "catalogue_epoch": catalogue_epoch_record(params, mapping, given),
        "uncertainty_method": "linear",
        "low_snr_threshold": params["low_snr_threshold"],
        "solar_motion_km_s": list(params["solar_motion_km_s"]),
        "solar_motion_source": (
            "Schoenrich, Binney & Dehnen 2010, MNRAS 403, 1829"
            if list(params["solar_motion_km_s"]) == default_sun
            else "given"
        ),
        "galactic_axes": "Hipparcos Catalogue (ESA 1997, Vol. 1, section 1.5.3)",
    }


VELOCITY = BatchJob(
    name="velocity",
    summary="space velocities, U V W (heliocentric and LSR) with uncertainties, for every star",
    fields=_VELOCITY_INPUTS,
    outputs=_float_outputs(_VELOCITIES)
    + (
        OutputColumn(
            "velocity_flags", FLAG_DTYPE, "bit mask", "KinematicsFlag bits (see metadata)"
        ),
    ),
    flag_columns={"velocity_flags": (_KF, VELOCITY_FLAG_MEANINGS)},
    compute=_velocity_compute,
    frames={"input": "ICRS", "output": "ICRS; U V W on the Hipparcos galactic axes"},
    add_options=_velocity_options,
    params_from_args=_velocity_params,
    check_params=_velocity_check,
    describe_params=_velocity_describe,
    epoch_dates_motion=False,  # the epoch only dates the closest approach
)

# ---------------------------------------------------------------------------------------
# constellations
# ---------------------------------------------------------------------------------------

_CF = _constellations.ConstellationFlag
CONSTELLATION_FLAG_MEANINGS = {
    _CF.NEAR_BOUNDARY: "Within the near-boundary distance of a boundary, or within the "
    "table's rounding of one.",
    _CF.TABLE_ROUNDING_AMBIGUOUS: "Within half a unit of the table's last digit of a "
    "boundary: the published table cannot decide.",
    _CF.REDUCTIONS_DISAGREE: "The FK4 and FK5 reductions to B1875.0 give different constellations.",
    _CF.PARALLAX_MISSING: "No parallax: motion applied as direction only (no "
    "perspective effects; radial velocity not used).",
    _CF.PARALLAX_NOT_POSITIVE: "Parallax zero or negative: no distance; motion applied as "
    "direction only, as without a parallax (radial velocity not used).",
    _CF.RADIAL_VELOCITY_MISSING: "No radial velocity: taken as zero for the motion.",
    _CF.PROPER_MOTION_MISSING: "No proper motion: the position was taken as fixed.",
    _CF.SEARCH_INCOMPLETE: "Crossing search stopped early (not used in batch runs).",
    _CF.AT_POLE: CONSTELLATION_AT_POLE_MEANING + " Set with --epoch (the motion is read only "
    "then).",
}

#: The propagation's implausible-input flags alone, with the same names and bit values, for
#: the constellations job's column of them (the API's constellation answers name them too).
ImplausibleInputFlag = enum.IntFlag(
    "ImplausibleInputFlag",
    [(m.name, int(m)) for m in _PF if m & _propagation.IMPLAUSIBLE_INPUT_FLAGS],
)
IMPLAUSIBLE_INPUT_FLAG_MEANINGS = {
    m: PROPAGATION_FLAG_MEANINGS[_PF[m.name]] for m in ImplausibleInputFlag
}

_MOTION_FIELDS = {
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
    CATALOGUE_EPOCH_FIELD.name,
}


def _abbreviations() -> tuple:
    return tuple(_constellations.boundary_table().abbreviations)


def _constellations_compute(inputs: dict, params: dict) -> dict:
    common = {
        "reduction": params["reduction"],
        "with_margin": True,
        "near_boundary_arcsec": params["near_boundary_arcsec"],
    }
    if params.get("epoch_jyear") is None:
        result = _constellations.locate(inputs["ra_deg"], inputs["dec_deg"], **common)
    else:
        result = _constellations.locate_moving(
            inputs["ra_deg"],
            inputs["dec_deg"],
            inputs["parallax_mas"],
            inputs["pm_ra_cosdec_mas_yr"],
            inputs["pm_dec_mas_yr"],
            inputs["radial_velocity_km_s"],
            catalogue_epoch_values(inputs, params),
            params["epoch_jyear"],
            **common,
        )
    if params.get("epoch_jyear") is None:  # the motion columns are not read
        implausible = np.zeros(np.shape(result.flags), dtype=np.uint32)
    else:
        implausible = _propagation.implausible_input_flags(
            inputs["parallax_mas"],
            inputs["pm_ra_cosdec_mas_yr"],
            inputs["pm_dec_mas_yr"],
            inputs["radial_velocity_km_s"],
        )
    return {
        "constellation": result.index,
        "boundary_margin_arcsec": result.margin_arcsec,
        "constellation_across": result.other_side_index,
        "constellation_flags": result.flags,
        "implausible_input_flags": implausible,
    }


def _constellations_options(parser) -> None:
    parser.add_argument(
        "--epoch",
        help="epoch at which to look the stars up, e.g. J2030.0: each star is first moved "
        "there with its space motion (straight-line model). Default: the positions as given",
    )
    _catalogue_epoch_option(parser, " (needed with --epoch)")
    parser.add_argument(
        "--reduction",
        default="fk4",
        type=str.lower,
        choices=("fk4", "fk5"),
        help="reduction of ICRS positions to the boundaries' equinox B1875.0 (default fk4, "
        "as the boundaries were drawn); the other is compared and disagreements flagged",
    )
    parser.add_argument(
        "--near-boundary-arcsec",
        type=decimal,
        default=_constellations.DEFAULT_NEAR_BOUNDARY_ARCSEC,
        help="distance to a boundary within which near_boundary is flagged, arcsec "
        f"(default {_constellations.DEFAULT_NEAR_BOUNDARY_ARCSEC:g})",
    )


def _constellations_params(args) -> tuple[dict, dict]:
    params = {
        "epoch_jyear": parse_epoch_option(args.epoch, "--epoch"),
        "catalogue_epoch_jyear": parse_epoch_option(args.catalogue_epoch, "--catalogue-epoch"),
        "reduction": args.reduction,
        "near_boundary_arcsec": args.near_boundary_arcsec,
    }
    return params, {"epoch": args.epoch, "catalogue_epoch": args.catalogue_epoch}


def _constellations_check(params: dict, mapping) -> dict:
    params = dict(params)
    params.setdefault("epoch_jyear", None)
    params.setdefault("catalogue_epoch_jyear", None)
    params.setdefault("reduction", "fk4")
    params.setdefault("near_boundary_arcsec", _constellations.DEFAULT_NEAR_BOUNDARY_ARCSEC)
    if params["reduction"] not in ("fk4", "fk5"):
        raise BatchInputError(f"unknown reduction {params['reduction']!r}; use fk4 or fk5")
    near = params["near_boundary_arcsec"]
    if not np.isfinite(near) or near < 0:
        raise BatchInputError("--near-boundary-arcsec must be a non-negative number")
    moving = params["epoch_jyear"] is not None
    if moving:
        check_catalogue_epoch(params, mapping, required=True)
    elif params["catalogue_epoch_jyear"] is not None:
        raise BatchInputError(
            "--catalogue-epoch was given without --epoch: give the epoch of the lookup too, "
            "or neither (positions as given)"
        )
    return params


def _constellations_fields(params: dict):
    if params.get("epoch_jyear") is None:
        return {"ra_deg", "dec_deg"}
    return None


def _constellations_describe(params: dict, mapping, given) -> dict:
    epoch = params.get("epoch_jyear")
    return {
        "epoch": None if epoch is None else epoch_record(given.get("epoch"), epoch),
        "catalogue_epoch": catalogue_epoch_record(params, mapping, given),
        "motion": "none (positions as given)"
        if epoch is None
        else "straight-line space motion (Hipparcos Vol. 1 sec. 1.5.5)",
        "reduction": params["reduction"],
        "near_boundary_arcsec": params["near_boundary_arcsec"],
    }


def _constellations_tables() -> dict:
    return {
        "constellation_boundaries": {
            "file": _constellations.BOUNDARY_TABLE_FILE,
            "sha256": _constellations.BOUNDARY_TABLE_SHA256,
            "source": "Roman 1987, PASP 99, 695; CDS VI/42 (boundaries at equinox B1875.0)",
        },
        "constellation_names": {
            "file": _constellations.NAMES_FILE,
            "sha256": _constellations.NAMES_SHA256,
            "source": "IAU constellation abbreviations and names",
        },
    }


def _constellations_outputs() -> tuple[OutputColumn, ...]:
    names = _abbreviations()
    return (
        OutputColumn(
            "constellation",
            "category",
            "IAU abbreviation",
            "constellation containing the position (at --epoch if given)",
            names,
        ),
        OutputColumn(
            "boundary_margin_arcsec",
            "float64",
            "arcsec",
            "distance to the nearest constellation boundary",
        ),
        OutputColumn(
            "constellation_across",
            "category",
            "IAU abbreviation",
            "constellation on the other side of the nearest boundary",
            names,
        ),
        OutputColumn(
            "constellation_flags",
            FLAG_DTYPE,
            "bit mask",
            "ConstellationFlag bits (see metadata)",
        ),
        OutputColumn(
            "implausible_input_flags",
            FLAG_DTYPE,
            "bit mask",
            "implausible parallax, proper motion, radial velocity or space velocity, with "
            "--epoch (the motion is read only then): the propagation's bits (see metadata)",
        ),
    )


CONSTELLATIONS = BatchJob(
    name="constellations",
    summary="IAU constellation of every star, with the distance to the nearest boundary",
    fields=(RA, DEC, PARALLAX, PM_RA_OPTIONAL, PM_DEC_OPTIONAL, RADIAL_VELOCITY)
    + (CATALOGUE_EPOCH_FIELD,),
    outputs=_constellations_outputs(),
    flag_columns={
        "constellation_flags": (_CF, CONSTELLATION_FLAG_MEANINGS),
        "implausible_input_flags": (ImplausibleInputFlag, IMPLAUSIBLE_INPUT_FLAG_MEANINGS),
    },
    compute=_constellations_compute,
    frames={"input": "ICRS", "boundaries": "B1875.0 equinox (FK4 or FK5 reduction)"},
    add_options=_constellations_options,
    params_from_args=_constellations_params,
    check_params=_constellations_check,
    describe_params=_constellations_describe,
    data_tables=_constellations_tables,
    fields_used=_constellations_fields,
)

#: The jobs by subcommand name.
JOBS: dict[str, BatchJob] = {job.name: job for job in (PROPAGATE, CONSTELLATIONS, VELOCITY)}
