"""Import an OpenStreetMap extract (OSM XML) or an osmnx GraphML file through osmnx.

This is the reference importer: osmnx builds a networkx graph, so it needs several kB per node
(the streaming importer :mod:`planner.osm_stream` is the default for OSM files; the two give
the same graph, tests check it). GraphML files are read only here.

Pipeline for OSM XML (``.osm``, ``.xml``, optionally ``.bz2`` / ``.gz`` compressed):

1. ``osmnx.graph_from_xml(path, simplify=False, retain_all=True)`` turns every way into
   directed edges by osmnx's one-way rules (:mod:`planner.osm_rules`); each edge carries its
   way's tags. ``graph_from_xml`` itself applies no road filter (buildings and footpaths become
   edges too), so filtering is ours, and it must happen *before* simplification: a footpath
   meeting a road would otherwise leave an interstitial node that splits the road.
2. The drivable filter (:func:`planner.osm_rules.way_drop_reason`, with the ``road_filter``)
   keeps what a private car may use.
3. ``osmnx.simplify_graph`` merges chains of degree-2 nodes into one edge whose ``length`` is
   the sum of the great-circle segment lengths and whose ``geometry`` is the full polyline;
   its ``osmid`` is aggregated to the way ids in travel order (``edge_attr_aggs``), and the
   turn-restriction junctions stay nodes (``node_attrs_include``).
4. Self-loops are dropped (counted); parallel edges are kept.
5. Turn restrictions are read from the same file with osmium
   (:func:`planner.osm_stream.read_ways`) and mapped onto the edges
   (:mod:`planner.restrictions`); the ``components`` rule keeps the largest strongly
   connected component (or all).

osmnx refuses a clipped extract (ways naming nodes the file lacks); the streaming importer
imports what is usable of it.

GraphML (written by ``osmnx.save_graphml``) is read with ``osmnx.load_graphml``; the same
filter is applied, and the graph is simplified unless its ``simplified`` flag says it already
is (then the way ids of a merged edge are in the order the file stores them, and GraphML holds
no turn restrictions).

Speeds come from the ``maxspeed`` tag (parsed by :func:`planner.speeds.parse_maxspeed`) or the
class default; ``travel_time_s = length_m / speed``.
"""

from __future__ import annotations

import logging
import math
import tempfile
import warnings
import zlib
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from itertools import groupby
from pathlib import Path
from typing import Any
from xml.etree.ElementTree import ParseError as ET_ParseError
from xml.sax import SAXException

import numpy as np

from dueroute.planner.compile_ways import CompiledWays
from dueroute.planner.errors import GraphFileNotFound, InvalidRequest, NoDrivableRoads, NotAMapFile
from dueroute.planner.graph import RoadGraph, great_circle_m
from dueroute.planner.map_files import (
    KIND_NAME,
    default_name,
    no_drivable_roads,
    sha256,
    sniff,
)
from dueroute.planner.osm_rules import (
    ACCESS_FORBIDDING_CARS,
    DEFAULT_ROAD_FILTER,
    DRIVABLE_HIGHWAYS,
    SERVICE_VALUES_DROPPED,
    WAY_TAGS,
    RoadFilter,
    tokens,
    way_drop_reason,
)
from dueroute.planner.osm_stream import keep_components, read_ways
from dueroute.planner.restrictions import (
    MappedRestrictions,
    RestrictionReport,
    junction_nodes,
    map_restrictions,
)
from dueroute.planner.speeds import ROAD_CLASSES, edge_speed, road_class_index

__all__ = [
    "ACCESS_FORBIDDING_CARS",
    "DRIVABLE_HIGHWAYS",
    "SERVICE_VALUES_DROPPED",
    "import_map",
    "way_drop_reason",
]

#: Way tags the importer needs on edges; added to ``osmnx.settings.useful_tags_way`` for the
#: duration of one import.
_WAY_TAGS = [*WAY_TAGS, "name"]

_DROP_REASONS = ("not_a_road", "not_for_cars", "service_road", "no_car_access", "area")

#: Node attribute that keeps a node as a graph node through ``osmnx.simplify_graph``
#: (its ``node_attrs_include``): turn-restriction junctions.
_KEEP_ATTR = "dueroute_junction"


def _first_value(value: Any) -> Any:
    return value[0] if isinstance(value, list) and value else value


_tokens = tokens


def _ordered_ways(osmids: list[Any]) -> list[Any]:
    """osmnx ``edge_attr_aggs`` for ``osmid``: the way ids along a merged edge in travel
    order, consecutive repeats merged (osmnx would keep an unordered set)."""
    return [k for k, _ in groupby(osmids)]


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


def _read_networkx(
    path: Path,
    kind: str,
    dropped: Counter[str],
    road_filter: RoadFilter,
    junctions: set[int],
) -> tuple[Any, dict[str, int], set[int]]:
    """Read, filter and simplify; returns the osmnx MultiDiGraph, counts of the file, and the
    ids of the ``junctions`` that are nodes of the file."""
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
            raise NotAMapFile(f"{path}: cannot parse the {KIND_NAME[kind]} ({exc})") from exc
        except (KeyError, ValueError, TypeError, IndexError, nx.NetworkXError) as exc:
            clipped = "missing nodes" in str(exc)
            raise NotAMapFile(
                f"{path}: the {KIND_NAME[kind]} is malformed or incomplete "
                f"({type(exc).__name__}: {exc})"
                + (
                    "; osmnx refuses clipped extracts, the osmium importer "
                    "(--importer osmium, the default for OSM files) imports what is usable"
                    if clipped
                    else ""
                )
            ) from exc

        file_counts = {
            "file_nodes": G.number_of_nodes(),
            "file_ways": len({_way_key(d) for _, _, d in G.edges(data=True)}),
            "file_edges": G.number_of_edges(),
        }
        present = {n for n in junctions if n in G}
        # Decide per way (all edges of a way carry the same tags); count dropped ways.
        remove = []
        dropped_ways: dict[str, set[Any]] = {r: set() for r in _DROP_REASONS}
        for u, v, k, data in G.edges(keys=True, data=True):
            reason = way_drop_reason(data, road_filter)
            if reason is not None:
                remove.append((u, v, k))
                dropped_ways[reason].add(_way_key(data))
        for reason in _DROP_REASONS:
            dropped[f"ways_{reason}"] = len(dropped_ways[reason])
        G.remove_edges_from(remove)
        G.remove_nodes_from([n for n in G.nodes if G.degree(n) == 0])

        if G.number_of_edges() == 0:
            raise no_drivable_roads(
                path,
                file_counts["file_nodes"],
                file_counts["file_ways"],
                {r: len(s) for r, s in dropped_ways.items()},
                "|".join(sorted(road_filter.highways)),
            )
        bad_nodes = [n for n, d in G.nodes(data=True) if not _has_position(d)]
        if bad_nodes:
            raise NotAMapFile(
                f"{path}: {len(bad_nodes)} road nodes have no valid position (e.g. node "
                f"{bad_nodes[0]!r}); map nodes need WGS84 coordinates "
                "(OSM lat/lon, GraphML x/y as written by osmnx)"
            )
        if not G.graph.get("simplified", False):
            for n in present:
                if n in G:
                    G.nodes[n][_KEEP_ATTR] = True
            try:
                G = ox.simplify_graph(
                    G,
                    node_attrs_include=[_KEEP_ATTR],
                    edge_attr_aggs={"length": sum, "osmid": _ordered_ways},
                )
            except (ValueError, KeyError) as exc:
                raise NotAMapFile(f"{path}: cannot simplify the road network ({exc})") from exc
    return G, file_counts, present


def _has_position(data: dict[str, Any]) -> bool:
    try:
        x, y = float(data["x"]), float(data["y"])
    except (KeyError, TypeError, ValueError):
        return False
    return math.isfinite(x) and math.isfinite(y) and -180 <= x <= 180 and -90 <= y <= 90


def _way_key(data: dict[str, Any]) -> Any:
    osmid = data.get("osmid")
    return tuple(osmid) if isinstance(osmid, list) else osmid


def _way_ids(osmid: Any) -> list[int]:
    """An edge's ``osmid`` (an int, or a list for a merged edge) as a list of way ids."""
    values = osmid if isinstance(osmid, list) else [] if osmid is None else [osmid]
    out = []
    for v in values:
        try:
            out.append(int(v))
        except (TypeError, ValueError):
            continue
    return out


def _close(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return abs(a[0] - b[0]) <= 1e-7 and abs(a[1] - b[1]) <= 1e-7


def import_map(
    path: str | Path,
    *,
    name: str | None = None,
    spatial_order: bool = True,
    components: str = "largest",
    road_filter: RoadFilter | None = None,
) -> RoadGraph:
    """Import an OSM XML or osmnx GraphML file as a drivable :class:`RoadGraph` (via osmnx).

    Parameters
    ----------
    path : str or Path
        ``.osm`` / ``.xml`` (optionally ``.bz2`` or ``.gz``), or ``.graphml``. The content
        decides the format; the name only has to match its compression.
    name : str, optional
        Graph name stored in ``meta["name"]``; defaults to the file name without suffixes.
    spatial_order : bool
        Renumber nodes along a Hilbert curve (see :func:`planner.graph.hilbert_order`).
    components : {"largest", "all"}
        Keep the largest strongly connected component (the others are reported in
        ``meta["components"]``), or every node.
    road_filter : RoadFilter, optional
        ``highway`` classes to keep (:func:`planner.osm_rules.parse_road_classes`).

    Returns
    -------
    RoadGraph
        ``meta`` holds ``name``, ``source``, ``source_sha256``, ``importer``, ``file_nodes``,
        ``file_ways``, ``dropped`` (ways dropped per reason, ``self_loops`` edges),
        ``components``, ``restrictions`` and ``road_filter``.

    Raises
    ------
    GraphFileNotFound
        ``path`` does not exist.
    NotAMapFile
        The content is not OSM XML / GraphML, or cannot be parsed (a PBF file: use
        :func:`planner.osm_stream.import_osm`).
    NoDrivableRoads
        The file parsed but no way in it is open to cars.
    """
    path = Path(path)
    if not path.is_file():
        raise GraphFileNotFound(
            f"map file not found: {path}" if not path.is_dir() else f"{path} is a directory"
        )
    if components not in ("largest", "all"):
        raise InvalidRequest(f"components must be 'largest' or 'all', got {components!r}")
    road_filter = road_filter or DEFAULT_ROAD_FILTER
    kind, compression = sniff(path)
    if kind == "pbf":
        raise NotAMapFile(
            f"{path}: OSM PBF is read by the osmium importer, not the osmnx one "
            "(dueroute graph import --importer osmium, the default)"
        )
    source = None
    junctions: set[int] = set()
    if kind == "osm":
        with tempfile.TemporaryDirectory(prefix="dueroute-import-") as tmp:
            source = read_ways(path, kind, compression, Path(tmp))
        member_ways = source.member_ways()
        way_ends = source.way_ends(member_ways)
        junctions = junction_nodes(source.restrictions, way_ends)
        via_nodes = {r.via_node for r in source.restrictions if r.via_node is not None}
        junctions |= via_nodes
    dropped: Counter[str] = Counter()
    G, file_counts, present = _read_networkx(path, kind, dropped, road_filter, junctions)

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
    way_ptr: list[int] = [0]
    way_ids: list[int] = []
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
        speed, src = edge_speed(data.get("highway"), data.get("maxspeed"))
        tail.append(t)
        head.append(h)
        length_m.append(float(length))
        speed_kph.append(speed)
        speed_source.append(src)
        road_class.append(road_class_index(_tokens(data.get("highway"))))
        geom_lon.extend(p[0] for p in interior)
        geom_lat.extend(p[1] for p in interior)
        geom_ptr.append(len(geom_lat))
        way_ids.extend(_way_ids(data.get("osmid")))
        way_ptr.append(len(way_ids))
    dropped["self_loops"] = self_loops
    if not tail:
        raise NoDrivableRoads(
            f"{path}: the drivable roads in this file are all self-loops ({self_loops}); "
            "no edge connects two different places"
        )
    cw = CompiledWays(
        node_index=np.arange(len(nodes), dtype=np.int64),
        lat=lat,
        lon=lon,
        osm_id=osm_id,
        tail=np.array(tail, dtype=np.int64),
        head=np.array(head, dtype=np.int64),
        length_m=np.array(length_m, dtype=np.float64),
        speed_kph=np.array(speed_kph, dtype=np.float32),
        speed_source=np.array(speed_source, dtype=np.int8),
        road_class=np.array(road_class, dtype=np.int8),
        geom_indptr=np.array(geom_ptr, dtype=np.int64),
        geom_lat=np.array(geom_lat, dtype=np.float64),
        geom_lon=np.array(geom_lon, dtype=np.float64),
        way_indptr=np.array(way_ptr, dtype=np.int64),
        way_id=np.array(way_ids, dtype=np.int64),
    )
    if source is not None:
        drop = np.array(
            [way_drop_reason(c, road_filter) is not None for c in source.combos], dtype=bool
        )
        mapped = map_restrictions(
            source.restrictions,
            relations=source.relations,
            node_osm_id=cw.osm_id,
            tail=cw.tail,
            head=cw.head,
            way_indptr=cw.way_indptr,
            way_id=cw.way_id,
            way_ends=way_ends,
            way_status=source.way_status(member_ways, drop[source.way_combo]),
            nodes_in_file=via_nodes & present,
        )
    else:
        mapped = MappedRestrictions([], [], RestrictionReport())
    cw, mapped, comp_report = keep_components(cw, mapped, components, path)

    import osmnx

    meta = {
        "name": name if name is not None else default_name(path),
        "source": str(path.resolve()),
        "source_sha256": sha256(path),
        "source_format": kind,
        "importer": f"osmnx {osmnx.__version__}",
        "dropped": dict(dropped),
        **file_counts,
        "components": comp_report,
        "restrictions": mapped.report.to_meta(),
        "road_filter": road_filter.to_meta(),
        "road_classes": list(ROAD_CLASSES),
    }
    return cw.to_graph(meta=meta, spatial_order=spatial_order, turns=mapped.arrays())
