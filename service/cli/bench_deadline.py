"""``dueroute bench deadline``: what each controller delivers by a wall-clock deadline, in-process.

Held-out query pairs (uniform over the largest strong component, a seed apart from training),
every (controller, deadline) cell run in an interleaved order so that drift of a shared machine
spreads over all cells. Per cell:

===================  ===========================================================================
column               meaning
===================  ===========================================================================
``no_route``         share of answers without a route (every pair is reachable)
``quality``          mean of optimal cost / returned cost (0 without a route); optimal costs
                     from ``scipy.sparse.csgraph.dijkstra`` on the same graph
``quality_p10``      its 10th percentile
``expansions``       median expansions
``control``          mean share of the deadline spent deciding weights between steps (stats,
                     features, the controller: the control overhead), and ``per_step_us``:
                     that time per decision (a ``fixed:W`` search runs as one step: none)
``open_us``          median time to open the query (workspace, target row, the instant route)
``other``            mean share of the deadline outside the kernel, the opening and the
                     decisions (reading routes back, building the answer)
``late_p99_ms``      lateness (return - start - deadline) of the searches that ran out of time;
                     ``busy_wait_p99_ms`` the same for a busy wait to the deadline in the same
                     thread: the machine's own floor
===================  ===========================================================================

The *optimal* section times ``fixed:1`` without a deadline (proof of optimality) against one
single-source ``scipy.sparse.csgraph.dijkstra`` run per origin, in the same run.
"""

from __future__ import annotations

import argparse
import time
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    add_count_option,
    add_json_flag,
    add_landmarks_option,
    add_list_option,
    add_traffic_flag,
    emit,
    landmarks_for,
    load_graph_arg,
    load_traffic_arg,
    progress,
)

DEFAULT_CONTROLLERS = [
    "fixed:1",
    "fixed:1.5",
    "fixed:2",
    "fixed:3",
    "fixed:5",
    "random",
    "decreasing",
    "ana",
    "learned",
]
DEFAULT_DEADLINES_MS = [0.5, 1.0, 2.0, 5.0, 10.0]

#: (key, what, comparison, target): the targets this benchmark reports against.
TARGETS: tuple[tuple[str, str, str, float], ...] = (
    ("no_route_share_max", "answers without a route, worst cell", "<=", 0.0),
    ("best_quality_2ms", "mean quality of the best controller at 2 ms", ">=", 0.90),
    ("best_quality_5ms", "mean quality of the best controller at 5 ms", ">=", 0.97),
    ("worst_quality_2ms", "mean quality of the worst controller at 2 ms", ">=", 0.80),
    ("optimal_median_ms", "optimal query (fixed:1, no deadline) median, ms", "<=", 1.0),
    ("optimal_vs_scipy", "scipy one-source dijkstra time / optimal query median", ">=", 15.0),
    ("control_share_max", "control overhead, worst cell with deadline >= 1 ms", "<=", 0.02),
    ("late_p99_ms_max", "in-process lateness p99, worst cell", "<=", 0.5),
)


def register(bench_sub: Any) -> None:
    """Add ``bench deadline`` to the ``bench`` group's subparsers."""
    d = bench_sub.add_parser(
        "deadline",
        help="quality, routes, expansions, control overhead and lateness by deadline, in-process",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    d.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    add_list_option(d, "--deadlines-ms", float, DEFAULT_DEADLINES_MS, "deadlines to test")
    add_list_option(d, "--controllers", str, DEFAULT_CONTROLLERS, "controllers")
    d.add_argument(
        "--policy",
        default=None,
        metavar="FILE.onnx",
        help="policy for 'learned' (default: the shipped policies/default.onnx)",
    )
    add_count_option(d, 100, "query pairs per cell", old="--queries")
    d.add_argument("--seed", type=int, default=1000, help="seed of the query pairs (default 1000)")
    add_landmarks_option(d)
    add_traffic_flag(d)
    add_json_flag(d)
    d.set_defaults(func=cmd_deadline)


def _busy_wait(deadline_ms: float) -> float:
    start = time.perf_counter()
    end = start + deadline_ms / 1000.0
    while time.perf_counter() < end:
        pass
    return time.perf_counter() - end


def _pairs(graph: Any, count: int, seed: int) -> list[tuple[int, int]]:
    from dueroute.planner.heuristics import largest_component_nodes

    nodes = largest_component_nodes(graph)
    if nodes.shape[0] < 2:
        raise InvalidRequest(f"graph {graph.name} has no two strongly connected nodes")
    rng = np.random.default_rng(seed)
    out: list[tuple[int, int]] = []
    while len(out) < count:
        a, b = (int(x) for x in rng.choice(nodes, 2, replace=False))
        out.append((a, b))
    return out


def _controller_factory(spec: str, policy_path: str | None) -> Any:
    from dueroute.planner.controllers import make_controller

    if spec == "learned":
        from dueroute.policies.runtime import DEFAULT_POLICY_PATH, load_policy, resolve_controller

        policy = load_policy(policy_path or DEFAULT_POLICY_PATH)
        return lambda: resolve_controller("learned", policy=policy)
    make_controller(spec)  # fail now, clearly
    return lambda: make_controller(spec)


def cmd_deadline(args: argparse.Namespace) -> int:
    from scipy.sparse.csgraph import dijkstra

    from dueroute.planner.session import Planner, plan

    if not 1 <= args.count <= 100_000:
        raise InvalidRequest(f"--count must be in 1..100000, got {args.count}")
    if any(not 0 < d <= 60_000 for d in args.deadlines_ms):
        raise InvalidRequest(f"--deadlines-ms must be in (0, 60000], got {args.deadlines_ms}")
    factories = {spec: _controller_factory(spec, args.policy) for spec in args.controllers}
    graph = load_graph_arg(args.graph)
    landmarks = landmarks_for(graph, args.landmarks)
    planner = Planner(graph, landmarks=landmarks)
    planner.warm_up()
    costs = load_traffic_arg(args.traffic, graph, landmarks) if args.traffic else None
    pairs = _pairs(graph, args.count, args.seed)

    # exact optima (on the changed costs under --traffic), and the reference time of one
    # single-source dijkstra
    origins = sorted({o for o, _ in pairs})
    csr = graph.csr(None if costs is None else costs.travel_time_s)
    t0 = time.thread_time()
    dist = dijkstra(csr, directed=True, indices=origins)
    scipy_s = (time.thread_time() - t0) / len(origins)
    if graph.n_restrictions:  # the optimum is the legal one (the timing stays the plain run)
        from dueroute.planner.endpoints import legal_distances

        dist = legal_distances(graph, origins, None, None if costs is None else costs.travel_time_s)
    row = {o: i for i, o in enumerate(origins)}
    optimum = {(o, d): float(dist[row[o], d]) for o, d in pairs}
    # closures, and turn rules, may cut pairs of the road graph's strong component apart:
    # those are left out (and counted)
    unreachable = sum(1 for o, d in pairs if not np.isfinite(optimum[(o, d)]))
    pairs = [(o, d) for o, d in pairs if np.isfinite(optimum[(o, d)])]
    if not pairs:
        raise InvalidRequest(
            "no query pair is connected by a legal drive"
            + (" under the traffic document" if costs is not None else "")
        )

    for make in factories.values():  # compile and warm every controller's code path
        for o, d in pairs[:2]:
            plan(planner, o, d, deadline_ms=1.0, controller=make(), costs=costs)

    optimal_ms = []
    bar = progress(total=len(pairs) * (1 + len(factories) * len(args.deadlines_ms)), unit="search")
    for o, d in pairs:
        t = time.thread_time()
        res = plan(planner, o, d, controller="fixed:1", costs=costs)
        optimal_ms.append((time.thread_time() - t) * 1000.0)
        got = res.cost_s if res.cost_s is not None else float("inf")
        if res.status != "optimal" or abs(got - optimum[(o, d)]) > 1e-6 * optimum[(o, d)]:
            raise InvalidRequest(
                f"internal check failed: {o} -> {d} returned {res.status} {res.cost_s}, "
                f"scipy says {optimum[(o, d)]}"
            )
        bar.update(1)

    cells: dict[tuple[str, float], dict[str, list[float]]] = {
        (spec, dl): {k: [] for k in ("q", "exp", "ctrl", "step", "open", "other", "late", "busy")}
        for spec in factories
        for dl in args.deadlines_ms
    }
    rng = np.random.default_rng(args.seed + 1)
    order = [(spec, dl) for spec in factories for dl in args.deadlines_ms]
    for o, d in pairs:
        for i in rng.permutation(len(order)):  # interleaved against drift
            spec, dl = order[i]
            cell = cells[(spec, dl)]
            start = time.perf_counter()
            res = plan(
                planner,
                o,
                d,
                deadline_ms=dl,
                controller=factories[spec](),
                started_at=start,
                costs=costs,
            )
            back = time.perf_counter()
            cost = res.cost_s
            cell["q"].append(0.0 if cost is None else optimum[(o, d)] / cost if cost > 0 else 1.0)
            cell["exp"].append(res.expansions)
            decisions = max(0, len(res.weights) - 1)  # the first weight is the controller's reset
            cell["ctrl"].append(res.control_ms / dl)
            if decisions:
                cell["step"].append(res.control_ms * 1000.0 / decisions)
            cell["open"].append(res.open_ms * 1000.0)
            other_ms = res.elapsed_ms - res.kernel_ms - res.open_ms - res.control_ms
            cell["other"].append(max(0.0, other_ms) / dl)
            if res.stopped_by == "deadline":
                cell["late"].append((back - start) * 1000.0 - dl)
                cell["busy"].append(_busy_wait(dl) * 1000.0)
            bar.update(1)
    bar.close()

    table = []
    for (spec, dl), c in cells.items():
        q = np.asarray(c["q"])
        entry: dict[str, Any] = {
            "controller": spec,
            "deadline_ms": dl,
            "searches": len(q),
            "no_route": float(np.mean(q == 0.0)),
            "quality": float(q.mean()),
            "quality_p10": float(np.percentile(q, 10)),
            "expansions": float(np.median(c["exp"])),
            "control": float(np.mean(c["ctrl"])),
            "per_step_us": float(np.median(c["step"])) if c["step"] else None,
            "open_us": float(np.median(c["open"])),
            "other": float(np.mean(c["other"])),
            "ran_out_of_time": len(c["late"]),
        }
        if c["late"]:
            entry["late_p50_ms"] = float(np.percentile(c["late"], 50))
            entry["late_p99_ms"] = float(np.percentile(c["late"], 99))
            entry["busy_wait_p99_ms"] = float(np.percentile(c["busy"], 99))
        table.append(entry)

    def quality_at(ms: float, pick: Any) -> float | None:
        vals = [e["quality"] for e in table if e["deadline_ms"] == ms]
        return pick(vals) if vals else None

    opt_median = float(np.median(optimal_ms))
    measured = {
        "no_route_share_max": max(e["no_route"] for e in table),
        "best_quality_2ms": quality_at(2.0, max),
        "best_quality_5ms": quality_at(5.0, max),
        "worst_quality_2ms": quality_at(2.0, min),
        "optimal_median_ms": opt_median,
        "optimal_vs_scipy": scipy_s * 1000.0 / opt_median if opt_median > 0 else None,
        "control_share_max": max(
            (e["control"] for e in table if e["deadline_ms"] >= 1.0), default=None
        ),
        "late_p99_ms_max": max((e.get("late_p99_ms", 0.0) for e in table), default=None),
    }
    targets = []
    for key, what, op, target in TARGETS:
        value = measured[key]
        ok = None if value is None else (value <= target if op == "<=" else value >= target)
        targets.append(
            {
                "key": key,
                "what": what,
                "target": f"{op} {target:g}",
                "value": value,
                "status": "n/a" if ok is None else "PASS" if ok else "MISS",
            }
        )
    report = {
        "graph": graph.name,
        "nodes": graph.n_nodes,
        "landmarks": 0 if landmarks is None else landmarks.count,
        "pairs": len(pairs),
        "pairs_left_out_unreachable": unreachable,
        "seed": args.seed,
        "traffic": args.traffic,
        "traffic_version": costs.version if costs is not None else None,
        "optimal": {
            "median_ms": opt_median,
            "p90_ms": float(np.percentile(optimal_ms, 90)),
            "scipy_single_source_ms": scipy_s * 1000.0,
        },
        "cells": table,
        "targets": targets,
        "clock": "thread CPU time for the optimal section, wall time for deadline cells",
    }
    emit(report, args.json, _format)
    return 0


def _format(r: dict[str, Any]) -> str:
    o = r["optimal"]
    lines = [
        f"{r['graph']} ({r['nodes']:,} nodes, {r['landmarks']} landmarks), {r['pairs']} pairs "
        f"(seed {r['seed']}; {r['pairs_left_out_unreachable']} left out: no legal drive)",
        f"optimal query (fixed:1, no deadline): median {o['median_ms']:.3f} ms, p90 "
        f"{o['p90_ms']:.3f} ms; scipy dijkstra one source {o['scipy_single_source_ms']:.2f} ms",
        "",
        f"{'controller':<11} {'deadline':>8} {'no route':>8} {'quality':>8} {'q p10':>6} "
        f"{'expansions':>10} {'control':>8} {'us/step':>8} {'open us':>8} {'other':>7} "
        f"{'late p99':>9} {'busy p99':>9}",
    ]
    for c in r["cells"]:
        late = f"{c['late_p99_ms']:.3f}" if "late_p99_ms" in c else "-"
        busy = f"{c['busy_wait_p99_ms']:.3f}" if "busy_wait_p99_ms" in c else "-"
        step = "-" if c["per_step_us"] is None else f"{c['per_step_us']:.1f}"
        lines.append(
            f"{c['controller']:<11} {c['deadline_ms']:>6g}ms {c['no_route']:>8.1%} "
            f"{c['quality']:>8.3f} {c['quality_p10']:>6.3f} {c['expansions']:>10.0f} "
            f"{c['control']:>8.2%} {step:>8} {c['open_us']:>8.1f} {c['other']:>7.2%} "
            f"{late:>9} {busy:>9}"
        )
    lines.append("")
    for t in r["targets"]:
        v = t["value"]
        shown = "n/a" if v is None else f"{v:.4g}"
        lines.append(f"{t['status']:<5} {t['what']} {t['target']}: {shown}")
    return "\n".join(lines)
