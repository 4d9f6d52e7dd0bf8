"""Metalevel features: shape and ranges, meaning, and scale-freedom across graphs."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.features import (
    FEATURE_HIGH,
    FEATURE_LOW,
    FEATURE_NAMES,
    N_FEATURES,
    SCHEMA_VERSION,
    compute_features,
)
from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m
from dueroute.planner.session import Planner

IDX = {name: i for i, name in enumerate(FEATURE_NAMES)}


def grid(speed_factor: float = 1.0, n: int = 12) -> RoadGraph:
    """A jittered street grid with faster roads on every 3rd line; speeds scaled by a factor."""
    rng = np.random.default_rng(4)
    r, c = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    lat = 45.0 + r.ravel() * 0.003 + rng.normal(0, 3e-4, n * n)
    lon = 7.0 + c.ravel() * 0.004 + rng.normal(0, 3e-4, n * n)
    tail, head, kph = [], [], []
    for i in range(n):
        for j in range(n):
            for di, dj in ((0, 1), (1, 0)):
                if i + di < n and j + dj < n:
                    a, b = i * n + j, (i + di) * n + j + dj
                    fast = (di == 0 and i % 3 == 0) or (dj == 0 and j % 3 == 0)
                    tail += [a, b]
                    head += [b, a]
                    kph += [70.0 if fast else 25.0] * 2
    t, h = np.array(tail), np.array(head)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(n * n),
        tail=t,
        head=h,
        length_m=great_circle_m(lat[t], lon[t], lat[h], lon[h]),
        speed_kph=np.array(kph) * speed_factor,
        road_class=np.zeros(len(t), dtype=np.int8),
        speed_source=np.ones(len(t), dtype=np.int8),
        spatial_order=False,
    )


def trace(graph: RoadGraph, origin: int, destination: int, weights, budget: int = 400):
    search = Planner(graph).start(origin, destination, budget_expansions=budget, steps=len(weights))
    out = []
    for w in weights:
        if search.done:
            break
        search.run_step(w)
        stats = search.stats().replace(cpu_share_last_step=1.0)
        out.append((stats, compute_features(stats)))
    return out


def test_schema_is_consistent():
    assert SCHEMA_VERSION >= 1
    assert len(FEATURE_NAMES) == N_FEATURES == FEATURE_LOW.shape[0] == FEATURE_HIGH.shape[0]
    assert len(set(FEATURE_NAMES)) == N_FEATURES
    assert np.all(FEATURE_LOW < FEATURE_HIGH)


def test_features_are_finite_in_range_and_mean_what_they_say():
    graph = grid()
    steps = trace(graph, 0, graph.n_nodes - 1, [5.0, 3.0, 2.0, 1.5, 1.0, 1.0, 1.0, 1.0])
    assert steps
    for stats, x in steps:
        assert x.dtype == np.float32 and x.shape == (N_FEATURES,)
        assert np.all(np.isfinite(x)) and np.all(x >= FEATURE_LOW) and np.all(x <= FEATURE_HIGH)
        assert x[IDX["has_incumbent"]] == (stats.incumbent_cost_s is not None)
        assert x[IDX["contract_fraction_left"]] == pytest.approx(stats.contract_fraction_left)
        assert x[IDX["weight"]] == pytest.approx((stats.weight - 1) / 4)
    assert any(s.incumbent_cost_s is not None for s, _ in steps)


def test_quality_estimate_is_a_lower_bound_on_true_quality():
    """bound / incumbent <= optimal / incumbent, optimum from scipy csgraph.dijkstra: the
    feature never claims a better route than it has."""
    graph = grid()
    dist = dijkstra(graph.csr(), indices=0)
    for dest in (graph.n_nodes - 1, 40, 77):
        for stats, x in trace(graph, 0, dest, [3.0] * 10, budget=300):
            if stats.incumbent_cost_s is not None:
                true_quality = dist[dest] / stats.incumbent_cost_s
                assert x[IDX["quality_estimate"]] <= true_quality + 1e-6


def test_features_do_not_depend_on_the_time_scale():
    """Halving every speed doubles every travel time and h; the search is the same, so every
    feature except h_start_log (the absolute trip length) is unchanged."""
    weights = [4.0, 2.0, 1.5, 1.0, 1.0, 1.0]
    a = trace(grid(1.0), 3, 130, weights)
    b = trace(grid(0.5), 3, 130, weights)
    assert len(a) == len(b)
    keep = [i for i, name in enumerate(FEATURE_NAMES) if name != "h_start_log"]
    for (sa, xa), (sb, xb) in zip(a, b, strict=True):
        assert sb.h_start_s == pytest.approx(2 * sa.h_start_s)
        np.testing.assert_allclose(xa[keep], xb[keep], rtol=1e-5, atol=1e-6)
        assert xb[IDX["h_start_log"]] > xa[IDX["h_start_log"]]


def test_before_any_route_and_degenerate_stats():
    graph = grid()
    stats = Planner(graph).start(0, 100, budget_expansions=10, steps=2).stats()
    x = compute_features(stats)
    assert x[IDX["has_incumbent"]] == 0 and x[IDX["quality_estimate"]] == 0
    assert x[IDX["stale_share"]] == 1.0
    weird = stats.replace(
        h_start_s=0.0, open_size=0, open_min_f_s=float("inf"), lower_bound_s=float("nan")
    )
    y = compute_features(weird)
    assert np.all(np.isfinite(y)) and np.all(y >= FEATURE_LOW) and np.all(y <= FEATURE_HIGH)


def _reference_features(stats) -> np.ndarray:
    """The module docstring's table, written out in plain Python (an independent reading)."""
    h0 = max(stats.h_start_s if math.isfinite(stats.h_start_s) else 0.0, 1.0)
    inc = stats.incumbent_cost_s
    has = inc is not None and math.isfinite(inc) and inc > 0
    bound = stats.lower_bound_s if math.isfinite(stats.lower_bound_s) else 0.0
    size = max(stats.open_size, 0)
    steps = max(stats.steps_done, 0)
    vals = [
        1.0 if has else 0.0,
        min(max(bound / inc, 0.0), 1.0) if has else 0.0,
        stats.contract_fraction_left,
        (stats.weight - 1.0) / 4.0,
        math.log10(1.0 + max(stats.h_start_s, 0.0)) / 4.0,
        math.log10(1.0 + size) / 6.0,
        stats.open_mean_g_s / h0 if size else 0.0,
        stats.open_mean_h_s / h0 if size else 0.0,
        (stats.open_min_f_s / h0 if size else bound / h0),
        bound / h0,
        inc / h0 if has else 0.0,
        math.log1p(stats.improvements) / 3.0,
        (stats.steps_since_improvement / steps if steps else 0.0) if has else 1.0,
        stats.cpu_share_last_step,
        math.log10(1.0 + max(stats.time_left_ms, 0.0)) / 2.0,
        math.log10(1.0 + max(stats.expansion_rate_per_s, 0.0)) / 7.0,
        math.log10(
            1.0
            + stats.time_left_ms / 1000.0 * stats.expansion_rate_per_s * stats.cpu_share_last_step
        )
        / 6.0,
    ]
    return np.clip(np.asarray(vals, dtype=np.float32), FEATURE_LOW, FEATURE_HIGH)


def test_numba_features_equal_the_table_read_in_python():
    """The compiled feature function (shared by training and serving) equals a plain-Python
    reading of the feature table, step by step along real searches."""
    graph = grid()
    for weights in ([1.0] * 6, [5.0, 3.0, 1.0, 2.0, 1.0, 1.0]):
        for stats, x in trace(graph, 0, graph.n_nodes - 1, weights, budget=300):
            np.testing.assert_allclose(x, _reference_features(stats), rtol=1e-6, atol=1e-7)


def test_clock_features_equal_the_table_read_in_python():
    """Schema 2's clock features (time left, expansion rate, what the time left buys at the CPU
    share) follow the table: the search's own vector with clock values set, and a real
    deadline search (whose stats carry the measured rate and time left)."""
    graph = grid()
    stats = Planner(graph).start(0, graph.n_nodes - 1, budget_expansions=300, steps=3).stats()
    for left_ms, rate, share in ((0.0, 0.0, 1.0), (5.0, 2e6, 0.5), (49.0, 9e6, 0.25)):
        s = stats.replace(
            time_left_ms=left_ms, expansion_rate_per_s=rate, cpu_share_last_step=share
        )
        np.testing.assert_allclose(
            compute_features(s), _reference_features(s), rtol=1e-6, atol=1e-7
        )
    # 10 ms left at 2e6 expansions/s and half the CPU buys 1e4 expansions: log10(1 + 1e4) / 6
    s = stats.replace(time_left_ms=10.0, expansion_rate_per_s=2e6, cpu_share_last_step=0.5)
    assert compute_features(s)[IDX["affordable_log"]] == pytest.approx(math.log10(1e4 + 1) / 6)
    search = Planner(graph).start(0, graph.n_nodes - 1, deadline_ms=1000.0, steps=4)
    search.run_step(1.0)
    live = search.stats()
    assert 0.0 <= live.time_left_ms <= 1000.0
    np.testing.assert_allclose(
        compute_features(live), _reference_features(live), rtol=1e-6, atol=1e-7
    )
