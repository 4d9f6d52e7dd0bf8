"""Train a weight policy on a graph end to end: environment, Double DQN, ONNX file.

:func:`train_policy` writes three files side by side::

    OUT.onnx          the policy (metadata records the full config, see policies.export)
    OUT.config.json   the configs of this run (trainer, environment, validation)
    OUT.curve.csv     the learning curve, one row per episode
"""

from __future__ import annotations

import dataclasses
import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.graph import RoadGraph
from dueroute.policies.dqn import (
    DQNConfig,
    QNetwork,
    TrainResult,
    save_config,
    train,
    write_curve_csv,
)
from dueroute.policies.env import EnvConfig, WeightControlEnv, quality, sample_queries
from dueroute.policies.export import export_policy, policy_metadata, training_regime


@dataclass(frozen=True)
class ValidationConfig:
    """Greedy evaluations during training that pick the network to ship."""

    validation_queries: int = field(
        default=150,
        metadata={"help": "queries of the validation set, drawn apart from training (queries)"},
    )
    validation_seed: int = field(
        default=2, metadata={"help": "seed of the validation queries (differs from training)"}
    )


def side_files(out: str | Path) -> tuple[Path, Path]:
    """Paths of the config JSON and learning-curve CSV written beside ``out``."""
    out = Path(out)
    return out.with_suffix(".config.json"), out.with_suffix(".curve.csv")


def greedy_quality(
    network: QNetwork, env: WeightControlEnv, query_indices: range | list[int]
) -> np.ndarray:
    """Final quality of the greedy policy on each given query of ``env`` (float64[k]).

    The quality is taken from the search's final incumbent, not from the episode's reward
    sum: a query whose first step (run at the initial weight, before the policy acts) already
    ends the search has no step, and its return would read 0 although the route is optimal.

    Under a traffic pool query ``i`` runs on pool entry ``i mod len(pool)`` (entry 0 when a
    closure cuts it off there; a query without a route under entry 0 either is left out).
    Under regime ``deadline`` query ``i`` gets the contract :func:`validation_contract`.
    """
    out = np.full(len(query_indices), np.nan)
    pool = len(env.cost_pool)
    for k, i in enumerate(query_indices):
        obs = None
        contract = validation_contract(env, i)
        for traffic in dict.fromkeys((i % pool, 0)):
            try:
                options = {"query_index": i, "traffic_index": traffic} | contract
                obs, info = env.reset(seed=0, options=options)
                break
            except ValueError:
                continue
        if obs is None:
            continue
        done = env.search is None or env.search.done
        while not done:
            obs, _, term, trunc, info = env.step(network.greedy(obs))
            done = term or trunc
        out[k] = quality(info["optimal_cost_s"], info["incumbent_cost_s"])
    return out


def validation_contract(env: WeightControlEnv, i: int) -> dict[str, Any]:
    """The simulated contract of validation query ``i`` under regime ``deadline`` (else
    ``{}``): deadlines spread evenly over the log range by the golden-ratio sequence, loads in
    turn, so every validation run judges the same mix (no random draw)."""
    cfg = env.config
    if env.calibration is None:
        return {}
    lo, hi = math.log(cfg.deadline_ms_min), math.log(cfg.deadline_ms_max)
    u = (i * 0.6180339887498949) % 1.0
    loads = cfg.loads
    return {"deadline_ms": math.exp(lo + u * (hi - lo)), "searches_per_core": loads[i % len(loads)]}


def train_policy(
    graph: RoadGraph,
    out: str | Path,
    dqn: DQNConfig,
    env_config: EnvConfig,
    validation: ValidationConfig | None = None,
    *,
    progress: bool = True,
) -> dict[str, Any]:
    """Train on ``graph`` and write the policy and its side files; return a summary dict."""
    started = time.perf_counter()
    validation = validation or ValidationConfig()
    env = WeightControlEnv(graph, env_config)
    optimal = env.optimal
    eval_fn = None
    if dqn.eval_every_episodes > 0 and validation.validation_queries > 0:
        val_queries = sample_queries(
            graph, validation.validation_queries, validation.validation_seed
        )
        val_env = WeightControlEnv(
            graph,
            env_config,
            queries=val_queries,
            planner=env.planner,
            optimal=optimal,
            cost_pool=env.cost_pool,
            calibration=env.calibration,
        )
        indices = range(val_queries.shape[0])

        def eval_fn(network: QNetwork) -> float:
            return float(np.nanmean(greedy_quality(network, val_env, indices)))

    result: TrainResult = train(dqn, env, eval_fn=eval_fn, progress=progress)
    config = {
        "dqn": dataclasses.asdict(dqn),
        "env": dataclasses.asdict(env_config),
        "validation": dataclasses.asdict(validation),
    }
    cal = env.calibration
    if cal is not None:
        config["calibration"] = cal.to_dict()
        lo, hi = env_config.deadline_ms_min, env_config.deadline_ms_max
        # a representative budget: the map at the range's geometric mean, one search per core
        contract_expansions = cal.expansions_at(math.sqrt(lo * hi))
        regime = training_regime(
            contract="deadline",
            graph_fingerprint=graph.fingerprint,
            graph_name=graph.name,
            decision_steps_max=env_config.steps,
            deadline_ms=(lo, hi),
            searches_per_core=env_config.loads,
            calibration=cal.to_dict(),
            traffic_scenarios=env_config.traffic_scenarios,
        )
    else:
        contract_expansions = env_config.budget_expansions
        regime = training_regime(
            contract="budget",
            graph_fingerprint=graph.fingerprint,
            graph_name=graph.name,
            decision_steps_max=env_config.steps,
            budget_expansions=env_config.budget_expansions,
            traffic_scenarios=env_config.traffic_scenarios,
        )
    meta = policy_metadata(
        weights=env.weights,
        action_kind=env_config.action_kind,
        initial_weight=env_config.initial_weight,
        contract_expansions=contract_expansions,
        decision_steps=env_config.steps,
        training_config=config,
        graph_fingerprint=graph.fingerprint,
        graph_name=graph.name,
        regime=regime,
    )
    out = Path(out)
    data = export_policy(result.network, meta, out)
    config_path, curve_path = side_files(out)
    save_config(config, config_path)
    write_curve_csv(result.curve, curve_path)
    returns = np.array([row["episode_return"] for row in result.curve])
    tail = returns[-min(len(returns), 200) :]
    return {
        "policy": str(out),
        "config": str(config_path),
        "curve": str(curve_path),
        "size_bytes": len(data),
        "graph": graph.name,
        "graph_fingerprint": graph.fingerprint,
        "episodes": dqn.episodes,
        "env_steps": result.env_steps,
        "updates": result.updates,
        "train_seconds": result.seconds,
        "total_seconds": time.perf_counter() - started,
        "mean_return_last_episodes": float(np.mean(tail)) if tail.size else None,
        "best_validation_quality": result.best_eval_return,
        "best_validation_episode": result.best_eval_episode,
        "contract_expansions": contract_expansions,
        "decision_steps": env_config.steps,
        "regime": env_config.regime,
        "action_kind": env_config.action_kind,
    }


def load_training_config(policy_path: str | Path) -> dict[str, Any] | None:
    """The config JSON written beside a policy, or ``None`` if absent."""
    path, _ = side_files(policy_path)
    return json.loads(path.read_text()) if path.is_file() else None
