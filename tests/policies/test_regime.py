"""The served training regime: the calibration map, the simulated contracts of the environment,
the regime metadata of a policy file, the graph-mismatch warning and the served evaluation's
statistics (checked against scipy.stats)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats as sps

from dueroute.planner.features import FEATURE_NAMES, SCHEMA_VERSION
from dueroute.planner.session import CONTROL_SHARE, Planner
from dueroute.policies.calibrate import Calibration, load_calibration, measure_calibration
from dueroute.policies.dqn import QNetwork, init_params
from dueroute.policies.env import EnvConfig, WeightControlEnv, sample_queries
from dueroute.policies.evaluate import (
    mean_ci95,
    paired_stats,
    served_schedule,
    served_targets,
)
from dueroute.policies.export import build_model, policy_metadata, training_regime
from dueroute.policies.runtime import check_policy, load_policy

IDX = {name: i for i, name in enumerate(FEATURE_NAMES)}


def _cal(**kw) -> Calibration:
    base = dict(
        deadlines_ms=(1.0, 2.0, 5.0),
        expansions=(1000.0, 2500.0, 7000.0),
        expansion_rate_per_ms=1500.0,
        decision_us=50.0,
    )
    return Calibration(**(base | kw))


# --------------------------------------------------------------------------------------------
# Calibration map


def test_calibration_map_by_hand():
    """Hand-checked points: linear between (0, 0) and the measured points, the CPU share
    scales the time, decisions take their cost out of it, the kernel rate extends it."""
    cal = _cal()
    assert cal.expansions_at(1.0) == 1000
    assert cal.expansions_at(0.5) == 500  # halfway from (0, 0) to (1 ms, 1000)
    assert cal.expansions_at(3.5) == 4750  # halfway from (2, 2500) to (5, 7000)
    assert cal.expansions_at(4.0, cpu_share=0.5) == 2500  # 2 ms of uncontended time
    # 2 ms minus 20 decisions of 50 us = 1 ms
    assert cal.expansions_at(2.0, decisions=20) == 1000
    assert cal.expansions_at(7.0) == 7000 + 1500 * 2  # past the last point: the kernel rate
    assert cal.expansions_at(1.0, decisions=100) == 1  # nothing left: at least one expansion


def test_calibration_steps_follow_the_service_rule():
    """steps_at is the service's rule (planner.session.steps_for_deadline): control costs at
    most CONTROL_SHARE of the deadline, at the decision's wall-clock cost decision_us / share."""
    cal = _cal(decision_us=40.0)
    for deadline in (1.0, 2.0, 5.0, 10.0, 20.0, 50.0):
        for share in (1.0, 0.5, 0.25):
            affordable = int(CONTROL_SHARE * deadline * 1000.0 / (40.0 / share))
            assert cal.steps_at(deadline, share, 20) == max(1, min(20, affordable))


def test_calibration_round_trip_and_errors(tmp_path):
    cal = _cal(graph_name="g", machine="m")
    path = cal.save(tmp_path / "cal.json")
    assert load_calibration(path) == cal
    with pytest.raises(ValueError, match="increasing"):
        _cal(deadlines_ms=(2.0, 1.0, 5.0))
    with pytest.raises(ValueError, match="non-decreasing"):
        _cal(expansions=(3000.0, 2000.0, 7000.0))
    with pytest.raises(ValueError, match="lacks decision_us"):
        Calibration.from_dict({k: v for k, v in cal.to_dict().items() if k != "decision_us"})
    (tmp_path / "bad.json").write_text("{not json")
    with pytest.raises(ValueError, match="not valid JSON"):
        load_calibration(tmp_path / "bad.json")
    with pytest.raises(ValueError, match="not found"):
        load_calibration(tmp_path / "missing.json")


def test_measured_calibration_is_consistent(grid_graph):
    """On a small grid: increasing expansions per deadline, a positive rate and decision cost,
    the graph's fingerprint recorded (not a timing assertion: only signs and order)."""
    planner = Planner(grid_graph)
    queries = sample_queries(grid_graph, 12, 5)
    cal = measure_calibration(planner, queries, (0.05, 0.1, 0.2), seed=1)
    assert list(cal.expansions) == sorted(cal.expansions)
    assert cal.expansion_rate_per_ms > 0 and cal.decision_us > 0
    assert cal.graph_fingerprint == grid_graph.fingerprint and cal.queries == 12


# --------------------------------------------------------------------------------------------
# Environment under the served regime


def test_deadline_regime_contracts_follow_the_calibration(grid_graph):
    cal = _cal(expansions=(100.0, 200.0, 500.0), expansion_rate_per_ms=100.0, decision_us=5.0)
    env = WeightControlEnv(
        grid_graph,
        EnvConfig(
            regime="deadline", n_queries=30, landmarks=0, deadline_ms_min=2, deadline_ms_max=40
        ),
        calibration=cal,
    )
    seen = set()
    for seed in range(12):
        obs, info = env.reset(seed=seed)
        d, per_core = info["deadline_ms"], info["searches_per_core"]
        assert 2.0 <= d <= 40.0 and per_core in (1, 2, 3, 4)
        seen.add(per_core)
        steps = cal.steps_at(d, 1.0 / per_core, 20)
        assert info["steps"] == steps
        assert info["budget_expansions"] == cal.expansions_at(d, 1.0 / per_core, steps - 1)
        # the clock features are the simulated ones (time left = deadline x fraction left)
        left = d * obs[IDX["contract_fraction_left"]]
        assert obs[IDX["time_left_log"]] == pytest.approx(math.log10(1 + left) / 2, abs=1e-5)
        assert 0 < obs[IDX["expansion_rate_log"]] < 1.5
        assert obs[IDX["cpu_share_last_step"]] == pytest.approx(1.0 / per_core, rel=0.11)
    assert len(seen) > 1
    # same seed, same episode (Gymnasium's reproducibility contract)
    a, ia = env.reset(seed=3)
    b, ib = env.reset(seed=3)
    np.testing.assert_array_equal(a, b)
    assert (
        ia["deadline_ms"] == ib["deadline_ms"]
        and ia["budget_expansions"] == ib["budget_expansions"]
    )
    with pytest.raises(ValueError, match="searches_per_core"):
        EnvConfig(regime="deadline", searches_per_core="1,x")
    with pytest.raises(ValueError, match="regime"):
        EnvConfig(regime="wall")


# --------------------------------------------------------------------------------------------
# Policy metadata and the graph warning


def _policy_bytes(regime=None, fingerprint="f" * 64) -> bytes:
    from dueroute.planner.features import N_FEATURES

    net = QNetwork(
        init_params(np.random.default_rng(0), N_FEATURES, 8, 3),
        np.zeros(N_FEATURES),
        np.ones(N_FEATURES),
    )
    meta = policy_metadata(
        weights=(1.0, 1.5, 2.0, 3.0, 4.0, 5.0),
        action_kind="step",
        initial_weight=1.0,
        contract_expansions=100,
        decision_steps=20,
        training_config={},
        graph_fingerprint=fingerprint,
        graph_name="trained-here",
        regime=regime,
    )
    return build_model(net, meta).SerializeToString()


def test_training_regime_is_recorded_and_read_back():
    cal = _cal()
    regime = training_regime(
        contract="deadline",
        graph_fingerprint="f" * 64,
        graph_name="trained-here",
        decision_steps_max=20,
        deadline_ms=(1.0, 50.0),
        searches_per_core=(1, 2, 4),
        calibration=cal.to_dict(),
    )
    policy = load_policy(_policy_bytes(regime))
    got = policy.info()["training_regime"]
    assert got["contract"] == "deadline" and got["deadline_ms"] == [1.0, 50.0]
    assert got["cpu_shares"] == [1.0, 0.5, 0.25] and got["deadline_sampling"] == "log-uniform"
    assert got["feature_schema"] == {"version": SCHEMA_VERSION, "names": list(FEATURE_NAMES)}
    assert got["graph_fingerprint"] == "f" * 64
    assert Calibration.from_dict(got["calibration"]) == cal
    # a file without the key (written before it existed) still loads, and says so
    assert load_policy(_policy_bytes(None)).training_regime is None


def test_malformed_training_regime_is_refused():
    import onnx

    model = onnx.load_from_string(_policy_bytes({"contract": "budget"}))
    for p in model.metadata_props:
        if p.key == "training_regime":
            p.value = "[1, 2"
    problems = check_policy(model.SerializeToString())
    assert any("training_regime must be a JSON object" in p for p in problems)


def test_graph_warning_names_both_graphs():
    policy = load_policy(_policy_bytes(fingerprint="a" * 64))
    assert policy.graph_warning("a" * 64, "same") is None
    warning = policy.graph_warning("b" * 64, "other-town")
    assert warning is not None
    assert "trained-here" in warning and "other-town" in warning and "aaaaaaaaaaaa" in warning


# --------------------------------------------------------------------------------------------
# Evaluation statistics


def test_paired_stats_match_scipy():
    """The t interval and p-value equal scipy.stats.ttest_rel's; the Wilcoxon p-value equals
    scipy.stats.wilcoxon's (two-sided, zeros dropped)."""
    rng = np.random.default_rng(4)
    a = np.clip(rng.normal(0.9, 0.08, 60), 0, 1)
    b = np.clip(a - rng.normal(0.01, 0.03, 60), 0, 1)
    b[:7] = a[:7]  # ties, as equal routes give
    got = paired_stats(a, b)
    ref = sps.ttest_rel(a, b)
    assert got["t_p_value"] == pytest.approx(ref.pvalue, rel=1e-9)
    ci = ref.confidence_interval(0.95)
    assert got["ci95"] == pytest.approx([ci.low, ci.high], rel=1e-9)
    assert got["p_value"] == pytest.approx(sps.wilcoxon(a, b).pvalue, rel=1e-9)
    ties = int(np.sum(a == b))  # the 7 set equal, and pairs both clipped at 1
    assert ties >= 7 and got["ties"] == ties and got["better"] + got["worse"] == 60 - ties
    same = paired_stats(a, a)
    assert same["p_value"] == 1.0 and same["t_p_value"] == 1.0 and same["ci95"] == [0.0, 0.0]


def test_mean_ci95_matches_scipy():
    x = np.random.default_rng(1).uniform(0.5, 1.0, 40)
    lo, hi = sps.t.interval(0.95, len(x) - 1, loc=x.mean(), scale=sps.sem(x))
    assert mean_ci95(x) == pytest.approx([lo, hi], rel=1e-9)


def test_served_schedule_runs_every_job_once_per_load_in_both_orders():
    sched = served_schedule(7, [2.0, 5.0], [1, 2, 4], ["fixed:1", "learned"], seed=0)
    assert [load for load, _ in sched] == [1, 2, 4, 4, 2, 1]
    for load in (1, 2, 4):
        jobs = [j for x, js in sched if x == load for j in js]
        assert sorted(jobs) == sorted(
            (q, d, s) for q in range(7) for d in (2.0, 5.0) for s in ("fixed:1", "learned")
        )
    first = sched[0][1]
    assert first != sorted(first)  # shuffled inside a pass


def _cell(d, load, diff, p, overhead=0.001):
    return {
        "deadline_ms": d,
        "searches_per_core": load,
        "controllers": {"learned": {"control_share": overhead}},
        "learned_vs_best_baseline": {"mean_difference": diff, "p_value": p},
    }


def test_served_targets_judge_the_issue_cells_only():
    cells = [_cell(d, x, 0.01, 0.01) for d in (2.0, 5.0, 10.0, 20.0) for x in (1, 2)]
    cells.append(_cell(50.0, 4, -0.5, 0.001))  # outside the judged cells
    t = served_targets(cells)
    assert t["judged_cells"] == 8 and t["at_or_above_best_every_cell"]
    assert t["better_p05_in_half"] and t["never_worse_by_more_than_0_01"]
    cells[0] = _cell(2.0, 1, -0.02, 0.2, overhead=0.03)
    t = served_targets(cells)
    assert not t["at_or_above_best_every_cell"] and not t["never_worse_by_more_than_0_01"]
    assert t["worst_difference"] == -0.02 and not t["control_share_at_most_2pct"]
    assert json.dumps(t)  # JSON-ready
