"""Turn restrictions as a search graph, against an independent construction.

The reference is built here with networkx: an explicit edge-expanded line graph of the road
graph (one node per road edge, arcs for the legal turns), with via-way restrictions enforced by
expanding each node with the set of restriction positions matched so far (a direct simulation
of every pattern, not the automaton ``planner.turns`` uses). Shortest legal costs on it come
from ``networkx.single_source_dijkstra_path_length``; shortest costs on the search graph come
from ``scipy.sparse.csgraph.dijkstra``. Turn angles of the reference come from geographiclib
(Karney 2013) azimuths on a sphere of the graph's radius. A third, direct check reads the
restriction rules straight off a drive (:func:`is_legal`).
"""

from __future__ import annotations

import dataclasses
import math
from collections import deque
from collections.abc import Sequence

import networkx as nx
import numpy as np
import pytest
from geographiclib.geodesic import Geodesic
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.graph import EARTH_RADIUS_M, RoadGraph, build_graph, great_circle_m
from dueroute.planner.turns import (
    TurnCosts,
    build_search_graph,
    check_restrictions,
    synthetic_restrictions,
)

#: geographiclib on the sphere osmnx and dueroute measure on (flattening 0).
SPHERE = Geodesic(EARTH_RADIUS_M, 0.0)

Road = tuple[int, int, bool, list[tuple[float, float]]]  # tail, head, two_way, interior


# ---------------------------------------------------------------------------------------------
# building road graphs by hand


def make_graph(
    nodes: Sequence[tuple[float, float]],
    roads: Sequence[Road],
    restrictions: Sequence[tuple[str, Sequence[int]]] = (),
    *,
    length_m: Sequence[float] | None = None,
    speed_kph: float | Sequence[float] = 36.0,
) -> RoadGraph:
    """Road graph with edges in (tail, head) order, so input edge i is compiled edge i.

    ``roads`` become one edge (one-way) or two (two-way: the reverse has the interior points
    reversed); ``restrictions`` name these edges in that sorted order (``edge_ids`` gives it).
    Lengths are great-circle lengths along the geometry unless ``length_m`` (per road) is given.
    """
    edges = []
    for r, (t, h, two_way, pts) in enumerate(roads):
        edges.append((t, h, list(pts), r))
        if two_way:
            edges.append((h, t, list(pts)[::-1], r))
    order = sorted(range(len(edges)), key=lambda i: (edges[i][0], edges[i][1]))
    edges = [edges[i] for i in order]
    lat = np.array([p[0] for p in nodes])
    lon = np.array([p[1] for p in nodes])
    glat: list[float] = []
    glon: list[float] = []
    gptr = [0]
    lengths = []
    for t, h, pts, r in edges:
        glat += [p[0] for p in pts]
        glon += [p[1] for p in pts]
        gptr.append(len(glat))
        ys = np.array([lat[t], *[p[0] for p in pts], lat[h]])
        xs = np.array([lon[t], *[p[1] for p in pts], lon[h]])
        geo = float(np.sum(great_circle_m(ys[:-1], xs[:-1], ys[1:], xs[1:])))
        lengths.append(geo if length_m is None else float(length_m[r]))
    m = len(edges)
    speeds = (
        np.full(m, float(speed_kph))
        if isinstance(speed_kph, (int, float))
        else np.array([speed_kph[e[3]] for e in edges])
    )
    ptr = [0]
    seq: list[int] = []
    kinds = []
    for kind, s in restrictions:
        seq += list(s)
        ptr.append(len(seq))
        kinds.append(0 if kind == "no" else 1)
    g = build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(len(nodes), dtype=np.int64),
        tail=np.array([e[0] for e in edges]),
        head=np.array([e[1] for e in edges]),
        length_m=np.array(lengths),
        speed_kph=speeds,
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        geom_indptr=np.array(gptr, dtype=np.int64),
        geom_lat=np.array(glat),
        geom_lon=np.array(glon),
        turn_indptr=np.array(ptr, dtype=np.int64),
        turn_edges=np.array(seq, dtype=np.int64),
        turn_kind=np.array(kinds, dtype=np.int8),
        spatial_order=False,
    )
    assert np.array_equal(g.tail, [e[0] for e in edges])  # input order kept
    return g


def edge_id(g: RoadGraph, t: int, h: int) -> int:
    """The (single) edge t -> h."""
    (found,) = [e for e in range(g.n_edges) if g.tail[e] == t and g.head[e] == h]
    return int(found)


def path_edges(g: RoadGraph, *nodes: int) -> list[int]:
    return [edge_id(g, a, b) for a, b in zip(nodes[:-1], nodes[1:], strict=True)]


def random_road_graph(seed: int, *, max_side: int = 4, n_restrictions: int | None = None):
    """A random lattice road network with bends, parallel roads, duplicate roads, one-ways, a
    rare self-loop, and random restrictions (random drives of 2-4 edges, so they include
    U-turns)."""
    rng = np.random.default_rng(seed)
    rows, cols = int(rng.integers(2, max_side + 1)), int(rng.integers(2, max_side + 1))
    nodes = [(45.0 + 0.01 * i, 7.0 + 0.01 * j) for i in range(rows) for j in range(cols)]
    links = []
    for i in range(rows):
        for j in range(cols):
            v = i * cols + j
            if j + 1 < cols:
                links.append((v, v + 1))
            if i + 1 < rows:
                links.append((v, v + cols))
            if i + 1 < rows and j + 1 < cols and rng.random() < 0.3:
                links.append((v, v + cols + 1))
    roads: list[Road] = []
    for a, b in links:
        if rng.random() < 0.2:
            continue
        pts: list[tuple[float, float]] = []
        if rng.random() < 0.3:  # a bend: one interior point off the straight line
            (la, lo), (lb, lob) = nodes[a], nodes[b]
            pts = [
                (
                    (la + lb) / 2 + rng.uniform(-3e-3, 3e-3),
                    (lo + lob) / 2 + rng.uniform(-3e-3, 3e-3),
                )
            ]
        u = rng.random()
        t, h = (a, b) if rng.random() < 0.5 else (b, a)
        roads.append((t, h, u < 0.7, pts))
        if rng.random() < 0.05:  # the same road twice (duplicate ways): several reverses
            roads.append((t, h, u < 0.7 or rng.random() < 0.5, pts))
        if rng.random() < 0.08:  # a parallel road along another line
            (la, lo), (lb, lob) = nodes[a], nodes[b]
            roads.append(
                (t, h, rng.random() < 0.5, [((la + lb) / 2 + 4e-3, (lo + lob) / 2 - 4e-3)])
            )
    if rng.random() < 0.2:
        v = int(rng.integers(len(nodes)))
        la, lo = nodes[v]
        roads.append((v, v, False, [(la + 2e-3, lo + 1e-3), (la + 2e-3, lo - 1e-3)]))
    if not roads:
        roads.append((0, 1, True, []))
    speeds = [float(rng.choice([30.0, 50.0, 80.0])) for _ in roads]
    g = make_graph(nodes, roads, speed_kph=speeds)
    k = int(rng.integers(0, 9)) if n_restrictions is None else n_restrictions
    restrictions = []
    for _ in range(k):
        drive = [int(rng.integers(g.n_edges))]
        for _ in range(int(rng.integers(1, 4))):
            v = int(g.head[drive[-1]])
            lo, hi = int(g.indptr[v]), int(g.indptr[v + 1])
            if lo == hi:
                break
            drive.append(int(rng.integers(lo, hi)))
        if len(drive) >= 2:
            restrictions.append(("only" if rng.random() < 0.35 else "no", drive))
    return make_graph(nodes, roads, restrictions, speed_kph=speeds)


# ---------------------------------------------------------------------------------------------
# the independent reference


class Reference:
    """Legal drives read directly off the rules, and their line graph in networkx."""

    def __init__(
        self,
        g: RoadGraph,
        *,
        uturns: str = "forbid_at_junctions",
        turn_costs: TurnCosts | None = None,
        costs: np.ndarray | None = None,
    ) -> None:
        self.g = g
        self.tail = [int(x) for x in g.tail]
        self.head = [int(x) for x in g.head]
        self.cost = [float(c) for c in (g.travel_time_s if costs is None else costs)]
        self.forbid = uturns == "forbid_at_junctions"
        self.turn_costs = turn_costs
        multi = nx.MultiDiGraph()
        multi.add_nodes_from(range(g.n_nodes))
        multi.add_edges_from(zip(self.tail, self.head, strict=True))
        self.neighbours = {
            v: len((set(multi.predecessors(v)) | set(multi.successors(v))) - {v})
            for v in range(g.n_nodes)
        }
        self.geom = [
            [
                (float(a), float(b))
                for a, b in zip(
                    g.geom_lat[g.geom_indptr[e] : g.geom_indptr[e + 1]],
                    g.geom_lon[g.geom_indptr[e] : g.geom_indptr[e + 1]],
                    strict=True,
                )
            ]
            for e in range(g.n_edges)
        ]
        self.rules = [g.restriction(i) for i in range(g.n_restrictions)]
        self.rules = [(k, tuple(int(x) for x in s)) for k, s in self.rules]

    # -- the rules, one transition at a time
    def is_uturn(self, e: int, f: int) -> bool:
        return (
            self.tail[f] == self.head[e]
            and self.head[f] == self.tail[e]
            and self.geom[f] == self.geom[e][::-1]
        )

    def uturn_banned(self, e: int, f: int) -> bool:
        return self.forbid and self.neighbours[self.head[e]] >= 3 and self.is_uturn(e, f)

    def polyline(self, e: int) -> list[tuple[float, float]]:
        g = self.g
        t, h = self.tail[e], self.head[e]
        return [
            (float(g.lat[t]), float(g.lon[t])),
            *self.geom[e],
            (float(g.lat[h]), float(g.lon[h])),
        ]

    def probe(self, pts: list[tuple[float, float]], probe_m: float) -> tuple[float, float]:
        """First point at least probe_m along pts[0], pts[1], ... (geographiclib distances)."""
        along = 0.0
        for a, b in zip(pts[:-1], pts[1:], strict=True):
            along += SPHERE.Inverse(a[0], a[1], b[0], b[1])["s12"]
            if along >= probe_m:
                return b
        return pts[-1]

    def turn_cost(self, e: int, f: int) -> float:
        tc = self.turn_costs
        v = self.head[e]
        if tc is None or tc.is_zero or self.neighbours[v] == 2:
            return 0.0
        node = (float(self.g.lat[v]), float(self.g.lon[v]))
        p = self.probe(self.polyline(e)[::-1], tc.probe_m)  # back along e from the node
        q = self.probe(self.polyline(f), tc.probe_m)
        if p == node or q == node:
            return 0.0
        arrive = SPHERE.Inverse(p[0], p[1], node[0], node[1])["azi2"]  # heading at the node
        depart = SPHERE.Inverse(node[0], node[1], q[0], q[1])["azi1"]
        angle = (depart - arrive + 180.0) % 360.0 - 180.0
        if abs(angle) <= tc.straight_max_deg:
            return 0.0
        if abs(angle) >= tc.uturn_min_deg:
            return tc.uturn_s
        return tc.right_s if angle > 0 else tc.left_s

    def start(self, e: int) -> tuple[int, frozenset[tuple[int, int]]]:
        """State after a first edge: positions (rule, j) with rule[:j + 1] == drive suffix."""
        return (e, frozenset((i, 0) for i, (_, s) in enumerate(self.rules) if s[0] == e))

    def step(self, state: tuple[int, frozenset[tuple[int, int]]], f: int):
        """Next state after driving f, or None if the turn is illegal."""
        e, matched = state
        trig = [(i, j) for i, j in matched if j == len(self.rules[i][1]) - 2]
        only_to = {self.rules[i][1][-1] for i, _ in trig if self.rules[i][0] == "only"}
        for i, _ in trig:
            kind, s = self.rules[i]
            if (kind == "no" and s[-1] == f) or (kind == "only" and s[-1] != f):
                return None
        if self.uturn_banned(e, f) and f not in only_to:
            return None
        nxt = {
            (i, j + 1)
            for i, j in matched
            if j + 1 <= len(self.rules[i][1]) - 2 and self.rules[i][1][j + 1] == f
        }
        nxt |= self.start(f)[1]
        return (f, frozenset(nxt))

    def out_edges(self, v: int) -> range:
        return range(int(self.g.indptr[v]), int(self.g.indptr[v + 1]))

    def line_graph(self) -> nx.DiGraph:
        """Edge-expanded graph of every reachable state, arcs weighted cost(f) + turn cost."""
        lg = nx.DiGraph()
        todo = deque(self.start(e) for e in range(self.g.n_edges))
        seen = set(todo)
        while todo:
            state = todo.popleft()
            lg.add_node(state)
            for f in self.out_edges(self.head[state[0]]):
                nxt = self.step(state, f)
                if nxt is None:
                    continue
                lg.add_edge(state, nxt, weight=self.cost[f] + self.turn_cost(state[0], f))
                if nxt not in seen:
                    seen.add(nxt)
                    todo.append(nxt)
        return lg

    def shortest_from(self, lg: nx.DiGraph, s: int) -> np.ndarray:
        """float64[n]: legal optimum from road node s to every node (>= 1 edge), inf if none."""
        lg = lg.copy()
        lg.add_node("source")
        for e in self.out_edges(s):
            lg.add_edge("source", self.start(e), weight=self.cost[e])
        dist = nx.single_source_dijkstra_path_length(lg, "source")
        best = np.full(self.g.n_nodes, np.inf)
        for state, d in dist.items():
            if state != "source":
                v = self.head[state[0]]
                best[v] = min(best[v], d)
        return best

    def drive_cost(self, drive: Sequence[int]) -> float:
        return self.cost[drive[0]] + sum(
            self.cost[f] + self.turn_cost(e, f) for e, f in zip(drive[:-1], drive[1:], strict=True)
        )


def is_legal(ref: Reference, drive: Sequence[int]) -> bool:
    """The rules checked directly on a whole drive (no states): windows against every rule."""
    drive = list(drive)
    for k in range(1, len(drive)):
        assert ref.head[drive[k - 1]] == ref.tail[drive[k]], "not a drive"
    for kind, s in ref.rules:
        n = len(s)
        for a in range(len(drive) - n + 2):
            if tuple(drive[a : a + n - 1]) == s[:-1] and a + n - 1 < len(drive):
                nxt = drive[a + n - 1]
                if (kind == "no" and nxt == s[-1]) or (kind == "only" and nxt != s[-1]):
                    return False
    for k in range(1, len(drive)):
        e, f = drive[k - 1], drive[k]
        if ref.uturn_banned(e, f):
            # allowed only as the `to` of an only_* rule whose trigger ends here
            ok = any(
                kind == "only"
                and s[-1] == f
                and k - (len(s) - 1) >= 0
                and tuple(drive[k - (len(s) - 1) : k]) == s[:-1]
                for kind, s in ref.rules
            )
            if not ok:
                return False
    return True


# ---------------------------------------------------------------------------------------------
# the search graph side


def search_shortest_from(sg, s: int) -> np.ndarray:
    """float64[n] via scipy csgraph.dijkstra from a super-source joined to the start states."""
    states, g0 = sg.start_states(s)
    S = sg.n_states
    rows = np.concatenate((sg.arc_tail.astype(np.int64), np.full(states.size, S)))
    cols = np.concatenate((np.asarray(sg.head, dtype=np.int64), states))
    w = np.concatenate((np.asarray(sg.cost_s), g0))
    order = np.lexsort((w, cols, rows))  # keep the cheapest of parallel arcs
    rows, cols, w = rows[order], cols[order], w[order]
    keep = np.ones(rows.size, dtype=bool)
    keep[1:] = (rows[1:] != rows[:-1]) | (cols[1:] != cols[:-1])
    mat = csr_matrix((w[keep], (rows[keep], cols[keep])), shape=(S + 1, S + 1))
    dist = dijkstra(mat, directed=True, indices=S)
    best = np.full(sg.graph.n_nodes, np.inf)
    for v in range(sg.graph.n_nodes):
        t = sg.target_states(v)
        if t.size:
            best[v] = float(np.min(dist[t]))
    return best


def replay(sg, drive: Sequence[int]) -> float | None:
    """Drive the road edges through the search graph; its cost, or None where no arc exists."""
    state = int(sg.entry_state[drive[0]])
    cost = float(sg.road_cost_s[drive[0]])
    for f in drive[1:]:
        lo, hi = int(sg.indptr[state]), int(sg.indptr[state + 1])
        arcs = [a for a in range(lo, hi) if sg.road_edge[a] == f]
        if not arcs:
            return None
        assert len(arcs) == 1, "one arc per road edge and search node"
        cost += float(sg.cost_s[arcs[0]])
        state = int(sg.head[arcs[0]])
    return cost


def random_search_walk(sg, rng: np.random.Generator, steps: int) -> list[int]:
    e = int(rng.integers(sg.graph.n_edges))
    drive, state = [e], int(sg.entry_state[e])
    for _ in range(steps):
        lo, hi = int(sg.indptr[state]), int(sg.indptr[state + 1])
        if lo == hi:
            break
        a = int(rng.integers(lo, hi))
        drive.append(int(sg.road_edge[a]))
        state = int(sg.head[a])
    return drive


def random_legal_drive(ref: Reference, rng: np.random.Generator, steps: int) -> list[int]:
    """A random drive extended one legal edge at a time (legality by :func:`is_legal`)."""
    drive = [int(rng.integers(ref.g.n_edges))]
    for _ in range(steps):
        options = [f for f in ref.out_edges(ref.head[drive[-1]]) if is_legal(ref, [*drive, f])]
        if not options:
            break
        drive.append(int(options[int(rng.integers(len(options)))]))
    return drive


def assert_matches_reference(g: RoadGraph, seed: int, **kw) -> None:
    sg = build_search_graph(g, **kw)
    ref = Reference(g, **kw)
    lg = ref.line_graph()
    for s in range(g.n_nodes):
        ours, theirs = search_shortest_from(sg, s), ref.shortest_from(lg, s)
        if sg.identity:
            # The identity argument is about shortest paths, which never repeat a node: the
            # cheapest way back to s itself may turn round (a search answers s -> s at once).
            ours[s] = theirs[s]
        np.testing.assert_allclose(ours, theirs, rtol=1e-9, err_msg=f"from {s}")
    rng = np.random.default_rng(seed)
    for _ in range(30):
        walk = random_search_walk(sg, rng, 8)
        # (walks of the identity graph may turn round: only its shortest paths are legal)
        assert sg.identity or is_legal(ref, walk), f"search graph allows the illegal drive {walk}"
        legal = random_legal_drive(ref, rng, 8)
        cost = replay(sg, legal)
        assert cost is not None, f"legal drive {legal} is not a path of the search graph"
        assert cost == pytest.approx(ref.drive_cost(legal), rel=1e-9)


# ---------------------------------------------------------------------------------------------
# a hand-checked junction

#: A plus-shaped junction at node 4 inside a ring, 0.01 degrees apart (lat 45):
#:   6 - 7 - 8
#:   |   |   |       arms 1-4, 3-4, 5-4, 7-4: 100 s each way (1000 m at 36 km/h)
#:   3 - 4 - 5       ring segments: 150 s each, except 1-2: 200 s
#:   |   |   |       spur 4-9 to a dead end 9 (south-east of 4): 250 s
#:   0 - 1 - 2
PLUS_NODES = [(45.00 + 0.01 * (i // 3), 7.00 + 0.01 * (i % 3)) for i in range(9)] + [
    (45.005, 7.015)
]
PLUS_ROADS: list[Road] = [
    (1, 4, True, []),
    (3, 4, True, []),
    (4, 5, True, []),
    (4, 7, True, []),
    (0, 1, True, []),
    (1, 2, True, []),
    (2, 5, True, []),
    (5, 8, True, []),
    (7, 8, True, []),
    (6, 7, True, []),
    (3, 6, True, []),
    (0, 3, True, []),
    (4, 9, True, []),
]
PLUS_LENGTHS = [1000.0] * 4 + [1500.0, 2000.0] + [1500.0] * 6 + [2500.0]


def plus(restrictions=(), ring_m: float | None = None) -> RoadGraph:
    lengths = list(PLUS_LENGTHS)
    if ring_m is not None:
        lengths[4:12] = [ring_m] * 8
    base = make_graph(PLUS_NODES, PLUS_ROADS, length_m=lengths)
    seqs = [(k, path_edges(base, *nodes)) for k, nodes in restrictions]
    return make_graph(PLUS_NODES, PLUS_ROADS, seqs, length_m=lengths)


def legal_cost(g: RoadGraph, s: int, t: int, **kw) -> float:
    return float(search_shortest_from(build_search_graph(g, **kw), s)[t])


def test_hand_checked_no_left_turn() -> None:
    """No left turn from 1->4 into 4->3: 1 -> 3 costs 300 s (1-0-3 round the ring) instead of
    200 s; the search graph agrees with the networkx reference everywhere."""
    g = plus([("no", (1, 4, 3))])
    assert legal_cost(plus(), 1, 3) == pytest.approx(200.0)
    assert legal_cost(g, 1, 3) == pytest.approx(300.0)
    assert legal_cost(g, 3, 1) == pytest.approx(200.0)  # the other way is not restricted
    assert_matches_reference(g, seed=1)


def test_hand_checked_only_straight_on() -> None:
    """Only straight on from 1->4 (to 7): 1 -> 5 costs 350 s (1-2-5: 200 + 150) instead of
    200 s, 1 -> 3 300 s (1-0-3), 1 -> 7 still 200 s."""
    g = plus([("only", (1, 4, 7))])
    assert legal_cost(plus(), 1, 5) == pytest.approx(200.0)
    assert legal_cost(g, 1, 5) == pytest.approx(350.0)
    assert legal_cost(g, 1, 7) == pytest.approx(200.0)
    assert legal_cost(g, 1, 3) == pytest.approx(300.0)
    assert_matches_reference(g, seed=2)


def test_hand_checked_via_way() -> None:
    """No 3->4, 4->5, 5->2 (via way 4-5): 3 -> 2 costs 400 s (3-4-1-2) instead of 350 s;
    the same turn at 5 is legal when the drive did not come through 4 from 3 (7-4-5-2: 350 s)
    or started on the via way (4-5-2: 250 s)."""
    g = plus([("no", (3, 4, 5, 2))])
    assert legal_cost(plus(), 3, 2) == pytest.approx(350.0)
    assert legal_cost(g, 3, 2) == pytest.approx(400.0)
    assert legal_cost(g, 7, 2) == pytest.approx(350.0)
    assert legal_cost(g, 4, 2) == pytest.approx(250.0)
    assert_matches_reference(g, seed=3)


def test_hand_checked_uturns_junction_and_dead_end() -> None:
    """Ring at 500 s per segment, no left 1->4->3: turning round at junction 7 (1-4-7-4-3,
    400 s) is banned by default, turning round at the dead end 9 (1-4-9-4-3, 700 s) is not;
    with uturns="allow" the junction U-turn wins."""
    g = plus([("no", (1, 4, 3))], ring_m=5000.0)
    assert legal_cost(g, 1, 3) == pytest.approx(700.0)
    assert legal_cost(g, 1, 3, uturns="allow") == pytest.approx(400.0)
    sg = build_search_graph(g)
    ref = Reference(g)
    assert not is_legal(ref, path_edges(g, 1, 4, 7, 4, 3))
    assert is_legal(ref, path_edges(g, 1, 4, 9, 4, 3))
    assert replay(sg, path_edges(g, 1, 4, 7, 4, 3)) is None
    assert replay(sg, path_edges(g, 1, 4, 9, 4, 3)) == pytest.approx(700.0)
    assert_matches_reference(g, seed=4)
    assert_matches_reference(g, seed=5, uturns="allow")


def test_hand_checked_turn_costs() -> None:
    """Left 10 s, right 5 s, U-turn 30 s: from 1 through the plus junction, straight to 7 is
    200 s, right to 5 is 205 s, left to 3 is 210 s (hand-checked: arriving northbound,
    west is a left turn)."""
    tc = TurnCosts(left_s=10.0, right_s=5.0, uturn_s=30.0)
    g = plus()
    sg = build_search_graph(g, turn_costs=tc)
    d = search_shortest_from(sg, 1)
    assert (d[7], d[5], d[3]) == pytest.approx((200.0, 205.0, 210.0))
    assert_matches_reference(g, seed=6, turn_costs=tc)
    assert_matches_reference(g, seed=7, turn_costs=tc, uturns="allow")


def test_only_u_turn_is_allowed_at_a_junction() -> None:
    """An only_u_turn sign allows the U-turn it names although junction U-turns are banned
    (reference and direct check agree)."""
    g = plus([("only", (1, 4, 1))])
    assert legal_cost(g, 1, 1) == pytest.approx(200.0)
    assert_matches_reference(g, seed=8)


def test_conflicting_only_rules_leave_no_way_on() -> None:
    """Two only_* rules after the same edge with different targets: nothing is allowed after
    it (both rules hold), as the reference says."""
    g = plus([("only", (1, 4, 7)), ("only", (1, 4, 5))])
    sg = build_search_graph(g)
    assert sg.info["only_conflicts"] == 1
    state = int(sg.entry_state[edge_id(g, 1, 4)])
    assert sg.indptr[state] == sg.indptr[state + 1]
    assert_matches_reference(g, seed=9)


# ---------------------------------------------------------------------------------------------
# random graphs


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**32 - 1),
    uturns=st.sampled_from(["forbid_at_junctions", "allow"]),
    costed=st.booleans(),
)
def test_random_graphs_match_the_line_graph_reference(seed: int, uturns: str, costed: bool) -> None:
    """Random lattice networks with random restrictions (hypothesis): shortest legal costs from
    scipy csgraph.dijkstra on the search graph equal networkx Dijkstra on the reference line
    graph from every node to every node; random search-graph walks are legal drives and random
    legal drives are search-graph paths of the same cost."""
    g = random_road_graph(seed)
    tc = TurnCosts(left_s=7.0, right_s=3.0, uturn_s=20.0) if costed else None
    assert_matches_reference(g, seed, uturns=uturns, turn_costs=tc)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1))
def test_without_restrictions_the_search_graph_is_the_road_graph(seed: int) -> None:
    """No restrictions, no turn costs: the search graph is the road graph (same arrays, no
    copy), and its shortest paths cost what the reference with U-turns banned at junctions
    says (a shortest path never turns round: it would visit a node twice), and what
    scipy csgraph.dijkstra says on the road graph itself."""
    g = random_road_graph(seed, n_restrictions=0)
    sg = build_search_graph(g)
    assert sg.identity
    assert sg.indptr is g.indptr and sg.head is g.head and sg.entry_state is g.head
    assert sg.cost_s is g.travel_time_s or np.shares_memory(sg.cost_s, g.travel_time_s)
    np.testing.assert_array_equal(sg.road_edge, np.arange(g.n_edges))
    np.testing.assert_array_equal(sg.node_road, np.arange(g.n_nodes))
    assert sg.n_states == g.n_nodes
    ref = Reference(g)
    lg = ref.line_graph()
    road = dijkstra(g.csr(), directed=True)
    for s in range(g.n_nodes):
        ours = search_shortest_from(sg, s)
        others = np.arange(g.n_nodes) != s  # the way back to s itself may turn round
        np.testing.assert_allclose(ours[others], ref.shortest_from(lg, s)[others], rtol=1e-9)
        np.testing.assert_allclose(ours[others], road[s][others], rtol=1e-9)


def test_search_graph_shortest_routes_are_legal() -> None:
    """The route scipy's Dijkstra finds on the search graph, translated to road edges, never
    contains a banned sequence or a junction U-turn (direct check), on graphs with many
    restrictions; its cost is the reference cost of that drive."""
    for seed in range(12):
        g = random_road_graph(1000 + seed, n_restrictions=12)
        sg = build_search_graph(g)
        ref = Reference(g)
        for s in range(g.n_nodes):
            for t in range(g.n_nodes):
                found = _route(sg, s, t)
                if found is not None:
                    drive, cost = found
                    assert is_legal(ref, drive), (seed, s, t, drive)
                    assert ref.drive_cost(drive) == pytest.approx(cost, rel=1e-9)


def _route(sg, s: int, t: int) -> tuple[list[int], float] | None:
    """Cheapest drive from road node s to road node t as road edges, and its cost (scipy
    Dijkstra from a super-source; the arc between two search nodes is the cheapest one)."""
    states, g0 = sg.start_states(s)
    targets = sg.target_states(t)
    S = sg.n_states
    tails = np.concatenate((sg.arc_tail.astype(np.int64), np.full(states.size, S)))
    heads = np.concatenate((np.asarray(sg.head, dtype=np.int64), states))
    w = np.concatenate((np.asarray(sg.cost_s), g0))
    # road edge of every arc; a super-source arc k drives the k-th out-edge of s
    edge_of = np.concatenate(
        (np.asarray(sg.road_edge, dtype=np.int64), np.arange(g0.size) + int(sg.graph.indptr[s]))
    )
    order = np.lexsort((w, heads, tails))
    keep = np.ones(order.size, dtype=bool)
    keep[1:] = (tails[order][1:] != tails[order][:-1]) | (heads[order][1:] != heads[order][:-1])
    sel = order[keep]
    mat = csr_matrix((w[sel], (tails[sel], heads[sel])), shape=(S + 1, S + 1))
    dist, pred = dijkstra(mat, directed=True, indices=S, return_predecessors=True)
    if targets.size == 0 or not np.isfinite(dist[targets]).any():
        return None
    v = int(targets[np.argmin(dist[targets])])
    best_cost = float(dist[v])
    chain = [v]
    while v != S:
        v = int(pred[v])
        chain.append(v)
    chain.reverse()
    arc = {(int(tails[i]), int(heads[i])): i for i in sel.tolist()}
    drive = [int(edge_of[arc[(a, b)]]) for a, b in zip(chain[:-1], chain[1:], strict=True)]
    return drive, best_cost


# ---------------------------------------------------------------------------------------------
# live costs, starts and targets


def test_live_costs_recompute_without_rebuild() -> None:
    """arc_costs / with_costs over new road costs equal a fresh build with those costs, and the
    shortest legal costs equal the networkx reference run on the same new costs."""
    g = random_road_graph(77, n_restrictions=10)
    tc = TurnCosts(left_s=4.0, right_s=1.0, uturn_s=15.0)
    sg = build_search_graph(g, turn_costs=tc)
    rng = np.random.default_rng(5)
    new = g.travel_time_s * rng.uniform(0.5, 3.0, g.n_edges)
    new[int(rng.integers(g.n_edges))] = np.inf  # a closed road
    fresh = build_search_graph(g, turn_costs=tc, costs=new)
    np.testing.assert_array_equal(sg.arc_costs(new), fresh.cost_s)
    out = np.empty(sg.n_arcs)
    assert sg.arc_costs(new, out=out) is out
    np.testing.assert_array_equal(out, fresh.cost_s)
    live = sg.with_costs(new)
    assert live.indptr is sg.indptr and live.head is sg.head
    np.testing.assert_array_equal(live.cost_s, fresh.cost_s)
    ref = Reference(g, turn_costs=tc, costs=new)
    lg = ref.line_graph()
    for s in range(g.n_nodes):
        np.testing.assert_allclose(search_shortest_from(live, s), ref.shortest_from(lg, s))


def test_identity_live_costs_are_the_road_costs() -> None:
    """Without restrictions arc costs are the road costs themselves (no copy)."""
    g = random_road_graph(3, n_restrictions=0)
    sg = build_search_graph(g)
    new = g.travel_time_s * 2.0
    assert sg.arc_costs(new) is new
    assert not np.any(sg.turn_cost_s)
    np.testing.assert_array_equal(sg.with_costs(new).cost_s, new)


def test_start_target_and_departure_states() -> None:
    """Start states are entry_state of each out-edge with its road cost; target states are the
    node's search nodes; states_departing_by(e) are exactly the tails of the arcs driving e."""
    g = plus([("no", (1, 4, 3)), ("no", (3, 4, 5, 2))])
    sg = build_search_graph(g)
    v = 4
    states, g0 = sg.start_states(v)
    edges = np.arange(g.indptr[v], g.indptr[v + 1])
    np.testing.assert_array_equal(states, sg.entry_state[edges])
    np.testing.assert_array_equal(g0, g.travel_time_s[edges])
    for t in range(g.n_nodes):
        ts = sg.target_states(t)
        np.testing.assert_array_equal(sg.node_road[ts], t)
        assert ts.size == int(np.sum(sg.node_road == t))
    np.testing.assert_array_equal(sg.node_road[sg.entry_state], g.head)
    for e in range(g.n_edges):
        arcs = sg.arcs_on(e)
        np.testing.assert_array_equal(np.sort(arcs), np.flatnonzero(sg.road_edge == e))
        np.testing.assert_array_equal(sg.states_departing_by(e), sg.arc_tail[arcs])
        assert np.all(sg.node_road[sg.states_departing_by(e)] == g.tail[e])
    # arriving by 1->4, the left turn 4->3 is not offered; arriving by 5->4 it is
    banned = edge_id(g, 4, 3)
    assert int(sg.entry_state[edge_id(g, 1, 4)]) not in set(sg.states_departing_by(banned))
    assert int(sg.entry_state[edge_id(g, 5, 4)]) in set(sg.states_departing_by(banned))
    # a route found as arcs translates back to road edges
    arcs = sg.arcs_on(edge_id(g, 4, 7))
    assert sg.road_edges_of(arcs).tolist() == [edge_id(g, 4, 7)] * arcs.size


def test_merging_keeps_the_graph_small() -> None:
    """One-way arrivals at a junction share one state; the demo-like plus junction has one
    state per two-way arrival (each bans its own U-turn) and dead ends keep one state."""
    g = plus([("no", (1, 4, 3))])
    sg = build_search_graph(g)
    # node 4: arrivals from 1 (restricted), 3, 5, 7, 9: five distinct futures
    assert sg.target_states(4).size == 5
    assert sg.target_states(9).size == 1  # dead end
    allow = build_search_graph(g, uturns="allow")
    # with U-turns allowed only the restricted arrival differs from the others
    assert allow.target_states(4).size == 2
    assert allow.target_states(0).size == 1


# ---------------------------------------------------------------------------------------------
# turn angles


def test_turn_classes_follow_geographiclib_azimuths() -> None:
    """Turn costs on every arc of random bent networks equal the class of the angle between
    geographiclib (Karney 2013) spherical azimuths at the node (Reference.turn_cost)."""
    tc = TurnCosts(left_s=11.0, right_s=5.0, uturn_s=31.0, probe_m=400.0)
    for seed in range(20):
        g = random_road_graph(500 + seed, n_restrictions=0)
        sg = build_search_graph(g, turn_costs=tc, uturns="allow")
        ref = Reference(g, turn_costs=tc, uturns="allow")
        for e in range(g.n_edges):
            state = int(sg.entry_state[e])
            for a in range(int(sg.indptr[state]), int(sg.indptr[state + 1])):
                f = int(sg.road_edge[a])
                assert sg.turn_cost_s[a] == ref.turn_cost(e, f), (seed, e, f)


# ---------------------------------------------------------------------------------------------
# bad input


def test_bad_arguments_get_clear_errors() -> None:
    g = plus([("no", (1, 4, 3))])
    with pytest.raises(InvalidRequest, match="uturns must be one of"):
        build_search_graph(g, uturns="never")
    with pytest.raises(InvalidRequest, match="turn_costs must be a TurnCosts"):
        build_search_graph(g, turn_costs={"left_s": 3.0})  # type: ignore[arg-type]
    with pytest.raises(InvalidRequest, match="one entry per edge"):
        build_search_graph(g, costs=np.ones(3))
    bad = g.travel_time_s.copy()
    bad[0] = np.nan
    with pytest.raises(InvalidRequest, match="no NaN"):
        build_search_graph(g, costs=bad)
    bad[0] = -1.0
    with pytest.raises(InvalidRequest, match=">= 0 seconds"):
        build_search_graph(g).arc_costs(bad)
    sg = build_search_graph(g)
    with pytest.raises(InvalidRequest, match="float64 array of shape"):
        sg.arc_costs(g.travel_time_s, out=np.empty(2))
    with pytest.raises(InvalidRequest, match="valid edge indices"):
        sg.arcs_on(g.n_edges)
    with pytest.raises(InvalidRequest, match="integer index"):
        sg.arcs_on(1.5)  # type: ignore[arg-type]
    with pytest.raises(NodeNotFound, match="valid node indices are 0..9"):
        sg.start_states(-1)
    with pytest.raises(NodeNotFound, match="integer index"):
        sg.target_states("4")  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"left_s": -1.0}, "left_s must be a finite number"),
        ({"uturn_s": math.inf}, "uturn_s must be a finite number"),
        ({"right_s": True}, "right_s must be a finite number"),
        ({"straight_max_deg": 160.0}, "straight_max_deg < uturn_min_deg"),
        ({"uturn_min_deg": 200.0}, "uturn_min_deg <= 180"),
        ({"probe_m": 0.0}, "probe_m must be a finite distance"),
    ],
)
def test_bad_turn_costs(kwargs: dict, message: str) -> None:
    with pytest.raises(InvalidRequest, match=message):
        TurnCosts(**kwargs)


def test_malformed_restrictions_are_refused() -> None:
    """Graphs built in memory are not checked by load_graph: the search graph checks them."""
    g = plus()
    e14, e47, e34 = edge_id(g, 1, 4), edge_id(g, 4, 7), edge_id(g, 3, 4)

    def with_turns(ptr, edges, kinds) -> RoadGraph:
        return dataclasses.replace(
            g,
            turn_indptr=np.array(ptr, dtype=np.int64),
            turn_edges=np.array(edges, dtype=np.int32),
            turn_kind=np.array(kinds, dtype=np.int8),
        )

    cases = [
        (with_turns([0, 1], [e14], [0]), "has 1 edges"),
        (with_turns([0, 2], [e14, e47], [2]), "has kind 2"),
        (with_turns([0, 2], [e14, e34], [0]), "each edge must start where the previous"),
        (with_turns([0, 2], [e14, 999], [0]), "names an edge outside"),
        (with_turns([0, 3], [e14, e47], [0]), "turn_indptr must have"),
    ]
    for graph, message in cases:
        with pytest.raises(InvalidRequest, match=message):
            check_restrictions(graph)
        with pytest.raises(InvalidRequest, match=message):
            build_search_graph(graph)


def test_synthetic_restrictions_are_well_formed() -> None:
    """The benchmark generator makes valid sequences of the asked mix at junctions."""
    g = plus()
    r = synthetic_restrictions(g, 40, only_share=0.5, via_way_share=0.3, seed=2)
    check_restrictions(r)
    assert r.n_restrictions == 40
    lens = np.diff(r.turn_indptr)
    assert set(lens.tolist()) <= {2, 3, 4} and np.any(lens > 2)
    assert 0 < int(np.sum(r.turn_kind == 1)) < 40
    assert r.indptr is g.indptr
    with pytest.raises(InvalidRequest, match="count must be"):
        synthetic_restrictions(g, -1)
    assert_matches_reference(r, seed=12)
