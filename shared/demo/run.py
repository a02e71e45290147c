"""The invented demo scenario, end to end: start the service, send the demo catalogue.

Kestrel Ridge Observatory (fictional) wants tonight's places of the 30 stars of the
Kestrel Ridge Catalogue (fictional, epoch J2016.0). This script starts Skydrift under
gunicorn on a free loopback port (or uses SKYDRIFT_URL if set), sends the catalogue, and
prints a table.

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

import requests

HERE = pathlib.Path(__file__).resolve().parent
ROOT = HERE.parents[1]


CONSTELLATION_FIELDS = (
    "id",
    "ra_deg",
    "dec_deg",
    "parallax_mas",
    "pm_ra_cosdec_mas_yr",
    "pm_dec_mas_yr",
    "radial_velocity_km_s",
)


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
    for _ in range(100):
        try:
            if requests.get(url + "/ready", timeout=1).ok:
                return url, proc
        except requests.ConnectionError:
            pass
        time.sleep(0.1)
    proc.terminate()
    raise SystemExit("the service did not become ready")


def main() -> int:
    catalogue = json.loads((HERE / "catalogue.json").read_text())
    url, proc = start_service()
    try:
        body = {
            "stars": catalogue["stars"],
            "catalogue_epoch": catalogue["catalogue_epoch"],
            "target_epochs": ["now"],
        }
        r = requests.post(url + "/v1/propagation", json=body, timeout=30)
        r.raise_for_status()
        answer = r.json()
        epoch = answer["epochs"][0]
        print(
            f"{catalogue['name']}: {answer['star_count']} stars moved from "
            f"{catalogue['catalogue_epoch']} to {epoch['iso_utc']} "
            f"(J{epoch['julian_epoch_tdb']:.4f} TDB)\n"
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

        # Constellations now, distance from the boundary, and crossings in the next 5,000 yr.
        body = {
            "stars": catalogue["stars"],
            "catalogue_epoch": catalogue["catalogue_epoch"],
            "epoch": "now",
        }
        body["stars"] = [{k: s.get(k) for k in CONSTELLATION_FIELDS} for s in body["stars"]]
        r = requests.post(url + "/v1/constellations/margins", json=body, timeout=30)
        r.raise_for_status()
        print(f"\n{'star':9} {'constellation':22} {'margin_arcsec':>13}  across")
        for res in r.json()["stars"]:
            print(f"{res['id']:9} {res['name']:22} {res['margin_arcsec']:13.1f}  {res['across']}")
        body = dict(body, start="now", end=5000.0 + 2026.0)
        body.pop("epoch")
        r = requests.post(url + "/v1/constellations/crossings", json=body, timeout=60)
        r.raise_for_status()
        for res in r.json()["stars"]:
            for c in res["crossings"]:
                print(
                    f"{res['id']} crosses from {c['from_constellation']} into "
                    f"{c['to_constellation']} in J{c['epoch']['julian_epoch_tdb']:.2f}"
                )
    finally:
        if proc is not None:
            proc.terminate()
            proc.wait(timeout=30)
    return 0


if __name__ == "__main__":
    sys.exit(main())
