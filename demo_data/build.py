"""Build the demo region's compiled graph on first use and cache it.

``demo_graph_path("demo")`` returns the path of a compiled ``.npz`` graph, building it the
first time: generate the region (:mod:`demo_data.generate`), write it as OSM XML, import that
through the same osmnx path as real data (:func:`planner.osm_import.import_map`), save.
The ``large`` size skips the XML: :func:`compile_region` compiles the generated ways directly
with the same drivable filter, the same one-way rules, the same node simplification rule as
osmnx and the same tags-to-speed rules (:func:`planner.speeds.edge_speed`).

Cache
-----
Files live in ``$DUEROUTE_DATA_DIR`` (default ``~/.cache/dueroute``), named
``veyrand-<size>-s<seed>-g<GENERATOR_VERSION>-f<graph FORMAT_VERSION>-<scenario sha256[:12]>.npz``:
changing the generator version, the graph file format, the scenario file, the size or the seed
gives a new file, so a stale graph is never reused. Concurrent first uses are safe: builders take an exclusive ``flock`` on a
lock file beside the target and re-check for the file once they hold it; the graph itself is
written to a temporary name and renamed into place (``planner.graph.save_graph``), so readers
never see a partial file.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import os
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.demo_data.generate import (
    GENERATOR_VERSION,
    SCENARIO_PATH,
    RegionMap,
    check_size,
    default_seed,
    generate,
    load_scenario,
    write_osm,
)
from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import (
    FORMAT_VERSION,
    RoadGraph,
    build_graph,
    great_circle_m,
    save_graph,
)

#: Environment variable naming the cache directory.
DATA_DIR_ENV = "DUEROUTE_DATA_DIR"

#: Sizes built through OSM XML + osmnx; larger ones are compiled directly.
OSM_SIZES = ("tiny", "demo")


#: The graph argument that names the built-in demo region.
DEMO_WORD = "demo"


def data_dir() -> Path:
    """The cache directory (``$DUEROUTE_DATA_DIR`` or ``~/.cache/dueroute``)."""
    env = os.environ.get(DATA_DIR_ENV)
    return Path(env).expanduser() if env else Path.home() / ".cache" / "dueroute"


def scenario_digest() -> str:
    return hashlib.sha256(SCENARIO_PATH.read_bytes()).hexdigest()[:12]


def cache_key(size: str, seed: int) -> str:
    """File stem of a cached build: changes with the generator, the scenario and the graph
    file format, so a build by an older dueroute is never reused."""
    return f"veyrand-{size}-s{seed}-g{GENERATOR_VERSION}-f{FORMAT_VERSION}-{scenario_digest()}"


def demo_graph_path(
    size: str = "demo",
    *,
    seed: int | None = None,
    rebuild: bool = False,
    progress: bool = True,
) -> Path:
    """Path of the compiled demo graph of ``size``, built and cached on first use.

    Parameters
    ----------
    size : str
        ``tiny`` (a few thousand nodes), ``demo`` (the default, > 200k nodes after osmnx
        simplification; about a minute to build) or ``large`` (> 1M nodes, compiled directly).
    seed : int, optional
        Generator seed; default from ``region.toml``.
    rebuild : bool
        Build again even if the cached file exists.
    progress : bool
        Show a tqdm progress bar on stderr while building.
    """
    scenario = load_scenario()
    check_size(size, scenario)
    seed = default_seed(scenario) if seed is None else int(seed)
    if seed < 0:
        raise InvalidRequest(f"seed must be a non-negative integer, got {seed}")
    directory = data_dir()
    path = directory / f"{cache_key(size, seed)}.npz"
    if path.is_file() and not rebuild:
        return path
    directory.mkdir(parents=True, exist_ok=True)
    with _exclusive(path.with_name(path.name + ".lock")):
        # another process may have finished the build while we waited for the lock
        if path.is_file() and not rebuild:
            return path
        graph = build_demo_graph(size, seed=seed, progress=progress, work_dir=directory)
        save_graph(graph, path)
    return path


def resolve_graph_path(arg: str) -> Path:
    """Path of a compiled graph; ``demo`` builds the demo region on first use."""
    if arg == DEMO_WORD:
        return demo_graph_path("demo")
    path = Path(arg)
    if path.suffix != ".npz":
        raise InvalidRequest(
            f"{arg!r} is not a compiled graph: pass a .npz file (make one with "
            "'dueroute graph import MAP.osm -o OUT.npz') or the word 'demo'"
        )
    return path


@contextlib.contextmanager
def _exclusive(lock_path: Path) -> Iterator[None]:
    """Hold an exclusive advisory lock on ``lock_path`` (no-op where ``fcntl`` is missing)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not on POSIX
        yield
        return
    with open(lock_path, "a+b") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def build_demo_graph(
    size: str = "demo",
    *,
    seed: int | None = None,
    progress: bool = True,
    work_dir: Path | None = None,
    region: RegionMap | None = None,
) -> RoadGraph:
    """Generate and compile one size of the demo region (not cached; see demo_graph_path).

    ``tiny`` and ``demo`` go through OSM XML and :func:`planner.osm_import.import_map`;
    other sizes through :func:`compile_region`. ``meta`` gains ``generator`` (size, seed,
    version, scenario digest, timings) and ``places`` (name, kind, lat, lon and the node of
    the largest strongly connected component nearest to each place centre).
    """
    from tqdm import tqdm

    timings: dict[str, float] = {}
    via_osm = size in OSM_SIZES
    steps = ["generate", "write OSM XML", "import with osmnx"] if via_osm else ["generate"]
    steps.append("compile" if not via_osm else "locate places")
    bar = tqdm(total=len(steps), desc=f"demo region '{size}'", disable=not progress, unit="step")
    try:
        t0 = time.perf_counter()
        bar.set_postfix_str(steps[0])
        if region is None:
            region = generate(size, seed=seed)
        timings["generate_s"] = time.perf_counter() - t0
        bar.update(1)
        if via_osm:
            from dueroute.planner.osm_import import import_map

            with tempfile.TemporaryDirectory(dir=work_dir, prefix="demo-build-") as tmp:
                xml = Path(tmp) / f"{size}.osm"
                t0 = time.perf_counter()
                bar.set_postfix_str(steps[1])
                xml_bytes = write_osm(region, xml)
                timings["write_osm_s"] = time.perf_counter() - t0
                bar.update(1)
                t0 = time.perf_counter()
                bar.set_postfix_str(steps[2] + " (the slow step)")
                graph = import_map(xml, name=region.name)
                timings["import_s"] = time.perf_counter() - t0
                bar.update(1)
            source = {"source": f"demo_data generator ({size}) via OSM XML", "osm_bytes": xml_bytes}
        else:
            t0 = time.perf_counter()
            bar.set_postfix_str(steps[1])
            graph = compile_region(region, progress=progress)
            timings["compile_s"] = time.perf_counter() - t0
            source = {"source": f"demo_data generator ({size}) compiled directly"}
        t0 = time.perf_counter()
        meta = dict(graph.meta)
        meta.update(source)
        meta["name"] = region.name
        meta["generator"] = {
            "size": size,
            "seed": region.seed,
            "version": GENERATOR_VERSION,
            "scenario_sha256_12": scenario_digest(),
            "scale": region.scale,
            "osm_nodes": region.n_nodes,
            "osm_ways": len(region.ways),
            **region.stats,
            **{k: round(v, 3) for k, v in timings.items()},
        }
        meta["places"] = locate_places(graph, region)
        bar.update(1)
    finally:
        bar.close()
    return dataclasses.replace(graph, meta=meta)


def locate_places(graph: RoadGraph, region: RegionMap) -> list[dict[str, Any]]:
    """Each place's centre and its nearest node in the largest strongly connected component."""
    comp = np.asarray(graph.component)
    main = int(np.argmax(np.bincount(comp))) if graph.n_nodes else -1
    idx = np.nonzero(comp == main)[0]
    lat = np.asarray(graph.lat)[idx]
    lon = np.asarray(graph.lon)[idx]
    out = []
    for p in region.places:
        pla, plo = region.to_latlon(np.array([[p.x_km, p.y_km]]))
        d = great_circle_m(lat, lon, pla[0], plo[0])
        k = int(np.argmin(d))
        out.append(
            {
                "name": p.name,
                "kind": p.kind,
                "lat": float(pla[0]),
                "lon": float(plo[0]),
                "radius_m": round(p.radius_km * 1000.0, 1),
                "node": int(idx[k]),
                "node_distance_m": round(float(d[k]), 1),
            }
        )
    return out


def place_nodes(graph: RoadGraph) -> dict[str, int]:
    """``{place name: node index}`` of a demo graph (from ``meta["places"]``)."""
    places = graph.meta.get("places")
    if not places:
        raise InvalidRequest(
            f"graph {graph.name!r} has no demo place list; build it with demo_data.build"
        )
    return {p["name"]: int(p["node"]) for p in places}


# --------------------------------------------------------------------------------------------
# Direct compile (no XML, no osmnx) for sizes too big for a networkx graph in memory

#: ``oneway`` values meaning one-way, and the subset meaning "against the node order"
#: (the values osmnx 2 uses, see ``osmnx.graph._add_paths``).
_ONEWAY_VALUES = frozenset({"yes", "true", "1", "-1", "reverse", "T", "F"})
_REVERSED_VALUES = frozenset({"-1", "reverse", "T"})


def compile_region(
    region: RegionMap, *, spatial_order: bool = True, progress: bool = False
) -> RoadGraph:
    """Compile generated ways into a :class:`RoadGraph` without XML or osmnx.

    Follows the import pipeline step by step: the drivable filter
    (:func:`planner.osm_import.way_drop_reason`), osmnx's one-way rules, great-circle lengths
    per segment on coordinates rounded as in the XML, osmnx's simplification rule (a node is
    kept if it is a dead end, a self-loop, only entered or only left, or does not have exactly
    two neighbours with degree 2 or 4), tag merging along a simplified edge, and
    :func:`planner.speeds.edge_speed`. On the ``tiny`` size it gives the same node and edge
    counts as the osmnx import (checked in the tests).
    """
    from dueroute.planner.osm_import import way_drop_reason
    from dueroute.planner.speeds import ROAD_CLASSES, edge_speed, road_class_index

    lat_all, lon_all = region.lat, region.lon
    ways = [w for w in region.ways if way_drop_reason(w.tags) is None]
    dropped = len(region.ways) - len(ways)
    # directed raw edges, each remembering its way
    tails: list[np.ndarray] = []
    heads: list[np.ndarray] = []
    wids: list[np.ndarray] = []
    for wi, w in enumerate(ways):
        nodes = np.asarray(w.nodes, dtype=np.int64)
        oneway = w.tags.get("oneway") in _ONEWAY_VALUES or w.tags.get("junction") == "roundabout"
        if oneway and w.tags.get("oneway") in _REVERSED_VALUES:
            nodes = nodes[::-1]
        tails.append(nodes[:-1])
        heads.append(nodes[1:])
        wids.append(np.full(len(nodes) - 1, wi, dtype=np.int64))
        if not oneway:
            tails.append(nodes[1:])
            heads.append(nodes[:-1])
            wids.append(np.full(len(nodes) - 1, wi, dtype=np.int64))
    tail = np.concatenate(tails)
    head = np.concatenate(heads)
    way_of = np.concatenate(wids)
    # drop nodes no drivable way uses; renumber 0..n-1
    used = np.unique(np.concatenate([tail, head]))
    remap = np.full(region.n_nodes, -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    tail, head = remap[tail], remap[head]
    lat, lon = lat_all[used], lon_all[used]
    n = len(used)
    seg_len = great_circle_m(lat[tail], lon[tail], lat[head], lon[head])

    # osmnx endpoint rule
    out_deg = np.bincount(tail, minlength=n)
    in_deg = np.bincount(head, minlength=n)
    pairs = np.unique(
        np.concatenate([np.column_stack([tail, head]), np.column_stack([head, tail])]), axis=0
    )
    n_neigh = np.bincount(pairs[:, 0], minlength=n)
    self_loop = np.zeros(n, dtype=bool)
    self_loop[tail[tail == head]] = True
    deg = out_deg + in_deg
    endpoint = (
        self_loop | (out_deg == 0) | (in_deg == 0) | ~((n_neigh == 2) & ((deg == 2) | (deg == 4)))
    )
    # CSR of raw out-edges
    order = np.argsort(tail, kind="stable")
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(out_deg, out=ptr[1:])
    e_head = head[order]
    e_way = way_of[order]
    e_len = seg_len[order]

    new_tail: list[int] = []
    new_head: list[int] = []
    new_len: list[float] = []
    speeds: list[float] = []
    sources: list[int] = []
    classes: list[int] = []
    gptr: list[int] = [0]
    glat: list[float] = []
    glon: list[float] = []
    tags_cache: dict[tuple[int, ...], tuple[float, int, int]] = {}
    ptr_l = ptr.tolist()
    head_l = e_head.tolist()
    way_l = e_way.tolist()
    len_l = e_len.tolist()
    endpoint_l = endpoint.tolist()
    lat_l, lon_l = lat.tolist(), lon.tolist()
    from tqdm import tqdm

    starts = np.nonzero(endpoint)[0].tolist()
    for u in tqdm(
        starts, desc="simplify", unit="node", disable=not progress, mininterval=0.5, leave=False
    ):
        for e in range(ptr_l[u], ptr_l[u + 1]):
            prev, v = u, head_l[e]
            length = len_l[e]
            wset = {way_l[e]}
            interior: list[int] = []
            while not endpoint_l[v] and v != u:
                # a through node: continue along the out-edge that does not turn back
                nxt = -1
                for f in range(ptr_l[v], ptr_l[v + 1]):
                    if head_l[f] != prev:
                        nxt = f
                        break
                if nxt < 0:
                    break
                interior.append(v)
                prev, v = v, head_l[nxt]
                length += len_l[nxt]
                wset.add(way_l[nxt])
            if v == u:
                continue  # a loop back to the start: osmnx makes a self-loop, the importer drops it
            key = tuple(sorted(wset))
            if key not in tags_cache:
                highways = sorted({ways[k].tags["highway"] for k in key})
                maxspeeds = sorted(
                    {ways[k].tags["maxspeed"] for k in key if "maxspeed" in ways[k].tags}
                )
                hw: Any = highways[0] if len(highways) == 1 else highways
                ms: Any = (
                    None if not maxspeeds else maxspeeds[0] if len(maxspeeds) == 1 else maxspeeds
                )
                sp, src = edge_speed(hw, ms)
                tags_cache[key] = (sp, src, road_class_index(highways))
            sp, src, cls = tags_cache[key]
            new_tail.append(u)
            new_head.append(v)
            new_len.append(length)
            speeds.append(sp)
            sources.append(src)
            classes.append(cls)
            glat.extend(lat_l[k] for k in interior)
            glon.extend(lon_l[k] for k in interior)
            gptr.append(len(glat))
    # keep only nodes that are edge endpoints after simplification
    t = np.array(new_tail, dtype=np.int64)
    h = np.array(new_head, dtype=np.int64)
    keep_nodes = np.unique(np.concatenate([t, h]))
    remap2 = np.full(n, -1, dtype=np.int64)
    remap2[keep_nodes] = np.arange(len(keep_nodes))
    meta = {
        "name": region.name,
        "importer": "dueroute.demo_data.build.compile_region",
        "dropped": {"ways_not_drivable": dropped},
        "file_nodes": region.n_nodes,
        "file_ways": len(region.ways),
        "road_classes": list(ROAD_CLASSES),
    }
    return build_graph(
        lat=lat[keep_nodes],
        lon=lon[keep_nodes],
        osm_id=used[keep_nodes] + 1,  # the ids write_osm would give these nodes
        tail=remap2[t],
        head=remap2[h],
        length_m=np.array(new_len, dtype=np.float64),
        speed_kph=np.array(speeds, dtype=np.float32),
        road_class=np.array(classes, dtype=np.int8),
        speed_source=np.array(sources, dtype=np.int8),
        geom_indptr=np.array(gptr, dtype=np.int64),
        geom_lat=np.array(glat, dtype=np.float64),
        geom_lon=np.array(glon, dtype=np.float64),
        meta=meta,
        spatial_order=spatial_order,
    )
