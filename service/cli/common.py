"""Pieces every CLI subcommand shares: ``--json`` output, graph arguments, progress bars."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

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


def load_traffic_arg(arg: str, graph: Any, landmarks: Any = None) -> Any:
    """The cost version of a traffic document (or named scenario) applied to ``graph``.

    SCC labels, and landmarks rebuilt on the new costs when speed-ups call for it, are
    computed before it returns (``planner.traffic.CostLayer`` with ``refine="sync"``), so
    offline answers carry the same bounds the service reaches once its background work is done.
    """
    from dueroute.demo_data.traffic import resolve_traffic_path
    from dueroute.planner.traffic import CostLayer, load_document

    path = resolve_traffic_path(arg)
    _, updates = load_document(path, graph)
    layer = CostLayer(graph, landmarks, refine="sync")
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
