"""``dueroute bench import``: map import speed and peak memory, against osmnx in the same run.

Every measurement runs in a fresh child process (``python -c``), so its peak memory is its
own: the child loads the libraries, imports the ``tiny`` region once (numba's compiled
functions load, osmnx warms up), records its peak resident set size so far (the *baseline*,
``getrusage(RUSAGE_SELF).ru_maxrss``), then imports the measured file and saves the graph
(an uncompressed ``.npz`` in a scratch folder) and records the peak again. Reported per run:

=======================  =================================================================
key                      meaning
=======================  =================================================================
``import_s``             wall time of the import (read, compile, build the graph)
``save_s``               wall time of writing the ``.npz``
``cpu_s``                CPU time of the child over import and save (all its threads)
``nodes_per_s``          output nodes / (import_s + save_s)
``peak_rss_bytes``       peak RSS of the child (``ru_maxrss``), baseline included
``bytes_per_node``       peak_rss_bytes / output nodes (the target is judged on this one)
``net_bytes_per_node``   (peak - baseline) / output nodes: what the import itself added
``fingerprint``          the graph's fingerprint (equal fingerprints: the same graph)
=======================  =================================================================

Runs: the streaming (osmium) importer on the ``--size`` region written as PBF, ``--repeat``
times (the targets: at most 1.5 kB peak memory per output node and at least 100,000 output
nodes per second; speed from the fastest run, as ``timeit`` does, since other work on a
shared machine only ever slows a run down; memory from the largest peak), and on the
``--reference-size`` region as PBF and as OSM XML, beside the osmnx importer on the same XML
(the reference; ratios = osmium / osmnx). The map files are generated once and
cached in ``$DUEROUTE_DATA_DIR/bench`` (generating ``large`` takes about a minute, untimed).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import add_json_flag, emit, progress

#: (key, what, comparison, target) — the issue's targets, judged on the ``--size`` PBF run.
TARGETS: tuple[tuple[str, str, str, float], ...] = (
    ("bytes_per_node", "peak memory per output node (bytes)", "<=", 1500.0),
    ("nodes_per_s", "output nodes per second", ">=", 100_000.0),
)

#: The child process: warm up on ``tiny``, measure one import, print one JSON line.
_CHILD = """
import json, resource, sys, tempfile, time
from pathlib import Path
args = json.loads(sys.argv[1])
from dueroute.planner.graph import save_graph
if args["importer"] == "osmnx":
    from dueroute.planner.osm_import import import_map as run
else:
    from dueroute.planner.osm_stream import import_osm as run
run(args["warm_up"], components=args["components"])
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
cpu0 = resource.getrusage(resource.RUSAGE_SELF)
t0 = time.perf_counter()
graph = run(args["path"], components=args["components"])
t1 = time.perf_counter()
with tempfile.TemporaryDirectory(dir=args["scratch"]) as tmp:
    save_graph(graph, Path(tmp) / "graph.npz")
    t2 = time.perf_counter()
cpu1 = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps({
    "nodes": graph.n_nodes, "edges": graph.n_edges, "fingerprint": graph.fingerprint,
    "import_s": t1 - t0, "save_s": t2 - t1,
    "cpu_s": (cpu1.ru_utime + cpu1.ru_stime) - (cpu0.ru_utime + cpu0.ru_stime),
    "baseline_rss_bytes": base,
    "peak_rss_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
}))
"""


def register(bench_sub: Any) -> None:
    """Add ``bench import`` to the ``bench`` group's subparsers."""
    from dueroute.demo_data.generate import SIZES

    b = bench_sub.add_parser(
        "import",
        help="map import speed and peak memory per node, streaming importer vs osmnx",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    b.add_argument(
        "--size", choices=SIZES, default="large", help="region for the targets (default large)"
    )
    b.add_argument(
        "--reference-size",
        choices=[*SIZES, "none"],
        default="demo",
        help="region for the osmnx comparison (default demo; 'none' skips it)",
    )
    b.add_argument(
        "--repeat", type=int, default=3, help="runs of the --size import (default 3, 1..20)"
    )
    b.add_argument("--seed", type=int, default=None, help="generator seed (default: scenario's)")
    b.add_argument(
        "--components",
        choices=("largest", "all"),
        default="largest",
        help="component rule of every import (default largest, as 'graph import')",
    )
    add_json_flag(b)
    b.set_defaults(func=cmd_import_bench)


def map_file(size: str, seed: int | None, fmt: str) -> Path:
    """The demo region of ``size`` as OSM XML (``osm``) or PBF (``pbf``), generated once."""
    from dueroute.demo_data.build import cache_key, data_dir
    from dueroute.demo_data.generate import default_seed, generate, write_osm, write_pbf

    seed = default_seed() if seed is None else seed
    folder = data_dir() / "bench"
    path = folder / f"{cache_key(size, seed)}.osm{'.pbf' if fmt == 'pbf' else ''}"
    if not path.is_file():
        folder.mkdir(parents=True, exist_ok=True)
        region = generate(size, seed=seed)
        if fmt == "pbf":
            write_pbf(region, path)
        else:
            write_osm(region, path)
    return path


def run_child(
    importer: str, path: Path, warm_up: Path, components: str, scratch: Path
) -> dict[str, Any]:
    """One measured import in a fresh interpreter (see the module docstring)."""
    args = {
        "importer": importer,
        "path": str(path),
        "warm_up": str(warm_up),
        "components": components,
        "scratch": str(scratch),
    }
    done = subprocess.run(
        [sys.executable, "-c", _CHILD, json.dumps(args)],
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["no output"])[-1]
        raise InvalidRequest(f"the {importer} import of {path.name} failed in the child: {last}")
    result: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    total = result["import_s"] + result["save_s"]
    nodes = max(result["nodes"], 1)
    result.update(
        importer=importer,
        file=path.name,
        file_bytes=path.stat().st_size,
        format="pbf" if path.suffix == ".pbf" else "osm",
        nodes_per_s=result["nodes"] / total if total > 0 else None,
        bytes_per_node=result["peak_rss_bytes"] / nodes,
        net_bytes_per_node=(result["peak_rss_bytes"] - result["baseline_rss_bytes"]) / nodes,
    )
    return result


def cmd_import_bench(args: argparse.Namespace) -> int:
    if args.seed is not None and args.seed < 0:
        raise InvalidRequest(f"--seed must be a non-negative integer, got {args.seed}")
    if not 1 <= args.repeat <= 20:
        raise InvalidRequest(f"--repeat must be in 1..20, got {args.repeat}")
    plan: list[tuple[str, str, str]] = [("osmium", args.size, "pbf")] * args.repeat
    ref = args.reference_size
    if ref != "none":
        plan += [("osmium", ref, "pbf"), ("osmium", ref, "osm"), ("osmnx", ref, "osm")]
    runs: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="dueroute-bench-import-") as tmp:
        scratch = Path(tmp)
        bar = progress(total=len(plan) + 1, desc="bench import", unit="step")
        bar.set_postfix_str("map files")
        files = {(size, fmt): map_file(size, args.seed, fmt) for _, size, fmt in plan}
        warm = {fmt: map_file("tiny", args.seed, fmt) for fmt in ("pbf", "osm")}
        bar.update(1)
        for importer, size, fmt in plan:
            bar.set_postfix_str(f"{importer} {size} {fmt}")
            run = run_child(importer, files[(size, fmt)], warm[fmt], args.components, scratch)
            run["size"] = size
            runs.append(run)
            bar.update(1)
        bar.close()
    repeats = runs[: args.repeat]
    runs = runs[args.repeat :]
    main = dict(min(repeats, key=lambda r: r["import_s"] + r["save_s"]))
    main["nodes_per_s_all"] = [r["nodes_per_s"] for r in repeats]
    worst = max(repeats, key=lambda r: r["peak_rss_bytes"])
    for key in ("peak_rss_bytes", "baseline_rss_bytes", "bytes_per_node", "net_bytes_per_node"):
        main[key] = worst[key]
    main["same_graph_every_repeat"] = len({r["fingerprint"] for r in repeats}) == 1
    runs.insert(0, main)
    targets = []
    for key, what, cmp, target in TARGETS:
        value = main[key]
        ok = value is not None and (value <= target if cmp == "<=" else value >= target)
        targets.append({"key": key, "what": what, "target": f"{cmp} {target:g}", "value": value,
                        "met": bool(ok)})  # fmt: skip
    report: dict[str, Any] = {
        "size": args.size,
        "repeat": args.repeat,
        "reference_size": ref,
        "components": args.components,
        "runs": runs,
        "targets": targets,
        "targets_met": all(t["met"] for t in targets),
    }
    if ref != "none":
        osmium_xml, osmnx_xml = runs[2], runs[3]
        report["ratios"] = {
            "speed_osmium_vs_osmnx": osmium_xml["nodes_per_s"] / osmnx_xml["nodes_per_s"],
            "memory_osmium_vs_osmnx": osmium_xml["bytes_per_node"] / osmnx_xml["bytes_per_node"],
            # None when the reference added nothing over its baseline (a map as small as the
            # warm-up import): no ratio to report.
            "net_memory_osmium_vs_osmnx": (
                osmium_xml["net_bytes_per_node"] / osmnx_xml["net_bytes_per_node"]
                if osmnx_xml["net_bytes_per_node"] > 0
                else None
            ),
            "speed_pbf_vs_xml": runs[1]["nodes_per_s"] / osmium_xml["nodes_per_s"],
            "same_graph_osmium_osmnx": osmium_xml["fingerprint"] == osmnx_xml["fingerprint"],
            "same_graph_pbf_xml": runs[1]["fingerprint"] == osmium_xml["fingerprint"],
        }
    emit(report, args.json, _format)
    return 0


def _times(ratio: float | None) -> str:
    return (
        "n/a (the reference added nothing over its baseline)" if ratio is None else f"{ratio:.2f}x"
    )


def _format(r: dict[str, Any]) -> str:
    lines = [
        "map import: every run in a fresh child process; peak = ru_maxrss of the child "
        "(baseline = after loading libraries and a warm-up import of 'tiny')",
        "",
        f"{'importer':<8} {'region':<6} {'format':<6} {'file MB':>8} {'nodes':>10} "
        f"{'import s':>9} {'save s':>7} {'cpu s':>7} {'nodes/s':>10} {'peak MB':>8} "
        f"{'B/node':>7} {'net B/node':>10}",
    ]
    for run in r["runs"]:
        lines.append(
            f"{run['importer']:<8} {run['size']:<6} {run['format']:<6} "
            f"{run['file_bytes'] / 1e6:>8.1f} {run['nodes']:>10,} {run['import_s']:>9.2f} "
            f"{run['save_s']:>7.2f} {run['cpu_s']:>7.2f} {run['nodes_per_s']:>10,.0f} "
            f"{run['peak_rss_bytes'] / 2**20:>8.0f} {run['bytes_per_node']:>7,.0f} "
            f"{run['net_bytes_per_node']:>10,.0f}"
        )
    ratios = r.get("ratios")
    if ratios:
        lines += [
            "",
            f"osmium vs osmnx on the same {r['reference_size']} XML: "
            f"{ratios['speed_osmium_vs_osmnx']:.1f}x the nodes per second, "
            f"{ratios['memory_osmium_vs_osmnx']:.2f}x the peak memory per node "
            f"({_times(ratios['net_memory_osmium_vs_osmnx'])} net of the baseline); same graph "
            f"(fingerprint): {'yes' if ratios['same_graph_osmium_osmnx'] else 'NO'}",
            f"osmium on PBF vs XML of the same region: {ratios['speed_pbf_vs_xml']:.1f}x the "
            f"nodes per second; same graph: {'yes' if ratios['same_graph_pbf_xml'] else 'NO'}",
        ]
    rates = r["runs"][0].get("nodes_per_s_all", [])
    if len(rates) > 1:
        lines += [
            "",
            f"{r['size']} PBF, {len(rates)} runs: nodes/s "
            + ", ".join(f"{x:,.0f}" for x in rates)
            + " (the table shows the fastest run and the largest peak)",
        ]
    lines.append("")
    for t in r["targets"]:
        value = t["value"]
        lines.append(
            f"target {t['what']} {t['target']} on {r['size']} PBF: "
            f"{'PASS' if t['met'] else 'MISS'} ({value:,.0f})"
        )
    return "\n".join(lines)
