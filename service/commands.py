"""Batch commands of ``skydrift``: catalogue files in, results out, locally or via a service.

Every command reads a catalogue (CSV with a header row of field names, units in the names:
``id,ra_deg,dec_deg,parallax_mas,pm_ra_cosdec_mas_yr,pm_dec_mas_yr,radial_velocity_km_s``,
empty cell = unknown; or a JSON file with a ``stars`` list) and either computes in this
process (default) or sends the work to a running service (``--url``). Both ways run the same
request pipeline, so the output is identical. Work is sent in batches (``--batch-size``);
a progress bar is shown on a terminal and nothing when standard error is not one.
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io
import json
import os
import pathlib
import re
import sys

from .client import Client, SkydriftError, _now_text, _read_csv, pin_now, relocate_lines
from .numbers import decimal, whole

DEFAULT_CATALOGUE_EPOCH = "J2016.0"
DEFAULT_BATCH_SIZE = 10_000

CATALOGUE_HELP = (
    "catalogue file: CSV with a header row of field names (id, ra_deg, dec_deg, "
    "parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s, optional "
    "standard errors *_error_* and correlations correlation_*; empty cell = unknown), or "
    "JSON with a 'stars' list; '-' reads CSV from standard input"
)

EPILOG = """\
Epochs: 2016.0 or J2016.0 (Julian epoch, TDB), B1950.0, JD2451545.0, MJD51544.5,
2026-12-02T22:00:00Z (UTC), now. Without --url the work is done in this process; with
--url it is sent to that service (with the bearer token in SKYDRIFT_TOKEN, if the service
requires one). The output is the same either way.
Exit status: 0 done; 1 the catalogue's content was refused, or the work failed (a service
that cannot be reached, an output that cannot be written; details on standard error); 2 bad
command line: an option or a value refused (by this command or by the service), or a
catalogue file that cannot be opened.
"""


class UsageError(ValueError):
    """A bad command line that argparse cannot see (a --frame, options that go together, a
    catalogue file that cannot be opened): exit status 2 with one line, as argparse's own."""


class Catalogue:
    """A catalogue read from a file: CSV text, and the catalogue epoch if the file says.
    ``from_json``: the CSV text was made from a JSON file's stars (one row per star, in
    order), so errors name ``stars[i].field`` rather than lines of that text."""

    def __init__(
        self,
        csv_text: str,
        catalogue_epoch: str | None,
        rows: int,
        from_json: bool = False,
        frame: dict | None = None,
    ):
        self.csv_text = csv_text
        self.catalogue_epoch = catalogue_epoch
        self.rows = rows
        self.from_json = from_json
        #: The frame a JSON file states (``{"name": ..., "equinox": ...}``); None: not said.
        self.frame = frame


def frame_spec(value, where: str) -> dict:
    """A frame as a catalogue file or --frame writes it ("FK4", "fk5 J2000.0", or an object
    {"name", "equinox"}) -> the API's frame object (lower-case name)."""
    if isinstance(value, str) and 1 <= len(value.split()) <= 2:
        name, *equinox = value.split()
        spec = {"name": name.lower()}
        if equinox:
            spec["equinox"] = equinox[0]
        return spec
    if isinstance(value, dict) and isinstance(value.get("name"), str):
        return {**value, "name": value["name"].lower()}
    form = "" if where.startswith("--") else ' or an object {"name": ..., "equinox": ...}'
    raise ValueError(
        f"{where}: a frame is a name with an optional equinox ('FK4', 'fk5 J2000.0'){form}"
    )


def _is_icrs(frame: dict | None) -> bool:
    return frame is None or frame.get("name") == "icrs"


#: An error's field that names a CSV line and column ("line 7: dec_deg").
_CSV_LINE_FIELD = re.compile(r"^line (\d+): (.+)$")


def json_star_fields(errors: list, csv_text: str) -> list:
    """'line 3: dec_deg' in CSV text made from a JSON catalogue -> 'stars[1].dec_deg' (the
    header line, naming a member: 'stars[*].name'), and an empty cell called what it was in
    the JSON file (null or absent)."""
    if not any(_CSV_LINE_FIELD.match(e.field) for e in errors):
        return errors
    lines = _read_csv(csv_text)[2]
    star_of_line = {line: f"stars[{k}]" for k, line in enumerate(lines[1:])}
    star_of_line[lines[0]] = "stars[*]"  # the header: a member name some star uses
    out = []
    for e in errors:
        m = _CSV_LINE_FIELD.match(e.field)
        star = star_of_line.get(int(m.group(1))) if m else None
        if star is None:
            out.append(e)
            continue
        message = e.message.replace("the cell is empty", "it is null or absent")
        out.append(type(e)(f"{star}.{m.group(2)}", message))
    return out


@contextlib.contextmanager
def _errors_named_for(cat: Catalogue):
    """Errors about the CSV text of ``cat`` (lines of that text, as the service and the
    line relocation give them) named as the user's file names them: unchanged for a CSV
    file, ``stars[i].field`` for a JSON one."""
    try:
        yield
    except SkydriftError as exc:
        if cat.from_json:
            exc.errors = json_star_fields(exc.errors, cat.csv_text)
        raise


def _at_least_zero(text: str) -> int:
    """argparse type: a whole number, 0 or more."""
    value = whole(text)
    if value < 0:
        raise argparse.ArgumentTypeError(f"{text!r}: must be 0 or more")
    return value


def _at_least_one(text: str) -> int:
    """argparse type: a whole number, 1 or more."""
    value = whole(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: must be 1 or more")
    return value


def _service_url(text: str) -> str:
    """argparse type: an http:// or https:// address, as requests will read it."""
    import requests

    try:
        requests.PreparedRequest().prepare_url(text, None)  # parsing only, no connection
    except requests.RequestException as exc:
        raise argparse.ArgumentTypeError(f"{text!r} is not an address ({exc})") from None
    if not text.lower().startswith(("http://", "https://")):
        raise argparse.ArgumentTypeError(
            f"{text!r}: the service's address starts with http:// or https://"
        )
    return text


def _above_zero(text: str) -> float:
    """argparse type: a decimal number above 0."""
    value = decimal(text)
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text!r}: must be above 0")
    return value


def read_catalogue(path: str, *, any_frame: bool = False) -> Catalogue:
    """Read a CSV or JSON catalogue ('-' = CSV on standard input).

    A JSON catalogue may say its ``frame`` (the demo's says "ICRS"). Only a command that
    converts frames (``any_frame``) takes another: the others compute in ICRS, and FK4
    B1950.0 astrometry taken as ICRS is some 0.6 degrees off.
    """
    if path == "-":
        text = sys.stdin.read()
    else:
        try:
            text = pathlib.Path(path).read_text(encoding="utf-8-sig")
        except OSError as exc:  # as argparse says of a file it cannot open: exit status 2
            raise UsageError(f"{path}: cannot open the catalogue ({exc.strerror or exc})") from None
    if path.lower().endswith(".json"):
        try:
            data = json.loads(text)
        except ValueError as exc:
            raise ValueError(f"{path}: not JSON ({exc})") from None
        stars = data.get("stars") if isinstance(data, dict) else data
        if not isinstance(stars, list) or not all(isinstance(s, dict) for s in stars):
            raise ValueError(
                f"{path}: a JSON catalogue is a list of star objects, or an object whose "
                "'stars' member is one"
            )
        names: dict = {}
        for i, s in enumerate(stars):
            for k, v in s.items():
                names.setdefault(k, None)
                # The API's rule for JSON: numbers are JSON numbers. Written into the CSV
                # sent on, "12.5" would read as a number and true as a bad cell.
                kinds = (str, int) if k == "id" else (int, float)
                if not (v is None or (isinstance(v, kinds) and not isinstance(v, bool))):
                    what = "a string or an integer" if k == "id" else "a number without quotes"
                    raise ValueError(f"{path}: stars[{i}].{k}: must be {what}, or null")
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(list(names))
        for s in stars:
            writer.writerow(["" if s.get(k) is None else s[k] for k in names])
        epoch = data.get("catalogue_epoch") if isinstance(data, dict) else None
        frame = None
        if isinstance(data, dict) and data.get("frame") is not None:
            frame = frame_spec(data["frame"], f"{path}: frame")
            if not (any_frame or _is_icrs(frame)):
                raise ValueError(
                    f"{path}: the catalogue's frame is {data['frame']!r}; this command takes "
                    "ICRS astrometry (convert it first: skydrift frames FILE --to icrs; skydrift "
                    "observed takes any frame)"
                )
        return Catalogue(buf.getvalue(), epoch, len(stars), from_json=True, frame=frame)
    _header, rows, _lines = _read_csv(text)
    return Catalogue(text, None, len(rows))


def _progress(total: int, args, what: str):
    """A tqdm progress bar on a terminal (or when asked); None when quiet or piped."""
    if args.quiet:
        return None, None
    if not (args.progress or sys.stderr.isatty()):
        return None, None
    from tqdm import tqdm

    bar = tqdm(total=total, unit=" stars", desc=what, file=sys.stderr)
    return bar, bar.update


def make_client(args) -> Client:
    options = {
        "batch_size": args.batch_size,
        "timeout": (5.0, args.timeout),
        "retries": args.retries,
    }
    if args.url:
        return Client(args.url, token=os.environ.get("SKYDRIFT_TOKEN") or None, **options)
    from .local import local_client

    return local_client(**options)


def _write_text(text: str, output: str | None) -> None:
    if output in (None, "-"):
        sys.stdout.write(text)
        sys.stdout.flush()
    else:
        pathlib.Path(output).write_text(text, encoding="utf-8", newline="")


def _write_bytes(data: bytes, output: str | None) -> None:
    if output in (None, "-"):
        sys.stdout.buffer.write(data)
        sys.stdout.flush()
    else:
        pathlib.Path(output).write_bytes(data)


def _frame_options_given(args) -> tuple:
    """The options that give a catalogue's frame, with their values (None: not given)."""
    return (
        ("--from", getattr(args, "from_frame", None)),
        ("--frame", getattr(args, "frame", None)),
    )


def _epoch_of(args, cat: Catalogue, frame: dict | None = None) -> str:
    """The catalogue epoch: --catalogue-epoch, else the JSON file's, else J2016.0 for a
    catalogue in ICRS. A catalogue in another ``frame`` must say its epoch: an FK4 or FK5
    catalogue is most often at its equinox (B1950.0, J2000.0), and taken at J2016.0 it would
    come out wrong by its proper motion over the years between, and, for FK4, by the
    frame's own rotation."""
    epoch = args.catalogue_epoch or cat.catalogue_epoch
    if epoch:
        return epoch
    if not _is_icrs(frame):
        option = next((f"{o} {v}" for o, v in _frame_options_given(args) if v is not None), None)
        raise UsageError(
            f"--catalogue-epoch: needed for a catalogue in {frame['name'].upper()} "
            f"({option or 'the frame the file states'}): {DEFAULT_CATALOGUE_EPOCH} is taken "
            "only for ICRS catalogues; an FK4 catalogue's epoch is most often B1950.0, an "
            "FK5 one's J2000.0"
        )
    return DEFAULT_CATALOGUE_EPOCH


#: Request fields a catalogue file may set too (its catalogue_epoch and frame): an error in
#: one is the command line's only when one of these options was given.
_FIELDS_ALSO_FROM_THE_FILE = {
    "catalogue_epoch": ("catalogue_epoch",),
    "frame": ("frame", "equinox"),
    "from_frame": ("from_frame",),
}


def _refuses_options(exc: SkydriftError, args) -> bool:
    """Whether the service refused values given on the command line (an epoch it cannot
    read, an unknown site, a count out of range), and nothing else: not the catalogue's
    rows ("line 7: dec_deg", "stars[3].ra_deg"). ``exc`` names fields in the request's
    terms."""
    if exc.status != 422 or not exc.errors:
        return False
    for e in exc.errors:
        base = re.split(r"[.\[]", e.field, maxsplit=1)[0]
        if not base.isidentifier() or base == "stars":
            return False  # a row, cell or header line of the catalogue ("line 7"), "(more)"
        options = _FIELDS_ALSO_FROM_THE_FILE.get(base)
        if options and all(getattr(args, o, None) is None for o in options):
            return False
    return True


#: The service's hint for an unknown column, in the request's terms, and in the command
#: line's (api/tables.py words the first).
_UNREAD_HINT_REQUEST = "(to leave it unread, list it in ignored_columns)"
_UNREAD_HINT_OPTIONS = (
    "(to leave it unread, name it in --ignore-columns; --drop-unknown-columns leaves out "
    "every such column)"
)


#: The request field each option sets: field (or field.member) -> (the option's attribute
#: in the parsed command line, the option as written). A refused value is named by the
#: option it was given with ("--epoch J20x6", not "target_epochs[0]"); a field the option
#: was not given for (a catalogue epoch or frame from the JSON file) keeps its own name.
_OPTION_OF_FIELD = {
    "catalogue_epoch": ("catalogue_epoch", "--catalogue-epoch"),
    "ignored_columns": ("ignore_columns", "--ignore-columns"),
    "target_epochs": ("epoch", "--epoch"),
    "epoch": ("epoch", "--epoch"),
    "target_range.start": ("range", "--range START"),
    "target_range.stop": ("range", "--range STOP"),
    "target_range.count": ("range", "--range COUNT"),
    "target_range": ("range", "--range"),
    "model": ("model", "--model"),
    "solar_motion.u_km_s": ("solar_motion", "--solar-motion U"),
    "solar_motion.v_km_s": ("solar_motion", "--solar-motion V"),
    "solar_motion.w_km_s": ("solar_motion", "--solar-motion W"),
    "solar_motion": ("solar_motion", "--solar-motion"),
    "uncertainty_method": ("uncertainties", "--uncertainties"),
    "monte_carlo_draws": ("draws", "--draws"),
    "seed": ("seed", "--seed"),
    "low_snr_threshold": ("low_snr_threshold", "--low-snr-threshold"),
    "near_boundary_arcsec": ("near_boundary_arcsec", "--near-boundary-arcsec"),
    "reduction": ("reduction", "--reduction"),
    "start": ("start", "--start"),
    "stop": ("stop", "--stop"),
    "end": ("end", "--end"),
    "max_step_yr": ("max_step_yr", "--max-step-yr"),
    "from_frame": ("from_frame", "--from"),
    "to_frame": ("to_frame", "--to"),
    "frame.equinox": ("equinox", "--equinox"),
    "frame": ("frame", "--frame"),
    "instants": ("at", "--at"),
    "instant_range.start": ("range", "--range START"),
    "instant_range.stop": ("range", "--range STOP"),
    "instant_range.count": ("range", "--range COUNT"),
    "instant_range": ("range", "--range"),
    "site.latitude_deg": ("position", "--position LAT"),
    "site.longitude_deg": ("position", "--position LON"),
    "site.height_m": ("position", "--position HEIGHT"),
    "site": ("site", "--site"),
    "atmosphere.pressure_hpa": ("pressure_hpa", "--pressure-hpa"),
    "atmosphere.temperature_c": ("temperature_c", "--temperature-c"),
    "atmosphere.relative_humidity": ("relative_humidity", "--relative-humidity"),
    "atmosphere.wavelength_um": ("wavelength_um", "--wavelength-um"),
    "horizon_limit_deg": ("horizon_limit_deg", "--horizon-limit-deg"),
    "sun_avoidance_deg": ("sun_avoidance_deg", "--sun-avoidance-deg"),
    "ticks": ("ticks", "--ticks"),
    "epochs": ("epochs", "--epochs"),
    "arrow_years": ("arrow_years", "--arrow-years"),
    "title": ("title", "--title"),
    "width_px": ("width_px", "--width-px"),
}

#: A request field's path as the service names it: name, optional [index], optional .member.
_FIELD_PATH = re.compile(r"([a-z_]+)(?:\[(\d+)\])?(?:\.([a-z_]+))?")


def _option_named(field: str, args) -> str:
    """``field`` (the service's name of a refused value) as the option that gave it, with
    the value for a repeated option ("--epoch J20x6"); ``field`` itself where no option
    given on this command line set it."""
    m = _FIELD_PATH.fullmatch(field)
    if m is None:
        return field
    base, index, member = m.groups()
    entry = _OPTION_OF_FIELD.get(f"{base}.{member}") if member else None
    if entry is None or getattr(args, entry[0], None) is None:
        entry = _OPTION_OF_FIELD.get(base)
    if entry is None:
        return field
    given = getattr(args, entry[0], None)
    if given is None or given is False:
        return field
    if index is None:
        return entry[1]
    if isinstance(given, list) and int(index) < len(given):
        return f"{entry[1]} {given[int(index)]}"
    return field


def _in_option_terms(errors: list, args) -> list:
    """The service's refusals in the command line's terms: a value given with an option is
    named by that option (:data:`_OPTION_OF_FIELD`), and its hint for an unknown column
    names the options."""
    out = []
    for e in errors:
        message = e.message.replace(_UNREAD_HINT_REQUEST, _UNREAD_HINT_OPTIONS)
        out.append(type(e)(_option_named(e.field, args), message))
    return out


def _run(func):
    """Turn errors into one message on standard error: exit status 2 for a bad command line
    (argparse's own is 2 as well), 1 for refused catalogue content or a failure."""

    def wrapper(args) -> int:
        try:
            return func(args)
        except UsageError as exc:
            print(f"skydrift: bad command line: {exc}", file=sys.stderr)
            return 2
        except SkydriftError as exc:
            refused = _refuses_options(exc, args)
            exc.errors = _in_option_terms(exc.errors, args)
            if refused:
                said = "; ".join(f"{e.field}: {e.message}" for e in exc.errors)
                print(f"skydrift: bad command line: {said}", file=sys.stderr)
                return 2
            print(f"skydrift: {exc}", file=sys.stderr)
            return 1
        except (OSError, ValueError) as exc:
            print(f"skydrift: {exc}", file=sys.stderr)
            return 1

    return wrapper


def _table_command(args, cat, label: str, call, client: Client | None = None) -> str:
    """Send a catalogue through one CSV endpoint with a progress bar; the answer as CSV.

    ``call(client, body, update)`` makes the request for one CSV body; batching, the
    progress bar and --drop-unknown-columns (``_tolerant``) are the same for every command.
    ``client``: one to use (and leave open); default: one made for this call.
    """
    bar, update = _progress(cat.rows, args, label)
    with contextlib.nullcontext(client) if client else make_client(args) as client:
        try:
            with _errors_named_for(cat):
                return _tolerant(args, cat.csv_text, lambda body: call(client, body, update))
        finally:
            if bar is not None:
                bar.close()


def _check_range_count(args) -> None:
    """Exit 2 naming --range COUNT where it is not a whole number (before any request)."""
    if args.range:
        try:
            whole(args.range[2])
        except argparse.ArgumentTypeError as exc:
            raise UsageError(f"--range COUNT: {exc}") from None


@_run
def cmd_propagate(args) -> int:
    _check_range_count(args)
    cat = read_catalogue(args.catalogue)
    text = _table_command(
        args,
        cat,
        "propagating",
        lambda client, body, update: client.propagate_csv(
            body,
            catalogue_epoch=_epoch_of(args, cat),
            target_epochs=args.epoch or None,
            target_range=tuple(args.range) if args.range else None,
            model=args.model,
            progress=update,
            ignored_columns=args.ignore_columns,
        ),
    )
    _write_text(text, args.output)
    return 0


@_run
def cmd_velocities(args) -> int:
    cat = read_catalogue(args.catalogue)
    text = _table_command(
        args,
        cat,
        "velocities",
        lambda client, body, update: client.velocity_csv(
            body,
            catalogue_epoch=_epoch_of(args, cat),
            relative_to_lsr=args.lsr or args.solar_motion is not None,
            solar_motion_km_s=tuple(args.solar_motion) if args.solar_motion else None,
            uncertainty_method=args.uncertainties,
            monte_carlo_draws=args.draws,
            seed=args.seed,
            low_snr_threshold=args.low_snr_threshold,
            progress=update,
            ignored_columns=args.ignore_columns,
        ),
    )
    _write_text(text, args.output)
    return 0


@_run
def cmd_constellations(args) -> int:
    if args.near_boundary_arcsec is not None and not args.margins:
        raise UsageError(
            "--near-boundary-arcsec is an option of --margins: the lookup measures no "
            "distance to a boundary"
        )
    cat = read_catalogue(args.catalogue)
    text = _table_command(
        args,
        cat,
        "constellations",
        lambda client, body, update: client.constellations_csv(
            body,
            catalogue_epoch=_epoch_of(args, cat),
            epoch=args.epoch,
            margins=args.margins,
            near_boundary_arcsec=args.near_boundary_arcsec,
            reduction=args.reduction,
            progress=update,
            ignored_columns=args.ignore_columns,
        ),
    )
    _write_text(text, args.output)
    return 0


@_run
def cmd_crossings(args) -> int:
    cat = read_catalogue(args.catalogue)
    text = _table_command(
        args,
        cat,
        "crossings",
        lambda client, body, update: client.constellation_crossings_csv(
            body,
            catalogue_epoch=_epoch_of(args, cat),
            start=args.start,
            end=args.end,
            max_step_yr=args.max_step_yr,
            reduction=args.reduction,
            progress=update,
            ignored_columns=args.ignore_columns,
        ),
    )
    _write_text(text, args.output)
    return 0


def _frame_option(text: str | None, option: str) -> dict | None:
    """A frame given on the command line (``option``), or None if not given."""
    if text is None:
        return None
    try:
        return frame_spec(text, option)
    except ValueError as exc:
        raise UsageError(str(exc)) from None


@_run
def cmd_frames(args) -> int:
    cat = read_catalogue(args.catalogue, any_frame=True)
    from_frame = _frame_option(args.from_frame, "--from") or cat.frame or {"name": "icrs"}
    to_frame = _frame_option(args.to_frame, "--to")
    epoch = _epoch_of(args, cat, from_frame)
    text = _table_command(
        args,
        cat,
        "frames",
        lambda client, body, update: client.frames_csv(
            body,
            catalogue_epoch=epoch,
            from_frame=from_frame,
            to_frame=to_frame,
            target_epochs=args.epoch or None,
            progress=update,
            ignored_columns=args.ignore_columns,
        ),
    )
    _write_text(text, args.output)
    return 0


def _unknown_columns(exc: SkydriftError) -> list[str]:
    """Header columns an endpoint refused as unknown. The answer names the other invalid
    fields of the request too; they come back alone when the run is made again without
    these columns."""
    names = []
    for e in exc.errors:
        m = _CSV_LINE_FIELD.match(e.field)
        if m and e.message.startswith("unknown field"):
            names.append(m.group(2))
    return names


def _drop_columns(csv_text: str, names: list[str]) -> tuple[str, list[int]]:
    """The CSV text without the named columns, and the line of its header and each row in
    ``csv_text`` (blank lines are left out, so lines of the new text differ)."""
    header, rows, lines = _read_csv(csv_text)
    keep = [k for k, h in enumerate(header) if h not in names]
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow([header[k] for k in keep])
    writer.writerows([r[k] for k in keep] for r in rows)
    return buf.getvalue(), lines


def _in_file(call, text: str, lines: list[int] | None):
    """``call(text)``, with the lines of errors in ``text`` made the lines of the file that
    ``text`` was made from (``lines``: the file's line of its header and each row of
    ``text``; None: ``text`` is the file's own)."""
    try:
        return call(text)
    except SkydriftError as exc:
        if lines is not None:
            exc.errors = relocate_lines(exc.errors, text, lines)
        raise


def _tolerant(args, csv_text: str, call, lines: list[int] | None = None):
    """Run ``call(csv_text)``; with --drop-unknown-columns, drop the columns the endpoint
    does not take (saying which on standard error) and run it again. Errors name the lines
    of the catalogue file (``lines``, as for :func:`_in_file`)."""
    try:
        return _in_file(call, csv_text, lines)
    except SkydriftError as exc:
        unknown = _unknown_columns(exc) if args.drop_unknown_columns else []
        if not unknown:
            raise
    # Said even with --quiet (which only stops the progress bar): data left out of a run.
    print(f"skydrift: columns not used by this command: {', '.join(unknown)}", file=sys.stderr)
    kept, kept_lines = _drop_columns(csv_text, unknown)
    if lines is not None:
        kept_lines = [lines[k] for k in range(len(kept_lines))]
    return _in_file(call, kept, kept_lines)


@_run
def cmd_observed(args) -> int:
    cat = read_catalogue(args.catalogue, any_frame=True)
    frame = _frame_option(args.frame, "--frame") or cat.frame
    if args.equinox is not None:
        if frame is None:
            raise UsageError("--equinox needs --frame (or a catalogue that states its frame)")
        frame = {**frame, "equinox": args.equinox}
    atmosphere = {
        "pressure_hpa": args.pressure_hpa,
        "temperature_c": args.temperature_c,
        "relative_humidity": args.relative_humidity,
        "wavelength_um": args.wavelength_um,
    }
    site = args.site
    if args.position is not None:
        lat, lon, height = args.position
        site = {"latitude_deg": lat, "longitude_deg": lon, "height_m": height}
    if site is None:
        raise ValueError("give --site NAME or --position LAT LON HEIGHT")
    _check_range_count(args)
    # "now" read once, so that the places and the conditions said below mean one instant.
    when = pin_now(
        {
            "catalogue_epoch": _epoch_of(args, cat, frame),
            "instants": args.at,
            "instant_range": dict(zip(("start", "stop", "count"), args.range, strict=True))
            if args.range
            else None,
            "frame": frame,
        },
        _now_text(),
    )
    with make_client(args) as client:
        text = _table_command(
            args,
            cat,
            "observed places",
            lambda client, body, update: client.observed_csv(
                body,
                catalogue_epoch=when["catalogue_epoch"],
                instants=when["instants"],
                instant_range=when["instant_range"],
                site=site,
                frame=when["frame"],
                atmosphere=atmosphere,
                horizon_limit_deg=args.horizon_limit_deg,
                sun_avoidance_deg=args.sun_avoidance_deg,
                progress=update,
                ignored_columns=args.ignore_columns,
                include_rates=args.rates,
            ),
            client,
        )
        # The CSV rows carry the refraction, the flags, the Sun and the Earth orientation of
        # their instant; the refraction settings are in the JSON answer only, the same for
        # every star: asked for one motionless star, with the Earth orientation summed up.
        # Said, like the caution, --quiet or not.
        conditions = client.observed(
            [CONDITIONS_STAR],
            catalogue_epoch=when["catalogue_epoch"],
            instants=when["instants"],
            instant_range=when["instant_range"],
            site=site,
            frame=when["frame"],
            atmosphere=atmosphere,
        )
    for line in observing_conditions(conditions):
        print(f"skydrift: {line}", file=sys.stderr)
    # A pressure far from any weather at the site (a unit mistake that misplaces low
    # targets by arcminutes) is the request's: the answer says it once, in its refraction
    # settings; the CSV rows carry only its flag. (The motionless star asked for the
    # conditions draws no warning of its own.)
    pressure_warning = conditions["refraction"].get("pressure_warning")
    if pressure_warning:
        print(f"skydrift: warning: {pressure_warning}", file=sys.stderr)
    # Always said, --quiet or not (it only stops the progress bar): a safety caution.
    print(
        "skydrift: Sun and horizon figures are advisory; the facility's own interlocks "
        "and safety rules decide where a telescope may point.",
        file=sys.stderr,
    )
    _write_text(text, args.output)
    return 0


#: The columns `sites` writes, in order (GET /v1/sites, one row per site).
SITE_COLUMNS = (
    "name",
    "full_name",
    "latitude_deg",
    "longitude_deg",
    "height_m",
    "horizon_limit_deg",
    "horizon_limit_source",
)


@_run
def cmd_sites(args) -> int:
    with make_client(args) as client:
        answer = client.site_list()
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(SITE_COLUMNS)
    for site in answer["sites"]:
        writer.writerow(["" if site[k] is None else site[k] for k in SITE_COLUMNS])
    count = answer["count"]
    print(
        f"skydrift: {count} site{'' if count == 1 else 's'} ({answer['source']})", file=sys.stderr
    )
    print(f"skydrift: Sun avoidance angle {answer['sun_avoidance_deg']:g} deg", file=sys.stderr)
    print(f"skydrift: {answer['note']}", file=sys.stderr)
    print(
        "skydrift: check the coordinates against the facility's own survey before relying "
        "on a site's name; the facility's own interlocks and safety rules decide where a "
        "telescope may point.",
        file=sys.stderr,
    )
    _write_text(out.getvalue(), args.output)
    return 0


#: A motionless star at the origin of the frame: what `observed` asks the JSON answer for
#: to state the conditions (refraction, Earth orientation), which depend on no star.
CONDITIONS_STAR = {"ra_deg": 0.0, "dec_deg": 0.0, "pm_ra_cosdec_mas_yr": 0.0, "pm_dec_mas_yr": 0.0}


def observing_conditions(answer: dict) -> list[str]:
    """Two plain lines from an observed-place JSON answer: the refraction settings used,
    and the Earth orientation (table, measured/predicted/unavailable, UT1-UTC) per
    instant, grouped."""
    r = answer["refraction"]
    if r["mode"] == "off":
        air = "refraction off (pressure 0 hPa)"
    else:
        air = (
            f"refraction on ({r['mode']}): pressure {r['pressure_hpa']:.1f} hPa, temperature "
            f"{r['temperature_c']:.1f} C ({r['temperature_source']}), relative humidity "
            f"{r['relative_humidity']:.2f}, wavelength {r['wavelength_um']:g} um"
        )
    groups: dict[tuple[str, str], list[dict]] = {}
    for instant in answer["instants"]:
        eo = instant["earth_orientation"]
        groups.setdefault((eo["status"], eo["table"]), []).append(eo)
    parts = []
    for (status, table), eos in groups.items():
        count = f"{len(eos)} instant" + ("s" if len(eos) > 1 else "")
        if status == "unavailable":
            worst = max(eo["pointing_error_arcsec"] for eo in eos)
            parts.append(
                f"unavailable at {count} (UT1-UTC and polar motion taken as 0, pointing "
                f"error up to {worst:.0f} arcsec)"
            )
            continue
        low = min(eo["ut1_utc_s"] for eo in eos)
        high = max(eo["ut1_utc_s"] for eo in eos)
        ut1 = f"{low:.4f} s" if f"{low:.4f}" == f"{high:.4f}" else f"{low:.4f} to {high:.4f} s"
        parts.append(f"{status} at {count} ({table}, UT1-UTC {ut1})")
    return [air, "Earth orientation: " + "; ".join(parts)]


def _select(cat: Catalogue, ids: list[str] | None) -> tuple[str, list[int] | None]:
    """The catalogue's CSV restricted to the given ids (all rows if none given), and the
    catalogue's line of its header and each row kept (None: the catalogue's own text)."""
    if not ids:
        return cat.csv_text, None
    header, rows, lines = _read_csv(cat.csv_text)
    if "id" not in header:
        raise ValueError("--star needs an 'id' column in the catalogue")
    k = header.index("id")
    by_id = {r[k]: n for n, r in enumerate(rows)}
    missing = [i for i in ids if i not in by_id]
    if missing:
        raise ValueError(f"not in the catalogue: {', '.join(missing)}")
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows[by_id[i]] for i in ids)
    return buf.getvalue(), [lines[0]] + [lines[1 + by_id[i]] for i in ids]


#: Image formats by the output file's suffix (a name without one is written as SVG).
IMAGE_SUFFIXES = {".svg": "svg", ".png": "png", "": "svg"}


def _image_format(args) -> str:
    if args.format:
        return args.format
    if not args.output:
        return "svg"
    suffix = os.path.splitext(args.output)[1].lower()
    if suffix not in IMAGE_SUFFIXES:
        # An SVG written to chart.gif or chart.pdf would not open as what its name says.
        raise UsageError(
            f"{args.output}: charts are written as .svg or .png; name the file so, or give --format"
        )
    return IMAGE_SUFFIXES[suffix]


def _post_image(client: Client, path: str, csv_text: str, params: dict) -> bytes:
    from .client import _query

    resp = client.request(
        "POST",
        path,
        params=_query(params),
        data=csv_text.encode(),
        headers={"Content-Type": "text/csv"},
        expect=("image/",),
    )
    return resp.content


@_run
def cmd_chart_track(args) -> int:
    cat = read_catalogue(args.catalogue)
    params = {
        "catalogue_epoch": _epoch_of(args, cat),
        "start": args.start,
        "stop": args.stop,
        "ticks": args.ticks,
        "boundaries": not args.no_boundaries,
        "format": _image_format(args),
        "title": args.title,
        "width_px": args.width_px,
        "ignored_columns": args.ignore_columns,
    }
    with make_client(args) as client, _errors_named_for(cat):
        text, lines = _select(cat, args.star)
        data = _tolerant(
            args,
            text,
            lambda body: _post_image(client, "/v1/charts/track", body, params),
            lines,
        )
    _write_bytes(data, args.output)
    return 0


@_run
def cmd_chart_field(args) -> int:
    cat = read_catalogue(args.catalogue)
    params = {
        "catalogue_epoch": _epoch_of(args, cat),
        "epochs": list(args.epochs),
        "arrow_years": args.arrow_years,
        "format": _image_format(args),
        "title": args.title,
        "width_px": args.width_px,
        "ignored_columns": args.ignore_columns,
    }
    with make_client(args) as client, _errors_named_for(cat):
        data = _tolerant(
            args,
            cat.csv_text,
            lambda body: _post_image(client, "/v1/charts/field", body, params),
        )
    _write_bytes(data, args.output)
    return 0


def _connection_options(p: argparse.ArgumentParser, batch: bool = True) -> None:
    g = p.add_argument_group("where the work is done")
    g.add_argument(
        "--url",
        type=_service_url,
        help="send the work to the Skydrift service at this address "
        "(e.g. http://127.0.0.1:8000); default: compute in this process",
    )
    g.add_argument(
        "--timeout",
        type=_above_zero,
        default=300.0,
        metavar="SECONDS",
        help="longest wait for one answer, seconds (default 300)",
    )
    g.add_argument(
        "--retries",
        type=_at_least_zero,
        default=5,
        help="repeats after a busy or failed answer (429/502/503/504) or failed connection "
        "(default 5)",
    )
    if batch:
        g.add_argument(
            "--batch-size",
            type=_at_least_one,
            default=DEFAULT_BATCH_SIZE,
            metavar="N",
            help=f"stars per request (default {DEFAULT_BATCH_SIZE})",
        )
        g.add_argument(
            "--progress",
            action="store_true",
            help="show a progress bar even when standard error is not a terminal",
        )
        g.add_argument("--quiet", "-q", action="store_true", help="never show a progress bar")
    else:
        p.set_defaults(batch_size=DEFAULT_BATCH_SIZE, progress=False, quiet=True)


def _column_names(text: str) -> list[str]:
    """--ignore-columns: comma-separated names (blanks around them are not part of them)."""
    names = [n.strip() for n in text.split(",")]
    if not all(names):
        raise argparse.ArgumentTypeError("an empty column name")
    return names


def _catalogue_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("catalogue", help=CATALOGUE_HELP)
    p.add_argument(
        "--ignore-columns",
        type=_column_names,
        default=[],
        metavar="NAMES",
        help="comma-separated catalogue columns to leave unread (a magnitude, say; the "
        "request's ignored_columns); any other column the command does not take is still "
        "an error",
    )
    p.add_argument(
        "--drop-unknown-columns",
        action="store_true",
        help="leave out catalogue columns this command does not take (named on standard "
        "error) instead of stopping; without it an unknown column is an error, so that a "
        "misspelt column name is never ignored",
    )
    p.add_argument(
        "--catalogue-epoch",
        metavar="EPOCH",
        help="epoch of the catalogue's astrometry (default: the JSON file's "
        f"catalogue_epoch, else {DEFAULT_CATALOGUE_EPOCH} for a catalogue in ICRS; one in "
        "another frame must say it)",
    )


def add_commands(sub) -> None:
    """Add the batch and chart commands to the ``skydrift`` sub-command parser."""
    fmt = argparse.RawDescriptionHelpFormatter
    p = sub.add_parser(
        "propagate",
        help="move a catalogue's stars to other epochs (CSV out)",
        description="Move every star of a catalogue to one or more epochs (straight-line "
        "space motion, uncertainties propagated when given) and write CSV: one row per "
        "star and epoch with index, id, epoch_julian_tdb, epoch_iso_utc, ra_deg, dec_deg, "
        "parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s, "
        "standard errors and correlations (when given), and flags (';'-separated).",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(p)
    targets = p.add_mutually_exclusive_group(required=True)
    targets.add_argument(
        "--epoch",
        action="append",
        metavar="EPOCH",
        help="target epoch; repeat for several (e.g. --epoch now --epoch J2100.0)",
    )
    targets.add_argument(
        "--range",
        nargs=3,
        metavar=("START", "STOP", "COUNT"),
        help="COUNT evenly spaced target epochs from START to STOP, both included",
    )
    p.add_argument(
        "--model",
        type=str.lower,
        choices=("standard", "light_time"),
        default="standard",
        help="standard: Hipparcos straight-line model; light_time: with the light-time "
        "correction of SOFA pmsafe (default standard)",
    )
    p.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(p)
    p.set_defaults(func=cmd_propagate)

    v = sub.add_parser(
        "velocities",
        help="velocities of a catalogue's stars: transverse, radial, U V W (CSV out)",
        description="Compute for every star of a catalogue the transverse, radial and total "
        "velocity, galactic U, V, W (heliocentric, and relative to the local standard of "
        "rest with --lsr) with standard errors and correlations, perspective acceleration "
        "and closest approach to the Sun, and write CSV: one row per star with index, id, "
        "the quantities under their API names (units in the names; intervals as two "
        "numbers separated by ';') and flags (';'-separated). A star may give distance_pc "
        "instead of parallax_mas.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(v)
    v.add_argument(
        "--lsr",
        action="store_true",
        help="also give U, V, W relative to the local standard of rest",
    )
    v.add_argument(
        "--solar-motion",
        nargs=3,
        type=decimal,
        metavar=("U", "V", "W"),
        help="Sun's motion relative to the LSR, km/s (implies --lsr; default: the service's, "
        "Schoenrich, Binney & Dehnen 2010)",
    )
    v.add_argument(
        "--uncertainties",
        type=str.lower,
        choices=("linear", "monte_carlo", "auto"),
        default="linear",
        help="linear propagation, Monte Carlo draws, or draws only where the parallax is "
        "noisy (default linear)",
    )
    v.add_argument("--draws", type=whole, help="Monte Carlo draws per star")
    v.add_argument("--seed", type=whole, help="seed of the Monte Carlo draws")
    v.add_argument(
        "--low-snr-threshold",
        type=_above_zero,
        metavar="SNR",
        help="parallax signal-to-noise below which a star is flagged parallax_low_snr (and "
        "drawn for with --uncertainties auto); default: the service's setting "
        "SKYDRIFT_LOW_PARALLAX_SNR, 5 unless its operator chose another",
    )
    v.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(v)
    v.set_defaults(func=cmd_velocities)

    k = sub.add_parser(
        "constellations",
        help="IAU constellation of each star, with margins to the boundary (CSV out)",
        description="Find the IAU constellation of every star of a catalogue at an epoch "
        "(stars with a proper motion are first moved there) and, with --margins, its "
        "distance to the nearest boundary and the constellation across it. Writes CSV: one "
        "row per star with index, id, epoch_julian_tdb and epoch_iso_utc, the "
        "constellation (IAU abbreviation) and name, the answers of both reductions, "
        "margin_arcsec and across (with --margins), the position at B1875.0, and flags.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(k)
    k.add_argument(
        "--epoch",
        metavar="EPOCH",
        help="epoch of the membership (default: the catalogue epoch)",
    )
    k.add_argument(
        "--margins",
        action="store_true",
        help="also the distance to the nearest boundary, arcsec, and the constellation across",
    )
    k.add_argument(
        "--near-boundary-arcsec",
        type=decimal,
        metavar="ARCSEC",
        help="flag stars closer than this to a boundary (with --margins; default: the "
        "service's setting SKYDRIFT_NEAR_BOUNDARY_ARCSEC, 1 unless its operator chose another)",
    )
    k.add_argument(
        "--reduction",
        type=str.lower,
        choices=("fk4", "fk5", "fk5_iau1976"),
        help="reduction to the boundaries' equinox B1875.0 (default fk4)",
    )
    k.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(k)
    k.set_defaults(func=cmd_constellations)

    x = sub.add_parser(
        "crossings",
        help="boundary crossings of moving stars in a time window (CSV out)",
        description="Find every IAU constellation boundary crossing of the stars of a "
        "catalogue between START and END (straight-line space motion). Writes CSV: one row "
        "per crossing (a star without any gets one row) with index, id, the constellations "
        "at the start and end of the window, epoch_julian_tdb and epoch_iso_utc of the "
        "crossing, from_constellation, to_constellation, and flags.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(x)
    x.add_argument("--start", required=True, metavar="EPOCH", help="start of the window")
    x.add_argument("--end", required=True, metavar="EPOCH", help="end of the window")
    x.add_argument(
        "--max-step-yr",
        type=decimal,
        metavar="YEARS",
        help="largest search step, years (default: window / 100; no crossing is ever stepped over)",
    )
    x.add_argument(
        "--reduction",
        type=str.lower,
        choices=("fk4", "fk5", "fk5_iau1976"),
        help="reduction to the boundaries' equinox B1875.0 (default fk4)",
    )
    x.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(x)
    x.set_defaults(func=cmd_crossings)

    fr = sub.add_parser(
        "frames",
        help="a catalogue's astrometry in another frame, optionally at other epochs (CSV out)",
        description="Convert every star of a catalogue (position, proper motion, parallax, "
        "radial velocity) from one frame to another: ICRS, FK5 at any equinox, FK4 at any "
        "equinox (B1950.0 by default; E-terms of aberration handled), galactic, ecliptic "
        "(J2000.0, any equinox, or of date). With --epoch the stars are also moved to those "
        "epochs: a B1950.0 FK4 catalogue comes out as ICRS at J2016.0 with --from fk4 "
        "--catalogue-epoch B1950.0 --epoch J2016.0. Writes CSV: one row per star and epoch "
        "with index, id, epoch_julian_tdb, epoch_iso_utc, ra_deg and dec_deg (longitude and "
        "latitude in galactic and ecliptic), parallax_mas, pm_ra_cosdec_mas_yr, "
        "pm_dec_mas_yr, radial_velocity_km_s and flags (';'-separated). Proper motions are "
        "per Julian year in every frame, FK4 included.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(fr)
    fr.add_argument(
        "--from",
        dest="from_frame",
        metavar="FRAME",
        help="frame of the catalogue: icrs, fk5, fk4, galactic or ecliptic, with an optional "
        "equinox ('fk5 J1975.0'; ecliptic also 'ecliptic of_date'); default: the JSON "
        "catalogue's 'frame', else icrs",
    )
    fr.add_argument(
        "--to",
        dest="to_frame",
        metavar="FRAME",
        default="icrs",
        help="frame to write, in the same form (default icrs)",
    )
    fr.add_argument(
        "--epoch",
        action="append",
        metavar="EPOCH",
        help="epoch to write the stars at; repeat for several (default: the catalogue epoch)",
    )
    fr.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(fr)
    fr.set_defaults(func=cmd_frames)

    o = sub.add_parser(
        "observed",
        help="observed places of a catalogue's stars at a site (CSV out; safety advisory)",
        description="Compute the observed place of every star of a catalogue at a site and "
        "one or more instants: azimuth, altitude, zenith distance, hour angle, observed "
        "right ascension and declination, parallactic angle, airmass, refraction, the "
        "separation from the Sun, and the astrometric and apparent places. Writes CSV: one "
        "row per star and instant with index, id, epoch_julian_tdb and epoch_iso_utc of the "
        "instant, the quantities under their API names, the instant's utc_jd, Earth "
        "orientation (earth_orientation_*) and Sun altitude and azimuth (sun_altitude_deg, "
        "sun_azimuth_deg), and flags (';'-separated; they "
        "include below_horizon_limit and within_sun_avoidance). Standard error says, even "
        "with --quiet, the refraction settings used (mode, pressure, temperature, relative "
        "humidity, wavelength) and the Earth orientation (table; measured, predicted or "
        "unavailable; UT1-UTC) at the instants, and any warning about the request (a "
        "pressure far from any weather at the site). The Sun and horizon figures "
        "are ADVISORY: the facility's own interlocks and safety rules decide where a "
        "telescope may point.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(o)
    when = o.add_mutually_exclusive_group(required=True)
    when.add_argument(
        "--at",
        action="append",
        metavar="INSTANT",
        help="instant of observation (ISO 8601 UTC or any epoch form); repeat for several",
    )
    when.add_argument(
        "--range",
        nargs=3,
        metavar=("START", "STOP", "COUNT"),
        help="COUNT instants from START to STOP, both included, in equal steps of elapsed "
        "time (a track for the night: --range 2026-12-06T18:00Z 2026-12-07T06:00Z 73)",
    )
    place = o.add_mutually_exclusive_group(required=True)
    place.add_argument(
        "--site", help="a site configured in the service (the demo's: kestrel-ridge)"
    )
    place.add_argument(
        "--position",
        nargs=3,
        type=decimal,
        metavar=("LAT", "LON", "HEIGHT"),
        help="geodetic latitude and east longitude in degrees, height in metres (WGS84)",
    )
    o.add_argument(
        "--frame",
        metavar="FRAME",
        help="frame of the catalogue's astrometry: icrs, fk5, fk4, galactic or ecliptic "
        "(default: the JSON catalogue's 'frame', else icrs); a B1950.0 catalogue is "
        "--frame fk4 --catalogue-epoch B1950.0",
    )
    o.add_argument(
        "--equinox",
        metavar="EQUINOX",
        help="equinox of --frame (default: B1950.0 for fk4, J2000.0 for fk5 and ecliptic)",
    )
    air = o.add_argument_group(
        "air at the site, for refraction (default: the service's; see the API's atmosphere)"
    )
    air.add_argument(
        "--pressure-hpa",
        type=decimal,
        metavar="HPA",
        help="air pressure, hPa (default: US Standard Atmosphere 1976 at the site height; "
        "0 turns refraction off)",
    )
    air.add_argument(
        "--temperature-c",
        type=decimal,
        metavar="C",
        help="air temperature, degrees Celsius (default: standard atmosphere at the site height)",
    )
    air.add_argument(
        "--relative-humidity",
        type=decimal,
        metavar="FRACTION",
        help="relative humidity, 0 to 1 (default 0.5)",
    )
    air.add_argument(
        "--wavelength-um",
        type=decimal,
        metavar="UM",
        help="effective wavelength, micrometres: 0.3-2.0 or radio 100-1000000 (default 0.55)",
    )
    o.add_argument(
        "--horizon-limit-deg",
        type=decimal,
        metavar="DEG",
        help="altitude below which a star is flagged (default: the site's, else the service's)",
    )
    o.add_argument(
        "--sun-avoidance-deg",
        type=decimal,
        metavar="DEG",
        help="Sun separation below which a star is flagged (default: the service's setting)",
    )
    o.add_argument(
        "--rates",
        action="store_true",
        help="also write how fast each place's azimuth, altitude, parallactic angle, "
        "observed hour angle and declination change, arcsec per second of time (columns "
        "azimuth_rate_arcsec_s, altitude_rate_arcsec_s, parallactic_angle_rate_arcsec_s, "
        "hour_angle_rate_arcsec_s, observed_dec_rate_arcsec_s), for tracking",
    )
    o.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(o)
    o.set_defaults(func=cmd_observed)

    st = sub.add_parser(
        "sites",
        help="the named sites of the service, with coordinates and limits (CSV out)",
        description="List the named observing sites the service knows (its operator's "
        "SKYDRIFT_SITES_FILE, else the demo scenario's fictional sites): name, full_name, "
        "geodetic latitude_deg and east longitude_deg, height_m above the WGS84 ellipsoid, "
        "and the horizon_limit_deg a request naming the site gets, with its "
        "horizon_limit_source (site_list or setting). Standard error says the Sun avoidance "
        "angle requests get and where the limits come from. The limits are ADVISORY: the "
        "facility's own interlocks and safety rules decide where a telescope may point.",
    )
    st.add_argument("--output", "-o", metavar="FILE", help="CSV file to write (default stdout)")
    _connection_options(st, batch=False)
    st.set_defaults(func=cmd_sites)

    chart = sub.add_parser(
        "chart",
        help="draw charts of stellar motion (SVG or PNG)",
        description="Draw charts of stellar motion as SVG (default) or PNG.",
    )
    charts = chart.add_subparsers(dest="chart", required=True, metavar="CHART")
    t = charts.add_parser(
        "track",
        help="tracks of a few stars across the sky, with constellation boundaries",
        description="Draw the track of one or more stars of a catalogue across the sky "
        "from START to STOP, with dots at evenly spaced epochs, the nearby IAU "
        "constellation boundaries and the points where a track crosses one.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(t)
    t.add_argument(
        "--star",
        action="append",
        metavar="ID",
        help="id of a star to draw; repeat for several (default: every star, at most 12)",
    )
    t.add_argument("--start", required=True, metavar="EPOCH", help="first epoch of the tracks")
    t.add_argument("--stop", required=True, metavar="EPOCH", help="last epoch of the tracks")
    t.add_argument("--ticks", type=whole, default=6, help="epochs marked on each track (default 6)")
    t.add_argument(
        "--no-boundaries", action="store_true", help="leave out constellation boundaries"
    )
    _image_options(t)
    _connection_options(t, batch=False)
    t.set_defaults(func=cmd_chart_track)

    f = charts.add_parser(
        "field",
        help="a catalogue's stars at two epochs side by side, with motion arrows",
        description="Draw every star of a catalogue on the whole sky at two epochs side "
        "by side, each with an arrow to where it will be ARROW_YEARS later.",
        epilog=EPILOG,
        formatter_class=fmt,
    )
    _catalogue_options(f)
    f.add_argument(
        "--epochs",
        nargs=2,
        required=True,
        metavar=("FIRST", "SECOND"),
        help="the two epochs shown",
    )
    f.add_argument(
        "--arrow-years",
        type=decimal,
        help="span of the motion arrows, years (default: the interval between the epochs)",
    )
    _image_options(f)
    _connection_options(f, batch=False)
    f.set_defaults(func=cmd_chart_field)


def _image_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--output",
        "-o",
        metavar="FILE",
        help="image file to write; a .png name gives PNG (default: SVG on stdout)",
    )
    p.add_argument(
        "--format",
        type=str.lower,
        choices=("svg", "png"),
        help="image format (overrides the name)",
    )
    p.add_argument("--title", help="chart title")
    p.add_argument(
        "--width-px",
        type=whole,
        metavar="N",
        help="image width in pixels, the height following the chart's shape (PNG default: "
        "150 dots per inch)",
    )
