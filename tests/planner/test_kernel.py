"""The numba search kernel against independent references (scipy csgraph, published theorems).

Graphs here are small random geometric graphs: nodes at random coordinates, edge lengths at
least the great-circle distance between their endpoints (so the great-circle heuristic is
admissible, as in any real road graph), built with ``planner.graph.build_graph``.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner import _kernel as K
from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m
from dueroute.planner.session import Planner


def random_graph(
    n: int,
    m: int,
    seed: int,
    *,
    n_places: int | None = None,
    detour: float = 1.0,
    span_deg: float = 0.05,
) -> RoadGraph:
    """Random directed geometric graph.

    ``n_places`` < ``n`` puts several nodes on the same spot, so edges between them have zero
    length and zero cost. Edge length = great-circle distance x (1 + U(0, detour)).
    """
    rng = np.random.default_rng(seed)
    places = n if n_places is None else n_places
    plat = 48.0 + rng.random(places) * span_deg
    plon = 11.0 + rng.random(places) * span_deg
    where = rng.integers(0, places, n)
    lat, lon = plat[where], plon[where]
    tail = rng.integers(0, n, m)
    head = rng.integers(0, n, m)
    length = great_circle_m(lat[tail], lon[tail], lat[head], lon[head]) * (
        1.0 + detour * rng.random(m)
    )
    speed = rng.choice(np.array([20.0, 30.0, 50.0, 80.0, 110.0]), m)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(n, dtype=np.int64),
        tail=tail,
        head=head,
        length_m=length,
        speed_kph=speed,
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
    )


def grid_graph(side: int, seed: int = 0, spacing_deg: float = 0.001) -> RoadGraph:
    """side x side grid with two-way streets and random speeds (a road-like test graph)."""
    rng = np.random.default_rng(seed)
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    lat = 48.0 + ii.ravel() * spacing_deg + rng.normal(0, spacing_deg * 0.1, side * side)
    lon = 11.0 + jj.ravel() * spacing_deg + rng.normal(0, spacing_deg * 0.1, side * side)
    idx = np.arange(side * side).reshape(side, side)
    right = np.stack((idx[:, :-1].ravel(), idx[:, 1:].ravel()), axis=1)
    down = np.stack((idx[:-1, :].ravel(), idx[1:, :].ravel()), axis=1)
    pairs = np.concatenate((right, down))
    pairs = np.concatenate((pairs, pairs[:, ::-1]))
    tail, head = pairs[:, 0], pairs[:, 1]
    m = tail.shape[0]
    length = great_circle_m(lat[tail], lon[tail], lat[head], lon[head]) * (1 + 0.2 * rng.random(m))
    speed = rng.choice(np.array([30.0, 50.0, 70.0, 100.0]), m)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(side * side, dtype=np.int64),
        tail=tail,
        head=head,
        length_m=length,
        speed_kph=speed,
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
    )


def exact_landmarks(graph: RoadGraph, landmarks: list[int]) -> SimpleNamespace:
    """ALT tables from scipy csgraph.dijkstra, in the kernel's float32 node-major layout."""
    csr = graph.csr()
    d_from = dijkstra(csr, directed=True, indices=landmarks)  # landmark -> v
    d_to = dijkstra(csr.T.tocsr(), directed=True, indices=landmarks)  # v -> landmark
    finite = np.concatenate((d_from[np.isfinite(d_from)], d_to[np.isfinite(d_to)]))
    top = float(finite.max()) if finite.size else 0.0
    # float32 rounding moves each stored distance by at most top * 2^-24; two of them per bound
    slack = 2.0 * top * 2.0**-23
    return SimpleNamespace(
        lm_from=np.ascontiguousarray(d_from.T, dtype=np.float32),
        lm_to=np.ascontiguousarray(d_to.T, dtype=np.float32),
        slack_s=slack,
    )


def _run_to_end(planner: Planner, origin: int, target: int, weight: float, mode: int) -> tuple:
    """Drive the kernel directly: returns (status, incumbent, improvements, expansions)."""
    ws = planner._acquire()
    try:
        ist, fst = ws.istate, ws.fstate
        ist[:] = 0
        fst[:] = 0.0
        ist[K.I_GEN] = ws.next_generation()
        ist[K.I_ORIGIN], ist[K.I_TARGET], ist[K.I_MODE] = origin, target, mode
        fst[K.F_WEIGHT] = weight
        fst[K.F_GC_SCALE] = planner._gc_scale
        fst[K.F_GC_MARGIN] = planner._gc_margin
        fst[K.F_LM_SLACK] = planner._lm_slack
        K.start_query(
            planner._coords,
            planner._lm_from,
            planner._lm_to,
            ws.nodei,
            ws.nodef,
            ws.heap,
            ist,
            fst,
        )
        ist[K.I_CHUNK] = 7  # small chunks: exercise resuming
        incumbents = []
        while True:
            status = planner._chunk(ws)
            if status == K.IMPROVED:
                incumbents.append(float(fst[K.F_INCUMBENT]))
            elif status == K.PROVEN:
                return status, float(fst[K.F_INCUMBENT]), incumbents, int(ist[K.I_EXPANSIONS])
    finally:
        planner._release(ws)


@pytest.mark.parametrize("mode", [K.MODE_WEIGHTED, K.MODE_ANA])
def test_kernel_run_to_end_is_optimal(mode: int) -> None:
    """Run to proof, the kernel's incumbent equals scipy ``csgraph.dijkstra`` (rel 1e-9);
    incumbents only decrease (Hansen & Zhou 2007, Anytime Weighted A*; van den Berg et al. 2011,
    ANA*)."""
    g = random_graph(400, 1600, seed=1)
    planner = Planner(g)
    dist = dijkstra(g.csr(), directed=True, indices=np.arange(10))
    for s in range(10):
        for t in range(0, 400, 37):
            if s == t:
                continue
            status, inc, incumbents, _ = _run_to_end(planner, s, t, 3.0, mode)
            assert status == K.PROVEN
            if math.isfinite(dist[s, t]):
                assert inc == pytest.approx(dist[s, t], rel=1e-9)
                assert incumbents == sorted(incumbents, reverse=True)
            else:
                assert inc == math.inf


def test_alt_bounds_from_exact_tables_keep_optimality() -> None:
    """With ALT tables computed by scipy ``csgraph.dijkstra`` (exact distances, Goldberg &
    Harrelson 2005: ALT bounds are admissible), weight 1 still returns the dijkstra optimum, and
    needs no more expansions than the great-circle bound alone on average."""
    g = grid_graph(30, seed=2)
    lms = exact_landmarks(g, [0, 29, 870, 899])
    plain, alt = Planner(g), Planner(g, landmarks=lms)
    assert alt.n_landmarks == 4
    rng = np.random.default_rng(0)
    pairs = rng.integers(0, g.n_nodes, (25, 2))
    dist = dijkstra(g.csr(), directed=True, indices=pairs[:, 0])
    exp_plain = exp_alt = 0
    for i, (s, t) in enumerate(pairs):
        if s == t:
            continue
        _, inc_p, _, e_p = _run_to_end(plain, int(s), int(t), 1.0, K.MODE_WEIGHTED)
        _, inc_a, _, e_a = _run_to_end(alt, int(s), int(t), 1.0, K.MODE_WEIGHTED)
        assert inc_p == pytest.approx(dist[i, t], rel=1e-9)
        assert inc_a == pytest.approx(dist[i, t], rel=1e-9)
        exp_plain += e_p
        exp_alt += e_a
    assert exp_alt <= exp_plain


def test_heuristic_is_admissible_against_dijkstra() -> None:
    """h(v) <= exact distance d(v, t) from scipy ``csgraph.dijkstra`` on the reversed graph, for
    both the great-circle term and ALT tables (Goldberg & Harrelson 2005)."""
    g = random_graph(300, 1500, seed=3)
    lms = exact_landmarks(g, [5, 50, 150])
    planner = Planner(g, landmarks=lms)
    ws = planner._acquire()
    t = 17
    exact_to_t = dijkstra(g.csr().T.tocsr(), directed=True, indices=t)
    ws.istate[:] = 0
    ws.istate[K.I_GEN] = ws.next_generation()
    ws.istate[K.I_ORIGIN], ws.istate[K.I_TARGET] = 0, t
    ws.fstate[K.F_GC_SCALE] = planner._gc_scale
    ws.fstate[K.F_GC_MARGIN] = planner._gc_margin
    ws.fstate[K.F_LM_SLACK] = planner._lm_slack
    ws.fstate[K.F_WEIGHT] = 1.0
    K.start_query(
        planner._coords,
        planner._lm_from,
        planner._lm_to,
        ws.nodei,
        ws.nodef,
        ws.heap,
        ws.istate,
        ws.fstate,
    )
    ws.istate[K.I_CHUNK] = 10**9
    while planner._chunk(ws) != K.PROVEN:
        pass
    touched = np.flatnonzero(ws.nodei[:, K.N_STAMP] == ws.istate[K.I_GEN])
    h = ws.nodef[touched, K.N_H]
    d = exact_to_t[touched]
    assert np.all(h <= d * (1 + 1e-12) + 1e-9)
    # the landmarks prove some nodes unable to reach t (h = inf), and only such nodes
    assert np.all(np.isinf(d[np.isinf(h)]))
    planner._release(ws)


def test_extract_route_walks_parallel_edges_by_index() -> None:
    """Between two nodes with two parallel edges, the route names the cheaper edge (hand-checked
    fixture: 0 -> 1 by a 60 s and a 30 s edge, then 1 -> 2)."""
    lat = np.array([48.0, 48.0, 48.0])
    lon = np.array([11.0, 11.001, 11.002])
    seg = float(great_circle_m(48.0, 11.0, 48.0, 11.001))
    g = build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(3),
        tail=np.array([0, 0, 1]),
        head=np.array([1, 1, 2]),
        length_m=np.array([seg * 2, seg, seg]),
        speed_kph=np.array([36.0, 36.0, 36.0]),
        road_class=np.zeros(3, dtype=np.int8),
        speed_source=np.zeros(3, dtype=np.int8),
        spatial_order=False,
    )
    planner = Planner(g)
    status, inc, _, _ = _run_to_end(planner, 0, 2, 1.0, K.MODE_WEIGHTED)
    assert status == K.PROVEN
    assert inc == pytest.approx(2 * seg / 10.0, rel=1e-12)
    ws = planner._acquire()
    # the pooled workspace still holds the finished query's parent pointers
    nodes, edges = K.extract_route(ws.nodei, 0, 2, g.n_nodes)
    planner._release(ws)
    assert nodes.tolist() == [0, 1, 2]
    assert g.travel_time_s[edges].sum() == pytest.approx(inc, rel=1e-12)
    assert g.travel_time_s[edges[0]] == g.travel_time_s[g.edges_of(0)].min()


def test_workspace_reuse_matches_fresh_workspaces() -> None:
    """Generation stamps: 150 queries through one reused workspace give the same costs and
    expansion counts as a fresh planner per query, and both equal scipy ``csgraph.dijkstra``."""
    g = random_graph(500, 2500, seed=4)
    shared = Planner(g)
    rng = np.random.default_rng(5)
    pairs = rng.integers(0, g.n_nodes, (150, 2))
    dist = dijkstra(g.csr(), directed=True, indices=np.unique(pairs[:, 0]))
    row = {int(s): i for i, s in enumerate(np.unique(pairs[:, 0]))}
    for s, t in pairs:
        if s == t:
            continue
        a = _run_to_end(shared, int(s), int(t), 2.0, K.MODE_WEIGHTED)
        b = _run_to_end(Planner(g), int(s), int(t), 2.0, K.MODE_WEIGHTED)
        assert a == b
        ref = dist[row[int(s)], t]
        assert a[1] == pytest.approx(ref, rel=1e-9) if math.isfinite(ref) else a[1] == math.inf


def test_generation_wrap_clears_stamps() -> None:
    """When the int32 generation counter would overflow, stamps are cleared and results stay
    equal to scipy ``csgraph.dijkstra``."""
    g = random_graph(200, 1000, seed=6)
    planner = Planner(g)
    ws = planner._acquire()
    ws.generation = 2**31 - 3
    planner._release(ws)
    dist = dijkstra(g.csr(), directed=True, indices=[3])[0]
    for t in range(10, 20):
        _, inc, _, _ = _run_to_end(planner, 3, t, 1.0, K.MODE_WEIGHTED)
        if math.isfinite(dist[t]):
            assert inc == pytest.approx(dist[t], rel=1e-9)
        else:
            assert inc == math.inf
    assert planner._pool[0].generation < 10


def test_dag_reachability_against_scipy() -> None:
    """Component-level reachability equals reachability by scipy ``csgraph.dijkstra``."""
    g = random_graph(300, 420, seed=7)  # sparse: many components, one-way links between them
    planner = Planner(g)
    dindptr, dhead = planner._condensation()
    dist = dijkstra(g.csr(), directed=True, indices=np.arange(40), unweighted=True)
    for s in range(40):
        for t in range(0, 300, 7):
            got = K.dag_reachable(dindptr, dhead, g.component[s], g.component[t])
            assert got == bool(np.isfinite(dist[s, t])), (s, t)


@pytest.mark.parametrize(
    ("weight", "mode"), [(1.0, K.MODE_WEIGHTED), (3.0, K.MODE_WEIGHTED), (1.0, K.MODE_ANA)]
)
def test_heap_compaction_keeps_results_exact(weight: float, mode: int) -> None:
    """With heap rows only just larger than the node count, lazy-deletion entries fill them
    and force compactions; results still equal scipy ``csgraph.dijkstra``."""
    g = random_graph(120, 4000, seed=30, detour=2.0)  # dense: many improvements of open nodes
    planner = Planner(g)
    ws = planner._acquire()
    ws.heap = np.zeros((2, g.n_nodes + 1, 2))
    ws.arrays = (ws.nodei, ws.nodef, ws.heap, ws.istate, ws.fstate)
    planner._release(ws)
    origins = [0, 7, 33]
    dist = dijkstra(g.csr(), directed=True, indices=origins)
    compactions = 0
    for i, s in enumerate(origins):
        for t in range(1, 120, 9):
            if t == s:
                continue
            _, inc, _, _ = _run_to_end(planner, s, t, weight, mode)
            if math.isfinite(dist[i, t]):
                assert inc == pytest.approx(dist[i, t], rel=1e-9)
            else:
                assert inc == math.inf
            compactions += int(planner._pool[0].istate[K.I_COMPACTIONS])
    assert compactions > 0
