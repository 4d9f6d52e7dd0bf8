"""``dueroute route``: plan one query or a CSV of queries on a compiled graph."""

from __future__ import annotations

import argparse
import csv
import json
import math
import threading
from pathlib import Path
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    _json_default,
    add_json_flag,
    add_traffic_flag,
    load_graph_arg,
    load_traffic_arg,
    progress,
    traffic_summary,
)

#: Controllers the CLI accepts; ``learned`` goes through ``policies.runtime``.
CONTROLLER_HELP = (
    "weight controller: fixed:W (W >= 1), random, decreasing, ana, or learned "
    "(the ONNX policy; see --policy) (default: decreasing)"
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
    p.add_argument("--controller", default="decreasing", metavar="NAME", help=CONTROLLER_HELP)
    p.add_argument(
        "--policy", default=None, metavar="FILE.onnx", help="policy file for --controller learned"
    )
    p.add_argument("--steps", type=int, default=20, metavar="S", help="decision steps (1..10000)")
    p.add_argument("--seed", type=int, default=None, help="seed for the random controller")
    p.add_argument(
        "--no-landmarks",
        action="store_true",
        help="ignore <graph>.landmarks.npz and use the great-circle bound alone",
    )
    add_traffic_flag(p)
    add_json_flag(p)
    p.set_defaults(func=cmd_route)
    return p


def parse_endpoint(graph: Any, text: str, what: str) -> int:
    """A node index, or ``LAT,LON`` snapped to the nearest road node."""
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
        return int(graph.snap(lat, lon))
    try:
        node = int(raw)
    except ValueError:
        raise InvalidRequest(
            f"--{what} {text!r}: expected a node index or LAT,LON in degrees (e.g. 48.1,11.5)"
        ) from None
    return int(graph.check_node(node))


def read_queries(path: str, n_nodes: int) -> list[tuple[int, int]]:
    """Rows of a queries CSV; errors name the file and line."""
    p = Path(path)
    if not p.is_file():
        raise InvalidRequest(f"queries file not found: {path}")
    out: list[tuple[int, int]] = []
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            reader = csv.reader(fh)
            header = next(reader, None)
            if header is None or [h.strip() for h in header[:2]] != ["origin", "destination"]:
                raise InvalidRequest(
                    f"{path}: line 1 must be the header 'origin,destination', got "
                    f"{','.join(header) if header else 'an empty file'!r}"
                )
            for row in reader:
                line = reader.line_num
                if not row or all(not c.strip() for c in row):
                    continue
                if len(row) < 2:
                    raise InvalidRequest(f"{path}: line {line}: expected 2 columns, got {row!r}")
                try:
                    s, t = int(row[0].strip()), int(row[1].strip())
                except ValueError:
                    raise InvalidRequest(
                        f"{path}: line {line}: origin and destination must be integer node "
                        f"indices, got {row[0]!r},{row[1]!r}"
                    ) from None
                for v in (s, t):
                    if not 0 <= v < n_nodes:
                        raise InvalidRequest(
                            f"{path}: line {line}: node {v} is not in the graph "
                            f"(valid node indices are 0..{n_nodes - 1})"
                        )
                out.append((s, t))
    except UnicodeDecodeError:
        raise InvalidRequest(f"{path}: not a UTF-8 text CSV file") from None
    if not out:
        raise InvalidRequest(f"{path}: no queries after the header")
    return out


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


def _landmarks_for(graph: Any, disabled: bool) -> Any:
    if disabled or graph.path is None:
        return None
    from dueroute.planner.heuristics import landmarks_path, load_landmarks

    lp = landmarks_path(graph.path)
    if not lp.is_file():
        return None
    return load_landmarks(lp, graph)


def cmd_route(args: argparse.Namespace) -> int:
    from dueroute.planner.session import Planner, plan, validate_contract

    single = args.origin is not None or args.destination is not None
    if single and args.queries is not None:
        raise InvalidRequest("give either --from/--to or --queries, not both")
    if not single and args.queries is None:
        raise InvalidRequest("give --from NODE --to NODE (or LAT,LON), or --queries FILE.csv")
    if single and (args.origin is None or args.destination is None):
        raise InvalidRequest("--from and --to go together: give both")
    validate_contract(args.deadline_ms, args.budget, args.steps)
    make = _controller_factory(args.controller, args.policy, args.seed)

    graph = load_graph_arg(args.graph)
    landmarks = _landmarks_for(graph, args.no_landmarks)
    planner = Planner(graph, landmarks=landmarks)
    costs = None
    if args.traffic is not None:
        costs = load_traffic_arg(args.traffic, graph, landmarks)
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
        queries = read_queries(args.queries, graph.n_nodes)

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
                costs=costs,
            )
            d = res.to_dict()
            d["nodes"] = d["route"]
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


def _format(d: dict[str, Any]) -> str:
    head = f"{d['origin']} -> {d['destination']}: {d['status']}"
    if d["cost_s"] is None:
        return f"{head}; {d['expansions']:,} expansions in {d['elapsed_ms']:.2f} ms"
    nodes = d["nodes"] or []
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
