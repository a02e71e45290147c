#!/usr/bin/env bash
# Build the image from deploy/Dockerfile and run deploy/smoke.sh against the running container.
#
#   deploy/container-test.sh            (what `make container-test` runs)
#
# Uses the Docker daemon of DOCKER_HOST (or the default socket) when one answers. Where none
# runs and this is root with Debian's dockerd installed, a private daemon is started with its
# own socket and data root under a temporary folder, touching no host networking, and stopped
# again at the end. Where the base image (BASE_IMAGE, default python:3.12-slim) can be neither
# found nor pulled (no registry reachable) and debootstrap is installed, a Debian base image
# with python3 is made with debootstrap (cached under build/container/).
#
# Extra certificate authorities trusted by the host (/usr/local/share/ca-certificates/*.crt,
# e.g. an egress proxy that re-signs HTTPS) are copied into the ignored deploy/certs/ folder
# for the pip step of the build only, and removed again afterwards.
#
# Environment: BASE_IMAGE, IMAGE (default skydrift:test), PORT (default 18080).
set -euo pipefail
cd "$(dirname "$0")/.."
ROOT=$PWD

BASE_IMAGE=${BASE_IMAGE:-python:3.12-slim}
IMAGE=${IMAGE:-skydrift:test}
PORT=${PORT:-18080}
NAME=skydrift-container-test-$$
CACHE=$ROOT/build/container
WORK=$(mktemp -d /tmp/skydrift-container.XXXXXX)
DAEMON_PID=""

log() { printf '[container-test] %s\n' "$*" >&2; }

cleanup() {
    set +e
    docker rm -f "$NAME" >/dev/null 2>&1
    find "$ROOT/deploy/certs" -name '*.crt' -delete 2>/dev/null
    if [ -n "$DAEMON_PID" ]; then
        log "stopping the private daemon (pid $DAEMON_PID)"
        kill "$DAEMON_PID" 2>/dev/null
        for _ in $(seq 1 100); do kill -0 "$DAEMON_PID" 2>/dev/null || break; sleep 0.2; done
        # Lazily unmount anything the daemon left under its data root, deepest first.
        grep -o " $WORK/[^ ]*" /proc/self/mounts | sort -r | while read -r m; do
            umount -l "$m" 2>/dev/null
        done
    fi
    rm -rf "$WORK"
}
trap cleanup EXIT

# 1. A daemon.
if ! docker info >/dev/null 2>&1; then
    if [ "$(id -u)" != 0 ] || ! command -v dockerd >/dev/null; then
        log "no Docker daemon answers and none can be started here (needs root and dockerd)"
        exit 2
    fi
    log "starting a private Docker daemon under $WORK"
    mkdir -p "$WORK/data" "$WORK/exec"
    dockerd --data-root "$WORK/data" --exec-root "$WORK/exec" --pidfile "$WORK/pid" \
        -H "unix://$WORK/docker.sock" --storage-driver=overlay2 \
        --iptables=false --ip6tables=false --ip-forward=false --ip-masq=false --bridge=none \
        >"$WORK/dockerd.log" 2>&1 &
    DAEMON_PID=$!
    export DOCKER_HOST="unix://$WORK/docker.sock"
    export DOCKER_BUILDKIT=0
    for _ in $(seq 1 150); do docker info >/dev/null 2>&1 && break; sleep 0.2; done
    docker info >/dev/null 2>&1 || { tail -20 "$WORK/dockerd.log" >&2; exit 2; }
fi

# 2. A base image.
if ! docker image inspect "$BASE_IMAGE" >/dev/null 2>&1 \
    && ! docker pull -q "$BASE_IMAGE" >/dev/null 2>&1; then
    command -v debootstrap >/dev/null || { log "cannot get $BASE_IMAGE"; exit 2; }
    BASE_IMAGE=localbase:bookworm
    if ! docker image inspect "$BASE_IMAGE" >/dev/null 2>&1; then
        mkdir -p "$CACHE"
        if [ ! -s "$CACHE/localbase-bookworm.tar" ]; then
            mirror=$(grep -h '^URIs:' /etc/apt/sources.list.d/*.sources 2>/dev/null \
                | awk '{print $2}' | grep -v security | head -1)
            mirror=${mirror:-http://deb.debian.org/debian}
            log "making a Debian bookworm base image with debootstrap from $mirror"
            debootstrap --variant=minbase --include=python3,python3-venv,ca-certificates \
                bookworm "$WORK/rootfs" "$mirror" >"$WORK/debootstrap.log" 2>&1 \
                || { tail -20 "$WORK/debootstrap.log" >&2; exit 2; }
            rm -rf "$WORK/rootfs/usr/share/doc" "$WORK/rootfs/usr/share/man" \
                "$WORK/rootfs/usr/share/info" "$WORK/rootfs/var/lib/apt/lists/"* \
                "$WORK/rootfs/var/cache/apt/"*.bin
            tar --numeric-owner -C "$WORK/rootfs" -cf "$CACHE/localbase-bookworm.tar.part" .
            mv "$CACHE/localbase-bookworm.tar.part" "$CACHE/localbase-bookworm.tar"
            rm -rf "$WORK/rootfs"
        fi
        docker import -c 'ENV LANG=C.UTF-8' "$CACHE/localbase-bookworm.tar" "$BASE_IMAGE" \
            >/dev/null
    fi
fi
log "base image: $BASE_IMAGE"

# 3. The image.
for crt in /usr/local/share/ca-certificates/*.crt; do
    [ -e "$crt" ] && cp "$crt" "$ROOT/deploy/certs/"
done
log "building $IMAGE from deploy/Dockerfile"
docker build --network=host --build-arg "BASE_IMAGE=$BASE_IMAGE" -f deploy/Dockerfile \
    -t "$IMAGE" . >"$WORK/build.log" 2>&1 || { tail -40 "$WORK/build.log" >&2; exit 1; }
find "$ROOT/deploy/certs" -name '*.crt' -delete
size=$(docker image inspect -f '{{.Size}}' "$IMAGE")
log "image $IMAGE: $((size / 1000000)) MB"

# 4. Run it as a cluster would (read-only root, writable /tmp only, no capabilities) and smoke.
log "running $IMAGE on 127.0.0.1:$PORT"
docker run -d --name "$NAME" --network=host --read-only --tmpfs /tmp:rw,nosuid,nodev,size=64m \
    --cap-drop=ALL --security-opt=no-new-privileges \
    -e "SKYDRIFT_BIND=127.0.0.1:$PORT" -e SKYDRIFT_WORKERS=2 "$IMAGE" >/dev/null
SMOKE_URL="http://127.0.0.1:$PORT" SMOKE_CONTAINER="$NAME" deploy/smoke.sh || {
    # A private daemon's own word on the container's output (Docker gives the copy of a
    # container's output a bounded time after it exits, and says when it ran out).
    if [ -f "$WORK/dockerd.log" ]; then
        grep -i -E "copier|truncat|log" "$WORK/dockerd.log" | grep -i -E "warn|error" | tail -5 >&2 || true
    fi
    exit 1
}
log "container test passed"
