"""HTTP throughput and large-batch cost, as ratios measured in one run.

1. One star per request under the project's gunicorn configuration, load from wrk (a
   separate process) on loopback: POST /v1/propagation against a bare constant endpoint in
   the same application, and against a naive astropy SkyCoord endpoint.
2. 1,000,000 stars in one request, as columnar JSON and as an Arrow IPC stream (Arrow in and
   out): end-to-end time (to the answer's last byte, plus the client's decode) against the
   core's compute time for the same stars, and the peak memory of the worker.
3. gunicorn worker classes (the choice in deploy/gunicorn.conf.py): one-star requests and
   mid-size batches (1,000 stars) under each class, same number of workers, as ratios to
   the sync class.

Run: .venv/bin/python -m benchmarks.run http   (needs `wrk`, from Debian's packages)
     .venv/bin/python -m benchmarks.bench_http batch     (part 2 only)
     .venv/bin/python -m benchmarks.bench_http workers   (part 3 only)
"""

from __future__ import annotations

import os
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
STAR = {
    "id": "KRC 0017",
    "ra_deg": 55.52754788,
    "dec_deg": 19.626362948,
    "parallax_mas": 161.3,
    "pm_ra_cosdec_mas_yr": -2871.2,
    "pm_dec_mas_yr": 2602.5,
    "radial_velocity_km_s": -41.7,
}
ONE_STAR = {"stars": [STAR], "catalogue_epoch": 2016.0, "target_epochs": [2026.92]}
DURATION_S = int(os.environ.get("SKYDRIFT_BENCH_SECONDS", "8"))


def start(workers: int | None = None, worker_class: str | None = None, threads: int = 1):
    """gunicorn (deploy/gunicorn.conf.py) serving the service plus the baseline endpoints."""
    settings = {}
    if workers:
        settings["SKYDRIFT_WORKERS"] = workers
    if worker_class:
        settings["SKYDRIFT_WORKER_CLASS"] = worker_class
        settings["SKYDRIFT_THREADS"] = threads
    return server.start("benchmarks.http_app:app", wait_s=20.0, **settings)


stop = server.stop


def _lua_string(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


#: Placeholder for the instant in a request body whose instant changes with every request.
NEW_INSTANT = "@INSTANT@"


def wrk_rps(url: str, path: str, body: dict, connections: int = 8) -> float:
    """Requests/s of wrk (one thread, ``connections`` keep-alive connections) POSTing ``body``.

    Where the body holds the string :data:`NEW_INSTANT`, each request carries a new instant
    instead, one second after the previous one ("2026-12-02T00:00:01Z", ...), as telescope
    software asking for the current place would: nothing computed for an earlier instant
    can be reused.
    """
    lua = tempfile.NamedTemporaryFile("w", suffix=".lua", delete=False)
    payload = orjson.dumps(body).decode()
    script = 'wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\n'
    if NEW_INSTANT in payload:
        head, tail = payload.split(NEW_INSTANT, 1)
        script += (
            f"local head, tail = {_lua_string(head)}, {_lua_string(tail)}\n"
            "local k = 0\n"
            "request = function()\n"
            "  k = k + 1\n"
            "  local s = k % 86400\n"
            '  local t = string.format("2026-12-02T%02d:%02d:%02dZ", math.floor(s / 3600),\n'
            "    math.floor(s / 60) % 60, s % 60)\n"
            "  return wrk.format(nil, nil, nil, head .. t .. tail)\n"
            "end\n"
        )
    else:
        script += f"wrk.body = {_lua_string(payload)}\n"
    lua.write(script)
    lua.close()
    out = subprocess.run(
        ["wrk", "-t1", f"-c{connections}", f"-d{DURATION_S}s", "-s", lua.name, url + path],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    os.unlink(lua.name)
    errors = re.search(r"Non-2xx or 3xx responses: (\d+)", out)
    if errors:
        raise RuntimeError(f"{path}: {errors.group(1)} failed responses")
    return float(re.search(r"Requests/sec:\s+([\d.]+)", out).group(1))


def worker_peak_rss_mb(master_pid: int) -> float:
    """Largest peak resident memory (VmHWM) of the master's workers, MB."""
    return max(server.worker_memory_mb(master_pid, "VmHWM").values(), default=0.0)


#: Gunicorn workers for the one-star rates. One, so that the figure measures the cost of a
#: request and not where wrk's keep-alive connections happen to land: with two workers, all
#: eight connections were held by one worker in half of the trials (the other worker idle,
#: throughput halved), which made single runs differ by 2x.
ONE_STAR_WORKERS = 1


def rates_in_rounds(url: str, paths: dict, body: dict, rounds: int) -> dict:
    """Requests/s of each endpoint in ``paths`` (name -> path, or (path, body) to send
    another body), measured in turn ``rounds`` times in alternating order; the median of
    each, and every round's figure under ``rounds_raw``. Load from other processes on a
    shared machine falls on all alike."""
    samples: dict = {name: [] for name in paths}
    order = list(paths)
    for k in range(rounds):
        for name in order if k % 2 == 0 else order[::-1]:
            path, one_body = paths[name] if isinstance(paths[name], tuple) else (paths[name], body)
            samples[name].append(wrk_rps(url, path, one_body))
    rates = {name: float(np.median(v)) for name, v in samples.items()}
    rates["rounds_raw"] = samples
    return rates


def one_star_rates(rounds: int = 5) -> dict:
    """Requests/s, one star per request: the constant, propagation and naive endpoints of
    one server with :data:`ONE_STAR_WORKERS` worker (:func:`rates_in_rounds`)."""
    url, proc = start(workers=ONE_STAR_WORKERS)
    paths = {
        "constant": "/bench/constant",
        "propagation": "/v1/propagation",
        "naive": "/bench/naive",
    }
    try:
        for path in paths.values():
            requests.post(url + path, json=ONE_STAR, timeout=10).raise_for_status()
        return rates_in_rounds(url, paths, ONE_STAR, rounds)
    finally:
        stop(proc)


ARROW_MIMETYPE = "application/vnd.apache.arrow.stream"


def million_star_columns(n: int) -> dict:
    rng = np.random.default_rng(7)
    return {
        "ra_deg": rng.uniform(0, 360, n),
        "dec_deg": np.degrees(np.arcsin(rng.uniform(-1, 1, n))),
        "parallax_mas": rng.uniform(0.1, 50, n),
        "pm_ra_cosdec_mas_yr": rng.normal(0, 30, n),
        "pm_dec_mas_yr": rng.normal(0, 30, n),
        "radial_velocity_km_s": rng.normal(0, 40, n),
    }


def arrow_stream(cols: dict) -> bytes:
    """The columns as an Arrow IPC stream, written by pyarrow (what a bulk client sends)."""
    import pyarrow as pa

    table = pa.table(cols)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def _timed_post(url: str, data: bytes, headers: dict, decode) -> dict:
    """POST; seconds to the answer's last byte, then the client's decode of the answer.

    The answer is read in one call (``raw.read``), as a bulk client should: requests'
    ``content`` reads 10 kB at a time, which adds about 0.3 s per 100 MB on this machine,
    to either route.
    """
    t0 = time.perf_counter()
    r = requests.post(url, data=data, headers=headers, timeout=600, stream=True)
    r.raise_for_status()
    content = r.raw.read(decode_content=True)
    last_byte_s = time.perf_counter() - t0
    rows = decode(content)
    total_s = time.perf_counter() - t0
    return {
        "last_byte_s": last_byte_s,
        "decode_s": total_s - last_byte_s,
        "http_s": total_s,
        "rows": rows,
        "answer_mb": len(content) / 1e6,
        "answer": content,
    }


def _decode_json(content: bytes) -> int:
    # As the project's Python client decodes a large answer (orjson, collector paused).
    from service.client import _loads

    return _loads(content)["star_count"]


def json_codec_floor(cols: dict, json_body: bytes, answer: bytes) -> dict:
    """Seconds of JSON text work alone in the JSON route: the server's parse of the body
    (as the service reads it: service/api/jsoncolumns.py), its writing of the answer
    (orjson, numpy columns) and the client's parse of the answer (as :func:`_decode_json`).
    No HTTP, no validation, no astronomy: a lower bound on that route's end-to-end time,
    measured in this process."""
    from service.api import jsoncolumns

    t0 = time.perf_counter()
    jsoncolumns.loads(json_body, frozenset(cols))
    parse_s = time.perf_counter() - t0
    answer_obj = orjson.loads(answer)
    columns = answer_obj["columns"]
    for name in cols:  # the answer's numbers as the server holds them: numpy columns
        columns[name] = np.asarray(columns[name], dtype=float)
    t0 = time.perf_counter()
    orjson.dumps(answer_obj, option=orjson.OPT_SERIALIZE_NUMPY)
    write_s = time.perf_counter() - t0
    del answer_obj, columns
    t0 = time.perf_counter()
    _decode_json(answer)
    decode_s = time.perf_counter() - t0
    return {
        "parse_s": parse_s,
        "write_s": write_s,
        "decode_s": decode_s,
        "total_s": parse_s + write_s + decode_s,
    }


def _decode_arrow(content: bytes) -> int:
    import pyarrow as pa

    with pa.ipc.open_stream(pa.py_buffer(content)) as reader:
        return reader.read_all().num_rows


def million_star_batch(n: int = 1_000_000, repeats: int = 3) -> dict:
    """1,000,000 stars in one request, as columnar JSON and as an Arrow IPC stream (Arrow in
    and out), against the core's compute time for the same stars.

    Each route gets its own server (the same start: one worker of deploy/gunicorn.conf.py),
    so that each peak worker memory is its own route's. The end-to-end time includes the
    client's decode of the answer (orjson.loads; pyarrow's stream reader). The core and each
    route run ``repeats`` times; the run with the median time is kept (the machine may be
    shared).
    """
    from service.core.propagation import propagate

    cols = million_star_columns(n)
    core_runs = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        propagate(*(cols[k][:, None] for k in cols), 2016.0, np.array([2026.92]))
        core_runs.append(time.perf_counter() - t0)
    core_s = float(np.median(core_runs))
    json_body = orjson.dumps(
        {
            "stars": cols,
            "catalogue_epoch": 2016.0,
            "target_epochs": [2026.92],
            "layout": "columns",
        },
        option=orjson.OPT_SERIALIZE_NUMPY,
    )
    arrow_body = arrow_stream(cols)
    routes = {
        "json": (
            "/v1/propagation",
            json_body,
            {"Content-Type": "application/json"},
            _decode_json,
        ),
        "arrow": (
            "/v1/propagation?catalogue_epoch=2016.0&target_epochs=2026.92",
            arrow_body,
            {"Content-Type": ARROW_MIMETYPE, "Accept": ARROW_MIMETYPE},
            _decode_arrow,
        ),
    }
    out: dict = {"core_s": core_s, "n": n, "repeats": repeats}
    for name, (path, body, headers, decode) in routes.items():
        url, proc = start(workers=1)
        try:
            runs = []
            for _ in range(repeats):
                runs.append(_timed_post(url + path, body, headers, decode))
                answer = runs[-1].pop("answer")  # only the last one is kept
            assert all(r.pop("rows") == n for r in runs)
            figures = sorted(runs, key=lambda r: r["http_s"])[len(runs) // 2]
            figures["peak_mb"] = worker_peak_rss_mb(proc.pid)
        finally:
            stop(proc)
        figures["body_mb"] = len(body) / 1e6
        out[name] = figures
        if name == "json":
            json_answer = answer  # for the codec floor below
        del answer
    out["json_floor"] = json_codec_floor(cols, json_body, json_answer)
    return out


def print_million_star_batch(big: dict) -> None:
    core = big["core_s"]
    print(
        f"HTTP, {big['n']:,} stars in one request (one worker), median of {big['repeats']}; "
        f"core alone {core:.3f} s; load average {os.getloadavg()[0]:.2f}:"
    )
    for name, label in (("json", "columnar JSON"), ("arrow", "Arrow IPC stream in and out")):
        r = big[name]
        print(
            f"  {label}: body {r['body_mb']:.0f} MB, answer {r['answer_mb']:.0f} MB; "
            f"last byte {r['last_byte_s']:.2f} s + client decode {r['decode_s']:.2f} s "
            f"= {r['http_s']:.2f} s end to end"
        )
        print(
            f"    end-to-end / core: {r['http_s'] / core:.1f}x  "
            f"(target <= 8x; Arrow: near 3x); peak worker memory {r['peak_mb']:.0f} MB  "
            "(target < 2048 MB)"
        )
    f = big.get("json_floor")
    if f:
        print(
            f"  JSON text work alone (no HTTP, no checks, no astronomy): server parse "
            f"{f['parse_s']:.2f} s + server write {f['write_s']:.2f} s + client decode "
            f"{f['decode_s']:.2f} s = {f['total_s']:.2f} s = {f['total_s'] / core:.1f}x the core"
        )


#: Worker classes compared: (label, worker class, threads per worker).
WORKER_CLASSES = (("sync", "sync", 1), ("gthread x2", "gthread", 2), ("gthread x4", "gthread", 4))


def batch_body(n: int = 1000) -> dict:
    rng = np.random.default_rng(11)
    cols = {
        "ra_deg": rng.uniform(0, 360, n).round(6).tolist(),
        "dec_deg": rng.uniform(-80, 80, n).round(6).tolist(),
        "parallax_mas": rng.uniform(0.5, 50, n).round(3).tolist(),
        "pm_ra_cosdec_mas_yr": rng.normal(0, 30, n).round(3).tolist(),
        "pm_dec_mas_yr": rng.normal(0, 30, n).round(3).tolist(),
    }
    return {"stars": cols, "catalogue_epoch": 2016.0, "target_epochs": [2026.92]}


def worker_class_rates(workers: int = 2, rounds: int = 3) -> dict:
    """Requests/s per worker class: one star, and 1,000-star batches, wrk -c8.

    The classes are measured in alternating order over several rounds and the median is
    kept, so that load from other processes on a shared machine falls on both alike.
    """
    batch = batch_body()
    samples = {label: {"one_star": [], "batch_1000": []} for label, _, _ in WORKER_CLASSES}
    for k in range(rounds):
        order = WORKER_CLASSES if k % 2 == 0 else WORKER_CLASSES[::-1]
        for label, cls, threads in order:
            url, proc = start(workers=workers, worker_class=cls, threads=threads)
            try:
                for body in (ONE_STAR, batch):
                    requests.post(url + "/v1/propagation", json=body, timeout=30).raise_for_status()
                samples[label]["one_star"].append(wrk_rps(url, "/v1/propagation", ONE_STAR))
                samples[label]["batch_1000"].append(wrk_rps(url, "/v1/propagation", batch))
            finally:
                stop(proc)
    return {
        label: {key: float(np.median(v)) for key, v in per.items()}
        for label, per in samples.items()
    }


def print_worker_classes() -> None:
    rates = worker_class_rates()
    base = rates["sync"]
    print(
        "gunicorn worker classes, 2 workers, POST /v1/propagation, wrk -t1 -c8, "
        "median of 3 alternating rounds:"
    )
    for label, r in rates.items():
        print(
            f"  {label:11s} one star {r['one_star']:7.0f} requests/s "
            f"({r['one_star'] / base['one_star']:.2f} of sync); 1,000-star batches "
            f"{r['batch_1000']:6.1f} requests/s ({r['batch_1000'] / base['batch_1000']:.2f})"
        )


def main() -> None:
    if not shutil.which("wrk"):
        print("bench_http: wrk not found (apt-get install wrk); skipped")
        return
    if sys.argv[1:] == ["workers"]:
        print_worker_classes()
        return
    if sys.argv[1:] == ["batch"]:
        print_million_star_batch(million_star_batch())
        return
    rates = one_star_rates()
    print(
        f"HTTP, one star per request, gunicorn (deploy/gunicorn.conf.py, {ONE_STAR_WORKERS} "
        f"worker), wrk -t1 -c8, median of 5 alternating rounds of {DURATION_S} s; load average "
        f"{os.getloadavg()[0]:.2f}:"
    )
    for k in ("constant", "propagation", "naive"):
        rounds = ", ".join(f"{v:.0f}" for v in rates["rounds_raw"][k])
        print(f"  {k:12s} {rates[k]:9.0f} requests/s  (rounds: {rounds})")
    print(
        f"  propagation / constant endpoint: {rates['propagation'] / rates['constant']:.2f}"
        "  (target >= 0.60)"
    )
    print(
        f"  propagation / naive astropy endpoint: {rates['propagation'] / rates['naive']:.1f}x"
        "  (target >= 5x)"
    )
    print_million_star_batch(million_star_batch())
    print_worker_classes()


if __name__ == "__main__":
    main()
