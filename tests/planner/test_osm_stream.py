"""The streaming (osmium) importer against the osmnx importer, clipped extracts, the component
rule, road-class options and turn restrictions."""

from __future__ import annotations

import bz2
import json
import re
import xml.etree.ElementTree as ET
from collections import Counter
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import osmium
import pytest

from dueroute.planner.errors import InvalidRequest, NotAMapFile
from dueroute.planner.graph import TURN_NO, TURN_ONLY, RoadGraph, load_graph
from dueroute.planner.osm_import import import_map
from dueroute.planner.osm_rules import DRIVABLE_HIGHWAYS, parse_road_classes, way_drop_reason
from dueroute.planner.osm_stream import import_osm
from dueroute.service.cli.main import main as cli_main
from tests.conftest import OSM_EXTRACTS

TURNS = Path(__file__).with_name("data") / "turns.osm"

#: Arrays two imports of the same map must agree on, bit for bit.
SAME = (
    "indptr",
    "head",
    "travel_time_s",
    "length_m",
    "speed_kph",
    "road_class",
    "speed_source",
    "lat",
    "lon",
    "osm_id",
    "component",
    "geom_indptr",
    "geom_lat",
    "geom_lon",
    "way_indptr",
    "way_id",
    "turn_indptr",
    "turn_edges",
    "turn_kind",
)


def assert_same_graph(a: RoadGraph, b: RoadGraph) -> None:
    for name in SAME:
        assert np.array_equal(getattr(a, name), getattr(b, name)), name


def edge_records(g: RoadGraph) -> Counter[tuple[Any, ...]]:
    """Every edge with everything it carries (ends, length, time, speed, class, geometry,
    ways), order-free."""
    out: Counter[tuple[Any, ...]] = Counter()
    for e in range(g.n_edges):
        lo, hi = int(g.geom_indptr[e]), int(g.geom_indptr[e + 1])
        out[
            (
                int(g.osm_id[g.tail[e]]),
                int(g.osm_id[g.head[e]]),
                float(g.length_m[e]),
                float(g.travel_time_s[e]),
                int(g.road_class[e]),
                int(g.speed_source[e]),
                tuple(g.geom_lat[lo:hi].tolist()),
                tuple(g.geom_lon[lo:hi].tolist()),
                tuple(g.edge_ways(e).tolist()),
            )
        ] += 1
    return out


def to_pbf(src: Path, out: Path) -> Path:
    """Convert an OSM XML file to PBF with libosmium (the OSM reference library)."""
    writer = osmium.SimpleWriter(str(out))
    osmium.apply(osmium.io.Reader(str(src)), writer)
    writer.close()
    return out


def edge_multiset(g: RoadGraph) -> Counter[tuple[Any, ...]]:
    """Edges as (tail osm id, head osm id, interior points, speed, class), order-free."""
    t, h = g.osm_id[g.tail], g.osm_id[g.head]
    k = np.diff(g.geom_indptr)
    return Counter(
        zip(
            t.tolist(),
            h.tolist(),
            k.tolist(),
            g.speed_kph.tolist(),
            g.road_class.tolist(),
            strict=True,
        )
    )


# ---------------------------------------------------------------------------------------------
# equal to the osmnx importer


@pytest.mark.parametrize("name", OSM_EXTRACTS)
def test_real_extracts_equal_the_osmnx_import(osm_dir: Path, name: str, tmp_path: Path) -> None:
    """Reference: the osmnx importer (osmnx graph_from_xml + simplify_graph). On the real
    extracts the streaming importer gives the same graph bit for bit: same nodes (ids and
    positions), same edges in the same order, lengths and travel times equal to the last bit
    (the issue asks for lengths within 0.1 %), same geometry, way ids and restrictions; the
    PBF written from the same XML by libosmium imports to the same graph again."""
    path = osm_dir / name
    for rule in ("all", "largest"):
        ref = import_map(path, components=rule)
        got = import_osm(path, components=rule)
        assert_same_graph(got, ref)
        rel = np.abs(got.length_m - ref.length_m) / np.maximum(ref.length_m, 1e-9)
        assert float(rel.max()) <= 1e-3
        assert got.meta["restrictions"] == ref.meta["restrictions"]
        assert got.meta["components"] == ref.meta["components"]
    pbf = to_pbf(path, tmp_path / name.replace(".osm.bz2", ".osm.pbf"))
    from_pbf = import_osm(pbf)
    assert_same_graph(from_pbf, got)
    assert from_pbf.meta["source_format"] == "pbf"


def _random_network(rng: np.random.Generator) -> str:
    """A small random OSM file: ways wandering over a jittered grid with random one-way,
    roundabout, class and maxspeed tags, closed ways, repeated nodes, parallel ways."""
    side = int(rng.integers(3, 6))
    nodes = []
    for i in range(side * side):
        lat = 47.0 + (i // side) * 0.001 + rng.uniform(-2e-4, 2e-4)
        lon = -31.3 + (i % side) * 0.0014 + rng.uniform(-2e-4, 2e-4)
        nodes.append(f'<node id="{i + 1}" lat="{lat:.7f}" lon="{lon:.7f}"/>')
    ways = []
    for _ in range(int(rng.integers(3, 14))):
        cur = int(rng.integers(side * side))
        refs = [cur]
        for _ in range(int(rng.integers(1, 6))):
            r, c = divmod(cur, side)
            r = min(max(r + int(rng.integers(-1, 2)), 0), side - 1)
            c = min(max(c + int(rng.integers(-1, 2)), 0), side - 1)
            cur = r * side + c
            refs.append(cur)  # may repeat the previous node
        if rng.random() < 0.15:
            refs.append(refs[0])  # a closed way
        tags = {"highway": str(rng.choice(["residential", "primary", "footway", "service"]))}
        oneway = rng.choice(["", "yes", "-1", "no", "reverse"], p=[0.5, 0.2, 0.1, 0.1, 0.1])
        if oneway:
            tags["oneway"] = str(oneway)
        if rng.random() < 0.1:
            tags["junction"] = "roundabout"
        speed = rng.choice(["", "30", "50 mph", "junk", "40;60"])
        if speed:
            tags["maxspeed"] = str(speed)
        copies = 2 if rng.random() < 0.1 else 1  # a duplicated way: parallel edges
        for _ in range(copies):
            body = "".join(f'<nd ref="{k + 1}"/>' for k in refs)
            body += "".join(f'<tag k="{k}" v="{v}"/>' for k, v in tags.items())
            ways.append(f'<way id="{100 + len(ways)}">{body}</way>')
    return '<?xml version="1.0"?>\n<osm version="0.6">' + "".join(nodes + ways) + "</osm>\n"


def test_random_networks_equal_the_osmnx_import(tmp_path: Path) -> None:
    """Reference: the osmnx importer, on 40 random small networks full of the cases chain
    merging must get right (one-way and reversed ways, roundabouts, closed ways, repeated
    nodes, parallel ways, rings, classes merging along a chain): the same nodes (ids,
    positions, order) and the same edges with the same lengths, times, classes, geometry and
    ways, bit for bit; or the same refusal. Parallel edges (same two nodes) are compared as a
    set: osmnx orders them by networkx's adjacency, which also remembers ways it dropped (a
    footway that touched the pair first), and the streaming importer never keeps those."""
    rng = np.random.default_rng(16)
    compared = 0
    for i in range(40):
        path = tmp_path / f"random{i}.osm"
        path.write_text(_random_network(rng))
        try:
            ref = import_map(path, components="all")
        except Exception as exc:  # noqa: BLE001 - the streaming importer must refuse too
            with pytest.raises(type(exc)):
                import_osm(path, components="all")
            continue
        got = import_osm(path, components="all")
        for name in ("indptr", "lat", "lon", "osm_id", "component"):
            assert np.array_equal(getattr(got, name), getattr(ref, name)), (i, name)
        assert edge_records(got) == edge_records(ref), i
        compared += 1
    assert compared >= 30


# ---------------------------------------------------------------------------------------------
# clipped extracts


def _clip(src: Path, out: Path, bbox: tuple[float, float, float, float], split: bool) -> None:
    """Cut an extract to ``bbox`` (S, W, N, E) as a clipping tool does: nodes outside are
    removed, ways and relations kept (so they name missing nodes). With ``split`` the ways are
    instead cut at the missing nodes into separate complete ways (new ids) and the relations
    dropped: a complete file osmnx can import, the reference for the clipped import."""
    s, w, n, e = bbox
    with bz2.open(src) as fh:
        root = ET.parse(fh).getroot()
    keep = set()
    for node in list(root.findall("node")):
        lat, lon = float(node.get("lat")), float(node.get("lon"))
        if s <= lat <= n and w <= lon <= e:
            keep.add(node.get("id"))
        else:
            root.remove(node)
    next_id = 10**12
    for way in list(root.findall("way")):
        if not split:
            continue
        refs = [nd.get("ref") for nd in way.findall("nd")]
        tags = way.findall("tag")
        position = list(root).index(way)
        root.remove(way)
        runs, run = [], []
        for r in refs:
            if r in keep:
                run.append(r)
            else:
                runs.append(run)
                run = []
        runs.append(run)
        for run in runs:
            if len(run) < 1:
                continue
            piece = ET.Element("way", id=str(next_id))
            next_id += 1
            for r in run:
                ET.SubElement(piece, "nd", ref=r)
            piece.extend(tags)
            root.insert(position, piece)
            position += 1
    if split:
        for rel in list(root.findall("relation")):
            root.remove(rel)
    ET.ElementTree(root).write(out, encoding="utf-8", xml_declaration=True)


CLIP_BOX = (21.8650, -102.2770, 21.8725, -102.2665)


@pytest.fixture(scope="module")
def clipped(osm_dir: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    tmp = tmp_path_factory.mktemp("clip")
    src = osm_dir / "aguascalientes.osm.bz2"
    cut, split = tmp / "clipped.osm", tmp / "split.osm"
    _clip(src, cut, CLIP_BOX, split=False)
    _clip(src, split, CLIP_BOX, split=True)
    return cut, split


def test_osmnx_refuses_a_clipped_extract(clipped: tuple[Path, Path]) -> None:
    with pytest.raises(NotAMapFile, match="clipped extracts"):
        import_map(clipped[0])


def test_clipped_extract_imports_its_usable_parts(clipped: tuple[Path, Path], tmp_path) -> None:
    """Reference: osmnx's import of the same extract with every way cut into complete pieces
    at its missing nodes (done here with ElementTree): the same nodes and edges as the
    streaming import of the clipped file. The clipping counts are recounted from the XML."""
    cut, split = clipped
    no_relations = tmp_path / "clipped-no-relations.osm"
    root = ET.parse(cut).getroot()
    for rel in list(root.findall("relation")):
        root.remove(rel)
    ET.ElementTree(root).write(no_relations, encoding="utf-8", xml_declaration=True)
    got = import_osm(no_relations, components="all")
    ref = import_map(split, components="all")
    for name in ("indptr", "head", "travel_time_s", "osm_id", "lat", "lon", "geom_lat"):
        assert np.array_equal(getattr(got, name), getattr(ref, name)), name
    # the counts, from the XML
    present = {n.get("id") for n in root.findall("node")}
    missing: set[str] = set()
    ways_cut = ways_lost = 0
    for way in root.findall("way"):
        tags = {t.get("k"): t.get("v") for t in way.findall("tag")}
        refs = [nd.get("ref") for nd in way.findall("nd")]
        refs = [r for i, r in enumerate(refs) if i == 0 or r != refs[i - 1]]
        if way_drop_reason(tags) is not None or len(set(refs)) < 2:
            continue
        gone = [r for r in refs if r not in present]
        if not gone:
            continue
        missing.update(gone)
        pairs = [(a, b) for a, b in zip(refs, refs[1:], strict=False) if a in present]
        if any(b in present for _, b in pairs):
            ways_cut += 1
        else:
            ways_lost += 1
    report = got.meta["clipped"]
    assert report["nodes_missing"] == len(missing) > 0
    assert (report["ways_cut"], report["ways_clipped_away"]) == (ways_cut, ways_lost)
    assert ways_cut > 0


def test_clipped_extract_cli_report(clipped: tuple[Path, Path], tmp_path, capsys) -> None:
    """The CLI imports a clipped PBF with the default rule (largest component), and says what
    was cut, which components were dropped and what became of the restrictions; the kept
    nodes are networkx's largest strongly connected component of the full import."""
    pbf = to_pbf(clipped[0], tmp_path / "clipped.osm.pbf")
    out = tmp_path / "clipped.npz"
    capsys.readouterr()
    assert cli_main(["graph", "import", str(pbf), "-o", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["clipped"]["nodes_missing"] > 0 and report["clipped"]["ways_cut"] > 0
    every = import_osm(pbf, components="all")
    G = nx.DiGraph()
    G.add_edges_from(zip(every.tail.tolist(), every.head.tolist(), strict=True))
    largest = max(nx.strongly_connected_components(G), key=len)
    g = load_graph(out)
    assert set(g.osm_id.tolist()) == set(every.osm_id[sorted(largest)].tolist())
    comp = report["components"]
    assert comp["kept_nodes"] == len(largest) == g.n_nodes
    assert comp["dropped_nodes"] == every.n_nodes - len(largest) > 0
    rest = report["restrictions"]
    assert rest["read"] == rest["applied"] + sum(rest["dropped"].values())
    assert cli_main(["graph", "import", str(pbf), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "ways cut there" in text and "dropped" in text and "turn restrictions" in text


# ---------------------------------------------------------------------------------------------
# road classes


def test_road_class_option(osm_dir: Path, tmp_path: Path, capsys) -> None:
    """``default,service`` keeps highway=service ways (the issue's 77 in this extract) in both
    importers, which agree bit for bit; the filter is recorded in meta."""
    path = osm_dir / "aguascalientes.osm.bz2"
    keep = parse_road_classes("default,service")
    assert keep.highways == DRIVABLE_HIGHWAYS | {"service"}
    a = import_osm(path, components="all", road_filter=keep)
    b = import_map(path, components="all", road_filter=keep)
    assert_same_graph(a, b)
    base = import_osm(path, components="all")
    assert a.meta["dropped"]["ways_service_road"] < base.meta["dropped"]["ways_service_road"]
    service = a.meta["road_classes"].index("service")
    assert int(np.sum(a.road_class == service)) > 0 == int(np.sum(base.road_class == service))
    assert a.meta["road_filter"]["highway"] == sorted(keep.highways)
    assert not a.meta["road_filter"]["default"] and base.meta["road_filter"]["default"]
    out = tmp_path / "s.npz"
    assert cli_main(["graph", "import", str(path), "-o", str(out), "--road-classes",
                     "default,service", "--components", "all"]) == 0  # fmt: skip
    assert load_graph(out).fingerprint == a.fingerprint
    assert "road classes kept" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ("default,tram", "unknown road class 'tram'"),
        ("-residential", "keep no road class"),
        ("default,,service", "empty item"),
    ],  # fmt: skip
)
def test_road_class_option_refuses_bad_values(spec: str, words: str, capsys) -> None:
    with pytest.raises(InvalidRequest, match=re.escape(words)):
        parse_road_classes(spec)
    assert cli_main(["graph", "import", str(TURNS), "-o", "x.npz", f"--road-classes={spec}"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("dueroute: error: ") and words in err[0]


def test_road_classes_subset() -> None:
    """Only the named classes: on the fixture, dropping tertiary leaves the ring roads out."""
    keep = parse_road_classes("residential")
    g = import_osm(TURNS, road_filter=keep, components="all")
    assert {g.meta["road_classes"][c] for c in np.unique(g.road_class)} == {"residential"}
    assert g.meta["dropped"]["ways_not_for_cars"] == 5  # four ring roads and the footway


# ---------------------------------------------------------------------------------------------
# turn restrictions


#: What each relation of tests/planner/data/turns.osm must become: kind and the edges as
#: (tail, head) OSM node ids (hand-checked against the drawing in the file).
EXPECTED_TURNS = [
    ("no", [(11, 10), (10, 12)]),  # r200 no_left_turn, via node
    ("only", [(23, 20), (20, 22)]),  # r201 only_straight_on, via node
    ("no", [(11, 10), (10, 15), (15, 20), (20, 23)]),  # r202 no_right_turn via way w101
    ("no", [(12, 10), (10, 13)]),  # r203 into the one-way w104
    ("only", [(21, 20), (20, 22)]),  # r205 restriction:motorcar=only_right_turn
]
EXPECTED_DROPS = {
    "not_connected": 1,  # r204: nobody arrives at J1 along the one-way w104
    "not_for_cars": 2,  # r206 except=motorcar, r207 restriction:hgv only
    "member_missing": 1,  # r208: way 999
    "unknown_kind": 1,  # r209: no_parking
    "malformed": 1,  # r210: no 'to' member
    "not_drivable": 1,  # r211: to a footway
    "ambiguous": 1,  # r212: via node inside its two-way from/to way
}


def _turns(g: RoadGraph) -> list[tuple[str, list[tuple[int, int]]]]:
    out = []
    for i in range(g.n_restrictions):
        kind, edges = g.restriction(i)
        pairs = [(int(g.osm_id[g.tail[e]]), int(g.osm_id[g.head[e]])) for e in edges]
        out.append((kind, pairs))
    return out


@pytest.mark.parametrize("importer", [import_osm, import_map])
def test_hand_written_restrictions_land_as_edge_sequences(importer: Any) -> None:
    """The hand-written fixture's restrictions become the hand-checked edge sequences (each
    edge's head is the next edge's tail; every edge runs along the relation's ways), the rest
    are dropped for the hand-checked reasons; the one-way street stays one-way."""
    g = importer(TURNS)
    assert sorted(_turns(g)) == sorted(EXPECTED_TURNS)
    report = g.meta["restrictions"]
    assert report["relations"] == 13
    assert (report["read"], report["applied"]) == (13, 5)
    assert report["dropped"] == EXPECTED_DROPS
    assert report["by_kind"]["only_right_turn"] == {"read": 1, "applied": 1, "dropped": 0}
    kinds = np.asarray(g.turn_kind)
    assert int(np.sum(kinds == TURN_ONLY)) == 2 and int(np.sum(kinds == TURN_NO)) == 3
    ways = {tuple(g.edge_ways(e).tolist()) for e in range(g.n_edges)}
    assert (104,) in ways
    pairs = set(zip(g.osm_id[g.tail].tolist(), g.osm_id[g.head].tolist(), strict=True))
    assert (10, 13) in pairs and (13, 10) not in pairs  # w104 one-way southbound
    assert (10, 15) in pairs and (15, 10) in pairs  # node 15 kept as a junction


def test_restrictions_survive_pbf_and_the_file(tmp_path: Path, capsys) -> None:
    """The PBF of the fixture gives the same graph; the saved file keeps the sequences and
    'graph info' reports read / applied / dropped by kind."""
    pbf = to_pbf(TURNS, tmp_path / "turns.osm.pbf")
    assert_same_graph(import_osm(pbf), import_osm(TURNS))
    out = tmp_path / "turns.npz"
    assert cli_main(["graph", "import", str(pbf), "-o", str(out)]) == 0
    assert sorted(_turns(load_graph(out))) == sorted(EXPECTED_TURNS)
    capsys.readouterr()
    assert cli_main(["graph", "info", str(out), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["turn_restrictions"] == {"in_graph": 5, "no": 3, "only": 2}
    assert info["meta"]["restrictions"]["applied"] == 5
    assert cli_main(["graph", "info", str(out)]) == 0
    text = capsys.readouterr().out
    assert "13 read from 13 relations, 5 applied, 8 dropped" in text
    assert "no_left_turn 1/4" in text
    assert "5 edge sequences (3 no_*, 2 only_*)" in text


def test_real_restrictions_follow_their_relations(osm_dir: Path) -> None:
    """Every restriction relation of the real extract (read here with ElementTree) that was
    applied is an edge sequence that starts on its from-way, ends on its to-way, passes its
    via node (or runs along its via ways) and whose edges follow each other."""
    path = osm_dir / "aguascalientes.osm.bz2"
    g = import_osm(path, components="all")
    with bz2.open(path) as fh:
        root = ET.parse(fh).getroot()
    relations = [
        r
        for r in root.iter("relation")
        if any(t.get("k") == "type" and t.get("v") == "restriction" for t in r.iter("tag"))
    ]
    assert g.meta["restrictions"]["applied"] == len(relations) == g.n_restrictions == 3
    seqs = [g.restriction(i)[1] for i in range(g.n_restrictions)]
    for rel in relations:
        role = {m.get("role"): (m.get("type"), int(m.get("ref"))) for m in rel.iter("member")}
        match = []
        for seq in seqs:
            first, last = g.edge_ways(int(seq[0])), g.edge_ways(int(seq[-1]))
            if first[-1] == role["from"][1] and last[0] == role["to"][1]:
                match.append(seq)
        assert len(match) == 1, rel.get("id")
        seq = match[0]
        assert all(g.head[a] == g.tail[b] for a, b in zip(seq[:-1], seq[1:], strict=True))
        kind, ref = role["via"]
        if kind == "node":
            assert len(seq) == 2 and int(g.osm_id[g.head[seq[0]]]) == ref
        else:
            assert all(ref in g.edge_ways(int(e)).tolist() for e in seq[1:-1])


# ---------------------------------------------------------------------------------------------
# bad input


def test_bad_pbf_and_wrong_importer(tmp_path: Path, capsys) -> None:
    """A truncated PBF is refused with what was wrong; --importer osmnx refuses a PBF and
    --importer osmium a GraphML file (exit 2, one line)."""
    pbf = to_pbf(TURNS, tmp_path / "t.osm.pbf")
    cut = tmp_path / "cut.osm.pbf"
    cut.write_bytes(pbf.read_bytes()[:-40])
    with pytest.raises(NotAMapFile, match="cannot parse the OSM PBF"):
        import_osm(cut)
    graphml = tmp_path / "g.graphml"
    graphml.write_text('<?xml version="1.0"?><graphml><graph/></graphml>')
    for argv, words in [
        ([str(cut)], "cannot parse the OSM PBF"),
        ([str(pbf), "--importer", "osmnx"], "osmium importer only"),
        ([str(graphml), "--importer", "osmium"], "osmnx importer only"),
        ([str(tmp_path / "nope.osm.pbf")], "not found"),
    ]:
        capsys.readouterr()
        assert cli_main(["graph", "import", *argv, "-o", str(tmp_path / "o.npz")]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("dueroute: error: ") and words in err[0]


def test_one_way_only_file_needs_components_all(tmp_path: Path) -> None:
    """A file whose roads are all one-way in a line has no strongly connected component with
    an edge: the default rule says so and names --components all, which imports it."""
    from dueroute.planner.errors import NoDrivableRoads

    p = tmp_path / "line.osm"
    p.write_text(
        '<?xml version="1.0"?><osm version="0.6">'
        '<node id="1" lat="47.1" lon="-31.3"/><node id="2" lat="47.101" lon="-31.3"/>'
        '<node id="3" lat="47.102" lon="-31.3"/><way id="5"><nd ref="1"/><nd ref="2"/>'
        '<nd ref="3"/><tag k="highway" v="primary"/><tag k="oneway" v="yes"/></way></osm>'
    )
    with pytest.raises(NoDrivableRoads, match="--components all"):
        import_osm(p)
    g = import_osm(p, components="all")
    assert (g.n_nodes, g.n_edges) == (2, 1)
