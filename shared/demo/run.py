"""The invented demo scenario, end to end through the Python client.

Kestrel Ridge Observatory (fictional) plans tonight's observations of the 30 stars of the
Kestrel Ridge Catalogue (fictional, epoch J2016.0). This script starts Skydrift under
gunicorn on a free loopback port (or uses SKYDRIFT_URL if set) and, through
``service.client.Client``:

1. moves the catalogue to tonight (2026-12-02 22:00 UTC) and prints the places;
2. gives the observed places at the observatory with the safety flags (when the service
   has the observed-place endpoint);
3. gives each star's constellation tonight with its margin to the boundary, and every
   boundary crossing in the next 5,000 years: KRC 0017 leaves Taurus for Aries in about
   3,600 years (when the service has the constellation endpoints);
4. gives the stars' velocities (U, V, W relative to the local standard of rest);
5. writes the charts: the track of KRC 0017 across the boundary, and the whole catalogue at
   J2016.0 and J12016.0 side by side (SVG and PNG, in build/demo/ or SKYDRIFT_DEMO_OUT).

Run: make demo
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import socket
import subprocess
import sys
import time

HERE = pathlib.Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT))

import requests  # noqa: E402

from service.client import Client, SkydriftError  # noqa: E402

#: Tonight in the scenario: the observing night at Kestrel Ridge, UTC.
TONIGHT = "2026-12-02T22:00:00Z"
#: The whole of that night, dusk to dawn, as an instant range: start, stop, count (hourly).
NIGHT = ("2026-12-02T18:00:00Z", "2026-12-03T06:00:00Z", 13)
#: The star whose future boundary crossing the scenario follows.
CROSSING_STAR = "KRC 0017"
SITE = "kestrel-ridge"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_service() -> tuple[str, subprocess.Popen | None]:
    url = os.environ.get("SKYDRIFT_URL")
    if url:
        return url.rstrip("/"), None
    port = _free_port()
    env = dict(os.environ, SKYDRIFT_BIND=f"127.0.0.1:{port}", SKYDRIFT_WORKERS="1")
    env["SKYDRIFT_ACCESS_LOG"] = "/dev/null"
    env["PYTHONPATH"] = str(ROOT)
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "gunicorn",
            "-c",
            str(ROOT / "deploy" / "gunicorn.conf.py"),
            "service.wsgi:app",
        ],
        cwd=ROOT,
        env=env,
        stderr=subprocess.DEVNULL,
    )
    url = f"http://127.0.0.1:{port}"
    for _ in range(300):
        try:
            if requests.get(url + "/ready", timeout=1).ok:
                return url, proc
        except requests.ConnectionError:
            pass
        time.sleep(0.1)
    proc.terminate()
    raise SystemExit("the service did not become ready")


ASTROMETRY = (
    "id",
    "ra_deg",
    "dec_deg",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)


def heading(text: str) -> None:
    print(f"\n== {text}\n")


def propagate_tonight(sky: Client, catalogue: dict) -> dict:
    answer = sky.propagate(
        catalogue["stars"], catalogue_epoch=catalogue["catalogue_epoch"], target_epochs=[TONIGHT]
    )
    epoch = answer["epochs"][0]
    heading(
        f"{catalogue['name']}: {answer['star_count']} stars moved from "
        f"{catalogue['catalogue_epoch']} to {epoch['iso_utc']} "
        f"(J{epoch['julian_epoch_tdb']:.4f} TDB)"
    )
    head = f"{'star':9} {'ra_deg':>12} {'dec_deg':>12} {'moved_arcsec':>12}  flags"
    print(head)
    print("-" * len(head))
    for star, res in zip(catalogue["stars"], answer["stars"], strict=True):
        now = res["at_epochs"][0]
        d_ra = (now["ra_deg"] - star["ra_deg"] + 180) % 360 - 180
        cosd = math.cos(math.radians(star["dec_deg"]))
        moved = math.hypot(d_ra * cosd, now["dec_deg"] - star["dec_deg"]) * 3600
        print(
            f"{res['id']:9} {now['ra_deg']:12.7f} {now['dec_deg']:12.7f} "
            f"{moved:12.3f}  {', '.join(res['flags'])}"
        )
    for w in answer["warnings"]:
        print(f"warning: {w['id']}: {w['message']}")
    return answer


def observed_places(sky: Client, catalogue: dict, paths: dict) -> None:
    heading(f"Observed places at Kestrel Ridge Observatory (fictional), {TONIGHT}")
    if "/v1/observed" not in paths:
        print("(this service has no observed-place endpoint yet; skipped)")
        return
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in catalogue["stars"]]
    answer = sky.observed(
        stars,
        catalogue_epoch=catalogue["catalogue_epoch"],
        instants=[TONIGHT],
        site=SITE,
        include_rates=True,
    )
    print(answer.get("advisory", ""))
    limits = answer.get("limits") or {}
    print(
        f"Flags below: horizon limit {_num(limits.get('horizon_limit_deg'), '{:.1f}')} deg, "
        f"Sun avoidance {_num(limits.get('sun_avoidance_deg'), '{:.1f}')} deg. "
        f"{limits.get('note', '')}"
    )
    sun = answer["instants"][0].get("sun") or {}
    print(f"Sun altitude {_num(sun.get('altitude_deg'), '{:.1f}')} deg")
    print(
        "Tracking rates (how fast azimuth, altitude and, for an equatorial mount, hour angle "
        "change): arcsec per second.\n"
    )
    head = (
        f"{'star':9} {'azimuth_deg':>11} {'altitude_deg':>12} {'az_rate':>8} {'alt_rate':>8} "
        f"{'ha_rate':>8} {'airmass':>8} {'sun_sep_deg':>11}  flags"
    )
    print(head)
    print("-" * len(head))
    for res in answer["stars"]:
        at = res["at_instants"][0]
        print(
            f"{res['id']:9} {_num(at.get('azimuth_deg')):>11} {_num(at.get('altitude_deg')):>12} "
            f"{_num(at.get('azimuth_rate_arcsec_s'), '{:.2f}'):>8} "
            f"{_num(at.get('altitude_rate_arcsec_s'), '{:.2f}'):>8} "
            f"{_num(at.get('hour_angle_rate_arcsec_s'), '{:.3f}'):>8} "
            f"{_num(at.get('airmass')):>8} {_num(at.get('sun_separation_deg'), '{:.1f}'):>11}  "
            f"{', '.join(at.get('flags', []))}"
        )


def night_track(sky: Client, catalogue: dict, paths: dict) -> None:
    """One star through the night at the demo site: a range of instants, every hour."""
    start, stop, _ = NIGHT
    heading(f"{CROSSING_STAR} through the night at Kestrel Ridge: {start} to {stop}, hourly")
    if "/v1/observed" not in paths:
        print("(this service has no observed-place endpoint yet; skipped)")
        return
    star = next(s for s in catalogue["stars"] if s["id"] == CROSSING_STAR)
    answer = sky.observed(
        [{k: star.get(k) for k in ASTROMETRY}],
        catalogue_epoch=catalogue["catalogue_epoch"],
        instant_range=NIGHT,
        site=SITE,
    )
    head = (
        f"{'utc':17} {'azimuth_deg':>11} {'altitude_deg':>12} {'airmass':>8} "
        f"{'sun_alt_deg':>11}  flags"
    )
    print(head)
    print("-" * len(head))
    for instant, at in zip(answer["instants"], answer["stars"][0]["at_instants"], strict=True):
        print(
            f"{instant['epoch']['iso_utc'][:16]:17} {_num(at.get('azimuth_deg')):>11} "
            f"{_num(at.get('altitude_deg')):>12} {_num(at.get('airmass')):>8} "
            f"{_num(instant['sun'].get('altitude_deg'), '{:.1f}'):>11}  "
            f"{', '.join(at.get('flags', []))}"
        )


def _num(x, fmt="{:.3f}") -> str:
    return "-" if x is None else fmt.format(x)


def constellations(sky: Client, catalogue: dict, paths: dict) -> None:
    heading("Constellations tonight, margins to the boundary, and a future crossing")
    if "/v1/constellations/margins" not in paths:
        print("(this service has no constellation endpoints yet; skipped)")
        return
    stars = [{k: s.get(k) for k in ASTROMETRY} for s in catalogue["stars"]]
    answer = sky.constellations(
        stars, catalogue_epoch=catalogue["catalogue_epoch"], epoch=TONIGHT, margins=True
    )
    head = f"{'star':9} {'in':4} {'margin_deg':>10} {'across':6}  flags"
    print(head)
    print("-" * len(head))
    for res in answer["stars"]:
        margin = res.get("margin_arcsec")
        print(
            f"{res['id']:9} {res['constellation']:4} "
            f"{_num(None if margin is None else margin / 3600.0, '{:.3f}'):>10} "
            f"{res.get('across') or '-':6}  {', '.join(res.get('flags', []))}"
        )
    # Every boundary crossing in the next 5,000 years (KRC 0017 leaves Taurus for Aries).
    found = sky.constellation_crossings(
        stars, catalogue_epoch=catalogue["catalogue_epoch"], start=TONIGHT, end="J7026.0"
    )
    print()
    for res in found["stars"]:
        for c in res["crossings"]:
            e = c["epoch"]
            print(
                f"{res['id']} crosses from {c['from_constellation']} into "
                f"{c['to_constellation']} at J{e['julian_epoch_tdb']:.1f} ({e['iso_utc']})"
            )


def velocities(sky: Client, catalogue: dict, paths: dict) -> None:
    heading("Velocities relative to the local standard of rest")
    if "/v1/velocity" not in paths:
        print("(this service has no velocity endpoint yet; skipped)")
        return
    answer = sky.velocity(
        catalogue["stars"], catalogue_epoch=catalogue["catalogue_epoch"], relative_to_lsr=True
    )
    head = f"{'star':9} {'v_t_km_s':>9} {'u_lsr':>8} {'v_lsr':>8} {'w_lsr':>8} {'closest_pc':>10}"
    print(head + "  flags")
    print("-" * (len(head) + 7))
    for res in answer["stars"]:
        lsr = " ".join(
            f"{_num(res.get(k), '{:.1f}'):>8}" for k in ("u_lsr_km_s", "v_lsr_km_s", "w_lsr_km_s")
        )
        print(
            f"{res['id']:9} {_num(res['transverse_velocity_km_s'], '{:.1f}'):>9} {lsr} "
            f"{_num(res.get('closest_approach_distance_pc'), '{:.2f}'):>10}  "
            f"{', '.join(res['flags'])}"
        )


def charts(sky: Client, catalogue: dict, out: pathlib.Path) -> None:
    heading(f"Charts in {out}")
    out.mkdir(parents=True, exist_ok=True)
    star = next(s for s in catalogue["stars"] if s["id"] == CROSSING_STAR)
    for fmt in ("svg", "png"):
        track = sky.chart_track(
            [star],
            catalogue_epoch=catalogue["catalogue_epoch"],
            start="J2016.0",
            stop="J8016.0",
            ticks=6,
            image_format=fmt,
            title=f"{CROSSING_STAR} (fictional), J2016 to J8016",
        )
        (out / f"track_{CROSSING_STAR.replace(' ', '_').lower()}.{fmt}").write_bytes(track)
        field = sky.chart_field(
            catalogue["stars"],
            catalogue_epoch=catalogue["catalogue_epoch"],
            epochs=("J2016.0", "J12016.0"),
            image_format=fmt,
            title=f"{catalogue['name']}: now and in 10,000 years",
        )
        (out / f"field.{fmt}").write_bytes(field)
    for p in sorted(out.iterdir()):
        print(f"wrote {p.relative_to(ROOT) if p.is_relative_to(ROOT) else p}")


def main() -> int:
    catalogue = json.loads((HERE / "catalogue.json").read_text())
    out = pathlib.Path(os.environ.get("SKYDRIFT_DEMO_OUT", ROOT / "build" / "demo"))
    url, proc = start_service()
    try:
        with Client(url) as sky:
            paths = sky.openapi()["paths"]
            propagate_tonight(sky, catalogue)
            observed_places(sky, catalogue, paths)
            night_track(sky, catalogue, paths)
            constellations(sky, catalogue, paths)
            velocities(sky, catalogue, paths)
            charts(sky, catalogue, out)
    except SkydriftError as exc:
        print(f"the service refused a demo request: {exc}", file=sys.stderr)
        return 1
    finally:
        if proc is not None:
            proc.terminate()
            proc.wait(timeout=30)
    return 0


if __name__ == "__main__":
    sys.exit(main())
