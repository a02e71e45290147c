#!/usr/bin/env bash
# Smoke test of the service as it is deployed. Exits non-zero on any failure.
#
#   deploy/smoke.sh
#       Starts the service exactly as the container does (gunicorn with deploy/gunicorn.conf.py
#       serving service.wsgi:app from the source tree on PYTHONPATH) on a free loopback port,
#       waits for readiness, exercises every operation of /openapi.json once, checks
#       /metrics, then sends SIGTERM during a slow batch request and checks that the request
#       completes and the server exits cleanly.
#
#   SMOKE_URL=http://127.0.0.1:18080 SMOKE_CONTAINER=name deploy/smoke.sh
#       The same against a running container (deploy/container-test.sh), plus: the process
#       runs as a non-root user, the root file system is read-only while /tmp is writable,
#       no compiler is installed, the image's health check passes, and the container exits 0
#       after SIGTERM.
#
# PYTHON (default .venv/bin/python, else python3) runs the checks (deploy/smoke.py, standard
# library only). SMOKE_TOKEN is sent as a bearer token if the service requires one.
set -euo pipefail
cd "$(dirname "$0")/.."

PYTHON=${PYTHON:-.venv/bin/python}
[ -x "$PYTHON" ] || PYTHON=python3
say() { printf '%s\n' "$*"; }
fail() { say "FAIL $*" >&2; exit 1; }

if [ -z "${SMOKE_URL:-}" ]; then
    port=$("$PYTHON" -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')
    log=$(mktemp /tmp/skydrift-smoke.XXXXXX)
    GUNICORN=$(dirname "$PYTHON")/gunicorn
    [ -x "$GUNICORN" ] || GUNICORN=gunicorn
    # The container's ENTRYPOINT, with its environment (PYTHONPATH=source tree, SKYDRIFT_BIND).
    PYTHONPATH=$PWD SKYDRIFT_BIND=127.0.0.1:$port SKYDRIFT_WORKERS=${SKYDRIFT_WORKERS:-2} \
        "$GUNICORN" --config deploy/gunicorn.conf.py service.wsgi:app >"$log" 2>&1 &
    pid=$!
    trap 'kill "$pid" 2>/dev/null || true; rm -f "$log"' EXIT
    say "started gunicorn (pid $pid) on 127.0.0.1:$port"
    if ! "$PYTHON" deploy/smoke.py "http://127.0.0.1:$port" --term-pid "$pid"; then
        tail -30 "$log" >&2
        exit 1
    fi
    code=0
    wait "$pid" || code=$?
    [ "$code" = 0 ] || { tail -30 "$log" >&2; fail "gunicorn exited with $code after SIGTERM"; }
    say "ok   gunicorn exited 0 after SIGTERM"
    "$PYTHON" deploy/smoke.py --check-log "$log" || exit 1
else
    container=${SMOKE_CONTAINER:?set SMOKE_CONTAINER with SMOKE_URL}
    "$PYTHON" deploy/smoke.py "$SMOKE_URL" --wait-only \
        || { docker logs --tail 30 "$container" >&2; exit 1; }
    uid=$(docker exec "$container" id -u)
    [ "$uid" != 0 ] || fail "the service runs as root"
    say "ok   runs as uid $uid"
    [ "$(docker inspect -f '{{.HostConfig.ReadonlyRootfs}}' "$container")" = true ] \
        || fail "the container's root file system is not read-only"
    if docker exec "$container" sh -c 'echo x > /app/probe' 2>/dev/null \
        || docker exec "$container" sh -c 'echo x > /probe' 2>/dev/null; then
        fail "could write to the root file system"
    fi
    docker exec "$container" sh -c 'echo x > /tmp/probe && rm /tmp/probe' \
        || fail "/tmp is not writable"
    say "ok   root file system read-only, /tmp writable"
    if docker exec "$container" sh -c 'command -v gcc || command -v cc || command -v clang' \
        >/dev/null 2>&1; then
        fail "a compiler is installed in the image"
    fi
    say "ok   no compiler in the image"
    docker exec "$container" python /app/deploy/healthcheck.py || fail "health check failed"
    say "ok   image health check passes"
    "$PYTHON" deploy/smoke.py "$SMOKE_URL" --term-container "$container" \
        || { docker logs --tail 30 "$container" >&2; exit 1; }
    code=$(docker wait "$container")
    [ "$code" = 0 ] || { docker logs --tail 30 "$container" >&2; fail "container exited $code"; }
    say "ok   container exited 0 after SIGTERM"
    docker logs "$container" >"${TMPDIR:-/tmp}/skydrift-smoke-$$.log" 2>&1
    # On failure, the log's end: whether the lines written after the batch (the workers'
    # and the master's exit) reached Docker tells a lost line from one never written.
    "$PYTHON" deploy/smoke.py --check-log "${TMPDIR:-/tmp}/skydrift-smoke-$$.log" \
        || { tail -15 "${TMPDIR:-/tmp}/skydrift-smoke-$$.log" >&2
             rm -f "${TMPDIR:-/tmp}/skydrift-smoke-$$.log"; exit 1; }
    rm -f "${TMPDIR:-/tmp}/skydrift-smoke-$$.log"
fi
say "smoke test passed"
