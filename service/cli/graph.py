"""``dueroute graph import|info|plot``: compile map files, describe and draw compiled graphs."""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.compile_ways import COMPONENT_RULES
from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    add_json_flag,
    add_out_option,
    emit,
    load_graph_arg,
    progress,
)
from dueroute.service.cli.generate import register_generate

#: ``--importer`` choices.
IMPORTERS = ("auto", "osmium", "osmnx")

#: Progress steps of each importer (the osmium one reports them as it goes).
IMPORT_STEPS = {
    "osmium": (
        "reading ways",
        "reading nodes",
        "compiling edges",
        "mapping turn restrictions",
        "building graph",
    ),
    "osmnx": ("reading map with osmnx",),
}

#: Output formats ``graph plot`` writes (matplotlib picks the writer from the suffix).
PLOT_SUFFIXES = (".png", ".svg", ".pdf")


def register(sub: Any) -> argparse.ArgumentParser:
    """Add the ``graph`` command group; returns its parser."""
    parser = sub.add_parser("graph", help="import, inspect and draw road graphs")
    graph_sub = parser.add_subparsers(dest="graph_command", required=True, metavar="ACTION")

    imp = graph_sub.add_parser(
        "import",
        help="compile an OSM PBF, OSM XML (.osm, .osm.bz2, .xml) or GraphML map into a graph file",
        description=(
            "Compile a map into a graph file. OSM PBF and OSM XML go through the streaming "
            "osmium importer by default (clipped extracts welcome, turn restrictions read); "
            "GraphML, and OSM XML with --importer osmnx, through osmnx (the reference)."
        ),
    )
    imp.add_argument("source", metavar="SRC", help="map file: OSM PBF, OSM XML or osmnx GraphML")
    add_out_option(imp, required=True, metavar="OUT.npz", help="compiled graph to write")
    imp.add_argument("--name", default=None, help="graph name (default: the map file's name)")
    imp.add_argument(
        "--importer",
        choices=IMPORTERS,
        default="auto",
        help="auto (default): osmium for PBF and OSM XML, osmnx for GraphML",
    )
    imp.add_argument(
        "--components",
        choices=COMPONENT_RULES,
        default="largest",
        help="keep the largest strongly connected component (default; the others are "
        "reported) or all",
    )
    imp.add_argument(
        "--road-classes",
        default=None,
        metavar="LIST",
        help="highway classes to keep, comma-separated: 'default' is the drivable set, a "
        "class adds it, -class removes it (e.g. default,service)",
    )
    imp.add_argument(
        "--no-spatial-order",
        action="store_true",
        help="keep the importer's node order instead of renumbering along a Hilbert curve",
    )
    add_json_flag(imp)
    imp.set_defaults(func=cmd_import)

    info = graph_sub.add_parser("info", help="summarise a compiled graph")
    info.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    add_json_flag(info)
    info.set_defaults(func=cmd_info)

    plot = graph_sub.add_parser("plot", help="draw a compiled graph as a road map image")
    plot.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    add_out_option(plot, required=True, metavar="OUT.png", help="image file (.png, .svg, .pdf)")
    plot.add_argument(
        "--bbox",
        default=None,
        metavar="S,W,N,E",
        help="draw only this box: south,west,north,east in WGS84 degrees",
    )
    plot.add_argument("--dpi", type=int, default=150, help="image resolution (20..1200)")
    add_json_flag(plot)
    plot.set_defaults(func=cmd_plot)
    register_generate(graph_sub)
    return parser


# --------------------------------------------------------------------------------------------
# import


def choose_importer(kind: str, importer: str) -> str:
    """``osmium`` or ``osmnx`` for a map of ``kind`` (``pbf``, ``osm``, ``graphml``)."""
    if importer == "auto":
        return "osmnx" if kind == "graphml" else "osmium"
    if importer == "osmium" and kind == "graphml":
        raise InvalidRequest("GraphML is read by the osmnx importer only (--importer osmnx)")
    if importer == "osmnx" and kind == "pbf":
        raise InvalidRequest("OSM PBF is read by the osmium importer only (--importer osmium)")
    return importer


def cmd_import(args: argparse.Namespace) -> int:
    from dueroute.planner.errors import GraphFileNotFound
    from dueroute.planner.graph import save_graph
    from dueroute.planner.map_files import sniff
    from dueroute.planner.osm_import import import_map
    from dueroute.planner.osm_rules import parse_road_classes
    from dueroute.planner.osm_stream import import_osm

    out = Path(args.out)
    if out.suffix != ".npz":
        raise InvalidRequest(f"the output must be a .npz file, got {args.out!r}")
    road_filter = parse_road_classes(args.road_classes)
    source = Path(args.source)
    if not source.is_file():
        raise GraphFileNotFound(
            f"map file not found: {source}" if not source.is_dir() else f"{source} is a directory"
        )
    kind, _ = sniff(source)
    importer = choose_importer(kind, args.importer)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InvalidRequest(f"cannot write {out}: {exc.strerror or exc}") from exc
    started = time.perf_counter()
    steps = IMPORT_STEPS[importer]
    with progress(total=len(steps) + 1, desc="graph import", unit="step", disable=None) as bar:

        def on_step(name: str) -> None:
            if name != steps[0]:
                bar.update(1)
            bar.set_postfix_str(name)

        options = {
            "name": args.name,
            "spatial_order": not args.no_spatial_order,
            "components": args.components,
            "road_filter": road_filter,
        }
        if importer == "osmium":
            graph = import_osm(source, on_step=on_step, work_dir=out.parent, **options)
        else:
            on_step(steps[0])
            graph = import_map(source, **options)
        bar.update(1)
        bar.set_postfix_str("writing graph")
        try:
            save_graph(graph, out)
        except OSError as exc:
            raise InvalidRequest(f"cannot write {out}: {exc.strerror or exc}") from exc
        bar.update(1)
    elapsed_s = time.perf_counter() - started
    info = graph.info()
    meta = graph.meta
    result = {
        "source": str(args.source),
        "path": str(out),
        "name": graph.name,
        "importer": meta.get("importer"),
        "source_format": meta.get("source_format"),
        "nodes": graph.n_nodes,
        "edges": graph.n_edges,
        "strong_components": info["strong_components"],
        "largest_component_nodes": info["largest_component_nodes"],
        "total_length_km": info["total_length_km"],
        "edges_with_tagged_speed": info["edges_with_tagged_speed"],
        "file_nodes": meta.get("file_nodes"),
        "file_ways": meta.get("file_ways"),
        "read": meta.get("read"),
        "dropped": meta.get("dropped", {}),
        "clipped": meta.get("clipped"),
        "components": meta.get("components"),
        "restrictions": meta.get("restrictions"),
        "road_filter": meta.get("road_filter"),
        "elapsed_s": elapsed_s,
    }
    emit(result, args.json, _format_import)
    return 0


def _format_import(r: dict[str, Any]) -> str:
    dropped = r["dropped"]
    ways = ", ".join(
        f"{k.removeprefix('ways_').replace('_', ' ')} {v:,}"
        for k, v in dropped.items()
        if k.startswith("ways_") and v
    )
    read = r.get("read")
    if read:
        what = (
            f"  read: {read['highway_ways']:,} highway ways (ways without a highway tag are not "
            f"roads and are skipped unread), {read['nodes']:,} of their nodes, "
            f"{read['restriction_relations']:,} restriction relations"
        )
    else:
        what = f"  read: {r['file_nodes']:,} nodes, {r['file_ways']:,} ways"
    lines = [
        f"imported {r['source']} -> {r['path']} in {r['elapsed_s']:.2f} s ({r['importer']})",
        f"  {r['nodes']:,} nodes, {r['edges']:,} directed edges, "
        f"{r['total_length_km']:,.1f} km of road",
        what,
        f"  dropped ways: {ways or 'none'}; self-loop edges dropped: "
        f"{dropped.get('self_loops', 0):,}"
        + (
            f"; isolated ring segments dropped: {dropped['ring_segments']:,}"
            if dropped.get("ring_segments")
            else ""
        ),
    ]
    clipped = r.get("clipped")
    if clipped:
        lines.append(
            f"  clipped extract: {clipped['nodes_missing']:,} referenced nodes missing from the "
            f"file; {clipped['ways_cut']:,} ways cut there (usable parts kept), "
            f"{clipped['ways_clipped_away']:,} ways dropped (no segment left), "
            f"{clipped['segments_dropped']:,} segments dropped"
            if clipped["nodes_missing"]
            else "  clipped extract: no (every referenced node is in the file)"
        )
    comp = r.get("components")
    if comp:
        if comp["rule"] == "largest" and comp["dropped_components"]:
            lines.append(
                f"  components: kept the largest strongly connected one ({comp['kept_nodes']:,} "
                f"nodes); dropped {comp['dropped_components']:,} others with "
                f"{comp['dropped_nodes']:,} nodes and {comp['dropped_edges']:,} edges "
                "(--components all keeps them)"
            )
        else:
            lines.append(
                f"  components: {r['strong_components']:,} strongly connected, largest "
                f"{r['largest_component_nodes']:,} nodes (rule: {comp['rule']})"
            )
    rest = r.get("restrictions")
    if rest is not None:
        lines.append("  " + format_restrictions(rest))
    rf = r.get("road_filter")
    if rf and not rf.get("default", True):
        lines.append("  road classes kept: " + ", ".join(rf["highway"]))
    lines.append(
        f"  speeds: {r['edges_with_tagged_speed']:,} edges from maxspeed tags, "
        f"{r['edges'] - r['edges_with_tagged_speed']:,} from class defaults"
    )
    return "\n".join(lines)


def format_restrictions(rest: dict[str, Any]) -> str:
    """One line on turn restrictions: read, applied, dropped (by reason and kind)."""
    if not rest.get("read"):
        return "turn restrictions: none in the file"
    kinds = ", ".join(f"{k} {c['applied']}/{c['read']}" for k, c in rest.get("by_kind", {}).items())
    why = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in rest.get("dropped", {}).items())
    return (
        f"turn restrictions: {rest['read']:,} read from {rest['relations']:,} relations, "
        f"{rest['applied']:,} applied, {rest['read'] - rest['applied']:,} dropped"
        + (f" ({why})" if why else "")
        + (f"; applied/read by kind: {kinds}" if kinds else "")
    )


# --------------------------------------------------------------------------------------------
# info


def cmd_info(args: argparse.Namespace) -> int:
    graph = load_graph_arg(args.graph)
    emit(graph.info(), args.json, _format_info)
    return 0


def _format_info(r: dict[str, Any]) -> str:
    bbox = r["bbox"]
    lines = [
        f"{r['name']}  ({r['path']})",
        f"  nodes {r['nodes']:,}   edges {r['edges']:,}   road {r['total_length_km']:,.1f} km",
        f"  strongly connected components {r['strong_components']:,}, "
        f"largest {r['largest_component_nodes']:,} nodes",
    ]
    if bbox["south"] is not None:
        lines.append(
            f"  bbox S {bbox['south']:.5f}  W {bbox['west']:.5f}  "
            f"N {bbox['north']:.5f}  E {bbox['east']:.5f}"
        )
    if r["max_speed_kph"] is not None:
        lines.append(
            f"  max speed {r['max_speed_kph']:.0f} km/h; "
            f"{r['edges_with_tagged_speed']:,} edges with tagged maxspeed"
        )
    if r["edges_by_class"]:
        lines.append(
            "  edges by class: " + ", ".join(f"{k} {v:,}" for k, v in r["edges_by_class"].items())
        )
    dropped = r["meta"].get("dropped")
    if dropped:
        lines.append(
            "  dropped at import: " + ", ".join(f"{k} {v}" for k, v in dropped.items() if v)
        )
    turns = r["turn_restrictions"]
    rest = r["meta"].get("restrictions")
    if rest is not None:
        lines.append("  " + format_restrictions(rest))
    lines.append(
        f"  turn restrictions in the graph: {turns['in_graph']:,} edge sequences "
        f"({turns['no']:,} no_*, {turns['only']:,} only_*)"
    )
    lines.append(f"  fingerprint {r['fingerprint'][:16]}")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# plot

#: Drawing style per road class: (colour, line width in points). Our own palette: major roads
#: warm and wide, minor roads grey and thin; links share their road's colour, a little thinner.
_CLASS_STYLE: dict[str, tuple[str, float]] = {
    "motorway": ("#b03a2e", 2.6),
    "motorway_link": ("#b03a2e", 1.4),
    "trunk": ("#cd6133", 2.2),
    "trunk_link": ("#cd6133", 1.2),
    "primary": ("#e58e26", 1.8),
    "primary_link": ("#e58e26", 1.0),
    "secondary": ("#e1b12c", 1.4),
    "secondary_link": ("#e1b12c", 0.9),
    "tertiary": ("#6d6d6d", 1.0),
    "tertiary_link": ("#6d6d6d", 0.7),
    "unclassified": ("#8c8c8c", 0.6),
    "residential": ("#9a9a9a", 0.5),
    "living_street": ("#b5b5b5", 0.4),
    "service": ("#c4c4c4", 0.35),
    "other": ("#b0b0b0", 0.4),
}
_BACKGROUND = "#f7f5f0"


def parse_bbox(text: str) -> tuple[float, float, float, float]:
    """``"S,W,N,E"`` -> (south, west, north, east) in degrees, validated."""
    parts = text.split(",")
    try:
        s, w, n, e = (float(p) for p in parts)
    except ValueError:
        raise InvalidRequest(
            f"--bbox must be four numbers south,west,north,east (degrees), got {text!r}"
        ) from None
    if not all(math.isfinite(v) for v in (s, w, n, e)):
        raise InvalidRequest(f"--bbox values must be finite, got {text!r}")
    if not (-90.0 <= s < n <= 90.0):
        raise InvalidRequest(f"--bbox needs -90 <= south < north <= 90, got south={s}, north={n}")
    if not (-180.0 <= w < e <= 180.0):
        raise InvalidRequest(f"--bbox needs -180 <= west < east <= 180, got west={w}, east={e}")
    return s, w, n, e


def road_segments(graph: Any) -> tuple[np.ndarray, np.ndarray]:
    """Every straight piece of every edge, geometry included, one direction per road.

    Returns
    -------
    segments : float64[s, 2, 2]
        ``segments[i] = [[lon0, lat0], [lon1, lat1]]``.
    edge : int64[s]
        Edge each segment belongs to.

    An edge whose reverse twin (same endpoints, same number of interior points) is also in the
    graph is drawn once.
    """
    m = graph.n_edges
    tail = np.asarray(graph.tail, dtype=np.int64)
    head = np.asarray(graph.head, dtype=np.int64)
    gptr = np.asarray(graph.geom_indptr, dtype=np.int64)
    k = np.diff(gptr)
    # Drop one of each pair of twin edges (both directions of a two-way road).
    lo, hi = np.minimum(tail, head), np.maximum(tail, head)
    _, first = np.unique(np.column_stack((lo, hi, k)), axis=0, return_index=True)
    keep = np.zeros(m, dtype=bool)
    keep[first] = True
    edges = np.flatnonzero(keep)
    kk = k[edges]
    # Polyline of edge e: tail, its interior points, head -> kk + 2 points, kk + 1 segments.
    n_pts = kk + 2
    start = np.zeros(len(edges) + 1, dtype=np.int64)
    np.cumsum(n_pts, out=start[1:])
    total = int(start[-1])
    lat = np.empty(total)
    lon = np.empty(total)
    lat[start[:-1]] = graph.lat[tail[edges]]
    lon[start[:-1]] = graph.lon[tail[edges]]
    lat[start[1:] - 1] = graph.lat[head[edges]]
    lon[start[1:] - 1] = graph.lon[head[edges]]
    if int(kk.sum()):
        # interior point j of edge e goes to start[e] + 1 + j
        owner = np.repeat(np.arange(len(edges)), kk)
        offset = np.arange(int(kk.sum())) - np.repeat(np.cumsum(kk) - kk, kk)  # j within edge
        src = gptr[edges][owner] + offset
        dst = start[:-1][owner] + 1 + offset
        lat[dst] = graph.geom_lat[src]
        lon[dst] = graph.geom_lon[src]
    is_last = np.zeros(total, dtype=bool)
    is_last[start[1:] - 1] = True
    first_pt = np.flatnonzero(~is_last)
    segments = np.empty((len(first_pt), 2, 2))
    segments[:, 0, 0], segments[:, 0, 1] = lon[first_pt], lat[first_pt]
    segments[:, 1, 0], segments[:, 1, 1] = lon[first_pt + 1], lat[first_pt + 1]
    seg_edge = np.repeat(edges, kk + 1)
    return segments, seg_edge


def cmd_plot(args: argparse.Namespace) -> int:
    out = Path(args.out)
    if out.suffix.lower() not in PLOT_SUFFIXES:
        raise InvalidRequest(f"the image must end in {', '.join(PLOT_SUFFIXES)}, got {args.out!r}")
    if not 20 <= args.dpi <= 1200:
        raise InvalidRequest(f"--dpi must be in 20..1200, got {args.dpi}")
    bbox = parse_bbox(args.bbox) if args.bbox is not None else None
    graph = load_graph_arg(args.graph)
    if graph.n_edges == 0:
        raise InvalidRequest(f"{args.graph}: the graph has no edges to draw")

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    started = time.perf_counter()
    segments, seg_edge = road_segments(graph)
    if bbox is not None:
        s, w, n, e = bbox
        inside = (
            (segments[:, :, 1] >= s)
            & (segments[:, :, 1] <= n)
            & (segments[:, :, 0] >= w)
            & (segments[:, :, 0] <= e)
        ).any(axis=1)
        segments, seg_edge = segments[inside], seg_edge[inside]
        if len(segments) == 0:
            raise InvalidRequest(
                f"--bbox {args.bbox} holds no road of {graph.name}; the graph covers "
                f"S {float(np.min(graph.lat)):.5f} W {float(np.min(graph.lon)):.5f} "
                f"N {float(np.max(graph.lat)):.5f} E {float(np.max(graph.lon)):.5f}"
            )
        south, west, north, east = s, w, n, e
    else:
        south, north = float(np.min(graph.lat)), float(np.max(graph.lat))
        west, east = float(np.min(graph.lon)), float(np.max(graph.lon))
        pad_lat = max((north - south) * 0.02, 1e-4)
        pad_lon = max((east - west) * 0.02, 1e-4)
        south, north, west, east = south - pad_lat, north + pad_lat, west - pad_lon, east + pad_lon

    classes = list(graph.meta.get("road_classes") or [])
    seg_class = np.asarray(graph.road_class, dtype=np.int64)[seg_edge]
    # Equal-aspect map: one degree of longitude is cos(lat) degrees of latitude on the ground.
    aspect = 1.0 / max(math.cos(math.radians((south + north) / 2.0)), 1e-6)
    width_deg, height_deg = (east - west), (north - south) * aspect
    long_side_in = 10.0
    if width_deg >= height_deg:
        size = (long_side_in, max(3.0, long_side_in * height_deg / width_deg))
    else:
        size = (max(3.0, long_side_in * width_deg / height_deg), long_side_in)

    fig, ax = plt.subplots(figsize=size)
    try:
        fig.patch.set_facecolor(_BACKGROUND)
        ax.set_facecolor(_BACKGROUND)
        handles = []
        # Least important class first so motorways are drawn on top.
        order = sorted(set(seg_class.tolist()), reverse=True)
        for c in order:
            name = classes[c] if 0 <= c < len(classes) else "other"
            colour, width = _CLASS_STYLE.get(name, _CLASS_STYLE["other"])
            sel = seg_class == c
            ax.add_collection(
                LineCollection(
                    segments[sel], colors=colour, linewidths=width, capstyle="round", zorder=10 - c
                )
            )
            if not name.endswith("_link"):
                handles.append(Line2D([], [], color=colour, linewidth=max(width, 1.0), label=name))
        ax.set_xlim(west, east)
        ax.set_ylim(south, north)
        ax.set_aspect(aspect)
        ax.set_xlabel("longitude (°)")
        ax.set_ylabel("latitude (°)")
        ax.tick_params(labelsize=7)
        ax.ticklabel_format(useOffset=False, style="plain")
        for spine in ax.spines.values():
            spine.set_color("#cccccc")
        ax.set_title(f"{graph.name}: {graph.n_nodes:,} nodes, {graph.n_edges:,} edges", fontsize=10)
        if handles:
            ax.legend(handles=handles[::-1], loc="lower right", fontsize=7, frameon=True)
        out.parent.mkdir(parents=True, exist_ok=True)
        try:
            fig.savefig(out, dpi=args.dpi, facecolor=_BACKGROUND, bbox_inches="tight")
        except OSError as exc:
            raise InvalidRequest(f"cannot write {out}: {exc.strerror or exc}") from exc
    finally:
        plt.close(fig)
    result = {
        "path": str(out),
        "graph": str(graph.path) if graph.path else graph.name,
        "segments": int(len(segments)),
        "bbox": {"south": south, "west": west, "north": north, "east": east},
        "dpi": args.dpi,
        "elapsed_s": time.perf_counter() - started,
    }
    emit(
        result,
        args.json,
        lambda r: f"wrote {r['path']} ({r['segments']:,} road segments, {r['elapsed_s']:.1f} s)",
    )
    return 0
