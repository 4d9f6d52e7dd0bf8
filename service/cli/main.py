"""``dueroute`` command line: a thin layer over the planner, the policies and the service."""

from __future__ import annotations

import argparse
import sys

from dueroute.planner.errors import PlannerError
from dueroute.service.cli import bench, graph, loadtest, policy, route, serve

#: Subcommand modules, in the order ``--help`` lists them; each defines ``register(sub)``.
COMMAND_MODULES = (graph, loadtest, route, serve, bench, policy)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="dueroute",
        description="Deadline-bound road routing: best route by the deadline, with a proven bound.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for module in COMMAND_MODULES:
        module.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except PlannerError as exc:
        print(f"dueroute: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("dueroute: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
