"""One star, observed place, one request: requests per second under gunicorn.

POST /v1/observed against the bare constant endpoint of the same application and against a
naive endpoint that uses astropy's AltAz transform per request, load from wrk on loopback.

Run: ``PYTHONPATH=. python -m benchmarks.bench_observed_http [rounds]`` (needs ``wrk``).

Observed places are measured twice: with the same instant in every request (the
star-independent work of that instant is then cached, as for a client that asks for many
stars at one instant) and with a new instant in every request (one second later each
time, as telescope software asking for the current place does). The constant endpoint, both
observed forms and the naive endpoint (a new instant in every request: astropy caches
nothing per instant either way) are measured in ``rounds`` alternating rounds (default 5)
and each keeps its median (``bench_http.rates_in_rounds``), so that load from other
processes on a shared machine falls on all alike. One gunicorn worker
(``bench_http.ONE_STAR_WORKERS``: the figure measures the cost of a request, not where
wrk's keep-alive connections land).
"""

from __future__ import annotations

import sys

import requests

from benchmarks import bench_http, server

SITE = {"latitude_deg": 38.4127, "longitude_deg": -7.6543, "height_m": 1460.0}
ATMOSPHERE = {"pressure_hpa": 850.0, "temperature_c": 6.0, "relative_humidity": 0.55,
              "wavelength_um": 0.55}  # fmt: skip
ONE_STAR = {
    "stars": [bench_http.STAR],
    "catalogue_epoch": 2016.0,
    "instants": ["2026-12-02T22:30:00Z"],
    "site": SITE,
    "atmosphere": ATMOSPHERE,
}


#: The same request with a new instant in every request (bench_http.wrk_rps).
NEW_INSTANT_STAR = dict(ONE_STAR, instants=[bench_http.NEW_INSTANT])


def main(argv: list[str] | None = None) -> dict:
    argv = sys.argv[1:] if argv is None else argv
    rounds = int(argv[0]) if argv and argv[0].isdigit() else 5
    url, proc = _start()
    try:
        for path in ("/bench/constant", "/v1/observed", "/bench/naive_altaz"):
            requests.post(url + path, json=ONE_STAR, timeout=30).raise_for_status()
        paths = {
            "constant": "/bench/constant",
            "observed": "/v1/observed",
            "observed_new_instant": ("/v1/observed", NEW_INSTANT_STAR),
            "naive_altaz": ("/bench/naive_altaz", NEW_INSTANT_STAR),
        }
        rates = bench_http.rates_in_rounds(url, paths, ONE_STAR, rounds)
    finally:
        bench_http.stop(proc)
    print(
        f"one worker, median of {rounds} alternating rounds of {bench_http.DURATION_S} s; "
        "rounds: "
        + "; ".join(
            f"{k} " + ", ".join(f"{v:.0f}" for v in rates["rounds_raw"][k])
            for k in ("constant", "observed", "observed_new_instant", "naive_altaz")
        )
    )
    print(f"constant endpoint      {rates['constant']:9.0f} requests/s")
    print(f"POST /v1/observed      {rates['observed']:9.0f} requests/s  (the same instant)")
    print(
        f"POST /v1/observed      {rates['observed_new_instant']:9.0f} requests/s  "
        "(a new instant in every request)"
    )
    print(f"naive astropy AltAz    {rates['naive_altaz']:9.0f} requests/s  (a new instant)")
    print(f"  observed / constant: {rates['observed'] / rates['constant']:.2f} (target 0.60)")
    print(
        "  observed, new instant / constant: "
        f"{rates['observed_new_instant'] / rates['constant']:.2f}"
    )
    print(f"  observed / naive:    {rates['observed'] / rates['naive_altaz']:.1f}x (target 10x)")
    print(
        "  observed, new instant / naive: "
        f"{rates['observed_new_instant'] / rates['naive_altaz']:.1f}x"
    )
    return rates


def _start():
    """gunicorn with the project's configuration, serving the app with the naive endpoint."""
    return server.start(
        "benchmarks.observed_http_app:app",
        wait_s=30.0,
        SKYDRIFT_WORKERS=bench_http.ONE_STAR_WORKERS,
    )


if __name__ == "__main__":
    main()
