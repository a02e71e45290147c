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
    finally:
        if proc is not None:
            proc.terminate()
            proc.wait(timeout=30)
    return 0


if __name__ == "__main__":
    sys.exit(main())
