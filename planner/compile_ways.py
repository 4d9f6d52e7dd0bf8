"""Compile OSM-style ways into road-graph edges, in bulk: no networkx graph on the way.

Shared by the streaming importer (:mod:`planner.osm_stream`) and the demo compiler
(``demo_data.build.compile_region``), so both follow one implementation of the rules the
osmnx importer (:mod:`planner.osm_import`, the reference) gets from osmnx:

1. **Node lists** lose consecutive duplicate refs (osmnx ``graph._convert_path``).
2. **Clipping**: a ref to a node missing from the file (a negative index) cuts the way there; every
   segment between two present nodes is kept (a bounding-box extract names nodes outside it).
3. **Directed segments** by the one-way rules (:func:`planner.osm_rules.way_direction`): a
   two-way way gives both directions, a one-way way only the allowed one; raw edges are kept
   in osmnx's insertion order (ways in file order, each way's forward edges, then its reverse
   copies), which decides which of two parallel segments a merged edge takes its tags from.
4. **Endpoint rule** (osmnx 2.x ``simplification._is_endpoint``): a node stays a graph node if
   it is a self-loop, has no incoming or no outgoing segment, does not have exactly two
   neighbours with degree 2 or 4, or is forced to stay (``keep_nodes``: turn restriction
   junctions, like osmnx's ``node_attrs_include``).
5. **Chain merging** (osmnx ``_get_paths_to_simplify`` / ``_build_path``): from every
   endpoint, every distinct successor that is not an endpoint starts a chain followed through
   the degree-2 nodes to the next endpoint; the chain becomes one edge whose length is the sum
   of its great-circle segment lengths (summed in travel order, as osmnx's ``sum``), whose
   geometry holds the interior nodes and whose way ids are the ways it runs along, in travel
   order. Segments between two endpoints stay edges of their own (parallel ones included).
   A chain that comes back to its start is a self-loop and is dropped (counted); components
   with no endpoint at all (isolated rings) are dropped like osmnx's ``remove_rings``.
6. **Tags to speed**: an edge's ``highway`` and ``maxspeed`` values are the distinct values of
   the ways along it (osmnx keeps the set of values of a merged edge), turned into a speed by
   :func:`planner.speeds.edge_speed` and a class by :func:`planner.speeds.road_class_index`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numba import njit
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import EARTH_RADIUS_M, RoadGraph, build_graph
from dueroute.planner.osm_rules import tokens
from dueroute.planner.speeds import edge_speed, road_class_index

#: ``--components`` choices: keep the largest strongly connected component, or everything.
COMPONENT_RULES = ("largest", "all")


@dataclass
class CompiledWays:
    """Edges compiled from ways, in the order :func:`compile_ways` emits them.

    Node arrays (``n`` output nodes) and edge arrays (``m`` edges) are ready for
    :func:`planner.graph.build_graph`; ``node_index`` maps output nodes back to the input
    node arrays. ``counts`` holds what was dropped and why (see :func:`compile_ways`).
    """

    node_index: np.ndarray  # int64[n]
    lat: np.ndarray  # float64[n]
    lon: np.ndarray  # float64[n]
    osm_id: np.ndarray  # int64[n]
    tail: np.ndarray  # int64[m]
    head: np.ndarray  # int64[m]
    length_m: np.ndarray  # float64[m]
    speed_kph: np.ndarray  # float32[m]
    speed_source: np.ndarray  # int8[m]
    road_class: np.ndarray  # int8[m]
    geom_indptr: np.ndarray  # int64[m + 1]
    geom_lat: np.ndarray  # float64[k]
    geom_lon: np.ndarray  # float64[k]
    way_indptr: np.ndarray  # int64[m + 1]
    way_id: np.ndarray  # int64[w]
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def n_nodes(self) -> int:
        return int(self.lat.shape[0])

    @property
    def n_edges(self) -> int:
        return int(self.tail.shape[0])

    def select(self, node_mask: np.ndarray) -> tuple[CompiledWays, np.ndarray]:
        """Keep the nodes in ``node_mask`` (bool[n]) and the edges between them.

        Returns the smaller graph and ``edge_map`` (int64[m]: new index of every old edge,
        -1 where it was dropped).
        """
        node_mask = np.asarray(node_mask, dtype=bool)
        keep_e = node_mask[self.tail] & node_mask[self.head]
        new_node = np.full(self.n_nodes, -1, dtype=np.int64)
        new_node[node_mask] = np.arange(int(node_mask.sum()))
        edges = np.flatnonzero(keep_e)
        edge_map = np.full(self.n_edges, -1, dtype=np.int64)
        edge_map[edges] = np.arange(edges.shape[0])
        gptr, gsel = _select_ragged(self.geom_indptr, edges)
        wptr, wsel = _select_ragged(self.way_indptr, edges)
        out = CompiledWays(
            node_index=self.node_index[node_mask],
            lat=self.lat[node_mask],
            lon=self.lon[node_mask],
            osm_id=self.osm_id[node_mask],
            tail=new_node[self.tail[edges]],
            head=new_node[self.head[edges]],
            length_m=self.length_m[edges],
            speed_kph=self.speed_kph[edges],
            speed_source=self.speed_source[edges],
            road_class=self.road_class[edges],
            geom_indptr=gptr,
            geom_lat=self.geom_lat[gsel],
            geom_lon=self.geom_lon[gsel],
            way_indptr=wptr,
            way_id=self.way_id[wsel],
            counts=dict(self.counts),
        )
        return out, edge_map

    def to_graph(
        self,
        *,
        meta: dict[str, Any],
        spatial_order: bool = True,
        turns: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
    ) -> RoadGraph:
        """:func:`planner.graph.build_graph` on these arrays (``turns`` in this edge order)."""
        turn_indptr, turn_edges, turn_kind = turns if turns is not None else (None, None, None)
        return build_graph(
            lat=self.lat,
            lon=self.lon,
            osm_id=self.osm_id,
            tail=self.tail,
            head=self.head,
            length_m=self.length_m,
            speed_kph=self.speed_kph,
            road_class=self.road_class,
            speed_source=self.speed_source,
            geom_indptr=self.geom_indptr,
            geom_lat=self.geom_lat,
            geom_lon=self.geom_lon,
            way_indptr=self.way_indptr,
            way_id=self.way_id,
            turn_indptr=turn_indptr,
            turn_edges=turn_edges,
            turn_kind=turn_kind,
            meta=meta,
            spatial_order=spatial_order,
        )


def unique_sorted(values: np.ndarray) -> np.ndarray:
    """Sorted distinct values of an integer array (``np.unique`` by sorting: numpy 2's
    hash-based ``np.unique`` is several times slower on millions of int64)."""
    s = np.sort(np.asarray(values), kind="stable")
    if s.shape[0] == 0:
        return s
    keep = np.empty(s.shape[0], dtype=bool)
    keep[0] = True
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]


def _select_ragged(indptr: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``rows`` (sorted or not) of a ragged array: ``(new_indptr, value_selection)``."""
    lens = np.diff(indptr)[rows]
    new_ptr = np.zeros(rows.shape[0] + 1, dtype=np.int64)
    np.cumsum(lens, out=new_ptr[1:])
    within = np.arange(int(new_ptr[-1]), dtype=np.int64) - np.repeat(new_ptr[:-1], lens)
    return new_ptr, np.repeat(indptr[rows], lens) + within


@njit(cache=True, nogil=True)
def _walk_chains(ptr, head, seg_len, endpoint, starts):  # pragma: no cover - numba
    """Follow every chain of degree-2 nodes (see the module docstring, step 5).

    ``ptr``/``head``/``seg_len``: raw directed segments in CSR order by tail. From every
    endpoint ``u``, each distinct successor that is not an endpoint starts a path, followed
    to the next endpoint as osmnx's ``_build_path`` does (it stops early where the only way on
    turns back, which parallel segments can cause). Returns ``(k, out_tail, out_head, out_len,
    out_ptr, out_raw, removed, self_loops)``: path ``i`` runs along raw segments
    ``out_raw[out_ptr[i]:out_ptr[i + 1]]``; ``removed`` marks the interior nodes of every path
    (osmnx removes them, and every segment touching them, from the graph); paths back to their
    start (self-loops) are counted, not returned.
    """
    m = head.shape[0]
    n = ptr.shape[0] - 1
    out_tail = np.empty(m, head.dtype)
    out_head = np.empty(m, head.dtype)
    out_len = np.empty(m, np.float64)
    out_ptr = np.zeros(m + 1, np.int64)
    out_raw = np.empty(m, np.int64)
    removed = np.zeros(n, np.bool_)
    k = 0
    r = 0
    self_loops = 0
    for i in range(starts.shape[0]):
        u = starts[i]
        for e in range(ptr[u], ptr[u + 1]):
            s = head[e]
            if endpoint[s]:
                continue  # a segment between two endpoints stays as it is
            # one path per distinct successor (osmnx iterates successor nodes, not edges)
            seen = False
            for f in range(ptr[u], e):
                if head[f] == s:
                    seen = True
                    break
            if seen:
                continue
            start = r
            out_raw[r] = e
            r += 1
            length = seg_len[e]
            prev = u
            v = s
            steps = 0
            while not endpoint[v] and steps <= m:
                steps += 1
                nxt = -1
                for f in range(ptr[v], ptr[v + 1]):
                    if head[f] != prev:
                        nxt = f
                        break
                if nxt < 0:
                    break  # the path ends at v, which stays a node unless another path has it
                removed[v] = True
                out_raw[r] = nxt
                r += 1
                length += seg_len[nxt]
                prev = v
                v = head[nxt]
            if v == u:  # the path came back to its start: a self-loop
                self_loops += 1
                r = start
                continue
            out_tail[k] = u
            out_head[k] = v
            out_len[k] = length
            k += 1
            out_ptr[k] = r
    return k, out_tail, out_head, out_len, out_ptr, out_raw, removed, self_loops


def segment_length_m(
    lat1: np.ndarray, lon1: np.ndarray, lat2: np.ndarray, lon2: np.ndarray
) -> np.ndarray:
    """Great-circle segment lengths in metres, operation for operation as osmnx 2.x
    ``distance.great_circle`` (haversine on a sphere of radius
    :data:`planner.graph.EARTH_RADIUS_M`), so compiled lengths equal osmnx's to the last bit.
    """
    y1, y2 = np.deg2rad(lat1), np.deg2rad(lat2)
    dy = y2 - y1
    dx = np.deg2rad(lon2) - np.deg2rad(lon1)
    h = np.sin(dy / 2) ** 2 + np.cos(y1) * np.cos(y2) * np.sin(dx / 2) ** 2
    h = np.minimum(1, h)
    arc = 2 * np.arcsin(np.sqrt(h))
    return arc * EARTH_RADIUS_M


def edge_attributes(highways: Sequence[Any], maxspeeds: Sequence[Any]) -> tuple[float, int, int]:
    """``(speed_kph, speed_source, road_class)`` of an edge along ways with these values.

    ``highways`` / ``maxspeeds`` are the distinct values along the edge (no None); one value
    is passed on as itself and several as a list, as osmnx stores a merged edge's tags.
    """
    hw: Any = highways[0] if len(highways) == 1 else list(highways)
    ms: Any = None if not maxspeeds else maxspeeds[0] if len(maxspeeds) == 1 else list(maxspeeds)
    speed, source = edge_speed(hw, ms)
    return float(speed), int(source), int(road_class_index(tokens(hw)))


def compile_ways(
    *,
    node_lat: np.ndarray,
    node_lon: np.ndarray,
    node_osm_id: np.ndarray,
    way_id: np.ndarray,
    way_ptr: np.ndarray,
    way_node: np.ndarray,
    way_direction: np.ndarray,
    way_attr: np.ndarray,
    attrs: Sequence[tuple[Any, Any]],
    keep_nodes: np.ndarray | None = None,
) -> CompiledWays:
    """Compile drivable ways into merged, directed road edges (see the module docstring).

    Parameters
    ----------
    node_lat, node_lon : float64[N]
        Positions of the nodes the ways may use, WGS84 degrees.
    node_osm_id : int64[N]
    way_id : int64[W]
        OSM way id of each way (recorded per edge in ``way_id``).
    way_ptr, way_node : int64[W + 1], int64[R]
        The node list of way ``i`` is ``way_node[way_ptr[i]:way_ptr[i + 1]]``, as indices into
        the node arrays; a negative value marks a node missing from the file (distinct missing
        nodes need distinct negative values: repeated refs are merged by value).
    way_direction : int8[W]
        :func:`planner.osm_rules.way_direction` of each way.
    way_attr : int[W]
        Index into ``attrs`` of each way's ``(highway, maxspeed)`` (maxspeed None if untagged).
    keep_nodes : bool[N], optional
        Nodes that must stay graph nodes (they end every edge through them).

    Returns
    -------
    CompiledWays
        ``counts``: ``self_loops`` (edges dropped), ``ring_segments`` (segments of isolated
        rings, dropped), ``ways_single_node`` (ways with fewer than two distinct nodes),
        ``ways_cut`` / ``ways_clipped_away`` (ways with missing nodes that kept some / no
        segment), ``segments_missing_nodes`` (segments with a missing end, dropped).
    """
    n_all = int(node_lat.shape[0])
    node_lat = np.asarray(node_lat, dtype=np.float64)
    node_lon = np.asarray(node_lon, dtype=np.float64)
    # Temporaries live inside the helpers, so each step frees its scratch arrays on return;
    # node and segment indices are int32 (half the memory of int64).
    a, b, seg_way, counts = _segments(np.asarray(way_ptr, np.int64), way_node, n_all)
    seg_len = segment_length_m(node_lat[a], node_lon[a], node_lat[b], node_lon[b])
    tail, head, raw_way, raw_len = _directed(a, b, seg_way, seg_len, way_direction)
    del a, b, seg_way, seg_len
    endpoint = _endpoints(tail, head, n_all, keep_nodes)

    # 5. chains, over the raw segments in CSR order by tail
    csr, ptr = _order_by_tail(tail, n_all)
    out_deg = np.diff(ptr)
    c_head, c_len, c_way = head[csr], raw_len[csr], raw_way[csr]
    del head, raw_len, raw_way, csr
    starts = np.flatnonzero(endpoint).astype(np.int64)
    k, p_tail, p_head, p_len, p_ptr, p_raw, removed, loops = _walk_chains(
        ptr, c_head, c_len, endpoint, starts
    )
    del starts
    counts["self_loops"] = int(loops)
    # What osmnx keeps: the segments whose ends it did not remove, then the merged paths
    # (build_graph's stable sort keeps that order within a node pair, as osmnx's adjacency).
    c_tail = np.repeat(np.arange(n_all, dtype=c_head.dtype), out_deg)
    alive = ((out_deg > 0) | (np.bincount(c_head, minlength=n_all) > 0)) & ~removed
    del removed, out_deg, ptr
    if np.any(alive & ~endpoint):  # isolated rings (osmnx remove_rings), or odd path ends
        alive, ring_segments = _drop_rings(c_tail, c_head, alive, endpoint)
    else:
        ring_segments = 0
    counts["ring_segments"] = ring_segments
    raw_kept = np.flatnonzero(alive[c_tail] & alive[c_head])
    path_kept = np.flatnonzero(alive[p_head[:k]])
    path_len = np.diff(p_ptr[: k + 1])[path_kept]
    o_tail = np.concatenate([c_tail[raw_kept], p_tail[path_kept]])
    o_head = np.concatenate([c_head[raw_kept], p_head[path_kept]])
    o_len = np.concatenate([c_len[raw_kept], p_len[path_kept]])
    del c_tail, c_len, p_tail, p_head, p_len
    _, sel = _select_ragged(p_ptr[: k + 1], path_kept)
    o_raw = np.concatenate([raw_kept, p_raw[sel]])
    o_ptr = np.zeros(o_tail.shape[0] + 1, dtype=np.int64)
    np.cumsum(np.concatenate([np.ones(raw_kept.shape[0], np.int64), path_len]), out=o_ptr[1:])
    del p_raw, p_ptr, sel, path_len, raw_kept, path_kept
    k = o_tail.shape[0]

    # geometry: the head of every raw segment but the last of its edge
    last = np.zeros(o_raw.shape[0], dtype=bool)
    last[o_ptr[1:] - 1] = True
    interior = c_head[o_raw[~last]]
    del last, c_head
    geom_indptr = o_ptr - np.arange(k + 1, dtype=np.int64)
    geom_lat, geom_lon = node_lat[interior], node_lon[interior]
    del interior
    # way ids in travel order, consecutive repeats merged
    w_raw = c_way[o_raw]
    del c_way, o_raw
    new_run = np.ones(w_raw.shape[0], dtype=bool)
    new_run[1:] = w_raw[1:] != w_raw[:-1]
    new_run[o_ptr[:-1]] = True
    runs_before = np.zeros(w_raw.shape[0] + 1, dtype=np.int64)
    np.cumsum(new_run, out=runs_before[1:])
    way_indptr = runs_before[o_ptr]
    del runs_before
    edge_way_id = np.asarray(way_id, dtype=np.int64)[w_raw[new_run]]
    del new_run

    # 6. speeds and classes
    speed, source, cls = _edge_speeds(np.asarray(way_attr)[w_raw], o_ptr, attrs)
    del w_raw

    # output nodes: every node osmnx keeps (an endpoint whose only paths were self-loops too)
    used_nodes = np.flatnonzero(alive).astype(np.int64)
    renumber = np.full(n_all, -1, dtype=np.int64)
    renumber[used_nodes] = np.arange(used_nodes.shape[0])
    return CompiledWays(
        node_index=used_nodes,
        lat=node_lat[used_nodes],
        lon=node_lon[used_nodes],
        osm_id=np.asarray(node_osm_id, dtype=np.int64)[used_nodes],
        tail=renumber[o_tail],
        head=renumber[o_head],
        length_m=o_len,
        speed_kph=speed,
        speed_source=source,
        road_class=cls,
        geom_indptr=geom_indptr,
        geom_lat=geom_lat,
        geom_lon=geom_lon,
        way_indptr=way_indptr,
        way_id=edge_way_id,
        counts=counts,
    )


def _segments(
    way_ptr: np.ndarray, way_node: np.ndarray, n_nodes: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, int]]:
    """Steps 1-2: segments ``a[i] -> b[i]`` of way ``seg_way[i]`` between two present nodes,
    in way order, and the clipping counts."""
    n_ways = int(way_ptr.shape[0]) - 1
    node: np.ndarray = np.asarray(way_node).astype(np.int32 if n_nodes < 2**31 - 1 else np.int64)
    way_of = np.repeat(np.arange(n_ways, dtype=np.int32), np.diff(way_ptr))
    # 1. consecutive duplicate refs
    keep = np.ones(node.shape[0], dtype=bool)
    keep[1:] = (way_of[1:] != way_of[:-1]) | (node[1:] != node[:-1])
    node, way_of = node[keep], way_of[keep]
    del keep
    distinct = np.bincount(way_of, minlength=n_ways)
    # 2. segments and clipping
    seg = np.flatnonzero(way_of[1:] == way_of[:-1])  # segment i: node[seg] -> node[seg + 1]
    a, b, seg_way = node[seg], node[seg + 1], way_of[seg]
    del seg
    ok = (a >= 0) & (b >= 0)
    missing_ref = np.bincount(way_of[node < 0], minlength=n_ways) > 0
    kept_seg = np.bincount(seg_way[ok], minlength=n_ways) > 0
    counts = {
        "ways_single_node": int(np.sum(distinct < 2)),
        "ways_cut": int(np.sum(missing_ref & kept_seg)),
        "ways_clipped_away": int(np.sum(missing_ref & ~kept_seg & (distinct >= 2))),
        "segments_missing_nodes": int(np.sum(~ok)),
    }
    return a[ok], b[ok], seg_way[ok], counts


def _directed(
    a: np.ndarray, b: np.ndarray, seg_way: np.ndarray, seg_len: np.ndarray, way_direction: Any
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Step 3: directed raw segments ``(tail, head, way, length)`` in osmnx's insertion
    order, placed without sorting: way by way (file order), a two-way way's forward segments
    then their reverse copies, a reversed one-way way's segments from its last node back."""
    way_dir = np.asarray(way_direction, dtype=np.int8)
    n_ways = way_dir.shape[0]
    direction = way_dir[seg_way]
    n_seg_way = np.bincount(seg_way, minlength=n_ways)
    first_seg = np.zeros(n_ways + 1, dtype=np.int64)
    np.cumsum(n_seg_way, out=first_seg[1:])
    rank = np.arange(seg_way.shape[0], dtype=np.int64) - first_seg[seg_way]
    del first_seg
    slots = n_seg_way * np.where(way_dir == 0, 2, 1)
    base = np.zeros(n_ways + 1, dtype=np.int64)
    np.cumsum(slots, out=base[1:])
    n_raw = int(base[-1])
    tail = np.empty(n_raw, dtype=a.dtype)
    head = np.empty(n_raw, dtype=a.dtype)
    length = np.empty(n_raw, dtype=np.float64)
    forward = direction >= 0
    slot = base[seg_way] + np.where(forward, rank, n_seg_way[seg_way] - 1 - rank)
    tail[slot] = np.where(forward, a, b)
    head[slot] = np.where(forward, b, a)
    length[slot] = seg_len  # a segment has the same length both ways, bit for bit
    both = direction == 0
    slot = base[seg_way[both]] + n_seg_way[seg_way[both]] + rank[both]
    tail[slot], head[slot], length[slot] = b[both], a[both], seg_len[both]
    raw_way = np.repeat(np.arange(n_ways, dtype=np.int32), slots)
    return tail, head, raw_way, length


def _drop_rings(
    tail: np.ndarray, head: np.ndarray, alive: np.ndarray, endpoint: np.ndarray
) -> tuple[np.ndarray, int]:
    """osmnx ``remove_rings``: weakly connected components without an endpoint go.

    Returns the new ``alive`` mask and the number of segments dropped with them."""
    n = alive.shape[0]
    adj = csr_matrix((np.ones(tail.shape[0], dtype=np.int8), (tail, head)), shape=(n, n))
    _, label = connected_components(adj, directed=True, connection="weak")
    has_end = np.bincount(label[endpoint], minlength=int(label.max()) + 1) > 0
    ring = ~has_end[label]
    return alive & ~ring, int(np.sum(ring[tail]))


@njit(cache=True, nogil=True)
def _through_nodes(tail, head, n):  # pragma: no cover - numba
    """bool[n]: nodes that fail every endpoint rule of osmnx (no self-loop, segments in and
    out, exactly two neighbours with degree 2 or 4), in O(segments)."""
    m = tail.shape[0]
    out_deg = np.zeros(n, np.int64)
    in_deg = np.zeros(n, np.int64)
    for e in range(m):
        out_deg[tail[e]] += 1
        in_deg[head[e]] += 1
    start = np.zeros(n + 1, np.int64)
    for v in range(n):
        start[v + 1] = start[v] + out_deg[v] + in_deg[v]
    fill = start[:-1].copy()
    neighbour = np.empty(2 * m, tail.dtype)
    for e in range(m):
        t, h = tail[e], head[e]
        neighbour[fill[t]] = h
        fill[t] += 1
        neighbour[fill[h]] = t
        fill[h] += 1
    through = np.zeros(n, np.bool_)
    for v in range(n):
        d = out_deg[v] + in_deg[v]
        if (d != 2 and d != 4) or out_deg[v] == 0 or in_deg[v] == 0:
            continue
        a = neighbour[start[v]]
        b = -1
        ok = True
        for j in range(start[v], start[v + 1]):
            x = neighbour[j]
            if x == v:
                ok = False  # a self-loop
                break
            if x != a:
                if b == -1:
                    b = x
                elif x != b:
                    ok = False  # a third neighbour
                    break
        through[v] = ok and b != -1 and a != v
    return through


@njit(cache=True, nogil=True)
def _order_by_tail(tail, n):  # pragma: no cover - numba
    """Stable counting sort of segments by tail: ``(order, ptr)`` of the CSR."""
    m = tail.shape[0]
    ptr = np.zeros(n + 1, np.int64)
    for e in range(m):
        ptr[tail[e] + 1] += 1
    for v in range(n):
        ptr[v + 1] += ptr[v]
    fill = ptr[:-1].copy()
    order = np.empty(m, np.int64)
    for e in range(m):
        order[fill[tail[e]]] = e
        fill[tail[e]] += 1
    return order, ptr


def _endpoints(
    tail: np.ndarray, head: np.ndarray, n_nodes: int, keep_nodes: np.ndarray | None
) -> np.ndarray:
    """Step 4: bool[n] graph nodes by osmnx's endpoint rule (plus ``keep_nodes``); nodes
    without segments are not graph nodes."""
    endpoint = ~_through_nodes(tail, head, n_nodes)
    if keep_nodes is not None:
        endpoint |= np.asarray(keep_nodes, dtype=bool)
    endpoint &= (np.bincount(tail, minlength=n_nodes) + np.bincount(head, minlength=n_nodes)) > 0
    return endpoint


def _edge_speeds(
    raw_attr: np.ndarray, ptr: np.ndarray, attrs: Sequence[tuple[Any, Any]]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Speed, speed source and class per edge from the attributes of its raw segments."""
    k = ptr.shape[0] - 1
    table = [edge_attributes([hw], [] if ms is None else [ms]) for hw, ms in attrs]
    speed_of = np.array([t[0] for t in table] or [0.0], dtype=np.float32)
    source_of = np.array([t[1] for t in table] or [0], dtype=np.int8)
    class_of = np.array([t[2] for t in table] or [0], dtype=np.int8)
    if k == 0:
        return np.zeros(0, np.float32), np.zeros(0, np.int8), np.zeros(0, np.int8)
    lo = np.minimum.reduceat(raw_attr, ptr[:-1])
    hi = np.maximum.reduceat(raw_attr, ptr[:-1])
    speed, source, cls = speed_of[lo], source_of[lo], class_of[lo]
    cache: dict[tuple[int, ...], tuple[float, int, int]] = {}
    for e in np.flatnonzero(lo != hi).tolist():
        key = tuple(sorted(set(raw_attr[ptr[e] : ptr[e + 1]].tolist())))
        if key not in cache:
            highways = list(dict.fromkeys(attrs[i][0] for i in key))
            maxspeeds = list(dict.fromkeys(attrs[i][1] for i in key if attrs[i][1] is not None))
            cache[key] = edge_attributes(highways, maxspeeds)
        speed[e], source[e], cls[e] = cache[key]
    return speed, source, cls


def component_filter(
    n: int, tail: np.ndarray, head: np.ndarray, rule: str
) -> tuple[np.ndarray, dict[str, Any]]:
    """Nodes kept by the ``--components`` rule and a report of what the rule dropped.

    ``largest`` keeps the largest strongly connected component (ties: the first in scipy's
    labelling), ``all`` keeps every node. Returns ``(bool[n] mask, report)``.
    """
    if rule not in COMPONENT_RULES:
        raise InvalidRequest(
            f"unknown component rule {rule!r}; allowed: {', '.join(COMPONENT_RULES)}"
        )
    m = int(tail.shape[0])
    order, ptr = _order_by_tail(np.asarray(tail), n)
    adj = csr_matrix((np.ones(m, dtype=np.int8), np.asarray(head)[order], ptr), shape=(n, n))
    del order
    n_comp, labels = connected_components(adj, directed=True, connection="strong")
    sizes = np.bincount(labels, minlength=n_comp) if n else np.zeros(0, dtype=np.int64)
    report: dict[str, Any] = {"components": int(n_comp), "rule": rule}
    if rule == "all" or n == 0:
        report.update(kept_nodes=n, dropped_components=0, dropped_nodes=0, dropped_edges=0)
        return np.ones(n, dtype=bool), report
    biggest = int(np.argmax(sizes))
    mask = labels == biggest
    kept_edges = int(np.sum(mask[tail] & mask[head]))
    report.update(
        kept_nodes=int(sizes[biggest]),
        dropped_components=int(n_comp - 1),
        dropped_nodes=int(n - sizes[biggest]),
        dropped_edges=int(m - kept_edges),
    )
    return mask, report
