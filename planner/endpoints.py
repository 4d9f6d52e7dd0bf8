"""Where a route starts and ends, in the graph the kernel searches.

A route may start and end at a road node or at a point snapped onto a road
(:class:`dueroute.planner.snap.RoadSnap`), and the kernel may search the road graph itself or
the search graph of legal drives under turn restrictions (:mod:`dueroute.planner.turns`). This
module turns the two ends into what the kernel takes, and a found path back into a road route:

* **sources** ``(search node, start cost)``: a road node starts at itself on the road graph,
  or, under turn rules, at the state after each of its out-edges (a start has no arrival, so no
  turn); a point on an edge starts at the edge's head with the rest of the edge's cost, for
  each legal direction of the road;
* **targets**: a road node is reached on arrival (at any of its states); a point on an edge is
  an *exit* from the edge's tail (from each state allowed to take the edge, with that turn's
  cost) plus the first part of the edge's cost;
* **direct routes** that need no search: a source that already is the destination, and an
  origin and destination on the same edge, the origin first;
* the target's position and landmark row for the heuristic (see below);
* :func:`assemble`: the kernel's path of search nodes and arcs as road nodes and edges, with
  the partial edges at either end (:class:`PartialEdge`) and the route's cost.

The target's landmark row (ALT, Goldberg & Harrelson 2005, in 16-bit codes, see
``planner.heuristics``)
----------------------------------------------------------------------------------------
With targets ``T_k`` (search nodes, each plus an exit cost ``x_k``, 0 for an arrival) the route
ends at the point ``T`` reached through one of them. For a landmark ``l``:

* ``d(l -> T) = min_k (d(l -> T_k) + x_k)``, so the forward term ``d(l -> T) - d(l -> v)`` stays
  a lower bound on ``d(v -> T)`` with ``tlm[FROM] = floor(min_k (code_from(T_k) + x_k / unit))``;
* from ``T`` a drive can go on to the node ``c_k`` that the edge leads to (for an arrival,
  ``c_k = T_k`` at no cost) at cost ``r_k``, so ``d(v -> l) <= d(v -> T) + max_k (r_k +
  d(c_k -> l))`` and the backward term uses ``tlm[TO] = ceil(max_k (code_to(c_k) + r_k /
  unit))``.

Rounding the safe way adds nothing to the slack that ``planner.heuristics`` proves for the
stored codes; "no path" codes (65535) are kept as such, which the kernel reads admissibly.
"""

from __future__ import annotations

import math
import threading
import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np

from dueroute.planner import _kernel as K
from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import RoadGraph, great_circle_m
from dueroute.planner.snap import RoadSnap, SnapSide
from dueroute.planner.turns import SearchGraph, TurnProfile, build_search_graph

Position = tuple[float, float]


@dataclass(frozen=True)
class PartialEdge:
    """Part of one road edge at an end of a route (GeoJSON positions, RFC 7946 order).

    ``from_fraction`` .. ``to_fraction`` along the edge by length (0 at its tail, 1 at its
    head); ``cost_s`` the travel time of that part under the costs searched.
    """

    edge: int
    from_fraction: float
    to_fraction: float
    cost_s: float
    coords: tuple[Position, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "edge": self.edge,
            "from_fraction": self.from_fraction,
            "to_fraction": self.to_fraction,
            "cost_s": self.cost_s,
        }


@dataclass(frozen=True)
class Source:
    state: int
    g0: float
    edge: int = -1  #: a road edge driven before the state (a node start under turn rules)
    side: SnapSide | None = None  #: the point start's side


@dataclass(frozen=True)
class Target:
    state: int
    kind: int  #: K.ARRIVAL or K.EXIT
    exit_cost: float  #: for an exit: turn cost + the edge's cost up to the point
    arc: int = -1  #: the arc driven from the state onto the edge (an exit)
    side: SnapSide | None = None
    cont_state: int = -1  #: where a drive through the point goes on (heuristic row)
    cont_cost: float = 0.0


@dataclass(frozen=True)
class Direct:
    """A route that needs no search."""

    cost: float
    source: int  #: index into the sources
    target: int = -1  #: index into the targets (a source that is an arrival target)
    partial: PartialEdge | None = None  #: an origin and destination on the same edge


# ------------------------------------------------------------------------------------------
# The graph the kernel searches


_KERNEL_GRAPHS: weakref.WeakKeyDictionary[
    RoadGraph, dict[TurnProfile, tuple[SearchGraph, RoadGraph]]
] = weakref.WeakKeyDictionary()
_KG_LOCK = threading.Lock()


def search_graph_for(
    graph: RoadGraph, profile: TurnProfile | None = None
) -> tuple[SearchGraph, RoadGraph]:
    """The search graph of ``graph``'s legal drives under a turn ``profile`` (default: U-turns
    banned at junctions, no turn costs) and the :class:`RoadGraph` the kernel searches
    (``graph`` itself when there are neither restrictions nor turn costs), built once per graph
    and profile.

    The kernel graph of a graph with restrictions has one node per search state (at its road
    node's position) and one edge per arc, with the arcs' costs; landmarks for it are stored
    beside the graph as ``<graph>.turns.landmarks.npz`` (its ``path`` is ``<graph>.turns.npz``,
    a name only; ``<graph>.turns-<profile tag>.npz`` for another profile).
    """
    profile = TurnProfile() if profile is None else profile
    with _KG_LOCK:
        found = _KERNEL_GRAPHS.get(graph, {}).get(profile)
        if found is not None:
            return found
    sg = build_search_graph(graph, uturns=profile.uturns, turn_costs=profile.costs)
    kg = graph if sg.identity else _as_road_graph(graph, sg, profile)
    with _KG_LOCK:
        _KERNEL_GRAPHS.setdefault(graph, {})[profile] = (sg, kg)
    return sg, kg


def planning_graph(graph: RoadGraph, profile: TurnProfile | None = None) -> RoadGraph:
    """The graph ALT landmarks must be built on for searches of ``graph`` (under ``profile``)."""
    return search_graph_for(graph, profile)[1]


def legal_distances(
    graph: RoadGraph,
    origins: Any,
    profile: TurnProfile | None = None,
    road_costs: np.ndarray | None = None,
) -> np.ndarray:
    """float64[len(origins), n_nodes]: the cheapest legal drive from each origin road node to
    every road node, computed with ``scipy.sparse.csgraph.dijkstra`` (the reference the
    benchmarks and the load tester check answers against).

    On a graph without turn rules this is Dijkstra on the road graph. Under turn rules it runs
    on the search graph of legal drives plus one start node per road node, with an arc to the
    state after each of its out-edges at that edge's cost (a start has no arrival, so no turn;
    as :func:`resolve` starts a search), and a road node's distance is the least over its
    states. ``road_costs``: live costs (default the graph's).
    """
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import dijkstra

    road = np.asarray(graph.travel_time_s if road_costs is None else road_costs, np.float64)
    idx = np.asarray(origins, dtype=np.int64)
    sg, _ = search_graph_for(graph, profile)
    if sg.identity:
        return np.atleast_2d(dijkstra(graph.csr(road), directed=True, indices=idx))
    s, n = int(sg.n_states), int(graph.n_nodes)
    arc_tail = np.repeat(np.arange(s), np.diff(np.asarray(sg.indptr)))
    entry = np.asarray(sg.entry_state, dtype=np.int64)
    usable = (entry >= 0) & np.isfinite(road)
    rows = np.concatenate([arc_tail, s + np.asarray(graph.tail, dtype=np.int64)[usable]])
    cols = np.concatenate([np.asarray(sg.head, dtype=np.int64), entry[usable]])
    data = np.concatenate([np.asarray(sg.arc_costs(road), np.float64), road[usable]])
    keep = np.isfinite(data)
    # parallel arcs keep the cheapest (a COO matrix would sum them); rows sorted, so the CSR
    # arrays are built directly, with zero-cost arcs as explicit entries (edges to csgraph)
    order = np.lexsort((data[keep], cols[keep], rows[keep]))
    r, c, d = rows[keep][order], cols[keep][order], data[keep][order]
    first = np.ones(r.shape[0], dtype=bool)
    first[1:] = (r[1:] != r[:-1]) | (c[1:] != c[:-1])
    r, c, d = r[first], c[first], d[first]
    indptr = np.zeros(s + n + 1, dtype=np.int64)
    np.add.at(indptr, r + 1, 1)
    csr = csr_matrix((d, c, np.cumsum(indptr)), shape=(s + n, s + n))
    dist = np.atleast_2d(dijkstra(csr, directed=True, indices=s + idx))
    out = np.full((idx.shape[0], n), np.inf)
    node_road = np.asarray(sg.node_road, dtype=np.int64)
    for i in range(idx.shape[0]):
        np.minimum.at(out[i], node_road, dist[i, :s])
        out[i, idx[i]] = 0.0
    return out


def _as_road_graph(graph: RoadGraph, sg: SearchGraph, profile: TurnProfile) -> RoadGraph:
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import connected_components

    s, a = sg.n_states, sg.n_arcs
    nr = np.asarray(sg.node_road, dtype=np.int64)
    re = np.asarray(sg.road_edge, dtype=np.int64)
    csr = csr_matrix((np.ones(a, dtype=np.int8), np.asarray(sg.head), sg.indptr), shape=(s, s))
    _, labels = connected_components(csr, directed=True, connection="strong")
    meta = {
        "name": f"{graph.name} (turn rules)",
        "road_classes": graph.meta.get("road_classes", []),
        "search_graph": dict(sg.info),
        "turn_profile": profile.describe(),
    }
    suffix = ".turns.npz" if profile.is_default else f".turns-{profile.tag}.npz"
    path = None if graph.path is None else graph.path.with_name(graph.path.stem + suffix)
    return RoadGraph(
        indptr=np.asarray(sg.indptr, dtype=np.int64),
        head=np.asarray(sg.head, dtype=np.int32),
        travel_time_s=np.asarray(sg.cost_s, dtype=np.float64),
        length_m=np.asarray(graph.length_m)[re],
        speed_kph=np.asarray(graph.speed_kph)[re],
        road_class=np.asarray(graph.road_class)[re],
        speed_source=np.asarray(graph.speed_source)[re],
        lat=np.asarray(graph.lat)[nr],
        lon=np.asarray(graph.lon)[nr],
        osm_id=np.asarray(graph.osm_id)[nr],
        component=labels.astype(np.int32),
        geom_indptr=np.zeros(a + 1, dtype=np.int64),
        geom_lat=np.zeros(0),
        geom_lon=np.zeros(0),
        meta=meta,
        path=path,
    )


# ------------------------------------------------------------------------------------------
# The two ends


@dataclass
class Ends:
    """Sources, targets and direct routes of one query (see the module docstring)."""

    sources: list[Source]
    targets: list[Target]
    directs: list[Direct]
    #: the point the route ends at (lat, lon), and whether the kernel may fill in the target
    #: itself (a road node on the road graph)
    target_lat: float
    target_lon: float
    node_target: bool
    graph: RoadGraph | None = None


def resolve(
    sg: SearchGraph,
    road_cost: np.ndarray,
    origin: int | RoadSnap,
    destination: int | RoadSnap,
) -> Ends:
    """Sources, targets and direct routes for ``origin`` -> ``destination`` (node indices or
    snapped points) on ``sg`` under road edge costs ``road_cost``."""
    g = sg.graph
    sources: list[Source] = []
    if isinstance(origin, RoadSnap):
        for side in origin.sides:
            e = side.edge
            sources.append(
                Source(
                    int(sg.entry_state[e]), (1.0 - side.fraction) * float(road_cost[e]), side=side
                )
            )
    elif sg.identity:
        sources.append(Source(int(origin), 0.0))
    else:
        edges = g.edges_of(int(origin))
        for e in range(edges.start, edges.stop):
            c = float(road_cost[e])
            if math.isfinite(c):
                sources.append(Source(int(sg.entry_state[e]), c, edge=e))
    targets: list[Target] = []
    if isinstance(destination, RoadSnap):
        for side in destination.sides:
            e = side.edge
            part = side.fraction * float(road_cost[e])
            rest = (1.0 - side.fraction) * float(road_cost[e])
            for arc in np.asarray(sg.arcs_on(e)).tolist():
                tail = int(sg.arc_tail[arc]) if not sg.identity else int(g.tail[e])
                turn = 0.0 if sg.identity else float(sg.turn_cost_s[arc])
                targets.append(
                    Target(
                        tail,
                        K.EXIT,
                        turn + part,
                        arc=int(arc),
                        side=side,
                        cont_state=int(sg.entry_state[e]),
                        cont_cost=rest,
                    )
                )
        t_lat, t_lon = destination.lat, destination.lon
    else:
        t = int(destination)
        states = [t] if sg.identity else np.asarray(sg.target_states(t)).tolist()
        targets = [Target(int(s), K.ARRIVAL, 0.0, cont_state=int(s)) for s in states]
        t_lat, t_lon = float(g.lat[t]), float(g.lon[t])
    if len(targets) > K.MAX_TARGETS:
        raise InvalidRequest(
            f"the destination has {len(targets)} ways to be reached; at most {K.MAX_TARGETS} "
            "are supported"
        )
    directs: list[Direct] = []
    arrival = {tg.state: k for k, tg in enumerate(targets) if tg.kind == K.ARRIVAL}
    for i, src in enumerate(sources):
        if src.state in arrival:
            directs.append(Direct(src.g0, i, target=arrival[src.state]))
    if isinstance(origin, RoadSnap) and isinstance(destination, RoadSnap):
        for i, src in enumerate(sources):
            for dside in destination.sides:
                oside = src.side
                if oside is None or oside.edge != dside.edge:
                    continue
                if dside.fraction >= oside.fraction:
                    e = oside.edge
                    cost = (dside.fraction - oside.fraction) * float(road_cost[e])
                    coords = between(g, e, oside, dside)
                    piece = PartialEdge(e, oside.fraction, dside.fraction, cost, coords)
                    directs.append(Direct(cost, i, partial=piece))
    node_target = sg.identity and not isinstance(destination, RoadSnap)
    return Ends(sources, targets, directs, t_lat, t_lon, node_target, g)


def target_row(lm: np.ndarray, unit_s: float, targets: list[Target]) -> np.ndarray:
    """int64[2L]: the target's landmark row in codes, rounded the safe way (module docstring)."""
    n_lm = lm.shape[1]
    out = np.empty(2 * n_lm, dtype=np.int64)
    for li in range(n_lm):
        worst_to = 0.0
        best_from = math.inf
        for tg in targets:
            to = int(lm[tg.cont_state, li, K.LM_TO])
            worst_to = max(worst_to, math.inf if to == K.LM_INF else to + tg.cont_cost / unit_s)
            fr = int(lm[tg.state, li, K.LM_FROM])
            if fr != K.LM_INF:
                best_from = min(best_from, fr + tg.exit_cost / unit_s)
        out[2 * li] = K.LM_INF if worst_to >= K.LM_INF else math.ceil(worst_to)
        out[2 * li + 1] = K.LM_INF if best_from >= K.LM_INF else math.floor(best_from)
    return out


def between(graph: RoadGraph, edge: int, a: SnapSide, b: SnapSide) -> tuple[Position, ...]:
    """Positions along ``edge`` from point ``a`` to point ``b`` (``a`` before ``b``): the
    first point, the edge's shape points strictly between them, the second point."""
    pts = graph.edge_coords(edge)  # (lon, lat) from tail to head
    lon = np.array([p[0] for p in pts])
    lat = np.array([p[1] for p in pts])
    seg = great_circle_m(lat[:-1], lon[:-1], lat[1:], lon[1:])
    total = float(seg.sum())
    along = np.concatenate(([0.0], np.cumsum(seg))) / total if total > 0 else np.zeros(len(pts))
    start = a.coords_to_head[0]
    end = b.coords_from_tail[-1]
    inner = [pts[i] for i in range(len(pts)) if a.fraction < along[i] < b.fraction]
    out = [start, *inner, end]
    if len(out) == 2 and out[0] == out[1]:
        return (start, end)
    return tuple(out)


# ------------------------------------------------------------------------------------------
# A found path as a road route


@dataclass(frozen=True)
class RoadRoute:
    """A route in road terms: full edges between the partial ones at its ends."""

    nodes: np.ndarray  #: int64[k + 1] road nodes of the full edges (empty: no full edge)
    edges: np.ndarray  #: int64[k] road edges driven in full
    start: PartialEdge | None
    end: PartialEdge | None
    cost_s: float


def assemble(
    sg: SearchGraph,
    ends: Ends,
    states: np.ndarray,
    arcs: np.ndarray,
    arc_cost: np.ndarray,
    road_cost: np.ndarray,
    source: int,
    target: int,
) -> RoadRoute:
    """The road route of a kernel path ``states`` (int64[k + 1], from source ``source``) along
    ``arcs`` (int64[k]) ending at target ``target`` (indices into ``ends``)."""
    src = ends.sources[source]
    tg = ends.targets[target]
    if sg.identity:
        nodes = np.asarray(states, dtype=np.int64)
        edges = np.asarray(arcs, dtype=np.int64)
    else:
        nodes = np.asarray(sg.node_road, dtype=np.int64)[states]
        edges = np.asarray(sg.road_edge, dtype=np.int64)[arcs]
    cost = src.g0 + float(np.sum(arc_cost[arcs])) + tg.exit_cost
    start = end = None
    if src.side is not None:
        s = src.side
        start = PartialEdge(s.edge, s.fraction, 1.0, src.g0, s.coords_to_head)
    elif src.edge >= 0:  # a node start under turn rules: the first edge before the state
        tail = int(sg.graph.tail[src.edge])
        nodes = np.concatenate(([tail], nodes))
        edges = np.concatenate(([src.edge], edges))
    if tg.kind == K.EXIT and tg.side is not None:
        s = tg.side
        part = s.fraction * float(road_cost[s.edge])
        end = PartialEdge(s.edge, 0.0, s.fraction, part, s.coords_from_tail)
    return RoadRoute(nodes, edges, start, end, cost)


def ends_graph(ends: Ends) -> RoadGraph:
    assert ends.graph is not None
    return ends.graph


def direct_route(ends: Ends, d: Direct) -> RoadRoute:
    """The road route of a direct route (no search)."""
    src = ends.sources[d.source]
    if d.partial is not None:
        empty = np.zeros(0, dtype=np.int64)
        return RoadRoute(empty, empty, d.partial, None, d.cost)
    nodes = np.zeros(0, dtype=np.int64)
    edges = np.zeros(0, dtype=np.int64)
    start = None
    if src.side is not None:  # from the point to the end of its edge: the destination node
        s = src.side
        start = PartialEdge(s.edge, s.fraction, 1.0, src.g0, s.coords_to_head)
    elif src.edge >= 0:  # a node start under turn rules whose first edge reaches the target
        g = ends_graph(ends)
        nodes = np.array([int(g.tail[src.edge]), int(g.head[src.edge])], dtype=np.int64)
        edges = np.array([src.edge], dtype=np.int64)
    return RoadRoute(nodes, edges, start, None, d.cost)
