"""Pieces every CLI subcommand shares: ``--json`` output, graph arguments, progress bars and
the option spellings (one per idea)."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.limits import DEFAULT_LANDMARKS

GRAPH_HELP = (
    "compiled graph (.npz), or the word 'demo' for the built-in demo region (built if missing)"
)


def add_json_flag(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--json", action="store_true", help="print machine-readable JSON")


def emit(result: Any, as_json: bool, human: Callable[[Any], str] | None = None) -> None:
    """Print ``result`` as JSON (one document) or through the ``human`` formatter."""
    if as_json or human is None:
        print(json.dumps(result, indent=None if as_json else 2, default=_json_default))
    else:
        print(human(result))


def _json_default(obj: Any) -> Any:
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot serialise {type(obj).__name__}")


def load_graph_arg(arg: str) -> Any:
    from dueroute.demo_data.build import resolve_graph_path
    from dueroute.planner.graph import load_graph

    return load_graph(resolve_graph_path(arg))


def progress(iterable: Any = None, **kwargs: Any) -> Any:
    """A tqdm progress bar on stderr; quiet when stderr is not a terminal (``disable=None``)."""
    from tqdm import tqdm

    kwargs.setdefault("file", sys.stderr)
    kwargs.setdefault("disable", None)
    kwargs.setdefault("dynamic_ncols", True)
    kwargs.setdefault("mininterval", 0.5)
    return tqdm(iterable, **kwargs)


# --------------------------------------------------------------------------------------------
# One spelling per idea. Every command builds its options from these helpers:
#
#   --queries FILE      a query file (``origin,destination`` CSV, dueroute.planner.query_file)
#   --count N           how many queries a command draws itself
#   --landmarks N       ALT landmarks (0 = the great-circle bound alone)
#   --deadlines-ms A,B  a list: one comma-separated value (lists of weights, budgets,
#   --controllers A,B   controllers, concurrency levels likewise)
#   -o, --out PATH      where the output goes
#
# Old spellings stay for one release as hidden aliases that print a deprecation warning.


def warn_deprecated(old: str, new: str) -> None:
    print(f"dueroute: warning: {old} is deprecated; use {new}", file=sys.stderr)


class _DeprecatedAlias(argparse.Action):
    """A hidden old spelling: stores into the new option's destination and warns once."""

    def __init__(self, option_strings: list[str], dest: str, new: str, **kwargs: Any) -> None:
        self.new = new
        super().__init__(option_strings, dest, **kwargs)

    def __call__(
        self, parser: argparse.ArgumentParser, namespace: Any, values: Any, option: Any = None
    ) -> None:
        warn_deprecated(str(option), self.new)
        if self.nargs == 0:
            values = self.const
        setattr(namespace, self.dest, values)


def add_alias(
    parser: Any, old: str, new: str, dest: str, *, nargs: Any = None, const: Any = None, **kw: Any
) -> None:
    """Accept ``old`` as a deprecated spelling of ``new`` (same destination, hidden)."""
    parser.add_argument(
        old,
        dest=dest,
        action=_DeprecatedAlias,
        new=new,
        nargs=nargs,
        const=const,
        help=argparse.SUPPRESS,
        **kw,
    )


class _ListAction(argparse.Action):
    """``--name a,b,c``: a comma-separated list, each item converted by ``item_type``.

    The old space-separated form (``--name a b c``) is still read, with a deprecation warning.
    """

    def __init__(self, option_strings: list[str], dest: str, item_type: Any, **kwargs: Any):
        self.item_type = item_type
        super().__init__(option_strings, dest, nargs="+", **kwargs)

    def __call__(
        self, parser: argparse.ArgumentParser, namespace: Any, values: Any, option: Any = None
    ) -> None:
        if len(values) > 1:
            warn_deprecated(
                f"a space-separated list after {option}", f"{option} {','.join(values)}"
            )
        items = [v.strip() for raw in values for v in str(raw).split(",") if v.strip()]
        if not items:
            parser.error(f"{option}: give at least one value, e.g. {option} a,b")
        out = []
        for item in items:
            try:
                out.append(self.item_type(item))
            except ValueError:
                parser.error(f"{option}: {item!r} is not a valid value")
        setattr(namespace, self.dest, out)


def add_list_option(
    parser: Any, name: str, item_type: Any, default: list[Any] | None, help: str, **kw: Any
) -> None:
    """A comma-separated list option (see :class:`_ListAction`); ``default`` shown in help."""
    shown = (
        ""
        if default is None
        else f" (default {','.join(f'{v:g}' if isinstance(v, float) else str(v) for v in default)})"
    )
    parser.add_argument(
        name, action=_ListAction, item_type=item_type, default=default, help=help + shown, **kw
    )


def add_out_option(parser: Any, *, required: bool, metavar: str, help: str, **kw: Any) -> None:
    """``-o/--out`` (``--output`` kept as a deprecated alias)."""
    parser.add_argument(
        "-o", "--out", dest="out", required=required, metavar=metavar, help=help, **kw
    )
    add_alias(parser, "--output", "--out", dest="out")


def landmarks_for(graph: Any, count: int, turn_profile: Any = None) -> Any:
    """ALT landmarks for ``graph`` (loaded from beside it, built and saved when missing), or
    ``None`` for ``count == 0``; for a ``turn_profile`` other than the default, its own."""
    from dueroute.planner.heuristics import MAX_COUNT, load_or_build_landmarks

    if not 0 <= count <= MAX_COUNT:
        raise InvalidRequest(f"--landmarks must be in 0..{MAX_COUNT}, got {count}")
    if count == 0:
        return None
    return load_or_build_landmarks(graph, count=count, progress=True, turn_profile=turn_profile)


def add_turn_options(parser: Any) -> None:
    """``--turn-costs left=S,right=S,uturn=S`` and ``--uturns``: the vehicle's turn profile."""
    from dueroute.planner.turns import UTURN_POLICIES

    parser.add_argument(
        "--turn-costs",
        default=None,
        metavar="left=S,right=S,uturn=S",
        help="seconds added for each left turn, right turn and U-turn (any of the three; "
        "default none)",
    )
    parser.add_argument(
        "--uturns",
        choices=UTURN_POLICIES,
        default="forbid_at_junctions",
        help="U-turns at junctions (dead ends always allow them); default forbid_at_junctions",
    )


def turn_profile_arg(args: argparse.Namespace) -> Any:
    """The ``planner.turns.TurnProfile`` of ``--turn-costs`` and ``--uturns``."""
    from dueroute.planner.turns import TurnProfile, parse_turn_costs

    return TurnProfile(uturns=args.uturns, costs=parse_turn_costs(args.turn_costs))


def add_landmarks_option(
    parser: Any, default: int | None = DEFAULT_LANDMARKS, help: str = ""
) -> None:
    """``--landmarks N``: ALT landmarks built beside the graph when missing; 0 = none."""
    shown = "as trained" if default is None else str(default)
    parser.add_argument(
        "--landmarks",
        type=int,
        nargs="?",
        const=DEFAULT_LANDMARKS,
        default=default,
        metavar="N",
        help=(
            help
            or "ALT landmarks (built beside the graph when missing; 0 = the great-circle bound alone)"
        )
        + f" (default {shown})",
    )


def add_count_option(parser: Any, default: int, help: str, old: str | None = None) -> None:
    """``--count N`` (``old``, e.g. ``--queries`` used as a count, kept as an alias)."""
    parser.add_argument(
        "--count", type=int, default=default, metavar="N", help=f"{help} (default {default})"
    )
    if old is not None:
        add_alias(parser, old, "--count", dest="count", type=int)


TRAFFIC_HELP = (
    'live traffic to apply: a JSON document {"updates": [...]} (the format of POST '
    "/v1/traffic) or the name of a shipped scenario (rush-hour, for the demo region)"
)


def add_traffic_flag(parser: argparse.ArgumentParser, what: str = "search") -> None:
    parser.add_argument(
        "--traffic",
        default=None,
        metavar="FILE.json",
        help=f"{TRAFFIC_HELP}; every {what} runs on the changed costs",
    )


def load_traffic_arg(arg: str, graph: Any, landmarks: Any = None, turn_profile: Any = None) -> Any:
    """The cost version of a traffic document (or named scenario) applied to ``graph``.

    SCC labels, and landmarks rebuilt on the new costs when speed-ups call for it, are
    computed before it returns (``planner.traffic.CostLayer`` with ``refine="sync"``), so
    offline answers carry the same bounds the service reaches once its background work is done.
    """
    from dueroute.demo_data.traffic import resolve_traffic_path
    from dueroute.planner.traffic import CostLayer, load_document

    path = resolve_traffic_path(arg)
    _, updates = load_document(path, graph)
    layer = CostLayer(graph, landmarks, refine="sync", turn_profile=turn_profile)
    try:
        version = layer.apply(updates)
    finally:
        layer.close()
    return version


def traffic_summary(version: Any, source: str) -> str:
    """One line describing an applied traffic document (human output)."""
    kinds = ", ".join(f"{k} {v}" for k, v in version.updates_by_kind.items() if v)
    line = (
        f"traffic {source}: version {version.version}, {len(version.active)} updates ({kinds}); "
        f"{version.edges_changed:,} edges changed, {version.edges_closed:,} closed, "
        f"{version.edges_faster:,} faster; bound {version.bound_quality}"
    )
    if version.bound_note:
        line += f" ({version.bound_note})"
    return line
