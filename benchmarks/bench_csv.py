"""Benchmark: CSV in and out against JSON columns, and the client's batching, in process.

Run from the repository root::

    PYTHONPATH=. python -m benchmarks.bench_csv [--stars 100000] [--repeat 3]

All in one process on the same random stars, POST /v1/propagation to one epoch through the
Flask application (no network):

1. baseline: JSON columns in, JSON columns out (the fast form bulk clients should use);
2. CSV body in, JSON columns out;
3. JSON columns in, CSV out (``Accept: text/csv``);
4. CSV in, CSV out (what ``skydrift propagate`` does);
5. the Python client's JSON path with batches of a tenth of the stars (10 requests, answers
   joined), through the in-process transport.

Printed: seconds (best of ``--repeat``) and the ratio to the baseline (greater = slower).
"""

from __future__ import annotations

import argparse
import csv
import io
import time

import numpy as np
import orjson

from service.api import create_app
from service.config import Settings
from service.local import local_client


def make_columns(n: int, seed: int = 20261202) -> dict[str, list]:
    rng = np.random.default_rng(seed)
    return {
        "id": [f"S{k}" for k in range(n)],
        "ra_deg": rng.uniform(0.0, 360.0, n).tolist(),
        "dec_deg": np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n))).tolist(),
        "parallax_mas": rng.uniform(0.5, 50.0, n).tolist(),
        "pm_ra_cosdec_mas_yr": rng.normal(0.0, 30.0, n).tolist(),
        "pm_dec_mas_yr": rng.normal(0.0, 30.0, n).tolist(),
        "radial_velocity_km_s": rng.normal(0.0, 30.0, n).tolist(),
    }


def as_csv(cols: dict[str, list]) -> bytes:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(list(cols))
    writer.writerows(zip(*cols.values(), strict=True))
    return buf.getvalue().encode()


def best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stars", type=int, default=100_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv if argv is not None else [])
    n = args.stars
    settings = Settings(max_stars=max(n, 1), max_results=max(n, 1), max_body_bytes=1 << 31)
    app = create_app({"SKYDRIFT_SETTINGS": settings})
    http = app.test_client()
    cols = make_columns(n)
    body = orjson.dumps({"stars": cols, "catalogue_epoch": "J2016.0", "target_epochs": ["J2026"]})
    text = as_csv(cols)
    query = "/v1/propagation?catalogue_epoch=J2016.0&target_epochs=J2026"

    def post(url, data, content_type, accept):
        r = http.post(url, data=data, content_type=content_type, headers={"Accept": accept})
        assert r.status_code == 200, r.get_data(as_text=True)[:300]

    cases = {
        "JSON in, JSON out (baseline)": lambda: post(
            "/v1/propagation", body, "application/json", "application/json"
        ),
        "CSV in, JSON out": lambda: post(query, text, "text/csv", "application/json"),
        "JSON in, CSV out": lambda: post("/v1/propagation", body, "application/json", "text/csv"),
        "CSV in, CSV out": lambda: post(query, text, "text/csv", "text/csv"),
    }
    client = local_client(app, batch_size=max(1, n // 10))
    cases["client, 10 batches joined"] = lambda: client.propagate(
        cols, catalogue_epoch="J2016.0", target_epochs=["J2026"]
    )
    print(f"{n} stars, one target epoch, best of {args.repeat}")
    base = None
    for name, fn in cases.items():
        t = best(fn, args.repeat)
        base = base or t
        print(f"  {name:32} {t:8.3f} s   x{t / base:5.2f}")


if __name__ == "__main__":
    import sys

    main(sys.argv[1:])
