"""Searches from and to points on roads, and under turn restrictions, through ``plan()``.

References: the networkx line-graph reference of ``tests/planner/test_turns.py`` (legal drives
read off the rules, an independent construction) for turn restrictions, and scipy
``csgraph.dijkstra`` with the partial edge costs added by hand for snapped points.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.endpoints import planning_graph
from dueroute.planner.errors import InvalidRequest
from dueroute.planner.heuristics import build_landmarks
from dueroute.planner.session import Planner, plan
from dueroute.planner.snap import snap_to_road
from dueroute.planner.traffic import CostLayer, parse_document
from dueroute.planner.turns import TurnCosts, TurnProfile
from tests.planner.test_kernel import grid_graph
from tests.planner.test_turns import Reference, is_legal, random_road_graph

REL = 1e-9


def _planner(g, landmarks: bool) -> Planner:
    lm = build_landmarks(planning_graph(g), count=3, progress=False) if landmarks else None
    return Planner(g, landmarks=lm)


@pytest.mark.parametrize("landmarks", [False, True])
@pytest.mark.parametrize("seed", range(12))
def test_turn_rules_give_the_legal_optimum(seed: int, landmarks: bool) -> None:
    """Between road nodes of a graph with turn restrictions (and U-turns banned at junctions),
    a proven answer equals the legal optimum of the networkx line-graph reference, the route is
    a legal drive, and it costs what the reference says it costs; every bound is below it."""
    g = random_road_graph(seed, max_side=4, n_restrictions=6)
    ref = Reference(g)
    lg = ref.line_graph()
    planner = _planner(g, landmarks)
    for s in range(g.n_nodes):
        best = ref.shortest_from(lg, s)
        for t in range(g.n_nodes):
            if s == t:
                continue
            res = plan(planner, s, t, controller="fixed:2")
            if not math.isfinite(best[t]):
                assert res.status == "no_route", (s, t)
                continue
            assert res.status == "optimal", (s, t)
            assert res.cost_s == pytest.approx(best[t], rel=REL)
            edges = [int(e) for e in res.route_edges]
            assert int(g.tail[edges[0]]) == s and int(g.head[edges[-1]]) == t
            assert is_legal(ref, edges), edges
            assert ref.drive_cost(edges) == pytest.approx(res.cost_s, rel=REL)
            quick = plan(planner, s, t, budget_expansions=2, steps=1)
            if quick.lower_bound_s is not None:
                assert quick.lower_bound_s <= best[t] * (1 + REL)


def _snapped_reference(g, a, b) -> float:
    """Cheapest drive from snapped point a to snapped point b: along a's edge to its head, a
    shortest road path (scipy), b's edge from its tail; or straight along a shared edge."""
    cost = g.travel_time_s
    heads = [int(g.head[s.edge]) for s in a.sides]
    dist = dijkstra(g.csr(), directed=True, indices=heads)
    best = math.inf
    for i, sa in enumerate(a.sides):
        rest = (1.0 - sa.fraction) * cost[sa.edge]
        for sb in b.sides:
            part = sb.fraction * cost[sb.edge]
            best = min(best, rest + dist[i, int(g.tail[sb.edge])] + part)
            if sa.edge == sb.edge and sb.fraction >= sa.fraction:
                best = min(best, (sb.fraction - sa.fraction) * cost[sa.edge])
    return float(best)


@pytest.mark.parametrize("landmarks", [False, True])
def test_points_on_roads_give_the_optimum_with_partial_edges(landmarks: bool) -> None:
    """A route between two points on roads costs the hand-assembled optimum (partial edges
    plus scipy's shortest path), starts at the first snapped point and ends at the second."""
    g = grid_graph(25, seed=31)
    planner = _planner(g, landmarks)
    rng = np.random.default_rng(32)
    lat0, lat1 = float(np.min(g.lat)), float(np.max(g.lat))
    lon0, lon1 = float(np.min(g.lon)), float(np.max(g.lon))
    checked = 0
    for _ in range(60):
        pa = (rng.uniform(lat0, lat1), rng.uniform(lon0, lon1))
        pb = (rng.uniform(lat0, lat1), rng.uniform(lon0, lon1))
        a, b = snap_to_road(g, *pa), snap_to_road(g, *pb)
        ref = _snapped_reference(g, a, b)
        res = plan(planner, a, b, controller="fixed:1")
        assert res.status == "optimal"
        assert res.cost_s == pytest.approx(ref, rel=REL, abs=1e-9)
        assert res.origin is None and res.origin_snap is a
        start, end = res.route_start, res.route_end
        assert start is not None and start.coords[0] == (a.lon, a.lat)
        last = end.coords[-1] if end is not None else start.coords[-1]
        assert last == (b.lon, b.lat)
        parts = (start.cost_s if start else 0.0) + (end.cost_s if end else 0.0)
        full = float(np.sum(g.travel_time_s[res.route_edges])) if res.route_edges.size else 0.0
        if res.route_edges.size:  # the full edges join the partial ones
            assert int(g.tail[res.route_edges[0]]) == int(g.head[start.edge])
            assert int(g.head[res.route_edges[-1]]) == int(g.tail[end.edge])
        assert parts + full == pytest.approx(res.cost_s, rel=REL, abs=1e-9)
        checked += 1
        quick = plan(planner, a, b, budget_expansions=1, steps=1)
        assert quick.route_start is not None or quick.status == "not_found"
        if quick.lower_bound_s is not None:
            assert quick.lower_bound_s <= ref * (1 + REL) + 1e-9
    assert checked == 60


def test_a_point_and_a_node_and_the_same_edge() -> None:
    """A point to a node and a node to a point (each against scipy with the partial cost), and
    two points on one edge, the first before the second: one partial edge, no search needed."""
    g = grid_graph(15, seed=33)
    planner = _planner(g, True)
    e = 40
    t, h = int(g.tail[e]), int(g.head[e])
    mid = np.array(g.edge_coords(e))
    lon, lat = mid.mean(axis=0)
    p = snap_to_road(g, float(lat), float(lon))
    dist = dijkstra(g.csr(), directed=True)
    side = p.side(p.edge)
    to_node = plan(planner, p, 0, controller="fixed:1")
    want = min(
        (1 - s.fraction) * g.travel_time_s[s.edge] + dist[int(g.head[s.edge]), 0] for s in p.sides
    )
    assert to_node.cost_s == pytest.approx(want, rel=REL)
    from_node = plan(planner, 0, p, controller="fixed:1")
    want = min(dist[0, int(g.tail[s.edge])] + s.fraction * g.travel_time_s[s.edge] for s in p.sides)
    assert from_node.cost_s == pytest.approx(want, rel=REL)
    # two points on edge e, the first nearer its tail
    pts = [g.edge_coords(e)[0], g.edge_coords(e)[-1]]
    (lo0, la0), (lo1, la1) = pts
    first = snap_to_road(g, la0 + 0.3 * (la1 - la0), lo0 + 0.3 * (lo1 - lo0))
    second = snap_to_road(g, la0 + 0.7 * (la1 - la0), lo0 + 0.7 * (lo1 - lo0))
    if first.edge == second.edge == e:
        res = plan(planner, first, second, controller="fixed:1")
        f0, f1 = first.side(e).fraction, second.side(e).fraction
        assert res.cost_s == pytest.approx((f1 - f0) * g.travel_time_s[e], rel=1e-9)
        assert res.route_edges.size == 0 and res.route_start.edge == e
        assert res.route_start.coords[0] == (first.lon, first.lat)
        assert res.route_start.coords[-1] == (second.lon, second.lat)
    assert side.edge in (e, g.reverse_edge[e]) and t != h


PROFILES = [
    ("forbid_at_junctions", TurnCosts(left_s=7.0, right_s=3.0, uturn_s=20.0)),
    ("allow", None),
    ("allow", TurnCosts(left_s=4.0, right_s=0.0, uturn_s=9.0)),
]


@pytest.mark.parametrize(("uturns", "costs"), PROFILES)
@pytest.mark.parametrize("seed", range(4))
def test_turn_profiles_give_the_legal_optimum(seed: int, uturns: str, costs) -> None:
    """A planner with a turn profile (U-turn rule, turn penalties) proves the optimum of the
    networkx line-graph reference with the same rules and penalties, between every pair, with
    landmarks built for that profile (a profile of its own has its own search graph)."""
    g = random_road_graph(seed, max_side=4, n_restrictions=6)
    profile = TurnProfile(uturns=uturns, costs=costs)
    ref = Reference(g, uturns=uturns, turn_costs=costs)
    lg = ref.line_graph()
    lm = build_landmarks(planning_graph(g, profile), count=3, progress=False)
    planner = Planner(g, landmarks=lm, turn_profile=profile)
    for s in range(g.n_nodes):
        best = ref.shortest_from(lg, s)
        for t in range(g.n_nodes):
            if s == t:
                continue
            res = plan(planner, s, t, controller="fixed:2")
            if not math.isfinite(best[t]):
                assert res.status == "no_route", (s, t)
                continue
            assert res.status == "optimal" and res.cost_s == pytest.approx(best[t], rel=REL)
            assert is_legal(ref, [int(e) for e in res.route_edges])


def test_landmarks_of_another_profile_are_refused() -> None:
    """Landmarks built for one turn profile belong to its search graph: a planner of another
    profile refuses them with a clear message instead of searching with a wrong bound."""
    g = random_road_graph(3, max_side=4, n_restrictions=6)
    lm = build_landmarks(planning_graph(g), count=3, progress=False)
    profile = TurnProfile(costs=TurnCosts(left_s=7.0))
    with pytest.raises(InvalidRequest, match="belong to another graph"):
        Planner(g, landmarks=lm, turn_profile=profile)


@pytest.mark.parametrize("seed", range(4))
def test_live_speedups_under_turn_rules_keep_the_bound_proven(seed: int) -> None:
    """Live speed-ups on a graph with turn rules and turn costs: the landmarks are rebuilt on
    the search graph's arc costs (here at once: threshold 0), and before that the bound is
    lowered by every arc's saving (threshold infinite: never rebuilt). Either way each answer's bound is at most the networkx
    reference optimum on the new costs and a proven answer equals it."""
    g = random_road_graph(seed, max_side=4, n_restrictions=6)
    profile = TurnProfile(costs=TurnCosts(left_s=5.0, right_s=2.0, uturn_s=12.0))
    lm = build_landmarks(planning_graph(g, profile), count=3, progress=False)
    planner = Planner(g, landmarks=lm, turn_profile=profile)
    rng = np.random.default_rng(seed)
    edges = rng.choice(g.n_edges, size=max(1, g.n_edges // 3), replace=False)
    tail, head = np.asarray(g.tail), np.asarray(g.head)
    doc = {
        "updates": [
            {"from_node": int(tail[e]), "to_node": int(head[e]), "factor": 0.4} for e in edges
        ]
    }
    for threshold in (math.inf, 0.0):
        layer = CostLayer(g, lm, refine="sync", rebuild_threshold_s=threshold, turn_profile=profile)
        version = layer.apply(parse_document(doc, g))
        layer.close()
        assert (version.landmarks is not None) == (threshold == 0.0)
        ref = Reference(g, turn_costs=profile.costs, costs=version.travel_time_s)
        lg = ref.line_graph()
        for s in range(0, g.n_nodes, 2):
            best = ref.shortest_from(lg, s)
            for t in range(g.n_nodes):
                if s == t or not math.isfinite(best[t]):
                    continue
                quick = plan(planner, s, t, budget_expansions=3, steps=1, costs=version)
                if quick.lower_bound_s is not None:
                    assert quick.lower_bound_s <= best[t] * (1 + REL), (s, t)
                res = plan(planner, s, t, controller="fixed:2", costs=version)
                assert res.status == "optimal" and res.cost_s == pytest.approx(best[t], rel=REL)
