"""Container health check: exit 0 if GET /health answers 200 (the image has no curl).

Reads the port from SKYDRIFT_BIND (as gunicorn does) and asks on loopback.
"""

import os
import sys
import urllib.request


def main() -> int:
    bind = os.environ.get("SKYDRIFT_BIND", "0.0.0.0:8000").split(",")[0].strip()
    host, _, port = bind.rpartition(":")
    host = host.strip("[]")
    if host in ("", "0.0.0.0", "::"):
        host = "127.0.0.1"
    if ":" in host:
        host = f"[{host}]"
    try:
        with urllib.request.urlopen(f"http://{host}:{port}/health", timeout=4) as resp:
            return 0 if resp.status == 200 else 1
    except OSError as exc:
        print(f"health check failed: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
