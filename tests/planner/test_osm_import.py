"""OSM / GraphML import: speeds, lengths, one-way streets, counts vs osmnx, bad input."""

from __future__ import annotations

import bz2
import hashlib
import json
import re
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import osmnx as ox
import pytest
from geographiclib.geodesic import Geodesic

from dueroute.planner.errors import GraphFileNotFound, NoDrivableRoads, NotAMapFile
from dueroute.planner.graph import RoadGraph, load_graph, save_graph
from dueroute.planner.osm_import import import_map, way_drop_reason
from dueroute.planner.osm_stream import import_osm
from dueroute.planner.speeds import (
    DEFAULT_SPEED_KPH,
    ROAD_CLASSES,
    SPEED_SOURCE_DEFAULT,
    SPEED_SOURCE_TAGGED,
    edge_speed,
    parse_maxspeed,
    road_class_index,
)
from dueroute.service.cli.main import main as cli_main
from tests.conftest import OSM_EXTRACTS

MPH = 1.609344  # km per international mile (exact by definition, 1959 agreement)

# ---------------------------------------------------------------------------------------------
# maxspeed parsing


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        ("50", 50.0),
        ("50 km/h", 50.0),
        ("50km/h", 50.0),
        ("80 kmh", 80.0),
        ("30 mph", 30 * MPH),
        ("30mph", 30 * MPH),
        ("25 MPH", 25 * MPH),
        ("10 knots", 18.52),
        ("7.5", 7.5),
        (50, 50.0),
        (48.5, 48.5),
        ("50;70", 50.0),  # lists: the minimum (documented choice)
        ("70;50", 50.0),
        ("30 mph;50", 30 * MPH),
        ("junk;60", 60.0),
        (["50", "40"], 40.0),  # osmnx's merged tag lists
        (["25 mph", "none"], 25 * MPH),
        ("walk", 6.0),
        ("none", None),
        ("signals", None),
        ("variable", None),
        ("RU:urban", 60.0),
        ("RU:rural", 90.0),
        ("DE:urban", 50.0),
        ("DE:motorway", None),
        ("DE:zone30", 30.0),
        ("DE:zone:30", 30.0),
        ("GB:nsl_single", 60 * MPH),
        ("XX:urban", None),  # unknown country code
        ("fast", None),
        ("", None),
        ("   ", None),
        ("-5", None),
        ("0", None),
        ("999", None),
        ("50 furlongs", None),
        (None, None),
        (float("nan"), None),
        (True, None),
        ({"a": 1}, None),
    ],
)
def test_parse_maxspeed_table(value: Any, expected: float | None) -> None:
    """Units per the OSM wiki Key:maxspeed (km/h default, 'mph', 'knots'); mph and knot
    factors are exact by definition (1 mi = 1.609344 km, 1 kn = 1.852 km/h). Zone speeds are
    recalled from memory (e.g. RU:urban 60, DE:urban 50)."""
    got = parse_maxspeed(value)
    if expected is None:
        assert got is None
    else:
        assert got is not None
        assert got == pytest.approx(expected, rel=1e-12)


def test_edge_speed_falls_back_to_class_default() -> None:
    assert edge_speed("residential", None) == (DEFAULT_SPEED_KPH["residential"], 1)
    assert edge_speed("residential", "junk") == (DEFAULT_SPEED_KPH["residential"], 1)
    assert edge_speed("primary", "50") == (50.0, 0)
    # merged edges: slowest default of the classes, most important class for drawing
    assert edge_speed(["primary", "residential"], None)[0] == DEFAULT_SPEED_KPH["residential"]
    assert road_class_index(["residential", "primary"]) == ROAD_CLASSES.index("primary")
    assert road_class_index("bus_guideway") == ROAD_CLASSES.index("other")
    assert road_class_index(None) == ROAD_CLASSES.index("other")


def test_every_class_has_a_positive_default() -> None:
    assert set(DEFAULT_SPEED_KPH) == set(ROAD_CLASSES)
    assert all(v > 0 for v in DEFAULT_SPEED_KPH.values())
    assert len(ROAD_CLASSES) < 127  # stored as int8


# ---------------------------------------------------------------------------------------------
# the drivable filter, checked against osmnx's own "drive" network filter


def _osmnx_drive_clauses() -> list[tuple[str, str, str]]:
    """osmnx's Overpass filter for network_type='drive', as (key, op, regex) clauses."""
    from osmnx import _overpass

    text = _overpass._get_network_filter("drive")
    return re.findall(r'\["([^"]+)"(?:(!~)"([^"]*)")?\]', text)


def _osmnx_drive_keeps(tags: dict[str, str]) -> bool:
    """Overpass semantics of osmnx's drive filter (["key"] must exist; ["key"!~"re"] must not
    match), plus our one documented deviation: access=no is dropped too."""
    for key, op, pattern in _osmnx_drive_clauses():
        if not op and key not in tags:
            return False
        if op == "!~" and key in tags and re.search(pattern, tags[key]):
            return False
    return tags.get("access") != "no"


@pytest.mark.parametrize(
    "tags",
    [
        {"highway": "residential"},
        {"highway": "motorway_link"},
        {"highway": "footway"},
        {"highway": "cycleway"},
        {"highway": "path"},
        {"highway": "steps"},
        {"highway": "pedestrian"},
        {"highway": "construction"},
        {"highway": "proposed"},
        {"highway": "track"},
        {"highway": "service"},
        {"highway": "residential", "service": "driveway"},
        {"highway": "residential", "access": "private"},
        {"highway": "residential", "access": "no"},
        {"highway": "residential", "access": "destination"},
        {"highway": "residential", "motor_vehicle": "no"},
        {"highway": "residential", "motorcar": "no"},
        {"highway": "residential", "area": "yes"},
        {"building": "yes"},
    ],
)
def test_filter_agrees_with_osmnx_drive(tags: dict[str, str]) -> None:
    """Source: osmnx 2.x `_overpass._get_network_filter('drive')` (plus access=no)."""
    assert (way_drop_reason(tags) is None) == _osmnx_drive_keeps(tags)


# ---------------------------------------------------------------------------------------------
# real extracts


def _parse_osm(path: Path) -> tuple[dict[int, tuple[float, float]], list[tuple[list[int], dict]]]:
    with bz2.open(path) as fh:
        root = ET.parse(fh).getroot()
    nodes = {
        int(n.get("id")): (float(n.get("lat")), float(n.get("lon"))) for n in root.iter("node")
    }
    ways = [
        (
            [int(nd.get("ref")) for nd in w.iter("nd")],
            {t.get("k"): t.get("v") for t in w.iter("tag")},
        )
        for w in root.iter("way")
    ]
    return nodes, ways


IMPORTERS = {"osmnx": import_map, "osmium": import_osm}


@pytest.fixture(
    scope="module",
    params=[(f, i) for f in OSM_EXTRACTS for i in IMPORTERS],
    ids=lambda p: f"{p[0].split('.')[0]}-{p[1]}",
)
def extract(request: pytest.FixtureRequest, osm_dir: Path) -> tuple[Path, RoadGraph]:
    """Each real extract through each importer, every component kept (the component rule
    has tests of its own), so the rule checks below see every drivable way."""
    name, importer = request.param
    path = osm_dir / name
    return path, IMPORTERS[importer](path, components="all")


def _geodesic_length_m(graph: RoadGraph, edge: int) -> float:
    pts = graph.edge_coords(edge)
    total = 0.0
    for (lon1, lat1), (lon2, lat2) in zip(pts[:-1], pts[1:], strict=True):
        total += Geodesic.WGS84.Inverse(lat1, lon1, lat2, lon2)["s12"]
    return total


def test_lengths_match_geodesic(extract: tuple[Path, RoadGraph]) -> None:
    """Edge length vs geographiclib Geodesic.WGS84.Inverse summed along the stored geometry
    (Karney 2013, 'Algorithms for geodesics'): within 0.5 % (sphere vs ellipsoid). A reversed
    interior geometry would make the polyline zig-zag and fail this check."""
    _, g = extract
    geodesic = np.array([_geodesic_length_m(g, e) for e in range(g.n_edges)])
    long_enough = geodesic > 1.0
    rel = np.abs(g.length_m[long_enough] - geodesic[long_enough]) / geodesic[long_enough]
    assert rel.max() < 0.005
    assert np.all(np.abs(g.length_m - geodesic) < 0.01 + 0.005 * geodesic)


def test_travel_time_is_length_over_speed(extract: tuple[Path, RoadGraph]) -> None:
    """travel_time_s == length_m / (speed_kph / 3.6) exactly, edge by edge."""
    _, g = extract
    expected = np.asarray(g.length_m) / (np.asarray(g.speed_kph, dtype=np.float64) / 3.6)
    np.testing.assert_array_equal(g.travel_time_s, expected)
    assert np.all(g.speed_kph > 0)


def test_speeds_follow_tags_or_class_defaults(extract: tuple[Path, RoadGraph]) -> None:
    """Tagged edges carry a parsed maxspeed value present in the file; the rest the class
    default of their road class (or the slowest default of a merged edge's classes)."""
    path, g = extract
    _, ways = _parse_osm(path)
    tagged_values = {parse_maxspeed(t["maxspeed"]) for _, t in ways if "maxspeed" in t}
    classes = g.meta["road_classes"]
    for e in range(g.n_edges):
        speed = float(g.speed_kph[e])
        if g.speed_source[e] == SPEED_SOURCE_TAGGED:
            assert any(v is not None and abs(v - speed) < 1e-4 for v in tagged_values)
        else:
            assert g.speed_source[e] == SPEED_SOURCE_DEFAULT
            assert speed <= DEFAULT_SPEED_KPH[classes[g.road_class[e]]]
    if path.name.startswith("aguascalientes"):  # it has maxspeed=20/40/50 tags on roads
        assert int(np.sum(g.speed_source == SPEED_SOURCE_TAGGED)) > 0


def _directed_segments(graph: RoadGraph) -> set[tuple[tuple[float, float], tuple[float, float]]]:
    out = set()
    for e in range(graph.n_edges):
        pts = [(round(lat, 7), round(lon, 7)) for lon, lat in graph.edge_coords(e)]
        out.update(zip(pts[:-1], pts[1:], strict=True))
    return out


def test_one_way_streets_are_one_way(extract: tuple[Path, RoadGraph]) -> None:
    """OSM wiki Key:oneway: a drivable way tagged oneway=yes may be driven only in its node
    order; every piece of it is in the graph forwards and none backwards. Every drawn piece of
    every edge is a piece of some drivable way of the file (in an allowed direction)."""
    path, g = extract
    nodes, ways = _parse_osm(path)
    segs = _directed_segments(g)

    def key(n: int) -> tuple[float, float]:
        lat, lon = nodes[n]
        return (round(lat, 7), round(lon, 7))

    allowed: set[tuple[Any, Any]] = set()
    oneway_pairs = []
    for refs, tags in ways:
        if not _osmnx_drive_keeps(tags):
            continue
        pairs = [(key(a), key(b)) for a, b in zip(refs[:-1], refs[1:], strict=True) if a != b]
        allowed.update(pairs)
        if tags.get("oneway") in ("yes", "true", "1") or tags.get("junction") == "roundabout":
            oneway_pairs += pairs
        else:
            allowed.update((b, a) for a, b in pairs)
    assert oneway_pairs, "the extract should contain drivable one-way streets"
    for a, b in oneway_pairs:
        assert (a, b) in segs
        if (b, a) not in allowed:  # no two-way way runs along the same piece
            assert (b, a) not in segs
    assert segs <= allowed


def _osmnx_drive_graph(src: Path, tmp: Path, *, simplify: bool = True) -> nx.MultiDiGraph:
    """osmnx's own graph of the file's drivable ways: ways failing osmnx's drive filter are
    removed from the XML, then ox.graph_from_xml(simplify=True, retain_all=True) builds it."""
    with bz2.open(src) as fh:
        tree = ET.parse(fh)
    root = tree.getroot()
    for way in list(root.findall("way")):
        if not _osmnx_drive_keeps({t.get("k"): t.get("v") for t in way.findall("tag")}):
            root.remove(way)
    filtered = tmp / (src.name.removesuffix(".bz2"))
    tree.write(filtered, encoding="utf-8", xml_declaration=True)
    G = ox.graph_from_xml(filtered, simplify=simplify, retain_all=True)
    G.remove_nodes_from(list(nx.isolates(G)))  # nodes of dropped ways
    return G


def test_counts_equal_osmnx(extract: tuple[Path, RoadGraph], tmp_path: Path) -> None:
    """Node and edge counts and total length equal osmnx's graph_from_xml of the same drivable
    ways (osmnx 2.x drive filter; self-loops dropped as documented). Note: graph_from_xml with
    defaults gives 47 nodes / 106 edges on West Oakland (fixture README) because it keeps
    footways, service roads and only the largest weakly connected component."""
    path, g = extract
    G = _osmnx_drive_graph(path, tmp_path)
    loops = nx.number_of_selfloops(G)
    assert g.n_nodes == G.number_of_nodes()
    assert g.n_edges == G.number_of_edges() - loops
    assert g.meta["dropped"]["self_loops"] == loops
    total = sum(d["length"] for u, v, d in G.edges(data=True) if u != v)
    assert float(np.sum(g.length_m)) == pytest.approx(total, rel=1e-9)
    assert set(g.osm_id.tolist()) == set(G.nodes)
    if path.name.startswith("west-oakland"):
        default = ox.graph_from_xml(path)
        assert (len(default), len(default.edges)) == (47, 106)


def test_meta_records_source_and_drops(extract: tuple[Path, RoadGraph]) -> None:
    """meta: sha256 (hashlib) of the source, importer version, dropped counts per reason
    (counted again here from the XML read with ElementTree)."""
    import osmium.version

    path, g = extract
    assert g.meta["source_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert g.meta["name"] == path.name.removesuffix(".osm.bz2")
    dropped = g.meta["dropped"]
    _, ways = _parse_osm(path)
    if g.meta["importer"].startswith("osmnx"):
        assert g.meta["importer"] == f"osmnx {ox.__version__}"
        no_highway = sum(1 for refs, t in ways if "highway" not in t and len(set(refs)) >= 2)
        assert dropped["ways_not_a_road"] == no_highway
    else:  # the streaming importer never reads ways without a highway tag
        assert g.meta["importer"].startswith(f"osmium {osmium.version.pyosmium_release}")
        assert g.meta["read"]["highway_ways"] == sum(1 for _, t in ways if "highway" in t)
    road_ways = [(r, t) for r, t in ways if "highway" in t and len(set(r)) >= 2]
    for reason in ("not_for_cars", "service_road", "no_car_access"):
        expected = sum(1 for _, t in road_ways if way_drop_reason(t) == reason)
        assert dropped[f"ways_{reason}"] == expected, reason
    assert dropped["ways_not_for_cars"] > 0


def test_graphml_round_trip(extract: tuple[Path, RoadGraph], tmp_path: Path) -> None:
    """An osmnx graph saved with ox.save_graphml imports to the same graph as the XML:
    (a) the raw graph with all ways, (b) osmnx's simplified drive graph."""
    path, g = extract
    saved = list(ox.settings.useful_tags_way)
    try:
        ox.settings.useful_tags_way = [*saved, "motor_vehicle", "motorcar", "vehicle", "service"]
        raw = ox.graph_from_xml(path, simplify=False, retain_all=True)
    finally:
        ox.settings.useful_tags_way = saved
    ox.save_graphml(raw, tmp_path / "raw.graphml")
    ox.save_graphml(_osmnx_drive_graph(path, tmp_path), tmp_path / "drive.graphml")
    for name in ("raw.graphml", "drive.graphml"):
        h = import_map(tmp_path / name, components="all")
        assert (h.n_nodes, h.n_edges) == (g.n_nodes, g.n_edges), name
        assert float(np.sum(h.length_m)) == pytest.approx(float(np.sum(g.length_m)), rel=1e-9)
        assert sorted(h.osm_id.tolist()) == sorted(g.osm_id.tolist())
        assert h.meta["source_format"] == "graphml"


def test_import_restores_osmnx_settings(osm_dir: Path) -> None:
    before = list(ox.settings.useful_tags_way)
    import_map(osm_dir / OSM_EXTRACTS[0])
    assert ox.settings.useful_tags_way == before


def test_compiled_import_round_trip(extract: tuple[Path, RoadGraph], tmp_path: Path) -> None:
    _, g = extract
    loaded = load_graph(save_graph(g, tmp_path / "g.npz"))
    assert loaded.fingerprint == g.fingerprint
    np.testing.assert_array_equal(loaded.geom_lat, g.geom_lat)
    assert loaded.meta["dropped"] == g.meta["dropped"]


def test_cli_import(osm_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """dueroute graph import --json writes the graph and reports counts and drops."""
    out = tmp_path / "wo.npz"
    src = osm_dir / OSM_EXTRACTS[0]
    capsys.readouterr()
    assert cli_main(["graph", "import", str(src), "-o", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    g = load_graph(out)
    assert (report["nodes"], report["edges"]) == (g.n_nodes, g.n_edges)
    assert report["dropped"] == g.meta["dropped"]
    assert report["elapsed_s"] >= 0
    assert cli_main(["graph", "import", str(src), "-o", str(tmp_path / "b.npz")]) == 0
    assert "dropped ways" in capsys.readouterr().out
    assert (
        cli_main(["graph", "import", str(src), "-o", str(tmp_path / "c.npz"), "--no-spatial-order"])
        == 0
    )
    assert load_graph(tmp_path / "c.npz").meta["spatial_order"] == "input"


# ---------------------------------------------------------------------------------------------
# bad input

OSM_HEAD = '<?xml version="1.0" encoding="UTF-8"?>\n<osm version="0.6" generator="hand">\n'


def _osm(body: str) -> str:
    return OSM_HEAD + body + "</osm>\n"


FOOTWAYS_ONLY = _osm(
    '<node id="1" lat="10.0" lon="20.0"/><node id="2" lat="10.001" lon="20.0"/>'
    '<node id="3" lat="10.002" lon="20.0"/>'
    '<way id="10"><nd ref="1"/><nd ref="2"/><tag k="highway" v="footway"/></way>'
    '<way id="11"><nd ref="2"/><nd ref="3"/><tag k="highway" v="cycleway"/></way>'
    '<way id="12"><nd ref="1"/><nd ref="3"/><tag k="highway" v="residential"/>'
    '<tag k="access" v="private"/></way>'
)


def _bad_inputs(tmp: Path, osm_dir: Path | None) -> dict[str, tuple[Path, type[Exception], str]]:
    cases: dict[str, tuple[Path, type[Exception], str]] = {}

    def put(name: str, data: bytes | str, exc: type[Exception], words: str) -> None:
        p = tmp / name
        p.write_bytes(data.encode() if isinstance(data, str) else data)
        cases[name] = (p, exc, words)

    cases["missing.osm"] = (tmp / "missing.osm", GraphFileNotFound, "not found")
    put("image.osm", b"\x89PNG\r\n\x1a\n" + bytes(range(256)), NotAMapFile, "PNG")
    put("text.osm", "lorem ipsum dolor sit amet\n" * 20, NotAMapFile, "plain text")
    put("data.osm", '{"type": "FeatureCollection", "features": []}', NotAMapFile, "JSON")
    put("page.osm", "<!DOCTYPE html><html><body>404</body></html>", NotAMapFile, "HTML")
    put(
        "random.osm",
        bytes(np.random.default_rng(0).integers(0, 256, 4000, dtype=np.uint8)),
        NotAMapFile,
        "not a map file",
    )
    put("empty-file.osm", b"", NotAMapFile, "empty")
    put("other.xml", '<?xml version="1.0"?><svg><rect/></svg>', NotAMapFile, "<svg>")
    put(
        "broken.osm",
        OSM_HEAD + '<node id="1" lat="1" lon="2"/><way id="2"><nd ref="1"/>',
        NotAMapFile,
        "cannot parse",
    )
    put("plain.osm.bz2", _osm(""), NotAMapFile, "not compressed")
    put("packed.osm", bz2.compress(FOOTWAYS_ONLY.encode()), NotAMapFile, "rename")
    put("empty.osm", _osm(""), NoDrivableRoads, "no OSM nodes and no ways")
    put(
        "nodes-only.osm",
        _osm('<node id="1" lat="1" lon="2"/>'),
        NoDrivableRoads,
        "1 nodes and 0 ways",
    )
    put("footways.osm", FOOTWAYS_ONLY, NoDrivableRoads, "3 nodes and 3 ways")
    put("footways.osm.bz2", bz2.compress(FOOTWAYS_ONLY.encode()), NoDrivableRoads, "not for cars")
    put(
        "bad.graphml", '<?xml version="1.0"?><graphml><graph><node id="a"/>', NotAMapFile, "GraphML"
    )
    put(
        "no-coords.graphml",
        '<?xml version="1.0"?><graphml xmlns="http://graphml.graphdrawing.org/xmlns">'
        '<key id="h" for="edge" attr.name="highway" attr.type="string"/>'
        '<graph edgedefault="directed"><node id="1"/><node id="2"/>'
        '<edge source="1" target="2"><data key="h">residential</data></edge></graph></graphml>',
        NotAMapFile,
        "no valid position",
    )
    put(
        "off-earth.osm",
        _osm(
            '<node id="1" lat="95.0" lon="20.0"/><node id="2" lat="10.0" lon="20.0"/>'
            '<way id="10"><nd ref="1"/><nd ref="2"/><tag k="highway" v="primary"/></way>'
        ),
        NotAMapFile,
        "no valid position",
    )
    if osm_dir is not None:
        real = (osm_dir / "aguascalientes.osm.bz2").read_bytes()
        put("short.osm.bz2", real[:2000], NotAMapFile, "decompress")  # cut in the first block
        # 100 kB bzip2 blocks: the head decompresses, the parse hits the cut later on
        multi_block = bz2.compress(bz2.decompress(real), compresslevel=1)
        put("cut.osm.bz2", multi_block[: len(multi_block) * 3 // 4], NotAMapFile, "cannot parse")
    return cases


def test_bad_inputs_raise_named_errors(tmp_path: Path) -> None:
    """Every kind of bad map file gets its named error with what was seen in the message."""
    from tests.conftest import OSM_DIR

    osm_dir = OSM_DIR if OSM_DIR.is_dir() else None
    for path, exc, words in _bad_inputs(tmp_path, osm_dir).values():
        with pytest.raises(exc, match=re.escape(words)):
            import_map(path)


def test_footway_message_lists_reasons(tmp_path: Path) -> None:
    p = tmp_path / "f.osm"
    p.write_text(FOOTWAYS_ONLY)
    with pytest.raises(NoDrivableRoads) as info:
        import_map(p)
    assert "2 not for cars" in str(info.value)
    assert "1 no car access" in str(info.value)


def test_cli_bad_inputs_one_line_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """CLI contract: one 'dueroute: error: ...' line on stderr, exit status 2."""
    for path, _, words in _bad_inputs(tmp_path, None).values():
        capsys.readouterr()
        status = cli_main(["graph", "import", str(path), "-o", str(tmp_path / "out.npz")])
        captured = capsys.readouterr()
        lines = captured.err.strip().splitlines()
        assert status == 2
        assert len(lines) == 1, captured.err
        assert lines[0].startswith("dueroute: error: ")
        assert words in lines[0]
    capsys.readouterr()
    p = tmp_path / "f.osm"
    p.write_text(FOOTWAYS_ONLY)
    assert cli_main(["graph", "import", str(p), "-o", str(tmp_path / "out.txt")]) == 2
    assert ".npz" in capsys.readouterr().err
