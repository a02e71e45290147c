"""One star per request, in process: cost of the request path against GET /health.

Telescope-control software asks for one star just before a slew, so the per-request cost of
the one-star path matters more than throughput. This measures it in one process with
Flask's test client (no sockets, no gunicorn), requests of the three kinds interleaved so
that load from other processes on a shared machine falls on all alike:

- ``GET /health``: the baseline, the cost of the stack (Flask, flask-smorest, the request
  hooks for metrics and access control, JSON) for a constant answer;
- ``POST /v1/propagation``: one star, one target epoch;
- ``POST /v1/observed``: one star, one instant, a site and an atmosphere;
- the same with a new instant (one second later) in every request, so that nothing
  computed per instant can be reused from an earlier request.

It prints milliseconds per request (median of the rounds, wall clock and CPU time of this
process, ``time.process_time``, and the best round's CPU time) and the ratio of the health
cost to each endpoint's cost, which is the fraction of the health request rate that
endpoint can reach (the HTTP benchmarks, ``bench_http`` and ``bench_observed_http``,
measure the same under gunicorn).

Run: ``PYTHONPATH=. python -m benchmarks.bench_one_star [rounds] [requests per round]``.
"""

from __future__ import annotations

import statistics
import sys
import time

import orjson

STAR = {
    "id": "KRC 0017",
    "ra_deg": 55.52754788,
    "dec_deg": 19.626362948,
    "parallax_mas": 161.3,
    "pm_ra_cosdec_mas_yr": -2871.2,
    "pm_dec_mas_yr": 2602.5,
    "radial_velocity_km_s": -41.7,
}
PROPAGATION = {"stars": [STAR], "catalogue_epoch": 2016.0, "target_epochs": [2026.92]}
OBSERVED = {
    "stars": [STAR],
    "catalogue_epoch": 2016.0,
    "instants": ["2026-12-02T22:30:00Z"],
    "site": {"latitude_deg": 38.4127, "longitude_deg": -7.6543, "height_m": 1460.0},
    "atmosphere": {
        "pressure_hpa": 850.0,
        "temperature_c": 6.0,
        "relative_humidity": 0.55,
        "wavelength_um": 0.55,
    },
}


def _requests(client):
    headers = {"Content-Type": "application/json"}
    prop = orjson.dumps(PROPAGATION)
    obs = orjson.dumps(OBSERVED)

    def health():
        return client.get("/health")

    def propagation():
        return client.post("/v1/propagation", data=prop, headers=headers)

    def observed():
        return client.post("/v1/observed", data=obs, headers=headers)

    seconds = iter(range(10**9))

    def observed_new_instant():
        # A different instant (one second later) every request: nothing cached per instant.
        k = next(seconds)
        body = dict(
            OBSERVED,
            instants=[
                f"2026-12-0{1 + k // 86400 % 9}T"
                f"{k // 3600 % 24:02d}:{k // 60 % 60:02d}:{k % 60:02d}Z"
            ],
        )
        return client.post("/v1/observed", data=orjson.dumps(body), headers=headers)

    return {
        "health": health,
        "propagation": propagation,
        "observed": observed,
        "observed_new_instant": observed_new_instant,
    }


def measure(rounds: int = 15, per_round: int = 200) -> dict:
    """Milliseconds per request (wall, CPU) of each kind over interleaved rounds: the median
    and the best round (the best is the steadier figure on a loaded machine)."""
    from service.api import create_app

    app = create_app()
    client = app.test_client()
    kinds = _requests(client)
    for call in kinds.values():  # warm up: first-request caches, imports
        for _ in range(20):
            assert call().status_code == 200
    wall = {k: [] for k in kinds}
    cpu = {k: [] for k in kinds}
    for r in range(rounds):
        order = list(kinds) if r % 2 == 0 else list(kinds)[::-1]
        for k in order:
            call = kinds[k]
            w0, c0 = time.perf_counter(), time.process_time()
            for _ in range(per_round):
                call()
            wall[k].append((time.perf_counter() - w0) / per_round * 1e3)
            cpu[k].append((time.process_time() - c0) / per_round * 1e3)
    return {
        k: {
            "wall_ms": statistics.median(wall[k]),
            "cpu_ms": statistics.median(cpu[k]),
            "best_cpu_ms": min(cpu[k]),
        }
        for k in kinds
    }


def main(argv: list[str] | None = None) -> dict:
    argv = sys.argv[1:] if argv is None else argv
    rounds = int(argv[0]) if argv else 15
    per_round = int(argv[1]) if len(argv) > 1 else 200
    res = measure(rounds, per_round)
    base = res["health"]
    print(
        f"One star per request, Flask test client, median of {rounds} interleaved rounds of "
        f"{per_round} requests:"
    )
    for k, v in res.items():
        print(
            f"  {k:20s} {v['wall_ms']:7.3f} ms wall ({base['wall_ms'] / v['wall_ms']:.2f} of "
            f"health)  {v['cpu_ms']:7.3f} ms CPU ({base['cpu_ms'] / v['cpu_ms']:.2f})  "
            f"best {v['best_cpu_ms']:7.3f} ms CPU ({base['best_cpu_ms'] / v['best_cpu_ms']:.2f})"
        )
    print("  target: each endpoint >= 0.60 of the health request rate")
    return res


if __name__ == "__main__":
    main()
