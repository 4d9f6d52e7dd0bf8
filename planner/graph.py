"""The compiled road graph: build, save, memory-mapped load, snapping.

A road graph is a directed graph in compressed-sparse-row form. Node ``i`` is row ``i``; its
outgoing edges are ``indptr[i]:indptr[i + 1]``. Edge costs are free-flow travel times in seconds.

The on-disk format is one uncompressed ``.npz`` file that ``numpy.load`` alone can read. Because
the members are stored (not deflated), :func:`load_graph` maps them straight from the file with
``numpy.memmap``: several worker processes then share one copy in the page cache.

Arrays (``n`` nodes, ``m`` directed edges, ``k`` interior geometry points):

==================  ==================  =====================================================
name                dtype, shape        meaning
==================  ==================  =====================================================
``indptr``          int64[n + 1]        CSR row pointer: edges of node i are indptr[i]:indptr[i+1]
``head``            int32[m]            node the edge leads to
``travel_time_s``   float64[m]          free-flow travel time, ``length_m / speed``
``length_m``        float64[m]          great-circle length along the road geometry
``speed_kph``       float32[m]          speed used for ``travel_time_s``
``road_class``      int8[m]             index into ``meta["road_classes"]`` (OSM ``highway``)
``speed_source``    int8[m]             0 = tagged ``maxspeed``, 1 = class default
``lat``, ``lon``    float64[n]          node position, WGS84 degrees
``osm_id``          int64[n]            OpenStreetMap node id (synthetic ids for generated maps)
``component``       int32[n]            strongly-connected-component label
``geom_indptr``     int64[m + 1]        interior points of edge e: geom_indptr[e]:geom_indptr[e+1]
``geom_lat``        float64[k]          interior geometry latitudes (endpoints not repeated)
``geom_lon``        float64[k]          interior geometry longitudes
``way_indptr``      int64[m + 1]        OSM ways along edge e: way_id[way_indptr[e]:...[e+1]]
``way_id``          int64[w]            OSM way ids, in travel order along each edge
``turn_indptr``     int64[r + 1]        road edges of turn restriction i:
                                        turn_edges[turn_indptr[i]:turn_indptr[i + 1]]
``turn_edges``      int32[q]            edge sequences ``from, via..., to`` (each edge's head
                                        is the next edge's tail; at least two edges)
``turn_kind``       int8[r]             0 = ``no_*`` (the sequence is banned), 1 = ``only_*``
                                        (after ``from, via...`` the only way on is ``to``)
``meta``            str (0-d)           JSON: format version, name, source, counts, speeds, ...
==================  ==================  =====================================================

Format version 2 added ``way_indptr``/``way_id`` and the ``turn_*`` arrays; a version 1 file
loads with those empty (no way ids, no restrictions).
"""

from __future__ import annotations

import hashlib
import json
import math
import zipfile
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

from dueroute.planner.errors import (
    CorruptGraphFile,
    GraphFileNotFound,
    InvalidRequest,
    NodeNotFound,
)
from dueroute.planner.limits import DEFAULT_SNAP_MAX_M

FORMAT_VERSION = 2

#: Oldest file format :func:`load_graph` still reads (see the module docstring).
MIN_FORMAT_VERSION = 1

#: Mean earth radius in metres, the value osmnx uses for its great-circle lengths.
EARTH_RADIUS_M = 6_371_009.0


_NODE_ARRAYS = {
    "lat": np.float64,
    "lon": np.float64,
    "osm_id": np.int64,
    "component": np.int32,
}
_EDGE_ARRAYS = {
    "head": np.int32,
    "travel_time_s": np.float64,
    "length_m": np.float64,
    "speed_kph": np.float32,
    "road_class": np.int8,
    "speed_source": np.int8,
}
_OTHER_ARRAYS = {
    "indptr": np.int64,
    "geom_indptr": np.int64,
    "geom_lat": np.float64,
    "geom_lon": np.float64,
}
REQUIRED_ARRAYS = {**_OTHER_ARRAYS, **_NODE_ARRAYS, **_EDGE_ARRAYS}

#: Arrays added by format version 2 (empty when a version 1 file is loaded).
_V2_ARRAYS = {
    "way_indptr": np.int64,
    "way_id": np.int64,
    "turn_indptr": np.int64,
    "turn_edges": np.int32,
    "turn_kind": np.int8,
}
ALL_ARRAYS = {**REQUIRED_ARRAYS, **_V2_ARRAYS}

#: ``turn_kind`` values.
TURN_NO = 0
TURN_ONLY = 1


@dataclass(frozen=True, eq=False)
class RoadGraph:
    """A compiled, read-only road graph (see the module docstring for every array)."""

    indptr: np.ndarray
    head: np.ndarray
    travel_time_s: np.ndarray
    length_m: np.ndarray
    speed_kph: np.ndarray
    road_class: np.ndarray
    speed_source: np.ndarray
    lat: np.ndarray
    lon: np.ndarray
    osm_id: np.ndarray
    component: np.ndarray
    geom_indptr: np.ndarray
    geom_lat: np.ndarray
    geom_lon: np.ndarray
    way_indptr: np.ndarray = field(default_factory=lambda: np.zeros(1, dtype=np.int64))
    way_id: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    turn_indptr: np.ndarray = field(default_factory=lambda: np.zeros(1, dtype=np.int64))
    turn_edges: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int32))
    turn_kind: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int8))
    meta: dict[str, Any] = field(default_factory=dict)
    path: Path | None = None

    def __post_init__(self) -> None:
        # A graph built without way ids still answers "which ways does edge e run along"
        # (none): one pointer per edge plus one, all zero.
        if self.way_indptr.shape == (1,) and self.head.shape[0] != 0:
            object.__setattr__(self, "way_indptr", np.zeros(self.n_edges + 1, dtype=np.int64))

    @property
    def n_nodes(self) -> int:
        return int(self.lat.shape[0])

    @property
    def n_edges(self) -> int:
        return int(self.head.shape[0])

    @property
    def n_restrictions(self) -> int:
        return int(self.turn_kind.shape[0])

    @property
    def name(self) -> str:
        return str(self.meta.get("name", self.path.stem if self.path else "graph"))

    @cached_property
    def max_speed_mps(self) -> float:
        """Fastest free-flow speed on any edge, in m/s (makes the great-circle bound admissible)."""
        if self.n_edges == 0:
            return 1.0
        return float(np.max(self.speed_kph)) / 3.6

    @cached_property
    def fingerprint(self) -> str:
        """sha256 over the topology and costs: identifies the graph a policy was trained on."""
        digest = hashlib.sha256()
        for arr in (self.indptr, self.head, self.travel_time_s):
            digest.update(np.ascontiguousarray(arr).tobytes())
        return digest.hexdigest()

    @cached_property
    def tail(self) -> np.ndarray:
        """int32[m]: the node each edge leaves from (derived from ``indptr``)."""
        return np.repeat(np.arange(self.n_nodes, dtype=np.int32), np.diff(self.indptr))

    def edge_ways(self, edge: int) -> np.ndarray:
        """int64[k]: the OSM way ids edge ``edge`` runs along, in travel order (may be empty)."""
        return np.asarray(self.way_id[int(self.way_indptr[edge]) : int(self.way_indptr[edge + 1])])

    def restriction(self, i: int) -> tuple[str, np.ndarray]:
        """Turn restriction ``i`` as ``("no" | "only", int64[k] road edges from, via..., to)``."""
        lo, hi = int(self.turn_indptr[i]), int(self.turn_indptr[i + 1])
        kind = "only" if int(self.turn_kind[i]) == TURN_ONLY else "no"
        return kind, np.asarray(self.turn_edges[lo:hi], dtype=np.int64)

    def edges_of(self, node: int) -> slice:
        return slice(int(self.indptr[node]), int(self.indptr[node + 1]))

    def csr(self, weights: np.ndarray | None = None) -> csr_matrix:
        """The graph as a scipy CSR matrix of travel times (parallel edges keep the cheapest).

        Zero-cost edges are stored as a tiny positive value would change costs, so they are kept
        explicitly: scipy's csgraph treats explicit zeros in a CSR matrix as edges.
        """
        w = self.travel_time_s if weights is None else weights
        n = self.n_nodes
        order = np.lexsort((w, self.head, self.tail))
        tail, head, cost = self.tail[order], self.head[order], np.asarray(w)[order]
        keep = np.ones(len(order), dtype=bool)
        keep[1:] = (tail[1:] != tail[:-1]) | (head[1:] != head[:-1])
        tail, head, cost = tail[keep], head[keep], cost[keep]
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.add.at(indptr, tail.astype(np.int64) + 1, 1)
        return csr_matrix((cost, head, np.cumsum(indptr)), shape=(n, n))

    def check_node(self, node: int) -> int:
        """Return ``node`` as an int, or raise :class:`NodeNotFound` saying what is allowed."""
        if isinstance(node, bool) or not isinstance(node, (int, np.integer)):
            raise NodeNotFound(f"node must be an integer index, got {node!r}")
        if not 0 <= int(node) < self.n_nodes:
            raise NodeNotFound(
                f"node {int(node)} is not in the graph: valid node indices are 0..{self.n_nodes - 1}"
            )
        return int(node)

    def route_coords(self, nodes: np.ndarray, edges: np.ndarray) -> np.ndarray:
        """float64[n, 2] (lon, lat) points along a route of full edges (``edges[i]`` from
        ``nodes[i]`` to ``nodes[i + 1]``), each shared point once: what
        :meth:`edge_coords` gives edge by edge, in one compiled pass."""
        from dueroute.planner._kernel import route_polyline  # numba: compiled on first use

        return np.asarray(
            route_polyline(
                np.asarray(nodes, dtype=np.int64),
                np.asarray(edges, dtype=np.int64),
                np.asarray(self.lat),
                np.asarray(self.lon),
                np.asarray(self.geom_indptr),
                np.asarray(self.geom_lat),
                np.asarray(self.geom_lon),
            )
        )

    def edge_coords(self, edge: int) -> list[tuple[float, float]]:
        """(lon, lat) points of one edge from its tail to its head, interior geometry included."""
        t = int(self.tail[edge])
        h = int(self.head[edge])
        a, b = int(self.geom_indptr[edge]), int(self.geom_indptr[edge + 1])
        pts = [(float(self.lon[t]), float(self.lat[t]))]
        pts += [
            (float(x), float(y))
            for x, y in zip(self.geom_lon[a:b], self.geom_lat[a:b], strict=True)
        ]
        pts.append((float(self.lon[h]), float(self.lat[h])))
        return pts

    @cached_property
    def reverse_pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """:func:`reverse_edge_pairs` of this graph (computed once)."""
        return reverse_edge_pairs(self)

    @cached_property
    def reverse_edge(self) -> np.ndarray:
        """int32[m]: the edge that drives edge ``e``'s road the other way, or -1 (one-way).

        The reverse of ``e`` runs from ``head[e]`` to ``tail[e]`` along the same interior
        geometry in reverse order (see :func:`reverse_edge_pairs`); of several such edges
        (duplicates) the lowest index is taken.
        """
        out = np.full(self.n_edges, -1, dtype=np.int32)
        e, f = self.reverse_pairs
        # pairs are sorted by (e, f): the first pair of each e holds its lowest reverse
        first = np.ones(e.shape[0], dtype=bool)
        first[1:] = e[1:] != e[:-1]
        out[e[first]] = f[first]
        return out

    @cached_property
    def _snap_tree(self) -> Any:
        from scipy.spatial import cKDTree

        return cKDTree(_unit_vectors(np.asarray(self.lat), np.asarray(self.lon)))

    def snap(self, lat: float, lon: float, max_distance_m: float = DEFAULT_SNAP_MAX_M) -> int:
        """Index of the node nearest to (lat, lon) by great-circle distance.

        Raises :class:`InvalidRequest` for coordinates outside WGS84 ranges and
        :class:`NodeNotFound` when the nearest node is farther than ``max_distance_m``.
        """
        if not (math.isfinite(lat) and -90.0 <= lat <= 90.0):
            raise InvalidRequest(f"latitude must be a number in [-90, 90], got {lat!r}")
        if not (math.isfinite(lon) and -180.0 <= lon <= 180.0):
            raise InvalidRequest(f"longitude must be a number in [-180, 180], got {lon!r}")
        if self.n_nodes == 0:
            raise NodeNotFound("the graph has no nodes to snap to")
        chord, idx = self._snap_tree.query(_unit_vectors(np.array([lat]), np.array([lon]))[0])
        distance_m = 2.0 * EARTH_RADIUS_M * math.asin(min(1.0, float(chord) / 2.0))
        if distance_m > max_distance_m:
            raise NodeNotFound(
                f"point ({lat:.6f}, {lon:.6f}) is {distance_m:,.0f} m from the nearest road node; "
                f"the limit is {max_distance_m:,.0f} m"
            )
        return int(idx)

    def info(self) -> dict[str, Any]:
        """Summary for ``dueroute graph info``."""
        classes = self.meta.get("road_classes", [])
        counts = np.bincount(np.asarray(self.road_class, dtype=np.int64), minlength=len(classes))
        n_comp = int(self.component.max()) + 1 if self.n_nodes else 0
        largest = int(np.bincount(self.component).max()) if self.n_nodes else 0
        return {
            "path": str(self.path) if self.path else None,
            "name": self.name,
            "nodes": self.n_nodes,
            "edges": self.n_edges,
            "strong_components": n_comp,
            "largest_component_nodes": largest,
            "bbox": {
                "south": float(np.min(self.lat)) if self.n_nodes else None,
                "west": float(np.min(self.lon)) if self.n_nodes else None,
                "north": float(np.max(self.lat)) if self.n_nodes else None,
                "east": float(np.max(self.lon)) if self.n_nodes else None,
            },
            "total_length_km": float(np.sum(self.length_m)) / 1000.0,
            "max_speed_kph": float(np.max(self.speed_kph)) if self.n_edges else None,
            "edges_by_class": {c: int(k) for c, k in zip(classes, counts, strict=False) if k},
            "edges_with_tagged_speed": int(np.sum(np.asarray(self.speed_source) == 0)),
            "turn_restrictions": {
                "in_graph": self.n_restrictions,
                "no": int(np.sum(np.asarray(self.turn_kind) == TURN_NO)),
                "only": int(np.sum(np.asarray(self.turn_kind) == TURN_ONLY)),
            },
            "fingerprint": self.fingerprint,
            "meta": {k: v for k, v in self.meta.items() if k != "road_classes"},
        }


def check_edge_costs(n_edges: int, costs: Any) -> np.ndarray:
    """``costs`` as float64[n_edges] edge costs in seconds, or :class:`InvalidRequest`.

    Allowed: one number per edge, each ``>= 0`` or ``+inf`` (a closed road); never NaN.
    """
    arr = np.asarray(costs)
    if arr.shape != (n_edges,) or not np.issubdtype(arr.dtype, np.number):
        raise InvalidRequest(
            f"road costs must be a numeric array with one entry per edge ({n_edges}), "
            f"got {arr.dtype}{list(arr.shape)}"
        )
    arr = np.asarray(arr, dtype=np.float64)
    if arr.size and (bool(np.isnan(arr).any()) or float(arr.min()) < 0.0):
        raise InvalidRequest("road costs must be >= 0 seconds (+inf for a closed road), no NaN")
    return arr


def edge_polylines(
    graph: RoadGraph, edges: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Full polylines (tail, interior points, head) of every edge, or of ``edges``, in one
    ragged array.

    Returns
    -------
    ptr : int64[k + 1]
        Points of the i-th edge (edge ``i``, or ``edges[i]``) are ``lat[ptr[i]:ptr[i + 1]]``,
        from its tail to its head (at least two: the endpoints are included, unlike
        ``geom_lat``).
    lat, lon : float64[ptr[-1]]
        WGS84 degrees.
    """
    gptr = np.asarray(graph.geom_indptr, dtype=np.int64)
    sel = np.arange(graph.n_edges, dtype=np.int64) if edges is None else np.asarray(edges)
    inner = np.diff(gptr)[sel]
    k = sel.shape[0]
    ptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(inner + 2, out=ptr[1:])
    lat = np.empty(int(ptr[-1]), dtype=np.float64)
    lon = np.empty(int(ptr[-1]), dtype=np.float64)
    tail, head = np.asarray(graph.tail)[sel], np.asarray(graph.head)[sel]
    lat[ptr[:-1]], lon[ptr[:-1]] = graph.lat[tail], graph.lon[tail]
    lat[ptr[1:] - 1], lon[ptr[1:] - 1] = graph.lat[head], graph.lon[head]
    # interior point j of the i-th edge sits at ptr[i] + 1 + j; in geom_* at gptr[sel[i]] + j
    j = np.arange(int(inner.sum()), dtype=np.int64) - np.repeat(np.cumsum(inner) - inner, inner)
    src = np.repeat(gptr[:-1][sel], inner) + j
    dst = np.repeat(ptr[:-1] + 1, inner) + j
    lat[dst], lon[dst] = graph.geom_lat[src], graph.geom_lon[src]
    return ptr, lat, lon


def reverse_edge_pairs(graph: RoadGraph) -> tuple[np.ndarray, np.ndarray]:
    """All pairs ``(e, f)`` where edge ``f`` drives edge ``e``'s road the other way.

    ``f`` is a reverse of ``e`` when ``tail[f] == head[e]``, ``head[f] == tail[e]`` and the
    interior geometry of ``f`` is that of ``e`` in reverse order, point for point (exact
    equality: both directions of a two-way OSM way share their nodes). Two parallel roads
    between the same nodes along different geometry are not each other's reverse. A self-loop
    whose geometry reads the same both ways is its own reverse.

    Returns
    -------
    e, f : int64[p]
        Sorted by ``(e, f)``; an edge may have several reverses (duplicate edges) or none.
    """
    n, m = graph.n_nodes, graph.n_edges
    if m == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    tail = np.asarray(graph.tail, dtype=np.int64)
    head = np.asarray(graph.head, dtype=np.int64)
    key = tail * n + head
    # compiled graphs are in CSR order, sorted by (tail, head): no sort needed then
    in_order = bool(np.all(key[1:] >= key[:-1]))
    order = np.arange(m, dtype=np.int64) if in_order else np.argsort(key, kind="stable")
    skey = key if in_order else key[order]
    # look the reversed keys up in sorted order (sequential memory access), then unsort
    want = head * n + tail
    by_want = np.argsort(want, kind="stable")
    lo_sorted = np.searchsorted(skey, want[by_want], side="left")
    hi_sorted = np.searchsorted(skey, want[by_want], side="right")
    lo = np.empty(m, dtype=np.int64)
    cnt = np.empty(m, dtype=np.int64)
    lo[by_want] = lo_sorted
    cnt[by_want] = hi_sorted - lo_sorted
    e = np.repeat(np.arange(m, dtype=np.int64), cnt)
    within = np.arange(e.shape[0], dtype=np.int64) - np.repeat(np.cumsum(cnt) - cnt, cnt)
    f = order[np.repeat(lo, cnt) + within]
    # same number of interior points, then every point equal to its mirror image
    gptr = np.asarray(graph.geom_indptr, dtype=np.int64)
    inner = np.diff(gptr)
    same = inner[e] == inner[f]
    e, f = e[same], f[same]
    lens = inner[e]
    pair = np.repeat(np.arange(e.shape[0], dtype=np.int64), lens)
    j = np.arange(pair.shape[0], dtype=np.int64) - np.repeat(np.cumsum(lens) - lens, lens)
    pe = gptr[e][pair] + j
    pf = gptr[f + 1][pair] - 1 - j
    differ = (graph.geom_lat[pe] != graph.geom_lat[pf]) | (graph.geom_lon[pe] != graph.geom_lon[pf])
    bad = np.bincount(pair[differ], minlength=e.shape[0]) > 0
    e, f = e[~bad], f[~bad]
    # e is non-decreasing already; f only needs sorting where an edge has several reverses
    if e.size > 1 and bool(np.any((e[1:] == e[:-1]) & (f[1:] < f[:-1]))):
        order2 = np.lexsort((f, e))
        e, f = e[order2], f[order2]
    return e, f


def _unit_vectors(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    la, lo = np.radians(lat), np.radians(lon)
    return np.column_stack((np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)))


def great_circle_m(lat1: Any, lon1: Any, lat2: Any, lon2: Any) -> Any:
    """Haversine distance in metres on a sphere of radius :data:`EARTH_RADIUS_M` (as osmnx)."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dphi = p2 - p1
    dlmb = np.radians(np.asarray(lon2) - np.asarray(lon1))
    a = np.sin(dphi / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dlmb / 2) ** 2
    return 2.0 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))


# --------------------------------------------------------------------------------------------
# Building


def hilbert_order(lat: np.ndarray, lon: np.ndarray, bits: int = 16) -> np.ndarray:
    """Permutation that sorts nodes along a Hilbert curve over their bounding box.

    Nodes close on the map end up close in memory, so a search touches fewer cache lines.
    """
    n = lat.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    side = (1 << bits) - 1

    def scale(v: np.ndarray) -> np.ndarray:
        lo, hi = float(np.min(v)), float(np.max(v))
        span = hi - lo if hi > lo else 1.0
        return np.minimum(((v - lo) / span * side).astype(np.int64), side)

    x, y = scale(lon), scale(lat)
    d = np.zeros(n, dtype=np.int64)
    s = 1 << (bits - 1)
    while s > 0:
        rx = ((x & s) > 0).astype(np.int64)
        ry = ((y & s) > 0).astype(np.int64)
        d += s * s * ((3 * rx) ^ ry)
        # rotate the quadrant so the curve stays continuous
        flip = ry == 0
        swap_x = flip & (rx == 1)
        x = np.where(swap_x, side - x, x)
        y = np.where(swap_x, side - y, y)
        x, y = np.where(flip, y, x), np.where(flip, x, y)
        s >>= 1
    return np.argsort(d, kind="stable")


def build_graph(
    *,
    lat: np.ndarray,
    lon: np.ndarray,
    osm_id: np.ndarray,
    tail: np.ndarray,
    head: np.ndarray,
    length_m: np.ndarray,
    speed_kph: np.ndarray,
    road_class: np.ndarray,
    speed_source: np.ndarray,
    geom_indptr: np.ndarray | None = None,
    geom_lat: np.ndarray | None = None,
    geom_lon: np.ndarray | None = None,
    way_indptr: np.ndarray | None = None,
    way_id: np.ndarray | None = None,
    turn_indptr: np.ndarray | None = None,
    turn_edges: np.ndarray | None = None,
    turn_kind: np.ndarray | None = None,
    meta: dict[str, Any] | None = None,
    spatial_order: bool = True,
) -> RoadGraph:
    """Assemble a :class:`RoadGraph` from node and edge lists.

    Parameters
    ----------
    lat, lon : float64[n]
    osm_id : int64[n]
    tail, head : int[m]
        Edge endpoints as node indices into ``lat``/``lon``.
    length_m, speed_kph : float[m]
        ``travel_time_s`` is computed as ``length_m / (speed_kph / 3.6)``.
    road_class, speed_source : int8[m]
    geom_indptr, geom_lat, geom_lon : optional
        Interior geometry per input edge, in the input edge order.
    way_indptr, way_id : optional
        OSM way ids along each input edge (``way_id[way_indptr[e]:way_indptr[e + 1]]``).
    turn_indptr, turn_edges, turn_kind : optional
        Turn restrictions as sequences of *input* edge indices (see the module docstring);
        renumbered here with the edges.
    spatial_order : bool
        Renumber nodes along a Hilbert curve (see :func:`hilbert_order`).
    """
    n = int(lat.shape[0])
    m = int(tail.shape[0])
    tail = np.asarray(tail, dtype=np.int64)
    head = np.asarray(head, dtype=np.int64)
    if m and (tail.min() < 0 or head.min() < 0 or tail.max() >= n or head.max() >= n):
        raise InvalidRequest("edge endpoints must be node indices in 0..n-1")
    speed_kph = np.asarray(speed_kph, dtype=np.float32)
    if m and not np.all(speed_kph > 0):
        raise InvalidRequest("every edge needs a positive speed")
    if geom_indptr is None:
        geom_indptr = np.zeros(m + 1, dtype=np.int64)
        geom_lat = np.zeros(0)
        geom_lon = np.zeros(0)
    assert geom_lat is not None and geom_lon is not None
    if way_indptr is None:
        way_indptr = np.zeros(m + 1, dtype=np.int64)
        way_id = np.zeros(0, dtype=np.int64)
    assert way_id is not None
    if turn_indptr is None:
        turn_indptr = np.zeros(1, dtype=np.int64)
        turn_edges = np.zeros(0, dtype=np.int64)
        turn_kind = np.zeros(0, dtype=np.int8)
    assert turn_edges is not None and turn_kind is not None

    # Node renumbering: new index of old node i is rank[i].
    perm = hilbert_order(lat, lon) if spatial_order else np.arange(n)
    rank = np.empty(n, dtype=np.int64)
    rank[perm] = np.arange(n)
    tail, head = rank[tail], rank[head]

    # CSR order: by tail, then head, input order among parallel edges (one stable sort of a
    # combined key: the same order as lexsort((head, tail)), in less time)
    order = np.argsort(tail * np.int64(max(n, 1)) + head, kind="stable")
    counts = np.bincount(tail, minlength=n)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])

    new_gptr, gsel = _permute_ragged(np.asarray(geom_indptr, dtype=np.int64), order)
    new_wptr, wsel = _permute_ragged(np.asarray(way_indptr, dtype=np.int64), order)
    edge_rank = np.empty(m, dtype=np.int64)  # new index of input edge e
    edge_rank[order] = np.arange(m)
    turn_edges_in = np.asarray(turn_edges, dtype=np.int64)
    if turn_edges_in.size and (turn_edges_in.min() < 0 or turn_edges_in.max() >= m):
        raise InvalidRequest("turn restrictions must name input edge indices in 0..m-1")

    length = np.asarray(length_m, dtype=np.float64)[order]
    speed = speed_kph[order]
    travel = length / (speed.astype(np.float64) / 3.6)
    head_sorted = head[order].astype(np.int32)

    csr = csr_matrix((np.ones(m, dtype=np.int8), head_sorted, indptr), shape=(n, n))
    _, labels = connected_components(csr, directed=True, connection="strong")

    info = dict(meta or {})
    info.setdefault("road_classes", [])
    info["format_version"] = FORMAT_VERSION
    info["spatial_order"] = "hilbert" if spatial_order else "input"
    return RoadGraph(
        indptr=indptr,
        head=head_sorted,
        travel_time_s=travel,
        length_m=length,
        speed_kph=speed,
        road_class=np.asarray(road_class, dtype=np.int8)[order],
        speed_source=np.asarray(speed_source, dtype=np.int8)[order],
        lat=np.asarray(lat, dtype=np.float64)[perm],
        lon=np.asarray(lon, dtype=np.float64)[perm],
        osm_id=np.asarray(osm_id, dtype=np.int64)[perm],
        component=labels.astype(np.int32),
        geom_indptr=new_gptr,
        geom_lat=np.asarray(geom_lat, dtype=np.float64)[gsel],
        geom_lon=np.asarray(geom_lon, dtype=np.float64)[gsel],
        way_indptr=new_wptr,
        way_id=np.asarray(way_id, dtype=np.int64)[wsel],
        turn_indptr=np.asarray(turn_indptr, dtype=np.int64),
        turn_edges=edge_rank[turn_edges_in].astype(np.int32),
        turn_kind=np.asarray(turn_kind, dtype=np.int8),
        meta=info,
    )


def _permute_ragged(indptr: np.ndarray, order: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Reorder the rows of a ragged array (``indptr`` form) to ``order``.

    Returns ``(new_indptr, select)``: row ``e`` of the result is row ``order[e]`` of the input,
    and ``values[select]`` are the reordered values. Vectorised: one ``np.arange`` per row is
    too slow for million-edge graphs.
    """
    lens = np.diff(indptr)[order]
    new_ptr = np.zeros(order.shape[0] + 1, dtype=np.int64)
    np.cumsum(lens, out=new_ptr[1:])
    within = np.arange(int(new_ptr[-1]), dtype=np.int64) - np.repeat(new_ptr[:-1], lens)
    return new_ptr, np.repeat(indptr[order], lens) + within


# --------------------------------------------------------------------------------------------
# Saving and loading


def save_graph(graph: RoadGraph, path: str | Path) -> Path:
    """Write ``graph`` as one uncompressed ``.npz`` (atomically: temp file, then rename)."""
    path = Path(path)
    if path.suffix != ".npz":
        raise InvalidRequest(f"a compiled graph file must end in .npz, got {path.name!r}")
    path.parent.mkdir(parents=True, exist_ok=True)
    arrays: dict[str, Any] = {
        name: np.ascontiguousarray(getattr(graph, name), dtype=dt)
        for name, dt in ALL_ARRAYS.items()
    }
    meta = dict(graph.meta)
    meta["format_version"] = FORMAT_VERSION
    meta["nodes"], meta["edges"] = graph.n_nodes, graph.n_edges
    tmp = path.with_name(path.name + ".tmp")
    write_npz_aligned(tmp, {"meta": np.array(json.dumps(meta, sort_keys=True)), **arrays})
    tmp.replace(path)
    return path


#: Data of every array in files we write starts on this boundary (a cache line).
NPZ_ALIGN = 64

_PAD_EXTRA_ID = 0xD0E5  #: zip "extra field" id of our padding (readers skip unknown ids)


def write_npz_aligned(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """Write ``arrays`` as an uncompressed ``.npz`` whose array data start on
    :data:`NPZ_ALIGN`-byte boundaries of the file, so memory-mapped rows line up with cache lines.

    A plain ``numpy.savez`` file (``numpy.load`` reads this one unchanged): each member's local
    zip header gets an extra field of padding (a standard zip mechanism, APPNOTE 4.5), and the
    ``.npy`` header inside is itself padded to 64 bytes by numpy. Written to ``path`` directly
    (callers write to a temporary name and rename).
    """
    import io

    with open(path, "wb") as raw, zipfile.ZipFile(raw, "w", zipfile.ZIP_STORED) as zf:
        for name, arr in arrays.items():
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.asanyarray(arr), allow_pickle=False)
            data = buf.getvalue()
            fname = name + ".npy"
            info = zipfile.ZipInfo(fname, date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_STORED
            start = raw.tell() + 30 + len(fname.encode())
            pad = (-start) % NPZ_ALIGN
            if 0 < pad < 4:
                pad += NPZ_ALIGN
            if pad:
                info.extra = (
                    _PAD_EXTRA_ID.to_bytes(2, "little")
                    + (pad - 4).to_bytes(2, "little")
                    + bytes(pad - 4)
                )
            zf.writestr(info, data)


def _npz_member_offsets(path: Path) -> dict[str, tuple[int, np.dtype, tuple[int, ...], bool]]:
    """Locate each stored ``.npy`` member's data: (offset, dtype, shape, fortran_order)."""
    out = {}
    with zipfile.ZipFile(path) as zf, open(path, "rb") as raw:
        for info in zf.infolist():
            if not info.filename.endswith(".npy"):
                continue
            if info.compress_type != zipfile.ZIP_STORED:
                raise CorruptGraphFile(
                    f"{path}: member {info.filename} is compressed; cannot map it"
                )
            raw.seek(info.header_offset)
            local = raw.read(30)
            if local[:4] != b"PK\x03\x04":
                raise CorruptGraphFile(f"{path}: bad zip header for {info.filename}")
            name_len = int.from_bytes(local[26:28], "little")
            extra_len = int.from_bytes(local[28:30], "little")
            raw.seek(info.header_offset + 30 + name_len + extra_len)
            version = np.lib.format.read_magic(raw)
            if version == (1, 0):
                shape, fortran, dtype = np.lib.format.read_array_header_1_0(raw)
            else:
                shape, fortran, dtype = np.lib.format.read_array_header_2_0(raw)
            out[info.filename[:-4]] = (raw.tell(), dtype, shape, fortran)
    return out


def load_graph(path: str | Path, *, mmap: bool = True) -> RoadGraph:
    """Load a compiled graph; with ``mmap`` the arrays are read-only views of the file.

    Raises :class:`GraphFileNotFound` or :class:`CorruptGraphFile` with the reason.
    """
    path = Path(path)
    if not path.is_file():
        raise GraphFileNotFound(f"graph file not found: {path}")
    try:
        members = _npz_member_offsets(path)
        with np.load(path, allow_pickle=False) as npz:
            meta = json.loads(str(npz["meta"][()]))
            if not isinstance(meta, dict):
                raise CorruptGraphFile(f"{path}: meta is not a JSON object")
            version = meta.get("format_version", MIN_FORMAT_VERSION)
            if not (isinstance(version, int) and MIN_FORMAT_VERSION <= version <= FORMAT_VERSION):
                raise CorruptGraphFile(
                    f"{path}: graph file format version {version!r}; this dueroute reads "
                    f"versions {MIN_FORMAT_VERSION}..{FORMAT_VERSION} (re-import the map with "
                    "this version)"
                )
            wanted = ALL_ARRAYS if version >= 2 else REQUIRED_ARRAYS
            missing = sorted(set(wanted) - set(npz.files))
            if missing:
                raise CorruptGraphFile(f"{path}: not a dueroute graph, missing arrays {missing}")
            arrays: dict[str, np.ndarray] = {}
            for name, dtype in wanted.items():
                if mmap:
                    offset, dt, shape, fortran = members[name]
                    if dt.hasobject:
                        raise CorruptGraphFile(f"{path}: array {name} holds Python objects")
                    count = int(np.prod(shape)) if shape else 1
                    if count == 0:
                        arr = np.zeros(shape, dtype=dt)
                    else:
                        arr = np.memmap(
                            path,
                            dtype=dt,
                            mode="r",
                            offset=offset,
                            shape=shape,
                            order="F" if fortran else "C",
                        )
                else:
                    arr = npz[name]
                if arr.dtype != np.dtype(dtype):
                    raise CorruptGraphFile(
                        f"{path}: array {name} has dtype {arr.dtype}, expected {np.dtype(dtype)}"
                    )
                arrays[name] = arr
    except CorruptGraphFile:
        raise
    except (
        zipfile.BadZipFile,
        ValueError,
        OSError,
        KeyError,
        EOFError,
        json.JSONDecodeError,
    ) as exc:
        raise CorruptGraphFile(f"{path}: not a readable compiled graph ({exc})") from exc
    graph = RoadGraph(**arrays, meta=meta, path=path)
    _validate(graph)
    return graph


def _validate(g: RoadGraph) -> None:
    """Structural checks so a truncated or hand-edited file fails loudly at load, not mid-search.

    Every index array is checked against the range it indexes, every position and cost for
    finiteness: a search trusts these arrays without bounds checks.
    """
    n, m = g.n_nodes, g.n_edges
    where = g.path or "graph"
    problems: list[str] = []

    def pointer(name: str, ptr: np.ndarray, rows: int, total: int, of: str) -> None:
        if ptr.shape != (rows + 1,):
            problems.append(f"{name} has {ptr.shape[0]} entries, expected {rows + 1}")
        elif ptr[0] != 0 or ptr[-1] != total or (rows and bool(np.any(np.diff(ptr) < 0))):
            problems.append(f"{name} is not a non-decreasing pointer from 0 to {total} ({of})")

    pointer("indptr", g.indptr, n, m, "the edge count")
    for name in _NODE_ARRAYS:
        if getattr(g, name).shape != (n,):
            problems.append(f"{name} has shape {getattr(g, name).shape}, expected ({n},)")
    for name in _EDGE_ARRAYS:
        if getattr(g, name).shape != (m,):
            problems.append(f"{name} has shape {getattr(g, name).shape}, expected ({m},)")
    if g.geom_lat.shape != g.geom_lon.shape or g.geom_lat.ndim != 1:
        problems.append("geom_lat and geom_lon must be one-dimensional and of equal length")
    else:
        pointer("geom_indptr", g.geom_indptr, m, g.geom_lat.shape[0], "the geometry points")
    pointer("way_indptr", g.way_indptr, m, g.way_id.shape[0], "the way ids")
    r = g.turn_kind.shape[0]
    pointer("turn_indptr", g.turn_indptr, r, g.turn_edges.shape[0], "the restriction edges")
    if problems:  # the value checks below index with these shapes
        raise CorruptGraphFile(f"{where}: " + "; ".join(problems))

    def in_range(name: str, arr: np.ndarray, hi: int) -> None:
        if arr.size and (int(arr.min()) < 0 or int(arr.max()) >= hi):
            problems.append(f"{name} holds indices outside 0..{hi - 1}")

    in_range("head", g.head, n)
    in_range("component", g.component, max(n, 1))
    in_range("turn_edges", g.turn_edges, max(m, 1))
    finite = (
        ("lat", g.lat, -90.0, 90.0),
        ("lon", g.lon, -180.0, 180.0),
        ("geom_lat", g.geom_lat, -90.0, 90.0),
        ("geom_lon", g.geom_lon, -180.0, 180.0),
    )
    for name, arr, lo, hi in finite:
        if arr.size and not bool(np.all((arr >= lo) & (arr <= hi))):  # NaN fails both
            problems.append(f"{name} holds values that are not finite degrees in [{lo:g}, {hi:g}]")
    if m:
        if not bool(np.all(np.isfinite(g.travel_time_s))) or float(g.travel_time_s.min()) < 0:
            problems.append("travel_time_s holds negative or non-finite costs")
        if not bool(np.all(np.isfinite(g.length_m))) or float(g.length_m.min()) < 0:
            problems.append("length_m holds negative or non-finite lengths")
        if not bool(np.all(g.speed_kph > 0)) or not bool(np.all(np.isfinite(g.speed_kph))):
            problems.append("speed_kph holds speeds that are not finite and positive")
    if r:
        lens = np.diff(g.turn_indptr)
        if int(lens.min()) < 2:
            problems.append("a turn restriction has fewer than two edges")
        elif not bool(np.all((g.turn_kind == TURN_NO) | (g.turn_kind == TURN_ONLY))):
            problems.append(
                f"turn_kind holds values other than {TURN_NO} (no) and {TURN_ONLY} (only)"
            )
        elif not problems:
            # consecutive edges of one restriction must meet: head of one = tail of the next
            seq = np.asarray(g.turn_edges, dtype=np.int64)
            last = np.asarray(g.turn_indptr[1:], dtype=np.int64) - 1
            pair = np.ones(seq.shape[0], dtype=bool)
            pair[last] = False  # no pair from a restriction's last edge to the next's first
            pair[-1] = False
            i = np.flatnonzero(pair)
            if i.size and not bool(np.all(g.head[seq[i]] == g.tail[seq[i + 1]])):
                problems.append("a turn restriction's edges do not follow each other")
    if problems:
        raise CorruptGraphFile(f"{where}: " + "; ".join(problems))
