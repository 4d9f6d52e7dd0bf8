"""Container health check: exit 0 when the service's GET /readyz answers 200, else 1.

The slim Python image has no curl, so the image's ``HEALTHCHECK`` runs this with the standard
library only. The port comes from ``DUEROUTE_PORT`` (default 8000), the same variable
``dueroute serve`` reads.
"""

from __future__ import annotations

import os
import sys
import urllib.error
import urllib.request


def main() -> int:
    port = os.environ.get("DUEROUTE_PORT", "8000")
    url = f"http://127.0.0.1:{port}/readyz"
    try:
        with urllib.request.urlopen(url, timeout=3) as resp:
            ok = resp.status == 200
    except (urllib.error.URLError, OSError, ValueError) as exc:
        print(f"not ready: {url}: {exc}", file=sys.stderr)
        return 1
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
