"""``dueroute route``: plan one query or a CSV of queries on a compiled graph."""

from __future__ import annotations

import argparse
import json
import math
import threading
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.limits import DEFAULT_CONTROLLER, DEFAULT_STEPS, controller_spec_help
from dueroute.planner.query_file import read_query_file
from dueroute.service.cli.common import (
    GRAPH_HELP,
    _json_default,
    add_alias,
    add_json_flag,
    add_landmarks_option,
    add_traffic_flag,
    add_turn_options,
    landmarks_for,
    load_graph_arg,
    load_traffic_arg,
    progress,
    traffic_summary,
    turn_profile_arg,
)

#: Controllers the CLI accepts; ``learned`` goes through ``policies.runtime``.
CONTROLLER_HELP = (
    f"weight controller: {controller_spec_help()}; learned = the ONNX policy (see --policy)"
)


def register(sub: Any) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "route",
        help="best route by a deadline or an expansion budget, with its proven bound and gap",
        description=(
            "Plan routes with the anytime search. Give one query with --from/--to (node index "
            "or LAT,LON snapped to the nearest road node) or many with --queries (a CSV with the "
            "header 'origin,destination' and node indices). Without --deadline-ms or --budget "
            "the search runs until the route is proven optimal."
        ),
    )
    p.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    p.add_argument("--from", dest="origin", metavar="NODE|LAT,LON", help="origin")
    p.add_argument("--to", dest="destination", metavar="NODE|LAT,LON", help="destination")
    p.add_argument(
        "--queries", metavar="FILE.csv", help="CSV with header origin,destination (node indices)"
    )
    contract = p.add_mutually_exclusive_group()
    contract.add_argument(
        "--deadline-ms", type=float, default=None, metavar="D", help="wall-clock deadline (ms)"
    )
    contract.add_argument(
        "--budget", type=int, default=None, metavar="N", help="node-expansion budget"
    )
    p.add_argument("--controller", default=DEFAULT_CONTROLLER, metavar="NAME", help=CONTROLLER_HELP)
    p.add_argument(
        "--policy", default=None, metavar="FILE.onnx", help="policy file for --controller learned"
    )
    p.add_argument(
        "--steps",
        type=int,
        default=DEFAULT_STEPS,
        metavar="S",
        help=f"decision steps (1..10000; default {DEFAULT_STEPS})",
    )
    p.add_argument("--seed", type=int, default=None, help="seed for the random controller")
    p.add_argument(
        "--gap",
        type=float,
        default=0.0,
        metavar="G",
        help="stop as soon as the proven relative gap is at or below G, e.g. 0.01 (default 0: "
        "search until the deadline or the proof)",
    )
    add_landmarks_option(p)
    add_alias(p, "--no-landmarks", "--landmarks 0", dest="landmarks", nargs=0, const=0)
    add_turn_options(p)
    add_traffic_flag(p)
    add_json_flag(p)
    p.set_defaults(func=cmd_route)
    return p


def parse_endpoint(graph: Any, text: str, what: str) -> Any:
    """A node index, or ``LAT,LON`` snapped to the nearest point on a road."""
    raw = text.strip()
    if "," in raw:
        parts = raw.split(",")
        try:
            if len(parts) != 2:
                raise ValueError
            lat, lon = float(parts[0]), float(parts[1])
        except ValueError:
            raise InvalidRequest(
                f"--{what} {text!r}: expected a node index or LAT,LON in degrees (e.g. 48.1,11.5)"
            ) from None
        from dueroute.planner.snap import snap_to_road

        return snap_to_road(graph, lat, lon)
    try:
        node = int(raw)
    except ValueError:
        raise InvalidRequest(
            f"--{what} {text!r}: expected a node index or LAT,LON in degrees (e.g. 48.1,11.5)"
        ) from None
    return int(graph.check_node(node))


def _controller_factory(spec: str, policy_path: str | None, seed: int | None) -> Any:
    """Validate ``spec`` now (one clear error) and return a factory of fresh controllers."""
    if spec.strip() == "learned":
        from dueroute.policies.runtime import load_policy, resolve_controller

        policy = load_policy(policy_path) if policy_path is not None else None
        resolve_controller("learned", policy=policy, seed=seed)  # fail early, clearly
        return lambda: resolve_controller("learned", policy=policy, seed=seed)
    if policy_path is not None:
        raise InvalidRequest("--policy is only used with --controller learned")
    from dueroute.planner.controllers import make_controller

    make_controller(spec, seed=seed)
    return lambda: make_controller(spec, seed=seed)


def cmd_route(args: argparse.Namespace) -> int:
    from dueroute.planner.session import Planner, plan, validate_contract, validate_gap_target

    single = args.origin is not None or args.destination is not None
    if single and args.queries is not None:
        raise InvalidRequest("give either --from/--to or --queries, not both")
    if not single and args.queries is None:
        raise InvalidRequest("give --from NODE --to NODE (or LAT,LON), or --queries FILE.csv")
    if single and (args.origin is None or args.destination is None):
        raise InvalidRequest("--from and --to go together: give both")
    validate_contract(args.deadline_ms, args.budget, args.steps)
    validate_gap_target(args.gap)
    make = _controller_factory(args.controller, args.policy, args.seed)

    profile = turn_profile_arg(args)
    graph = load_graph_arg(args.graph)
    landmarks = landmarks_for(graph, args.landmarks, profile)
    planner = Planner(graph, landmarks=landmarks, turn_profile=profile)
    costs = None
    if args.traffic is not None:
        costs = load_traffic_arg(args.traffic, graph, landmarks, profile)
        if not args.json:
            print(traffic_summary(costs, args.traffic))
    planner.warm_up()  # JIT compile or cache load stays out of the first deadline
    if single:
        queries = [
            (
                parse_endpoint(graph, args.origin, "from"),
                parse_endpoint(graph, args.destination, "to"),
            )
        ]
    else:
        queries = read_query_file(args.queries, graph.n_nodes)

    cancel = threading.Event()
    results = []
    bar = progress(total=len(queries), desc="route", unit="query", disable=len(queries) < 2 or None)
    try:
        for s, t in queries:
            res = plan(
                planner,
                s,
                t,
                deadline_ms=args.deadline_ms,
                budget_expansions=args.budget,
                controller=make(),
                steps=args.steps,
                cancel=cancel,
                seed=args.seed,
                gap_target=args.gap,
                costs=costs,
            )
            d = res.to_dict()
            d["node_ids"] = (
                None if res.route is None else np.asarray(graph.osm_id)[res.route].tolist()
            )
            if costs is not None:
                d.update(costs.answer_fields())
                d["traffic"] = args.traffic
            if args.json:
                bar.clear()
                print(json.dumps(d, default=_json_default), flush=True)
            else:
                results.append(d)
            bar.update(1)
    finally:
        bar.close()
    if not args.json:
        for d in results:
            print(_format(d))
        if len(results) > 1:
            print(_summary(results))
    return 0


def _fmt_s(x: float | None) -> str:
    if x is None or not math.isfinite(x):
        return "-"
    return f"{x:,.1f} s"


def _end(d: dict[str, Any], which: str) -> str:
    point = d.get(f"{which}_point")
    if point is None:
        return str(d[f"{which}_node"])
    return f"({point['lat']:.6f}, {point['lon']:.6f}; {point['distance_m']:.0f} m off)"


def _format(d: dict[str, Any]) -> str:
    head = f"{_end(d, 'origin')} -> {_end(d, 'destination')}: {d['status']}"
    if d["cost_s"] is None:
        return f"{head}; {d['expansions']:,} expansions in {d['elapsed_ms']:.2f} ms"
    nodes = d["node_indices"] or []
    return (
        f"{head}; cost {_fmt_s(d['cost_s'])}, bound {_fmt_s(d['lower_bound_s'])}, "
        f"gap {100 * (d['gap'] or 0.0):.2f}%; {len(nodes)} nodes; "
        f"{d['expansions']:,} expansions, {len(d['improvements'])} improvements "
        f"in {d['elapsed_ms']:.2f} ms ({d['controller']})"
    )


def _summary(rs: list[dict[str, Any]]) -> str:
    by: dict[str, int] = {}
    for d in rs:
        by[d["status"]] = by.get(d["status"], 0) + 1
    gaps = [d["gap"] for d in rs if d["gap"] is not None]
    mean_gap = 100 * sum(gaps) / len(gaps) if gaps else 0.0
    return (
        f"{len(rs)} queries: "
        + ", ".join(f"{k} {v}" for k, v in sorted(by.items()))
        + f"; mean gap {mean_gap:.2f}%"
    )
