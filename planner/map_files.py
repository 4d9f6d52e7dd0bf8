"""Map files: what kind a file is (by content), its digest and default name.

The content decides the format; the name only has to match its compression
(``map.osm.bz2`` holds bzip2-compressed XML). Kinds: ``pbf`` (OSM PBF), ``osm`` (OSM XML,
optionally ``.bz2`` / ``.gz`` compressed) and ``graphml`` (osmnx GraphML).
"""

from __future__ import annotations

import bz2
import gzip
import hashlib
import re
import zlib
from pathlib import Path

from dueroute.planner.errors import NoDrivableRoads, NotAMapFile

ALLOWED = (
    "allowed: OSM PBF (.osm.pbf), OSM XML (.osm, .xml, optionally .bz2/.gz compressed) "
    "or GraphML (.graphml)"
)

#: Human names of the kinds, for messages.
KIND_NAME = {"pbf": "OSM PBF", "osm": "OSM XML", "graphml": "GraphML"}

_ROOT = re.compile(rb"<([A-Za-z_][\w:.\-]*)")


def sniff(path: Path) -> tuple[str, str | None]:
    """``(kind, compression)`` of a map file from its content, else raise NotAMapFile.

    ``kind`` is ``"pbf"``, ``"osm"`` or ``"graphml"``; ``compression`` is ``"bz2"``,
    ``"gz"`` or None.
    """
    with open(path, "rb") as fh:
        raw = fh.read(8192)
    if not raw:
        raise NotAMapFile(f"{path}: the file is empty; {ALLOWED}")
    if _is_pbf(raw):
        return "pbf", None
    compression = None
    if raw.startswith(b"BZh"):
        compression = "bz2"
    elif raw.startswith(b"\x1f\x8b"):
        compression = "gz"
    if compression is not None:
        if path.suffix.lower() != f".{compression}":
            raise NotAMapFile(
                f"{path}: the content is {compression}-compressed but the name does not end in "
                f".{compression}; rename it (e.g. map.osm.{compression})"
            )
        try:
            opener = bz2.open if compression == "bz2" else gzip.open
            with opener(path, "rb") as fh:
                head = fh.read(8192)
        except (OSError, EOFError, zlib.error) as exc:
            raise NotAMapFile(f"{path}: cannot decompress {compression} data ({exc})") from exc
    else:
        if path.suffix.lower() in (".bz2", ".gz"):
            raise NotAMapFile(
                f"{path}: the name ends in {path.suffix} but the content is not compressed"
                f" ({describe(raw)}); {ALLOWED}"
            )
        head = raw
    kind = describe(head)
    if kind in ("osm", "graphml"):
        return kind, compression
    raise NotAMapFile(f"{path}: this is not a map file (it looks like {kind}); {ALLOWED}")


def _is_pbf(raw: bytes) -> bool:
    """An OSM PBF file starts with a 4-byte header length and a BlobHeader of type OSMHeader
    (OSM wiki *PBF Format*)."""
    if len(raw) < 16:
        return False
    size = int.from_bytes(raw[:4], "big")
    return 0 < size < 64 * 1024 and raw[4:6] == b"\x0a\x09" and raw[6:15] == b"OSMHeader"


def describe(head: bytes) -> str:
    """Name the kind of content in the first bytes of a file (``osm``, ``graphml`` or else)."""
    if _is_pbf(head):
        return "pbf"
    if head.startswith(b"\x89PNG"):
        return "a PNG image"
    if head[:3] == b"\xff\xd8\xff":
        return "a JPEG image"
    if head.startswith(b"%PDF"):
        return "a PDF document"
    if head.startswith(b"PK\x03\x04"):
        return "a zip archive"
    text = head.lstrip(b"\xef\xbb\xbf \t\r\n")
    if text[:1] in (b"{", b"["):
        return "JSON"
    lowered = text[:512].lower()
    if lowered.startswith(b"<!doctype html") or b"<html" in lowered:
        return "an HTML page"
    # Skip the XML declaration, comments and doctype: find the first element name.
    body = re.sub(rb"<\?.*?\?>|<!--.*?-->|<!.*?>", b"", text, flags=re.DOTALL)
    match = _ROOT.match(body.lstrip())
    if match is not None:
        root = match.group(1).split(b":")[-1].lower()
        if root == b"osm":
            return "osm"
        if root == b"graphml":
            return "graphml"
        return f"XML with root element <{match.group(1).decode(errors='replace')}>"
    try:
        text.decode("utf-8")
    except UnicodeDecodeError:
        return "binary data"
    snippet = text[:40].decode("utf-8", errors="replace").strip()
    return f"plain text starting {snippet!r}"


def sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def default_name(path: Path) -> str:
    """The file name without its map suffixes (``city.osm.pbf`` -> ``city``)."""
    name = path.name
    for suffix in (".bz2", ".gz", ".pbf", ".osm", ".xml", ".graphml"):
        if name.lower().endswith(suffix):
            name = name[: -len(suffix)]
    return name or path.name


def no_drivable_roads(
    path: Path, file_nodes: int, file_ways: int, dropped_ways: dict[str, int], highways: str
) -> NoDrivableRoads:
    """The error for a file that parsed but holds no road a car may use (what it holds)."""
    if file_nodes == 0 and file_ways == 0:
        return NoDrivableRoads(
            f"{path}: the file parsed but holds no OSM nodes and no ways, so no roads"
        )
    why = ", ".join(f"{n} {r.replace('_', ' ')}" for r, n in dropped_ways.items() if n)
    return NoDrivableRoads(
        f"{path}: no road a car may use; the file has {file_nodes} nodes "
        f"and {file_ways} ways with at least two nodes"
        + (f" (dropped: {why})" if why else "")
        + "; drivable are OSM highway="
        + highways
        + " without access=no/private"
    )
