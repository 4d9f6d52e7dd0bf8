"""``dueroute bench search``: search speed as ratios against references measured in the same run.

Everything runs in one process, on one graph, with one seeded query set, so the ratios compare
like with like on whatever machine (and load) the run gets:

=============================  ==============================================================
key                            meaning
=============================  ==============================================================
``kernel_vs_scipy_rate``       kernel expansions/s (weight 1, optimal queries, great-circle
                               bound) / ``scipy.sparse.csgraph.dijkstra`` settled nodes/s
                               (one full single-source Dijkstra per query origin; settled =
                               nodes reached)
``alt_expansion_reduction``    expansions with the great-circle bound alone / expansions with
                               great-circle + ALT landmarks, optimal queries on long trips
                               (between the two demo towns when the graph is the demo region)
``setup_us_large``             median wall time of a whole optimal query whose origin is an
                               in-neighbour of the destination, on the ``large`` graph: the
                               fixed cost every query pays (``start_us_large`` is ``start()``
                               alone)
``speedup_vs_networkx``        ``networkx.astar_path`` time (the kernel's chord bound as the
                               heuristic, DiGraph built from the same CSR) / kernel time with
                               the same heuristic, same optimal queries (the target is judged
                               on this one); ``speedup_vs_networkx_with_alt`` divides by the
                               kernel's time with ALT landmarks instead
``hilbert_vs_input_rate``      kernel expansions/s with nodes in Hilbert order / with nodes in
                               the input (``osm_id``) order, both compiled in this run
=============================  ==============================================================
"""

from __future__ import annotations

import argparse
import math
import statistics
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import (
    GRAPH_HELP,
    add_alias,
    add_count_option,
    add_json_flag,
    emit,
    load_graph_arg,
    progress,
)

#: (key, what, comparison, target): the performance targets this benchmark reports against.
TARGETS: tuple[tuple[str, str, str, float], ...] = (
    ("kernel_vs_scipy_rate", "kernel settle rate vs scipy dijkstra", ">=", 1.0),
    ("setup_us_large", "per-query setup on the large graph (us)", "<=", 50.0),
    ("alt_expansion_reduction", "ALT: fewer expansions than great-circle", ">=", 5.0),
    ("speedup_vs_networkx", "optimal query vs networkx A*", ">=", 100.0),
)

MAX_QUERIES = 100_000


def register(bench_sub: Any) -> None:
    """Add ``bench search`` to the ``bench`` group's subparsers."""
    s = bench_sub.add_parser(
        "search",
        help="kernel vs scipy dijkstra and networkx A*, ALT vs great-circle, setup cost, node order",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    s.add_argument("graph", metavar="GRAPH", help=GRAPH_HELP)
    add_count_option(s, 200, "random optimal queries", old="--queries")
    s.add_argument("--seed", type=int, default=0, help="seed of the query sample (default 0)")
    s.add_argument(
        "--long-trips",
        type=int,
        default=20,
        help="long trips for the ALT comparison (default 20)",
    )
    s.add_argument(
        "--landmarks",
        type=int,
        default=16,
        help="ALT landmark count (default 16; built beside the graph when missing)",
    )
    s.add_argument(
        "--networkx-count",
        type=int,
        default=5,
        metavar="N",
        help="queries timed with networkx A* (slow; default 5, 0 skips)",
    )
    add_alias(s, "--networkx-queries", "--networkx-count", dest="networkx_count", type=int)
    s.add_argument(
        "--large",
        metavar="GRAPH",
        default=None,
        help="graph for the setup-cost measurement (default: the demo 'large' graph if built)",
    )
    s.add_argument("--skip-large", action="store_true", help="skip the setup-cost measurement")
    s.add_argument(
        "--skip-order", action="store_true", help="skip the Hilbert vs input node-order run"
    )
    add_json_flag(s)
    s.set_defaults(func=cmd_search)


# --------------------------------------------------------------------------------------------
# Measurements (each returns plain numbers; the command assembles the report)


def _check_count(value: int, name: str, lo: int, hi: int) -> int:
    if not lo <= value <= hi:
        raise InvalidRequest(f"{name} must be between {lo} and {hi}, got {value}")
    return value


def sample_pairs(graph: Any, count: int, rng: np.random.Generator) -> list[tuple[int, int]]:
    """Random (origin, destination) pairs, distinct, both in the largest strong component."""
    from dueroute.planner.heuristics import largest_component_nodes

    nodes = largest_component_nodes(graph)
    if nodes.shape[0] < 2:
        raise InvalidRequest(
            f"graph {graph.name} has no strongly connected part with two nodes to route between"
        )
    pairs: list[tuple[int, int]] = []
    while len(pairs) < count:
        o, d = rng.choice(nodes, size=2, replace=False)
        pairs.append((int(o), int(d)))
    return pairs


#: Clock for rates and ratios: CPU time of the benchmark thread. The kernel (GIL released,
#: but still in this thread), scipy and networkx all run in the calling thread, so other
#: processes on a shared machine do not skew the ratios. Setup latency uses wall time.
cpu_clock = time.thread_time


def solve(planner: Any, origin: int, destination: int) -> tuple[Any, float]:
    """Optimal query (weight 1 until proven); returns the result and its CPU time in s."""
    t0 = cpu_clock()
    search = planner.start(origin, destination, steps=1)
    while not search.done:
        search.run_step(1.0)
    result = search.result()
    return result, cpu_clock() - t0


class KernelRun:
    """Accumulates optimal kernel queries: expansions, CPU seconds, statuses, costs."""

    def __init__(self) -> None:
        self.expansions = 0
        self.seconds = 0.0
        self.not_optimal = 0
        self.costs_s: list[float | None] = []

    def add(self, planner: Any, origin: int, destination: int) -> float | None:
        result, dt = solve(planner, origin, destination)
        self.expansions += int(result.expansions)
        self.seconds += dt
        self.not_optimal += result.status != "optimal"
        self.costs_s.append(result.cost_s)
        return result.cost_s

    def summary(self) -> dict[str, Any]:
        n = len(self.costs_s)
        return {
            "queries": n,
            "expansions": self.expansions,
            "cpu_s": self.seconds,
            "expansions_per_s": self.expansions / self.seconds if self.seconds > 0 else None,
            "mean_expansions": self.expansions / n if n else None,
            "not_optimal": self.not_optimal,
        }


def run_kernel_vs_scipy(
    graph: Any, planner: Any, pairs: Sequence[tuple[int, int]], scipy_sources: int
) -> tuple[KernelRun, dict[str, Any]]:
    """Kernel queries interleaved with full single-source ``scipy.sparse.csgraph.dijkstra``
    runs from the same origins (every k-th query), so both see the same machine state.

    Settled for scipy = nodes with a finite distance (a full run settles every reached node).
    """
    from scipy.sparse.csgraph import dijkstra

    csr = graph.csr()
    dijkstra(csr, indices=int(pairs[0][0]))  # first call pays one-off costs
    every = max(1, len(pairs) // max(1, scipy_sources))
    kernel = KernelRun()
    settled = 0
    sources = 0
    seconds = 0.0
    for i, (o, d) in enumerate(progress(pairs, desc="kernel vs scipy", leave=False)):
        kernel.add(planner, o, d)
        if i % every == 0 and sources < scipy_sources:
            t0 = cpu_clock()
            dist = dijkstra(csr, indices=o)
            seconds += cpu_clock() - t0
            settled += int(np.count_nonzero(np.isfinite(dist)))
            sources += 1
    scipy_ref = {
        "sources": sources,
        "settled": settled,
        "cpu_s": seconds,
        "settled_per_s": settled / seconds if seconds > 0 else None,
    }
    return kernel, scipy_ref


def run_alt(
    plain: Any, with_alt: Any, pairs: Sequence[tuple[int, int]]
) -> tuple[KernelRun, KernelRun, float]:
    """Same optimal queries with the great-circle bound alone and with ALT, alternating.

    Returns both runs and the largest relative difference of their optimal costs.
    """
    gc_run, alt_run = KernelRun(), KernelRun()
    worst = 0.0
    for o, d in progress(pairs, desc="ALT vs great-circle", leave=False):
        a = gc_run.add(plain, o, d)
        b = alt_run.add(with_alt, o, d)
        if a is not None and b is not None:
            worst = max(worst, abs(a - b) / max(a, 1e-12))
        elif (a is None) != (b is None):
            worst = math.inf
    return gc_run, alt_run, worst


def run_networkx(
    graph: Any, planner: Any, pairs: Sequence[tuple[int, int]], alt_planner: Any = None
) -> tuple[KernelRun, dict[str, Any]]:
    """``networkx.astar_path`` with the kernel's heuristic (chord / top speed, a pure-Python
    function) on a DiGraph of the same CSR,
    alternating with the kernel on each query; optimal costs are compared."""
    import networkx as nx

    from dueroute.planner.graph import EARTH_RADIUS_M
    from dueroute.planner.heuristics import GREAT_CIRCLE_SAFETY

    csr = graph.csr().tocoo()
    g = nx.DiGraph()
    g.add_nodes_from(range(graph.n_nodes))
    g.add_weighted_edges_from(
        zip(csr.row.tolist(), csr.col.tolist(), csr.data.tolist(), strict=True)
    )
    lat = np.radians(np.asarray(graph.lat)).tolist()
    lon = np.radians(np.asarray(graph.lon)).tolist()
    scale = 2.0 * EARTH_RADIUS_M * GREAT_CIRCLE_SAFETY / float(graph.max_speed_mps)

    def chord_s(u: int, v: int) -> float:  # the bound the kernel uses: chord / top speed
        # haversine a = sin^2(theta / 2) and chord = 2 R sin(theta / 2)
        a = (
            math.sin(0.5 * (lat[v] - lat[u])) ** 2
            + math.cos(lat[u]) * math.cos(lat[v]) * math.sin(0.5 * (lon[v] - lon[u])) ** 2
        )
        return scale * math.sqrt(min(1.0, a))

    kernel = KernelRun()
    with_alt = KernelRun()
    seconds = 0.0
    worst_rel = 0.0
    for o, d in progress(pairs, desc="kernel vs networkx A*", leave=False):
        ours = kernel.add(planner, o, d)
        if alt_planner is not None:
            with_alt.add(alt_planner, o, d)
        t0 = cpu_clock()
        path = nx.astar_path(g, o, d, heuristic=chord_s, weight="weight")
        seconds += cpu_clock() - t0
        cost = float(sum(g[a][b]["weight"] for a, b in zip(path[:-1], path[1:], strict=True)))
        if ours is None:
            worst_rel = math.inf
        else:
            worst_rel = max(worst_rel, abs(cost - ours) / max(cost, 1e-12))
    return kernel, {
        "queries": len(pairs),
        "cpu_s": seconds,
        "kernel_cpu_s": kernel.seconds,
        "kernel_alt_cpu_s": with_alt.seconds if alt_planner is not None else None,
        "costs_match": worst_rel <= 1e-9,
        "worst_relative_cost_difference": worst_rel,
    }


def run_setup(large: Any, count: int, rng: np.random.Generator) -> dict[str, Any]:
    """Fixed per-query cost on ``large`` (wall time): adjacent-node optimal queries (origin an
    in-neighbour of the destination, same strong component) and bare ``start()`` calls."""
    from dueroute.planner.session import Planner

    planner = Planner(large)
    planner.warm_up()
    tail = np.asarray(large.tail)
    head = np.asarray(large.head)
    comp = np.asarray(large.component)
    same = np.flatnonzero((tail != head) & (comp[tail] == comp[head]))
    if same.shape[0] == 0:
        raise InvalidRequest(f"graph {large.name} has no edge inside a strong component")
    edges = rng.choice(same, size=count, replace=same.shape[0] < count)
    solve(planner, int(tail[edges[0]]), int(head[edges[0]]))  # allocate the pooled workspace
    query_us = []
    start_us = []
    for e in progress(edges, desc="setup (large)", leave=False):
        o, d = int(tail[e]), int(head[e])
        t0 = time.perf_counter()
        search = planner.start(o, d, steps=1)
        while not search.done:
            search.run_step(1.0)
        search.result()
        t1 = time.perf_counter()
        search = planner.start(o, d, steps=1)
        t2 = time.perf_counter()
        search.close()
        query_us.append((t1 - t0) * 1e6)
        start_us.append((t2 - t1) * 1e6)
    query_us.sort()
    return {
        "graph": str(large.path) if large.path is not None else large.name,
        "nodes": large.n_nodes,
        "edges": large.n_edges,
        "queries": count,
        "adjacent_query_us_p50": statistics.median(query_us),
        "adjacent_query_us_p90": query_us[int(0.9 * (len(query_us) - 1))],
        "start_us_p50": statistics.median(start_us),
    }


def reorder(graph: Any, spatial_order: bool) -> Any:
    """Recompile ``graph`` from its edge list, nodes first sorted by ``osm_id`` (the input
    order), then optionally renumbered along the Hilbert curve. Geometry is left out."""
    from dueroute.planner.graph import build_graph

    by_id = np.argsort(np.asarray(graph.osm_id), kind="stable")
    rank = np.empty_like(by_id)
    rank[by_id] = np.arange(by_id.shape[0])
    tail = rank[np.asarray(graph.tail, dtype=np.int64)]
    head = rank[np.asarray(graph.head, dtype=np.int64)]
    return build_graph(
        lat=np.asarray(graph.lat)[by_id],
        lon=np.asarray(graph.lon)[by_id],
        osm_id=np.asarray(graph.osm_id)[by_id],
        tail=tail,
        head=head,
        length_m=np.asarray(graph.length_m),
        speed_kph=np.asarray(graph.speed_kph),
        road_class=np.asarray(graph.road_class),
        speed_source=np.asarray(graph.speed_source),
        meta={"name": f"{graph.name} ({'hilbert' if spatial_order else 'input'} order)"},
        spatial_order=spatial_order,
    )


def _map_nodes(src: Any, dst: Any, nodes: np.ndarray) -> np.ndarray:
    """Indices in ``dst`` of ``src`` nodes, matched by ``osm_id``."""
    ids = np.asarray(src.osm_id)[nodes]
    order = np.argsort(np.asarray(dst.osm_id))
    pos = np.searchsorted(np.asarray(dst.osm_id)[order], ids)
    return order[pos]


def run_order(graph: Any, pairs: Sequence[tuple[int, int]]) -> dict[str, KernelRun]:
    """Same queries, alternating, on the graph compiled in input order and in Hilbert order."""
    from dueroute.planner.session import Planner

    if np.unique(np.asarray(graph.osm_id)).shape[0] != graph.n_nodes:
        raise InvalidRequest("node order comparison needs unique osm_id values")
    flat = np.asarray(pairs, dtype=np.int64).ravel()
    planners: dict[str, Any] = {}
    mapped: dict[str, list[list[int]]] = {}
    for label, spatial in (("input", False), ("hilbert", True)):
        g = reorder(graph, spatial)
        mapped[label] = _map_nodes(graph, g, flat).reshape(-1, 2).tolist()
        planners[label] = Planner(g)
        planners[label].warm_up()
    runs = {label: KernelRun() for label in planners}
    for i in progress(range(len(pairs)), desc="node order", leave=False):
        for label, planner in planners.items():
            o, d = mapped[label][i]
            runs[label].add(planner, o, d)
    return runs


# --------------------------------------------------------------------------------------------
# The command


def _default_large() -> tuple[Path | None, str]:
    """The cached ``large`` demo graph, without building it (a build takes minutes).

    Returns the path (or ``None``) and a note (why it is missing, or that an older build of
    the large region is used).
    """
    try:
        from dueroute.demo_data.build import cache_key, data_dir
        from dueroute.demo_data.generate import default_seed, load_scenario
    except ImportError:
        return None, "the demo region builder (demo_data) is not available; pass --large GRAPH"
    path = data_dir() / f"{cache_key('large', default_seed(load_scenario()))}.npz"
    if path.is_file():
        return path, ""
    # a large graph from an earlier generator version still measures the per-query setup
    older = sorted(data_dir().glob("veyrand-large-*.npz"), key=lambda p: p.stat().st_mtime)
    if older:
        return older[-1], f"using {older[-1].name}: the current large demo graph is not built"
    return None, (
        f"the large demo graph is not built ({path}); build it with "
        "'dueroute graph generate' (size large) or pass --large GRAPH"
    )


def _ratio(num: float | None, den: float | None) -> float | None:
    if num is None or den is None or den <= 0:
        return None
    return num / den


def cmd_search(args: argparse.Namespace) -> int:
    from dueroute.demo_data.queries import long_trip_pairs
    from dueroute.planner.heuristics import load_or_build_landmarks
    from dueroute.planner.session import Planner

    n_queries = _check_count(args.count, "--count", 1, MAX_QUERIES)
    n_long = _check_count(args.long_trips, "--long-trips", 1, MAX_QUERIES)
    n_nx = _check_count(args.networkx_count, "--networkx-count", 0, 1000)
    n_lm = _check_count(args.landmarks, "--landmarks", 1, 64)
    graph = load_graph_arg(args.graph)
    rng = np.random.default_rng(args.seed)
    notes: list[str] = []
    report: dict[str, Any] = {
        "graph": {
            "path": str(graph.path) if graph.path is not None else None,
            "name": graph.name,
            "nodes": graph.n_nodes,
            "edges": graph.n_edges,
            "spatial_order": graph.meta.get("spatial_order"),
        },
        "seed": args.seed,
        "clock": "CPU time of the benchmark thread (setup: wall time)",
    }

    # (a) kernel vs scipy settle rate, same graph and origins, interleaved
    pairs = sample_pairs(graph, n_queries, rng)
    plain = Planner(graph)
    plain.warm_up()
    kernel, scipy_ref = run_kernel_vs_scipy(graph, plain, pairs, scipy_sources=50)
    report["kernel"] = kernel.summary()
    report["scipy"] = scipy_ref
    report["kernel_vs_scipy_rate"] = _ratio(
        report["kernel"]["expansions_per_s"], scipy_ref["settled_per_s"]
    )
    if kernel.not_optimal:
        notes.append(f"{kernel.not_optimal} kernel queries did not end optimal")

    # (b) ALT vs great-circle on long trips
    t0 = time.perf_counter()
    landmarks = load_or_build_landmarks(graph, count=n_lm, progress=True)
    landmark_s = time.perf_counter() - t0
    trips, how = long_trip_pairs(graph, n_long, rng)
    with_alt = Planner(graph, landmarks=landmarks)
    with_alt.warm_up()
    gc_run, alt_run, worst = run_alt(plain, with_alt, trips)
    if worst > 1e-9:
        notes.append(f"ALT and great-circle optimal costs differ (relative {worst:.2e})")
    report["alt"] = {
        "trips": how,
        "landmarks": landmarks.count,
        "landmark_method": landmarks.method,
        "landmarks_file": str(landmarks.path) if landmarks.path is not None else None,
        "landmarks_ready_s": landmark_s,
        "landmark_build_s": landmarks.meta.get("build_s"),
        "great_circle": gc_run.summary(),
        "alt": alt_run.summary(),
        "worst_relative_cost_difference": worst,
    }
    report["alt_expansion_reduction"] = _ratio(gc_run.expansions, alt_run.expansions)
    report["alt_time_reduction"] = _ratio(gc_run.seconds, alt_run.seconds)

    # (c) per-query setup on the large graph
    report["setup_us_large"] = None
    report["start_us_large"] = None
    if args.skip_large:
        report["large"] = {"skipped": "--skip-large"}
    else:
        large_path: Path | None
        if args.large is not None:
            from dueroute.demo_data.build import resolve_graph_path

            large_path, why = resolve_graph_path(args.large), ""
        else:
            large_path, why = _default_large()
            if large_path is not None and why:
                notes.append(why)
        if large_path is None:
            report["large"] = {"skipped": why}
            notes.append(f"setup cost not measured: {why}")
        else:
            from dueroute.planner.graph import load_graph

            large = load_graph(large_path)
            report["large"] = run_setup(large, min(max(n_queries, 20), 1000), rng)
            report["setup_us_large"] = report["large"]["adjacent_query_us_p50"]
            report["start_us_large"] = report["large"]["start_us_p50"]
            if large.n_nodes < 1_000_000:
                notes.append(
                    f"the setup target is stated for 1M nodes; the large graph has "
                    f"{large.n_nodes:,}"
                )

    # (d) networkx A*
    report["speedup_vs_networkx"] = None
    report["speedup_vs_networkx_with_alt"] = None
    if n_nx == 0:
        report["networkx"] = {"skipped": "--networkx-queries 0"}
    else:
        try:
            import networkx  # noqa: F401
        except ImportError:
            msg = "networkx is not installed (it is a test extra: pip install 'dueroute[test]')"
            report["networkx"] = {"skipped": msg}
            notes.append(f"networkx comparison skipped: {msg}")
        else:
            _, ref = run_networkx(graph, plain, pairs[:n_nx], with_alt)
            report["networkx"] = ref
            report["speedup_vs_networkx"] = _ratio(ref["cpu_s"], ref["kernel_cpu_s"])
            report["speedup_vs_networkx_with_alt"] = _ratio(ref["cpu_s"], ref["kernel_alt_cpu_s"])
            if not ref["costs_match"]:
                notes.append("networkx A* and the kernel disagree on an optimal cost")

    # (e) node order
    report["hilbert_vs_input_rate"] = None
    if args.skip_order:
        report["node_order"] = {"skipped": "--skip-order"}
    else:
        runs = run_order(graph, pairs[: min(len(pairs), 100)])
        report["node_order"] = {k: v.summary() for k, v in runs.items()}
        report["hilbert_vs_input_rate"] = _ratio(
            report["node_order"]["hilbert"]["expansions_per_s"],
            report["node_order"]["input"]["expansions_per_s"],
        )

    report["targets"] = [
        _judge(key, what, op, target, report.get(key)) for key, what, op, target in TARGETS
    ]
    report["notes"] = notes
    emit(report, args.json, _format)
    return 0


def _judge(key: str, what: str, op: str, target: float, value: float | None) -> dict[str, Any]:
    if value is None:
        status = "SKIPPED"
    elif (op == ">=" and value >= target) or (op == "<=" and value <= target):
        status = "PASS"
    else:
        status = "MISS"
    return {
        "key": key,
        "what": what,
        "target": f"{op} {target:g}",
        "value": value,
        "status": status,
    }


def _fmt(x: Any, digits: int = 3) -> str:
    if x is None:
        return "-"
    if isinstance(x, float):
        return f"{x:,.{digits}g}" if abs(x) < 1000 else f"{x:,.0f}"
    return f"{x:,}" if isinstance(x, int) else str(x)


def _format(r: dict[str, Any]) -> str:
    g = r["graph"]
    lines = [f"bench search on {g['name']} ({g['nodes']:,} nodes, {g['edges']:,} edges)", ""]
    k, s = r["kernel"], r["scipy"]
    rows = [
        ("kernel expansions/s (weight 1, optimal)", _fmt(k["expansions_per_s"])),
        ("scipy dijkstra settled/s", _fmt(s["settled_per_s"])),
        ("  kernel_vs_scipy_rate", _fmt(r["kernel_vs_scipy_rate"])),
    ]
    a = r["alt"]
    rows += [
        (f"long trips ({a['trips']})", str(a["great_circle"]["queries"])),
        ("mean expansions, great-circle", _fmt(a["great_circle"]["mean_expansions"])),
        (f"mean expansions, ALT ({a['landmarks']} landmarks)", _fmt(a["alt"]["mean_expansions"])),
        ("  alt_expansion_reduction", _fmt(r["alt_expansion_reduction"])),
        ("  alt_time_reduction (CPU time)", _fmt(r["alt_time_reduction"])),
        ("landmarks ready in (s)", _fmt(a["landmarks_ready_s"])),
    ]
    large = r["large"]
    if "skipped" in large:
        rows.append(("setup on the large graph", f"skipped: {large['skipped']}"))
    else:
        rows += [
            (f"large graph ({large['nodes']:,} nodes)", str(large["graph"])),
            ("  setup_us_large (adjacent query p50)", _fmt(r["setup_us_large"])),
            ("  start() p50 (us)", _fmt(large["start_us_p50"])),
        ]
    nx_r = r["networkx"]
    if "skipped" in nx_r:
        rows.append(("networkx A*", f"skipped: {nx_r['skipped']}"))
    else:
        rows += [
            (f"networkx A*, {nx_r['queries']} queries (CPU s)", _fmt(nx_r["cpu_s"])),
            ("kernel, same queries (CPU s)", _fmt(nx_r["kernel_cpu_s"])),
            ("  speedup_vs_networkx (same heuristic)", _fmt(r["speedup_vs_networkx"])),
            ("kernel with ALT, same queries (CPU s)", _fmt(nx_r["kernel_alt_cpu_s"])),
            ("  speedup_vs_networkx_with_alt", _fmt(r["speedup_vs_networkx_with_alt"])),
        ]
    order = r["node_order"]
    if "skipped" in order:
        rows.append(("node order", f"skipped: {order['skipped']}"))
    else:
        rows += [
            ("expansions/s, input (osm_id) order", _fmt(order["input"]["expansions_per_s"])),
            ("expansions/s, Hilbert order", _fmt(order["hilbert"]["expansions_per_s"])),
            ("  hilbert_vs_input_rate", _fmt(r["hilbert_vs_input_rate"])),
        ]
    width = max(len(name) for name, _ in rows)
    lines += [f"{name:<{width}}  {value}" for name, value in rows]
    lines += ["", "targets:"]
    for t in r["targets"]:
        lines.append(
            f"  {t['status']:<7} {t['what']:<44} {t['target']:>8}   measured {_fmt(t['value'])}"
        )
    lines += [f"note: {n}" for n in r["notes"]]
    return "\n".join(lines)
