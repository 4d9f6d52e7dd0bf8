"""Weight controllers: specs, schedules and the results they lead to."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.controllers import (
    WEIGHTS,
    Controller,
    DecreasingController,
    make_controller,
)
from dueroute.planner.errors import InvalidRequest
from dueroute.planner.session import Planner, SearchStats, plan
from tests.planner.test_kernel import grid_graph


def _stats(**kw) -> SearchStats:
    base = dict(
        incumbent_cost_s=None,
        lower_bound_s=10.0,
        open_size=5,
        open_mean_g_s=1.0,
        open_mean_h_s=9.0,
        open_min_f_s=10.0,
        h_start_s=10.0,
        expansions=10,
        expansions_left=90,
        contract_fraction_left=0.9,
        elapsed_ms=1.0,
        weight=5.0,
        mode="weighted",
        improvements=0,
        steps_done=1,
        steps_total=10,
        steps_since_improvement=1,
        expansions_since_improvement=10,
        cpu_share_last_step=1.0,
        nodes_touched=20,
        reopened=0,
        done=False,
    )
    base.update(kw)
    return SearchStats(**base)


def test_make_controller_specs() -> None:
    """Every documented spec builds a Controller; unknown specs list the allowed ones."""
    for spec in ("fixed:1", "fixed:1.5", "fixed:5", "random", "decreasing", "ana"):
        c = make_controller(spec, seed=0)
        assert isinstance(c, Controller)
        assert c.mode in ("weighted", "ana")
        assert c.reset(0) >= 1.0
    assert make_controller("fixed:2").name == "fixed:2"
    assert make_controller("ana").mode == "ana"
    with pytest.raises(InvalidRequest, match="allowed: learned, decreasing, ana, random, fixed:W"):
        make_controller("greedy")
    with pytest.raises(InvalidRequest, match="not a number"):
        make_controller("fixed:abc")
    for bad in ("fixed:0.5", "fixed:7", "fixed:inf", "fixed:nan"):
        with pytest.raises(InvalidRequest, match=r"in 1..5"):
            make_controller(bad)


def test_random_walk_is_seeded_and_moves_one_place() -> None:
    """The random baseline is a seeded walk over WEIGHTS moving at most one place per step."""
    a, b = make_controller("random", seed=3), make_controller("random", seed=3)
    wa = [a.reset(3)] + [a.decide(np.zeros(3), _stats()) for _ in range(200)]
    wb = [b.reset(3)] + [b.decide(np.zeros(3), _stats()) for _ in range(200)]
    assert wa == wb
    idx = [WEIGHTS.index(w) for w in wa]
    assert all(abs(i - j) <= 1 for i, j in zip(idx, idx[1:], strict=False))
    assert len(set(idx)) >= 4  # it does walk
    c = make_controller("random", seed=4)
    wc = [c.reset(4)] + [c.decide(np.zeros(3), _stats()) for _ in range(200)]
    assert wc != wa


def test_decreasing_schedule() -> None:
    """ARA*-style: start at 5, one place down per new route, and one place down after
    DECREASING_PATIENCE steps without one once a route exists; never below 1."""
    c = DecreasingController(patience=2)
    assert c.reset(None) == 5.0
    f = np.zeros(3)
    assert c.decide(f, _stats(improvements=0, steps_since_improvement=3)) == 5.0  # no route yet
    assert c.decide(f, _stats(improvements=1, incumbent_cost_s=20.0)) == 4.0
    assert c.decide(f, _stats(improvements=3, incumbent_cost_s=15.0)) == 2.0
    kw = dict(improvements=3, incumbent_cost_s=15.0)
    assert c.decide(f, _stats(steps_since_improvement=1, **kw)) == 2.0
    assert c.decide(f, _stats(steps_since_improvement=2, **kw)) == 1.5
    assert c.decide(f, _stats(steps_since_improvement=3, **kw)) == 1.5
    assert c.decide(f, _stats(steps_since_improvement=4, **kw)) == 1.0
    assert c.decide(f, _stats(improvements=9, incumbent_cost_s=12.0)) == 1.0


def test_ana_reports_proven_ratio() -> None:
    """ANA* reports min(5, cost / bound) as its weight: the suboptimality it has proven."""
    c = make_controller("ana")
    assert c.decide(np.zeros(3), _stats()) == 5.0
    assert c.decide(np.zeros(3), _stats(incumbent_cost_s=12.0, lower_bound_s=10.0)) == 1.2


@pytest.mark.parametrize("spec", ["fixed:1", "fixed:3", "random", "decreasing", "ana"])
def test_every_controller_ends_optimal_given_enough_budget(spec: str) -> None:
    """Run with no contract limit, every controller's search proves the scipy
    ``csgraph.dijkstra`` optimum (anytime weighted A* converges, Hansen & Zhou 2007)."""
    g = grid_graph(25, seed=21)
    planner = Planner(g)
    dist = dijkstra(g.csr(), directed=True, indices=[0, 100])
    for i, s in enumerate((0, 100)):
        for t in (624, 300, 17):
            r = plan(planner, s, t, controller=spec, seed=5, steps=10)
            assert r.status == "optimal"
            assert r.cost_s == pytest.approx(dist[i, t], rel=1e-9)
            assert r.controller == make_controller(spec).name


def test_decreasing_weights_in_timeline_never_rise() -> None:
    """The weight timeline of ``decreasing`` is non-increasing and starts at 5."""
    g = grid_graph(40, seed=22)
    r = plan(g, 0, g.n_nodes - 1, budget_expansions=2000, controller="decreasing", steps=20)
    ws = [w.weight for w in r.weights]
    assert ws[0] == 5.0 and ws == sorted(ws, reverse=True)
