"""Charts of stellar motion, as SVG or PNG: sky tracks and two-epoch star fields.

Two charts, each in two steps: a computation with the core that returns plain arrays
(:func:`sky_tracks`, :func:`star_field`) and a rendering of those arrays with matplotlib
(:func:`render_tracks`, :func:`render_field`), object-oriented and on the Agg/SVG canvases
only (no pyplot, no global state, safe in threads).

Sky tracks
    The path of one or a few stars across the sky over a span of epochs (straight-line
    space motion, Hipparcos formulation), with tick marks at evenly spaced epochs, the
    nearby IAU constellation boundaries with their abbreviations, and the points where a
    track crosses a boundary. Plotted in right ascension and declination, degrees, right
    ascension increasing to the left (the sky as seen from inside), with the declination
    axis scaled by 1/cos(dec) at the centre so that small regions keep their shape.
Star field
    A set of stars on the whole sky (Hammer equal-area projection, right ascension
    increasing to the left) at two epochs side by side, each star with an arrow to where it
    will be after ``arrow_years`` (by default the interval between the two epochs, so the
    arrows of the first panel end at the places of the second).

In the SVG output every track is one ``<path>`` inside a group with ``id="track-<k>"``
(k = position of the star in the request), boundaries are groups ``id="boundary-<ABBR>"``
and crossing marks ``id="crossing-<k>"``; in a field chart, panel p's stars are the group
``stars-<p>`` (``stars-no-parallax-<p>``), and its arrows the group ``arrows-<p>`` of one
group per arrow, ``arrow-<p>-<k>`` (``arrow-tail-<p>-<k>`` for the part of an arrow before
the chart's edge); so the drawing can be styled or checked.
Boundaries are drawn when the constellation module of the core is installed.

A star without a radial velocity, or without a positive parallax for it to act through, moves
without radial motion (no perspective acceleration); the track's legend entry and the field
chart's note say so.
"""

from __future__ import annotations

import functools
import io
import math
import re
import threading
from dataclasses import dataclass, field

import numpy as np

from .core import propagation as core_propagation

#: Colours and marks (our own design): a night-blue page, warm tracks, pale boundaries.
PAGE_COLOUR = "#0e1a2b"
PANEL_COLOUR = "#122238"
GRID_COLOUR = "#2b4160"
TEXT_COLOUR = "#dfe7f2"
MUTED_TEXT_COLOUR = "#8da3bf"
BOUNDARY_COLOUR = "#6f8db3"
TRACK_COLOURS = ("#f4a259", "#f25c54", "#7bd389", "#c49bff", "#5bc0eb", "#ffe066")
TICK_COLOUR = "#ffffff"
CROSSING_COLOUR = "#ffe066"
FIELD_FIRST_COLOUR = "#f4a259"
FIELD_SECOND_COLOUR = "#5bc0eb"
ARROW_COLOUR = "#dfe7f2"

#: Most stars drawn as tracks in one chart (legibility).
MAX_TRACKS = 12
#: Points along each track (the straight-line motion is smooth; this is plenty).
TRACK_SAMPLES = 401
#: Margin around the tracks, as a fraction of their extent, and at least this, degrees.
VIEW_MARGIN_FRACTION = 0.25
VIEW_MARGIN_MIN_DEG = 0.5
#: Epoch labels closer than this fraction of the chart's span to the previous one are left
#: out (the dot stays); constellation labels need this fraction of the span around them.
TICK_LABEL_SPACING_FRACTION = 0.05
LABEL_MIN_ROOM_FRACTION = 0.025
#: Grid of probe points used to find the constellations present in the view.
PROBE_GRID = 60
#: PNG resolution, dots per inch, unless a width in pixels is asked for.
PNG_DPI = 150
#: Sizes of the charts, inches (width, height): at PNG_DPI, 1,200 x 1,050 and 1,950 x 690
#: pixels.
TRACK_SIZE_IN = (8.0, 7.0)
FIELD_SIZE_IN = (13.0, 4.6)
#: Widths in pixels an image may be asked for (``width_px``).
MIN_WIDTH_PX = 400
MAX_WIDTH_PX = 4000
IMAGE_FORMATS = ("svg", "png")
_SAVE_LOCK = threading.Lock()
#: Motion arrows shorter than this are not drawn (the head would hide the star), radians.
MIN_ARROW_RAD = math.radians(0.4)
#: Motion arrows, points: the shaft's width, the head's length and width.
ARROW_SHAFT_PT = 0.9
ARROW_HEAD_LENGTH_PT = 3.6
ARROW_HEAD_WIDTH_PT = 3.6
MIME_TYPES = {"svg": "image/svg+xml", "png": "image/png"}


@dataclass(frozen=True)
class StarTrack:
    """One star's path: positions at ``epochs_jyear`` and at the tick epochs (degrees)."""

    label: str
    epochs_jyear: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    tick_epochs_jyear: np.ndarray
    tick_ra_deg: np.ndarray
    tick_dec_deg: np.ndarray
    #: What the track assumes for lack of data ("" if nothing; see :func:`_assumed`).
    assumed: str = ""


@dataclass(frozen=True)
class Crossing:
    """A track crossing a constellation boundary: which star, when (Julian epoch, TDB),
    where (ICRS, degrees) and between which constellations (IAU abbreviations)."""

    star: int
    epoch_jyear: float
    ra_deg: float
    dec_deg: float
    from_abbreviation: str
    to_abbreviation: str


@dataclass(frozen=True)
class Boundary:
    """The outline of one constellation as polylines (ICRS degrees, -180..180 longitude)."""

    abbreviation: str
    polylines: list


@dataclass(frozen=True)
class TrackChart:
    """Everything a sky-track chart shows (see :func:`sky_tracks`)."""

    tracks: list
    crossings: list = field(default_factory=list)
    boundaries: list = field(default_factory=list)
    labels: list = field(default_factory=list)  # (abbreviation, ra_deg, dec_deg)
    centre_ra_deg: float = 0.0
    view: tuple = (0.0, 1.0, 0.0, 1.0)  # ra_lo, ra_hi (unwrapped), dec_lo, dec_hi
    boundaries_available: bool = False


@dataclass(frozen=True)
class FieldChart:
    """Positions of stars at two epochs and the ends of their motion arrows (degrees)."""

    labels: list
    epochs_jyear: tuple
    ra_deg: np.ndarray  # (2, N)
    dec_deg: np.ndarray  # (2, N)
    arrow_ra_deg: np.ndarray  # (2, N): where each star is arrow_years later
    arrow_dec_deg: np.ndarray
    parallax_mas: np.ndarray  # (N,)
    arrow_years: float
    #: Stars whose motion leaves out the radial motion for lack of data (see _assumed).
    without_radial_motion: int = 0


def _constellations():
    """The core's constellation module, or None if this installation lacks it."""
    try:
        from .core import constellations
    except ImportError:
        return None
    return constellations


def _wrap180(x):
    return (np.asarray(x, dtype=float) + 180.0) % 360.0 - 180.0


def _circular_mean_deg(ra_deg) -> float:
    a = np.radians(np.asarray(ra_deg, dtype=float))
    return float(np.degrees(np.arctan2(np.sin(a).mean(), np.cos(a).mean())) % 360.0)


def _positions(astrometry: dict, catalogue_epoch: float, epochs):
    """ICRS (ra, dec) in degrees of N stars at M epochs: arrays (N, M)."""
    a = {k: np.asarray(v, dtype=float)[:, None] for k, v in astrometry.items()}
    # Extreme inputs (a parallax of 1e-300 mas) overflow to non-finite places; the callers
    # leave those out of the drawing or refuse the chart.
    with np.errstate(all="ignore"):
        result, _flags = core_propagation.propagate_standard(
            a["ra_deg"],
            a["dec_deg"],
            a["parallax_mas"],
            a["pm_ra_cosdec_mas_yr"],
            a["pm_dec_mas_yr"],
            a["radial_velocity_km_s"],
            catalogue_epoch,
            np.asarray(epochs, dtype=float)[None, :],
        )
    ra, dec = result.ra_deg, result.dec_deg
    bad = ~(np.isfinite(ra) & np.isfinite(dec))
    return np.where(bad, np.nan, ra), np.where(bad, np.nan, dec)


def _assumed(parallax_mas: float, radial_velocity_km_s: float) -> str:
    """What a drawn motion assumes for lack of data: without a radial velocity, or
    without a positive parallax for it to act through, the radial motion is left out
    (no perspective acceleration), which over thousands of years moves a nearby star by
    degrees; the chart says so rather than draw the track as if it were known."""
    if not parallax_mas > 0:
        return "no positive parallax: radial motion left out"
    if not math.isfinite(radial_velocity_km_s):
        return "radial velocity unknown: taken as 0"
    return ""


def _astrometry(ra_deg, dec_deg, parallax_mas, pm_ra, pm_dec, rv) -> dict:
    n = np.asarray(ra_deg).size

    def col(x):
        if x is None:
            return np.full(n, np.nan)
        return np.broadcast_to(np.asarray(x, dtype=float), (n,)).copy()

    return {
        "ra_deg": col(ra_deg),
        "dec_deg": col(dec_deg),
        "parallax_mas": col(parallax_mas),
        "pm_ra_cosdec_mas_yr": col(pm_ra),
        "pm_dec_mas_yr": col(pm_dec),
        "radial_velocity_km_s": col(rv),
    }


def sky_tracks(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    *,
    catalogue_epoch_jyear: float,
    start_jyear: float,
    stop_jyear: float,
    ticks: int = 6,
    labels=None,
    boundaries: bool = True,
) -> TrackChart:
    """Compute the tracks of stars over a span of epochs, with boundaries and crossings.

    Parameters
    ----------
    ra_deg, dec_deg : array_like, shape (N,)
        ICRS position at the catalogue epoch, degrees.
    parallax_mas : array_like, shape (N,)
        Parallax, mas (NaN = unknown: the track is then the proper motion alone).
    pm_ra_cosdec_mas_yr, pm_dec_mas_yr : array_like, shape (N,)
        Proper motion, mas/yr (the RA component includes cos(dec)).
    radial_velocity_km_s : array_like, shape (N,)
        Radial velocity, km/s (NaN = unknown, taken as zero for the motion).
    catalogue_epoch_jyear, start_jyear, stop_jyear : float
        Julian epochs (TDB) of the astrometry and of the two ends of the track.
    ticks : int
        Number of evenly spaced epochs marked on each track, both ends included (>= 2).
    labels : sequence of str, optional
        Star labels (default: "star 0", "star 1", ...).
    boundaries : bool
        Find the constellation boundaries in the view and the crossings (needs the core's
        constellation module; silently skipped without it, see ``boundaries_available``).

    Returns
    -------
    TrackChart

    Notes
    -----
    1. Positions come from the standard straight-line model (Hipparcos Catalogue Vol. 1,
       section 1.5.5) through :func:`service.core.propagation.propagate_standard`.
    2. Crossings come from the constellation module's crossing search over the same span
       (Roman 1987 boundaries at B1875.0, FK4 reduction).
    """
    astro = _astrometry(
        ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s
    )
    n = astro["ra_deg"].size
    if not 1 <= n <= MAX_TRACKS:
        raise ValueError(f"between 1 and {MAX_TRACKS} stars can be drawn as tracks, not {n}")
    if not (math.isfinite(start_jyear) and math.isfinite(stop_jyear)) or stop_jyear <= start_jyear:
        raise ValueError("stop must be later than start")
    if ticks < 2:
        raise ValueError("ticks must be at least 2")
    labels = list(labels) if labels is not None else [f"star {k}" for k in range(n)]
    epochs = np.linspace(start_jyear, stop_jyear, TRACK_SAMPLES)
    tick_epochs = np.linspace(start_jyear, stop_jyear, ticks)
    ra, dec = _positions(astro, catalogue_epoch_jyear, epochs)
    tra, tdec = _positions(astro, catalogue_epoch_jyear, tick_epochs)
    if not np.isfinite(ra).any(axis=1).all():
        raise ValueError(
            "the place of a star cannot be computed over this span: check its parallax and "
            "proper motion"
        )
    tracks = [
        StarTrack(
            str(labels[k]),
            epochs,
            ra[k],
            dec[k],
            tick_epochs,
            tra[k],
            tdec[k],
            _assumed(astro["parallax_mas"][k], astro["radial_velocity_km_s"][k]),
        )
        for k in range(n)
    ]
    centre = _circular_mean_deg(ra[np.isfinite(ra)])
    x = centre + _wrap180(ra - centre)
    ra_lo, ra_hi = float(np.nanmin(x)), float(np.nanmax(x))
    dec_lo, dec_hi = float(np.nanmin(dec)), float(np.nanmax(dec))
    cosd = max(0.2, math.cos(math.radians(0.5 * (dec_lo + dec_hi))))
    half = 0.5 * max((ra_hi - ra_lo) * cosd, dec_hi - dec_lo)
    pad = max(VIEW_MARGIN_MIN_DEG, VIEW_MARGIN_FRACTION * 2 * half)
    half += pad
    mid_x, mid_d = 0.5 * (ra_lo + ra_hi), 0.5 * (dec_lo + dec_hi)
    d_lo, d_hi = max(-90.0, mid_d - half), min(90.0, mid_d + half)
    view = (mid_x - half / cosd, mid_x + half / cosd, d_lo, d_hi)

    cons = _constellations() if boundaries else None
    if cons is None:
        return TrackChart(tracks, centre_ra_deg=centre, view=view)
    table = cons.boundary_table()
    abbr = list(table.abbreviations)
    # Constellations present in the view: probe a grid of points.
    gx, gd = np.meshgrid(
        np.linspace(view[0], view[1], PROBE_GRID), np.linspace(view[2], view[3], PROBE_GRID)
    )
    found_here = cons.locate(gx % 360.0, gd, with_margin=True)
    probe = found_here.index
    present = np.unique(probe)
    finite = np.isfinite(x)
    label_score = _label_scores(
        gx, gd, found_here.margin_arcsec / 3600.0, x[finite], dec[finite], view
    )
    outlines = []
    labels_out = []
    for x_ in present:
        feature = cons.outline(int(x_))
        geometry = feature["geometry"]
        polys = (
            [geometry["coordinates"]] if geometry["type"] == "Polygon" else geometry["coordinates"]
        )
        polylines = []
        for poly in polys:
            for ring in poly:
                polylines.extend(_split_ring(np.asarray(ring, dtype=float)))
        outlines.append(Boundary(abbr[int(x_)], polylines))
        best = np.argmax(np.where(probe == x_, label_score, -np.inf))
        if label_score.flat[best] >= LABEL_MIN_ROOM_FRACTION * (view[3] - view[2]):
            # Only constellations with room for their abbreviation in view are labelled.
            labels_out.append((abbr[int(x_)], float(gx.flat[best] % 360.0), float(gd.flat[best])))
    found = cons.boundary_crossings(
        astro["ra_deg"],
        astro["dec_deg"],
        astro["parallax_mas"],
        astro["pm_ra_cosdec_mas_yr"],
        astro["pm_dec_mas_yr"],
        astro["radial_velocity_km_s"],
        catalogue_epoch_jyear,
        start_jyear,
        stop_jyear,
    )
    crossings = []
    if found.star.size:
        for j in range(found.star.size):
            s = int(found.star[j])
            one = {k: v[s : s + 1] for k, v in astro.items()}
            pra, pdec = _positions(one, catalogue_epoch_jyear, [float(found.epoch_jyear[j])])
            crossings.append(
                Crossing(
                    s,
                    float(found.epoch_jyear[j]),
                    float(pra[0, 0]),
                    float(pdec[0, 0]),
                    abbr[int(found.from_index[j])],
                    abbr[int(found.to_index[j])],
                )
            )
    return TrackChart(tracks, crossings, outlines, labels_out, centre, view, True)


def _label_scores(gx, gd, margin_deg, track_x, track_dec, view):
    """Where a constellation's label reads best: far from its boundary, from the tracks
    and from the chart's edges (all in degrees on the sky, roughly)."""
    cosd = max(0.2, math.cos(math.radians(0.5 * (view[2] + view[3]))))
    tx = track_x.ravel()[::8]
    td = track_dec.ravel()[::8]
    d_track = np.min(np.hypot((gx[..., None] - tx) * cosd, gd[..., None] - td), axis=-1)
    d_edge = np.minimum.reduce(
        [(gx - view[0]) * cosd, (view[1] - gx) * cosd, gd - view[2], view[3] - gd]
    )
    return np.minimum.reduce([margin_deg, d_track, 1.5 * d_edge])


def _split_ring(ring: np.ndarray) -> list:
    """A GeoJSON ring -> polylines without the artificial edges along the antimeridian."""
    lon = ring[:, 0]
    on_cut = np.isclose(np.abs(lon), 180.0, atol=1e-9)
    artificial = on_cut[:-1] & on_cut[1:]
    pieces, start = [], 0
    for k in np.flatnonzero(artificial):
        if k + 1 - start >= 2:
            pieces.append(ring[start : k + 1])
        start = k + 1
    if len(ring) - start >= 2:
        pieces.append(ring[start:])
    return pieces


# ------------------------------------------------------------------ rendering


def load_renderer() -> None:
    """Import what drawing and saving a chart needs (the service calls it at start when a
    request time limit is set).

    Imported by the first chart request instead, matplotlib took about 0.4 s of it; a
    request time limit (SKYDRIFT_REQUEST_TIMEOUT_S) reached during the import twice left
    matplotlib half imported, and every later chart of that worker process failed with a
    500 ("module 'matplotlib' has no attribute ...") until the process was restarted.
    """
    import matplotlib.backends.backend_agg  # noqa: F401  (PNG)
    import matplotlib.backends.backend_svg  # noqa: F401  (SVG)
    from matplotlib import collections, figure, patheffects, ticker  # noqa: F401
    from PIL import Image

    Image.preinit()  # the image plugins saving a PNG loads on first use


def _figure(width_in: float, height_in: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), facecolor=PAGE_COLOUR, layout="constrained")


def _save(fig, image_format: str, width_px: int | None = None) -> bytes:
    """The figure as SVG or PNG bytes. With ``width_px``, a PNG is drawn that many pixels
    wide (text and lines scaled with it) and an SVG states that width, in pixels, and the
    height that keeps its shape; without, a PNG has PNG_DPI and an SVG its size in points."""
    import matplotlib

    if image_format not in IMAGE_FORMATS:
        raise ValueError(f"image format must be one of {IMAGE_FORMATS}")
    if width_px is not None and not MIN_WIDTH_PX <= width_px <= MAX_WIDTH_PX:
        raise ValueError(f"width_px must be {MIN_WIDTH_PX} to {MAX_WIDTH_PX}")
    width_in, height_in = fig.get_size_inches()
    # Agg makes the canvas int(width_in * dpi) pixels wide: half a pixel more than asked
    # keeps a rounding below the whole number from losing a pixel.
    dpi = PNG_DPI if width_px is None else (width_px + 0.5) / width_in
    buf = io.BytesIO()
    rc = {"svg.fonttype": "none", "svg.hashsalt": "skydrift", "svg.id": "skydrift-chart"}
    # rc_context changes matplotlib's global settings: one chart at a time is written, so
    # threads of one worker cannot see each other's settings.
    with _SAVE_LOCK, matplotlib.rc_context(rc):
        if image_format == "svg":
            fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": "Skydrift"})
        else:
            fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": "Skydrift"})
    data = buf.getvalue()
    if image_format == "svg" and width_px is not None:
        data = _svg_size(data, width_px, width_px * height_in / width_in)
    return data


_SVG_SIZE = re.compile(rb'(<svg\b[^>]*?\swidth=")[0-9.]+pt("\s+height=")[0-9.]+pt(")')


def _svg_size(svg: bytes, width_px: float, height_px: float) -> bytes:
    """The SVG with the width and height of its root element in pixels (its viewBox, the
    drawing's own coordinates, unchanged: the drawing is scaled to the new size)."""
    sized, count = _SVG_SIZE.subn(
        lambda m: b"%s%dpx%s%.1fpx%s" % (m[1], round(width_px), m[2], height_px, m[3]), svg, 1
    )
    if count != 1:  # pragma: no cover - matplotlib writes both, in points
        raise RuntimeError("the SVG root element has no width and height in points")
    return sized


def _plain(text: str) -> str:
    """Text drawn as written: matplotlib reads text between two "$" as math markup (which
    garbles "HD $5 to $6" and fails on "$^$"); an escaped dollar is drawn as a dollar."""
    return text.replace("$", "\\$")


def _style_axes(ax) -> None:
    ax.set_facecolor(PANEL_COLOUR)
    ax.tick_params(colors=MUTED_TEXT_COLOUR, labelsize=8)
    for spine in ax.spines.values():
        spine.set_color(GRID_COLOUR)
    ax.grid(True, color=GRID_COLOUR, linewidth=0.6, linestyle=":")


def _side_offsets(ax, x, y, tx, ty, view, cosd) -> list:
    """Label offsets (points) beside each tick, on the right-hand side of the motion as
    seen on the chart (right ascension to the left), so labels do not sit on the track."""
    span = max((view[1] - view[0]) * cosd, view[3] - view[2]) or 1.0
    out = []
    for xx, yy in zip(tx, ty, strict=True):
        if not (np.isfinite(xx) and np.isfinite(yy)):
            out.append((6.0, 4.0))
            continue
        k = int(np.nanargmin(np.hypot((x - xx) * cosd, y - yy)))
        k0, k1 = max(k - 1, 0), min(k + 1, x.size - 1)
        dx = -(x[k1] - x[k0]) * cosd  # screen x grows to the right, RA to the left
        dy = y[k1] - y[k0]
        norm = math.hypot(dx, dy)
        if not math.isfinite(norm) or norm < 1e-12 * span:
            out.append((6.0, 4.0))
            continue
        out.append((8.0 * dy / norm, -8.0 * dx / norm))
    return out


def _epoch_title(epoch: float) -> str:
    """A Julian epoch as a heading names it: to 0.001 year (about 9 hours), trailing zeros
    dropped but one decimal kept ("2016.0", "1991.25"; one decimal made J1991.25 "1991.2")."""
    text = f"{epoch:.3f}".rstrip("0")
    return text + "0" if text.endswith(".") else text


def _epoch_decimals(epochs, step: float) -> int:
    """Decimals that write every tick epoch to within a hundredth of the step between them
    (33.33-year steps from 2016: 2049.3, not 2049, a third of a step off), at most four."""
    epochs = np.asarray(epochs, dtype=float)
    epochs = epochs[np.isfinite(epochs)]
    tolerance = 0.01 * abs(step) if step else 1e-4
    for decimals in range(5):
        if np.all(np.abs(np.round(epochs, decimals) - epochs) <= tolerance):
            return decimals
    return 4


def render_tracks(
    chart: TrackChart,
    *,
    title: str | None = None,
    image_format: str = "svg",
    size_in: tuple = TRACK_SIZE_IN,
    width_px: int | None = None,
) -> bytes:
    """Draw a :class:`TrackChart`; returns the SVG or PNG bytes (``width_px``: see
    :func:`_save`)."""
    from matplotlib.collections import LineCollection
    from matplotlib.ticker import FuncFormatter

    fig = _figure(*size_in)
    ax = fig.add_subplot()
    _style_axes(ax)
    centre = chart.centre_ra_deg
    ra_lo, ra_hi, dec_lo, dec_hi = chart.view

    def x_of(ra):
        return centre + _wrap180(np.asarray(ra) - centre)

    for b in chart.boundaries:
        segs = []
        for line in b.polylines:
            x = x_of(line[:, 0])
            y = line[:, 1]
            # Split where the unwrapped longitude jumps (an outline far from the view).
            jumps = np.flatnonzero(np.abs(np.diff(x)) > 180.0)
            for piece_x, piece_y in zip(
                np.split(x, jumps + 1), np.split(y, jumps + 1), strict=True
            ):
                if piece_x.size >= 2:
                    segs.append(np.column_stack([piece_x, piece_y]))
        lc = LineCollection(segs, colors=BOUNDARY_COLOUR, linewidths=0.8, alpha=0.8, zorder=1)
        lc.set_gid(f"boundary-{b.abbreviation}")
        ax.add_collection(lc)
    for abbr, ra, dec in chart.labels:
        ax.text(
            float(x_of(ra)),
            dec,
            abbr.upper(),
            color=MUTED_TEXT_COLOUR,
            fontsize=11,
            fontweight="bold",
            alpha=0.55,
            ha="center",
            va="center",
            zorder=1,
            clip_on=True,
        ).set_gid(f"label-{abbr}")
    cosd = max(0.2, math.cos(math.radians(0.5 * (dec_lo + dec_hi))))
    span = max((ra_hi - ra_lo) * cosd, dec_hi - dec_lo)
    for k, t in enumerate(chart.tracks):
        colour = TRACK_COLOURS[k % len(TRACK_COLOURS)]
        x = centre + np.unwrap(_wrap180(t.ra_deg - centre), period=360.0)
        # matplotlib leaves labels that start with "_" out of the legend: a zero-width space
        # in front keeps such an id visible and unchanged to the reader.
        legend_label = _plain("\u200b" + t.label if t.label.startswith("_") else t.label)
        if t.assumed:
            legend_label += f" ({t.assumed})"
        (line,) = ax.plot(x, t.dec_deg, color=colour, linewidth=2.0, zorder=3, label=legend_label)
        line.set_gid(f"track-{k}")
        tx = x_of(t.tick_ra_deg)
        ticks = ax.plot(
            tx,
            t.tick_dec_deg,
            linestyle="none",
            marker="o",
            markersize=4.5,
            markerfacecolor=TICK_COLOUR,
            markeredgecolor=colour,
            markeredgewidth=1.2,
            zorder=4,
        )[0]
        ticks.set_gid(f"ticks-{k}")
        step = float(np.diff(t.tick_epochs_jyear).mean()) if t.tick_epochs_jyear.size > 1 else 1
        decimals = _epoch_decimals(t.tick_epochs_jyear, step)
        offsets = _side_offsets(ax, x, t.dec_deg, tx, t.tick_dec_deg, chart.view, cosd)
        last = None
        for e, xx, yy, off in zip(t.tick_epochs_jyear, tx, t.tick_dec_deg, offsets, strict=True):
            here = np.array([float(xx) * cosd, float(yy)])
            if not np.isfinite(here).all():
                continue
            if last is not None and np.hypot(*(here - last)) < TICK_LABEL_SPACING_FRACTION * span:
                continue  # too close to the last labelled epoch to be read
            last = here
            ax.annotate(
                f"{float(e):.{decimals}f}",
                (float(xx), float(yy)),
                xytext=off,
                textcoords="offset points",
                color=TEXT_COLOUR,
                fontsize=7,
                ha="left" if off[0] >= 0 else "right",
                va="center",
                zorder=5,
            )
        first = (
            int(np.flatnonzero(np.isfinite(tx) & np.isfinite(t.tick_dec_deg))[0])
            if (np.isfinite(tx) & np.isfinite(t.tick_dec_deg)).any()
            else None
        )
        if first is None:
            continue
        ax.annotate(
            _plain(t.label),
            (float(tx[first]), float(t.tick_dec_deg[first])),
            xytext=(-6, -12),
            textcoords="offset points",
            color=colour,
            fontsize=9,
            fontweight="bold",
            ha="right",
            zorder=5,
        )
    for j, c in enumerate(chart.crossings):
        if not (math.isfinite(c.ra_deg) and math.isfinite(c.dec_deg)):
            continue
        t = chart.tracks[c.star]
        x = centre + np.unwrap(_wrap180(t.ra_deg - centre), period=360.0)
        (off,) = _side_offsets(ax, x, t.dec_deg, [x_of(c.ra_deg)], [c.dec_deg], chart.view, cosd)
        off = (-1.5 * off[0], -1.5 * off[1])  # the side away from the epoch labels
        mark = ax.plot(
            [float(x_of(c.ra_deg))],
            [c.dec_deg],
            linestyle="none",
            marker="D",
            markersize=9,
            markerfacecolor="none",
            markeredgecolor=CROSSING_COLOUR,
            markeredgewidth=1.8,
            zorder=6,
            label="boundary crossing" if j == 0 else None,
        )[0]
        mark.set_gid(f"crossing-{j}")
        ax.annotate(
            f"{c.from_abbreviation} \u2192 {c.to_abbreviation}  {c.epoch_jyear:.1f}",
            (float(x_of(c.ra_deg)), c.dec_deg),
            xytext=off,
            textcoords="offset points",
            ha="left" if off[0] >= 0 else "right",
            va="center",
            color=CROSSING_COLOUR,
            fontsize=8,
            zorder=6,
        )
    ax.set_xlim(ra_hi, ra_lo)  # right ascension increases to the left
    ax.set_ylim(dec_lo, dec_hi)
    ax.set_aspect(1.0 / cosd)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v % 360.0:g}\u00b0"))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}\u00b0"))
    ax.set_xlabel("right ascension (ICRS), deg", color=MUTED_TEXT_COLOUR, fontsize=9)
    ax.set_ylabel("declination (ICRS), deg", color=MUTED_TEXT_COLOUR, fontsize=9)
    first, last = chart.tracks[0].epochs_jyear[[0, -1]]
    heading = title or f"Sky tracks, J{_epoch_title(first)} to J{_epoch_title(last)} (TDB)"
    ax.set_title(_plain(heading), color=TEXT_COLOUR, fontsize=12, loc="left")
    note = "dots: evenly spaced epochs, labelled where room; lines: IAU constellation boundaries"
    if not chart.boundaries_available:
        note = "dots: evenly spaced epochs, labelled where room"
    ax.text(
        0.99,
        0.01,
        note,
        transform=ax.transAxes,
        ha="right",
        va="bottom",
        color=MUTED_TEXT_COLOUR,
        fontsize=7,
        zorder=7,
        bbox={"facecolor": PANEL_COLOUR, "edgecolor": "none", "alpha": 0.9, "pad": 2},
    )
    if ax.get_legend_handles_labels()[0]:  # no legend (and no warning) when nothing is named
        legend = ax.legend(
            loc="best",
            fontsize=8,
            facecolor=PAGE_COLOUR,
            edgecolor=GRID_COLOUR,
            labelcolor=TEXT_COLOUR,
        )
        legend.set_gid("legend")
    return _save(fig, image_format, width_px)


def star_field(
    ra_deg,
    dec_deg,
    parallax_mas,
    pm_ra_cosdec_mas_yr,
    pm_dec_mas_yr,
    radial_velocity_km_s,
    *,
    catalogue_epoch_jyear: float,
    epochs_jyear: tuple,
    arrow_years: float | None = None,
    labels=None,
) -> FieldChart:
    """Positions of stars at two epochs, and where each will be ``arrow_years`` later.

    Parameters
    ----------
    ra_deg ... radial_velocity_km_s : array_like, shape (N,)
        Astrometry at the catalogue epoch (units as in :func:`sky_tracks`).
    catalogue_epoch_jyear : float
        Julian epoch (TDB) of the astrometry.
    epochs_jyear : (float, float)
        The two epochs shown, Julian epochs (TDB).
    arrow_years : float, optional
        Time span of the motion arrows, Julian years (default: the interval between the two
        epochs, so the arrows of the first panel end at the places of the second).
    labels : sequence of str, optional
        Star labels.
    """
    astro = _astrometry(
        ra_deg, dec_deg, parallax_mas, pm_ra_cosdec_mas_yr, pm_dec_mas_yr, radial_velocity_km_s
    )
    n = astro["ra_deg"].size
    e1, e2 = (float(e) for e in epochs_jyear)
    span = float(arrow_years) if arrow_years is not None else abs(e2 - e1)
    if not math.isfinite(span) or span <= 0:
        raise ValueError("arrow_years must be positive (or the two epochs must differ)")
    ra, dec = _positions(astro, catalogue_epoch_jyear, [e1, e2, e1 + span, e2 + span])
    labels = list(labels) if labels is not None else [f"star {k}" for k in range(n)]
    return FieldChart(
        labels,
        (e1, e2),
        ra[:, :2].T.copy(),
        dec[:, :2].T.copy(),
        ra[:, 2:].T.copy(),
        dec[:, 2:].T.copy(),
        astro["parallax_mas"],
        span,
        sum(
            bool(_assumed(p, v))
            for p, v in zip(astro["parallax_mas"], astro["radial_velocity_km_s"], strict=True)
        ),
    )


def _field_arrows(panel: int, x, y, xe, ye, step):
    """The motion arrows of one field-chart panel, Hammer-axes coordinates (radians).

    A place that could not be computed gets no arrow, nor does a motion shorter than
    MIN_ARROW_RAD. An arrow that runs over the chart's edge (RA 180) is drawn to the edge
    (``arrow-tail-<panel>-<i>``, no head) and on from the other edge (``arrow-<panel>-<i>``).
    """
    with np.errstate(invalid="ignore"):
        drawn = np.isfinite(x) & np.isfinite(y) & np.isfinite(xe) & np.isfinite(ye)
        drawn &= np.hypot(step * np.cos(y), ye - y) >= MIN_ARROW_RAD
    tails, heads, gids, headed = [], [], [], []
    for i in np.flatnonzero(drawn).tolist():
        tail = (x[i], y[i])
        if abs(x[i] + step[i]) > math.pi:
            edge = math.copysign(math.pi, step[i])
            y_edge = y[i] + (edge - x[i]) / step[i] * (ye[i] - y[i])
            tails.append(tail)
            heads.append((edge, y_edge))
            gids.append(f"arrow-tail-{panel}-{i}")
            headed.append(False)
            tail = (-edge, y_edge)
        tails.append(tail)
        heads.append((xe[i], ye[i]))
        gids.append(f"arrow-{panel}-{i}")
        headed.append(True)
    arrows = _arrow_set_class()(tails, heads, gids, headed, ARROW_COLOUR)
    arrows.set_zorder(2)
    arrows.set_gid(f"arrows-{panel}")
    return arrows


def _arrow_outlines(p0, p1, headed, shaft_px, head_length_px, head_width_px):
    """Outlines of straight arrows from ``p0`` to ``p1`` (display coordinates, (M, 2)):
    (M, 8, 2) vertices, the first repeated last. A shaft ``shaft_px`` wide; where
    ``headed``, a head ``head_length_px`` long and ``head_width_px`` wide with its tip at
    ``p1``. On an arrow shorter than its head the head shrinks to the arrow's length,
    keeping its proportions (never narrower than the shaft): it then starts at ``p0`` and
    stays under a slow star's marker, where a head of full size would reach back past the
    star and show behind it."""
    d = p1 - p0
    length = np.hypot(d[:, 0], d[:, 1])
    safe = np.where(length > 0, length, 1.0)
    u = np.where((length > 0)[:, None], d / safe[:, None], [1.0, 0.0])
    n = np.stack([-u[:, 1], u[:, 0]], axis=1)
    sw = 0.5 * shaft_px
    head = np.where(headed, np.minimum(head_length_px, length), 0.0)
    hl = head[:, None]
    hw = np.where(headed, np.maximum(0.5 * head_width_px * head / head_length_px, sw), sw)[:, None]
    base = p1 - u * hl
    start = np.where((length[:, None] > hl), p0, base)  # no shaft behind a long head
    verts = [start + n * sw, base + n * sw, base + n * hw, p1, base - n * hw, base - n * sw]
    verts += [start - n * sw, start + n * sw]
    return np.stack(verts, axis=1)


@functools.cache
def _arrow_set_class():
    """The matplotlib artist class of many straight arrows (built on first use, so that
    importing this module does not import matplotlib)."""
    from matplotlib.artist import Artist
    from matplotlib.colors import to_rgba
    from matplotlib.path import Path
    from matplotlib.transforms import IdentityTransform

    class ArrowSet(Artist):
        """Straight arrows between places in data coordinates, one filled outline each in
        an SVG group of its own (``gids``). The outlines are made when the artist is drawn,
        in display coordinates after the layout has placed the axes, so that shafts and
        heads keep their width in points at any resolution. One artist for all the arrows
        of a panel: an annotation per arrow took about 1 ms to make and draw, 10 s of the
        18 s an SVG of 5,000 stars (10,000 arrows) took."""

        def __init__(self, tails, heads, gids, headed, colour):
            super().__init__()
            self._tails = np.asarray(tails, dtype=float).reshape(-1, 2)
            self._heads = np.asarray(heads, dtype=float).reshape(-1, 2)
            self._gids = list(gids)
            self._headed = np.asarray(headed, dtype=bool)
            self._rgba = to_rgba(colour)
            self.set_in_layout(False)
            # Not clipped: both ends of an arrow are on the sky, and so is the straight
            # line between them (the sky's outline is convex). The SVG writer names the
            # clip of every clipped path by printing its transform, some 0.25 ms a path.
            self.set_clip_on(False)

        def draw(self, renderer):
            if not self.get_visible() or not self._gids:
                return
            transform = self.axes.transData
            outlines = _arrow_outlines(
                transform.transform(self._tails),
                transform.transform(self._heads),
                self._headed,
                renderer.points_to_pixels(ARROW_SHAFT_PT),
                renderer.points_to_pixels(ARROW_HEAD_LENGTH_PT),
                renderer.points_to_pixels(ARROW_HEAD_WIDTH_PT),
            )
            identity = IdentityTransform()
            gc = renderer.new_gc()
            self._set_gc_clip(gc)
            gc.set_linewidth(0.0)
            gc.set_antialiased(True)
            renderer.open_group("arrows", gid=self.get_gid())
            for gid, verts in zip(self._gids, outlines, strict=True):
                renderer.open_group("arrow", gid=gid)
                renderer.draw_path(gc, Path(verts, closed=True), identity, self._rgba)
                renderer.close_group("arrow")
            renderer.close_group("arrows")
            gc.restore()
            self.stale = False

    return ArrowSet


def _hammer_x(ra_deg):
    """Right ascension -> Hammer-axes longitude, radians, increasing to the left."""
    return -np.radians(_wrap180(ra_deg))


def render_field(chart: FieldChart, **kwargs) -> bytes:
    """Draw a :class:`FieldChart`: two all-sky panels side by side with motion arrows.

    Keywords: ``title``, ``image_format`` ("svg" or "png"), ``label_fastest`` (how many of
    the fastest stars are labelled), ``size_in``, ``width_px`` (see :func:`_save`). Stars
    whose place could not be computed are left out.
    """
    with np.errstate(invalid="ignore"):
        return _render_field(chart, **kwargs)


def _render_field(
    chart: FieldChart,
    *,
    title: str | None = None,
    image_format: str = "svg",
    label_fastest: int = 3,
    size_in: tuple = FIELD_SIZE_IN,
    width_px: int | None = None,
) -> bytes:
    """Draw a :class:`FieldChart`: two all-sky panels side by side with motion arrows."""
    from matplotlib import patheffects

    fig = _figure(*size_in)
    axes = [fig.add_subplot(1, 2, k + 1, projection="hammer") for k in range(2)]
    plx = chart.parallax_mas
    with np.errstate(invalid="ignore", divide="ignore"):
        size = np.where(plx > 0, np.clip(6.0 + 22.0 * np.log10(np.abs(plx) / 2.0), 5, 60), 8)
    known = plx > 0
    # Angular displacement over the arrow span, degrees (for picking the fastest stars).
    moved = np.degrees(
        np.arccos(
            np.clip(
                np.sin(np.radians(chart.dec_deg[0])) * np.sin(np.radians(chart.arrow_dec_deg[0]))
                + np.cos(np.radians(chart.dec_deg[0]))
                * np.cos(np.radians(chart.arrow_dec_deg[0]))
                * np.cos(np.radians(chart.arrow_ra_deg[0] - chart.ra_deg[0])),
                -1.0,
                1.0,
            )
        )
    )
    fastest = set(np.argsort(-moved)[:label_fastest].tolist())
    for k, ax in enumerate(axes):
        _style_axes(ax)
        colour = FIELD_FIRST_COLOUR if k == 0 else FIELD_SECOND_COLOUR
        x = _hammer_x(chart.ra_deg[k])
        y = np.radians(chart.dec_deg[k])
        xe = _hammer_x(chart.arrow_ra_deg[k])
        ye = np.radians(chart.arrow_dec_deg[k])
        step = (xe - x + math.pi) % (2.0 * math.pi) - math.pi  # the short way round
        ax.add_artist(_field_arrows(k, x, y, xe, ye, step))
        # Markers unclipped, as the arrows: markers of different sizes are written to the
        # SVG one by one, and naming the clip of each took 3 s of a 5,000-star chart.
        stars = ax.scatter(
            x[known],
            y[known],
            s=size[known],
            color=colour,
            edgecolors="none",
            zorder=3,
            clip_on=False,
        )
        stars.set_gid(f"stars-{k}")
        if (~known).any():
            faint = ax.scatter(
                x[~known],
                y[~known],
                s=size[~known],
                facecolors="none",
                edgecolors=colour,
                linewidths=0.8,
                zorder=3,
                clip_on=False,
            )
            faint.set_gid(f"stars-no-parallax-{k}")
        for i in sorted(fastest):
            if not np.isfinite([x[i], y[i], xe[i], ye[i]]).all():
                continue
            # The label sits behind the star, opposite its arrow.
            dx, dy = step[i], ye[i] - y[i]
            norm = math.hypot(dx, dy) or 1.0
            off = (-9.0 * dx / norm, -9.0 * dy / norm)
            ax.annotate(
                _plain(chart.labels[i]),
                (x[i], y[i]),
                xytext=off,
                textcoords="offset points",
                ha="right" if off[0] < 0 else "left",
                va="top" if off[1] < 0 else "bottom",
                color=TEXT_COLOUR,
                fontsize=7,
                zorder=4,
                path_effects=[patheffects.withStroke(linewidth=2.5, foreground=PANEL_COLOUR)],
            )
        ticks = np.radians(np.arange(-150, 181, 30))
        ax.set_xticks(ticks)
        ax.set_xticklabels([f"{(-t) % 360:.0f}\u00b0" for t in np.degrees(ticks)])
        ax.tick_params(axis="x", labelsize=6, colors=MUTED_TEXT_COLOUR)
        for label in ax.get_xticklabels():
            label.set_alpha(0.6)  # right ascension marks stay behind the stars' labels
        ax.set_title(
            f"J{_epoch_title(chart.epochs_jyear[k])}", color=colour, fontsize=12, fontweight="bold"
        )
    heading = title or "Star field at two epochs"
    fig.suptitle(_plain(heading), color=TEXT_COLOUR, fontsize=13)
    years = f"{chart.arrow_years:,.6g} year" + ("" if chart.arrow_years == 1 else "s")
    radial = ""
    if chart.without_radial_motion:
        n = chart.without_radial_motion
        radial = (
            f"; {n:,} {'star has' if n == 1 else 'stars have'} no radial velocity or no "
            "positive parallax: radial motion left out"
        )
    # Two lines, placed by the layout (as a figure-wide x label): on one line, as a free
    # text, its ends ran past the figure's edges and were cut off.
    note = fig.supxlabel(
        f"arrows: motion over the next {years} (straight-line model; one running over the "
        "edge goes on from the other edge); right ascension increases to the left\n"
        "marker size grows with parallax; open circles: parallax unknown or not positive"
        f"{radial}",
        color=MUTED_TEXT_COLOUR,
        fontsize=7,
    )
    note.set_gid("note")
    return _save(fig, image_format, width_px)
