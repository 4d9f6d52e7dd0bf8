"""The instant route, the gap target, steps that follow the deadline, and the runaway guard.

References: scipy ``csgraph.dijkstra`` for optima and reachability, a real OpenStreetMap extract
(Aguascalientes, imported through osmnx) for a real street network.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.heuristics import build_landmarks, largest_component_nodes
from dueroute.planner.session import (
    CONTROL_SHARE,
    DECISION_COST,
    STEP_COST_US,
    DecisionCost,
    Planner,
    plan,
    steps_for_deadline,
)
from tests.conftest import OSM_DIR
from tests.planner.test_kernel import grid_graph, random_graph

REL = 1e-9


def _check_route(graph, res) -> None:
    """The route is a path of the graph from origin to destination with the claimed cost."""
    nodes, edges = res.route, res.route_edges
    assert nodes[0] == res.origin and nodes[-1] == res.destination
    assert np.array_equal(np.asarray(graph.tail)[edges], nodes[:-1])
    assert np.array_equal(np.asarray(graph.head)[edges], nodes[1:])
    assert res.cost_s == pytest.approx(float(np.sum(graph.travel_time_s[edges])), rel=1e-12)


def _every_pair_has_an_instant_route(graph, planner, pairs) -> None:
    origins = sorted({o for o, _ in pairs})
    dist = dijkstra(graph.csr(), directed=True, indices=origins)
    row = {o: i for i, o in enumerate(origins)}
    for o, d in pairs:
        res = plan(planner, o, d, budget_expansions=1, steps=1)  # one expansion: no time at all
        opt = float(dist[row[o], d])
        if o == d:
            continue
        if math.isfinite(opt):
            assert res.route is not None, (o, d)
            assert res.improvements[0].source == "instant"
            assert res.instant_cost_s is not None and res.instant_cost_s >= opt * (1 - REL)
            assert res.lower_bound_s <= opt * (1 + REL)
            _check_route(graph, res)
        else:
            assert res.status == "no_route" and res.route is None


def test_instant_route_for_every_pair_of_the_landmarks_component() -> None:
    """With landmarks, every reachable pair of their strong component has a route before the
    search expands anything, never cheaper than the scipy optimum; an unreachable pair none."""
    g = random_graph(300, 900, seed=21)
    planner = Planner(g, landmarks=build_landmarks(g, count=4, progress=False))
    nodes = largest_component_nodes(g)
    rng = np.random.default_rng(22)
    pairs = [(int(a), int(b)) for a, b in rng.choice(nodes, (120, 2))]
    others = [(int(a), int(b)) for a, b in rng.integers(0, g.n_nodes, (60, 2))]
    _every_pair_has_an_instant_route(g, planner, pairs)
    for o, d in others:  # outside the component: a route only after a search, if any
        res = plan(planner, o, d)
        opt = float(dijkstra(g.csr(), directed=True, indices=o)[d])
        if math.isfinite(opt):
            assert res.status == "optimal" and res.cost_s == pytest.approx(opt, rel=REL)
        else:
            assert res.status == "no_route"


def test_instant_route_on_a_real_street_network() -> None:
    """The same on a real OpenStreetMap extract (one-way streets, dead ends, turn restrictions):
    the graph searched is the extract's graph of legal drives, so scipy's optimum on it is the
    optimum under the turn rules."""
    path = OSM_DIR / "aguascalientes.osm.bz2"
    if not path.is_file():
        pytest.skip(f"real OSM fixture folder absent ({OSM_DIR})")
    from dueroute.planner.endpoints import planning_graph
    from dueroute.planner.osm_import import import_map

    g = planning_graph(import_map(path))
    planner = Planner(g, landmarks=build_landmarks(g, count=8, progress=False))
    nodes = largest_component_nodes(g)
    rng = np.random.default_rng(23)
    pairs = [(int(a), int(b)) for a, b in rng.choice(nodes, (150, 2))]
    _every_pair_has_an_instant_route(g, planner, pairs)


def test_gap_target_stops_early_with_the_gap_it_promised() -> None:
    """A gap target ends the search as soon as the proven gap is at or below it: the answer's
    gap is within the target, its bound below the scipy optimum, and it needed fewer
    expansions than the proof."""
    g = grid_graph(60, seed=24)
    planner = Planner(g, landmarks=build_landmarks(g, count=6, progress=False))
    rng = np.random.default_rng(25)
    saved = 0
    for o, d in rng.integers(0, g.n_nodes, (20, 2)):
        o, d = int(o), int(d)
        if o == d:
            continue
        opt = float(dijkstra(g.csr(), directed=True, indices=o)[d])
        full = plan(planner, o, d, controller="fixed:2")
        quick = plan(planner, o, d, controller="fixed:2", gap_target=0.05)
        assert quick.gap <= 0.05 + 1e-12
        assert quick.lower_bound_s <= opt * (1 + REL) <= quick.cost_s * (1 + 2 * REL)
        assert quick.stopped_by in ("gap_target", "proof")
        assert quick.expansions <= full.expansions
        saved += full.expansions - quick.expansions
        if quick.stopped_by == "gap_target":
            assert quick.status in ("instant", "improved")
    assert saved > 0


def test_steps_follow_the_deadline() -> None:
    """Control costs at most CONTROL_SHARE of a deadline: fewer steps for short deadlines, the
    requested number for long ones, never fewer than one."""
    for kind, cost_us in STEP_COST_US.items():
        for deadline_ms in (0.2, 1.0, 2.0, 5.0, 10.0, 50.0):
            steps = steps_for_deadline(deadline_ms, 20, cost_us)
            assert 1 <= steps <= 20, kind
            if steps > 1:
                assert steps * cost_us <= CONTROL_SHARE * deadline_ms * 1000.0 + 1e-9
    g = grid_graph(30, seed=26)
    planner = Planner(g, landmarks=build_landmarks(g, count=4, progress=False))
    expected = steps_for_deadline(1.0, 20, DECISION_COST.us("builtin"))
    res = plan(planner, 0, g.n_nodes - 1, deadline_ms=1.0, controller="decreasing", steps=20)
    assert res.steps == expected < 20
    res = plan(planner, 0, g.n_nodes - 1, budget_expansions=1000, steps=20, controller="decreasing")
    assert res.steps == 20  # budget contracts keep their steps (reproducible)
    # a constant weight needs no decisions: one step, no control time, and the same search as
    # the same contract cut into steps (the kernel carries its state across calls)
    one = plan(planner, 0, g.n_nodes - 1, budget_expansions=1000, controller="fixed:2")
    cut = planner.start(0, g.n_nodes - 1, budget_expansions=1000, steps=20)
    while not cut.done:
        cut.run_step(2.0)
    many = cut.result()
    assert one.steps == 1 and one.control_ms == 0.0
    assert (one.cost_s, one.expansions, one.lower_bound_s) == (
        many.cost_s,
        many.expansions,
        many.lower_bound_s,
    )
    assert np.array_equal(one.route_edges, many.route_edges)


def test_decision_cost_follows_what_decisions_cost() -> None:
    """The estimate moves towards measured decision costs (a running mean), never on a search
    without decisions, and one outlier moves it at most CLIP times its value by ALPHA."""
    cost = DecisionCost({"builtin": 5.0})
    cost.record("builtin", 0.0, 0)
    assert cost.us("builtin") == 5.0
    for _ in range(200):
        cost.record("builtin", 40e-6, 4)  # 10 us per decision
    assert cost.us("builtin") == pytest.approx(10.0, rel=1e-3)
    before = cost.us("builtin")
    cost.record("builtin", 1.0, 1)  # a decision preempted for a second
    assert cost.us("builtin") == pytest.approx(
        before + DecisionCost.ALPHA * (DecisionCost.CLIP - 1) * before
    )
    # fewer steps when decisions cost more (CONTROL_SHARE of a 1 ms deadline = 20 us)
    assert steps_for_deadline(1.0, 20, 10.0) == 2 and steps_for_deadline(1.0, 20, 2.0) == 10


def test_runaway_guard_caps_the_weight_and_keeps_the_optimum() -> None:
    """A weight-5 search on a graph with long detours (heavy reopening) is switched to weight 1
    by the guard, says so, and still proves the scipy optimum."""
    g = random_graph(400, 8000, seed=27, detour=3.0)
    import dueroute.planner.session as session

    old = session.RUNAWAY_FACTOR, session.RUNAWAY_MIN
    try:
        session.RUNAWAY_FACTOR, session.RUNAWAY_MIN = 0.5, 0
        capped = Planner(g)
        dist = dijkstra(g.csr(), directed=True, indices=[0])[0]
        hits = 0
        for d in range(1, 400, 29):
            if not math.isfinite(dist[d]):
                continue
            res = plan(capped, 0, d, controller="fixed:5")
            assert res.status == "optimal" and res.cost_s == pytest.approx(dist[d], rel=REL)
            hits += res.weight_capped
        assert hits > 0
    finally:
        session.RUNAWAY_FACTOR, session.RUNAWAY_MIN = old


@pytest.mark.slow
def test_bounds_and_routes_on_the_demo_region() -> None:
    """On the demo region (207k nodes, the shipped landmarks), for every controller and for
    contracts from one expansion to the proof, with and without a gap target: the instant
    route exists, every bound is at most the scipy ``csgraph.dijkstra`` optimum, every cost at
    least it, every route a path of the graph with its claimed cost, and a proof equals it."""
    from dueroute.demo_data.build import demo_graph_path
    from dueroute.planner.graph import load_graph
    from dueroute.planner.heuristics import load_or_build_landmarks

    g = load_graph(demo_graph_path("demo", progress=False))
    planner = Planner(g, landmarks=load_or_build_landmarks(g, progress=False))
    rng = np.random.default_rng(31)
    nodes = largest_component_nodes(g)
    pairs = [(int(a), int(b)) for a, b in rng.choice(nodes, (24, 2))]
    origins = sorted({o for o, _ in pairs})
    dist = dijkstra(g.csr(), directed=True, indices=origins)
    row = {o: i for i, o in enumerate(origins)}
    for o, d in pairs:
        if o == d:
            continue
        opt = float(dist[row[o], d])
        for controller in ("fixed:1", "fixed:3", "decreasing", "ana", "random"):
            for budget, gap in ((1, 0.0), (300, 0.0), (5000, 0.02), (None, 0.0)):
                res = plan(
                    planner, o, d, budget_expansions=budget, controller=controller, seed=1,
                    gap_target=gap,
                )  # fmt: skip
                assert res.route is not None and res.instant_cost_s is not None
                assert res.lower_bound_s <= opt * (1 + REL) <= res.cost_s * (1 + 2 * REL)
                _check_route(g, res)
                for imp in res.improvements:
                    assert imp.lower_bound_s <= opt * (1 + REL) <= imp.cost_s * (1 + 2 * REL)
                if budget is None:
                    assert res.status == "optimal" and res.cost_s == pytest.approx(opt, rel=REL)
                if gap:
                    assert res.gap <= gap + 1e-12 or res.stopped_by == "budget"
