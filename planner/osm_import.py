"""Import an OpenStreetMap extract (OSM XML) or an osmnx GraphML file as a :class:`RoadGraph`.

Pipeline for OSM XML (``.osm``, ``.xml``, optionally ``.bz2`` / ``.gz`` compressed):

1. ``osmnx.graph_from_xml(path, simplify=False, retain_all=True)`` turns every way into
   directed edges: two-way roads get both directions, one-way roads (``oneway=yes/1/true``,
   ``oneway=-1``, roundabouts) only the allowed one; each edge carries its way's tags.
   ``graph_from_xml`` itself applies no road filter (buildings and footpaths become edges too),
   so filtering is ours, and it must happen *before* simplification: a footpath meeting a road
   would otherwise leave an interstitial node that splits the road.
2. The drivable filter (:func:`way_drop_reason`) keeps what a private car may use. It follows
   the rules of osmnx's ``"drive"`` network type (recalled from osmnx 2.1 ``_overpass.py``)
   as a whitelist of ``highway`` values instead of a blacklist, and additionally drops
   ``access=no`` (osmnx only drops ``access=private``) with the usual OSM precedence
   ``motorcar`` > ``motor_vehicle`` > ``vehicle`` > ``access``. Service roads
   (``highway=service`` and any way tagged ``service=alley|driveway|parking_aisle|...``) are
   dropped, as in osmnx ``"drive"``: they are mostly parking aisles, driveways and yards whose
   access is rarely tagged, and routing between public streets does not need them.
3. ``osmnx.simplify_graph`` merges chains of degree-2 nodes into one edge whose ``length`` is
   the sum of the great-circle segment lengths and whose ``geometry`` is the full polyline.
4. Self-loops are dropped (counted); parallel edges are kept.

GraphML (written by ``osmnx.save_graphml``) is read with ``osmnx.load_graphml``; the same
filter is applied, and the graph is simplified unless its ``simplified`` flag says it already is.

Speeds come from the ``maxspeed`` tag (parsed by :func:`planner.speeds.parse_maxspeed`) or the
class default; ``travel_time_s = length_m / speed``.
"""

from __future__ import annotations

import bz2
import gzip
import hashlib
import logging
import math
import re
import warnings
import zlib
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any
from xml.etree.ElementTree import ParseError as ET_ParseError
from xml.sax import SAXException

import numpy as np

from dueroute.planner.errors import GraphFileNotFound, NoDrivableRoads, NotAMapFile
from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m
from dueroute.planner.speeds import ROAD_CLASSES, edge_speed, road_class_index

#: ``highway`` values a car may drive on. ``road`` (type unknown) maps to class ``other``.
#: ``service`` is deliberately absent (see the module docstring).
DRIVABLE_HIGHWAYS: frozenset[str] = frozenset(
    [c for c in ROAD_CLASSES if c not in ("service", "other")] + ["road"]
)

#: ``service=*`` values that mark a way as a service road whatever its ``highway`` class
#: (the osmnx ``"drive"`` rule).
SERVICE_VALUES_DROPPED: frozenset[str] = frozenset(
    ["alley", "driveway", "emergency_access", "parking", "parking_aisle", "private"]
)

#: Access values that forbid a private car (``destination``, ``customers``, ``permissive``,
#: ``delivery`` and ``yes`` allow it).
ACCESS_FORBIDDING_CARS: frozenset[str] = frozenset(
    ["no", "private", "agricultural", "forestry", "emergency", "military"]
)

#: Way tags the importer needs on edges; added to ``osmnx.settings.useful_tags_way`` for the
#: duration of one import.
_WAY_TAGS = [
    "highway",
    "maxspeed",
    "oneway",
    "junction",
    "access",
    "vehicle",
    "motor_vehicle",
    "motorcar",
    "service",
    "area",
    "name",
]

_DROP_REASONS = ("not_a_road", "not_for_cars", "service_road", "no_car_access", "area")


def _first_value(value: Any) -> Any:
    return value[0] if isinstance(value, list) and value else value


def _tokens(value: Any) -> list[str]:
    """A tag value as lower-case tokens (``"no;private"`` and lists are split)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return []
    values = value if isinstance(value, list) else [value]
    out: list[str] = []
    for v in values:
        out += [t.strip().lower() for t in str(v).split(";") if t.strip()]
    return out


def way_drop_reason(tags: dict[str, Any]) -> str | None:
    """Why a way (or an edge carrying its tags) is not drivable, or None to keep it.

    Returns one of ``not_a_road`` (no ``highway`` tag: buildings, land use, rail...),
    ``area`` (``area=yes``), ``not_for_cars`` (footway, cycleway, path, steps, construction,
    proposed, ...), ``service_road``, ``no_car_access``.
    """
    highway = _tokens(tags.get("highway"))
    if not highway:
        return "not_a_road"
    if "yes" in _tokens(tags.get("area")):
        return "area"
    if not any(h in DRIVABLE_HIGHWAYS for h in highway):
        return "service_road" if "service" in highway else "not_for_cars"
    if any(s in SERVICE_VALUES_DROPPED for s in _tokens(tags.get("service"))):
        return "service_road"
    # The most specific access tag present decides (OSM access precedence).
    for key in ("motorcar", "motor_vehicle", "vehicle", "access"):
        values = _tokens(tags.get(key))
        if values:
            if any(v in ACCESS_FORBIDDING_CARS for v in values):
                return "no_car_access"
            break
    return None


# --------------------------------------------------------------------------------------------
# File sniffing


_ROOT = re.compile(rb"<([A-Za-z_][\w:.\-]*)")


def _sniff(path: Path) -> str:
    """Return ``"osm"`` or ``"graphml"`` from the file's content, else raise NotAMapFile."""
    allowed = "allowed: OSM XML (.osm, .xml, optionally .bz2/.gz compressed) or GraphML (.graphml)"
    with open(path, "rb") as fh:
        raw = fh.read(8192)
    if not raw:
        raise NotAMapFile(f"{path}: the file is empty; {allowed}")
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
                f" ({_describe(raw)}); {allowed}"
            )
        head = raw
    kind = _describe(head)
    if kind in ("osm", "graphml"):
        return kind
    raise NotAMapFile(f"{path}: this is not a map file (it looks like {kind}); {allowed}")


def _describe(head: bytes) -> str:
    """Name the kind of content in the first bytes of a file (``osm``, ``graphml`` or else)."""
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


# --------------------------------------------------------------------------------------------
# osmnx glue


@contextmanager
def _osmnx_quiet(extra_way_tags: list[str]) -> Iterator[Any]:
    """osmnx with the way tags we need, its console logging and warnings off; restored after.

    osmnx settings are module globals: an import changes them for its own duration only and is
    not safe to run concurrently with another osmnx call in the same process.
    """
    import osmnx as ox

    saved_tags = list(ox.settings.useful_tags_way)
    saved_console = ox.settings.log_console
    ox.settings.useful_tags_way = list(dict.fromkeys(saved_tags + extra_way_tags))
    ox.settings.log_console = False
    logger = logging.getLogger("osmnx")
    saved_level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            yield ox
    finally:
        ox.settings.useful_tags_way = saved_tags
        ox.settings.log_console = saved_console
        logger.setLevel(saved_level)


def _read_networkx(path: Path, kind: str, dropped: Counter[str]) -> tuple[Any, dict[str, int]]:
    """Read, filter and simplify; returns the osmnx MultiDiGraph and counts of the file."""
    import networkx as nx

    with _osmnx_quiet(_WAY_TAGS) as ox:
        from osmnx._errors import InsufficientResponseError

        try:
            if kind == "osm":
                G = ox.graph_from_xml(path, simplify=False, retain_all=True)
            else:
                G = ox.load_graphml(path)
        except InsufficientResponseError:
            # osmnx's way of saying "no nodes and no ways in this file"
            raise NoDrivableRoads(
                f"{path}: the file parsed but holds no OSM nodes and no ways, so no roads"
            ) from None
        except (SAXException, ET_ParseError, EOFError, OSError, zlib.error, UnicodeError) as exc:
            raise NotAMapFile(f"{path}: cannot parse the {_KIND_NAME[kind]} ({exc})") from exc
        except (KeyError, ValueError, TypeError, IndexError, nx.NetworkXError) as exc:
            raise NotAMapFile(
                f"{path}: the {_KIND_NAME[kind]} is malformed or incomplete "
                f"({type(exc).__name__}: {exc})"
            ) from exc

        file_counts = {
            "file_nodes": G.number_of_nodes(),
            "file_ways": len({_way_id(d) for _, _, d in G.edges(data=True)}),
            "file_edges": G.number_of_edges(),
        }
        # Decide per way (all edges of a way carry the same tags); count dropped ways.
        remove = []
        dropped_ways: dict[str, set[Any]] = {r: set() for r in _DROP_REASONS}
        for u, v, k, data in G.edges(keys=True, data=True):
            reason = way_drop_reason(data)
            if reason is not None:
                remove.append((u, v, k))
                dropped_ways[reason].add(_way_id(data))
        for reason in _DROP_REASONS:
            dropped[f"ways_{reason}"] = len(dropped_ways[reason])
        G.remove_edges_from(remove)
        G.remove_nodes_from([n for n in G.nodes if G.degree(n) == 0])

        if G.number_of_edges() == 0:
            why = ", ".join(f"{len(s)} {r.replace('_', ' ')}" for r, s in dropped_ways.items() if s)
            raise NoDrivableRoads(
                f"{path}: no road a car may use; the file has {file_counts['file_nodes']} nodes "
                f"and {file_counts['file_ways']} ways with at least two nodes"
                + (f" (dropped: {why})" if why else "")
                + "; drivable are OSM highway="
                + "|".join(sorted(DRIVABLE_HIGHWAYS))
                + " without access=no/private"
            )
        bad_nodes = [n for n, d in G.nodes(data=True) if not _has_position(d)]
        if bad_nodes:
            raise NotAMapFile(
                f"{path}: {len(bad_nodes)} road nodes have no valid position (e.g. node "
                f"{bad_nodes[0]!r}); map nodes need WGS84 coordinates "
                "(OSM lat/lon, GraphML x/y as written by osmnx)"
            )
        if not G.graph.get("simplified", False):
            try:
                G = ox.simplify_graph(G)
            except (ValueError, KeyError) as exc:
                raise NotAMapFile(f"{path}: cannot simplify the road network ({exc})") from exc
    return G, file_counts


_KIND_NAME = {"osm": "OSM XML", "graphml": "GraphML"}


def _has_position(data: dict[str, Any]) -> bool:
    try:
        x, y = float(data["x"]), float(data["y"])
    except (KeyError, TypeError, ValueError):
        return False
    return math.isfinite(x) and math.isfinite(y) and -180 <= x <= 180 and -90 <= y <= 90


def _way_id(data: dict[str, Any]) -> Any:
    osmid = data.get("osmid")
    return tuple(osmid) if isinstance(osmid, list) else osmid


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _default_name(path: Path) -> str:
    name = path.name
    for suffix in (".bz2", ".gz", ".osm", ".xml", ".graphml"):
        if name.lower().endswith(suffix):
            name = name[: -len(suffix)]
    return name or path.name


def _close(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return abs(a[0] - b[0]) <= 1e-7 and abs(a[1] - b[1]) <= 1e-7


def import_map(
    path: str | Path, *, name: str | None = None, spatial_order: bool = True
) -> RoadGraph:
    """Import an OSM XML or osmnx GraphML file as a drivable :class:`RoadGraph`.

    Parameters
    ----------
    path : str or Path
        ``.osm`` / ``.xml`` (optionally ``.bz2`` or ``.gz``), or ``.graphml``. The content
        decides the format; the name only has to match its compression.
    name : str, optional
        Graph name stored in ``meta["name"]``; defaults to the file name without suffixes.
    spatial_order : bool
        Renumber nodes along a Hilbert curve (see :func:`planner.graph.hilbert_order`).

    Returns
    -------
    RoadGraph
        ``meta`` holds ``name``, ``source``, ``source_sha256``, ``importer``, ``file_nodes``,
        ``file_ways`` and ``dropped`` (ways dropped per reason, ``self_loops`` edges).

    Raises
    ------
    GraphFileNotFound
        ``path`` does not exist.
    NotAMapFile
        The content is not OSM XML / GraphML, or cannot be parsed.
    NoDrivableRoads
        The file parsed but no way in it is open to cars.
    """
    path = Path(path)
    if not path.is_file():
        raise GraphFileNotFound(
            f"map file not found: {path}" if not path.is_dir() else f"{path} is a directory"
        )
    kind = _sniff(path)
    dropped: Counter[str] = Counter()
    G, file_counts = _read_networkx(path, kind, dropped)

    nodes = list(G.nodes)
    index = {node: i for i, node in enumerate(nodes)}
    lat = np.array([float(G.nodes[n]["y"]) for n in nodes], dtype=np.float64)
    lon = np.array([float(G.nodes[n]["x"]) for n in nodes], dtype=np.float64)
    try:
        osm_id = np.array([int(n) for n in nodes], dtype=np.int64)
    except (TypeError, ValueError):  # GraphML with non-numeric node ids
        osm_id = np.arange(len(nodes), dtype=np.int64)

    tail: list[int] = []
    head: list[int] = []
    length_m: list[float] = []
    speed_kph: list[float] = []
    speed_source: list[int] = []
    road_class: list[int] = []
    geom_ptr: list[int] = [0]
    geom_lat: list[float] = []
    geom_lon: list[float] = []
    self_loops = 0
    for u, v, data in G.edges(data=True):
        if u == v:
            self_loops += 1
            continue
        t, h = index[u], index[v]
        coords: list[tuple[float, float]] = []
        geometry = data.get("geometry")
        if geometry is not None:
            coords = [(float(x), float(y)) for x, y in geometry.coords]
            # Invariant: stored interior points run tail -> head.
            start, end = (lon[t], lat[t]), (lon[h], lat[h])
            if len(coords) >= 2 and _close(coords[0], end) and _close(coords[-1], start):
                coords.reverse()
        interior = coords[1:-1]
        length = data.get("length")
        if length is None or not math.isfinite(float(length)):
            pts = [(lon[t], lat[t]), *interior, (lon[h], lat[h])]
            xs = np.array([p[0] for p in pts])
            ys = np.array([p[1] for p in pts])
            length = float(np.sum(great_circle_m(ys[:-1], xs[:-1], ys[1:], xs[1:])))
        speed, source = edge_speed(data.get("highway"), data.get("maxspeed"))
        tail.append(t)
        head.append(h)
        length_m.append(float(length))
        speed_kph.append(speed)
        speed_source.append(source)
        road_class.append(road_class_index(_tokens(data.get("highway"))))
        geom_lon.extend(p[0] for p in interior)
        geom_lat.extend(p[1] for p in interior)
        geom_ptr.append(len(geom_lat))
    dropped["self_loops"] = self_loops
    if not tail:
        raise NoDrivableRoads(
            f"{path}: the drivable roads in this file are all self-loops ({self_loops}); "
            "no edge connects two different places"
        )

    import osmnx

    meta = {
        "name": name if name is not None else _default_name(path),
        "source": str(path.resolve()),
        "source_sha256": _sha256(path),
        "source_format": kind,
        "importer": f"osmnx {osmnx.__version__}",
        "dropped": dict(dropped),
        **file_counts,
        "road_classes": list(ROAD_CLASSES),
    }
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=osm_id,
        tail=np.array(tail, dtype=np.int64),
        head=np.array(head, dtype=np.int64),
        length_m=np.array(length_m, dtype=np.float64),
        speed_kph=np.array(speed_kph, dtype=np.float32),
        road_class=np.array(road_class, dtype=np.int8),
        speed_source=np.array(speed_source, dtype=np.int8),
        geom_indptr=np.array(geom_ptr, dtype=np.int64),
        geom_lat=np.array(geom_lat, dtype=np.float64),
        geom_lon=np.array(geom_lon, dtype=np.float64),
        meta=meta,
        spatial_order=spatial_order,
    )
