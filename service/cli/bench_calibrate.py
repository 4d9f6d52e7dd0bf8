"""``dueroute bench calibrate``: measure this machine's deadline-to-expansions map.

Searches held-out query pairs with ``fixed:1`` at each deadline (in a shuffled order per pair,
against drift) and times the decisions of a policy of the shipped shape between real search
steps; writes the map (``policies.calibrate.Calibration``) that ``dueroute train --regime
deadline --calibration FILE`` simulates the service's deadlines and CPU shares with, and that
the trained policy records in its metadata. Run it under ``flock /tmp/dueroute-timing.lock`` on
an otherwise quiet machine: it measures wall-clock speed.
"""

from __future__ import annotations

import argparse
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    add_count_option,
    add_json_flag,
    add_landmarks_option,
    add_list_option,
    add_out_option,
    emit,
    landmarks_for,
    load_graph_arg,
)


def register(bench_sub: Any) -> None:
    """Add ``bench calibrate`` to the ``bench`` group's subparsers."""
    from dueroute.policies.calibrate import CALIBRATION_DEADLINES_MS

    c = bench_sub.add_parser(
        "calibrate",
        help="measure expansions per deadline and the cost of a policy decision (for training)",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    c.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    add_list_option(
        c, "--deadlines-ms", float, list(CALIBRATION_DEADLINES_MS), "deadlines to measure"
    )
    add_count_option(c, 80, "query pairs")
    c.add_argument("--seed", type=int, default=77, help="seed of the query pairs (default 77)")
    add_landmarks_option(c)
    add_out_option(c, required=False, metavar="FILE.json", help="write the calibration here (JSON)")
    add_json_flag(c)
    c.set_defaults(func=cmd_calibrate)


def cmd_calibrate(args: argparse.Namespace) -> int:
    from dueroute.planner.session import Planner
    from dueroute.policies.calibrate import calibration_summary, measure_calibration
    from dueroute.policies.env import sample_queries

    if not 1 <= args.count <= 10_000:
        raise InvalidRequest(f"--count must be in 1..10000, got {args.count}")
    if not args.deadlines_ms or any(not 0 < d <= 1000 for d in args.deadlines_ms):
        raise InvalidRequest(f"--deadlines-ms must be in (0, 1000], got {args.deadlines_ms}")
    graph = load_graph_arg(args.graph)
    planner = Planner(graph, landmarks=landmarks_for(graph, args.landmarks))
    queries = sample_queries(graph, args.count, args.seed)
    try:
        cal = measure_calibration(
            planner, queries, tuple(args.deadlines_ms), seed=args.seed, progress=True
        )
    except ValueError as exc:
        raise InvalidRequest(str(exc)) from None
    if args.out:
        try:
            cal.save(args.out)
        except OSError as exc:
            raise InvalidRequest(f"cannot write {args.out}: {exc.strerror or exc}") from None
    result = calibration_summary(cal) | {"out": args.out}
    emit(result, args.json, _format)
    return 0


def _format(r: dict[str, Any]) -> str:
    cal = r["calibration"]
    lines = [
        f"calibration on {cal['graph_name']} ({cal['machine']}), {cal['queries']} pairs:",
        f"  kernel rate {cal['expansion_rate_per_ms']:,.0f} expansions/ms; one policy decision "
        f"{cal['decision_us']:.1f} us",
        "  deadline ms   expansions (1/core)   steps 1/2/4 per core   expansions 1/2/4 per core",
    ]
    for row, e in zip(r["derived"], cal["expansions"], strict=True):
        lines.append(
            f"  {row['deadline_ms']:>11g}   {e:>19,.0f}   "
            f"{row['steps_1_per_core']:>5} {row['steps_2_per_core']:>4} "
            f"{row['steps_4_per_core']:>4}         "
            f"{row['expansions_1_per_core']:,} / {row['expansions_2_per_core']:,} / "
            f"{row['expansions_4_per_core']:,}"
        )
    if r.get("out"):
        lines.append(f"  wrote {r['out']}")
    return "\n".join(lines)
