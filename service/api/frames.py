"""POST /v1/frames: astrometry with motion converted between celestial frames (and epochs)."""

from __future__ import annotations

import marshmallow as ma
import numpy as np
from flask import current_app

from ..core import epochs as core_epochs
from ..core import frames as core
from ..core import propagation as core_prop
from ..core.constants import C_KM_S
from ..core.flags import flag_names, present_flag_names
from ..core.propagation import AT_POLE_RAD
from .common import (
    Blueprint,
    Choice,
    EpochField,
    EpochList,
    EpochOutSchema,
    always_present,
    bound_epoch_list,
    check_epoch_count,
    check_result_count,
    epochs_out,
    flag_meanings_field,
    flags_field,
    id_field,
    index_field,
    number_field,
    proper_motion_field,
    request_now,
    star_count_field,
    units_field,
)
from .errors import clip_echo
from .examples import load_example
from .observability import count_stars
from .propagation import IMPLAUSIBLE_INPUT_MEANINGS as _INPUT_FLAG_MEANINGS
from .propagation import input_flags
from .tables import IgnoredColumnsField, StarTableField

blp = Blueprint(
    "frames",
    __name__,
    url_prefix="/v1",
    description="Convert stellar astrometry with motion between ICRS, FK5, FK4 (B1950 and "
    "other equinoxes, with E-terms), galactic and ecliptic frames, optionally to other epochs.",
)

VALUE_FIELDS = (
    "ra_deg",
    "dec_deg",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)

UNITS = {
    "ra_deg": "deg (longitude in the frame: RA, galactic l or ecliptic longitude)",
    "dec_deg": "deg (latitude in the frame: Dec, galactic b or ecliptic latitude)",
    "parallax_mas": "mas",
    "pm_ra_cosdec_mas_yr": "mas per Julian year, along the longitude, includes cos(latitude)",
    "pm_dec_mas_yr": "mas per Julian year, along the latitude",
    "radial_velocity_km_s": "km/s",
    "epochs": "Julian epoch (TDB), years",
}


_num = number_field


#: One star in the input frame.
FrameStarSchema = ma.Schema.from_dict(
    {
        "id": ma.fields.Raw(
            allow_none=True, metadata={"description": "Your identifier for the star, echoed."}
        ),
        "ra_deg": _num(
            "Longitude in the input frame (RA, galactic l, ecliptic longitude), degrees.",
            required=True,
            lo=0.0,
            hi=360.0,
        ),
        "dec_deg": _num(
            "Latitude in the input frame (Dec, galactic b, ecliptic latitude), degrees.",
            required=True,
            lo=-90.0,
            hi=90.0,
        ),
        "parallax_mas": _num(
            "Parallax, mas. Null if unknown; <= 0 accepted and flagged, and so is a value above "
            "1,000 mas (parallax_implausible: nearer than any known star)."
        ),
        "pm_ra_cosdec_mas_yr": proper_motion_field(
            "Proper motion along the longitude times cos(latitude), mas per Julian year (also "
            "for FK4: convert tropical-century catalogue values first). At a pole (dec_deg "
            "+-90) east and north are those of the ra_deg given (flag at_pole).",
        ),
        "pm_dec_mas_yr": proper_motion_field(
            "Proper motion along the latitude, mas per Julian year.",
        ),
        "radial_velocity_km_s": _num(
            "Radial velocity, km/s, positive receding. Null if unknown.",
            lo=-C_KM_S,
            hi=C_KM_S,
            min_inclusive=False,
            max_inclusive=False,
        ),
    },
    name="FrameStarSchema",
)


class EquinoxField(ma.fields.Field):
    """An equinox: a year number, an epoch string ("B1950.0", "J2000.0") or "of_date"."""

    def __init__(self, **kwargs):
        kwargs.setdefault("metadata", {})
        kwargs["metadata"].setdefault(
            "description",
            "Equinox. A number is a Besselian year for fk4 and a Julian year for fk5 and "
            "ecliptic; strings like 'B1950.0' or 'J2000.0' are converted; 'of_date' (ecliptic "
            "only) means the equinox of the epoch of the positions. Defaults: fk4 B1950.0, "
            "fk5 and ecliptic J2000.0; none for icrs and galactic.",
        )
        super().__init__(**kwargs)

    def _deserialize(self, value, attr, data, **kwargs):
        if isinstance(value, bool):
            raise ma.ValidationError("must be a year or an epoch string")
        if isinstance(value, int | float):
            return ("number", float(value))
        if isinstance(value, str):
            text = value.strip()
            if text.lower() == "of_date":
                return ("of_date", None)
            try:
                jyear = core_epochs.parse_epoch(text, now=request_now())
            except core_epochs.EpochError as exc:
                raise ma.ValidationError(str(exc)) from None
            return ("jyear", jyear)
        raise ma.ValidationError("must be a year or an epoch string")


def equinox_field_to_openapi(self, field, **kwargs) -> dict:
    if isinstance(field, EquinoxField):
        return {"type": ["string", "number", "null"] if field.allow_none else ["string", "number"]}
    return {}


class FrameSpecSchema(ma.Schema):
    # Anything but an object or a frame's name (FrameField): show both forms.
    error_messages = {
        "type": 'must be a frame\'s name ("galactic") or an object such as '
        '{"name": "fk5", "equinox": "J2000.0"}'
    }

    name = Choice(
        core.FRAME_NAMES,
        required=True,
        metadata={"description": "icrs, fk5, fk4, galactic or ecliptic."},
    )
    equinox = EquinoxField(load_default=None, allow_none=True)

    @ma.validates_schema(skip_on_field_errors=False)
    def _makes_a_frame(self, data, **kwargs):
        if "name" not in data or "equinox" not in data:  # refused already, for its own sake
            return
        try:
            frame_with_equinox(data["name"], data["equinox"])
        except ValueError as exc:
            raise ma.ValidationError(str(exc), "equinox") from None


class FrameField(ma.fields.Nested):
    """A frame: an object (FrameSpecSchema), or its name alone for the frame at its default
    equinox ("galactic" is {"name": "galactic"}, "fk4" is fk4 at B1950.0)."""

    #: Added to each frame field's description.
    FORMS_TEXT = (
        ' A name alone ("galactic", "fk4") is the frame at its default equinox; an object '
        'gives another ({"name": "fk5", "equinox": "J2000.0"}).'
    )

    def __init__(self, **kwargs):
        metadata = dict(kwargs.pop("metadata", {}))
        metadata["description"] = metadata.get("description", "") + self.FORMS_TEXT
        super().__init__(FrameSpecSchema, metadata=metadata, **kwargs)

    def _deserialize(self, value, attr, data, partial=None, **kwargs):
        if isinstance(value, str):
            if value.lower() not in core.FRAME_NAMES:  # (the name's Choice folds its case)
                raise ma.ValidationError(
                    f"unknown frame {clip_echo(value, 64)!r}: give "
                    f"{', '.join(core.FRAME_NAMES[:-1])} or {core.FRAME_NAMES[-1]}, or an "
                    'object with an equinox such as {"name": "fk4", "equinox": "B1950.0"}'
                )
            value = {"name": value}
        return super()._deserialize(value, attr, data, partial=partial, **kwargs)


def frame_field_to_openapi(self, field, ret=None, **kwargs) -> dict:
    """A FrameField: a frame's name, or the object (apispec gave the object's reference)."""
    if not isinstance(field, FrameField) or ret is None:
        return {}
    ref = ret.pop("$ref", None)
    if ref is None:  # (OpenAPI 3.0 wraps it in allOf)
        ref = ret.pop("allOf")[0]["$ref"]
    names = {"type": "string", "enum": list(core.FRAME_NAMES)}
    return {"oneOf": [names, {"$ref": ref}]}


def frame_with_equinox(name: str, equinox) -> core.Frame:
    """A frame name and an EquinoxField value -> core Frame (ValueError on a bad
    combination: an equinox for a frame without one, or outside the range taken). The
    equinox is kept to 1e-9 year (0.03 s): the round trip through a Julian date leaves
    B1875.0 as 1874.9999999999998 (echoed so) and B1000.0, the range's end, as
    999.9999999999999 (refused)."""
    kind, value = equinox or (None, None)
    if kind is None:
        return core.make_frame(name)
    if kind == "of_date":
        return core.make_frame(name, "of_date")
    if name == "fk4":
        bes = value if kind == "number" else core_epochs.julian_epoch_to_besselian_epoch(value)
        return core.make_frame(name, round(float(bes), 9))
    return core.make_frame(name, round(float(value), 9))


def frame_from_spec(spec: dict) -> core.Frame:
    """FrameSpecSchema data -> core Frame (the schema has checked that they make one, and
    named the field of a bad combination)."""
    return frame_with_equinox(spec["name"], spec.get("equinox"))


class FramesRequestSchema(ma.Schema):
    stars = StarTableField(
        FrameStarSchema,
        required=True,
        metadata={"description": "The stars: a list of records, or an object of columns."},
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        required=True,
        metadata={"description": "Epoch at which the given positions hold (e.g. 'B1950.0')."},
    )
    from_frame = FrameField(
        required=True,
        metadata={"description": "Frame of the given positions and motions."},
    )
    to_frame = FrameField(
        load_default=lambda: {"name": "icrs"},
        metadata={"description": "Frame of the answer (default ICRS)."},
    )
    target_epochs = EpochList(
        EpochField(),
        validate=ma.validate.Length(min=1),
        metadata={
            "description": "Epochs for the output (optional; default the catalogue epoch). "
            "The stars are converted to ICRS at the catalogue epoch, moved with the standard "
            "straight-line model, and converted to the output frame at each target epoch."
        },
    )

    @ma.pre_load
    def _bound_epoch_list(self, data, **kwargs):
        return bound_epoch_list(data, "target_epochs")


#: What each quantity of an answer is, and when it is null (the units are those of UNITS).
_AT_EPOCH_MEANINGS = {
    "ra_deg": ("Longitude at this epoch in the output frame", ""),
    "dec_deg": ("Latitude at this epoch in the output frame", ""),
    "parallax_mas": ("Parallax at this epoch", " Null where the star came without one."),
    "pm_ra_cosdec_mas_yr": (
        "Proper motion at this epoch in the output frame",
        " At a pole (at_pole) along the east of the longitude answered.",
    ),
    "pm_dec_mas_yr": (
        "Proper motion at this epoch in the output frame",
        " At a pole (at_pole) along the north of the longitude answered.",
    ),
    "radial_velocity_km_s": (
        "Radial velocity at this epoch, positive receding",
        " Null where the star came without one.",
    ),
}

#: The astrometry of one star at one target epoch in the output frame (null: unknown).
FrameAtEpochSchema = always_present(
    ma.Schema.from_dict(
        {
            name: ma.fields.Float(
                allow_none=True,
                metadata={"description": f"{meaning}, {UNITS[name]}.{null}"},
            )
            for name, (meaning, null) in _AT_EPOCH_MEANINGS.items()
        },
        name="FrameAtEpochSchema",
    )
)


@always_present
class FrameResultSchema(ma.Schema):
    index = index_field()
    id = id_field()
    flags = flags_field()
    at_epochs = ma.fields.List(
        ma.fields.Nested(FrameAtEpochSchema),
        metadata={"description": "One entry per target epoch, in the order of epochs."},
    )


@always_present
class FramesResponseSchema(ma.Schema):
    from_frame = ma.fields.String(
        metadata={
            "description": "The input frame, with its equinox where it has one: e.g. 'FK4 B1950.0'."
        }
    )
    to_frame = ma.fields.String(
        metadata={
            "description": "The output frame, with its equinox where it has one: e.g. 'ICRS'."
        }
    )
    catalogue_epoch = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "Epoch of the given positions."}
    )
    epochs = ma.fields.List(
        ma.fields.Nested(EpochOutSchema),
        metadata={
            "description": "Epochs of the output, in order: target_epochs, else the "
            "catalogue epoch alone."
        },
    )
    star_count = star_count_field()
    units = units_field()
    flag_meanings = flag_meanings_field()
    methods = ma.fields.List(
        ma.fields.String(),
        metadata={"description": "How the conversions are made, with their sources."},
    )
    stars = ma.fields.List(
        ma.fields.Nested(FrameResultSchema),
        metadata={"description": "One entry per star, in the order of the request."},
    )


FLAG_MEANINGS = {
    "parallax_missing": "No parallax: treated as infinitely distant; parallax out unknown.",
    "parallax_not_positive": "Parallax zero or negative: treated as infinitely distant.",
    "radial_velocity_missing": "No radial velocity: zero for the geometry; out unknown.",
    "proper_motion_missing": "No proper motion: taken as zero.",
    "at_pole": f"At a pole (within {AT_POLE_RAD:g} rad) "
    "of the input frame as given, or of the output "
    "frame at some epoch (a star at the galactic pole given in ICRS lands on one): the "
    "longitude is a convention there, and east and north, along which the proper-motion "
    "components lie, are those of the longitude given (input) or answered (output; set by "
    "rounding at the pole itself). The total proper motion does not depend on it.",
}


METHODS = [
    "FK4 B1950.0 <-> FK5 J2000.0: Standish (1982) / Aoki et al. (1983), IAU SOFA fk425 "
    "(reverse: fk524 refined to invert fk425 exactly).",
    "FK4 other equinoxes: E-terms removed, Newcomb precession (Kinoshita/Andoyer), E-terms "
    "restored.",
    "FK5 <-> ICRS: Hipparcos frame rotation and spin (SOFA fk52h/h2fk5, fk5hz).",
    "FK5 other equinoxes: IAU 1976 precession. Ecliptic: IAU 2006 (SOFA ecm06). Galactic: "
    "Hipparcos definition (SOFA icrs2g).",
    "A frame of another equinox, and the ecliptic of date (the equinox of each epoch), is "
    "held fixed: its proper motions contain no rate of precession of its axes.",
    "FK4 positions at an epoch other than B1950.0 are moved to epoch B1950.0 in FK4 with "
    "uniform space motion before fk425 (which needs epoch and equinox B1950.0).",
]


def _o(x):
    x = float(x)
    return x if np.isfinite(x) else None


@blp.route("/frames", methods=["POST"])
@blp.doc(operationId="convertFrames")
@blp.arguments(FramesRequestSchema(), example=load_example("frames_request.json"))
@blp.response(200, FramesResponseSchema)
def convert(args):
    """Convert stars between frames, optionally to other epochs.

    Position, proper motion, parallax and radial velocity are converted together. A legacy
    FK4 B1950.0 catalogue entry comes out as ICRS at any epoch in one request: give
    ``from_frame`` fk4, ``catalogue_epoch`` B1950.0 and the ``target_epochs`` wanted.
    """
    table = args["stars"]
    n = table.size
    src = frame_from_spec(args["from_frame"])
    dst = frame_from_spec(args["to_frame"])
    epoch0 = float(args["catalogue_epoch"])
    targets = args.get("target_epochs")
    targets = np.array([epoch0] if targets is None else targets, dtype=float)
    # Each check names only the setting exceeded: fewer stars per request cure the second
    # (the Python client halves its batches on it), never the first.
    check_epoch_count(targets.size, "target_epochs")
    check_result_count(n, targets.size, "target_epochs")
    c = table.columns
    vals = [c[f] for f in VALUE_FIELDS]
    icrs = core.make_frame("icrs")
    to_icrs = core.convert(*vals, epoch0, src, icrs)
    # at_pole: a pole of the input frame as given, or of the output frame at some epoch (the
    # ICRS between them is a step of the computation, made in Cartesian form).
    pole = np.uint32(core.FrameFlag.AT_POLE)
    flags = ((to_icrs.flags & ~pole) | core.pole_flags(c["dec_deg"])).astype(np.int64)
    propagated = core_prop.propagate(
        to_icrs.ra_deg[:, None],
        to_icrs.dec_deg[:, None],
        to_icrs.parallax_mas[:, None],
        to_icrs.pm_ra_cosdec_mas_yr[:, None],
        to_icrs.pm_dec_mas_yr[:, None],
        to_icrs.radial_velocity_km_s[:, None],
        epoch0,
        targets[None, :],
    )
    moved = propagated.astrometry
    # Implausible inputs (parallax, proper motion, radial velocity, space velocity) are named
    # in each star's flags, as in the propagation and observed answers.
    _, input_names = input_flags(propagated.flags, n)
    out = core.convert(
        moved.ra_deg,
        moved.dec_deg,
        moved.parallax_mas,
        moved.pm_ra_cosdec_mas_yr,
        moved.pm_dec_mas_yr,
        moved.radial_velocity_km_s,
        targets[None, :],
        icrs,
        dst,
    )
    flags |= np.bitwise_or.reduce(core.pole_flags(out.dec_deg), axis=1)
    names = flag_names(flags, core.FrameFlag)
    present = present_flag_names(flags, core.FrameFlag)
    present |= {x for lst in input_names for x in lst}
    values = [getattr(out, f) for f in VALUE_FIELDS]
    ids = table.ids
    stars = [
        {
            "index": i,
            "id": None if ids is None else ids[i],
            "flags": [*names[i], *input_names[i]],
            "at_epochs": [
                {f: _o(v[i, k]) for f, v in zip(VALUE_FIELDS, values, strict=True)}
                for k in range(targets.size)
            ],
        }
        for i in range(n)
    ]
    body = {
        "from_frame": src.describe(),
        "to_frame": dst.describe(),
        "catalogue_epoch": epochs_out([epoch0])[0],
        "epochs": epochs_out(targets),
        "star_count": n,
        "units": UNITS,
        "flag_meanings": {
            k: v for k, v in {**FLAG_MEANINGS, **_INPUT_FLAG_MEANINGS}.items() if k in present
        },
        "methods": METHODS,
        "stars": stars,
    }
    count_stars("/v1/frames", n)
    return current_app.json.response(body)


def register(app, api):
    # equinox_field_to_openapi is added in create_app, before any blueprint: the
    # constellations blueprint, registered earlier, documents FrameSpec first.
    api.register_blueprint(blp)
