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
