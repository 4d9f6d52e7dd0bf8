"""Activate a policy file on the dueroute replica this runs beside (``PUT /v1/policy``).

With the compose file's shared Redis a ``PUT /v1/policy`` through the balancer reaches every
replica by itself (each checks the sha256 and activates it). This script is for replicas
without a shared store: run it inside each one, e.g.::

    for i in 1 2 3; do
        docker compose -f docker/compose.yaml exec --index $i router \\
            python /app/docker/push_policy.py /path/in/the/container/new.onnx
    done

Each replica validates the file itself and swaps atomically; the first refusal stops the
rollout with the replica's list of problems. ``--dry-run`` only validates. The token comes from
``DUEROUTE_ADMIN_TOKEN`` and the port from ``DUEROUTE_PORT`` (the replica's own settings).
Exit status: 0 activated (or valid, with --dry-run), 1 refused or unreachable, 2 bad usage.
"""

from __future__ import annotations

import json
import os
import sys
import urllib.error
import urllib.request
from pathlib import Path


def push(path: Path, *, port: str, token: str, dry_run: bool) -> tuple[int, str]:
    """PUT the file; return (HTTP status or 0 when unreachable, one-line message)."""
    url = f"http://127.0.0.1:{port}/v1/policy" + ("?dry_run=true" if dry_run else "")
    req = urllib.request.Request(
        url,
        data=path.read_bytes(),
        method="PUT",
        headers={"Authorization": f"Bearer {token}", "Content-Type": "application/octet-stream"},
    )
    try:
        with urllib.request.urlopen(req, timeout=60) as resp:
            body = json.loads(resp.read() or b"{}")
            return resp.status, f"policy {body.get('sha256')} " + (
                "is valid (dry run)" if dry_run else "is active"
            )
    except urllib.error.HTTPError as exc:
        try:
            detail = json.loads(exc.read() or b"{}").get("detail")
        except ValueError:
            detail = None
        return exc.code, f"refused with HTTP {exc.code}: {json.dumps(detail)}"
    except (urllib.error.URLError, OSError) as exc:
        return 0, f"no service at {url}: {exc}"


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    dry_run = "--dry-run" in args
    files = [a for a in args if a != "--dry-run"]
    if len(files) != 1:
        print("usage: push_policy.py [--dry-run] POLICY.onnx", file=sys.stderr)
        return 2
    path = Path(files[0])
    if not path.is_file():
        print(f"push_policy: error: no such file: {path}", file=sys.stderr)
        return 2
    token = os.environ.get("DUEROUTE_ADMIN_TOKEN", "")
    if not token:
        print(
            "push_policy: error: DUEROUTE_ADMIN_TOKEN is not set; the service refuses policy "
            "changes without it",
            file=sys.stderr,
        )
        return 2
    status, message = push(
        path, port=os.environ.get("DUEROUTE_PORT", "8000"), token=token, dry_run=dry_run
    )
    print(f"push_policy: {message}", file=sys.stdout if status == 200 else sys.stderr)
    return 0 if status == 200 else 1


if __name__ == "__main__":
    sys.exit(main())
