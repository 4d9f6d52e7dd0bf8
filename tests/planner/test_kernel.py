"""The numba search kernel against independent references (scipy csgraph, published theorems).

Graphs here are small random geometric graphs: nodes at random coordinates, edge lengths at
least the great-circle distance between their endpoints (so the great-circle heuristic is
admissible, as in any real road graph), built with ``planner.graph.build_graph``. The kernel is
driven directly (``_open`` below mirrors what ``planner.session`` does) with small expansion
limits, so resuming a search between calls is exercised too.
"""

from __future__ import annotations

import math
import threading
import time

import numpy as np
import pytest
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import dijkstra

from dueroute.planner import _kernel as K
from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m
from dueroute.planner.heuristics import build_landmarks, largest_component_nodes
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


def _open(
    planner: Planner,
    sources: list[tuple[int, float]],
    targets: list[tuple[int, int, float]],
    weight: float,
    mode: int,
    ws=None,
):
    """Set up a query like ``planner.session`` does: sources ``(node, g0)``, targets
    ``(node, kind, exit_cost)``; the target position and landmark row are the first target's."""
    ws = ws if ws is not None else planner._acquire()
    ist, fst = ws.istate, ws.fstate
    ist[:] = 0
    fst[:] = 0.0
    ist[K.I_GEN] = ws.next_generations(1)
    ist[K.I_MODE] = mode
    fst[K.F_WEIGHT] = weight
    fst[K.F_GC_SCALE] = planner._gc_scale if planner.use_chord else 0.0
    fst[K.F_GC_MARGIN] = planner._gc_margin
    fst[K.F_LM_SLACK] = planner._lm_slack
    fst[K.F_LM_UNIT] = planner._lm_unit
    t0 = targets[0][0]
    fst[K.F_T_X : K.F_T_Z + 1] = planner._coords[t0]
    ist[K.I_N_TARGETS] = len(targets)
    for k, (node, kind, exit_cost) in enumerate(targets):
        ist[K.I_TNODE + k] = node
        ist[K.I_TKIND + k] = kind
        fst[K.F_TCOST + k] = exit_cost
    if planner.n_landmarks:
        ist[K.I_TLM : K.I_TLM + 2 * planner.n_landmarks] = planner._lm[t0].reshape(-1)
    ist[K.I_N_ACTIVE] = planner.active_landmarks
    src = np.array([s for s, _ in sources], dtype=np.int64)
    g0 = np.array([g for _, g in sources], dtype=np.float64)
    K.start_query(planner._coords, planner._lm, ws.state, ws.heap, ist, fst, src, g0)
    return ws


def _drive(planner: Planner, ws, limit: int = 7) -> tuple[int, float, list[float]]:
    """Run to the end in small calls; returns (status, incumbent, incumbents logged)."""
    ist, fst = ws.istate, ws.fstate
    ist[K.I_LIMIT] = limit
    while True:
        status = planner._run(ws)
        if status != K.LIMIT:
            count = min(int(ist[K.I_LOG_COUNT]), K.MAX_LOG)
            logged = [float(fst[K.F_LOG + 4 * i]) for i in range(count)]
            return status, float(fst[K.F_INCUMBENT]), logged


def _run_to_end(planner: Planner, origin: int, target: int, weight: float, mode: int) -> tuple:
    ws = _open(planner, [(origin, 0.0)], [(target, K.ARRIVAL, 0.0)], weight, mode)
    try:
        status, inc, logged = _drive(planner, ws)
        return status, inc, logged, int(ws.istate[K.I_EXPANSIONS])
    finally:
        planner._release(ws)


@pytest.mark.parametrize("mode", [K.MODE_WEIGHTED, K.MODE_ANA])
def test_kernel_run_to_end_is_optimal(mode: int) -> None:
    """Run to proof, the kernel's incumbent equals scipy ``csgraph.dijkstra`` (rel 1e-9);
    logged incumbents only decrease (Hansen & Zhou 2007, Anytime Weighted A*; van den Berg et
    al. 2011, ANA*)."""
    g = random_graph(400, 1600, seed=1)
    planner = Planner(g)
    dist = dijkstra(g.csr(), directed=True, indices=np.arange(10))
    for s in range(10):
        for t in range(0, 400, 37):
            if s == t:
                continue
            status, inc, logged, _ = _run_to_end(planner, s, t, 3.0, mode)
            assert status == K.PROVEN
            if math.isfinite(dist[s, t]):
                assert inc == pytest.approx(dist[s, t], rel=1e-9)
                assert logged == sorted(logged, reverse=True) and logged[-1] == inc
            else:
                assert inc == math.inf


def test_alt_landmarks_keep_optimality_and_cut_expansions() -> None:
    """With ALT landmarks (Goldberg & Harrelson 2005: admissible bounds), weight 1 returns the
    scipy ``csgraph.dijkstra`` optimum and needs fewer expansions than the great-circle bound
    alone, over many queries."""
    g = grid_graph(30, seed=2)
    plain, alt = Planner(g), Planner(g, landmarks=build_landmarks(g, count=6, progress=False))
    assert alt.n_landmarks == 6 and not alt.use_chord
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
    assert exp_alt < exp_plain


@pytest.mark.parametrize("with_landmarks", [False, True])
def test_heuristic_is_admissible_against_dijkstra(with_landmarks: bool) -> None:
    """h(v) <= exact distance d(v, t) from scipy ``csgraph.dijkstra`` on the reversed graph, for
    every node the search touched: the great-circle term, and the 16-bit ALT codes with their
    slack (Goldberg & Harrelson 2005), including nodes that cannot reach t at all."""
    g = random_graph(300, 1500, seed=3)
    lms = build_landmarks(g, count=3, progress=False) if with_landmarks else None
    planner = Planner(g, landmarks=lms)
    for t in (17, 123, 250):
        exact_to_t = dijkstra(g.csr().T.tocsr(), directed=True, indices=t)
        ws = _open(planner, [(0, 0.0)], [(t, K.ARRIVAL, 0.0)], 1.0, K.MODE_WEIGHTED)
        _drive(planner, ws, limit=10**9)
        si = ws.state.view(np.int32)
        touched = np.flatnonzero(si[:, K.SI_STAMP] == ws.istate[K.I_GEN])
        h = ws.state[touched, K.S_H]
        d = exact_to_t[touched]
        assert np.all(h <= d * (1 + 1e-12) + 1e-9)
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
    ws = _open(planner, [(0, 0.0)], [(2, K.ARRIVAL, 0.0)], 1.0, K.MODE_WEIGHTED)
    status, inc, _ = _drive(planner, ws)
    assert status == K.PROVEN
    assert inc == pytest.approx(2 * seg / 10.0, rel=1e-12)
    nodes, edges = K.extract_route(ws.state, int(ws.istate[K.I_BEST_NODE]), g.n_nodes)
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
    origins = [0, 7, 33]
    dist = dijkstra(g.csr(), directed=True, indices=origins)
    compactions = 0
    for i, s in enumerate(origins):
        for t in range(1, 120, 9):
            if t == s:
                continue
            _open(planner, [(s, 0.0)], [(t, K.ARRIVAL, 0.0)], weight, mode, ws=ws)
            _, inc, _ = _drive(planner, ws)
            if math.isfinite(dist[i, t]):
                assert inc == pytest.approx(dist[i, t], rel=1e-9)
            else:
                assert inc == math.inf
            compactions += int(ws.istate[K.I_COMPACTIONS])
    assert compactions > 0


def test_sources_and_exit_targets_equal_dijkstra_on_an_augmented_graph() -> None:
    """Several sources with start costs and EXIT targets (the destination on an edge leaving a
    node, reached with an extra cost) give the optimum of scipy ``csgraph.dijkstra`` on the
    graph augmented, in the test, with a super-source and a super-target joined by those costs.

    The targets here are scattered at random, so no single target position gives an admissible
    bound for all of them: the heuristic is turned off (h = 0, i.e. Dijkstra's order), which
    tests the source and target mechanics alone (the session only ever gives targets around
    one destination point)."""
    g = random_graph(250, 1200, seed=11)
    planner = Planner(g)
    rng = np.random.default_rng(12)
    n = g.n_nodes
    csr = g.csr().tocoo()
    for _ in range(30):
        srcs = [(int(v), float(rng.uniform(0, 30))) for v in rng.choice(n, 2, replace=False)]
        exits = [(int(v), float(rng.uniform(0, 30))) for v in rng.choice(n, 3, replace=False)]
        if {s for s, _ in srcs} & {t for t, _ in exits}:
            continue
        rows = np.concatenate([csr.row, [n] * 2, [t for t, _ in exits]])
        cols = np.concatenate([csr.col, [s for s, _ in srcs], [n + 1] * 3])
        vals = np.concatenate([csr.data, [g0 for _, g0 in srcs], [c for _, c in exits]])
        aug = csr_matrix((vals + 1e-300, (rows, cols)), shape=(n + 2, n + 2))
        ref = float(dijkstra(aug, directed=True, indices=n)[n + 1])
        ws = _open(planner, srcs, [(t, K.EXIT, c) for t, c in exits], 1.0, K.MODE_WEIGHTED)
        ws.fstate[K.F_GC_SCALE] = 0.0
        si = ws.state.view(np.int32)
        touched = si[:, K.SI_STAMP] == ws.istate[K.I_GEN]
        ws.state[touched, K.S_H] = 0.0  # the sources were opened with the chord bound
        ws.istate[K.I_KEYED_MODE] = -1  # force a re-key with h = 0
        ws.fstate[K.F_SUM_H] = 0.0
        status, inc, _ = _drive(planner, ws)
        planner._release(ws)
        assert status == K.PROVEN
        if math.isfinite(ref):
            assert inc == pytest.approx(ref, rel=1e-9)
        else:
            assert inc == math.inf


def test_instant_route_is_a_real_path_no_cheaper_than_the_optimum() -> None:
    """The instant route (origin -> landmark -> destination along the landmarks' trees, loop
    cut) exists for every pair of the landmarks' strong component, is a path of the graph
    (each edge starts where the previous ended) from the origin to the destination, costs what
    its edges cost, and never less than the scipy ``csgraph.dijkstra`` optimum."""
    g = grid_graph(20, seed=8)
    planner = Planner(g, landmarks=build_landmarks(g, count=4, progress=False))
    nodes = largest_component_nodes(g)
    rng = np.random.default_rng(9)
    tail = np.asarray(g.tail)
    for s, t in rng.choice(nodes, (40, 2)):
        s, t = int(s), int(t)
        if s == t:
            continue
        ws = _open(planner, [(s, 0.0)], [(t, K.ARRIVAL, 0.0)], 1.0, K.MODE_WEIGHTED)
        ws.istate[K.I_GEN] = ws.next_generations(K.INSTANT_GENERATIONS)
        count, cost, _, _ = K.instant_route(
            planner._tail,
            planner._head,
            planner._cost,
            planner._lm,
            planner._lm_nodes,
            planner._tree_to,
            planner._tree_from,
            ws.state,
            ws.istate,
            ws.fstate,
            np.array([s]),
            np.array([0.0]),
            ws.route_buf,
        )
        edges = ws.route_buf[:count].copy()
        planner._release(ws)
        assert count >= 1
        assert int(tail[edges[0]]) == s and int(g.head[edges[-1]]) == t
        assert np.all(tail[edges[1:]] == np.asarray(g.head)[edges[:-1]])
        assert cost == pytest.approx(float(g.travel_time_s[edges].sum()), rel=1e-12)
        opt = float(dijkstra(g.csr(), directed=True, indices=s)[t])
        assert cost >= opt * (1 - 1e-12)


def test_gap_target_stops_with_the_gap_reached() -> None:
    """With a gap target the kernel stops as soon as (incumbent - min f) <= target * incumbent;
    the optimum (scipy ``csgraph.dijkstra``) then lies within that gap of the incumbent."""
    g = grid_graph(40, seed=10)
    planner = Planner(g)
    dist = dijkstra(g.csr(), directed=True, indices=[0])[0]
    t = g.n_nodes - 1
    ws = _open(planner, [(0, 0.0)], [(t, K.ARRIVAL, 0.0)], 3.0, K.MODE_WEIGHTED)
    ws.fstate[K.F_GAP_TARGET] = 0.05
    status, inc, _ = _drive(planner, ws, limit=50)
    min_f = K.open_min_f(ws.heap, ws.istate)
    planner._release(ws)
    assert status in (K.GAP_REACHED, K.PROVEN)
    assert inc - min(min_f, inc) <= 0.05 * inc + 1e-9
    assert dist[t] <= inc <= dist[t] / (1 - 0.05) + 1e-9


def test_the_clock_and_the_stop_flag() -> None:
    """The kernel's clock is the one ``time.perf_counter_ns`` reads; a call returns TIME_UP at
    the instant it is given, and STOPPED soon after another thread sets the stop flag."""
    before = time.perf_counter_ns()
    now = K.monotonic_ns()
    assert before <= now <= time.perf_counter_ns()
    g = grid_graph(200, seed=13)  # 40,000 nodes: a long search
    planner = Planner(g)
    ws = _open(planner, [(0, 0.0)], [(g.n_nodes - 1, K.ARRIVAL, 0.0)], 1.0, K.MODE_WEIGHTED)
    ws.istate[K.I_LIMIT] = -1
    ws.istate[K.I_UNTIL_NS] = time.perf_counter_ns() + 1_000_000  # 1 ms from now
    assert planner._run(ws) == K.TIME_UP
    assert ws.istate[K.I_CLOCK_NS] >= ws.istate[K.I_UNTIL_NS]
    ws.istate[K.I_UNTIL_NS] = 0
    timer = threading.Timer(0.002, lambda: ws.istate.__setitem__(K.I_STOP, 1))
    timer.start()
    status = planner._run(ws)
    timer.join()
    planner._release(ws)
    assert status in (K.STOPPED, K.PROVEN)


def test_runaway_guard_switches_to_weight_one() -> None:
    """A weighted search whose expansions outrun the nodes it touched is switched to weight 1
    and still proves the scipy ``csgraph.dijkstra`` optimum."""
    g = random_graph(300, 6000, seed=14, detour=3.0)  # dense, long detours: heavy reopening
    planner = Planner(g)
    dist = dijkstra(g.csr(), directed=True, indices=[0])[0]
    switched = 0
    for t in range(1, 300, 23):
        ws = _open(planner, [(0, 0.0)], [(t, K.ARRIVAL, 0.0)], 5.0, K.MODE_WEIGHTED)
        ws.fstate[K.F_RUNAWAY_FACTOR] = 0.5  # trip the guard early
        ws.fstate[K.F_RUNAWAY_MIN] = 0.0
        status, inc, _ = _drive(planner, ws, limit=10**9)
        switched += int(ws.istate[K.I_RUNAWAY])
        assert ws.istate[K.I_RUNAWAY] == 0 or ws.fstate[K.F_WEIGHT] == 1.0
        planner._release(ws)
        assert status == K.PROVEN
        if math.isfinite(dist[t]):
            assert inc == pytest.approx(dist[t], rel=1e-9)
    assert switched > 0
