"""Charts: SVG structure (one path per track, boundaries, crossings), PNG not blank, data."""

import io
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from service import charts

SVG = "{http://www.w3.org/2000/svg}"
NAMES = (
    "ra_deg",
    "dec_deg",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)
#: Demo stars drawn: KRC 0017 (fast, crosses Tau -> Ari), KRC 0018, KRC 0023.
PICK = (16, 17, 22)


def astrometry(stars):
    return [np.array([np.nan if s.get(n) is None else s[n] for s in stars]) for n in NAMES]


def groups(svg: bytes) -> dict:
    """id -> <g> element for every identified group of an SVG document."""
    root = ET.fromstring(svg)
    return {g.get("id"): g for g in root.iter(f"{SVG}g") if g.get("id")}


def paths_in(g) -> int:
    return len(list(g.iter(f"{SVG}path")))


@pytest.fixture(scope="module")
def picked(demo_catalogue):
    return [demo_catalogue["stars"][k] for k in PICK]


@pytest.fixture(scope="module")
def track_chart(picked):
    return charts.sky_tracks(
        *astrometry(picked),
        catalogue_epoch_jyear=2016.0,
        start_jyear=2016.0,
        stop_jyear=8016.0,
        ticks=5,
        labels=[s["id"] for s in picked],
    )


@pytest.fixture(scope="module")
def track_svg(track_chart):
    return charts.render_tracks(track_chart)


def test_track_svg_has_one_path_per_star(track_svg, picked):
    g = groups(track_svg)
    tracks = sorted(k for k in g if k.startswith("track-"))
    assert tracks == [f"track-{k}" for k in range(len(picked))]
    for k in tracks:
        assert paths_in(g[k]) == 1
    # Tick dots: one group per star with a marker at each of the 5 epochs.
    for k in range(len(picked)):
        assert len(list(g[f"ticks-{k}"].iter(f"{SVG}use"))) == 5


def test_track_follows_the_motion(track_chart, picked):
    """Track ends agree with astropy's space motion to well within a chart pixel."""
    from astropy import units as u
    from astropy.coordinates import SkyCoord
    from astropy.time import Time

    a = astrometry(picked)
    c = SkyCoord(
        ra=a[0] * u.deg,
        dec=a[1] * u.deg,
        distance=(1000.0 / a[2]) * u.pc,
        pm_ra_cosdec=a[3] * u.mas / u.yr,
        pm_dec=a[4] * u.mas / u.yr,
        radial_velocity=a[5] * u.km / u.s,
        obstime=Time(2016.0, format="jyear", scale="tdb"),
    )
    moved = c.apply_space_motion(new_obstime=Time(8016.0, format="jyear", scale="tdb"))
    for k, t in enumerate(track_chart.tracks):
        end = SkyCoord(ra=t.ra_deg[-1] * u.deg, dec=t.dec_deg[-1] * u.deg)
        # astropy (erfa starpm) includes light time, the chart's straight-line model not:
        # over 6000 years that differs by tens of arcsec. Tolerance 0.02 deg, a fraction of
        # a pixel at the chart's scale (common practice for plotting).
        assert end.separation(moved[k]).deg < 0.02


def test_boundaries_and_crossings(track_chart, track_svg, picked):
    cons = pytest.importorskip("service.core.constellations")
    g = groups(track_svg)
    # Each star's constellation at both ends of its track has its boundary drawn.
    for t in track_chart.tracks:
        for ra, dec in ((t.ra_deg[0], t.dec_deg[0]), (t.ra_deg[-1], t.dec_deg[-1])):
            abbr = cons.boundary_table().abbreviations[int(cons.locate(ra, dec).index)]
            assert f"boundary-{abbr}" in g
            assert paths_in(g[f"boundary-{abbr}"]) >= 1
    a = astrometry(picked)
    found = cons.boundary_crossings(*a, 2016.0, 2016.0, 8016.0)
    marks = sorted(k for k in g if k.startswith("crossing-"))
    assert len(marks) == found.star.size >= 1
    names = cons.boundary_table().abbreviations
    pairs = {(names[f], names[t]) for f, t in zip(found.from_index, found.to_index, strict=True)}
    assert ("Tau", "Ari") in pairs  # KRC 0017 leaves Taurus for Aries in the scenario
    for c in track_chart.crossings:
        # A crossing point lies on a boundary (Roman 1987 table; 1 arcsec).
        assert cons.locate(c.ra_deg, c.dec_deg).margin_arcsec < 1.0
        # ... and on the drawn outlines of both constellations: some drawn segment passes
        # within 1 arcsec of it (outlines are densified to 0.05 arcsec by the core).
        for abbr in (c.from_abbreviation, c.to_abbreviation):
            (outline,) = [b for b in track_chart.boundaries if b.abbreviation == abbr]
            assert _distance_to_polylines_arcsec(c.ra_deg, c.dec_deg, outline.polylines) < 1.0


def _distance_to_polylines_arcsec(ra, dec, polylines):
    """Smallest distance from a point to line segments, in a tangent plane (small angles)."""
    best = np.inf
    cosd = np.cos(np.radians(dec))
    for line in polylines:
        x = ((line[:, 0] - ra + 180.0) % 360.0 - 180.0) * cosd
        y = line[:, 1] - dec
        ax, ay, bx, by = x[:-1], y[:-1], x[1:], y[1:]
        dx, dy = bx - ax, by - ay
        with np.errstate(invalid="ignore", divide="ignore"):
            t = np.clip(-(ax * dx + ay * dy) / (dx * dx + dy * dy), 0.0, 1.0)
        t = np.nan_to_num(t)
        d = np.hypot(ax + t * dx, ay + t * dy)
        best = min(best, float(d.min()) * 3600.0)
    return best


def test_without_boundaries(picked):
    chart = charts.sky_tracks(
        *astrometry(picked[:1]),
        catalogue_epoch_jyear=2016.0,
        start_jyear=2016.0,
        stop_jyear=3016.0,
        boundaries=False,
    )
    g = groups(charts.render_tracks(chart))
    assert not [k for k in g if k.startswith(("boundary-", "crossing-"))]
    assert paths_in(g["track-0"]) == 1


def test_png_is_not_blank(track_chart):
    from matplotlib import image

    png = charts.render_tracks(track_chart, image_format="png")
    assert png.startswith(b"\x89PNG\r\n\x1a\n")
    rgb = image.imread(io.BytesIO(png))[..., :3]
    assert rgb.shape[0] > 500 and rgb.shape[1] > 500
    assert rgb.std() > 0.02  # not one flat colour
    # The first track's colour covers a visible number of pixels.
    want = np.array([int(charts.TRACK_COLOURS[0][i : i + 2], 16) / 255 for i in (1, 3, 5)])
    near = np.all(np.abs(rgb - want) < 0.03, axis=-1)
    assert near.sum() > 200


def test_field_chart(demo_catalogue):
    stars = demo_catalogue["stars"]
    chart = charts.star_field(
        *astrometry(stars),
        catalogue_epoch_jyear=2016.0,
        epochs_jyear=(2016.0, 12016.0),
        labels=[s["id"] for s in stars],
    )
    # Default arrows: the first panel's arrows end where the second panel's stars are.
    np.testing.assert_array_equal(chart.arrow_ra_deg[0], chart.ra_deg[1])
    np.testing.assert_array_equal(chart.arrow_dec_deg[0], chart.dec_deg[1])
    g = groups(charts.render_field(chart))
    assert "stars-0" in g and "stars-1" in g
    # The fast mover KRC 0017 (index 16) moves about 11 degrees: arrows in both panels.
    assert "arrow-0-16" in g and "arrow-1-16" in g
    png = charts.render_field(chart, image_format="png")
    from matplotlib import image

    assert image.imread(io.BytesIO(png))[..., :3].std() > 0.02


def test_arrow_outlines_by_hand():
    # Expected vertices worked by hand: an arrow along +x from (0, 0) to (10, 0), shaft 1
    # wide, head 3 long and 4 wide; the same turned a quarter (along +y); an arrow 2 long,
    # shorter than its head: the head shrinks to 2 long and 4 * 2/3 wide and starts at the
    # tail (no shaft); one 0.3 long: its head 0.3 long, as wide as the shaft (0.4 would be
    # narrower); no head.
    p0 = np.zeros((5, 2))
    p1 = np.array([[10.0, 0.0], [0.0, 10.0], [2.0, 0.0], [0.3, 0.0], [10.0, 0.0]])
    headed = np.array([True, True, True, True, False])
    got = charts._arrow_outlines(p0, p1, headed, 1.0, 3.0, 4.0)
    along_x = [(0, 0.5), (7, 0.5), (7, 2), (10, 0), (7, -2), (7, -0.5), (0, -0.5), (0, 0.5)]
    along_y = [(-0.5, 0), (-0.5, 7), (-2, 7), (0, 10), (2, 7), (0.5, 7), (0.5, 0), (-0.5, 0)]
    w = 4.0 / 3.0
    short = [(0, 0.5), (0, 0.5), (0, w), (2, 0), (0, -w), (0, -0.5), (0, -0.5), (0, 0.5)]
    tiny = [(0, 0.5), (0, 0.5), (0, 0.5), (0.3, 0), (0, -0.5), (0, -0.5), (0, -0.5), (0, 0.5)]
    bare = [(0, 0.5), (10, 0.5), (10, 0.5), (10, 0), (10, -0.5), (10, -0.5), (0, -0.5), (0, 0.5)]
    for k, want in enumerate([along_x, along_y, short, tiny, bare]):
        np.testing.assert_allclose(got[k], want, atol=1e-12, err_msg=f"arrow {k}")


def test_field_chart_arrows_are_drawn_in_png():
    # The arrows are one artist per panel, outlined when drawn: the same stars with and
    # without motion differ by the arrows' pixels (arrow colour), nothing else.
    n = 40
    rng = np.random.default_rng(7)
    ra, dec = rng.uniform(0, 360, n), rng.uniform(-60, 60, n)
    plx, rv = np.full(n, 50.0), np.zeros(n)

    def arrow_pixels(pm):
        chart = charts.star_field(ra, dec, plx, pm, pm, rv, catalogue_epoch_jyear=2016.0,
                                  epochs_jyear=(2016.0, 12016.0))  # fmt: skip
        png = charts.render_field(chart, image_format="png", label_fastest=0)
        from matplotlib import image

        rgb = image.imread(io.BytesIO(png))[..., :3]
        want = np.array([int(charts.ARROW_COLOUR[i : i + 2], 16) / 255 for i in (1, 3, 5)])
        return int(np.all(np.abs(rgb - want) < 0.03, axis=-1).sum())

    still, moving = arrow_pixels(np.zeros(n)), arrow_pixels(np.full(n, 3000.0))
    # 40 arrows of about 12 deg (3,000 mas/yr over 10,000 years on each axis) in each
    # panel, some 30 pixels long at 150 dpi with a core of about one pixel in the arrow
    # colour (the edges blend into the panel): some 2,500 pixels in all (2,680 measured).
    assert moving - still > 1500, (still, moving)


def test_field_chart_note_is_inside_the_image(demo_catalogue):
    # The note under the panels ran past both edges of the image on one line ("arrows:
    # motion over the n" cut off at the left). Its pixels (the muted text colour, in the
    # bottom rows, where nothing else is drawn) must keep clear of the edges.
    from matplotlib import image

    stars = demo_catalogue["stars"]
    chart = charts.star_field(*astrometry(stars), catalogue_epoch_jyear=2016.0,
                              epochs_jyear=(2016.0, 12016.0))  # fmt: skip
    rgb = image.imread(io.BytesIO(charts.render_field(chart, image_format="png")))[..., :3]
    muted = np.array([int(charts.MUTED_TEXT_COLOUR[i : i + 2], 16) / 255 for i in (1, 3, 5)])
    bottom = rgb[-int(0.08 * rgb.shape[0]) :]
    columns = np.flatnonzero(np.any(np.all(np.abs(bottom - muted) < 0.05, axis=-1), axis=0))
    assert columns.size > 500  # the note is there
    assert columns.min() > 20 and columns.max() < rgb.shape[1] - 20, (columns.min(), columns.max())


def test_tick_labels_name_their_epochs(picked):
    # Four ticks over 100 years, 33.33 years apart: the one at 2082.67 was labelled 2083, a
    # third of a year off. Every label must read as its tick's epoch to 0.05 year.
    a = [x[:1] for x in astrometry(picked)]
    span = {"start_jyear": 2016.0, "stop_jyear": 2116.0, "ticks": 4}
    chart = charts.sky_tracks(
        *a, catalogue_epoch_jyear=2016.0, labels=["x"], boundaries=False, **span
    )
    ticks = chart.tracks[0].tick_epochs_jyear
    root = ET.fromstring(charts.render_tracks(chart))
    texts = [t.text for t in root.iter(f"{SVG}text") if t.text]
    labels = [float(t) for t in texts if t.replace(".", "", 1).isdigit()]
    assert len(labels) >= 2, texts
    for value in labels:
        assert np.min(np.abs(ticks - value)) <= 0.05, (value, ticks)


def test_bad_arguments(picked):
    a = astrometry(picked)
    with pytest.raises(ValueError):
        charts.sky_tracks(*a, catalogue_epoch_jyear=2016.0, start_jyear=2100, stop_jyear=2000)
    many = [np.repeat(x, 5) for x in a]
    with pytest.raises(ValueError):
        charts.sky_tracks(*many, catalogue_epoch_jyear=2016.0, start_jyear=2016, stop_jyear=2100)
    with pytest.raises(ValueError):
        charts.render_tracks(
            charts.sky_tracks(
                *a[:1] and [x[:1] for x in a],
                catalogue_epoch_jyear=2016.0,
                start_jyear=2016.0,
                stop_jyear=2100.0,
                boundaries=False,
            ),
            image_format="gif",
        )
