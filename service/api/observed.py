"""POST /v1/observed: where the telescope must point, with Earth orientation and safety.

The figures about the Sun and the horizon are advisory only: the facility's own interlocks
and safety rules decide whether a telescope may point somewhere.
"""

from __future__ import annotations

import functools
import json
import logging
import math
import pathlib

import marshmallow as ma
import numpy as np
from flask import current_app
from flask_smorest import abort

from ..config import ConfigError
from ..core import epochs as core_epochs
from ..core import frames as core_frames
from ..core import observed as core
from ..core import propagation as core_prop
from ..core.flags import flag_names
from ..core.propagation import AT_POLE_RAD
from .common import (
    COUNT_OF_ONE_TEXT,
    PROPAGATION_WARNINGS,
    WARNINGS_LIMIT_TEXT,
    Blueprint,
    EpochField,
    EpochList,
    EpochOutSchema,
    InstantField,
    StrictBoolean,
    StrictFloat,
    WarningSchema,
    always_present,
    bound_epoch_list,
    check_epoch_count,
    check_list_or_range,
    check_result_count,
    epochs_out,
    flag_meanings_field,
    flag_warnings,
    id_field,
    index_field,
    instants_out,
    range_count_field,
    refuse_query_options,
    star_count_field,
    units_field,
)
from .examples import DEMO_DIR, load_example
from .frames import FrameField, FrameStarSchema, frame_from_spec
from .observability import count_stars
from .propagation import IMPLAUSIBLE_INPUT_MEANINGS as _INPUT_FLAG_MEANINGS
from .propagation import input_flags
from .spelling import unknown_name_text
from .tables import IgnoredColumnsField, StarTableField

ADVISORY = (
    "Advisory only: the Sun altitude, Sun separation and horizon figures are for information. "
    "The facility's own interlocks and safety rules decide whether the telescope may point "
    "there."
)

blp = Blueprint(
    "observed",
    __name__,
    url_prefix="/v1",
    description="Astrometric, apparent and observed places of stars at a site and instants "
    "(IAU 2006/2000A as in IAU SOFA), with Earth-orientation provenance and advisory safety "
    "figures. " + ADVISORY,
)

#: Place quantities per star and instant, with units.
PLACE_FIELDS = {
    "azimuth_deg": "deg, observed (refracted), north = 0, east = 90, 0 to 360, in the "
    "horizon of the site's geodetic vertical (the WGS84 ellipsoid's normal, polar motion "
    "included)",
    "altitude_deg": "deg, observed (refracted), above the horizon of the site's geodetic "
    "vertical (a plumb line differs from it by the deflection of the vertical, which a "
    "telescope's pointing model takes up)",
    "zenith_distance_deg": "deg, observed (refracted): 90 minus altitude_deg",
    "hour_angle_deg": "deg, observed (refraction and diurnal aberration included), west "
    "positive, -180 to 180, from the site's meridian",
    "observed_dec_deg": "deg, observed declination (refraction and diurnal aberration "
    "included): with hour_angle_deg, the direction an equatorial mount points at (IAU SOFA "
    "atioq)",
    "observed_ra_cio_deg": "deg, observed right ascension referred to the CIO: the local "
    "Earth rotation angle minus hour_angle_deg (IAU SOFA atioq)",
    "parallactic_angle_deg": "deg, position angle of the zenith at the target, from north "
    "(toward the celestial pole) through east, -180 to 180: positive west of the meridian, "
    "negative east (IAU SOFA hd2pa, of the observed hour angle and declination)",
    "airmass": "dimensionless, Young (1994); null below the geometric (unrefracted) horizon",
    "refraction_arcsec": "arcsec, unrefracted minus observed zenith distance",
    "sun_separation_deg": "deg, between the observed (refracted) places of the target and "
    "the Sun's centre, as their altitudes and azimuths give it (advisory)",
    "astrometric_ra_deg": "deg, geocentric astrometric place (ICRS): the star moved to the "
    "instant and seen from the Earth's centre (proper motion, parallax), without light "
    "deflection or aberration",
    "astrometric_dec_deg": "deg, geocentric astrometric place (ICRS), as astrometric_ra_deg",
    "apparent_ra_deg": "deg, geocentric apparent place, true equator and equinox of date: "
    "the astrometric place with the Sun's light deflection, annual aberration and "
    "precession-nutation",
    "apparent_dec_deg": "deg, geocentric apparent declination of date, as apparent_ra_deg",
    "apparent_ra_cio_deg": "deg, geocentric apparent RA referred to the CIO (CIRS), as "
    "apparent_ra_deg",
}

#: Rates for tracking, per star and instant, with units (only where the request asks for
#: them: include_rates).
RATE_FIELDS = {
    "azimuth_rate_arcsec_s": "arcsec/s, rate of change of the observed azimuth, per second "
    "of time: of the coordinate (times cos(altitude) for the motion across the sky; it "
    "grows without bound near the zenith); null at the zenith",
    "altitude_rate_arcsec_s": "arcsec/s, rate of change of the observed (refracted) "
    "altitude, per second of time, refraction's change included; null at the zenith",
    "parallactic_angle_rate_arcsec_s": "arcsec/s, rate of change of the parallactic angle, "
    "per second of time: the rate at which the field turns at the Cassegrain focus of an "
    "alt-azimuth mount (at a Nasmyth focus the altitude's rate adds to it or is taken from "
    "it, by the side); null at the zenith",
    "hour_angle_rate_arcsec_s": "arcsec/s, rate of change of the observed hour angle, per "
    "second of time, for an equatorial mount's tracking: of the coordinate (times "
    "cos(observed_dec) for the motion across the sky), about 15.04 (the Earth's rotation) "
    "but for the refraction's change low in the sky; null at the celestial pole",
    "observed_dec_rate_arcsec_s": "arcsec/s, rate of change of the observed declination, "
    "per second of time: near zero but for the refraction's change (and the aberration's); "
    "null at the celestial pole",
}

#: Units of the numbers each instant has besides its epoch (instants[].utc_jd,
#: instants[].earth_orientation; the Sun's altitude and azimuth share the places' units):
#: in the answer's units, so that an Arrow answer's columns of them carry their units too.
INSTANT_UNITS = {
    "utc_jd": "days, UTC as a two-part Julian date (the sum is the date)",
    "ut1_utc_s": "s, UT1 - UTC",
    "pm_x_arcsec": "arcsec, polar motion x",
    "pm_y_arcsec": "arcsec, polar motion y",
    "pointing_error_arcsec": "arcsec, pointing uncertainty the Earth orientation implies "
    "(estimate)",
}

FLAG_MEANINGS = {
    "parallax_missing": "No parallax: no parallax shift applied.",
    "parallax_not_positive": "Parallax zero or negative: no parallax shift applied.",
    "radial_velocity_missing": "No radial velocity: taken as zero.",
    "proper_motion_missing": "No proper motion: taken as zero.",
    "below_horizon_limit": "Target below the horizon limit (advisory).",
    "within_sun_avoidance": "Target closer to the Sun than the avoidance angle (advisory).",
    "sun_above_horizon": "The Sun's centre is above the horizon at the site (observed, "
    "refracted altitude above 0; the upper limb is up a few minutes before and after).",
    "earth_orientation_predicted": "UT1-UTC and polar motion are IERS predictions.",
    "earth_orientation_unavailable": "Instant outside the Earth-orientation tables: UT1-UTC "
    "and polar motion taken as zero (errors up to about 15 arcsec).",
    "leap_seconds_extrapolated": "Instant beyond the leap-second table: TAI-UTC taken as its "
    "last value.",
    "airmass_undefined": "Target below the geometric horizon: no airmass.",
    "at_pole": f"At a pole of the input frame as given (within {AT_POLE_RAD:g} rad): the proper "
    "motion is taken along the east and north of the longitude given there (the limit "
    "along that meridian), which sets the direction in which the star moves.",
    "refraction_uncertain": "Observed altitude below 5 deg with refraction on. Above the "
    "horizon the refraction model (SOFA atioq) is good to 30 arcsec at 5 deg and only to "
    "about 20 arcmin at the horizon, and is held at its 2.9 deg value below that (about 11 "
    "arcmin at sea level). Below the horizon, where no refraction is seen, the model still "
    "raises the place: by about that held value near the horizon, less the deeper the "
    "target (refraction_arcsec gives it). Altitude, hour angle and declination are "
    "uncertain by as much, and below the horizon offset by it.",
    "pressure_implausible": "The pressure given is outside 0.83-1.15 times the standard "
    "atmosphere's at the site height, where no weather goes (probably a unit mistake; the "
    "answer's refraction.pressure_warning says which): refraction was computed with it as "
    "given, wrong in proportion.",
}


@functools.lru_cache(maxsize=4)
def load_sites(path: str | None) -> dict:
    """The operator's site list: {name: {latitude_deg, longitude_deg, height_m, ...}}.

    ``path`` is the SKYDRIFT_SITES_FILE setting; empty means the demo scenario's list
    (fictional observatory). A JSON object with a ``sites`` mapping, or the mapping itself.
    Each site needs ``latitude_deg``, ``longitude_deg`` and ``height_m`` (as an inline site
    does) and may have ``horizon_limit_deg`` and ``name``. Read at start: a file that cannot
    be read, is not JSON, repeats a name or has an invalid site raises
    :class:`~service.config.ConfigError` naming the setting, so the service does not start.
    """
    if not path:
        file = DEMO_DIR / "observatory.json"
        if not file.is_file():
            return {}
        where = f"the demo site list {file.name}"
    else:
        file = pathlib.Path(path)
        where = f"SKYDRIFT_SITES_FILE={path!r}"
    try:
        text = file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{where}: cannot be read ({exc})") from None

    def unique_keys(pairs):
        seen = {}
        for key, value in pairs:
            if key in seen:
                raise ConfigError(f"{where}: the name {key!r} appears twice")
            seen[key] = value
        return seen

    try:
        data = json.loads(text, object_pairs_hook=unique_keys)
    except ValueError as exc:
        if isinstance(exc, ConfigError):
            raise
        raise ConfigError(f"{where}: not JSON ({exc})") from None
    sites = data.get("sites", data) if isinstance(data, dict) else None
    if not isinstance(sites, dict):
        raise ConfigError(f"{where}: expected a JSON object of sites by name")
    for name, entry in sites.items():
        if not isinstance(entry, dict):
            raise ConfigError(f"{where}: site {name!r} is not an object")
        missing = [k for k in ("latitude_deg", "longitude_deg", "height_m") if k not in entry]
        if missing:
            raise ConfigError(f"{where}: site {name!r} has no {', '.join(missing)}")
        values = [entry[k] for k in ("latitude_deg", "longitude_deg", "height_m")]
        try:
            if any(isinstance(v, bool) or not isinstance(v, int | float) for v in values):
                raise core.ObservedInputError(
                    "", "latitude_deg, longitude_deg and height_m must be numbers"
                )
            core.make_site(*values, prefix="")
        except core.ObservedInputError as exc:
            field = exc.field.lstrip(".")
            raise ConfigError(
                f"{where}: site {name!r}: {field + ' ' if field else ''}{exc.message}"
            ) from None
        horizon = entry.get("horizon_limit_deg")
        if horizon is not None and (
            isinstance(horizon, bool)
            or not isinstance(horizon, int | float)
            or not -90.0 <= horizon <= 90.0
        ):
            raise ConfigError(
                f"{where}: site {name!r}: horizon_limit_deg must be a number of degrees "
                "between -90 and 90"
            )
    return sites


def _num(description, *, lo=None, hi=None, **kw):
    validators = (
        [ma.validate.Range(min=lo, max=hi, **kw)] if lo is not None or hi is not None else []
    )
    return StrictFloat(
        load_default=None,
        allow_none=True,
        validate=validators,
        metadata={"description": description},
    )


#: Type check of a site coordinate (missing or null: SiteField says "is required").
_SITE_COORDINATE = StrictFloat(allow_none=True)


def _site_list() -> dict:
    """The operator's site list of the application serving this request."""
    return load_sites(current_app.config["SKYDRIFT_SETTINGS"].sites_file or None)


def _check_site_name(name: str) -> None:
    """Refuse a site name that is not in the operator's list, as core.resolve_site words it."""
    try:
        core.resolve_site(name, _site_list())
    except core.ObservedInputError as exc:
        raise ma.ValidationError({"name": [exc.message]}) from None


class SiteField(ma.fields.Field):
    """A site: a configured name, or an object with latitude, longitude and height."""

    #: The members of the object form, for query strings (``site.latitude_deg=...``).
    member_fields = {
        "latitude_deg": _SITE_COORDINATE,
        "longitude_deg": _SITE_COORDINATE,
        "height_m": _SITE_COORDINATE,
        "name": ma.fields.String(),
    }

    def __init__(self, **kwargs):
        kwargs.setdefault("metadata", {})
        kwargs["metadata"].setdefault(
            "description",
            "Observing site: the name of a site in the operator's list (SKYDRIFT_SITES_FILE; "
            "by default the demo scenario's fictional observatory 'kestrel-ridge'), or an "
            "object {latitude_deg (geodetic, -90 to 90), longitude_deg (east positive), "
            "height_m (above the WGS84 ellipsoid)}. At latitude +-90 azimuth and hour angle "
            "are counted from the meridian of longitude_deg and the parallactic angle is 0 "
            "(+90) or 180 (-90).",
        )
        super().__init__(**kwargs)

    def _deserialize(self, value, attr, data, **kwargs):
        if isinstance(value, str):
            _check_site_name(value)
            return value
        if isinstance(value, dict):
            allowed = {"latitude_deg", "longitude_deg", "height_m", "name"}
            errors = {
                k: [unknown_name_text(k, allowed, "accepted: " + ", ".join(sorted(allowed)))]
                for k in set(value) - allowed
            }
            # JSON numbers only, as every number of a request: the core would read true as 1
            # and "38.4" as 38.4.
            for key in ("latitude_deg", "longitude_deg", "height_m"):
                try:
                    _SITE_COORDINATE.deserialize(value.get(key), key, value)
                except ma.ValidationError as exc:
                    errors[key] = exc.messages
            name = value.get("name")
            if name is not None and not isinstance(name, str):
                errors["name"] = ["must be a string (a label for the site)"]
            if errors:
                raise ma.ValidationError(errors)
            if set(value) == {"name"}:  # a name in the site list, as the string form
                _check_site_name(name)
                return value
            # Then every member's own problem at once, as core.resolve_site and
            # core.make_site name them one at a time (the view builds the site with them).
            # The height is required: a silent sea-level default would overestimate
            # refraction at altitude.
            coords = [value.get(k) for k in ("latitude_deg", "longitude_deg", "height_m")]
            errors = {
                k: ["is required"]
                for k, v in zip(("latitude_deg", "longitude_deg", "height_m"), coords, strict=True)
                if v is None
            }
            problems = core.site_problems(*(0.0 if v is None else v for v in coords))
            errors.update({k: [m] for k, m in problems.items() if k not in errors})
            if errors:
                raise ma.ValidationError(errors)
            return value
        raise ma.ValidationError("must be a site name or an object with latitude_deg etc.")


def site_field_to_openapi(self, field, **kwargs) -> dict:
    if isinstance(field, SiteField):
        return {"type": ["string", "object"]}
    return {}


class AtmosphereSchema(ma.Schema):
    pressure_hpa = _num(
        "Air pressure at the site, hPa. Null or absent: estimated from the site height with "
        "the US Standard Atmosphere 1976 (the height taken as geopotential height, as that "
        "standard defines it). 0 turns refraction off. A pressure outside 0.83-1.15 times "
        "the standard atmosphere's at the site height (no weather goes there: sea-level "
        "records are 870 and 1084 hPa) is used as given but flagged pressure_implausible "
        "and warned about, naming the likely unit (kPa, atm, inHg, mmHg): refraction is "
        "proportional to the pressure.",
        lo=core.PRESSURE_RANGE_HPA[0],
        hi=core.PRESSURE_RANGE_HPA[1],
        error="must be between {min:g} and {max:g} hPa (not pascals: 101325 Pa is 1013.25 hPa)",
    )
    temperature_c = _num(
        "Air temperature, degrees Celsius. Null: standard atmosphere at the site height.",
        lo=core.TEMPERATURE_RANGE_C[0],
        hi=core.TEMPERATURE_RANGE_C[1],
        error="must be between {min:g} and {max:g} degrees Celsius (not kelvin: 280 K is 6.85 C)",
    )
    relative_humidity = _num(
        "Relative humidity, a dimensionless fraction, 0 to 1. Null: 0.5. Above 0 only "
        "where water would not boil: the saturation vapour pressure at the temperature (SOFA "
        "refco's formula: about 201 hPa at 60 C, 23 hPa at 20 C, 6.1 hPa at 0 C) must be "
        "below the pressure, or the request is refused (422) as air that cannot exist.",
        lo=0.0,
        hi=1.0,
        error="must be between 0 and 1, a fraction (not a percentage: 55 % is 0.55)",
    )
    wavelength_um = _num(
        "Effective wavelength, micrometres: 0.3-2.0 (optical/infrared) or 100-1000000 "
        "(radio). Null: 0.55.",
        lo=core.WAVELENGTH_OPTICAL_UM[0],
        hi=core.WAVELENGTH_RADIO_UM[1],
    )

    @ma.validates("wavelength_um")
    def _wavelength_gap(self, value, **kwargs):
        if (
            value is not None
            and core.WAVELENGTH_OPTICAL_UM[1] < value < core.WAVELENGTH_RADIO_UM[0]
        ):
            raise ma.ValidationError(
                "must be 0.3-2.0 (optical/infrared) or 100-1000000 (radio) micrometres"
            )


def _within_supported_span(instant) -> None:
    """An instant within the span of the observed place, on its UTC date, as
    core.observed_places checks it (a validator of each item: its index is its own, even
    where other items of the list were refused)."""
    epoch = 2000.0 + ((instant.utc_jd1 - 2451545.0) + instant.utc_jd2) / 365.25
    if not core.SUPPORTED_EPOCH_MIN <= epoch < core.SUPPORTED_EPOCH_MAX:
        raise ma.ValidationError(core.SUPPORTED_SPAN_TEXT)


class InstantRangeSchema(ma.Schema):
    start = InstantField(
        required=True,
        validate=_within_supported_span,
        metadata={"description": 'First instant (ISO 8601 UTC, "now" or any epoch form).'},
    )
    stop = InstantField(
        required=True,
        validate=_within_supported_span,
        metadata={"description": "Last instant (it may come before start)."},
    )
    count = range_count_field("instants")

    @ma.validates_schema
    def _start_and_stop_included(self, data, **kwargs):
        if data["count"] == 1:
            try:
                core_epochs.instant_range(data["start"], data["stop"], 1)
            except core_epochs.EpochError:
                raise ma.ValidationError(COUNT_OF_ONE_TEXT, "count") from None


class ObservedRequestSchema(ma.Schema):
    stars = StarTableField(
        FrameStarSchema,
        required=True,
        metadata={"description": "The stars (records or columns), astrometry at catalogue_epoch."},
    )
    ignored_columns = IgnoredColumnsField()
    catalogue_epoch = EpochField(
        required=True, metadata={"description": "Epoch of the given astrometry."}
    )
    frame = FrameField(
        load_default=lambda: {"name": "icrs"},
        metadata={"description": "Frame of the given astrometry (default ICRS)."},
    )
    instants = EpochList(
        InstantField(validate=_within_supported_span),
        example='["now"] for one instant',
        validate=ma.validate.Length(min=1),
        metadata={
            "description": "Instants of observation (ISO 8601 UTC such as "
            "'2026-12-02T22:30:00.250Z', or any epoch form); give this or instant_range. "
            "Many stars at one instant, one star at many instants (a track), or every star "
            "at every instant. A UTC instant is used as written, to the microsecond and "
            "below (the Earth turns 15 arcsec a second); a Julian epoch given as a number "
            "resolves 7 microseconds near the present."
        },
    )
    instant_range = ma.fields.Nested(
        InstantRangeSchema,
        metadata={
            "description": "Evenly spaced instants (give this or instants), such as a track "
            "for the night: count instants from start to stop inclusive, in equal steps of "
            "elapsed time (TAI, SI seconds; a leap second inside the range counts as a "
            "second like any other, so the UTC times of day may not step evenly across it). "
            "The first and last are start and stop as given."
        },
    )
    site = SiteField(required=True)
    atmosphere = ma.fields.Nested(
        AtmosphereSchema,
        load_default=dict,
        allow_none=True,
        metadata={
            "description": "Air at the site for refraction. Null or absent: every member "
            "at its default (pressure and temperature from the standard atmosphere at the "
            "site height)."
        },
    )
    horizon_limit_deg = _num(
        "Altitude below which a target is flagged, degrees (advisory). Default: the own "
        "limit of a site given by name from the operator's list, else "
        "SKYDRIFT_HORIZON_LIMIT_DEG.",
        lo=-90.0,
        hi=90.0,
    )
    sun_avoidance_deg = _num(
        "Sun separation below which a target is flagged, degrees (advisory). Default "
        "SKYDRIFT_SUN_AVOIDANCE_DEG (30, a placeholder the operator must set).",
        lo=0.0,
        hi=180.0,
    )
    include_rates = StrictBoolean(
        load_default=False,
        metadata={
            "description": "Also give, for each place, how fast its azimuth, altitude, "
            "parallactic angle, observed hour angle and declination change (arcsec per "
            "second of time): "
            + ", ".join(RATE_FIELDS)
            + ". The Earth's rotation, the refraction's change with altitude and the "
            "aberration's change are included; they hold for the instant given (compute "
            "places again rather than extrapolate far)."
        },
    )

    @ma.pre_load
    def _bound_instant_list(self, data, **kwargs):
        return bound_epoch_list(data, "instants", per="instants")

    @ma.validates_schema(skip_on_field_errors=False, pass_original=True)
    def _one_kind_of_instants(self, data, original, **kwargs):
        check_list_or_range(self, original, "instants", "instant_range")

    @ma.validates_schema(skip_on_field_errors=False)
    def _checks_across_members(self, data, **kwargs):
        """The check that needs two members, run even where other members failed, so that
        one answer names every invalid field: air that can exist at the site
        (core.refraction_settings: its pressure may come from the site's height)."""
        errors = {}
        if "site" in data and "atmosphere" in data:  # both valid on their own
            try:
                core.refraction_settings(
                    core.resolve_site(data["site"], _site_list()),
                    core.make_atmosphere(**(data["atmosphere"] or {})),
                )
            except core.ObservedInputError as exc:
                member, _, key = exc.field.partition(".")
                errors[member] = {key: [exc.message]} if key else [exc.message]
        if errors:
            raise ma.ValidationError(errors)


def _out(field_class, description, **kwargs):
    return field_class(metadata={"description": description}, **kwargs)


@always_present
class EarthOrientationOutSchema(ma.Schema):
    table = _out(ma.fields.String, "Earth orientation table used ('none' when unavailable).")
    status = _out(ma.fields.String, "measured, predicted or unavailable.")
    source = _out(ma.fields.String, "Finer kind of the values (e.g. measured_final).")
    ut1_utc_s = _out(ma.fields.Float, "UT1 - UTC used, seconds (0 where unavailable).")
    pm_x_arcsec = _out(ma.fields.Float, "Polar motion x used, arcsec (0 where unavailable).")
    pm_y_arcsec = _out(ma.fields.Float, "Polar motion y used, arcsec (0 where unavailable).")
    accuracy_class = _out(ma.fields.String, "milliarcsecond, sub_arcsecond or arcseconds.")
    pointing_error_arcsec = _out(
        ma.fields.Float, "Pointing uncertainty these values imply, arcsec (estimate)."
    )


@always_present
class SunOutSchema(ma.Schema):
    altitude_deg = _out(
        ma.fields.Float,
        "Observed altitude of the Sun's centre, degrees, refracted as the targets are (not "
        "when refraction is off) (advisory).",
    )
    azimuth_deg = _out(ma.fields.Float, "Azimuth of the Sun, degrees, north = 0, east = 90.")


@always_present
class SiteOutSchema(ma.Schema):
    name = _out(
        ma.fields.String,
        "Name in the operator's list; null for a site given by coordinates.",
        allow_none=True,
    )
    latitude_deg = _out(ma.fields.Float, "Geodetic latitude, degrees, north positive.")
    longitude_deg = _out(ma.fields.Float, "Longitude, degrees, east positive.")
    height_m = _out(ma.fields.Float, "Height above the WGS84 ellipsoid, metres.")


@always_present
class RefractionOutSchema(ma.Schema):
    mode = _out(
        ma.fields.String,
        "How the pressure was found (e.g. given_pressure, standard_atmosphere_pressure), or off.",
    )
    pressure_hpa = _out(ma.fields.Float, "Air pressure used, hPa (0: refraction off).")
    temperature_c = _out(ma.fields.Float, "Air temperature used, degrees Celsius.")
    temperature_source = _out(ma.fields.String, "given or standard_atmosphere.")
    relative_humidity = _out(
        ma.fields.Float, "Relative humidity used, a dimensionless fraction, 0 to 1."
    )
    wavelength_um = _out(ma.fields.Float, "Effective wavelength used, micrometres.")
    model = _out(ma.fields.String, "Refraction model.")
    pressure_warning = _out(
        ma.fields.String,
        "Why the pressure given cannot be the air at the site (outside 0.83-1.15 times the "
        "standard atmosphere's at its height), with both pressures and the likely mistake "
        "(a unit, or a pressure reduced to sea level); null when it can. The places are "
        "computed with the pressure as given and flagged pressure_implausible.",
        allow_none=True,
    )


@always_present
class LimitsOutSchema(ma.Schema):
    horizon_limit_deg = _out(ma.fields.Float, "Altitude limit applied, degrees (advisory).")
    sun_avoidance_deg = _out(ma.fields.Float, "Sun avoidance angle applied, degrees (advisory).")
    note = _out(
        ma.fields.String, "Where the limits came from: the request, the site list or a setting."
    )


@always_present
class InstantOutSchema(ma.Schema):
    epoch = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "The instant, as an epoch (TDB) and in UTC."}
    )
    utc_jd = ma.fields.List(
        ma.fields.Float(),
        metadata={
            "description": "The instant in UTC as a two-part Julian date, days: their sum "
            "is the date (two parts keep the precision one double would lose)."
        },
    )
    earth_orientation = ma.fields.Nested(
        EarthOrientationOutSchema,
        metadata={
            "description": "UT1-UTC and polar motion used at this instant, and their source."
        },
    )
    sun = ma.fields.Nested(
        SunOutSchema, metadata={"description": "The Sun seen from the site at this instant."}
    )


#: The place of one star at one instant (null: not finite, e.g. airmass below the horizon).
ObservedPlaceSchema = always_present(
    ma.Schema.from_dict(
        {
            **{
                name: ma.fields.Float(allow_none=True, metadata={"description": f"{unit}."})
                for name, unit in PLACE_FIELDS.items()
            },
            **{
                name: ma.fields.Float(
                    allow_none=True,
                    metadata={"description": f"{unit}. Present where include_rates is true."},
                )
                for name, unit in RATE_FIELDS.items()
            },
            "flags": ma.fields.List(
                ma.fields.String(), metadata={"description": "Names from flag_meanings."}
            ),
        },
        name="ObservedPlaceSchema",
    ),
    unless=tuple(RATE_FIELDS),
)


@always_present
class ObservedStarSchema(ma.Schema):
    index = index_field()
    id = id_field()
    at_instants = ma.fields.List(
        ma.fields.Nested(ObservedPlaceSchema),
        metadata={"description": "One entry per instant, in the order of instants."},
    )


@always_present
class ObservedResponseSchema(ma.Schema):
    advisory = ma.fields.String(
        metadata={"description": "What the safety figures are for: information only."}
    )
    site = ma.fields.Nested(SiteOutSchema, metadata={"description": "The site used."})
    refraction = ma.fields.Nested(
        RefractionOutSchema, metadata={"description": "The air and the refraction model used."}
    )
    limits = ma.fields.Nested(
        LimitsOutSchema,
        metadata={"description": "The horizon limit and Sun avoidance angle applied (advisory)."},
    )
    catalogue_epoch = ma.fields.Nested(
        EpochOutSchema, metadata={"description": "Epoch of the given astrometry."}
    )
    input_frame = ma.fields.String(
        metadata={"description": "Frame of the given astrometry with its equinox, e.g. 'ICRS'."}
    )
    instants = ma.fields.List(
        ma.fields.Nested(InstantOutSchema),
        metadata={"description": "One entry per instant, in the order of the request."},
    )
    earth_orientation_tables = ma.fields.Dict(
        metadata={
            "description": "The Earth-orientation and leap-second tables in use: "
            "primary_table (name), primary_span_mjd (its first and last day, MJD), "
            "last_measured_mjd (its last measured, not predicted, day), "
            "leap_seconds_valid_until_mjd; fallback_table and fallback_span_mjd where a "
            "second table covers instants before the first."
        }
    )
    star_count = star_count_field()
    units = units_field()
    flag_meanings = flag_meanings_field()
    warnings = ma.fields.List(
        ma.fields.Nested(WarningSchema),
        metadata={
            "description": "Stars whose inputs look like a unit mistake (proper motion above "
            "10.4 arcsec/yr, radial velocity above 5,000 km/s, parallax above 1,000 mas) or are "
            "inconsistent; they are computed as given. A pressure that looks like one is "
            "the request's, said once in refraction.pressure_warning. " + WARNINGS_LIMIT_TEXT
        },
    )
    stars = ma.fields.List(
        ma.fields.Nested(ObservedStarSchema),
        metadata={"description": "One entry per star: index, id, at_instants (one per instant)."},
    )


def _listed_horizon_limit(entry: dict, settings) -> tuple[float, str]:
    """(degrees, source) of the horizon limit a request gets for the site list ``entry``
    it names when it gives none: the entry's own ("site_list"), or else the service's
    setting ("setting"; also for an inline site, ``entry`` {}). GET /v1/sites lists it."""
    own = entry.get("horizon_limit_deg")
    if own is None:
        return float(settings.horizon_limit_deg), "setting"
    return float(own), "site_list"


def _avoidance_setting_note(avoidance: float) -> str:
    """Where the service's own Sun avoidance angle comes from, saying so when it is the
    built-in placeholder."""
    return "Sun avoidance angle from the service's " + (
        "setting SKYDRIFT_SUN_AVOIDANCE_DEG."
        if avoidance != core.DEFAULT_SUN_AVOIDANCE_DEG
        else f"setting SKYDRIFT_SUN_AVOIDANCE_DEG, at its built-in default of "
        f"{core.DEFAULT_SUN_AVOIDANCE_DEG:g} deg: a placeholder the operator must set to "
        "the facility's own value."
    )


def _finite(x: float):
    """A Python float, or None where it is not finite (JSON has no NaN)."""
    return x if math.isfinite(x) else None


def _core_error(exc: core.ObservedInputError):
    abort(422, errors=[{"field": exc.field, "message": exc.message}])


@blp.route("/observed", methods=["POST"])
@blp.doc(operationId="computeObservedPlaces")
@blp.arguments(ObservedRequestSchema(), example=load_example("observed_request.json"))
@blp.response(200, ObservedResponseSchema)
def observed(args):
    """Observed places at a site: azimuth, altitude, hour angle, parallactic angle, airmass.

    The stars' catalogue astrometry is first moved to each instant (standard straight-line
    model), then carried through the IAU 2006/2000A chain of the SOFA routines (light
    deflection by the Sun, not by the planets; aberration, precession-nutation, Earth
    rotation, polar motion, diurnal aberration, refraction). The instants are listed
    (instants), or evenly spaced for a track (instant_range: start, stop, count, in equal
    steps of elapsed time). Each instant states the Earth-orientation table used, whether
    its values were measured, predicted or unavailable, and the accuracy class. A CSV or
    Arrow answer carries these figures of each instant on each of its rows (utc_jd,
    earth_orientation_<member>, sun_altitude_deg, sun_azimuth_deg).
    With include_rates, each place also says how fast its azimuth, altitude, parallactic
    angle, observed hour angle and declination change (arcsec per second of time), for a
    mount's tracking (alt-azimuth or equatorial) and a derotator.
    The Sun altitude, Sun separation and horizon flags are advisory: the facility's own
    interlocks and safety rules decide.
    """
    settings = current_app.config["SKYDRIFT_SETTINGS"]
    table = args["stars"]
    n = table.size
    # Each check names only the setting exceeded: fewer stars per request cure the second
    # (the Python client halves its batches on it), never the first.
    if args.get("instant_range") is not None:
        rng = args["instant_range"]
        check_epoch_count(rng["count"], "instant_range.count", per="instants")
        check_result_count(n, rng["count"], "instant_range.count", per="instants")
        given = core_epochs.instant_range(rng["start"], rng["stop"], rng["count"])
    else:
        given = args["instants"]
        check_epoch_count(len(given), "instants", per="instants")
        check_result_count(n, len(given), "instants", per="instants")
    instants = np.array([t.julian_epoch_tdb for t in given])  # for the space motion
    m = instants.size
    # The UTC dates as given, in full, for the Earth's rotation (core.epochs.Instant).
    utc1 = np.array([t.utc_jd1 for t in given])
    utc2 = np.array([t.utc_jd2 for t in given])
    # The site, the atmosphere and the instants' span were checked by the schema
    # (SiteField, _within_supported_span, _checks_across_members); the core checks them
    # again, and any difference between the two is still answered 422 naming the field
    # (_core_error).
    sites = _site_list()
    try:
        site = core.resolve_site(args["site"], sites)
        atm = core.make_atmosphere(**(args["atmosphere"] or {}))
    except core.ObservedInputError as exc:
        _core_error(exc)
    horizon = args.get("horizon_limit_deg")
    if horizon is not None:
        horizon_note = "Horizon limit as given in the request."
    else:
        # The list's own limit belongs to its site: not to an inline site that carries the
        # same name as a label, at other coordinates.
        spec = args["site"]
        by_name = isinstance(spec, str) or (isinstance(spec, dict) and set(spec) == {"name"})
        entry = sites.get(site.name, {}) if by_name else {}
        horizon, source = _listed_horizon_limit(entry, settings)
        horizon_note = (
            f"Horizon limit from the site list's entry for {site.name!r}."
            if source == "site_list"
            else "Horizon limit from the service's setting SKYDRIFT_HORIZON_LIMIT_DEG."
        )
    avoidance = args.get("sun_avoidance_deg")
    if avoidance is not None:
        limits_note = f"Advisory. {horizon_note} Sun avoidance angle as given in the request."
    else:
        avoidance = settings.sun_avoidance_deg
        limits_note = f"Advisory. {horizon_note} {_avoidance_setting_note(avoidance)}"

    epoch0 = float(args["catalogue_epoch"])
    c = table.columns
    vals = [
        c[f]
        for f in (
            "ra_deg",
            "dec_deg",
            "parallax_mas",
            "pm_ra_cosdec_mas_yr",
            "pm_dec_mas_yr",
            "radial_velocity_km_s",
        )
    ]
    frame = frame_from_spec(args["frame"])
    if frame.name != "icrs":
        conv = core_frames.convert(*vals, epoch0, frame, core_frames.make_frame("icrs"))
        vals = [
            conv.ra_deg,
            conv.dec_deg,
            conv.parallax_mas,
            conv.pm_ra_cosdec_mas_yr,
            conv.pm_dec_mas_yr,
            conv.radial_velocity_km_s,
        ]
    # Move the stars to each instant with the core propagation, then observe.
    if m == 1:
        propagated = core_prop.propagate(*vals, epoch0, instants[0])
        epoch_arg = instants[0]
    else:
        propagated = core_prop.propagate(*(v[:, None] for v in vals), epoch0, instants[None, :])
        epoch_arg = instants[None, :]
    star_args = [getattr(propagated.astrometry, f) for f in _AST]
    # Missing motions stay missing for the flags (the propagation reports them as NaN too).
    # Implausible inputs (parallax, proper motion, radial velocity, space velocity) are warned
    # about as in the propagation answer; the flags depend on the inputs only, not on the
    # instant.
    # They are also named in each star's flags, so that CSV and Arrow answers carry them.
    input_masks, input_names = input_flags(propagated.flags, n)
    warnings = flag_warnings(input_masks, table, PROPAGATION_WARNINGS)
    # A star at a pole of the input frame as given moves along the east and north of the
    # longitude given (its motion's direction is a convention there): at_pole.
    at_pole = core_frames.pole_flags(c["dec_deg"]) != 0
    if at_pole.any():
        input_names = [
            (*x, "at_pole") if p else x for x, p in zip(input_names, at_pole, strict=True)
        ]
    eop = _earth_orientation()
    try:
        res = core.observed_places(
            *star_args,
            epoch_arg,
            utc1 if m > 1 else utc1[0],
            utc2 if m > 1 else utc2[0],
            site,
            atm,
            eop=eop,
            horizon_limit_deg=horizon,
            sun_avoidance_deg=avoidance,
            rates=args["include_rates"],
        )
    except core.ObservedInputError as exc:
        _core_error(exc)

    def grid(a):
        return np.broadcast_to(np.asarray(a), (n, m)) if m > 1 else np.asarray(a).reshape(n, 1)

    # Each quantity as nested lists of Python floats (one tolist per column, not one numpy
    # scalar per value).
    place_fields = {**PLACE_FIELDS, **RATE_FIELDS} if args["include_rates"] else PLACE_FIELDS
    cols = [(name, grid(getattr(res, name)).tolist()) for name in place_fields]
    flag_grid = grid(res.flags)
    names = flag_names(flag_grid.reshape(-1), core.ObservedFlag)
    ids = table.ids
    stars = []
    for i in range(n):
        at = []
        for k in range(m):
            entry = {name: _finite(col[i][k]) for name, col in cols}
            entry["flags"] = (*names[i * m + k], *input_names[i])
            at.append(entry)
        stars.append({"index": i, "id": None if ids is None else ids[i], "at_instants": at})

    ev = res.eop
    sun_alt = np.broadcast_to(np.asarray(res.sun_altitude_deg), (n, m) if m > 1 else (n,))
    sun_az = np.broadcast_to(np.asarray(res.sun_azimuth_deg), (n, m) if m > 1 else (n,))
    inst_out = []
    labels = instants_out(given)
    for k in range(m):

        def pick(a, k=k):
            a = np.asarray(a)
            return a.reshape(-1)[k] if a.size > 1 else a.reshape(-1)[0]

        status = core.EarthOrientationStatus(int(pick(ev.status)))
        inst_out.append(
            {
                "epoch": labels[k],
                "utc_jd": [float(utc1[k]), float(utc2[k])],
                "earth_orientation": {
                    "table": str(pick(ev.table)),
                    "status": core.STATUS_WORDS[status],
                    "source": status.name.lower(),
                    "ut1_utc_s": float(pick(ev.ut1_utc_s)),
                    "pm_x_arcsec": float(pick(ev.pm_x_arcsec)),
                    "pm_y_arcsec": float(pick(ev.pm_y_arcsec)),
                    "accuracy_class": str(pick(ev.accuracy_class)),
                    "pointing_error_arcsec": float(pick(ev.pointing_error_arcsec)),
                },
                "sun": {
                    "altitude_deg": float(sun_alt[0, k] if m > 1 else sun_alt[0]),
                    "azimuth_deg": float(sun_az[0, k] if m > 1 else sun_az[0]),
                },
            }
        )
    all_names = {x for lst in (*names, *input_names) for x in lst}
    r = res.refraction
    body = {
        "advisory": ADVISORY,
        "site": {
            "name": site.name,
            "latitude_deg": site.latitude_deg,
            "longitude_deg": site.longitude_deg,
            "height_m": site.height_m,
        },
        "refraction": {
            "mode": r.mode,
            "pressure_hpa": r.pressure_hpa,
            "temperature_c": r.temperature_c,
            "temperature_source": r.temperature_source,
            "relative_humidity": r.relative_humidity,
            "wavelength_um": r.wavelength_um,
            "model": "A tan z + B tan^3 z, IAU SOFA refco/atioq",
            "pressure_warning": r.pressure_warning,
        },
        "limits": {
            "horizon_limit_deg": float(horizon),
            "sun_avoidance_deg": float(avoidance),
            "note": limits_note,
        },
        "catalogue_epoch": epochs_out([epoch0])[0],
        "input_frame": frame.describe(),
        "instants": inst_out,
        "earth_orientation_tables": res.provenance,
        "star_count": n,
        "units": {**place_fields, **INSTANT_UNITS},
        "flag_meanings": {
            k: v
            for k, v in (*FLAG_MEANINGS.items(), *_INPUT_FLAG_MEANINGS.items())
            if k in all_names
        },
        "warnings": warnings,
        "stars": stars,
    }
    count_stars("/v1/observed", n)
    return current_app.json.response(body)


_AST = (
    "ra_deg",
    "dec_deg",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)


@functools.lru_cache(maxsize=4)
def _load_tables(path: str | None):
    """(tables, None), or (placeholder tables, reason) when they cannot be read.

    A missing or corrupt table must not stop the service (propagation, constellations and
    velocities do not need it): it starts degraded, /ready says so (503), and every
    observed-place answer carries earth_orientation_unavailable.
    """
    try:
        return core.earth_orientation(path), None
    except Exception as exc:
        source = path or "the packaged astropy-iers-data table"
        reason = f"cannot read {source} ({type(exc).__name__}: {exc})"[:300]
        logging.getLogger("skydrift.observed").error(
            "Earth-orientation tables unusable, serving degraded: %s", reason
        )
        return core.no_earth_orientation(), reason


@always_present
class ListedSiteSchema(ma.Schema):
    name = _out(
        ma.fields.String,
        'The name a request gives as its site ("site": "<name>", or {"name": "<name>"}).',
    )
    full_name = _out(
        ma.fields.String,
        "The site list's longer name for the site (its entry's own name member); null where "
        "the entry has none.",
        allow_none=True,
    )
    latitude_deg = _out(ma.fields.Float, "Geodetic latitude, degrees, north positive.")
    longitude_deg = _out(ma.fields.Float, "Longitude, degrees, east positive.")
    height_m = _out(ma.fields.Float, "Height above the WGS84 ellipsoid, metres.")
    horizon_limit_deg = _out(
        ma.fields.Float,
        "Altitude limit a request naming this site gets when it gives none, degrees (advisory).",
    )
    horizon_limit_source = _out(
        ma.fields.String,
        "site_list (the entry's own horizon_limit_deg) or setting "
        "(SKYDRIFT_HORIZON_LIMIT_DEG, for entries without one).",
    )


@always_present
class SiteListSchema(ma.Schema):
    source = _out(
        ma.fields.String,
        "operator_list (the file of the setting SKYDRIFT_SITES_FILE) or demo_list (that "
        "setting is empty: the demo scenario's fictional sites).",
    )
    count = _out(ma.fields.Integer, "Number of sites.")
    sun_avoidance_deg = _out(
        ma.fields.Float,
        "Sun avoidance angle a request gets when it gives none, degrees (advisory).",
    )
    note = _out(ma.fields.String, "Where the limits come from.")
    advisory = _out(ma.fields.String, "What the limits are for, and what decides.")
    sites = ma.fields.List(
        ma.fields.Nested(ListedSiteSchema),
        metadata={"description": "The sites, in alphabetical order of name."},
    )


@blp.route("/sites", methods=["GET"])
@blp.doc(operationId="listSites")
@blp.response(200, SiteListSchema)
def list_sites():
    """List the named observing sites this service knows, with the limits requests get.

    A request may name one of these as its site instead of giving latitude, longitude and
    height. Check the coordinates here against the facility's own survey before relying on
    a name: the list is the operator's configuration (SKYDRIFT_SITES_FILE), and a place
    computed for a wrong longitude is wrong by the same angle in hour angle. The limits are
    advisory: the facility's own interlocks and safety rules decide.
    """
    refuse_query_options()  # none here: a misspelt one must not pass unnoticed
    settings = current_app.config["SKYDRIFT_SETTINGS"]
    listed = []
    for name, entry in sorted(_site_list().items()):
        horizon, source = _listed_horizon_limit(entry, settings)
        full_name = entry.get("name")
        listed.append(
            {
                "name": name,
                "full_name": full_name if isinstance(full_name, str) else None,
                "latitude_deg": float(entry["latitude_deg"]),
                "longitude_deg": float(entry["longitude_deg"]),
                "height_m": float(entry["height_m"]),
                "horizon_limit_deg": horizon,
                "horizon_limit_source": source,
            }
        )
    avoidance = settings.sun_avoidance_deg
    return current_app.json.response(
        {
            "source": "operator_list" if settings.sites_file else "demo_list",
            "count": len(listed),
            "sun_avoidance_deg": float(avoidance),
            "note": "Advisory. A site's horizon limit is its entry's own, or else the "
            "service's setting SKYDRIFT_HORIZON_LIMIT_DEG; a request may give its own "
            f"(horizon_limit_deg). {_avoidance_setting_note(avoidance)}",
            "advisory": ADVISORY,
            "sites": listed,
        }
    )


def _earth_orientation():
    settings = current_app.config["SKYDRIFT_SETTINGS"]
    return _load_tables(settings.eop_file or None)[0]


def _eop_state():
    """(tables, problem or None, source label) of the Earth-orientation tables in use."""
    settings = current_app.config["SKYDRIFT_SETTINGS"]
    eop, problem = _load_tables(settings.eop_file or None)
    return eop, problem, "SKYDRIFT_EOP_FILE" if settings.eop_file else "astropy-iers-data"


def _eop_ready():
    eop, problem, source = _eop_state()
    if problem:
        return False, problem + "; UT1-UTC and polar motion taken as zero"
    return True, (
        f"{source}: {eop.primary.name}, measured to MJD {eop.primary.last_measured_mjd:.0f}"
    )


def _eop_in_use():
    """(source label, MJD of the last measured day) of the Earth-orientation table the
    observed places use; None when none is usable (for the age on /metrics)."""
    eop, problem, source = _eop_state()
    return None if problem else (source, eop.primary.last_measured_mjd)


def register(app, api):
    # Earth-orientation and leap-second tables are read once, at start (never downloaded).
    settings = app.config["SKYDRIFT_SETTINGS"]
    _load_tables(settings.eop_file or None)
    load_sites(settings.sites_file or None)
    api.ma_plugin.converter.add_attribute_function(site_field_to_openapi)
    app.extensions["skydrift_ready_checks"]["earth_orientation"] = _eop_ready
    app.extensions["skydrift_eop_in_use"] = _eop_in_use
    api.register_blueprint(blp)
