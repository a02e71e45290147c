"""Pieces shared by every blueprint: the blueprint class, epoch fields, common schemas."""

from __future__ import annotations

import copy
import datetime as _dt
import functools
import operator

import flask_smorest
import marshmallow as ma
import numpy as np
import orjson
from flask import current_app, g, has_request_context, request
from flask_smorest import abort

from ..core import epochs as core_epochs
from ..core import propagation as core_prop
from ..core.flags import flag_names
from ..numbers import DECIMAL_TEXT
from . import arrowio, csvio
from .jsonio import BodyParser
from .spelling import meant_by_unknown_names
from .tables import MISSING_HINT_KEY

JSON_MIMETYPE = "application/json"
JSON_MIMETYPES = (JSON_MIMETYPE,)


class Blueprint(flask_smorest.Blueprint):
    """flask-smorest Blueprint that reads bodies with orjson and insists on JSON for POST.

    Endpoints whose request schema holds a star table (:class:`~.tables.StarTableField`)
    also take a ``text/csv`` body and answer ``text/csv`` on request (``Accept: text/csv``),
    see :mod:`.csvio`; and the same with Apache Arrow IPC streams
    (``application/vnd.apache.arrow.stream``), see :mod:`.arrowio`. Nothing needs to be done
    per endpoint.
    """

    ARGUMENTS_PARSER = BodyParser()

    def __init__(self, *args, accept_mimetypes=JSON_MIMETYPES, **kwargs):
        super().__init__(*args, **kwargs)
        self.accept_mimetypes = tuple(accept_mimetypes)

        @self.before_request
        def _body_and_answer_formats():
            # The endpoint's star table is looked up once per request (kept for _csv_answer).
            table = g.skydrift_table = _table_endpoint()
            if request.method in ("POST", "PUT", "PATCH"):
                mimetype = request.mimetype or ""
                accepted = self.accept_mimetypes
                if table is not None:
                    accepted = (*accepted, csvio.CSV_MIMETYPE, arrowio.ARROW_MIMETYPE)
                if not (mimetype in accepted or mimetype.endswith("+json")):
                    abort(
                        415,
                        message=(
                            f"Content-Type {mimetype or '(none)'} is not accepted here; "
                            f"send {' or '.join(accepted)}"
                        ),
                    )
            # An Arrow answer: the answer object goes to Arrow directly
            # (jsonio.OrjsonProvider.response), no JSON text made and read back for a
            # million stars. The common case costs one header lookup (one-star requests).
            if table is not None and table[2] and arrowio.wants_arrow():
                nested = table[1]
                g.skydrift_answer_writer = lambda body: arrowio.arrow_response(body, nested)

        @self.after_request
        def _csv_answer(resp):
            table = g.get("skydrift_table", _NOT_LOOKED_UP)
            if table is _NOT_LOOKED_UP:  # an earlier hook answered before ours ran
                table = _table_endpoint()
            if table is None:
                return resp
            _vary_on_accept(resp)
            if resp.status_code == 200 and csvio.wants_csv() and resp.mimetype == JSON_MIMETYPE:
                body = orjson.loads(resp.get_data())
                resp.set_data(csvio.body_to_csv(body, table[1]).encode())
                resp.mimetype = csvio.CSV_MIMETYPE
                resp.headers["Content-Type"] = "text/csv; charset=utf-8; header=present"
            return resp

    def arguments(self, schema, *args, csv_answer: bool = True, **kwargs):
        """As flask-smorest's, and marks star-table endpoints for CSV in and out.

        ``csv_answer=False`` for endpoints whose answer is not a table (images): they take
        CSV bodies but do not document a CSV answer.
        """
        decorator = super().arguments(schema, *args, **kwargs)
        instance = schema() if isinstance(schema, type) else schema
        table = csvio.table_field_name(instance)
        if table is None:
            return decorator

        def mark(func):
            wrapped = decorator(func)
            wrapped = self.doc(**_csv_doc(instance, table, csv_answer))(wrapped)
            wrapped._skydrift_csv = (table, csv_answer)
            return wrapped

        return mark

    def response(self, status_code, schema=None, *args, **kwargs):
        """As flask-smorest's, and remembers which answer members are objects (for CSV)."""
        decorator = super().response(status_code, schema, *args, **kwargs)
        if schema is None:
            return decorator
        instance = schema() if isinstance(schema, type) else schema
        nested = csvio.nested_field_names(instance)

        def mark(func):
            wrapped = decorator(func)
            wrapped._skydrift_nested = nested
            return wrapped

        return mark


def refuse_query_options() -> None:
    """422 naming every query-string option of a request to an endpoint that takes none."""
    if request.args:
        abort(
            422,
            errors=[
                {"field": key, "message": "is not a field of this request (it takes none)"}
                for key in request.args
            ],
        )


#: g.skydrift_table before Blueprint's before_request hook has set it.
_NOT_LOOKED_UP = object()


def _table_endpoint():
    """(table field name, nested answer members, whether the answer is a table) of the
    current endpoint, or None for an endpoint without a star table. (The answer of an
    endpoint that draws images is no table.)"""
    view = current_app.view_functions.get(request.endpoint or "")
    mark = getattr(view, "_skydrift_csv", None)
    if mark is None:
        return None
    return mark[0], getattr(view, "_skydrift_nested", set()), mark[1]


def _vary_on_accept(resp) -> None:
    """Add Accept to the answer's Vary header (as ``resp.vary.add``, at a third of its
    cost: no header set parsed and written back)."""
    vary = resp.headers.get("Vary")
    if not vary:
        resp.headers["Vary"] = "Accept"
    elif "accept" not in (v.strip().lower() for v in vary.split(",")):
        resp.headers["Vary"] = f"{vary}, Accept"


def _csv_doc(schema, table: str, csv_answer: bool = True) -> dict:
    """OpenAPI additions for a CSV-capable endpoint: CSV body, query options, CSV answer."""
    params = []
    for name, fld in schema.fields.items():
        if name == table or fld.dump_only:
            continue
        description = fld.metadata.get("description", "")
        param_schema = {"type": "string"}
        if isinstance(fld, Choice):  # its words, as the JSON body's schema lists them
            # (no default: the option is for CSV and Arrow bodies only, and a client that
            # fills in defaults would send it with a JSON body, which refuses it)
            param_schema["enum"] = list(fld.choices)
        params.append(
            {
                "name": name,
                "in": "query",
                "required": False,
                "schema": param_schema,
                "description": "With a text/csv or Arrow stream body only (a JSON body "
                "carries it inside): "
                + description
                + " Lists: repeated or comma-separated; objects: dotted names "
                "(name.member=value) or JSON.",
            }
        )
    doc = {
        "parameters": params,
        "requestBody": {
            "content": {
                csvio.CSV_MIMETYPE: {
                    "schema": {
                        "type": "string",
                        "description": "The star table as CSV: header row of field names "
                        f"(the members of one '{table}' record, units in the names), one "
                        "star per line, empty cell = null. Other fields as query parameters.",
                    },
                },
                arrowio.ARROW_MIMETYPE: {
                    "schema": {
                        "type": "string",
                        "contentMediaType": arrowio.ARROW_MIMETYPE,
                        "description": "The star table as an Apache Arrow IPC stream: one "
                        f"column per member of a '{table}' record under the same names "
                        "(numbers: any integer or floating-point type; id: string or "
                        "integer), Arrow null = unknown; NaN is refused. Other fields as "
                        "query parameters.",
                    },
                },
            }
        },
        "responses": {
            200: {
                "content": {
                    csvio.CSV_MIMETYPE: {
                        "schema": {
                            "type": "string",
                            "description": "With Accept: text/csv. One row per star and "
                            "epoch (or per star and event, such as a boundary crossing; a "
                            "star without any gets one row): index, id, then "
                            "epoch_julian_tdb and epoch_iso_utc when the answer has epochs, "
                            "the quantities under their JSON names, then the figures of the "
                            "row's instant where the answer lists instants (observed places: "
                            "utc_jd, the two-part UTC Julian date as two ';'-separated "
                            "numbers, exact where epoch_iso_utc stops at the millisecond; "
                            "earth_orientation_<member> and sun_<member>, such as "
                            "earth_orientation_ut1_utc_s, earth_orientation_status and "
                            "sun_altitude_deg), flags (';'-separated) last; empty cell = "
                            "null.",
                        },
                    },
                    arrowio.ARROW_MIMETYPE: {
                        "schema": {
                            "type": "string",
                            "contentMediaType": arrowio.ARROW_MIMETYPE,
                            "description": "With Accept: application/vnd.apache.arrow.stream. "
                            "An Arrow IPC stream with the rows and columns of the text/csv "
                            "answer (flags: ';'-joined, dictionary-encoded), Arrow null = "
                            "unknown; units in each field's metadata ('unit'), the answer's "
                            "other members as JSON in the schema metadata key "
                            "'skydrift.answer'.",
                        },
                    },
                }
            }
        },
    }
    if not csv_answer:
        del doc["responses"]
    return doc


#: Warnings of the propagation and velocity answers on implausible inputs.
PROPER_MOTION_WARNING = (
    "total proper motion exceeds 10.4 arcsec/yr, more than any known star: check the unit "
    "(mas/yr) and that the RA component includes cos(dec)"
)
RADIAL_VELOCITY_WARNING = (
    "radial velocity exceeds 5,000 km/s in size, more than any star's measured radial "
    "velocity: check the unit (km/s, not m/s)"
)
PARALLAX_WARNING = (
    "parallax exceeds 1,000 mas (nearer than 1 pc), more than any known star's (the largest "
    "is about 768 mas): probably microarcseconds given as milliarcseconds; check the unit "
    "(mas)"
)


#: Per-star warnings of the propagation (and observed, constellations) answers:
#: PropagationFlag -> message.
PROPAGATION_WARNINGS = {
    core_prop.PropagationFlag.PROPER_MOTION_IMPLAUSIBLE: PROPER_MOTION_WARNING,
    core_prop.PropagationFlag.SPACE_VELOCITY_IMPLAUSIBLE: "parallax, proper motion and "
    "radial velocity imply a space velocity above half the speed of light: check the "
    "parallax and its unit (mas)",
    core_prop.PropagationFlag.NOT_CONVERGED: "light-time iteration did not converge",
    core_prop.PropagationFlag.RADIAL_VELOCITY_IMPLAUSIBLE: RADIAL_VELOCITY_WARNING,
    core_prop.PropagationFlag.PARALLAX_IMPLAUSIBLE: PARALLAX_WARNING,
}


def always_present(schema=None, *, unless: tuple[str, ...] = ()):
    """Declare every member of an answer schema present in every answer, as ``required``
    in the OpenAPI document (a generated client then types them as always there; null is
    allowed where the field allows none). The members an answer may leave out are named in
    ``unless``. A class decorator, or a call on a schema class (``Schema.from_dict``).

    The fields are copied before they are marked: a field object shared with a request
    schema must stay optional there.
    """

    def mark(cls):
        fields = cls._declared_fields
        unknown = set(unless) - set(fields)
        if unknown:
            raise ValueError(f"{cls.__name__} has no member(s) {sorted(unknown)}")
        for name, field in list(fields.items()):
            if name not in unless:
                field = copy.copy(field)
                field.required = True
                fields[name] = field
        return cls

    return mark if schema is None else mark(schema)


#: The ``index`` of a per-star answer or warning.
INDEX_DESCRIPTION = "Position of the star in the request, counted from 0."

#: The ``id`` of a per-star answer or warning.
ID_DESCRIPTION = "Your identifier for the star, echoed; null where the star has none."

#: The answers' ``star_count``.
STAR_COUNT_DESCRIPTION = "Number of stars in the request (and in the answer)."

#: The answers' ``layout``.
LAYOUT_DESCRIPTION = (
    "records (the answer's stars, one object per star) or columns (the answer's columns, "
    "one array per quantity): the request's layout option, else the layout of its stars."
)

#: The answers' ``units``.
UNITS_DESCRIPTION = (
    "Unit of each quantity of the answer, by member name (a name ending in * covers every "
    "name it begins)."
)

#: The answers' ``flag_meanings``.
FLAG_MEANINGS_DESCRIPTION = (
    "Meaning of each flag that some star of this answer carries, by flag name (flags no "
    "star carries are left out)."
)


def units_field() -> ma.fields.Dict:
    """An answer's ``units`` member."""
    return ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.String(),
        metadata={"description": UNITS_DESCRIPTION},
    )


def flag_meanings_field() -> ma.fields.Dict:
    """An answer's ``flag_meanings`` member."""
    return ma.fields.Dict(
        keys=ma.fields.String(),
        values=ma.fields.String(),
        metadata={"description": FLAG_MEANINGS_DESCRIPTION},
    )


def star_count_field() -> ma.fields.Integer:
    """An answer's ``star_count`` member."""
    return ma.fields.Integer(metadata={"description": STAR_COUNT_DESCRIPTION})


def layout_field() -> ma.fields.String:
    """An answer's ``layout`` member."""
    return ma.fields.String(metadata={"description": LAYOUT_DESCRIPTION})


def index_field() -> ma.fields.Integer:
    """A per-star answer's (or warning's) ``index`` member."""
    return ma.fields.Integer(metadata={"description": INDEX_DESCRIPTION})


def id_field() -> ma.fields.Raw:
    """A per-star answer's (or warning's) ``id`` member, echoed from the request."""
    return ma.fields.Raw(allow_none=True, metadata={"description": ID_DESCRIPTION})


#: Each star's ``flags``.
FLAGS_DESCRIPTION = (
    "Names of what was missing, assumed or replaced for this star (meanings in "
    "flag_meanings); empty when nothing was."
)


def flags_field() -> ma.fields.List:
    """A per-star answer's ``flags`` member."""
    return ma.fields.List(ma.fields.String(), metadata={"description": FLAGS_DESCRIPTION})


@always_present
class WarningSchema(ma.Schema):
    index = index_field()
    id = id_field()
    message = ma.fields.String(
        metadata={
            "description": "What looks wrong with the star, in words (and what to check, "
            "for a likely unit mistake)."
        }
    )


#: Most warnings of one kind in one answer (every star carries its flags all the same).
MAX_WARNINGS_PER_KIND = 1000

#: What answers say of their ``warnings`` list about that limit (OpenAPI descriptions).
WARNINGS_LIMIT_TEXT = (
    f"At most {MAX_WARNINGS_PER_KIND:,} of one kind per request (the flags name every star; a "
    "client that splits a catalogue into several requests gets up to that many per request)."
)


def flag_warnings(masks, table, texts: dict) -> list[dict]:
    """Per-star warnings ({index, id, message}) for the flags of ``texts`` (flag -> message)
    set in ``masks`` (one int per star), at most MAX_WARNINGS_PER_KIND per flag."""
    out = []
    if not (masks & functools.reduce(operator.or_, map(int, texts))).any():
        return out
    for flag, text in texts.items():
        for i in np.flatnonzero(masks & int(flag))[:MAX_WARNINGS_PER_KIND]:
            out.append(
                {
                    "index": int(i),
                    "id": None if table.ids is None else table.ids[i],
                    "message": text,
                }
            )
    return out


class Choice(ma.fields.String):
    """One word of a short list, taken in any letter case ("ICRS", "Icrs" and "icrs" are
    icrs, "SVG" is svg) and passed on as listed: such a word names the same thing in any
    case (a field's name does not: an unknown name is refused). The OpenAPI document lists
    the words as written here."""

    def __init__(self, choices, **kwargs):
        self.choices = tuple(choices)
        super().__init__(validate=ma.validate.OneOf(self.choices), **kwargs)
        # a number, true or a list: the list of words, as for a word not in it
        self.error_messages["invalid"] = "must be one of: " + ", ".join(self.choices)

    def _deserialize(self, value, attr, data, **kwargs):
        text = super()._deserialize(value, attr, data, **kwargs)
        folded = text.lower()
        return folded if folded in self.choices else text


class EpochList(ma.fields.List):
    """A list of epochs or instants: one given alone ("J2030.0" for ["J2030.0"]) is refused
    with the list's form shown, as marshmallow's "Not a valid list." did not."""

    def __init__(self, inner, *, example: str = '["J2030.0"] for one epoch', **kwargs):
        super().__init__(inner, **kwargs)
        self.error_messages["invalid"] = f"must be a list, such as {example}"


class StrictFloat(ma.fields.Float):
    """A JSON number only: marshmallow's Float would also read the string "12.5"."""

    default_error_messages = {
        "invalid": "must be a number: in a JSON body without quotes, in a query string an "
        "ASCII decimal such as 0.5 or 2e-3"
    }

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, int | float) or isinstance(value, bool):
            raise self.make_error("invalid")
        return super()._deserialize(value, attr, data, **kwargs)


class QueryFloat(ma.fields.Float):
    """A number in a query string: an ASCII decimal ("0.5", "-2e3") only. marshmallow's
    Float would also read "1_000", "nan", "infinity" and digits of other scripts."""

    default_error_messages = {
        "invalid": "must be a number written as an ASCII decimal, such as 0.5 or 2e-3"
    }

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, str) or not DECIMAL_TEXT.match(value.strip()):
            raise self.make_error("invalid")
        return super()._deserialize(value.strip(), attr, data, **kwargs)


class StrictBoolean(ma.fields.Boolean):
    """JSON true or false only: marshmallow's Boolean would also read 0, 1, "yes", "off"."""

    default_error_messages = {"invalid": "must be true or false"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, bool):  # not a set lookup: 0 == False and 1 == True
            raise self.make_error("invalid")
        return value


EPOCH_DESCRIPTION = (
    "An epoch: a Julian epoch as a number below 10000 or 'J2016.0' (TDB), a Besselian "
    "epoch 'B1950.0', "
    "a Julian date 'JD2451545.0' or modified Julian date 'MJD51544.5' (TDB unless a scale "
    "follows, e.g. 'JD2460000.5 UTC'), an ISO 8601 UTC time '2026-12-02T03:04:05Z', or "
    "'now' (one instant for the whole request)."
)


def number_field(description, *, required=False, lo=None, hi=None, missing_hint="", **range_kw):
    """A float field of a record schema: described, bounded, null allowed unless required.

    ``lo``/``hi`` become a ``validate.Range`` (``range_kw`` passes min_inclusive and
    max_inclusive), which ``StarTableField`` also reads to validate whole columns with numpy.
    ``missing_hint`` (a required field) says what to send instead of leaving the value out;
    the table's "is required" errors add it.
    """
    validators = []
    if lo is not None or hi is not None:
        validators.append(ma.validate.Range(min=lo, max=hi, **range_kw))
    metadata = {"description": description}
    if missing_hint and required:
        metadata = {
            "description": f"{description} Required ({missing_hint}).",
            MISSING_HINT_KEY: missing_hint,
        }
    return ma.fields.Float(
        required=required,
        allow_none=not required,
        validate=validators,
        metadata=metadata,
    )


#: What a request without a required proper motion is told to send instead.
NO_PROPER_MOTION_HINT = (
    "give 0 where the target has no proper motion along this axis: "
    "a missing value is not taken as zero"
)


def proper_motion_field(description, *, required=True, **range_kw):
    """A proper-motion component of a record schema (:func:`number_field`): where it is
    required, a star without it is refused with :data:`NO_PROPER_MOTION_HINT` (a missing
    proper motion is never taken as zero)."""
    return number_field(
        description, required=required, missing_hint=NO_PROPER_MOTION_HINT, **range_kw
    )


class EpochField(ma.fields.Field):
    """An epoch in any accepted form; deserialises to a Julian epoch (TDB), years."""

    #: Reads one epoch (text or number); text other than "now" is read once and cached.
    parse = staticmethod(core_epochs.parse_epoch)

    def __init__(self, **kwargs):
        metadata = dict(kwargs.get("metadata") or {})
        # What the field means, then how an epoch is written (and that Julian epochs are TDB).
        own = metadata.get("description")
        metadata["description"] = f"{own} {EPOCH_DESCRIPTION}" if own else EPOCH_DESCRIPTION
        kwargs["metadata"] = metadata
        super().__init__(**kwargs)

    def _deserialize(self, value, attr, data, **kwargs):
        _refuse_bare_date(value)
        try:
            if type(value) is str and value.strip().lower() != "now":
                return _parse_text(self.parse, value)  # the same text, the same epoch
            if type(value) is str:
                return self.parse(value, now=request_now())
            return self.parse(value)
        except core_epochs.EpochError as exc:
            raise ma.ValidationError(str(exc)) from None


#: A bare number from here up is refused as a year: it is far more likely a modified or
#: plain Julian date sent without its prefix (MJD 51544.5 read as the year 51544.5 would
#: move a star by 50,000 years of its motion without a word).
BARE_EPOCH_LIMIT = 10_000.0


def _refuse_bare_date(value) -> None:
    """422 for a bare number (JSON number or plain number text) of BARE_EPOCH_LIMIT or
    more, saying how to write the year or the date it may be."""
    if type(value) in (int, float):
        number = float(value)
    elif type(value) is str and core_epochs.PLAIN_NUMBER.match(value.strip()):
        # str.strip takes away what float() does not (the separators \x1c to \x1f).
        number = float(value.strip())
    else:
        return
    if number >= BARE_EPOCH_LIMIT:
        shown = value.strip() if isinstance(value, str) else repr(value)
        raise ma.ValidationError(
            f"a bare number is read as a Julian epoch (a year), and {shown} is beyond the "
            f"year 9999: write 'J{shown}' for that year, or 'MJD{shown}' or 'JD{shown}' "
            "for a date"
        )


def check_epoch_count(m: int, field: str, per: str = "epochs") -> None:
    """413 naming SKYDRIFT_MAX_EPOCHS when a request asks for more than that many target
    epochs (or instants): well formed but larger than the service takes, as too many stars
    are (fewer stars cannot cure it, so the Python client does not halve its batch)."""
    limit = current_app.config["SKYDRIFT_SETTINGS"].max_epochs
    if m > limit:
        abort(
            413,
            errors=[
                {
                    "field": field,
                    "message": f"{m} {per}; the limit is {limit} (setting SKYDRIFT_MAX_EPOCHS)",
                }
            ],
        )


def bound_epoch_list(data, field: str, per: str = "epochs"):
    """For a schema's ``pre_load``: an epoch list in ``data[field]`` is counted against
    SKYDRIFT_MAX_EPOCHS before any of its epochs is parsed, so a list of a million costs
    almost nothing to refuse. Returns ``data`` unchanged."""
    value = data.get(field) if isinstance(data, dict) else None
    if isinstance(value, list):
        check_epoch_count(len(value), field, per)
    return data


#: A range's count of 1 where its start and stop differ (the core's words).
COUNT_OF_ONE_TEXT = core_epochs.COUNT_OF_ONE_TEXT


def range_count_field(per: str = "epochs") -> ma.fields.Integer:
    """The count of a range of epochs (or instants), its start and stop included."""
    return ma.fields.Integer(
        strict=True,  # 2.5 is refused, not truncated to 2
        required=True,
        validate=ma.validate.Range(min=1),
        metadata={"description": f"Number of {per}, start and stop included."},
    )


def check_list_or_range(schema, sent, list_key: str, range_key: str) -> None:
    """For a schema's ``validates_schema(pass_original=True)``: exactly one of a list of
    epochs (or instants), ``list_key``, and a range of them, ``range_key``, was sent; else
    a ValidationError on ``list_key``. Judged on what was sent (a list refused for its own
    sake is still given), and quiet where neither was sent but an unknown name stands for
    one of them ("target_epoch", "times"): that name's own message says which it is."""
    sent = sent if isinstance(sent, dict) else {}
    has_list = sent.get(list_key) is not None
    if has_list == (sent.get(range_key) is not None):
        if not has_list and meant_by_unknown_names(sent, schema) & {list_key, range_key}:
            return
        raise ma.ValidationError(f"give exactly one of {list_key} or {range_key}", list_key)


def check_result_count(n: int, m: int, field: str, per: str = "epochs") -> None:
    """413 naming SKYDRIFT_MAX_RESULTS when ``n`` stars x ``m`` epochs (or instants) are
    more results than the service computes in one request: fewer stars per request cure it
    (the Python client halves its batches on this setting's name)."""
    limit = current_app.config["SKYDRIFT_SETTINGS"].max_results
    if n * m > limit:
        abort(
            413,
            errors=[
                {
                    "field": field,
                    "message": f"{n} stars x {m} {per} = {n * m} results; the limit is "
                    f"{limit} (setting SKYDRIFT_MAX_RESULTS)",
                }
            ],
        )


def request_now() -> _dt.datetime:
    """The moment "now" means in the current request: the system clock (UTC) read once per
    request, so every "now" of one request is the same instant (a catalogue epoch and a
    target epoch both "now" move the stars by nothing; a range from "now" to "now" has
    one epoch). Outside a request, the clock."""
    if not has_request_context():
        return _dt.datetime.now(_dt.UTC)
    if "skydrift_now" not in g:
        g.skydrift_now = _dt.datetime.now(_dt.UTC)
    return g.skydrift_now


@functools.lru_cache(maxsize=8192)
def _parse_text(parse, text: str):
    """``parse(text)`` for an epoch string other than "now" (cached; errors are not)."""
    return parse(text)


class InstantField(EpochField):
    """An instant of observation in any epoch form; deserialises to a
    :class:`core.epochs.Instant`, which keeps the UTC date in full (a float Julian epoch
    would round it by up to 3.6 microseconds, 0.05 mas of Earth rotation)."""

    parse = staticmethod(core_epochs.parse_instant)


def epoch_field_to_openapi(self, field, **kwargs) -> dict:
    """apispec attribute function: an epoch is a string or a number."""
    if isinstance(field, EpochField):
        return {"type": ["string", "number", "null"] if field.allow_none else ["string", "number"]}
    return {}


@always_present
class EpochOutSchema(ma.Schema):
    julian_epoch_tdb = ma.fields.Float(
        metadata={
            "description": "Julian epoch on the TDB scale, years. One double: it resolves "
            "2**-42 years (7.2 microseconds) near the present."
        }
    )
    jd_tdb = ma.fields.Float(
        metadata={
            "description": "Julian date on the TDB scale, days. One double: it resolves "
            "2**-31 days (40 microseconds) near the present, coarser than "
            "julian_epoch_tdb; read the epoch back from julian_epoch_tdb."
        }
    )
    iso_utc = ma.fields.String(
        allow_none=True,
        metadata={
            "description": "ISO 8601 UTC, millisecond precision; null outside years 1 to 9999."
        },
    )
    notes = ma.fields.List(
        ma.fields.String(),
        metadata={
            "description": "utc_approximate: leap seconds unknown for that date (before 1960 "
            "or beyond the leap-second table); no_calendar_date: outside years 1 to 9999."
        },
    )


def epochs_out(jyears) -> list[dict]:
    """Julian epochs (TDB) -> list of EpochOut dicts."""
    return _labels_out(tuple((float(x),) for x in np.atleast_1d(jyears)))


def instants_out(instants) -> list[dict]:
    """:class:`core.epochs.Instant` list -> EpochOut dicts, the ISO UTC from the UTC dates."""
    return _labels_out(tuple((t.julian_epoch_tdb, t.utc_jd1, t.utc_jd2) for t in instants))


def _labels_out(rows: tuple) -> list[dict]:
    """Rows of (Julian epoch,) or (Julian epoch, UTC jd1, UTC jd2) -> EpochOut dicts (a few
    rows are served from a cache)."""
    if len(rows) <= 8:
        return [dict(d, notes=list(d["notes"])) for d in _labels_out_cached(rows)]
    return _labels(rows)


@functools.lru_cache(maxsize=4096)
def _labels_out_cached(rows: tuple) -> list[dict]:
    return _labels(rows)


def _labels(rows: tuple) -> list[dict]:
    a = np.asarray(rows, dtype=float).reshape(len(rows), -1) if rows else np.empty((0, 1))
    return _epochs_out(a[:, 0], (a[:, 1], a[:, 2]) if a.shape[1] == 3 else None)


def _epochs_out(values, utc_jd=None) -> list[dict]:
    labels = core_epochs.label_epochs(np.asarray(values, dtype=float), utc_jd)
    notes = flag_names(labels.notes, core_epochs.TimeNote)
    return [
        {
            "julian_epoch_tdb": float(labels.julian_epoch_tdb[i]),
            "jd_tdb": float(labels.jd_tdb[i]),
            "iso_utc": labels.iso_utc[i],
            "notes": notes[i],
        }
        for i in range(labels.julian_epoch_tdb.size)
    ]


@always_present
class FieldErrorSchema(ma.Schema):
    field = ma.fields.String(metadata={"description": "Path of the offending value."})
    message = ma.fields.String(metadata={"description": "What is wrong with it."})


@always_present(unless=("detail", "errors", "request_id"))
class ProblemSchema(ma.Schema):
    """RFC 9457 problem details."""

    type = ma.fields.String(metadata={"description": "Problem type URI (about:blank)."})
    title = ma.fields.String(
        metadata={"description": "Short summary: the HTTP reason phrase of the status (RFC 9110)."}
    )
    status = ma.fields.Integer(metadata={"description": "HTTP status code of the answer."})
    detail = ma.fields.String(
        metadata={"description": "What went wrong in this request; absent when the title says it."}
    )
    errors = ma.fields.List(
        ma.fields.Nested(FieldErrorSchema),
        metadata={
            "description": "The offending values, one entry each; a long list is cut short "
            "(to at most 100 entries, and a last one with field '(more)' where the rest are "
            "counted). Absent when the problem is not with particular fields."
        },
    )
    request_id = ma.fields.String(
        metadata={
            "description": "Identifier of the request in the service's logs: the "
            "X-Request-ID header sent, or one made up for it."
        }
    )
