"""``dueroute bench deadline``: how late the in-process search answers a wall-clock deadline.

For every (controller, deadline) cell the command runs searches that cannot finish in time
(long trips) and records ``lateness = return time - (start + deadline)``. The reference, run
interleaved in the same thread, is a pure-Python busy wait to the same deadline: it is as late
as the operating system's scheduling makes any code on this machine, which separates the
planner's own lateness from the machine's.

The session cuts each decision step into kernel chunks sized from the measured expansion rate
(at most half the time left, at most 2 ms, stopping 30 us early); the target is p99 lateness
<= 0.5 ms in-process.
"""

from __future__ import annotations

import argparse
import time
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    add_json_flag,
    add_traffic_flag,
    emit,
    load_graph_arg,
    load_traffic_arg,
    progress,
)

TARGET_P99_MS = 0.5


def register(bench_sub: Any) -> None:
    """Add ``bench deadline`` to the ``bench`` group's subparsers."""
    d = bench_sub.add_parser(
        "deadline",
        help="lateness of in-process searches against wall-clock deadlines (p50/p99/max)",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    d.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    d.add_argument(
        "--deadlines-ms",
        type=float,
        nargs="+",
        default=[1.0, 2.0, 5.0, 10.0],
        help="deadlines to test (default 1 2 5 10)",
    )
    d.add_argument(
        "--controllers",
        nargs="+",
        default=["fixed:1", "decreasing", "ana"],
        help="controllers to test (default fixed:1 decreasing ana)",
    )
    d.add_argument("--queries", type=int, default=100, help="searches per cell (default 100)")
    d.add_argument("--seed", type=int, default=0, help="seed of the query sample (default 0)")
    d.add_argument(
        "--landmarks", action="store_true", help="use ALT landmarks (searches finish sooner)"
    )
    add_traffic_flag(d)
    add_json_flag(d)
    d.set_defaults(func=cmd_deadline)


def _percentiles_ms(late_s: list[float]) -> dict[str, float]:
    arr = np.asarray(late_s) * 1000.0
    return {
        "p50_ms": float(np.percentile(arr, 50)),
        "p99_ms": float(np.percentile(arr, 99)),
        "max_ms": float(arr.max()),
        "within_target": float(np.mean(arr <= TARGET_P99_MS)),
    }


def _busy_wait(deadline_ms: float) -> float:
    start = time.perf_counter()
    end = start + deadline_ms / 1000.0
    while time.perf_counter() < end:
        pass
    return time.perf_counter() - end


def cmd_deadline(args: argparse.Namespace) -> int:
    from dueroute.demo_data.queries import long_trip_pairs
    from dueroute.planner.controllers import make_controller
    from dueroute.planner.heuristics import load_or_build_landmarks
    from dueroute.planner.session import Planner, plan

    if not 1 <= args.queries <= 100_000:
        raise InvalidRequest(f"--queries must be in 1..100000, got {args.queries}")
    if any(not 0 < d <= 60_000 for d in args.deadlines_ms):
        raise InvalidRequest(f"--deadlines-ms must be in (0, 60000], got {args.deadlines_ms}")
    for spec in args.controllers:
        make_controller(spec)  # refuses an unknown spec with the list of allowed ones
    graph = load_graph_arg(args.graph)
    landmarks = load_or_build_landmarks(graph, progress=True) if args.landmarks else None
    planner = Planner(graph, landmarks=landmarks)
    costs = load_traffic_arg(args.traffic, graph, landmarks) if args.traffic else None
    pairs, how = long_trip_pairs(graph, args.queries, np.random.default_rng(args.seed))
    for o, t in pairs[:3]:  # compile and warm every code path before timing
        plan(planner, o, t, deadline_ms=1.0, controller="ana", costs=costs)
        plan(planner, o, t, deadline_ms=1.0, controller="decreasing", costs=costs)

    cells = []
    bar = progress(total=len(args.controllers) * len(args.deadlines_ms) * len(pairs), unit="search")
    for spec in args.controllers:
        for deadline_ms in args.deadlines_ms:
            late: list[float] = []
            reference: list[float] = []
            finished_early = 0
            for o, t in pairs:
                start = time.perf_counter()
                result = plan(
                    planner,
                    o,
                    t,
                    deadline_ms=deadline_ms,
                    controller=spec,
                    started_at=start,
                    costs=costs,
                )
                back = time.perf_counter()
                if result.status == "contract_spent":
                    late.append(back - (start + deadline_ms / 1000.0))
                else:
                    finished_early += 1
                reference.append(_busy_wait(deadline_ms))
                bar.update(1)
            cell: dict[str, Any] = {
                "controller": spec,
                "deadline_ms": deadline_ms,
                "searches": len(pairs),
                "ran_out_of_time": len(late),
                "finished_early": finished_early,
                "busy_wait": _percentiles_ms(reference),
            }
            if late:
                cell.update(_percentiles_ms(late))
            cells.append(cell)
    bar.close()
    timed = [c for c in cells if "p99_ms" in c]
    worst = max((c["p99_ms"] for c in timed), default=None)
    report = {
        "graph": str(graph.path),
        "nodes": graph.n_nodes,
        "queries": how,
        "landmarks": bool(args.landmarks),
        "traffic": args.traffic,
        "traffic_version": costs.version if costs is not None else None,
        "target_p99_ms": TARGET_P99_MS,
        "worst_p99_ms": worst,
        "target_met": worst is not None and worst <= TARGET_P99_MS,
        "cells": cells,
    }
    emit(report, args.json, _format)
    return 0


def _format(r: dict[str, Any]) -> str:
    lines = [
        f"deadline lateness on {r['graph']} ({r['nodes']:,} nodes); queries: {r['queries']}",
        "lateness = return time - deadline, for searches that ran out of time; "
        "reference = a busy wait to the same deadline in the same thread",
        "",
        f"{'controller':<12} {'deadline':>9} {'timed':>6} {'p50 ms':>8} {'p99 ms':>8} "
        f"{'max ms':>8} {'<=0.5ms':>8} {'busy-wait p99':>14}",
    ]
    for c in r["cells"]:
        if "p99_ms" not in c:
            lines.append(f"{c['controller']:<12} {c['deadline_ms']:>7g}ms  every search finished")
            continue
        lines.append(
            f"{c['controller']:<12} {c['deadline_ms']:>7g}ms {c['ran_out_of_time']:>6} "
            f"{c['p50_ms']:>8.3f} {c['p99_ms']:>8.3f} {c['max_ms']:>8.3f} "
            f"{c['within_target']:>8.1%} {c['busy_wait']['p99_ms']:>14.3f}"
        )
    verdict = "PASS" if r["target_met"] else "MISS"
    worst = r["worst_p99_ms"]
    lines.append("")
    lines.append(
        f"target p99 <= {r['target_p99_ms']} ms: {verdict} (worst p99 "
        f"{'n/a' if worst is None else f'{worst:.3f} ms'})"
    )
    return "\n".join(lines)
