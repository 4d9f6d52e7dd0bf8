"""Build the demo region's compiled graph on first use and cache it.

``demo_graph_path("demo")`` returns the path of a compiled ``.npz`` graph, building it the
first time: generate the region (:mod:`demo_data.generate`), write it as OSM XML, import that
through the same streaming importer as real data (:func:`planner.osm_stream.import_osm`,
every component kept: the generated region is complete, and its one-way dead ends are part
of the design), save. The ``large`` size skips the file: :func:`compile_region` hands the
generated ways to the importer's own compile step (:func:`planner.compile_ways.
compile_ways`). Both give the graph the osmnx importer gives (tests check it bit for bit on
``tiny``; on ``demo`` it has the fingerprint the shipped policy was trained on).

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
    great_circle_m,
    save_graph,
)

#: Environment variable naming the cache directory.
DATA_DIR_ENV = "DUEROUTE_DATA_DIR"

#: Sizes built through OSM XML + the streaming importer; larger ones are compiled directly.
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

    ``tiny`` and ``demo`` go through OSM XML and :func:`planner.osm_stream.import_osm`;
    other sizes through :func:`compile_region`. ``meta`` gains ``generator`` (size, seed,
    version, scenario digest, timings) and ``places`` (name, kind, lat, lon and the node of
    the largest strongly connected component nearest to each place centre).
    """
    from tqdm import tqdm

    timings: dict[str, float] = {}
    via_osm = size in OSM_SIZES
    steps = ["generate", "write OSM XML", "import"] if via_osm else ["generate"]
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
            from dueroute.planner.osm_stream import import_osm

            with tempfile.TemporaryDirectory(dir=work_dir, prefix="demo-build-") as tmp:
                xml = Path(tmp) / f"{size}.osm"
                t0 = time.perf_counter()
                bar.set_postfix_str(steps[1])
                xml_bytes = write_osm(region, xml)
                timings["write_osm_s"] = time.perf_counter() - t0
                bar.update(1)
                t0 = time.perf_counter()
                bar.set_postfix_str(steps[2])
                graph = import_osm(xml, name=region.name, components="all", work_dir=tmp)
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
# Direct compile (no map file) for sizes too big to write and read back in a test


def compile_region(
    region: RegionMap, *, spatial_order: bool = True, progress: bool = False
) -> RoadGraph:
    """Compile generated ways into a :class:`RoadGraph` without writing a map file.

    The ways go through :func:`planner.compile_ways.compile_ways`, the same code the streaming
    importer uses on a real file: the drivable filter (:func:`planner.osm_rules.
    way_drop_reason`), osmnx's one-way rules, great-circle lengths on coordinates rounded as
    in the map file, osmnx's simplification rule, tag merging along a merged edge and
    :func:`planner.speeds.edge_speed`. Way ids are the ones :func:`demo_data.generate.
    write_osm` gives (1, 2, ... in ``region.ways`` order), node ids likewise, so the graph
    equals the import of the written file (checked in the tests). Every component is kept.
    """
    from dueroute.planner.compile_ways import compile_ways
    from dueroute.planner.osm_rules import WAY_TAGS, way_direction, way_drop_reason
    from dueroute.planner.speeds import ROAD_CLASSES

    decisions: dict[tuple[tuple[str, str], ...], tuple[bool, int, int]] = {}
    attrs: dict[tuple[Any, Any], int] = {}
    keep: list[int] = []
    direction: list[int] = []
    attr: list[int] = []
    for i, w in enumerate(region.ways):
        key = tuple((k, w.tags[k]) for k in WAY_TAGS if k in w.tags)
        if key not in decisions:
            tags = dict(key)
            a = attrs.setdefault((tags.get("highway"), tags.get("maxspeed")), len(attrs))
            decisions[key] = (way_drop_reason(tags) is None, way_direction(tags), a)
        ok, d, a = decisions[key]
        if ok:
            keep.append(i)
            direction.append(d)
            attr.append(a)
    lengths = np.array([len(region.ways[i].nodes) for i in keep], dtype=np.int64)
    way_ptr = np.zeros(len(keep) + 1, dtype=np.int64)
    np.cumsum(lengths, out=way_ptr[1:])
    way_node = np.fromiter(
        (k for i in keep for k in region.ways[i].nodes), dtype=np.int64, count=int(way_ptr[-1])
    )
    cw = compile_ways(
        node_lat=region.lat,
        node_lon=region.lon,
        node_osm_id=np.arange(1, region.n_nodes + 1, dtype=np.int64),  # write_osm's node ids
        way_id=np.array(keep, dtype=np.int64) + 1,  # write_osm's way ids
        way_ptr=way_ptr,
        way_node=way_node,
        way_direction=np.array(direction, dtype=np.int8),
        way_attr=np.array(attr, dtype=np.int32),
        attrs=list(attrs),
    )
    meta = {
        "name": region.name,
        "importer": "dueroute.demo_data.build.compile_region",
        "dropped": {
            "ways_not_drivable": len(region.ways) - len(keep),
            "self_loops": cw.counts["self_loops"],
            "ring_segments": cw.counts["ring_segments"],
        },
        "file_nodes": region.n_nodes,
        "file_ways": len(region.ways),
        "road_classes": list(ROAD_CLASSES),
    }
    return cw.to_graph(meta=meta, spatial_order=spatial_order)
