"""Copy the compiled graph files into the shared graph volume, each replaced atomically.

Run once by the compose service ``graph-init`` before the replicas start::

    python /app/docker/publish_graph.py SRC_DIR DST_DIR

Every ``*.npz`` in ``SRC_DIR`` (the graph and its ``.landmarks.npz``) is copied to a temporary
name in ``DST_DIR`` and then renamed over the old file. Replicas that still map the old file keep
reading the old inode (a rename never changes a mapped file under a reader, where an in-place
overwrite would crash them with SIGBUS); replicas started afterwards map the new one.
"""

from __future__ import annotations

import os
import shutil
import sys
from pathlib import Path


def publish(src: Path, dst: Path) -> list[Path]:
    """Copy ``src/*.npz`` into ``dst``; return the published paths (sorted)."""
    files = sorted(src.glob("*.npz"))
    if not files:
        raise SystemExit(f"publish_graph: no .npz graph files in {src}")
    dst.mkdir(parents=True, exist_ok=True)
    out = []
    for f in files:
        target = dst / f.name
        tmp = dst / f".{f.name}.tmp-{os.getpid()}"
        shutil.copyfile(f, tmp)
        os.chmod(tmp, 0o444)  # the replicas mount the volume read-only anyway
        os.replace(tmp, target)
        out.append(target)
    return out


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 2:
        print("usage: publish_graph.py SRC_DIR DST_DIR", file=sys.stderr)
        return 2
    for path in publish(Path(args[0]), Path(args[1])):
        print(f"published {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
