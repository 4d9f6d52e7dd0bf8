"""The fictional demo region: determinism, import through osmnx, river and bridges, query sets,
the build cache and ``dueroute graph generate``. Fast tests use the ``tiny`` size only."""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from dueroute.demo_data import build as demo_build
from dueroute.demo_data.build import compile_region, demo_graph_path, place_nodes
from dueroute.demo_data.generate import generate, load_scenario, osm_bytes, write_osm
from dueroute.demo_data.queries import KINDS, kind_counts, sample_queries, sample_queries_with_kinds
from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import great_circle_m, load_graph
from dueroute.planner.osm_import import import_map


@pytest.fixture(scope="module")
def tiny_region():
    return generate("tiny")


@pytest.fixture(scope="module")
def tiny_osm(tiny_region, tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("demo") / "tiny.osm"
    write_osm(tiny_region, path)
    return path


@pytest.fixture(scope="module")
def tiny_graph(tiny_osm):
    """The osmnx import of the tiny region, every component kept (as the demo build does)."""
    return import_map(tiny_osm, components="all")


@pytest.fixture(scope="module")
def tiny_cached(tmp_path_factory):
    """The tiny demo graph built by demo_graph_path into a private cache directory."""
    mp = pytest.MonkeyPatch()
    mp.setenv("DUEROUTE_DATA_DIR", str(tmp_path_factory.mktemp("cache")))
    try:
        path = demo_graph_path("tiny", progress=False)
        yield load_graph(path)
    finally:
        mp.undo()


def _parse_osm(path: Path):
    """Nodes and ways of an OSM XML file, read with the standard library's ElementTree."""
    root = ET.parse(path).getroot()
    nodes = {
        int(n.get("id")): (float(n.get("lat")), float(n.get("lon")), {
            t.get("k"): t.get("v") for t in n.findall("tag")
        })
        for n in root.iter("node")
    }  # fmt: skip
    ways = [
        ([int(nd.get("ref")) for nd in w.findall("nd")], {t.get("k"): t.get("v") for t in w.findall("tag")})
        for w in root.iter("way")
    ]  # fmt: skip
    return root, nodes, ways


# ---------------------------------------------------------------------------------------------
# Determinism and format


def test_same_seed_same_bytes_other_seed_differs():
    """Same seed gives byte-identical OSM XML; another seed gives a different region."""
    a = osm_bytes(generate("tiny", seed=7))
    b = osm_bytes(generate("tiny", seed=7))
    c = osm_bytes(generate("tiny", seed=8))
    assert a == b
    assert a != c


def test_xml_is_osm_api_06_layout(tiny_osm):
    """Root, generator, node and way layout as in the OSM API 0.6 XML format (open standard)."""
    root, nodes, ways = _parse_osm(tiny_osm)
    assert root.tag == "osm"
    assert root.get("version") == "0.6"
    assert root.get("generator") == "dueroute-demo"
    assert root.find("bounds") is not None
    for lat, lon, _ in nodes.values():
        assert -90 <= lat <= 90 and -180 <= lon <= 180
    for refs, tags in ways:
        assert len(refs) >= 2
        assert all(r in nodes for r in refs)  # the generated file is complete, not cut
        assert tags, "every way is tagged"
    highways = {t.get("highway") for _, t in ways}
    # a realistic class mix, plus ways the drivable filter must drop
    for cls in ("motorway", "motorway_link", "primary", "secondary", "tertiary",
                "unclassified", "residential"):  # fmt: skip
        assert cls in highways, cls
    assert any(t.get("waterway") == "river" for _, t in ways)


def test_invented_place_names_present(tiny_osm):
    """Towns and villages from the scenario appear as OSM place nodes with their names."""
    sc = load_scenario()
    _, nodes, _ = _parse_osm(tiny_osm)
    named = {t["name"]: t.get("place") for _, _, t in nodes.values() if "name" in t}
    for town in sc["towns"]:
        assert named.get(town["name"]) == "town"
    for village in sc["villages"]:
        assert named.get(village["name"]) == "village"


def test_maxspeed_formats_are_mixed(tiny_region):
    """Some ways carry maxspeed in several formats (plain, mph, list, word), many none."""
    values = [w.tags.get("maxspeed") for w in tiny_region.ways]
    tagged = [v for v in values if v is not None]
    assert 0 < len(tagged) < len(values)
    assert any(v.isdigit() for v in tagged)
    assert any("mph" in v for v in tagged)
    assert any(";" in v for v in tagged)
    assert any(v.isalpha() for v in tagged)


def test_bad_size_and_seed_are_refused():
    with pytest.raises(InvalidRequest, match="allowed: tiny, demo, large"):
        generate("huge")
    with pytest.raises(InvalidRequest, match="non-negative"):
        generate("tiny", seed=-1)


# ---------------------------------------------------------------------------------------------
# Through osmnx


def test_tiny_imports_through_osmnx_with_realistic_structure(tiny_graph):
    """osmnx (graph_from_xml + simplify_graph, via import_map) reads the file into a graph with
    one-way edges, dead ends, tagged and untagged speeds, and one big strongly connected part."""
    g = tiny_graph
    assert 1000 <= g.n_nodes <= 10000
    tail, head = np.asarray(g.tail), np.asarray(g.head)
    pairs = set(zip(tail.tolist(), head.tolist(), strict=True))
    one_way = sum((h, t) not in pairs for t, h in pairs)
    assert one_way > 20
    neighbours: dict[int, set[int]] = {}
    for t, h in pairs:
        neighbours.setdefault(t, set()).add(h)
        neighbours.setdefault(h, set()).add(t)
    dead_ends = sum(len(s) == 1 for s in neighbours.values())
    assert dead_ends > 20
    source = np.asarray(g.speed_source)
    assert (source == 0).any() and (source == 1).any()
    assert len(np.unique(np.asarray(g.speed_kph))) >= 6
    # the drivable filter dropped the river, coastline, tracks and driveways
    assert g.meta["dropped"]["ways_not_a_road"] >= 1
    assert np.bincount(g.component).max() > 0.9 * g.n_nodes
    assert len(g.geom_lat) > 0, "curved roads keep their shape points as edge geometry"


def test_direct_compile_matches_osmnx_import(tiny_region, tiny_graph):
    """compile_region (used for the large size) agrees with the osmnx import on the same ways
    (osmnx is the reference): the same graph bit for bit (fingerprint over indptr, head and
    travel times; geometry, classes, speed sources), and the way ids write_osm gives."""
    direct = compile_region(tiny_region)
    assert direct.fingerprint == tiny_graph.fingerprint
    for name in ("osm_id", "geom_indptr", "geom_lat", "geom_lon", "road_class", "speed_source"):
        assert np.array_equal(getattr(direct, name), getattr(tiny_graph, name)), name
    assert np.array_equal(direct.way_indptr, tiny_graph.way_indptr)
    assert np.array_equal(direct.way_id, tiny_graph.way_id)
    assert direct.n_nodes == tiny_graph.n_nodes
    assert direct.n_edges == tiny_graph.n_edges
    assert np.array_equal(np.sort(direct.osm_id), np.sort(tiny_graph.osm_id))
    assert np.sum(direct.length_m) == pytest.approx(np.sum(tiny_graph.length_m), rel=1e-9)
    assert np.sum(direct.travel_time_s) == pytest.approx(np.sum(tiny_graph.travel_time_s), rel=1e-9)
    assert np.array_equal(
        np.bincount(direct.speed_source, minlength=2),
        np.bincount(tiny_graph.speed_source, minlength=2),
    )


def test_only_bridges_cross_the_river(tiny_osm):
    """Every road segment that crosses the river line belongs to a way tagged bridge=yes, and
    there are only a few such ways. Crossing is decided by shapely (GEOS) ``crosses``, read from
    the XML with ElementTree, independent of the generator's own crossing test."""
    import shapely

    _, nodes, ways = _parse_osm(tiny_osm)
    river = next(refs for refs, t in ways if t.get("waterway") == "river")
    river_line = shapely.LineString([(nodes[r][1], nodes[r][0]) for r in river])
    crossing_ways = []
    for refs, tags in ways:
        if "highway" not in tags:
            continue
        coords = np.array([(nodes[r][1], nodes[r][0]) for r in refs])
        segs = shapely.linestrings(
            np.stack([coords[:-1], coords[1:]], axis=1).reshape(-1, 2),
            indices=np.repeat(np.arange(len(coords) - 1), 2),
        )
        if shapely.intersects(segs, river_line).any():
            crossing_ways.append(tags)
    assert crossing_ways, "the river must be crossed somewhere"
    assert all(t.get("bridge") == "yes" for t in crossing_ways), [
        t for t in crossing_ways if t.get("bridge") != "yes"
    ]
    # five road bridges in the scenario plus two motorway carriageways
    assert len(crossing_ways) <= 10
    assert any(t["highway"] == "motorway" for t in crossing_ways)


# ---------------------------------------------------------------------------------------------
# Query sets


def test_queries_are_reachable_and_follow_the_mix(tiny_cached):
    """Every sampled pair has a directed route (checked with scipy.sparse.csgraph.dijkstra),
    the kind counts follow the documented mix and each kind obeys its distance rule."""
    from scipy.sparse.csgraph import dijkstra

    g = tiny_cached
    pairs, kinds = sample_queries_with_kinds(g, 200, seed=3)
    assert pairs.shape == (200, 2) and pairs.dtype == np.int64
    assert np.all(pairs[:, 0] != pairs[:, 1])
    counts = {k: int(np.sum(kinds == k)) for k in KINDS}
    assert counts == kind_counts(200) == {"short": 80, "medium": 70, "long": 50}
    origins, inverse = np.unique(pairs[:, 0], return_inverse=True)
    dist = dijkstra(g.csr(), indices=origins)
    assert np.all(np.isfinite(dist[inverse, pairs[:, 1]]))
    # distance rules of the module docstring
    towns = sorted(
        (p for p in g.meta["places"] if p["kind"] == "town"), key=lambda p: -p["radius_m"]
    )[:2]
    d_towns = great_circle_m(towns[0]["lat"], towns[0]["lon"], towns[1]["lat"], towns[1]["lon"])
    lat, lon = np.asarray(g.lat), np.asarray(g.lon)
    km = great_circle_m(lat[pairs[:, 0]], lon[pairs[:, 0]], lat[pairs[:, 1]], lon[pairs[:, 1]])
    med = km[kinds == "medium"]
    assert np.all((med >= 0.15 * d_towns) & (med <= 0.45 * d_towns))
    assert np.all(km[kinds == "long"] >= 0.5 * d_towns)
    for o, d in pairs[kinds == "short"]:
        inside = [
            great_circle_m(lat[[o, d]], lon[[o, d]], t["lat"], t["lon"]) <= t["radius_m"]
            for t in towns
        ]
        assert any(np.all(m) for m in inside)
    # reproducible
    assert np.array_equal(sample_queries(g, 200, seed=3), pairs)
    assert not np.array_equal(sample_queries(g, 200, seed=4), pairs)


def test_query_arguments_are_checked(tiny_cached):
    with pytest.raises(InvalidRequest, match="unknown trip kinds"):
        sample_queries(tiny_cached, 10, mix={"tiny": 1.0})
    with pytest.raises(InvalidRequest, match="non-negative integer"):
        sample_queries(tiny_cached, -1)
    assert sample_queries(tiny_cached, 0).shape == (0, 2)
    only_long = sample_queries_with_kinds(tiny_cached, 9, mix={"long": 1})[1]
    assert set(only_long.tolist()) == {"long"}


# ---------------------------------------------------------------------------------------------
# Build cache


def test_cache_builds_once_and_rebuilds_on_request(tmp_path, monkeypatch):
    monkeypatch.setenv("DUEROUTE_DATA_DIR", str(tmp_path))
    calls = []
    real = demo_build.build_demo_graph

    def counting(*args, **kwargs):
        calls.append(args)
        return real(*args, **kwargs)

    monkeypatch.setattr(demo_build, "build_demo_graph", counting)
    first = demo_graph_path("tiny", progress=False)
    assert first.parent == tmp_path and first.suffix == ".npz"
    mtime = first.stat().st_mtime_ns
    second = demo_graph_path("tiny", progress=False)
    assert second == first and len(calls) == 1 and first.stat().st_mtime_ns == mtime
    other_seed = demo_graph_path("tiny", seed=5, progress=False)
    assert other_seed != first and len(calls) == 2
    demo_graph_path("tiny", rebuild=True, progress=False)
    assert len(calls) == 3
    assert not list(tmp_path.glob("*.tmp")), "no temporary files left behind"
    g = load_graph(first)
    assert g.meta["generator"]["size"] == "tiny"
    names = place_nodes(g)
    assert {"Harwenna", "Oldmarrow"} <= set(names)
    comp = np.asarray(g.component)
    main = np.argmax(np.bincount(comp))
    assert all(comp[n] == main for n in names.values())


def test_cache_key_follows_generator_version(monkeypatch):
    a = demo_build.cache_key("tiny", 1)
    monkeypatch.setattr(demo_build, "GENERATOR_VERSION", "test-bump")
    assert demo_build.cache_key("tiny", 1) != a


# ---------------------------------------------------------------------------------------------
# CLI


def test_cli_generate_osm_and_npz(tmp_path, monkeypatch, capsys):
    from dueroute.service.cli.main import main

    monkeypatch.setenv("DUEROUTE_DATA_DIR", str(tmp_path / "cache"))
    out = tmp_path / "t.osm"
    assert main(["graph", "generate", "--size", "tiny", "-o", str(out), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["format"] == "osm" and out.stat().st_size == result["bytes"]
    assert out.read_bytes() == osm_bytes(generate("tiny"))
    npz = tmp_path / "t.npz"
    assert main(["graph", "generate", "--size", "tiny", "-o", str(npz), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert load_graph(npz).n_nodes == result["nodes"] > 0
    pbf = tmp_path / "t.osm.pbf"
    assert main(["graph", "generate", "--size", "tiny", "-o", str(pbf), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["format"] == "pbf" and pbf.stat().st_size == result["bytes"]


def test_pbf_holds_the_same_objects_as_the_xml(tiny_region, tiny_osm, tmp_path):
    """write_pbf gives the same nodes, ways and tags as write_osm (both read back with
    libosmium, the OSM reference library, as OPL text), and the same bytes every time."""
    import osmium

    from dueroute.demo_data.generate import write_pbf

    def opl(path, fmt):
        out = tmp_path / f"{path.name}.opl"
        writer = osmium.SimpleWriter(osmium.io.File(str(out), "opl,add_metadata=false"))
        osmium.apply(osmium.io.Reader(osmium.io.File(str(path), fmt)), writer)
        writer.close()
        return out.read_bytes()

    a, b = tmp_path / "a.osm.pbf", tmp_path / "b.osm.pbf"
    write_pbf(tiny_region, a)
    write_pbf(tiny_region, b)
    assert a.read_bytes() == b.read_bytes()
    assert opl(a, "pbf") == opl(tiny_osm, "osm")


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--size", "tiny", "-o", "x.osm", "--format", "pbf"], "must end in .pbf"),
        (["--size", "tiny", "-o", "x.npz", "--format", "osm"], "must end in .osm"),
        (["--size", "tiny", "-o", "x.npz", "--seed", "-3"], "non-negative"),
    ],
)
def test_cli_generate_bad_input(argv, message, tmp_path, capsys, monkeypatch):
    from dueroute.service.cli.main import main

    monkeypatch.chdir(tmp_path)
    assert main(["graph", "generate", *argv]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("dueroute: error: ") and message in err[0]


# ---------------------------------------------------------------------------------------------
# Full size


@pytest.mark.slow
def test_demo_size_is_large_enough():
    """The default demo region has at least 200k nodes after osmnx simplification."""
    g = load_graph(demo_graph_path("demo"))
    assert g.n_nodes >= 200_000
    names = place_nodes(g)
    from scipy.sparse.csgraph import dijkstra

    d = dijkstra(g.csr(), indices=names["Harwenna"])
    assert np.isfinite(d[names["Oldmarrow"]])
