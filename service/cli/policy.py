"""``dueroute train``, ``dueroute evaluate`` and ``dueroute policy check``.

The trainer's flags are generated from the frozen config dataclasses
(:class:`policies.dqn.DQNConfig`, :class:`policies.env.EnvConfig`,
:class:`policies.train.ValidationConfig`): one ``--flag`` per field, its help the field's doc.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
from pathlib import Path
from typing import Any

from dueroute.demo_data.build import resolve_graph_path
from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    add_alias,
    add_count_option,
    add_json_flag,
    add_list_option,
    add_out_option,
    add_traffic_flag,
    emit,
    load_traffic_arg,
)

#: Generated flags whose spelling is not ``--field-name``: the project's one spelling per idea
#: (``--budget`` as in ``dueroute route``, ``--count`` for counts); ``--field-name`` stays as a
#: deprecated alias.
FLAG_NAMES = {
    "budget_expansions": "--budget",
    "n_queries": "--count",
    "validation_queries": "--validation-count",
}


def register(sub: Any) -> None:
    from dueroute.policies.dqn import DQNConfig
    from dueroute.policies.env import EnvConfig
    from dueroute.policies.train import ValidationConfig

    tr = sub.add_parser(
        "train",
        help="train a weight policy (Double DQN) on a graph and write it as ONNX",
        description=(
            "Train the learned weight controller on GRAPH: episodes are route queries drawn "
            "from the graph, searched under an expansion budget; the policy picks the search "
            "weight at each decision step. Writes OUT.onnx, OUT.config.json and OUT.curve.csv."
        ),
    )
    tr.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    add_out_option(
        tr,
        required=False,
        default="policy.onnx",
        metavar="FILE.onnx",
        help="policy file to write (default policy.onnx)",
    )
    for cls, title in (
        (DQNConfig, "trainer (Double DQN)"),
        (EnvConfig, "environment"),
        (ValidationConfig, "validation"),
    ):
        add_config_arguments(tr.add_argument_group(title), cls)
    tr.add_argument("--no-progress", action="store_true", help="hide the progress bar")
    add_json_flag(tr)
    tr.set_defaults(func=cmd_train)

    ev = sub.add_parser(
        "evaluate",
        help="compare a policy with every baseline controller on held-out queries",
        description=(
            "Search held-out queries (a seed apart from training) with fixed weights 1..5, "
            "random, decreasing, ana and the learned policy at 0.5x, 1x and 2x the trained "
            "expansion budget (or --budgets) and at --deadlines-ms; write summary.json, "
            "results.md, per_query.csv and plots into --out."
        ),
    )
    ev.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    ev.add_argument(
        "--policy",
        default=None,
        metavar="FILE.onnx",
        help="policy to evaluate (default: the shipped policies/default.onnx)",
    )
    add_out_option(ev, required=True, metavar="DIR", help="report folder (created)")
    add_count_option(ev, 500, "held-out queries", old="--queries")
    ev.add_argument(
        "--seed", type=int, default=1000, help="seed of the held-out queries (default 1000)"
    )
    add_list_option(
        ev,
        "--budgets",
        int,
        None,
        "expansion budgets, e.g. 7500,15000 (default: 0.5x, 1x, 2x the policy's trained contract)",
        metavar="N,N",
    )
    add_list_option(
        ev,
        "--deadlines-ms",
        float,
        [],
        "wall-clock deadlines to compare at as well",
        metavar="MS,MS",
    )
    add_list_option(
        ev,
        "--controllers",
        str,
        None,
        "controllers to compare (default: fixed:1 .. fixed:5, random, decreasing, ana, learned)",
        metavar="SPEC,SPEC",
    )
    ev.add_argument(
        "--importance-count",
        type=int,
        default=100,
        metavar="N",
        help="queries for permutation feature importance (0 = skip; default 100)",
    )
    add_alias(ev, "--importance-queries", "--importance-count", dest="importance_count", type=int)
    ev.add_argument(
        "--landmarks",
        type=int,
        default=None,
        metavar="L",
        help="ALT landmarks for the heuristic (default: as in training; 0 = great-circle only)",
    )
    add_traffic_flag(ev, "controller")
    ev.add_argument(
        "--served",
        action="store_true",
        help="judge the way the service runs the controllers: wall-clock deadlines "
        "(--deadlines-ms, default 2,5,10,20,50) x loads (--loads) with searches in threads, "
        "interleaved, paired tests per cell; writes served_*.{json,md,csv,png} (time it under "
        "flock /tmp/dueroute-timing.lock on a quiet machine)",
    )
    add_list_option(
        ev,
        "--loads",
        int,
        [1, 2, 4],
        "with --served: searches per core run at once",
        metavar="L,L",
    )
    ev.add_argument("--no-progress", action="store_true", help="hide the progress bar")
    add_json_flag(ev)
    ev.set_defaults(func=cmd_evaluate)

    pol = sub.add_parser("policy", help="inspect policy files")
    pol_sub = pol.add_subparsers(dest="policy_command", required=True, metavar="ACTION")
    chk = pol_sub.add_parser(
        "check",
        help="validate a policy file and explain every problem (exit 2 if any)",
    )
    chk.add_argument("file", metavar="FILE.onnx", help="policy file to check")
    chk.add_argument(
        "graph",
        metavar="GRAPH",
        nargs="?",
        default=None,
        help="also say whether the policy was trained on this graph (by fingerprint; a "
        "mismatch is a warning, exit status 0). " + GRAPH_HELP,
    )
    add_json_flag(chk)
    chk.set_defaults(func=cmd_check)


# --------------------------------------------------------------------------------------------
# Flags from config dataclasses


def _flag(name: str) -> str:
    return "--" + name.replace("_", "-")


def add_config_arguments(parser: Any, cls: type) -> None:
    """One ``--flag`` per field of the frozen dataclass ``cls`` (help from its metadata)."""
    for f in dataclasses.fields(cls):
        default = f.default
        help_text = f"{f.metadata.get('help', '')} (default: {default})"
        flags = [FLAG_NAMES.get(f.name, _flag(f.name))]
        if f.name in FLAG_NAMES:
            add_alias(parser, _flag(f.name), flags[0], dest=f.name, type=type(default))
        if isinstance(default, bool):
            parser.add_argument(
                *flags,
                dest=f.name,
                action=argparse.BooleanOptionalAction,
                default=None,
                help=help_text,
            )
        else:
            parser.add_argument(
                *flags,
                dest=f.name,
                type=type(default),
                default=None,
                metavar=f.name.upper(),
                help=help_text,
            )


def config_from_args(args: argparse.Namespace, cls: type) -> Any:
    """Build ``cls`` from the flags that were given (others keep their defaults)."""
    given = {
        f.name: getattr(args, f.name)
        for f in dataclasses.fields(cls)
        if getattr(args, f.name, None) is not None
    }
    try:
        return cls(**given)
    except ValueError as exc:
        raise InvalidRequest(str(exc)) from None


# --------------------------------------------------------------------------------------------
# train


def cmd_train(args: argparse.Namespace) -> int:
    from dueroute.planner.graph import load_graph
    from dueroute.policies.dqn import DQNConfig
    from dueroute.policies.env import EnvConfig
    from dueroute.policies.train import ValidationConfig, train_policy

    dqn = config_from_args(args, DQNConfig)
    env = config_from_args(args, EnvConfig)
    validation = config_from_args(args, ValidationConfig)
    out = Path(args.out)
    if out.suffix != ".onnx":
        raise InvalidRequest(f"--out must name a .onnx file, got {args.out!r}")
    graph = load_graph(resolve_graph_path(args.graph))
    try:
        summary = train_policy(graph, out, dqn, env, validation, progress=not args.no_progress)
    except OSError as exc:
        raise InvalidRequest(f"cannot write the policy to {out}: {exc.strerror or exc}") from exc
    except ValueError as exc:  # e.g. a graph without any drawable query
        raise InvalidRequest(str(exc)) from None
    emit(summary, args.json, _format_train)
    return 0


def _format_train(s: dict[str, Any]) -> str:
    val = s["best_validation_quality"]
    return "\n".join(
        [
            f"trained on {s['graph']} in {s['total_seconds']:.1f} s: {s['episodes']} episodes, "
            f"{s['env_steps']:,} decisions, {s['updates']:,} updates",
            f"  contract {s['contract_expansions']:,} expansions in {s['decision_steps']} steps; "
            f"actions: {s['action_kind']}",
            f"  mean return (final quality) over the last episodes: "
            f"{s['mean_return_last_episodes']:.4f}"
            + (
                f"; best greedy validation quality {val:.4f} (episode "
                f"{s['best_validation_episode'] + 1})"
                if val is not None
                else ""
            ),
            f"  wrote {s['policy']} ({s['size_bytes'] / 1024:.1f} kB), {s['config']}, {s['curve']}",
        ]
    )


# --------------------------------------------------------------------------------------------
# evaluate


def cmd_evaluate(args: argparse.Namespace) -> int:
    from dueroute.planner.controllers import make_controller
    from dueroute.planner.graph import load_graph
    from dueroute.planner.session import Planner
    from dueroute.policies.evaluate import CONTROLLERS, EvalSettings, evaluate
    from dueroute.policies.runtime import DEFAULT_POLICY_PATH, LEARNED, load_policy
    from dueroute.policies.train import side_files

    if args.count < 1:
        raise InvalidRequest(f"--count must be >= 1, got {args.count}")
    if args.budgets is not None and any(b < 1 for b in args.budgets):
        raise InvalidRequest(f"--budgets must all be >= 1, got {args.budgets}")
    if any(not (math.isfinite(d) and d > 0) for d in args.deadlines_ms):
        raise InvalidRequest(f"--deadlines-ms must all be > 0, got {args.deadlines_ms}")
    if args.importance_count < 0:
        raise InvalidRequest("--importance-count must be >= 0")
    if any(not 1 <= x <= 64 for x in args.loads):
        raise InvalidRequest(f"--loads must all be in 1..64, got {args.loads}")
    controllers = tuple(args.controllers) if args.controllers else CONTROLLERS
    for spec in controllers:
        if spec != LEARNED:
            make_controller(spec)  # raises InvalidRequest naming what is allowed
    policy_path = Path(args.policy) if args.policy is not None else DEFAULT_POLICY_PATH
    policy = load_policy(policy_path)
    config = _training_config(policy)
    env_cfg = config.get("env", {}) if isinstance(config, dict) else {}
    n_landmarks = args.landmarks if args.landmarks is not None else int(env_cfg.get("landmarks", 0))
    graph = load_graph(resolve_graph_path(args.graph))
    landmarks = None
    if n_landmarks > 0:
        from dueroute.planner.heuristics import load_or_build_landmarks

        landmarks = load_or_build_landmarks(graph, count=n_landmarks, progress=False)
    costs = load_traffic_arg(args.traffic, graph, landmarks) if args.traffic else None
    settings = EvalSettings(
        costs=costs,
        traffic_source=args.traffic,
        n_queries=args.count,
        seed=args.seed,
        budgets=args.budgets,
        deadlines_ms=list(args.deadlines_ms),
        controllers=controllers,
        importance_queries=args.importance_count,
    )
    train_seed = env_cfg.get("query_seed")
    if train_seed is not None and int(train_seed) == args.seed:
        raise InvalidRequest(
            f"--seed {args.seed} is the seed the policy's training queries were drawn with; "
            "evaluate on held-out queries with another seed"
        )
    if args.served:
        return _evaluate_served(args, graph, policy, landmarks, costs, controllers, env_cfg)
    try:
        summary = evaluate(
            graph,
            policy,
            args.out,
            settings,
            planner=Planner(graph, landmarks=landmarks),
            curve_csv=side_files(policy_path)[1],
            progress=not args.no_progress,
        )
    except OSError as exc:
        raise InvalidRequest(f"cannot write the report to {args.out}: {exc}") from exc
    except ValueError as exc:  # every query cut off by closures
        raise InvalidRequest(str(exc)) from None
    summary["landmarks"] = n_landmarks
    summary["out"] = str(args.out)
    emit(summary, args.json, _format_evaluate)
    return 0


def _evaluate_served(
    args: argparse.Namespace,
    graph: Any,
    policy: Any,
    landmarks: Any,
    costs: Any,
    controllers: tuple[str, ...],
    env_cfg: dict[str, Any],
) -> int:
    from dueroute.planner.session import Planner
    from dueroute.policies.env import sample_queries
    from dueroute.policies.evaluate import SERVED_DEADLINES_MS, ServedSettings, evaluate_served

    if any(not d <= 60_000 for d in args.deadlines_ms):
        raise InvalidRequest(f"--deadlines-ms must all be in (0, 60000], got {args.deadlines_ms}")
    exclude = None
    if env_cfg.get("query_seed") is not None:  # leave the training pairs out
        exclude = sample_queries(
            graph, int(env_cfg.get("n_queries", 2000)), int(env_cfg["query_seed"])
        )
    settings = ServedSettings(
        n_queries=args.count,
        seed=args.seed,
        deadlines_ms=tuple(args.deadlines_ms) or SERVED_DEADLINES_MS,
        loads=tuple(args.loads),
        controllers=controllers,
        exclude=exclude,
        costs=costs,
        traffic_source=args.traffic,
    )
    try:
        summary = evaluate_served(
            graph,
            policy,
            args.out,
            settings,
            planner=Planner(graph, landmarks=landmarks),
            progress=not args.no_progress,
        )
    except OSError as exc:
        raise InvalidRequest(f"cannot write the report to {args.out}: {exc}") from exc
    except ValueError as exc:
        raise InvalidRequest(str(exc)) from None
    summary["out"] = str(args.out)
    emit(summary, args.json, _format_served)
    return 0


def _format_served(s: dict[str, Any]) -> str:
    from dueroute.policies.evaluate import served_markdown

    return served_markdown(s) + f"\nreport written to {s['out']} in {s['seconds']:.0f} s"


def _training_config(policy: Any) -> dict[str, Any]:
    try:
        value = json.loads(policy.metadata.get("training_config", "{}"))
    except ValueError:
        return {}
    return value if isinstance(value, dict) else {}


def _format_evaluate(s: dict[str, Any]) -> str:
    from dueroute.policies.evaluate import markdown_report

    return markdown_report(s) + f"\nreport written to {s['out']} in {s['seconds']:.0f} s"


# --------------------------------------------------------------------------------------------
# policy check


def cmd_check(args: argparse.Namespace) -> int:
    from dueroute.policies.runtime import check_policy, load_policy

    problems = check_policy(args.file)
    result: dict[str, Any] = {"file": args.file, "ok": not problems, "problems": problems}
    result["warnings"] = []
    if not problems:
        policy = load_policy(args.file)
        result["policy"] = policy.info()
        if args.graph is not None:
            from dueroute.service.cli.common import load_graph_arg

            graph = load_graph_arg(args.graph)
            warning = policy.graph_warning(graph.fingerprint, graph.name)
            result["graph"] = {
                "name": graph.name,
                "fingerprint": graph.fingerprint,
                "trained_on_it": warning is None,
            }
            result["warnings"] = [warning] if warning else []
    emit(result, args.json, _format_check)
    return 2 if problems else 0


def _regime_lines(regime: dict[str, Any] | None) -> list[str]:
    if not regime:
        return ["  training regime: not recorded (a file written before regimes were recorded)"]
    if regime.get("contract") == "deadline":
        lo, hi = regime["deadline_ms"]
        shares = ", ".join(f"{x:g}" for x in regime.get("cpu_shares", []))
        cal = regime.get("calibration") or {}
        return [
            f"  training regime: wall-clock deadlines {lo:g}-{hi:g} ms "
            f"({regime.get('deadline_sampling', '?')}), CPU shares {shares}, simulated with "
            f"the map measured on {cal.get('machine', '?')} ({cal.get('measured_utc', '?')})"
        ]
    return [f"  training regime: expansion budget {regime.get('budget_expansions', 0):,}"]


def _format_check(r: dict[str, Any]) -> str:
    if r["ok"]:
        p = r["policy"]
        return "\n".join(
            [
                f"{r['file']}: ok",
                f"  sha256 {p['sha256'][:16]}  {p['size_bytes'] / 1024:.1f} kB  feature schema "
                f"{p['schema_version']} ({len(p['feature_names'])} features)",
                f"  actions ({p['action_kind']}): {', '.join(p['action_meanings'])}",
                f"  trained on {p['graph_name'] or '?'} ({(p['graph_fingerprint'] or '?')[:16]}) "
                f"with {p['contract_expansions']:,} expansions in {p['decision_steps']} steps, "
                f"{p['created_utc']}",
                *_regime_lines(p.get("training_regime")),
                *(
                    [f"  graph {r['graph']['name']}: the policy was trained on it"]
                    if r.get("graph") and r["graph"]["trained_on_it"]
                    else []
                ),
                *(f"  warning: {w}" for w in r.get("warnings", [])),
            ]
        )
    lines = [f"{r['file']}: {len(r['problems'])} problem(s), not usable as a policy"]
    lines += [f"  - {p}" for p in r["problems"]]
    return "\n".join(lines)
