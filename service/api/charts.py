"""POST /v1/charts/track and /v1/charts/field: charts of stellar motion, SVG or PNG."""

from __future__ import annotations

import re

import marshmallow as ma
import numpy as np
from flask import Response, request
from flask_smorest import abort

from ..charts import FIELD_SIZE_IN, TRACK_SIZE_IN
from .common import Blueprint, Choice, EpochField, EpochList, StrictBoolean, StrictFloat
from .examples import load_example
from .observability import count_stars
from .propagation import StarAstrometrySchema
from .tables import IgnoredColumnsField, RowCheck, StarTableField

blp = Blueprint(
    "charts",
    __name__,
    url_prefix="/v1/charts",
    description="Charts of stellar motion as SVG (default) or PNG images.",
)

#: Most stars in one star-field chart.
MAX_FIELD_STARS = 5000

_FORMAT_DESCRIPTION = (
    "Image format: svg (default) or png. Without it, an Accept header asking for image/png "
    "gets PNG."
)


def _format_field():
    return Choice(
        ("svg", "png"),
        load_default=None,
        allow_none=True,
        metadata={"description": _FORMAT_DESCRIPTION},
    )


#: Control characters other than the line feed (which breaks a title into lines), and
#: U+FFFE, U+FFFF: XML 1.0 cannot write most of them, so the SVG would be unreadable, and
#: the fonts have no glyph for the others (tab, carriage return, DEL, C1 controls).
_NOT_XML = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\ufffe\uffff]")
_NOT_XML_MESSAGE = "must not contain control characters (they cannot be written in SVG)"


def _drawable(text: str) -> None:
    if _NOT_XML.search(text):
        raise ma.ValidationError(_NOT_XML_MESSAGE)


def _drawable_ids(table, usable):
    """RowCheck of a chart's star table: the ids that label the stars must be drawable (an
    empty one labels nothing: such stars are named by their index, as stars without one)."""
    if table.ids is None:
        return []
    bad = [
        k
        for k, v in enumerate(table.ids)
        if usable[k] and v is not None and str(v).strip() and _NOT_XML.search(str(v))
    ]
    return [(np.asarray(bad, dtype=np.int64), "id", _NOT_XML_MESSAGE)]


#: The checks of each star's values together in a chart, run with the star table's own.
_STAR_CHECKS = (RowCheck(("id",), _drawable_ids),)


def _title_field():
    return ma.fields.String(
        load_default=None,
        allow_none=True,
        validate=[ma.validate.Length(max=120), _drawable],
        metadata={"description": "Chart title (default: a description of the chart)."},
    )


def _width_field(size_in: tuple):
    from .. import charts

    default_px = round(size_in[0] * charts.PNG_DPI)

    return ma.fields.Integer(
        strict=True,
        load_default=None,
        allow_none=True,
        validate=ma.validate.Range(min=charts.MIN_WIDTH_PX, max=charts.MAX_WIDTH_PX),
        metadata={
            "description": "Width of the image in pixels; the height follows the chart's "
            "shape. A PNG is drawn that wide, its text and lines scaled with it (default "
            f"{default_px} px, {charts.PNG_DPI} dots per inch); an SVG, drawn in vectors, "
            "states that width and the matching height in pixels (default: its size in "
            "points)."
        },
    )


class TrackChartRequestSchema(ma.Schema):
    stars = StarTableField(
        StarAstrometrySchema,
        checks=_STAR_CHECKS,
        required=True,
        metadata={"description": "The stars (1 to 12), records or columns; ids label them."},
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        required=True, metadata={"description": "Epoch of the given astrometry."}
    )
    start = EpochField(required=True, metadata={"description": "First epoch of the tracks."})
    stop = EpochField(required=True, metadata={"description": "Last epoch of the tracks."})
    ticks = ma.fields.Integer(
        strict=True,
        load_default=6,
        validate=ma.validate.Range(min=2, max=50),
        metadata={
            "description": "Number of epochs marked on each track, evenly spaced, ends included."
        },
    )
    boundaries = StrictBoolean(
        load_default=True,
        metadata={
            "description": "Draw the IAU constellation boundaries in view, their "
            "abbreviations, and mark where a track crosses a boundary (start and stop "
            "then within 100,000 years of catalogue_epoch)."
        },
    )
    format = _format_field()
    title = _title_field()
    width_px = _width_field(TRACK_SIZE_IN)

    @ma.validates_schema(skip_on_field_errors=False)
    def _span(self, data, **kwargs):
        from .. import charts

        errors = {}
        start, stop = data.get("start"), data.get("stop")
        if start is not None and stop is not None:
            if stop <= start:
                errors["stop"] = ["must be later than start"]
            elif stop - start > 200_000.0:
                errors["stop"] = ["at most 200,000 years after start"]
        cat = data.get("catalogue_epoch")
        cons = charts._constellations() if data.get("boundaries") else None
        if cons is not None and cat is not None:
            # The crossing search has a narrower window than the tracks: say so on the
            # field at fault, in the request's own terms (it reached the caller as an
            # error on "stars" naming an internal argument).
            for name in ("start", "stop"):
                value = data.get(name)
                if value is not None and abs(value - cat) > cons.MAX_CROSSING_WINDOW_YR:
                    errors.setdefault(name, []).append(
                        f"must be within {cons.MAX_CROSSING_WINDOW_YR:,.0f} years of "
                        "catalogue_epoch when boundaries are drawn (set boundaries to false "
                        "for a longer track)"
                    )
        if errors:
            raise ma.ValidationError(errors)


class FieldChartRequestSchema(ma.Schema):
    stars = StarTableField(
        StarAstrometrySchema,
        checks=_STAR_CHECKS,
        required=True,
        metadata={"description": f"The stars (at most {MAX_FIELD_STARS}), records or columns."},
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        required=True, metadata={"description": "Epoch of the given astrometry."}
    )
    epochs = EpochList(
        EpochField(),
        example='["J2016.0", "J2100.0"]',
        required=True,
        validate=ma.validate.Length(equal=2),
        metadata={"description": "The two epochs shown side by side."},
    )
    arrow_years = StrictFloat(
        load_default=None,
        allow_none=True,
        validate=ma.validate.Range(min=0.0, min_inclusive=False, max=200_000.0),
        metadata={
            "description": "Span of the motion arrows, Julian years (default: the interval "
            "between the two epochs)."
        },
    )
    format = _format_field()
    title = _title_field()
    width_px = _width_field(FIELD_SIZE_IN)

    @ma.validates_schema(skip_on_field_errors=False, pass_original=True)
    def _epochs_differ(self, data, original, **kwargs):
        # A list with an epoch refused comes with the others only (marshmallow keeps the
        # valid items): judged only when both were read.
        epochs = data.get("epochs")
        sent = original.get("epochs") if isinstance(original, dict) else None
        both = isinstance(sent, list) and len(sent) == 2 and len(epochs or ()) == 2
        if both and "arrow_years" in data and data["arrow_years"] is None:
            if epochs[0] == epochs[1]:
                raise ma.ValidationError("the two epochs must differ", "epochs")


def _image_format(args) -> str:
    if args.get("format"):
        return args["format"]
    best = request.accept_mimetypes.best_match(["image/svg+xml", "image/png"])
    return "png" if best == "image/png" else "svg"


def _columns(table):
    c = table.columns
    return (
        c["ra_deg"],
        c["dec_deg"],
        c["parallax_mas"],
        c["pm_ra_cosdec_mas_yr"],
        c["pm_dec_mas_yr"],
        c["radial_velocity_km_s"],
    )


def _labels(table) -> list[str]:
    if table.ids is None:
        return [f"star {k}" for k in range(table.size)]
    # An empty id labels nothing: such stars are named by their index, as stars without one.
    # Ids that cannot be drawn are refused by the star table (_drawable_ids).
    return [
        f"star {k}" if v is None or not str(v).strip() else str(v) for k, v in enumerate(table.ids)
    ]


def _image(data: bytes, image_format: str) -> Response:
    from .. import charts

    return Response(data, mimetype=charts.MIME_TYPES[image_format])


_IMAGE_RESPONSES = {
    "responses": {
        200: {
            "description": "The chart.",
            "content": {
                "image/svg+xml": {"schema": {"type": "string"}},
                "image/png": {"schema": {"type": "string", "contentMediaType": "image/png"}},
            },
        }
    }
}


@blp.route("/track", methods=["POST"])
@blp.doc(operationId="chartTracks")
@blp.arguments(
    TrackChartRequestSchema(), example=load_example("chart_track_request.json"), csv_answer=False
)
@blp.doc(**_IMAGE_RESPONSES)
def track(args):
    """Chart the tracks of stars across the sky.

    Draws the path of each star (straight-line space motion) from `start` to `stop`, with
    dots at evenly spaced epochs, the nearby IAU constellation boundaries with their
    abbreviations, and the points where a track crosses a boundary (diamonds, labelled
    with the two constellations and the epoch). In the SVG every track is one path in a
    group `track-<index>`; boundaries are groups `boundary-<ABBR>`, crossings
    `crossing-<k>`.
    """
    from .. import charts

    table = args["stars"]
    if table.size > charts.MAX_TRACKS:
        abort(
            422,
            errors=[
                {
                    "field": "stars",
                    "message": f"at most {charts.MAX_TRACKS} stars per track chart",
                }
            ],
        )
    # The span (stop after start, and within the crossing search's window when boundaries
    # are drawn) is checked by the request schema (TrackChartRequestSchema).
    try:
        chart = charts.sky_tracks(
            *_columns(table),
            catalogue_epoch_jyear=args["catalogue_epoch"],
            start_jyear=args["start"],
            stop_jyear=args["stop"],
            ticks=args["ticks"],
            labels=_labels(table),
            boundaries=args["boundaries"],
        )
    except ValueError as exc:
        abort(422, errors=[{"field": "stars", "message": str(exc)}])
    image_format = _image_format(args)
    count_stars("/v1/charts/track", table.size)
    return _image(
        charts.render_tracks(
            chart, title=args["title"], image_format=image_format, width_px=args["width_px"]
        ),
        image_format,
    )


@blp.route("/field", methods=["POST"])
@blp.doc(operationId="chartStarField")
@blp.arguments(
    FieldChartRequestSchema(), example=load_example("chart_field_request.json"), csv_answer=False
)
@blp.doc(**_IMAGE_RESPONSES)
def field(args):
    """Chart a star field at two epochs side by side, with motion arrows.

    Two all-sky panels (Hammer equal-area projection, right ascension increasing to the
    left): the stars at the first and at the second epoch, each with an arrow to where it
    will be `arrow_years` later (default: the interval between the epochs). Marker size
    grows with parallax; stars without a positive parallax are drawn open.
    """
    from .. import charts

    table = args["stars"]
    if table.size > MAX_FIELD_STARS:
        abort(
            422,
            errors=[{"field": "stars", "message": f"at most {MAX_FIELD_STARS} stars per field"}],
        )
    e1, e2 = args["epochs"]  # different, or arrow_years given (FieldChartRequestSchema)
    chart = charts.star_field(
        *_columns(table),
        catalogue_epoch_jyear=args["catalogue_epoch"],
        epochs_jyear=(e1, e2),
        arrow_years=args["arrow_years"],
        labels=_labels(table),
    )
    image_format = _image_format(args)
    count_stars("/v1/charts/field", table.size)
    return _image(
        charts.render_field(
            chart, title=args["title"], image_format=image_format, width_px=args["width_px"]
        ),
        image_format,
    )


def register(app, api):
    from .. import charts

    # With a request time limit, matplotlib is imported now, not by the first chart request,
    # where the limit could interrupt the import (service.charts.load_renderer). Without one
    # the import cannot be cut short, and the command line's in-process uses of the
    # application do not pay its 0.3 to 0.5 s.
    if app.config["SKYDRIFT_SETTINGS"].request_timeout_s:
        charts.load_renderer()
    api.register_blueprint(blp)
