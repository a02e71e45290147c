"""POST /v1/propagation: astrometry and uncertainties moved to other epochs."""

from __future__ import annotations

import itertools
import math

import marshmallow as ma
import numpy as np
from flask import current_app

from ..core import propagation as core
from ..core.constants import C_KM_S
from ..core.flags import (
    PARALLAX_IMPLAUSIBLE_MEANING,
    PROPER_MOTION_IMPLAUSIBLE_MEANING,
    RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
    flag_names,
    present_flag_names,
)
from .common import (
    COUNT_OF_ONE_TEXT,
    PROPAGATION_WARNINGS,
    WARNINGS_LIMIT_TEXT,
    Blueprint,
    Choice,
    EpochField,
    EpochList,
    EpochOutSchema,
    WarningSchema,
    always_present,
    bound_epoch_list,
    check_epoch_count,
    check_list_or_range,
    check_result_count,
    epochs_out,
    flag_meanings_field,
    flag_warnings,
    flags_field,
    id_field,
    index_field,
    layout_field,
    number_field,
    proper_motion_field,
    range_count_field,
    star_count_field,
    units_field,
)
from .examples import load_example
from .observability import count_stars
from .tables import MAX_ABS_MAS, IgnoredColumnsField, RowCheck, StarTableField

blp = Blueprint(
    "propagation",
    __name__,
    url_prefix="/v1",
    description="Move stellar astrometry and its uncertainties from a catalogue epoch to "
    "other epochs.",
)

#: Parameter names in covariance order, as they appear in field names.
PARAMS = ("ra", "dec", "parallax", "pm_ra", "pm_dec", "radial_velocity")
VALUE_FIELDS = (
    "ra_deg",
    "dec_deg",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)
ERROR_FIELDS = (
    "ra_error_mas",
    "dec_error_mas",
    "parallax_error_mas",
    "pm_ra_cosdec_error_mas_yr",
    "pm_dec_error_mas_yr",
    "radial_velocity_error_km_s",
)
CORRELATION_PAIRS = tuple(itertools.combinations(range(6), 2))
CORRELATION_FIELDS = tuple(f"correlation_{PARAMS[i]}_{PARAMS[j]}" for i, j in CORRELATION_PAIRS)

UNITS = {
    "ra_deg": "deg",
    "dec_deg": "deg",
    "parallax_mas": "mas",
    "pm_ra_cosdec_mas_yr": "mas/yr (includes cos(dec))",
    "pm_dec_mas_yr": "mas/yr",
    "radial_velocity_km_s": "km/s",
    "ra_error_mas": "mas (error of ra*cos(dec))",
    "dec_error_mas": "mas",
    "parallax_error_mas": "mas",
    "pm_ra_cosdec_error_mas_yr": "mas/yr",
    "pm_dec_error_mas_yr": "mas/yr",
    "radial_velocity_error_km_s": "km/s",
    "correlation_*": "dimensionless, -1 to 1",
    "epochs": "Julian epoch (TDB), years",
}


#: Largest standard error accepted for the radial velocity, km/s (the speed of light).
MAX_RV_ERROR_KM_S = C_KM_S


_num = number_field


_STAR_FIELDS = {
    "id": ma.fields.Raw(
        allow_none=True,
        metadata={"description": "Your identifier for the star (string or integer), echoed."},
    ),
    "ra_deg": _num("ICRS right ascension, degrees.", required=True, lo=0.0, hi=360.0),
    "dec_deg": _num("ICRS declination, degrees.", required=True, lo=-90.0, hi=90.0),
    "parallax_mas": _num(
        "Parallax, mas. Null if unknown; zero or negative values are accepted and flagged, "
        "and so are values above 1,000 mas (parallax_implausible: nearer than any known star).",
        lo=-MAX_ABS_MAS,
        hi=MAX_ABS_MAS,
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
        "Radial velocity, km/s, positive receding. Null if unknown.",
        lo=-C_KM_S,
        hi=C_KM_S,
        min_inclusive=False,
        max_inclusive=False,
    ),
    "ra_error_mas": _num("Standard error of ra*cos(dec), mas.", lo=0.0, hi=MAX_ABS_MAS),
    "dec_error_mas": _num("Standard error of dec, mas.", lo=0.0, hi=MAX_ABS_MAS),
    "parallax_error_mas": _num(
        "Standard error of the parallax, mas (not needed where the parallax is null).",
        lo=0.0,
        hi=MAX_ABS_MAS,
    ),
    "pm_ra_cosdec_error_mas_yr": _num(
        "Standard error of pm_ra_cosdec, mas/yr.", lo=0.0, hi=MAX_ABS_MAS
    ),
    "pm_dec_error_mas_yr": _num("Standard error of pm_dec, mas/yr.", lo=0.0, hi=MAX_ABS_MAS),
    "radial_velocity_error_km_s": _num(
        "Standard error of the radial velocity, km/s. Left out while the radial velocity, a "
        "positive parallax and the other standard errors are given: the radial velocity is "
        "taken as exact in the uncertainties, and the star is flagged "
        "radial_velocity_error_missing.",
        lo=0.0,
        hi=MAX_RV_ERROR_KM_S,
    ),
}
for _i, _j in CORRELATION_PAIRS:
    _STAR_FIELDS[f"correlation_{PARAMS[_i]}_{PARAMS[_j]}"] = _num(
        f"Correlation coefficient of the errors of {PARAMS[_i]} and {PARAMS[_j]}, "
        f"{UNITS['correlation_*']}. Null or "
        "absent: taken as 0. A star with standard errors but none of the ten correlations "
        "among ra, dec, parallax, pm_ra and pm_dec is flagged correlations_assumed_zero; "
        "with some of them given, the others are taken as 0 without a flag.",
        lo=-1.0,
        hi=1.0,
    )

#: One star's astrometry at the catalogue epoch, with optional uncertainties.
StarAstrometrySchema = ma.Schema.from_dict(_STAR_FIELDS, name="StarAstrometrySchema")


def _complete(cols, errs):
    """Masks of the stars with some standard errors, and of those with all they need (of
    the errors ``errs``, (N, 6) in ERROR_FIELDS order)."""
    given = np.isfinite(errs[:, :5])
    some = np.any(given, axis=-1)
    # Without a parallax, its standard error is not needed: the motion does not depend on
    # the parallax then, and the parallax out is unknown with its error.
    needed = given.copy()
    needed[:, 2] |= np.isnan(cols["parallax_mas"])
    return some, some & np.all(needed, axis=-1)


def _correlation_matrices(cols, rows):
    """(K, 6, 6) correlation matrices of the stars ``rows`` (absent correlations 0), and
    which of them give a correlation among the five astrometric parameters, and which one
    with the radial velocity."""
    given = np.stack([cols[name] for name in CORRELATION_FIELDS], axis=-1)[rows]  # (K, 15)
    known = np.isfinite(given)
    values = np.where(known, given, 0.0)
    corr = np.zeros((rows.size, 36))  # one row-major 6 x 6 matrix per star
    corr[:, _DIAGONAL] = 1.0
    corr[:, _UPPER] = values
    corr[:, _LOWER] = values
    given_any = known[:, _WITH_RV == 0].any(axis=-1)  # among the five astrometric ones
    given_rv = known[:, _WITH_RV == 1].any(axis=-1)  # with the radial velocity
    return corr.reshape(-1, 6, 6), given_any, given_rv


#: Places of the correlations of CORRELATION_FIELDS in a row-major 6 x 6 matrix (above
#: and below the diagonal), of its diagonal, and which correlations are with the radial
#: velocity (parameter 5).
_UPPER = np.array([6 * i + j for i, j in CORRELATION_PAIRS])
_LOWER = np.array([6 * j + i for i, j in CORRELATION_PAIRS])
_DIAGONAL = np.arange(6) * 7
_WITH_RV = np.array([int(j == 5) for _, j in CORRELATION_PAIRS])


def _rv_known(cols, errs):
    return np.isfinite(errs[:, 5]) & np.isfinite(cols["radial_velocity_km_s"])


#: Message on a star whose correlations cannot all hold at once.
NOT_POSITIVE_SEMIDEFINITE = (
    "the correlations do not form a positive semi-definite matrix (they cannot all hold at once)"
)


def _impossible_correlations(table, usable):
    """RowCheck of the star table: the stars whose correlations cannot all hold at once.

    The correlation matrix of a star that gets uncertainties must be positive semi-definite
    (within 1e-9 for rounding). Correlations with the radial velocity alone can be
    impossible too (ra-rv 0.9 and dec-rv -0.9 with ra-dec taken as 0), so they are checked
    as well where the radial velocity and its error are given.
    """
    if not (
        table.given.intersection(ERROR_FIELDS) and table.given.intersection(CORRELATION_FIELDS)
    ):
        return []
    cols = table.columns
    errs = np.stack([cols[name] for name in ERROR_FIELDS], axis=-1)  # (N, 6)
    _, complete = _complete(cols, errs)
    rows = np.flatnonzero(usable)
    corr, given_any, given_rv = _correlation_matrices(cols, rows)
    if rows.size == table.size:  # all usable: the view's covariance is made from these
        table.derived[_CORRELATIONS_KEY] = (corr, given_any)
    rv_known = _rv_known(cols, errs)[rows]
    check = complete[rows] & (given_any | (given_rv & rv_known))
    sub, rv_known, rows = corr[check], rv_known[check], rows[check]  # a copy: changed here
    sub[~rv_known, 5, :] = 0.0
    sub[~rv_known, :, 5] = 0.0
    sub[~rv_known, 5, 5] = 1.0
    low = np.linalg.eigvalsh(sub)[:, 0] if rows.size else np.empty(0)
    return [(rows[low < -1e-9], "correlation_*", NOT_POSITIVE_SEMIDEFINITE)]


#: Key of the correlation matrices of every star, (N, 6, 6), and the mask of those that
#: give a correlation among the five astrometric parameters, in StarTable.derived.
_CORRELATIONS_KEY = "propagation.correlations"


#: The checks of each star's values together, run with the star table's own.
STAR_CHECKS = (
    RowCheck(
        (*ERROR_FIELDS, *CORRELATION_FIELDS, "parallax_mas", "radial_velocity_km_s"),
        _impossible_correlations,
    ),
)


class EpochRangeSchema(ma.Schema):
    start = EpochField(required=True, metadata={"description": "First target epoch."})
    stop = EpochField(required=True, metadata={"description": "Last target epoch."})
    count = range_count_field()

    @ma.validates_schema
    def _start_and_stop_included(self, data, **kwargs):
        if data["count"] == 1 and data["start"] != data["stop"]:
            raise ma.ValidationError(COUNT_OF_ONE_TEXT, "count")


class PropagationRequestSchema(ma.Schema):
    stars = StarTableField(
        StarAstrometrySchema,
        checks=STAR_CHECKS,
        required=True,
        metadata={"description": "The stars: a list of records, or an object of columns."},
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        required=True, metadata={"description": "Epoch of the given astrometry."}
    )
    target_epochs = EpochList(
        EpochField(),
        validate=ma.validate.Length(min=1),
        metadata={"description": "Epochs to move the stars to (give this or target_range)."},
    )
    target_range = ma.fields.Nested(
        EpochRangeSchema,
        metadata={"description": "Evenly spaced target epochs (give this or target_epochs)."},
    )
    model = Choice(
        core.MODELS,
        load_default="standard",
        metadata={
            "description": "standard: straight-line motion in the rigorous Hipparcos "
            "formulation (ESA 1997 Vol. 1 sec. 1.5.5), perspective acceleration included. "
            "light_time: the same motion with the light-time correction of the IAU SOFA "
            "routine pmsafe."
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

    @ma.pre_load
    def _bound_epoch_list(self, data, **kwargs):
        return bound_epoch_list(data, "target_epochs")

    @ma.validates_schema(skip_on_field_errors=False, pass_original=True)
    def _one_target(self, data, original, **kwargs):
        check_list_or_range(self, original, "target_epochs", "target_range")


@always_present
class AtEpochSchema(ma.Schema):
    ra_deg = ma.fields.Float(
        metadata={"description": "ICRS right ascension at this epoch, degrees."}
    )
    dec_deg = ma.fields.Float(metadata={"description": "ICRS declination at this epoch, degrees."})
    parallax_mas = ma.fields.Float(
        allow_none=True,
        metadata={
            "description": "Parallax at this epoch, mas (a zero or negative parallax given: "
            "the formal value, flagged parallax_not_positive); null where the star came "
            "without one."
        },
    )
    pm_ra_cosdec_mas_yr = ma.fields.Float(
        metadata={
            "description": "Proper motion in right ascension times cos(dec) at this epoch, mas/yr."
        }
    )
    pm_dec_mas_yr = ma.fields.Float(
        metadata={"description": "Proper motion in declination at this epoch, mas/yr."}
    )
    radial_velocity_km_s = ma.fields.Float(
        allow_none=True,
        metadata={
            "description": "Radial velocity at this epoch, km/s, positive receding; null "
            "where the star came without one. Without a usable parallax it is the one given, "
            "unchanged (flagged radial_velocity_unchanged)."
        },
    )
    uncertainties = ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.Float(allow_none=True),
        allow_none=True,
        metadata={
            "description": "Standard errors (ra_error_mas ... radial_velocity_error_km_s) and "
            "correlation coefficients (correlation_ra_dec ...) at this epoch; null when the "
            "star came without the standard errors of its position, proper motion and (where "
            "its parallax is given) parallax. Members null where a pole leaves them "
            "without meaning (at_pole): ra_error_mas and correlation_ra_* for a star that "
            "moves off a catalogue position at a pole, the proper-motion errors and their "
            "correlations for one that moves onto a pole."
        },
    )


@always_present
class StarResultSchema(ma.Schema):
    index = index_field()
    id = id_field()
    flags = flags_field()
    at_epochs = ma.fields.List(
        ma.fields.Nested(AtEpochSchema),
        metadata={"description": "One entry per target epoch, in the order of epochs."},
    )


@always_present(unless=("stars", "columns"))
class PropagationResponseSchema(ma.Schema):
    model = ma.fields.String(
        metadata={"description": "The model of the motion used: standard or light_time."}
    )
    catalogue_epoch = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "Epoch of the given astrometry."}
    )
    epochs = ma.fields.List(
        ma.fields.Nested(EpochOutSchema),
        metadata={
            "description": "The target epochs, in order: target_epochs as given, or the "
            "epochs of target_range."
        },
    )
    star_count = star_count_field()
    layout = layout_field()
    units = units_field()
    flag_meanings = flag_meanings_field()
    warnings = ma.fields.List(
        ma.fields.Nested(WarningSchema),
        metadata={
            "description": "Stars whose inputs look like a unit mistake or are inconsistent "
            "(computed as given). " + WARNINGS_LIMIT_TEXT
        },
    )
    stars = ma.fields.List(
        ma.fields.Nested(StarResultSchema),
        metadata={"description": "layout=records: one entry per star."},
    )
    columns = ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.Raw(),
        metadata={
            "description": "layout=columns: id and flags (one entry per star), and for each "
            "quantity an array with one row per target epoch and one value per star."
        },
    )


FLAG_MEANINGS = {
    "parallax_missing": "No parallax: distance unknown, radial velocity not applied, "
    "parallax out unknown.",
    "parallax_not_positive": "Parallax zero or negative: no distance; radial velocity not "
    "applied; parallax out is the formal value (carried along by the standard model, as "
    "given by the light_time model).",
    "radial_velocity_missing": "No radial velocity: taken as zero for the motion (no "
    "perspective acceleration); radial velocity out unknown.",
    "proper_motion_implausible": PROPER_MOTION_IMPLAUSIBLE_MEANING,
    "space_velocity_implausible": "Implied space velocity above half the speed of light: "
    "inconsistent inputs.",
    "at_pole": "At a celestial pole at the catalogue epoch or a target epoch: right "
    "ascension, and the directions of the proper-motion components, undefined there; they "
    "are taken from the right ascension given (or computed). For a star that moves off a "
    "catalogue position at a pole, ra_error_mas and the correlation_ra_* are null at the "
    "target epochs (a change of ra*cos(dec) there turns the whole motion about the pole); "
    "for a star that moves onto a pole, the proper-motion errors and their correlations "
    "are null at that epoch. The other uncertainties stand (at the catalogue epoch, those "
    "given).",
    "distance_replaced": "Light-time model: distance replaced by a minimum value (SOFA "
    "pmsafe); where the parallax given was positive, the parallax and radial velocity out "
    "follow from that distance, not from the parallax given.",
    "not_converged": "Light-time model: iteration did not converge.",
    "radial_velocity_unchanged": "Radial velocity given without a usable parallax: passed "
    "through unchanged.",
    "radial_velocity_implausible": RADIAL_VELOCITY_IMPLAUSIBLE_MEANING,
    "uncertainties_nonlinear": "At some target epoch the propagated standard error of the "
    "star's position vector exceeds 0.2 of its distance from the Sun (position error above "
    "0.2 rad, or distance known to worse than 20%), as near a close passage of the Sun: the "
    "linear propagation of the uncertainties no longer describes their spread (it can be "
    "wrong by orders of magnitude there). Use Monte Carlo draws of the catalogue values.",
    "parallax_implausible": PARALLAX_IMPLAUSIBLE_MEANING,
    "uncertainties_incomplete": "Some but not all of the standard errors of position, proper "
    "motion and (where the parallax is given) parallax given: no uncertainties computed.",
    "correlations_assumed_zero": "Standard errors given without any correlation among the "
    "five astrometric parameters: those correlations taken as zero.",
    "radial_velocity_error_missing": "Radial velocity given (with a positive parallax) but "
    "not its standard error: the radial velocity is taken as exact in the uncertainties, so "
    "they leave out the spread of the perspective acceleration it drives (over long spans "
    "often the largest part of the position error), and the radial velocity out has no "
    "error.",
}

#: Propagation flags about implausible inputs, which answers of other endpoints that move
#: stars (frames, observed places, constellations) name per star, with their meanings.
IMPLAUSIBLE_INPUT_FLAGS = int(core.IMPLAUSIBLE_INPUT_FLAGS)
IMPLAUSIBLE_INPUT_MEANINGS = {
    name: FLAG_MEANINGS[name]
    for name in flag_names([IMPLAUSIBLE_INPUT_FLAGS], core.PropagationFlag)[0]
}


def input_flags(propagation_flags, n: int):
    """Per star, the propagation flags of all its epochs or instants together (they depend
    on the inputs), and the names of the implausible-input ones among them."""
    masks = np.bitwise_or.reduce(np.asarray(propagation_flags).reshape(n, -1), axis=1)
    return masks, flag_names(masks & IMPLAUSIBLE_INPUT_FLAGS, core.PropagationFlag)


def _covariance(table, n):
    """Build the (N, 6, 6) covariance from standard errors and correlations (the star
    table has checked that the correlations can hold: _impossible_correlations).

    Returns (cov or None, has_cov mask, incomplete mask, assumed_zero mask,
    rv_error_missing mask).
    """
    cols = table.columns
    none = np.zeros(n, dtype=bool)
    if not table.given.intersection(ERROR_FIELDS):
        return None, none, none, none, none
    errs = np.stack([cols[name] for name in ERROR_FIELDS], axis=-1)  # (N, 6)
    some, complete = _complete(cols, errs)
    incomplete = some & ~complete
    if not complete.any():
        return None, complete, incomplete, none, none
    shared = table.derived.get(_CORRELATIONS_KEY)  # made by _impossible_correlations
    if shared is None:
        shared = _correlation_matrices(cols, np.arange(n))[:2]
    corr, given_any = shared
    rv_known = _rv_known(cols, errs)
    sig = np.where(np.isfinite(errs), errs, 0.0)
    cov = corr * sig[:, :, None] * sig[:, None, :]
    cov[~rv_known, 5, :] = np.nan
    cov[~rv_known, :, 5] = np.nan
    assumed_zero = complete & ~given_any
    # The radial velocity acts on the motion only with a positive parallax (zeta = v_r * plx
    # / A); then an unknown error of it is not a zero error.
    with np.errstate(invalid="ignore"):
        rv_acts = np.isfinite(cols["radial_velocity_km_s"]) & (cols["parallax_mas"] > 0.0)
    rv_error_missing = complete & rv_acts & ~np.isfinite(errs[:, 5])
    return cov, complete, incomplete, assumed_zero, rv_error_missing


def _uncertainty_dict(cov_block):
    """(M, 6, 6) covariances for one star -> list of dicts of errors and correlations."""
    out = []
    for c in cov_block:
        sig = np.sqrt(np.clip(np.diagonal(c), 0.0, None))
        d = {ERROR_FIELDS[k]: _num_or_none(sig[k]) for k in range(6)}
        for (i, j), name in zip(CORRELATION_PAIRS, CORRELATION_FIELDS, strict=True):
            denom = sig[i] * sig[j]
            with np.errstate(invalid="ignore", over="ignore"):  # inf / inf: unknown
                d[name] = _num_or_none(c[i, j] / denom) if denom > 0 else None
        out.append(d)
    return out


def _num_or_none(x):
    x = float(x)
    return x if math.isfinite(x) else None


@blp.route("/propagation", methods=["POST"])
@blp.doc(operationId="propagateStars")
@blp.arguments(PropagationRequestSchema(), example=load_example("propagation_request.json"))
@blp.response(200, PropagationResponseSchema)
def propagate(args):
    """Move stars to other epochs.

    Takes each star's astrometry (position, parallax, proper motion, radial velocity) at the
    catalogue epoch, optionally with standard errors and correlations, and returns all six
    parameters at every target epoch, with propagated uncertainties (full covariance through
    the analytic Jacobian of the straight-line model) and per-star flags saying what was
    assumed. One star or a million: the same endpoint, the same numbers.
    """
    table = args["stars"]
    n = table.size
    if args.get("target_range") is not None:
        rng = args["target_range"]
        check_epoch_count(rng["count"], "target_range.count")
        targets = np.linspace(rng["start"], rng["stop"], rng["count"])
    else:
        targets = np.asarray(args["target_epochs"], dtype=float)
        check_epoch_count(targets.size, "target_epochs")
    m = targets.size
    check_result_count(n, m, "stars")
    cov, has_cov, incomplete, assumed_zero, rv_error_missing = _covariance(table, n)
    c = table.columns
    result = core.propagate(
        c["ra_deg"][:, None],
        c["dec_deg"][:, None],
        c["parallax_mas"][:, None],
        c["pm_ra_cosdec_mas_yr"][:, None],
        c["pm_dec_mas_yr"][:, None],
        c["radial_velocity_km_s"][:, None],
        args["catalogue_epoch"],
        targets[None, :],
        model=args["model"],
        covariance=None if cov is None else cov[:, None, :, :],
    )
    count_stars("/v1/propagation", n)
    masks = np.bitwise_or.reduce(result.flags, axis=1)
    if cov is not None:  # judged on the covariance of stars that get uncertainties only
        nonlinear = int(core.PropagationFlag.UNCERTAINTIES_NONLINEAR)
        masks = np.where(has_cov, masks, masks & ~nonlinear)
    names = flag_names(masks, core.PropagationFlag)
    present = present_flag_names(masks, core.PropagationFlag)
    if has_cov.any() or incomplete.any():  # both masks are all False without errors
        for i in np.flatnonzero(incomplete):
            names[i] = (*names[i], "uncertainties_incomplete")
            present.add("uncertainties_incomplete")
        for i in np.flatnonzero(assumed_zero):
            names[i] = (*names[i], "correlations_assumed_zero")
            present.add("correlations_assumed_zero")
        for i in np.flatnonzero(rv_error_missing):
            names[i] = (*names[i], "radial_velocity_error_missing")
            present.add("radial_velocity_error_missing")
    warnings = flag_warnings(masks, table, PROPAGATION_WARNINGS)
    layout = args["layout"] or table.form
    body = {
        "model": args["model"],
        "catalogue_epoch": epochs_out([args["catalogue_epoch"]])[0],
        "epochs": epochs_out(targets),
        "star_count": n,
        "layout": layout,
        "units": UNITS,
        "flag_meanings": {k: v for k, v in FLAG_MEANINGS.items() if k in present},
        "warnings": warnings,
    }
    ast = result.astrometry
    values = [getattr(ast, f) for f in VALUE_FIELDS]
    if layout == "columns":
        cols = {"id": table.ids, "flags": names}
        for name, arr in zip(VALUE_FIELDS, values, strict=True):
            cols[name] = np.ascontiguousarray(arr.T)
        if result.covariance is not None:
            # Masked in place: a copy would hold another (N, M, 6, 6) array (576 MB for
            # 2,000,000 results) while the answer is written.
            cv = result.covariance
            cv[~has_cov] = np.nan
            with np.errstate(invalid="ignore", divide="ignore"):
                sig = np.sqrt(np.clip(np.diagonal(cv, axis1=-2, axis2=-1), 0.0, None))
                for k, name in enumerate(ERROR_FIELDS):
                    cols[name] = np.ascontiguousarray(sig[..., k].T)
                for (i, j), name in zip(CORRELATION_PAIRS, CORRELATION_FIELDS, strict=True):
                    cols[name] = np.ascontiguousarray(
                        (cv[..., i, j] / (sig[..., i] * sig[..., j])).T
                    )
        body["columns"] = cols
    else:
        stars = []
        ids = table.ids
        for i in range(n):
            at = [
                {
                    name: _num_or_none(arr[i, k])
                    for name, arr in zip(VALUE_FIELDS, values, strict=True)
                }
                for k in range(m)
            ]
            if result.covariance is not None and has_cov[i]:
                for entry, unc in zip(at, _uncertainty_dict(result.covariance[i]), strict=True):
                    entry["uncertainties"] = unc
            else:
                for entry in at:
                    entry["uncertainties"] = None
            stars.append(
                {
                    "index": i,
                    "id": None if ids is None else ids[i],
                    "flags": names[i],
                    "at_epochs": at,
                }
            )
        body["stars"] = stars
    return current_app.json.response(body)


def register(app, api):
    api.spec.components.schema("StarAstrometry", schema=StarAstrometrySchema)
    api.register_blueprint(blp)
