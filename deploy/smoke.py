"""Smoke checks against a running Skydrift service (the Python half of deploy/smoke.sh).

    python deploy/smoke.py URL [--term-pid PID | --term-container NAME]

1. Waits for ``/ready`` to answer 200.
2. Exercises every operation listed in ``/openapi.json`` once, with the example the document
   gives (so operations added later are covered without editing this file), and ``/docs``;
   each must answer 2xx, echo X-Request-ID and carry the security headers.
3. Reads ``/metrics`` and checks every exercised operation was counted.
4. With ``--term-pid`` / ``--term-container``: sends a batch large enough to take a while,
   delivers SIGTERM to the server while that request is in flight, and checks the request
   still completes correctly (graceful shutdown).
5. With ``--check-log FILE`` (alone): the server's log is JSON and shows the slow batch
   answered 200 after the SIGTERM was handled.

Standard library only, so it runs on any machine with Python 3.11+. SMOKE_TOKEN, if set, is
sent as a bearer token. Exits non-zero on the first failure.
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import random
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request

HTTP_METHODS = ("get", "post", "put", "patch", "delete")
#: Stars in the slow batch (one epoch): the server needs a good fraction of a second for
#: them after the last byte arrives, and SIGTERM is sent the moment the last byte is sent.
SLOW_BATCH_STARS = int(os.environ.get("SMOKE_SLOW_BATCH_STARS", "150000"))


class SmokeFailure(Exception):
    pass


def check(condition: bool, message: str) -> None:
    if not condition:
        raise SmokeFailure(message)


def call(base: str, method: str, path: str, body=None, request_id: str | None = None):
    """One request -> (status, headers (lower-case names), body bytes)."""
    headers = {"Accept": "application/json"}
    token = os.environ.get("SMOKE_TOKEN")
    if token:
        headers["Authorization"] = f"Bearer {token}"
    if request_id:
        headers["X-Request-ID"] = request_id
    data = None
    if body is not None:
        data = json.dumps(body).encode()
        headers["Content-Type"] = "application/json"
    req = urllib.request.Request(base + path, data=data, method=method.upper(), headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=60) as resp:
            return resp.status, {k.lower(): v for k, v in resp.headers.items()}, resp.read()
    except urllib.error.HTTPError as exc:
        return exc.code, {k.lower(): v for k, v in exc.headers.items()}, exc.read()


def server_gone(pid: int | None) -> bool:
    """True if the local server process has exited (gone, or a zombie not yet reaped)."""
    if not pid:
        return False
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] in ("Z", "X")
    except OSError:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        except OSError:
            return False
        return False


def wait_ready(base: str, pid: int | None = None) -> None:
    seconds = float(os.environ.get("SMOKE_READY_S", "90"))
    deadline = time.monotonic() + seconds
    last = "no answer"
    while time.monotonic() < deadline:
        check(not server_gone(pid), "the server exited before it was ready")
        try:
            status, _, body = call(base, "get", "/ready")
            if status == 200:
                print(f"ok   ready: {json.loads(body)['status']}")
                return
            last = f"{status} {body[:200]!r}"
        except OSError as exc:
            last = str(exc)
        time.sleep(0.25)
    raise SmokeFailure(f"/ready did not answer 200 within {seconds:.0f} s (last: {last})")


def example_of(obj: dict):
    """The example of a media type or parameter object (example, or first of examples)."""
    if "example" in obj:
        return obj["example"]
    examples = obj.get("examples") or {}
    if examples:
        first = next(iter(examples.values()))
        return first.get("value") if isinstance(first, dict) else first
    schema = obj.get("schema") or {}
    if "example" in schema:
        return schema["example"]
    if schema.get("examples"):
        return schema["examples"][0]
    if "default" in schema:
        return schema["default"]
    return None


def operations(doc: dict):
    """(method, path template, operation) for every operation of the document."""
    for path, item in doc.get("paths", {}).items():
        for method in HTTP_METHODS:
            if method in item:
                shared = item.get("parameters", [])
                yield method, path, item[method], shared


def build_request(path: str, op: dict, shared: list):
    """Fill path and required query parameters and the body from the document's examples."""
    query = {}
    for param in shared + op.get("parameters", []):
        where, name = param.get("in"), param.get("name")
        value = example_of(param)
        if value is None:
            check(not param.get("required"), f"{path}: no example for parameter {name!r}")
            continue
        if where == "path":
            path = path.replace("{" + name + "}", urllib.parse.quote(str(value), safe=""))
        elif where == "query":
            query[name] = value
    check("{" not in path, f"{path}: path parameter without an example")
    if query:
        path += "?" + urllib.parse.urlencode(query, doseq=True)
    body = None
    request_body = op.get("requestBody")
    if request_body:
        content = request_body.get("content", {})
        media = content.get("application/json") or next(iter(content.values()), {})
        body = example_of(media)
        check(
            body is not None or not request_body.get("required"),
            f"{path}: the request body has no example in the OpenAPI document",
        )
    return path, body


def exercise_every_operation(base: str) -> list[tuple[str, str]]:
    status, _, raw = call(base, "get", "/openapi.json")
    check(status == 200, f"/openapi.json answered {status}")
    doc = json.loads(raw)
    done = []
    for n, (method, template, op, shared) in enumerate(operations(doc)):
        path, body = build_request(template, op, shared)
        request_id = f"smoke-{n}-{random.getrandbits(32):08x}"
        started = time.perf_counter()
        status, headers, raw = call(base, method, path, body, request_id)
        took_ms = (time.perf_counter() - started) * 1000
        check(
            200 <= status < 300,
            f"{method.upper()} {path} answered {status}: {raw[:300]!r}",
        )
        check(
            headers.get("x-request-id") == request_id,
            f"{method.upper()} {path}: X-Request-ID not echoed",
        )
        check(
            headers.get("x-content-type-options") == "nosniff"
            and "content-security-policy" in headers,
            f"{method.upper()} {path}: security headers missing",
        )
        if headers.get("content-type", "").startswith("application/json"):
            json.loads(raw)
        print(f"ok   {method.upper():5s} {path} -> {status} ({took_ms:.0f} ms)")
        done.append((method.upper(), template))
    check(len(done) >= 3, f"only {len(done)} operations in /openapi.json")
    status, headers, _ = call(base, "get", "/docs")
    check(status == 200 and headers.get("content-type", "").startswith("text/html"), "/docs")
    print("ok   GET   /docs (reference page)")
    return done


def check_metrics(base: str, done: list[tuple[str, str]]) -> None:
    status, headers, raw = call(base, "get", "/metrics")
    check(status == 200, f"/metrics answered {status}")
    check(headers.get("content-type", "").startswith("text/plain"), "/metrics is not text")
    text = raw.decode()
    counted = {}
    pattern = re.compile(r"^skydrift_http_requests_total\{(.*)\} ([0-9.e+]+)$", re.M)
    for labels, value in pattern.findall(text):
        d = dict(re.findall(r'(\w+)="([^"]*)"', labels))
        key = (d.get("method"), d.get("endpoint"))
        counted[key] = counted.get(key, 0.0) + float(value)
    for method, template in done:
        flask_path = re.sub(r"\{(\w+)\}", r"<\1>", template)
        check(
            counted.get((method, template), 0) + counted.get((method, flask_path), 0) >= 1,
            f"/metrics did not count {method} {template}",
        )
    check("skydrift_earth_orientation_table_age_days" in text, "no table age in /metrics")
    print(f"ok   /metrics counts all {len(done)} operations")


def slow_batch_body(n: int) -> bytes:
    rnd = random.Random(6)
    cols = {
        "ra_deg": [round(rnd.uniform(0, 360), 6) for _ in range(n)],
        "dec_deg": [round(rnd.uniform(-89, 89), 6) for _ in range(n)],
        "parallax_mas": [round(rnd.uniform(0.5, 50), 3) for _ in range(n)],
        "pm_ra_cosdec_mas_yr": [round(rnd.gauss(0, 30), 3) for _ in range(n)],
        "pm_dec_mas_yr": [round(rnd.gauss(0, 30), 3) for _ in range(n)],
        "radial_velocity_km_s": [round(rnd.gauss(0, 40), 2) for _ in range(n)],
    }
    body = {
        "stars": cols,
        "catalogue_epoch": "J2016.0",
        "target_epochs": ["J2030.0"],
        "layout": "columns",
    }
    return json.dumps(body).encode()


def terminate(pid: int | None, container: str | None) -> None:
    if pid:
        os.kill(pid, signal.SIGTERM)
    else:
        subprocess.run(
            ["docker", "kill", "--signal=TERM", container], check=True, capture_output=True
        )


def sigterm_during_slow_batch(base: str, pid: int | None, container: str | None) -> None:
    body = slow_batch_body(SLOW_BATCH_STARS)
    url = urllib.parse.urlsplit(base)
    conn = http.client.HTTPConnection(url.hostname, url.port, timeout=120)
    headers = {"Content-Type": "application/json", "X-Request-ID": "smoke-slow-batch"}
    if os.environ.get("SMOKE_TOKEN"):
        headers["Authorization"] = f"Bearer {os.environ['SMOKE_TOKEN']}"
    started = time.perf_counter()
    conn.request("POST", "/v1/propagation", body=body, headers=headers)
    # The whole body is sent: the server is reading or computing it now.
    terminate(pid, container)
    signalled = time.perf_counter()
    resp = conn.getresponse()
    raw = resp.read()
    answered = time.perf_counter()
    check(
        resp.status == 200,
        f"the batch in flight at SIGTERM answered {resp.status}: {raw[:300]!r}",
    )
    answer = json.loads(raw)
    check(answer["star_count"] == SLOW_BATCH_STARS, "the batch answer is incomplete")
    check(
        len(answer["columns"]["ra_deg"][0]) == SLOW_BATCH_STARS,
        "the batch answer lacks stars",
    )
    print(
        f"ok   SIGTERM {signalled - started:.2f} s into a {SLOW_BATCH_STARS}-star batch; the "
        f"batch completed {answered - signalled:.2f} s later ({len(raw) / 1e6:.0f} MB)"
    )


def check_log(path: str) -> None:
    """The server's log: JSON lines; the slow batch answered 200 after the SIGTERM arrived."""
    term_at = batch_at = None
    for line in open(path, encoding="utf-8", errors="replace"):
        line = line.strip()
        if not line.startswith("{"):
            continue
        entry = json.loads(line)
        if "Handling signal: term" in entry.get("message", "") and term_at is None:
            term_at = entry["time"]
        if entry.get("type") == "access" and entry.get("request_id") == "smoke-slow-batch":
            check(entry["status"] == 200, f"slow batch logged with status {entry['status']}")
            batch_at = entry["time"]
    check(term_at is not None, "the log does not show the SIGTERM")
    check(batch_at is not None, "no JSON access line with the slow batch's request id")
    check(batch_at >= term_at, f"the batch finished ({batch_at}) before SIGTERM ({term_at})")
    print(f"ok   log is JSON; SIGTERM at {term_at}, slow batch answered 200 at {batch_at}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("url", nargs="?")
    parser.add_argument("--check-log", help="check the server's log file, then stop")
    parser.add_argument("--term-pid", type=int)
    parser.add_argument("--term-container")
    parser.add_argument("--wait-only", action="store_true", help="only wait for readiness")
    args = parser.parse_args(argv)
    if args.check_log:
        try:
            check_log(args.check_log)
        except (SmokeFailure, OSError, ValueError, KeyError) as exc:
            print(f"FAIL {type(exc).__name__}: {exc}", file=sys.stderr)
            return 1
        return 0
    base = args.url.rstrip("/")
    try:
        wait_ready(base, args.term_pid)
        if args.wait_only:
            return 0
        done = exercise_every_operation(base)
        check_metrics(base, done)
        if args.term_pid or args.term_container:
            sigterm_during_slow_batch(base, args.term_pid, args.term_container)
    except (SmokeFailure, OSError, ValueError, KeyError) as exc:
        print(f"FAIL {type(exc).__name__}: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
