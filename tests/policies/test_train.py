"""Validation scoring of the trainer (``policies.train.greedy_quality``)."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from dueroute.planner.features import FEATURE_NAMES
from dueroute.policies.dqn import QNetwork, init_params
from dueroute.policies.env import WeightControlEnv
from dueroute.policies.train import greedy_quality


def test_queries_solved_in_the_first_step_score_their_final_quality(grid_graph):
    """A query whose first step (initial weight 1, plain A*) already proves the optimum has no
    policy step; its validation quality must be 1, not the empty episode's return of 0.

    Reference: the optimum of each query by networkx's Dijkstra on the same edges; A* with an
    admissible heuristic and weight 1 returns an optimal route when it stops (Hart, Nilsson and
    Raphael 1968), so the env's route must cost exactly that optimum.
    """
    n_queries = 12
    env = WeightControlEnv(
        grid_graph,
        budget_expansions=40 * grid_graph.n_nodes,
        steps=2,
        n_queries=n_queries,
        action_kind="step",
        initial_weight=1.0,
        landmarks=0,
    )
    g = nx.DiGraph()
    for e in range(grid_graph.n_edges):
        t, h = int(grid_graph.tail[e]), int(grid_graph.head[e])
        w = float(grid_graph.travel_time_s[e])
        if not g.has_edge(t, h) or g[t][h]["weight"] > w:
            g.add_edge(t, h, weight=w)
    for i in range(n_queries):
        _, info = env.reset(options={"query_index": i})
        assert env.search is not None and env.search.status == "optimal"
        o, d = (int(x) for x in env.queries[i])
        expected = nx.dijkstra_path_length(g, o, d)
        assert info["incumbent_cost_s"] == pytest.approx(expected, rel=1e-9)

    n = len(FEATURE_NAMES)
    net = QNetwork(init_params(np.random.default_rng(0), n, 8, 3), np.zeros(n), np.ones(n))
    scores = greedy_quality(net, env, range(n_queries))
    assert scores.shape == (n_queries,)
    np.testing.assert_allclose(scores, 1.0)
