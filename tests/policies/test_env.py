"""The weight-control environment: gymnasium's checker, determinism, reward bookkeeping."""

from __future__ import annotations

import gymnasium as gym
import networkx as nx
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env

from dueroute.planner.limits import WEIGHTS
from dueroute.planner.session import plan
from dueroute.policies.env import ENV_ID, OptimalCosts, WeightControlEnv, quality, sample_queries


@pytest.fixture()
def env(grid_graph):
    return WeightControlEnv(
        grid_graph, budget_expansions=150, steps=6, n_queries=40, action_kind="pick"
    )


@pytest.mark.parametrize("action_kind", ["pick", "step"])
def test_passes_gymnasium_env_checker(grid_graph, action_kind):
    """gymnasium.utils.env_checker.check_env: spaces, dtypes, seeding and API contract."""
    env = WeightControlEnv(
        grid_graph, budget_expansions=150, steps=6, n_queries=40, action_kind=action_kind
    )
    check_env(env, skip_render_check=True)


def test_registered_and_made_through_gymnasium(grid_graph):
    made = gym.make(ENV_ID, graph=grid_graph, budget_expansions=100, steps=4, n_queries=5)
    obs, _ = made.reset(seed=0)
    assert obs.dtype == np.float32 and made.observation_space.contains(obs)
    made.close()


def rollout(env, seed, actions):
    obs, info = env.reset(seed=seed)
    trace = [obs]
    rewards = []
    for a in actions:
        obs, r, term, trunc, info = env.step(a)
        trace.append(obs)
        rewards.append(r)
        if term or trunc:
            break
    return np.array(trace), np.array(rewards), info


def test_same_seed_same_episode(env, grid_graph):
    actions = [0, 5, 2, 3, 1, 4, 2]
    a = rollout(env, 123, actions)
    other = WeightControlEnv(
        grid_graph, budget_expansions=150, steps=6, n_queries=40, action_kind="pick"
    )
    b = rollout(other, 123, actions)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
    assert a[2]["query_index"] == b[2]["query_index"]


def test_return_is_final_quality_and_episode_ends(env):
    """Rewards telescope to the final quality; truncated after steps - 1 actions unless the
    optimum is proven first (terminated)."""
    rng = np.random.default_rng(0)
    for seed in range(15):
        env.reset(seed=seed)
        total, n_actions = 0.0, 0
        while True:
            _, r, term, trunc, info = env.step(int(rng.integers(len(WEIGHTS))))
            total += r
            n_actions += 1
            assert 0.0 <= info["quality"] <= 1.0
            if term or trunc:
                break
        assert total == pytest.approx(info["quality"])
        assert not (term and trunc)
        if term:
            assert info["status"] == "optimal" and info["quality"] == pytest.approx(1.0)
        else:
            assert info["status"] in ("improved", "instant") and n_actions == env.config.steps - 1


def test_episode_matches_plan_with_the_same_weights(env, grid_graph):
    """Training sees what serving does: always picking weight 3 after a first step at the
    initial weight gives the same route cost as plan() with that weight sequence."""
    pick = WEIGHTS.index(3.0)

    class Sequence:
        name, mode = "seq", "weighted"

        def reset(self, seed):
            return env.config.initial_weight

        def decide(self, features, stats):
            return 3.0

    for i in range(10):
        env.reset(options={"query_index": i})
        term = trunc = env.search.done
        info = {"incumbent_cost_s": env.search.stats().incumbent_cost_s}
        while not (term or trunc):
            _, _, term, trunc, info = env.step(pick)
        o, d = (int(x) for x in env.queries[i])
        res = plan(env.planner, o, d, budget_expansions=150, steps=6, controller=Sequence())
        assert res.cost_s == info["incumbent_cost_s"]


def test_optimal_costs_match_networkx(grid_graph):
    """Exact optima (scipy csgraph.dijkstra) against networkx's Dijkstra on the same edges."""
    g = nx.DiGraph()
    for e in range(grid_graph.n_edges):
        t, h = int(grid_graph.tail[e]), int(grid_graph.head[e])
        w = float(grid_graph.travel_time_s[e])
        if not g.has_edge(t, h) or g[t][h]["weight"] > w:
            g.add_edge(t, h, weight=w)
    queries = sample_queries(grid_graph, 12, seed=5)
    costs = OptimalCosts(grid_graph).precompute(queries)
    for (o, d), c in zip(queries, costs, strict=True):
        assert c == pytest.approx(nx.dijkstra_path_length(g, int(o), int(d)), rel=1e-12)


def test_sample_queries_are_valid_and_seeded(grid_graph):
    q = sample_queries(grid_graph, 50, seed=9)
    assert q.shape == (50, 2) and np.all(q[:, 0] != q[:, 1])
    comp = np.asarray(grid_graph.component)
    assert len(set(comp[q.ravel()])) == 1
    np.testing.assert_array_equal(q, sample_queries(grid_graph, 50, seed=9))
    assert not np.array_equal(q, sample_queries(grid_graph, 50, seed=10))


def test_quality_definition():
    assert quality(100.0, None) == 0.0
    assert quality(100.0, 125.0) == pytest.approx(0.8)
    assert quality(0.0, 0.0) == 1.0


def test_step_actions_and_bad_input(grid_graph):
    env = WeightControlEnv(
        grid_graph, budget_expansions=100, steps=5, n_queries=5, action_kind="step"
    )
    assert env.action_space.n == 3
    env.reset(seed=0)
    with pytest.raises(ValueError, match="action must be an integer in 0..2"):
        env.step(7)
    with pytest.raises(ValueError, match="invalid environment config"):
        WeightControlEnv(grid_graph, steps=1)


def test_greedy_episode_equals_serving_with_the_exported_policy(grid_graph, tmp_path):
    """Train/serve parity: the env driven by an exported policy's greedy actions ends with the
    same route as plan() with the onnxruntime-backed LearnedController (step actions). The
    network ignores the CPU-share input, which the env randomises and serving measures."""
    from dueroute.planner.features import FEATURE_NAMES
    from dueroute.policies.dqn import QNetwork, init_params
    from dueroute.policies.export import export_policy, policy_metadata
    from dueroute.policies.runtime import LearnedController, load_policy

    rng = np.random.default_rng(5)
    n = len(FEATURE_NAMES)
    net = QNetwork(init_params(rng, n, 16, 3), np.zeros(n), np.full(n, 0.3))
    net.params["w1"][FEATURE_NAMES.index("cpu_share_last_step")] = 0.0
    meta = policy_metadata(
        weights=WEIGHTS,
        action_kind="step",
        initial_weight=5.0,
        contract_expansions=150,
        decision_steps=6,
        training_config={},
        graph_fingerprint=grid_graph.fingerprint,
    )
    export_policy(net, meta, tmp_path / "p.onnx")
    policy = load_policy(tmp_path / "p.onnx")
    env = WeightControlEnv(
        grid_graph,
        budget_expansions=150,
        steps=6,
        n_queries=20,
        action_kind="step",
        initial_weight=5.0,
    )
    for i in range(20):
        obs, info = env.reset(options={"query_index": i})
        done = env.search.done
        final = env.search.stats().incumbent_cost_s
        while not done:
            obs, _, term, trunc, info = env.step(int(np.argmax(policy.q_values(obs))))
            done, final = term or trunc, info["incumbent_cost_s"]
        o, d = (int(x) for x in env.queries[i])
        served = plan(
            env.planner, o, d, budget_expansions=150, steps=6, controller=LearnedController(policy)
        )
        assert served.cost_s == final


# --------------------------------------------------------------------------------------------
# Training under live traffic (EnvConfig.traffic / traffic_scenarios)


def test_traffic_pool_passes_the_checker_and_draws_scenarios(grid_graph):
    """check_env with a pool of random scenarios; episodes visit several pool entries and each
    episode's optimum is scipy ``csgraph.dijkstra`` on that entry's costs."""
    from scipy.sparse.csgraph import dijkstra

    env = WeightControlEnv(
        grid_graph, budget_expansions=150, steps=6, n_queries=40, traffic_scenarios=3
    )
    assert len(env.cost_pool) == 4 and env.cost_pool[0][0] is None
    check_env(env, skip_render_check=True)
    seen = set()
    for seed in range(12):
        _, info = env.reset(seed=seed)
        k = info["traffic_index"]
        seen.add(k)
        version = env.cost_pool[k][0]
        o, d = env.queries[info["query_index"]]
        costs = None if version is None else version.travel_time_s
        exact = dijkstra(grid_graph.csr(costs), directed=True, indices=[int(o)])[0, int(d)]
        assert info["optimal_cost_s"] == pytest.approx(exact, rel=1e-12)
        assert env.search.costs is version
    assert len(seen) >= 2


def test_traffic_file_applies_to_every_episode(grid_graph, tmp_path):
    import json

    tail, head = int(grid_graph.tail[0]), int(grid_graph.head[0])
    doc = {"updates": [{"from_node": tail, "to_node": head, "factor": 3}]}
    path = tmp_path / "t.json"
    path.write_text(json.dumps(doc))
    env = WeightControlEnv(
        grid_graph, budget_expansions=150, steps=6, n_queries=10, traffic=str(path)
    )
    assert len(env.cost_pool) == 1 and env.cost_pool[0][0].version == 1
    _, info = env.reset(seed=0)
    assert info["traffic_index"] == 0 and env.search.costs is env.cost_pool[0][0]
    with pytest.raises(Exception, match="traffic file not found"):
        WeightControlEnv(grid_graph, n_queries=5, traffic=str(tmp_path / "missing.json"))
