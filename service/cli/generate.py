"""``dueroute graph generate``: write the fictional demo region as a graph, OSM XML or OSM PBF."""

from __future__ import annotations

import argparse
import shutil
import time
from pathlib import Path
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import add_out_option, emit

#: Output formats and the file suffix each needs.
FORMATS = {"npz": ".npz", "osm": ".osm", "pbf": ".pbf"}


def register_generate(graph_subparsers: Any) -> argparse.ArgumentParser:
    """Add ``generate`` to the ``dueroute graph`` group."""
    from dueroute.demo_data.generate import SIZES

    p = graph_subparsers.add_parser(
        "generate",
        help="generate the fictional demo region (Veyrand Coast) as a graph, OSM XML or PBF",
        description=(
            "Generate the fictional demo region. 'npz' builds the compiled graph (through the "
            "streaming importer for tiny/demo, compiled directly for large) and reuses the "
            "build cache; 'osm' writes the OSM XML and 'pbf' the OSM PBF the importer reads."
        ),
    )
    p.add_argument("--size", choices=SIZES, default="demo", help="region size (default: demo)")
    add_out_option(p, required=True, metavar="OUT", help="file to write")
    p.add_argument(
        "--seed", type=int, default=None, help="generator seed (default: the scenario's)"
    )
    p.add_argument(
        "--format",
        choices=sorted(FORMATS),
        default=None,
        help="npz (compiled graph), osm (OSM XML) or pbf (OSM PBF); default from the OUT "
        "suffix (.osm, .pbf), else npz",
    )
    p.add_argument("--json", action="store_true", help="print machine-readable JSON")
    p.set_defaults(func=cmd_generate)
    return p


def cmd_generate(args: argparse.Namespace) -> int:
    out = Path(args.out)
    fmt = args.format
    if fmt is None:
        fmt = {".osm": "osm", ".pbf": "pbf"}.get(out.suffix, "npz")
    if out.suffix != FORMATS[fmt]:
        raise InvalidRequest(
            f"output {str(out)!r} does not match --format {fmt}: the file name must end in "
            f"{FORMATS[fmt]}"
        )
    if args.seed is not None and args.seed < 0:
        raise InvalidRequest(f"--seed must be a non-negative integer, got {args.seed}")
    if out.is_dir():
        raise InvalidRequest(f"output {str(out)!r} is a directory; give a file name")
    result = generate_to(args.size, out, fmt=fmt, seed=args.seed, progress=not args.json)
    emit(result, args.json, _human)
    return 0


def generate_to(
    size: str, out: Path, *, fmt: str = "npz", seed: int | None = None, progress: bool = True
) -> dict[str, Any]:
    """Write one size of the demo region to ``out``; returns a summary dict."""
    from dueroute.demo_data.build import demo_graph_path
    from dueroute.demo_data.generate import default_seed, generate, write_osm, write_pbf

    seed = default_seed() if seed is None else seed
    t0 = time.perf_counter()
    out.parent.mkdir(parents=True, exist_ok=True)
    if fmt in ("osm", "pbf"):
        region = generate(size, seed=seed)
        nbytes = write_osm(region, out) if fmt == "osm" else write_pbf(region, out)
        return {
            "size": size,
            "seed": seed,
            "format": fmt,
            "output": str(out),
            "osm_nodes": region.n_nodes,
            "osm_ways": len(region.ways),
            "bytes": nbytes,
            "seconds": round(time.perf_counter() - t0, 3),
        }
    from dueroute.planner.graph import load_graph

    cached = demo_graph_path(size, seed=seed, progress=progress)
    tmp = out.with_name(out.name + ".tmp")
    shutil.copyfile(cached, tmp)
    tmp.replace(out)
    graph = load_graph(out)
    return {
        "size": size,
        "seed": seed,
        "format": fmt,
        "output": str(out),
        "nodes": graph.n_nodes,
        "edges": graph.n_edges,
        "bytes": out.stat().st_size,
        "cached_build": str(cached),
        "seconds": round(time.perf_counter() - t0, 3),
    }


def _human(r: dict[str, Any]) -> str:
    if r["format"] in ("osm", "pbf"):
        what = f"{r['osm_nodes']:,} OSM nodes, {r['osm_ways']:,} ways"
    else:
        what = f"{r['nodes']:,} nodes, {r['edges']:,} edges"
    return (
        f"wrote {r['output']} ({r['size']} demo region, seed {r['seed']}): {what}, "
        f"{r['bytes'] / 1e6:.1f} MB in {r['seconds']:.1f} s"
    )
