"""Build time and size of the turn-restriction search graph, and road-snapping speed.

Run under the timing lock (the machine is shared):

    flock /tmp/dueroute-timing.lock .venv/bin/python scripts/bench_turns_snap.py demo

Every timing is printed beside a reference measured in the same run: the search-graph build
against one scipy ``csgraph.dijkstra`` from one source over the road graph, a Dijkstra on the
search graph against the same on the road graph, and a road snap against today's node snap
(``RoadGraph.snap``, one k-d tree query). Restrictions are synthetic
(``planner.turns.synthetic_restrictions``): junctions, random allowed turns, a share via ways.
Meant to become ``dueroute bench turns``; kept out of the CLI until the search uses it.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import tracemalloc
from typing import Any

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import dijkstra

from dueroute.demo_data.build import demo_graph_path, resolve_graph_path
from dueroute.planner.errors import NodeNotFound, PlannerError
from dueroute.planner.graph import RoadGraph, load_graph
from dueroute.planner.snap import RoadSnapper
from dueroute.planner.turns import TurnCosts, build_search_graph, synthetic_restrictions


def best_of(fn: Any, repeat: int) -> tuple[float, Any]:
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def search_csr(sg: Any) -> csr_matrix:
    """The search graph as a scipy matrix (parallel arcs: the cheapest)."""
    tails = sg.arc_tail.astype(np.int64)
    heads = np.asarray(sg.head, dtype=np.int64)
    w = np.asarray(sg.cost_s)
    order = np.lexsort((w, heads, tails))
    keep = np.ones(order.size, dtype=bool)
    keep[1:] = (tails[order][1:] != tails[order][:-1]) | (heads[order][1:] != heads[order][:-1])
    sel = order[keep]
    n = sg.n_states
    return csr_matrix((w[sel], (tails[sel], heads[sel])), shape=(n, n))


def peak_mib(fn: Any) -> float:
    tracemalloc.start()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def bench_turns(g: RoadGraph, per_nodes: int, repeat: int, seed: int) -> dict[str, Any]:
    count = max(1, g.n_nodes // per_nodes)
    restricted = synthetic_restrictions(g, count, seed=seed)
    road = g.csr()
    source = int(np.argmax(np.diff(g.indptr)))
    t_ref, _ = best_of(lambda: dijkstra(road, directed=True, indices=source), repeat)
    rows: dict[str, Any] = {"restrictions": restricted.n_restrictions, "cases": {}}
    rows["scipy_dijkstra_road_s"] = t_ref
    cases = {
        "forbid_at_junctions": {},
        "allow": {"uturns": "allow"},
        "turn_costs": {"turn_costs": TurnCosts(left_s=8.0, right_s=3.0, uturn_s=30.0)},
    }
    for name, kw in cases.items():
        t_build, sg = best_of(lambda kw=kw: build_search_graph(restricted, **kw), repeat)
        mat = search_csr(sg)
        starts, _ = sg.start_states(source)
        t_search, _ = best_of(
            lambda mat=mat, s=int(starts[0]): dijkstra(mat, directed=True, indices=s), repeat
        )
        rows["cases"][name] = {
            "build_s": t_build,
            "build_vs_one_scipy_dijkstra": t_build / t_ref,
            "build_peak_mib": peak_mib(lambda kw=kw: build_search_graph(restricted, **kw)),
            "search_nodes": sg.n_states,
            "arcs": sg.n_arcs,
            "size_ratio_nodes": sg.n_states / g.n_nodes,
            "size_ratio_arcs": sg.n_arcs / g.n_edges,
            "scipy_dijkstra_search_vs_road": t_search / t_ref,
            "via_way_states": sg.info["via_way_states"],
            "expanded_nodes": sg.info["expanded_nodes"],
        }
    t_live, _ = best_of(lambda: sg.arc_costs(restricted.travel_time_s * 1.1), repeat)
    rows["live_cost_update_s"] = t_live
    return rows


def bench_snap(g: RoadGraph, queries: int, seed: int) -> dict[str, Any]:
    t_build, snapper = best_of(lambda: RoadSnapper(g), 1)
    rng = np.random.default_rng(seed)
    lat = rng.uniform(float(g.lat.min()), float(g.lat.max()), queries)
    lon = rng.uniform(float(g.lon.min()), float(g.lon.max()), queries)
    g.snap(float(lat[0]), float(lon[0]), float("inf"))  # builds the node k-d tree
    snapper.snap(float(lat[0]), float(lon[0]), float("inf"))  # loads the numba kernel

    def run(fn: Any) -> tuple[float, int]:
        ok = 0
        t = time.perf_counter()
        for a, b in zip(lat.tolist(), lon.tolist(), strict=True):
            try:
                fn(a, b)
                ok += 1
            except NodeNotFound:
                pass
        return (time.perf_counter() - t) / queries, ok

    t_node, ok_node = run(g.snap)
    t_road, ok_road = run(snapper.snap)
    return {
        "build_s": t_build,
        "segments": snapper.n_segments,
        "samples": snapper.n_samples,
        "node_snap_us": t_node * 1e6,
        "road_snap_us": t_road * 1e6,
        "road_vs_node_snap": t_road / t_node,
        "uniform_points": queries,
        "within_500m_node_snap": ok_node / queries,
        "within_500m_road_snap": ok_road / queries,
    }


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("graph", help="a compiled .npz, or demo / tiny / large")
    p.add_argument("--per-nodes", type=int, default=100, help="one restriction per N nodes")
    p.add_argument("--repeat", type=int, default=3, help="best of N timings")
    p.add_argument("--queries", type=int, default=2000, help="random points to snap")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--json", action="store_true", help="print the results as JSON")
    args = p.parse_args(argv)
    if args.per_nodes < 1 or args.repeat < 1 or args.queries < 1:
        print("bench_turns_snap: error: --per-nodes, --repeat, --queries must be >= 1")
        return 2
    try:
        if args.graph in ("tiny", "demo", "large"):
            g = load_graph(demo_graph_path(args.graph, progress=False))
        else:
            g = load_graph(resolve_graph_path(args.graph))
    except PlannerError as exc:
        print(f"bench_turns_snap: error: {exc}")
        return 2
    out = {
        "graph": {"name": g.name, "nodes": g.n_nodes, "edges": g.n_edges},
        "turns": bench_turns(g, args.per_nodes, args.repeat, args.seed),
        "snap": bench_snap(g, args.queries, args.seed),
    }
    if args.json:
        print(json.dumps(out, indent=2))
        return 0
    t = out["turns"]
    print(
        f"{g.name}: {g.n_nodes:,} nodes, {g.n_edges:,} edges, {t['restrictions']:,} synthetic "
        f"restrictions; one scipy dijkstra on the road graph {t['scipy_dijkstra_road_s']:.3f} s"
    )
    for name, c in t["cases"].items():
        print(
            f"  {name:20s} build {c['build_s']:.2f} s ({c['build_vs_one_scipy_dijkstra']:.1f}x "
            f"one dijkstra, peak {c['build_peak_mib']:,.0f} MiB); {c['search_nodes']:,} search "
            f"nodes ({c['size_ratio_nodes']:.2f}x), {c['arcs']:,} arcs "
            f"({c['size_ratio_arcs']:.2f}x); dijkstra on it {c['scipy_dijkstra_search_vs_road']:.2f}x"
        )
    print(f"  live cost update {t['live_cost_update_s'] * 1e3:.1f} ms")
    s = out["snap"]
    print(
        f"  snap index: {s['build_s']:.2f} s, {s['segments']:,} segments, {s['samples']:,} "
        f"samples; road snap {s['road_snap_us']:.0f} us vs node snap {s['node_snap_us']:.0f} us "
        f"({s['road_vs_node_snap']:.1f}x); uniform random points within 500 m: "
        f"{s['within_500m_road_snap']:.0%} road snap, {s['within_500m_node_snap']:.0%} node snap"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
