"""/v1/constellations: IAU constellation membership, boundary distance, crossings, outlines."""

from __future__ import annotations

import marshmallow as ma
import numpy as np
from flask import current_app, g, request
from flask_smorest import abort

from ..core import constellations as core
from ..core import epochs as core_epochs
from ..core import frames as core_frames
from ..core import propagation as core_prop
from ..core.constants import C_KM_S
from ..core.flags import CONSTELLATION_AT_POLE_MEANING, FlagNameList, flag_names
from .common import (
    PROPAGATION_WARNINGS,
    WARNINGS_LIMIT_TEXT,
    Blueprint,
    Choice,
    EpochField,
    EpochOutSchema,
    QueryFloat,
    StrictFloat,
    WarningSchema,
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
    refuse_query_options,
    star_count_field,
    units_field,
)
from .examples import load_example
from .frames import FrameField, frame_from_spec, frame_with_equinox
from .observability import count_stars
from .propagation import IMPLAUSIBLE_INPUT_MEANINGS as _INPUT_FLAG_MEANINGS
from .spelling import meant_by_unknown_names
from .tables import IgnoredColumnsField, RowCheck, StarTableField

blp = Blueprint(
    "constellations",
    __name__,
    url_prefix="/v1/constellations",
    description="Which IAU constellation a position lies in at an epoch, how far it is from "
    "the boundary, when a moving star crosses one, and the constellations' outlines.",
)

#: Most stars in one crossing search (each star is followed through its whole window).
MAX_CROSSING_STARS = 10_000

LIST_HINT = "GET /v1/constellations lists the 88 IAU abbreviations and names"

REDUCTION_DESCRIPTION = (
    "Reduction of the position to the equinox B1875.0 of the boundaries. fk4 (default): the "
    "FK4 system at equinox and epoch B1875.0, E-terms included, the system the boundaries "
    "were drawn in. fk5: FK5 precessed with the IAU 2006 precession, as general-purpose "
    "libraries do. fk5_iau1976: FK5 precessed with the IAU 1976 precession. They differ by "
    "less than 0.6 arcsec; stars where fk4 and fk5 disagree are flagged reductions_disagree."
)

FLAG_MEANINGS = {
    "near_boundary": "Within near_boundary_arcsec of a boundary, or within the table's "
    "rounding of one.",
    "table_rounding_ambiguous": "Within half a unit of the table's last digit of a boundary "
    "(0.18 arcsec from a constant-Dec boundary, 2.7 arcsec x cos(dec) from a constant-RA one): "
    "the published table cannot decide.",
    "reductions_disagree": "The fk4 and fk5 reductions give different constellations.",
    "parallax_missing": "No parallax: the motion is applied as direction only (no "
    "perspective effects; radial velocity not used).",
    "parallax_not_positive": "Parallax zero or negative: no distance; the motion is applied "
    "as direction only, as without a parallax (radial velocity not used).",
    "radial_velocity_missing": "No radial velocity: taken as zero for the motion.",
    "proper_motion_missing": "No proper motion: the position was taken as fixed.",
    "search_incomplete": "The crossing search reached its step limit before the end of the "
    "window (a star grazing a boundary for a long time); crossings after the last one "
    "listed may be missing (constellation_at_end is still that at the window's end).",
    "at_pole": CONSTELLATION_AT_POLE_MEANING,
    # Implausible inputs: the propagation's flags, names and meanings.
    **_INPUT_FLAG_MEANINGS,
}

UNITS = {
    "ra_deg": "deg",
    "dec_deg": "deg",
    "parallax_mas": "mas",
    "pm_ra_cosdec_mas_yr": "mas/yr (includes cos(dec))",
    "pm_dec_mas_yr": "mas/yr",
    "radial_velocity_km_s": "km/s",
    "margin_arcsec": "arcsec",
    "ra_b1875_deg": "deg (equinox B1875.0, by the chosen reduction)",
    "dec_b1875_deg": "deg (equinox B1875.0, by the chosen reduction)",
    "epoch_jyear": "Julian epoch (TDB), years",
}


_num = number_field


def _star_fields(motion_required: bool) -> dict:
    pm_text = (
        ""
        if motion_required
        else " Give both components or neither: with neither (null or absent) the position "
        "is held fixed, flagged proper_motion_missing when another epoch is asked for."
    )
    return {
        "id": ma.fields.Raw(
            allow_none=True,
            metadata={"description": "Your identifier for the star (string or integer), echoed."},
        ),
        "ra_deg": _num(
            "Right ascension (longitude for galactic or ecliptic) in the request's frame "
            "(default ICRS), degrees.",
            required=True,
            lo=0.0,
            hi=360.0,
        ),
        "dec_deg": _num(
            "Declination (latitude for galactic or ecliptic) in the request's frame "
            "(default ICRS), degrees.",
            required=True,
            lo=-90.0,
            hi=90.0,
        ),
        "parallax_mas": _num(
            "Parallax, mas. Null if unknown (the motion is then applied as direction only); "
            "zero or negative values are accepted and flagged, and so are values above 1,000 "
            "mas (parallax_implausible: nearer than any known star)."
        ),
        "pm_ra_cosdec_mas_yr": proper_motion_field(
            "Proper motion in right ascension times cos(dec), mas/yr. At a pole (dec_deg "
            "+-90) east and north are those of the ra_deg given (flag at_pole)." + pm_text,
            required=motion_required,
        ),
        "pm_dec_mas_yr": proper_motion_field(
            "Proper motion in declination, mas/yr." + pm_text,
            required=motion_required,
        ),
        "radial_velocity_km_s": _num(
            "Radial velocity, km/s, positive receding. Null if unknown (taken as zero).",
            lo=-C_KM_S,
            hi=C_KM_S,
            min_inclusive=False,
            max_inclusive=False,
        ),
    }


def _half_proper_motions(table, usable):
    """RowCheck of a lookup's star table: a star with one proper-motion component and not
    the other is refused (taking the missing one as zero would move the star along a
    direction the client never gave)."""
    pma = np.isfinite(table.columns["pm_ra_cosdec_mas_yr"])
    pmd = np.isfinite(table.columns["pm_dec_mas_yr"])
    found = []
    for given, missing, rows in (
        ("pm_ra_cosdec_mas_yr", "pm_dec_mas_yr", pma & ~pmd & usable),
        ("pm_dec_mas_yr", "pm_ra_cosdec_mas_yr", pmd & ~pma & usable),
    ):
        message = (
            f"is missing while {given} is given: give both proper-motion components, or "
            "neither for a fixed position"
        )
        found.append((np.flatnonzero(rows), missing, message))
    return found


#: The checks of each star's values together in a lookup, run with the star table's own.
_LOOKUP_STAR_CHECKS = (RowCheck(("pm_ra_cosdec_mas_yr", "pm_dec_mas_yr"), _half_proper_motions),)

#: One position, optionally with space motion, for a lookup.
ConstellationStarSchema = ma.Schema.from_dict(
    _star_fields(motion_required=False), name="ConstellationStarSchema"
)
#: One moving star for a crossing search.
MovingStarSchema = ma.Schema.from_dict(_star_fields(motion_required=True), name="MovingStarSchema")


class LookupRequestSchema(ma.Schema):
    stars = StarTableField(
        ConstellationStarSchema,
        checks=_LOOKUP_STAR_CHECKS,
        required=True,
        metadata={"description": "Positions: a list of records, or an object of columns."},
    )
    ignored_columns = IgnoredColumnsField()
    frame = FrameField(
        load_default=lambda: {"name": "icrs"},
        metadata={
            "description": "Frame of the given positions and motions (default ICRS). Other "
            "frames are converted to ICRS at catalogue_epoch (or epoch, or J2000.0 if "
            "neither is given) before the lookup."
        },
    )
    catalogue_epoch = EpochField(
        load_default=None,
        metadata={
            "description": "Epoch of the given positions and motions. Needed when any star "
            "has a proper motion and epoch differs from it."
        },
    )
    epoch = EpochField(
        load_default=None,
        metadata={
            "description": "Epoch at which membership is wanted: stars with a proper motion "
            "are first moved to it (straight-line motion). Default: catalogue_epoch."
        },
    )
    reduction = Choice(
        core.REDUCTIONS,
        load_default="fk4",
        metadata={"description": REDUCTION_DESCRIPTION},
    )
    near_boundary_arcsec = StrictFloat(
        load_default=None,
        allow_none=True,
        validate=ma.validate.Range(min=0.0, max=36_000.0),
        metadata={
            "description": "Margins endpoint only (the lookup refuses it): distance from a "
            "boundary, arcsec, within which a star is flagged near_boundary. Default (absent "
            "or null): the service's setting SKYDRIFT_NEAR_BOUNDARY_ARCSEC, 1 unless its "
            "operator chose another."
        },
    )
    layout = Choice(
        ("records", "columns"),
        load_default=None,
        allow_none=True,
        metadata={
            "description": "Response layout: one record per star, or columns. Default: the "
            "layout of the request's stars."
        },
    )

    def __init__(self, *args, near_boundary: bool = True, **kwargs):
        """``near_boundary=False``: the lookup's schema, which refuses near_boundary_arcsec
        (the margins endpoint takes it)."""
        super().__init__(*args, **kwargs)
        self.near_boundary = near_boundary

    @ma.validates_schema(skip_on_field_errors=False, pass_original=True)
    def _epochs(self, data, original, **kwargs):
        # A catalogue_epoch given but refused for its own sake is not called missing.
        given = isinstance(original, dict) and original.get("catalogue_epoch") is not None
        if data.get("epoch") is not None and not given:
            if "catalogue_epoch" in meant_by_unknown_names(original, self):
                return  # "catalog_epoch": its own message says which it stands for
            raise ma.ValidationError(
                "give catalogue_epoch (the epoch of the positions) with epoch", "catalogue_epoch"
            )

    @ma.validates_schema(skip_on_field_errors=False)
    def _near_boundary(self, data, **kwargs):
        if not self.near_boundary and data.get("near_boundary_arcsec") is not None:
            # The lookup measures no distance to a boundary and so flags none: the option
            # would be read and do nothing, and a star near a boundary would come back
            # unflagged.
            raise ma.ValidationError(
                "is an option of /v1/constellations/margins (the lookup measures no "
                "distance to the boundary)",
                "near_boundary_arcsec",
            )


class CrossingsRequestSchema(ma.Schema):
    stars = StarTableField(
        MovingStarSchema,
        required=True,
        metadata={
            "description": "Stars with space motion (ICRS), as records or columns; at most "
            f"{MAX_CROSSING_STARS} per request."
        },
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        required=True, metadata={"description": "Epoch of the given astrometry."}
    )
    start = EpochField(
        required=True,
        metadata={
            "description": "Start of the time window (an epoch), at most 100,000 years from "
            "catalogue_epoch."
        },
    )
    end = EpochField(
        required=True,
        metadata={
            "description": "End of the time window (an epoch), later than start and at most "
            "100,000 years from catalogue_epoch."
        },
    )
    max_step_yr = StrictFloat(
        load_default=None,
        allow_none=True,
        metadata={
            "description": "Largest step of the search, Julian years (default: window / 100). "
            "At least one day; at most 10**6 steps per window. The search never steps over a "
            "crossing whatever this is: each step is bounded by the star's distance from the "
            "boundary and the fastest it can move."
        },
    )
    reduction = Choice(
        core.REDUCTIONS,
        load_default="fk4",
        metadata={"description": REDUCTION_DESCRIPTION},
    )

    @ma.validates_schema(skip_on_field_errors=False)
    def _window(self, data, **kwargs):
        cat, start, end = (data.get(k) for k in ("catalogue_epoch", "start", "end"))
        errors: dict[str, list[str]] = {}
        ordered = start is not None and end is not None and end > start
        if start is not None and end is not None and not ordered:
            errors["end"] = ["must be later than start"]
        for name, value in (("start", start), ("end", end)):
            if cat is not None and value is not None:
                if abs(value - cat) > core.MAX_CROSSING_WINDOW_YR:
                    message = (
                        f"must be within {core.MAX_CROSSING_WINDOW_YR:.0f} years of catalogue_epoch"
                    )
                    errors.setdefault(name, []).append(message)
        step = data.get("max_step_yr")
        if step is not None:
            if not np.isfinite(step) or step < core.MIN_CROSSING_STEP_YR:
                errors["max_step_yr"] = ["must be at least 1 day (0.0027379 yr)"]
            elif ordered and (end - start) / step > 1e6:
                errors["max_step_yr"] = ["too small for the window: more than 10**6 steps"]
        if errors:
            raise ma.ValidationError(errors)


class OutlineEquinoxField(EpochField):
    """The equinox of an outline's fk5 or fk4 frame, read as /v1/frames reads one: an epoch
    text as written ('B1950.0', 'J2050.0'); a bare number a Besselian year for fk4 and a
    Julian year for fk5. -> ("number", year) or ("jyear", Julian epoch)."""

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        self.metadata["description"] = (
            "Equinox of an fk5 or fk4 frame: an epoch such as 'B1950.0' or 'J2050.0', or a "
            "number, a Besselian year for fk4 and a Julian year for fk5 (as in /v1/frames)."
        )

    def _deserialize(self, value, attr, data, **kwargs):
        try:
            jyear = super()._deserialize(value, attr, data, **kwargs)
        except ma.ValidationError as exc:  # the epoch forms, and what a number means here
            raise ma.ValidationError(
                f"{exc.messages[0]} (as an equinox, a bare number is a Besselian year for "
                "fk4 and a Julian year for fk5)"
            ) from None
        if isinstance(value, str) and core_epochs.PLAIN_NUMBER.match(value.strip()):
            return ("number", float(value.strip()))
        return ("jyear", jyear)


class OutlineQuerySchema(ma.Schema):
    frame = Choice(
        core.OUTLINE_FRAMES,
        load_default="icrs",
        metadata={
            "description": "Frame of the coordinates: icrs (default); galactic; fk5 at "
            "`equinox` (default J2000.0); fk4 at `equinox` (default B1950.0, E-terms "
            "included); b1875 (the boundaries' own frame, by the reduction)."
        },
    )
    equinox = OutlineEquinoxField(load_default=None)
    reduction = Choice(
        core.REDUCTIONS,
        load_default="fk4",
        metadata={"description": REDUCTION_DESCRIPTION},
    )
    tolerance_arcsec = QueryFloat(
        load_default=core.DEFAULT_OUTLINE_TOLERANCE_ARCSEC,
        validate=ma.validate.Range(
            min=core.MIN_OUTLINE_TOLERANCE_ARCSEC, max=core.MAX_OUTLINE_TOLERANCE_ARCSEC
        ),
        metadata={
            "description": "Largest distance, arcsec, between the true boundary in the frame "
            "and the straight (lon, lat) lines joining the outline's vertices. Default 0.05."
        },
    )

    @ma.validates_schema(skip_on_field_errors=False)
    def _frame_takes_equinox(self, data, **kwargs):
        if "frame" in data and data.get("equinox") is not None:
            try:
                _outline_equinox(data["frame"], data["equinox"])
            except ValueError as exc:
                raise ma.ValidationError(str(exc), "equinox") from None

    @ma.post_load
    def _equinox_year(self, data, **kwargs):
        """The equinox as the core takes it: a Besselian year for fk4, a Julian year for
        fk5, None for the frame's default."""
        return {**data, "equinox": _outline_equinox(data["frame"], data.get("equinox"))}


def _outline_equinox(frame: str, equinox) -> float | None:
    """An outline's frame and OutlineEquinoxField value -> its equinox, a Besselian year
    for fk4 and a Julian year for fk5 (None: none given), as /v1/frames makes the frame;
    ValueError (its message for the field) for a frame that takes none, or one outside the
    range taken."""
    if equinox is None or equinox[1] is None:
        return None
    if frame not in ("fk4", "fk5"):
        raise ValueError("only for frame fk5 or fk4")
    try:
        return frame_with_equinox(frame, equinox).equinox
    except ValueError as exc:
        raise ValueError(str(exc).removeprefix("equinox ")) from None


@always_present
class ConstellationSchema(ma.Schema):
    abbreviation = ma.fields.String(metadata={"description": "IAU abbreviation."})
    name = ma.fields.String(metadata={"description": "IAU name."})
    area_sr = ma.fields.Float(metadata={"description": "Solid angle, steradians."})
    area_deg2 = ma.fields.Float(metadata={"description": "Solid angle, square degrees."})


@always_present
class ConstellationListSchema(ma.Schema):
    count = ma.fields.Integer(metadata={"description": "Number of constellations (88)."})
    constellations = ma.fields.List(
        ma.fields.Nested(ConstellationSchema),
        metadata={"description": "One entry per constellation, in alphabetical order of name."},
    )


@always_present(unless=("margin_arcsec", "across", "near_boundary"))
class MembershipSchema(ma.Schema):
    index = index_field()
    id = id_field()
    constellation = ma.fields.String(metadata={"description": "IAU abbreviation."})
    name = ma.fields.String(metadata={"description": "IAU name."})
    constellation_fk4 = ma.fields.String(metadata={"description": "Answer of the fk4 reduction."})
    constellation_fk5 = ma.fields.String(metadata={"description": "Answer of the fk5 reduction."})
    reductions_disagree = ma.fields.Boolean(
        metadata={
            "description": "True where the fk4 and fk5 reductions give different "
            "constellations (the star is then flagged reductions_disagree)."
        }
    )
    margin_arcsec = ma.fields.Float(
        metadata={"description": "Margins endpoint: distance to the nearest boundary, arcsec."}
    )
    across = ma.fields.String(
        metadata={"description": "Margins endpoint: constellation across that boundary."}
    )
    near_boundary = ma.fields.Boolean(
        metadata={
            "description": "Margins endpoint: true where the star is flagged near_boundary "
            "(within near_boundary_arcsec of a boundary, or within the table's rounding of "
            "one)."
        }
    )
    ra_b1875_deg = ma.fields.Float(
        metadata={
            "description": "Right ascension of the position located (at epoch), reduced to "
            "the equinox B1875.0 of the boundaries by the chosen reduction, degrees."
        }
    )
    dec_b1875_deg = ma.fields.Float(
        metadata={
            "description": "Declination of the position located (at epoch), reduced to the "
            "equinox B1875.0 of the boundaries by the chosen reduction, degrees."
        }
    )
    flags = flags_field()


#: What the answers say of their warnings (the propagation's, on the same inputs).
WARNINGS_DESCRIPTION = (
    "Stars whose inputs look like a unit mistake (proper motion above 10.4 arcsec/yr, radial "
    "velocity above 5,000 km/s, parallax above 1,000 mas) or are inconsistent (space velocity "
    "above half the speed of light), whether or not they are moved; they are computed as "
    "given. " + WARNINGS_LIMIT_TEXT
)


@always_present(unless=("stars", "columns"))
class LookupResponseSchema(ma.Schema):
    reduction = ma.fields.String(
        metadata={"description": "The reduction to B1875.0 used: fk4, fk5 or fk5_iau1976."}
    )
    epoch = ma.fields.Nested(
        EpochOutSchema,
        allow_none=True,
        metadata={
            "description": "Epoch of the positions located: epoch, else catalogue_epoch; "
            "null when the request gave neither (the positions as given)."
        },
    )
    star_count = star_count_field()
    layout = layout_field()
    units = units_field()
    flag_meanings = flag_meanings_field()
    warnings = ma.fields.List(
        ma.fields.Nested(WarningSchema), metadata={"description": WARNINGS_DESCRIPTION}
    )
    stars = ma.fields.List(
        ma.fields.Nested(MembershipSchema),
        metadata={"description": "layout=records: one entry per star."},
    )
    columns = ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.Raw(),
        metadata={"description": "layout=columns: one array per field of the record form."},
    )


@always_present
class CrossingSchema(ma.Schema):
    epoch = ma.fields.Nested(
        EpochOutSchema,
        metadata={"description": "When the star crosses the boundary (to epoch_precision_days)."},
    )
    from_constellation = ma.fields.String(metadata={"description": "IAU abbreviation."})
    to_constellation = ma.fields.String(metadata={"description": "IAU abbreviation."})


@always_present
class StarCrossingsSchema(ma.Schema):
    index = index_field()
    id = id_field()
    constellation_at_start = ma.fields.String(
        metadata={"description": "IAU abbreviation of the constellation at start."}
    )
    constellation_at_end = ma.fields.String(
        metadata={"description": "IAU abbreviation of the constellation at end."}
    )
    crossings = ma.fields.List(
        ma.fields.Nested(CrossingSchema),
        metadata={
            "description": "Each boundary crossing within the window, in time order; empty "
            "when the star stays in one constellation."
        },
    )
    flags = flags_field()


@always_present
class CrossingsResponseSchema(ma.Schema):
    reduction = ma.fields.String(
        metadata={"description": "The reduction to B1875.0 used: fk4, fk5 or fk5_iau1976."}
    )
    catalogue_epoch = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "Epoch of the given astrometry."}
    )
    start = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "Start of the time window searched."}
    )
    end = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "End of the time window searched."}
    )
    epoch_precision_days = ma.fields.Float(
        metadata={"description": "Crossing epochs are located to within this, days."}
    )
    star_count = star_count_field()
    flag_meanings = flag_meanings_field()
    warnings = ma.fields.List(
        ma.fields.Nested(WarningSchema), metadata={"description": WARNINGS_DESCRIPTION}
    )
    stars = ma.fields.List(
        ma.fields.Nested(StarCrossingsSchema),
        metadata={"description": "One entry per star, in the order of the request."},
    )


@always_present
class GeoJsonFeatureSchema(ma.Schema):
    type = ma.fields.String(metadata={"description": "Feature (RFC 7946)."})
    geometry = ma.fields.Dict(
        metadata={
            "description": "Polygon, or MultiPolygon when the constellation has two parts "
            "(Serpens) or is cut at the antimeridian; [longitude, latitude] in degrees, "
            "longitude in -180..180 (the frame's longitude, RA for the equatorial frames, "
            "less 360 above 180), exterior rings counterclockwise (RFC 7946). A "
            "constellation containing a pole is one polygon opened on the antimeridian and "
            "closed along latitude 90 or -90."
        }
    )
    properties = ma.fields.Dict(
        metadata={
            "description": "abbreviation, name, frame, reduction, area_sr, area_deg2; "
            "equinox: a Besselian year for fk4 and b1875, a Julian year for fk5 (null for "
            "icrs and galactic)."
        }
    )


@always_present
class GeoJsonCollectionSchema(ma.Schema):
    type = ma.fields.String(metadata={"description": "FeatureCollection (RFC 7946)."})
    features = ma.fields.List(
        ma.fields.Nested(GeoJsonFeatureSchema),
        metadata={"description": "One Feature per constellation (88)."},
    )


# ------------------------------------------------------------------------------ helpers


def _table_arrays(table):
    c = table.columns
    return (
        c["ra_deg"],
        c["dec_deg"],
        c["parallax_mas"],
        c["pm_ra_cosdec_mas_yr"],
        c["pm_dec_mas_yr"],
        c["radial_velocity_km_s"],
    )


def _locate(args, with_margin: bool):
    table = args["stars"]
    ra, dec, plx, pma, pmd, rv = _table_arrays(table)
    cat_epoch = args.get("catalogue_epoch")
    epoch = args.get("epoch")
    if epoch is None:
        epoch = cat_epoch
    implausible = core_prop.implausible_input_flags(plx, pma, pmd, rv)
    if args["near_boundary_arcsec"] is None:  # the operator's default
        near = current_app.config["SKYDRIFT_SETTINGS"].near_boundary_arcsec
        args = {**args, "near_boundary_arcsec": near}
    moving = np.isfinite(pma) & np.isfinite(pmd)
    # at_pole: a pole of the request's frame as given (the ICRS the core moves the star in
    # is a step of the computation, as in the frames answer).
    at_pole = core_frames.pole_flags(dec) != 0
    frame = frame_from_spec(args["frame"])
    if frame.name != "icrs":
        at = cat_epoch if cat_epoch is not None else (epoch if epoch is not None else 2000.0)
        icrs = core_frames.convert(
            ra, dec, plx, pma, pmd, rv, at, frame, core_frames.make_frame("icrs")
        )
        ra, dec = icrs.ra_deg, icrs.dec_deg
        pma = np.where(moving, icrs.pm_ra_cosdec_mas_yr, np.nan)
        pmd = np.where(moving, icrs.pm_dec_mas_yr, np.nan)
        rv = icrs.radial_velocity_km_s
    if epoch is not None and cat_epoch is not None and epoch != cat_epoch and np.any(moving):
        res = core.locate_moving(
            ra,
            dec,
            plx,
            np.where(moving, pma, 0.0),
            np.where(moving, pmd, 0.0),
            rv,
            cat_epoch,
            epoch,
            reduction=args["reduction"],
            with_margin=with_margin,
            near_boundary_arcsec=args["near_boundary_arcsec"],
        )
        # only stars that moved carry the motion flags
        motion_bits = (
            core.ConstellationFlag.PARALLAX_MISSING
            | core.ConstellationFlag.PARALLAX_NOT_POSITIVE
            | core.ConstellationFlag.RADIAL_VELOCITY_MISSING
            | core.ConstellationFlag.PROPER_MOTION_MISSING
        )
        flags = np.where(moving, res.flags, res.flags & ~np.uint16(motion_bits))
        pole = np.uint16(core.ConstellationFlag.AT_POLE)  # as given, not the core's ICRS
        flags = np.where(moving & at_pole, flags | pole, flags & ~pole)
    else:
        res = core.locate(
            ra,
            dec,
            reduction=args["reduction"],
            with_margin=with_margin,
            near_boundary_arcsec=args["near_boundary_arcsec"],
        )
        flags = res.flags
    if epoch is not None and epoch != cat_epoch:
        # asked for another epoch: a star without proper motion stayed where it was
        fixed = np.uint16(core.ConstellationFlag.PROPER_MOTION_MISSING)
        flags = np.where(moving, flags, flags | fixed)
    return table, res, flags, implausible, epoch


#: The implausible-input (PropagationFlag) bits of a star are kept above this shift in the
#: one mask per star that names its flags (ConstellationFlag bits below it).
_INPUT_SHIFT = 32


def _names_per_star(flags, implausible) -> list[list[str]]:
    """Flag names per star: the ConstellationFlag names, then the names of the implausible
    inputs (PropagationFlag bits); stars with the same masks share one list (fast for 10**6)."""
    key = np.asarray(flags, dtype=np.int64) | (
        np.asarray(implausible, dtype=np.int64) << _INPUT_SHIFT
    )
    uniq, inverse = np.unique(key, return_inverse=True)
    own = flag_names(uniq & ((1 << _INPUT_SHIFT) - 1), core.ConstellationFlag)
    inputs = flag_names(uniq >> _INPUT_SHIFT, core_prop.PropagationFlag)
    per_mask = [(*a, *b) for a, b in zip(own, inputs, strict=True)]
    inverse = inverse.ravel()
    # A FlagNameList, as flag_names returns: the CSV and Arrow writers encode its codes.
    return FlagNameList([per_mask[k] for k in inverse.tolist()], inverse, per_mask)


def _flag_meanings(flags, implausible) -> dict:
    used = set()
    for mask, flag_type in (
        (flags, core.ConstellationFlag),
        (implausible, core_prop.PropagationFlag),
    ):
        present = int(np.bitwise_or.reduce(np.asarray(mask, dtype=np.int64).ravel(), initial=0))
        used.update(n for names in flag_names([present], flag_type) for n in names)
    return {k: v for k, v in FLAG_MEANINGS.items() if k in used}


def _lookup_strings(values, index):
    return np.asarray(values, dtype=object)[np.asarray(index)].tolist()


def _membership_body(args, with_margin: bool):
    table, res, flags, implausible, epoch = _locate(args, with_margin)
    abbr = core.boundary_table().abbreviations
    names = _names_per_star(flags, implausible)
    n = table.size
    cols = {
        "id": table.ids,
        "constellation": _lookup_strings(abbr, res.index),
        "name": _lookup_strings(core.boundary_table().names, res.index),
        "constellation_fk4": _lookup_strings(abbr, res.index_fk4),
        "constellation_fk5": _lookup_strings(abbr, res.index_fk5),
        "reductions_disagree": res.index_fk4 != res.index_fk5,
    }
    if with_margin:
        cols["margin_arcsec"] = res.margin_arcsec
        cols["across"] = _lookup_strings(abbr, res.other_side_index)
        cols["near_boundary"] = (flags & int(core.ConstellationFlag.NEAR_BOUNDARY)) != 0
    cols["ra_b1875_deg"] = res.ra_b1875_deg
    cols["dec_b1875_deg"] = res.dec_b1875_deg
    cols["flags"] = names
    layout = args["layout"] or table.form
    body = {
        "reduction": args["reduction"],
        "epoch": None if epoch is None else epochs_out([epoch])[0],
        "star_count": n,
        "layout": layout,
        "units": UNITS,
        "flag_meanings": _flag_meanings(flags, implausible),
        "warnings": flag_warnings(implausible, table, PROPAGATION_WARNINGS),
    }
    if layout == "columns":
        body["columns"] = cols
    else:
        lists = {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in cols.items()}
        ids = lists.pop("id")
        keys = list(lists)
        body["stars"] = [
            {"index": i, "id": None if ids is None else ids[i], **{k: lists[k][i] for k in keys}}
            for i in range(n)
        ]
    count_stars("/v1/constellations/margins" if with_margin else "/v1/constellations/lookup", n)
    return current_app.json.response(body)


#: How long browsers and caches may keep the constellation list and outlines, seconds: they
#: depend on the request and the boundary table of this version only, the same for every
#: caller, and a page drawing the sky fetches them on every load (1.4 MB for all outlines).
STATIC_MAX_AGE_S = 86_400

#: The 304 of a conditional GET, as documented beside each answer that carries an ETag.
NOT_MODIFIED = "Not modified: the If-None-Match header names this answer's ETag (RFC 9110)."


def _cacheable(resp):
    """Let browsers and caches keep a GET answer (Cache-Control, and a strong ETag, a hash
    of the body) and answer a conditional request naming that ETag with 304 (RFC 9110
    sections 8.8.3 and 13.1.2). With bearer tokens set it is for the caller's own cache
    only (private): a shared cache must not hand it to a caller without a token. An answer
    that read the clock ("now") is not cached: the equinox of now moves 0.14 arcsec a day."""
    if "skydrift_now" in g:  # an answer for "now" (equinox=now) changes with the clock
        return resp
    settings = current_app.config["SKYDRIFT_SETTINGS"]
    scope = "private" if settings.auth_tokens else "public"
    resp.headers["Cache-Control"] = f"{scope}, max-age={STATIC_MAX_AGE_S}"
    resp.add_etag()
    return resp.make_conditional(request)


# ------------------------------------------------------------------------------ endpoints


@blp.route("", methods=["GET"])
@blp.doc(operationId="listConstellations")
@blp.response(200, ConstellationListSchema)
@blp.alt_response(304, description=NOT_MODIFIED)
def list_constellations():
    """List the 88 IAU constellations.

    Abbreviation, name and solid angle (from the boundary table at B1875.0) of each, in
    alphabetical order of name. Use the abbreviations with the outline endpoint.
    """
    refuse_query_options()  # none here: a misspelt one must not pass unnoticed
    items = core.constellation_list()
    return _cacheable(current_app.json.response({"count": len(items), "constellations": items}))


@blp.route("/lookup", methods=["POST"])
@blp.doc(operationId="lookUpConstellations")
@blp.arguments(
    LookupRequestSchema(near_boundary=False),
    example=load_example("constellations_lookup_request.json"),
)
@blp.response(200, LookupResponseSchema)
def lookup(args):
    """Find the constellation of each position.

    Positions are ICRS unless `frame` names another (converted to ICRS first); stars with a
    proper motion are first moved from catalogue_epoch to epoch (straight-line space
    motion). The position is reduced to the equinox B1875.0 of the IAU boundaries (Delporte
    1930; table of Roman 1987) by the chosen reduction, and the answers of the fk4 and fk5
    reductions are both reported. One position or a million: the same endpoint.
    """
    return _membership_body(args, with_margin=False)


@blp.route("/margins", methods=["POST"])
@blp.doc(operationId="findConstellationMargins")
@blp.arguments(LookupRequestSchema(), example=load_example("constellations_lookup_request.json"))
@blp.response(200, LookupResponseSchema)
def margins(args):
    """Find the constellation of each position and its distance from the boundary.

    As the lookup, plus the angular distance (arcsec, on the sphere) to the nearest boundary
    arc, the constellation across it, and a near_boundary flag for stars within
    near_boundary_arcsec of a boundary or within the table's rounding of one.
    """
    return _membership_body(args, with_margin=True)


@blp.route("/crossings", methods=["POST"])
@blp.doc(operationId="findBoundaryCrossings")
@blp.arguments(
    CrossingsRequestSchema(), example=load_example("constellations_crossings_request.json")
)
@blp.response(200, CrossingsResponseSchema)
def crossings(args):
    """Find every boundary crossing of moving stars within a time window.

    Each star moves in a straight line (Hipparcos formulation) from its catalogue epoch. The
    search steps through the window without ever stepping over a boundary: every step is
    shorter than the star's distance from the nearest boundary divided by the fastest it can
    move, so thin slivers of a constellation are not missed. Each crossing is located to
    1e-4 day. The window may reach 100,000 years either side of the catalogue epoch.

    The motion is the standard model of /v1/propagation, without light time: for a star a
    few parsecs away a crossing tens of thousands of years out can come years earlier or
    later than by a model with light time (SOFA starpm, astropy's apply_space_motion).
    """
    table = args["stars"]
    if table.size > MAX_CROSSING_STARS:
        abort(
            413,
            errors=[
                {
                    "field": "stars",
                    "message": f"{table.size} stars; a crossing search takes at most "
                    f"{MAX_CROSSING_STARS} per request",
                }
            ],
        )
    # The window and the step are checked by the request schema (CrossingsRequestSchema).
    cat, start, end = args["catalogue_epoch"], args["start"], args["end"]
    step = args.get("max_step_yr")
    ra, dec, plx, pma, pmd, rv = _table_arrays(table)
    res = core.boundary_crossings(
        ra,
        dec,
        plx,
        pma,
        pmd,
        rv,
        cat,
        start,
        end,
        max_step_yr=step,
        reduction=args["reduction"],
    )
    implausible = core_prop.implausible_input_flags(plx, pma, pmd, rv)
    abbr = core.boundary_table().abbreviations
    names = _names_per_star(res.flags, implausible)
    epochs = epochs_out(res.epoch_jyear) if res.epoch_jyear.size else []
    per_star: list[list[dict]] = [[] for _ in range(table.size)]
    for k in range(res.star.size):
        per_star[int(res.star[k])].append(
            {
                "epoch": epochs[k],
                "from_constellation": abbr[int(res.from_index[k])],
                "to_constellation": abbr[int(res.to_index[k])],
            }
        )
    ids = table.ids
    stars = [
        {
            "index": i,
            "id": None if ids is None else ids[i],
            "constellation_at_start": abbr[int(res.start_index[i])],
            "constellation_at_end": abbr[int(res.end_index[i])],
            "crossings": per_star[i],
            "flags": names[i],
        }
        for i in range(table.size)
    ]
    ends = epochs_out([cat, start, end])
    body = {
        "reduction": args["reduction"],
        "catalogue_epoch": ends[0],
        "start": ends[1],
        "end": ends[2],
        "epoch_precision_days": core.CROSSING_EPOCH_TOLERANCE_DAYS,
        "star_count": table.size,
        "flag_meanings": _flag_meanings(res.flags, implausible),
        "warnings": flag_warnings(implausible, table, PROPAGATION_WARNINGS),
        "stars": stars,
    }
    count_stars("/v1/constellations/crossings", table.size)
    return current_app.json.response(body)


def _geojson(body):
    resp = current_app.json.response(body)
    resp.mimetype = "application/geo+json"
    return _cacheable(resp)


@blp.route(
    "/<string:abbreviation>/outline",
    methods=["GET"],
    parameters=[
        {
            "in": "path",
            "name": "abbreviation",
            "required": True,
            "schema": {"type": "string", "minLength": 3, "maxLength": 3},
            "example": "Tau",
            "description": "IAU three-letter abbreviation, case-insensitive (GET "
            "/v1/constellations lists them).",
        }
    ],
)
@blp.doc(operationId="getConstellationOutline")
@blp.arguments(OutlineQuerySchema(), location="query")
@blp.response(200, GeoJsonFeatureSchema, content_type="application/geo+json")
@blp.alt_response(304, description=NOT_MODIFIED)
def outline(args, abbreviation):
    """Outline of one constellation as GeoJSON.

    The boundary (arcs of constant RA and Dec at B1875.0) is sampled densely enough to stay
    within tolerance_arcsec after transformation to the frame, and returned as an RFC 7946
    Feature: longitudes in -180..180 (RA, less 360 above 180, for the equatorial frames),
    cut at the antimeridian, closed over a pole it contains, exterior rings
    counterclockwise. The abbreviation is case-insensitive.
    """
    try:
        index = core.constellation_index(abbreviation)
    except KeyError:
        abort(
            404,
            message=f"no IAU constellation with abbreviation {abbreviation!r}; {LIST_HINT}",
            errors=[{"field": "abbreviation", "message": f"unknown; {LIST_HINT}"}],
        )
    return _geojson(core.outline(index, **args))


@blp.route("/outlines", methods=["GET"])
@blp.doc(operationId="getConstellationOutlines")
@blp.arguments(OutlineQuerySchema(), location="query")
@blp.response(200, GeoJsonCollectionSchema, content_type="application/geo+json")
@blp.alt_response(304, description=NOT_MODIFIED)
def outlines(args):
    """Outlines of all 88 constellations as one GeoJSON FeatureCollection.

    Same options as the outline of one constellation. The outlines share their vertices
    along common boundaries, so they tile the sphere without gaps or overlaps.
    """
    return _geojson(core.outline_collection(**args))


def _table_ready():
    table = core.boundary_table()  # checksums verified when loaded
    return True, (
        f"Roman (1987) boundary table, {table.ra_low_h.size} rows, "
        f"{len(table.abbreviations)} constellations, checksums verified"
    )


def register(app, api):
    # The table is read (and its checksum verified) and the indexes built once, at start,
    # so that no request pays for them.
    core.warm_up()
    app.extensions["skydrift_ready_checks"]["constellation_boundaries"] = _table_ready
    api.spec.components.schema("ConstellationStar", schema=ConstellationStarSchema)
    api.spec.components.schema("MovingStar", schema=MovingStarSchema)
    api.register_blueprint(blp)
