"""Load and soak against the service under its production gunicorn configuration, on loopback.

A mix of three request types runs at once, each from its own wrk process (one Lua script
per type, so each reports its own latency distribution):

- ``pointing``: one star's observed place at the demo site (POST /v1/observed), the request a
  telescope makes before a slew;
- ``lookup``: one star's constellation at an epoch (POST /v1/constellations/lookup);
- ``batch``: 10,000 stars moved to one epoch, columnar JSON (POST /v1/propagation).

Load mode (default) runs the mix closed-loop (each connection sends its next request when
the last is answered) and reports, per type, requests, errors, throughput and the 50th, 95th
and 99th percentile latencies: the measured capacity. Soak mode first measures capacity,
then runs the same mix at a fraction of it (each request type on a fixed schedule, paced
with wrk's delay() hook and LuaJIT's clock) for a long time, sampling every worker's
resident memory, and reports errors, latencies and memory growth after warm-up. Worker
recycling (max_requests) is turned off for the soak so that growth, if any, shows.

Pools (``--pools``): ``split`` (default) serves the mix from two gunicorn masters with the
project's configuration, as the README recommends where pointing latency matters: an
interactive pool for pointing and lookups (one worker per CPU, at most 1,000 stars per
request) and a bulk pool for batches (one worker, ``SKYDRIFT_WORKER_NICE=10``, so the kernel
runs pointing requests first when both want the CPU). ``one`` serves everything from a
single pool (the default deployment).

Run (needs `wrk`, from Debian's packages)::

    .venv/bin/python -m benchmarks.load                      # capacity, 20 s
    .venv/bin/python -m benchmarks.load --soak 600           # 10-minute soak at 70%
    .venv/bin/python -m benchmarks.load --soak 120 --fraction 0.7 --json out.json
"""

from __future__ import annotations

import argparse
import json
import pathlib
import re
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np
import orjson
import requests

from benchmarks import server

ROOT = pathlib.Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "shared" / "demo" / "examples"

#: Connections per request type in the mix (pointing requests dominate, as at a telescope).
CONNECTIONS = {"pointing": 4, "lookup": 2, "batch": 1}

#: Pools for ``--pools split``: name -> (request types served, environment of its master).
SPLIT_POOLS = {
    "interactive": (("pointing", "lookup"), {"SKYDRIFT_MAX_STARS": 1000}),
    "bulk": (("batch",), {"SKYDRIFT_WORKERS": 1, "SKYDRIFT_WORKER_NICE": 10}),
}
BATCH_STARS = 10_000


def _example(name: str) -> dict:
    return json.loads((EXAMPLES / name).read_text())


def bodies() -> dict[str, tuple[str, bytes]]:
    """(path, body) per request type, from the demo scenario's example requests."""
    pointing = _example("observed_request.json")
    pointing["stars"] = pointing["stars"][:1]
    pointing["instants"] = pointing["instants"][:1]
    lookup = _example("constellations_lookup_request.json")
    lookup["stars"] = lookup["stars"][:1]
    rng = np.random.default_rng(20261202)
    n = BATCH_STARS
    batch = {
        "stars": {
            "ra_deg": np.round(rng.uniform(0.0, 360.0, n), 9),
            "dec_deg": np.round(np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n))), 9),
            "parallax_mas": np.round(rng.uniform(0.1, 50.0, n), 4),
            "pm_ra_cosdec_mas_yr": np.round(rng.normal(0.0, 30.0, n), 4),
            "pm_dec_mas_yr": np.round(rng.normal(0.0, 30.0, n), 4),
            "radial_velocity_km_s": np.round(rng.normal(0.0, 40.0, n), 2),
        },
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["J2026.92"],
        "layout": "columns",
    }
    return {
        "pointing": ("/v1/observed", orjson.dumps(pointing)),
        "lookup": ("/v1/constellations/lookup", orjson.dumps(lookup)),
        "batch": (
            "/v1/propagation",
            orjson.dumps(batch, option=orjson.OPT_SERIALIZE_NUMPY),
        ),
    }


# ------------------------------------------------------------------------------ server


def worker_rss_mb(master_pid: int) -> dict[int, float]:
    """Resident memory (VmRSS) of each worker process, MB."""
    return server.worker_memory_mb(master_pid, "VmRSS")


# ------------------------------------------------------------------------------ wrk

LUA = """
wrk.method = "POST"
wrk.headers["Content-Type"] = "application/json"
local f = io.open("{body}", "rb")
wrk.body = f:read("*a")
f:close()
-- Pacing (soak): one request every interval_ms for this wrk process as a whole, on a
-- schedule shared by its connections (each call books the next free slot; a schedule that
-- has fallen behind restarts from now, so no burst follows a slow answer). 0: closed loop.
local interval_ms = {interval_ms}
local ffi = require("ffi")
ffi.cdef[[
typedef struct {{ long tv_sec; long tv_nsec; }} skydrift_timespec;
int clock_gettime(int clk_id, skydrift_timespec *tp);
]]
local ts = ffi.new("skydrift_timespec")
local function now_ms()
  ffi.C.clock_gettime(1, ts)  -- CLOCK_MONOTONIC
  return tonumber(ts.tv_sec) * 1000 + tonumber(ts.tv_nsec) / 1e6
end
local next_at = nil
function delay()
  if interval_ms <= 0 then
    return 0
  end
  local t = now_ms()
  if next_at == nil or next_at < t then
    next_at = t
  end
  local d = next_at - t
  next_at = next_at + interval_ms
  return d
end
function done(summary, latency, requests)
  local e = summary.errors
  io.write(string.format(
    '@@RESULT {{"requests": %d, "duration_us": %d, "connect": %d, "read": %d, "write": %d, '
    .. '"status": %d, "timeout": %d, "p50_us": %d, "p95_us": %d, "p99_us": %d, '
    .. '"max_us": %d, "mean_us": %.1f}}\\n',
    summary.requests, summary.duration, e.connect, e.read, e.write, e.status, e.timeout,
    latency:percentile(50), latency:percentile(95), latency:percentile(99),
    latency.max, latency.mean))
end
"""


def run_mix(
    urls: dict[str, str], seconds: float, interval_ms: dict[str, float] | None = None
) -> dict:
    """Run the three wrk processes at once for ``seconds``; return their results by type.

    ``urls``: the base URL serving each request type. ``interval_ms``: per type, the time
    between requests (paced on a schedule, see LUA); None: closed loop."""
    work = tempfile.mkdtemp(prefix="skydrift-load-")
    procs = {}
    try:
        for kind, (path, body) in bodies().items():
            body_file = pathlib.Path(work, f"{kind}.json")
            body_file.write_bytes(body)
            script = pathlib.Path(work, f"{kind}.lua")
            interval = 0.0 if interval_ms is None else max(0.0, float(interval_ms[kind]))
            script.write_text(LUA.format(body=body_file, interval_ms=repr(interval)))
            procs[kind] = subprocess.Popen(
                [
                    "wrk",
                    "-t1",
                    f"-c{CONNECTIONS[kind]}",
                    f"-d{int(seconds)}s",
                    "--timeout",
                    "60s",
                    "-s",
                    str(script),
                    urls[kind] + path,
                ],
                stdout=subprocess.PIPE,
                stderr=subprocess.STDOUT,
                text=True,
            )
        results = {}
        for kind, proc in procs.items():
            out, _ = proc.communicate(timeout=seconds + 180)
            m = re.search(r"@@RESULT (\{.*\})", out)
            if not m:
                raise RuntimeError(f"wrk ({kind}) gave no result:\n{out}")
            r = json.loads(m.group(1))
            r["errors"] = r["connect"] + r["read"] + r["write"] + r["status"] + r["timeout"]
            r["rps"] = r["requests"] / (r["duration_us"] / 1e6)
            results[kind] = r
        return results
    finally:
        for proc in procs.values():
            if proc.poll() is None:
                proc.kill()
        shutil.rmtree(work, ignore_errors=True)


def print_mix(title: str, results: dict) -> None:
    print(title)
    print(
        f"  {'type':9s} {'requests':>9s} {'errors':>7s} {'req/s':>8s} "
        f"{'p50 ms':>8s} {'p95 ms':>8s} {'p99 ms':>8s} {'p99/p50':>8s}"
    )
    for kind, r in results.items():
        print(
            f"  {kind:9s} {r['requests']:9d} {r['errors']:7d} {r['rps']:8.1f} "
            f"{r['p50_us'] / 1e3:8.2f} {r['p95_us'] / 1e3:8.2f} {r['p99_us'] / 1e3:8.2f} "
            f"{r['p99_us'] / max(r['p50_us'], 1):8.2f}"
        )


# ------------------------------------------------------------------------------ modes


def warm_up(urls: dict[str, str]) -> None:
    for kind, (path, body) in bodies().items():
        url = urls[kind]
        for _ in range(3):
            r = requests.post(
                url + path, data=body, headers={"Content-Type": "application/json"}, timeout=120
            )
            r.raise_for_status()


def all_worker_rss_mb(master_pids: list[int]) -> dict[int, float]:
    """:func:`worker_rss_mb` of the workers of every master."""
    out = {}
    for pid in master_pids:
        out.update(worker_rss_mb(pid))
    return out


def soak(urls: dict, master_pids: list, seconds: float, fraction: float, cap: dict) -> dict:
    """Run the mix at ``fraction`` of the measured capacity, sampling worker memory."""
    target = {kind: fraction * r["rps"] for kind, r in cap.items()}
    # Each request type runs on a schedule of one request every 1 / target seconds (its
    # connections share the schedule), whatever the other types do: no calibration needed.
    interval_ms = {kind: 1e3 / target[kind] for kind in cap}
    warm_s = min(60.0, 0.1 * seconds)
    samples = []
    t0 = time.monotonic()
    work = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import json, sys; from benchmarks.load import run_mix; "
            "print('@@MIX ' + json.dumps(run_mix(json.loads(sys.argv[1]), float(sys.argv[2]), "
            "json.loads(sys.argv[3]))))",
            json.dumps(urls),
            str(seconds),
            json.dumps(interval_ms),
        ],
        cwd=ROOT,
        stdout=subprocess.PIPE,
        text=True,
    )
    while work.poll() is None:
        samples.append((time.monotonic() - t0, all_worker_rss_mb(master_pids)))
        time.sleep(5.0)
    out = work.stdout.read()
    work.stdout.close()
    m = re.search(r"@@MIX (\{.*\})", out)
    if not m:
        raise RuntimeError("soak run gave no result:\n" + out)
    results = json.loads(m.group(1))
    after_warm = [s for s in samples if s[0] >= warm_s]
    base, end = after_warm[0][1], after_warm[-1][1]
    growth = {}
    for pid, mb in base.items():
        if pid in end:
            growth[pid] = (end[pid] - mb) / mb
    restarted = sorted(set(base) ^ set(end))
    return {
        "results": results,
        "interval_ms": interval_ms,
        "fraction": fraction,
        "warm_up_s": warm_s,
        "rss_after_warm_up_mb": base,
        "rss_end_mb": end,
        "rss_peak_mb": max(max(s[1].values(), default=0.0) for s in samples),
        "growth": growth,
        "workers_replaced": restarted,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=20.0, help="capacity run length")
    parser.add_argument("--soak", type=float, default=0.0, help="soak length, seconds")
    parser.add_argument("--fraction", type=float, default=0.7, help="soak load / capacity")
    parser.add_argument("--json", help="write the figures to this file as JSON")
    parser.add_argument(
        "--pools",
        choices=("split", "one"),
        default="split",
        help="split: pointing and lookups on an interactive pool, batches on a bulk pool at "
        "lower CPU priority (default); one: everything on one pool",
    )
    args = parser.parse_args(argv)
    if not shutil.which("wrk"):
        print("benchmarks.load: wrk not found (apt-get install wrk)")
        return 1
    base_env = {"SKYDRIFT_MAX_REQUESTS": 0} if args.soak else {}
    pools = SPLIT_POOLS if args.pools == "split" else {"all": (tuple(CONNECTIONS), {})}
    servers = {}
    urls = {}
    report: dict = {"pools": {}}
    try:
        for name, (kinds, env) in pools.items():
            url, proc = server.start(wait_s=60.0, **base_env, **env)
            servers[name] = proc
            urls.update(dict.fromkeys(kinds, url))
        warm_up(urls)
        for name, (kinds, env) in pools.items():
            report["pools"][name] = {
                "serves": list(kinds),
                "environment": env,
                "workers": len(worker_rss_mb(servers[name].pid)),
            }
        pool_text = "; ".join(
            f"{name}: {p['workers']} worker(s) for {', '.join(p['serves'])}"
            + (f" ({', '.join(f'{k}={v}' for k, v in p['environment'].items())})"
               if p["environment"] else "")
            for name, p in report["pools"].items()
        )  # fmt: skip
        cap = run_mix(urls, args.seconds)
        report["capacity"] = cap
        print_mix(
            f"Capacity: closed-loop mix for {args.seconds:g} s, deploy/gunicorn.conf.py, "
            f"connections {CONNECTIONS}; pools: {pool_text}",
            cap,
        )
        if args.soak:
            pids = [p.pid for p in servers.values()]
            s = soak(urls, pids, args.soak, args.fraction, cap)
            report["soak"] = s
            print_mix(
                f"Soak: {args.soak:g} s at {args.fraction:.0%} of capacity "
                f"(one request every, ms: "
                + ", ".join(f"{k} {v:.2f}" for k, v in s["interval_ms"].items())
                + ")",
                s["results"],
            )
            for kind, r in s["results"].items():
                print(f"  {kind}: {r['rps'] / cap[kind]['rps']:.0%} of its capacity rate")
            print(
                f"  worker memory after {s['warm_up_s']:.0f} s warm-up: "
                + ", ".join(f"{v:.0f} MB" for v in s["rss_after_warm_up_mb"].values())
                + "; at the end: "
                + ", ".join(f"{v:.0f} MB" for v in s["rss_end_mb"].values())
                + "; growth: "
                + ", ".join(f"{100 * g:+.1f}%" for g in s["growth"].values())
                + f"; peak {s['rss_peak_mb']:.0f} MB; workers replaced: "
                + (str(s["workers_replaced"]) if s["workers_replaced"] else "none")
            )
    finally:
        for proc in servers.values():
            server.stop(proc)
    if args.json:
        pathlib.Path(args.json).write_text(json.dumps(report, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
