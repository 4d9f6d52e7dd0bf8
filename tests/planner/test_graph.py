"""Compiled graph: save/load round trip, memory mapping, components, snapping, corrupt files."""

from __future__ import annotations

import json
import mmap
import zipfile
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

from dueroute.planner.errors import (
    CorruptGraphFile,
    GraphFileNotFound,
    InvalidRequest,
    NodeNotFound,
)
from dueroute.planner.graph import ALL_ARRAYS, RoadGraph, hilbert_order, load_graph, save_graph
from dueroute.service.cli.main import main as cli_main
from tests.conftest import TINY_NODES, make_tiny_graph


def _partition(labels: np.ndarray) -> set[frozenset[int]]:
    groups: dict[int, set[int]] = {}
    for node, label in enumerate(np.asarray(labels).tolist()):
        groups.setdefault(label, set()).add(node)
    return {frozenset(g) for g in groups.values()}


def _is_memory_mapped(arr: np.ndarray) -> bool:
    base = arr
    while base is not None:
        if isinstance(base, (np.memmap, mmap.mmap)):
            return True
        base = getattr(base, "base", None)
    return False


@pytest.fixture
def saved_tiny(tmp_path: Path, tiny_graph: RoadGraph) -> Path:
    return save_graph(tiny_graph, tmp_path / "tiny.npz")


# ---------------------------------------------------------------------------------------------
# round trip


def test_save_load_round_trip_keeps_every_array(tiny_graph: RoadGraph, saved_tiny: Path) -> None:
    """Every array survives save -> load bit for bit; numpy.load (numpy's own reader) agrees."""
    loaded = load_graph(saved_tiny)
    for name in ALL_ARRAYS:
        a, b = getattr(tiny_graph, name), getattr(loaded, name)
        assert a.dtype == b.dtype, name
        np.testing.assert_array_equal(a, b, err_msg=name)
    assert loaded.meta["name"] == "tiny"
    assert loaded.meta["nodes"] == tiny_graph.n_nodes
    assert loaded.fingerprint == tiny_graph.fingerprint
    # The file is a plain .npz: numpy alone reads the same arrays.
    with np.load(saved_tiny, allow_pickle=False) as npz:
        for name in ALL_ARRAYS:
            np.testing.assert_array_equal(npz[name], getattr(tiny_graph, name), err_msg=name)
        assert json.loads(str(npz["meta"][()]))["edges"] == tiny_graph.n_edges


def test_load_is_memory_mapped_and_read_only(saved_tiny: Path) -> None:
    """Non-empty arrays are numpy.memmap views of the file (shared through the page cache)."""
    g = load_graph(saved_tiny)
    for name in ("indptr", "head", "travel_time_s", "lat", "lon", "geom_lat"):
        arr = getattr(g, name)
        assert _is_memory_mapped(arr), name
        assert not arr.flags.writeable, name
    eager = load_graph(saved_tiny, mmap=False)
    assert not _is_memory_mapped(eager.head)
    np.testing.assert_array_equal(eager.head, g.head)


def test_edge_coords_run_tail_to_head(tiny_graph: RoadGraph) -> None:
    """Hand-checked: the bent 1 -> 4 street passes (45.003, 7.012) then (45.007, 7.012)."""
    g = tiny_graph
    e = next(e for e in range(g.n_edges) if g.tail[e] == 1 and g.head[e] == 4)
    assert g.edge_coords(e) == [(7.01, 45.0), (7.012, 45.003), (7.012, 45.007), (7.01, 45.01)]
    back = next(e for e in range(g.n_edges) if g.tail[e] == 4 and g.head[e] == 1)
    assert g.edge_coords(back) == g.edge_coords(e)[::-1]


def test_travel_time_is_length_over_speed(tiny_graph: RoadGraph) -> None:
    """travel_time_s = length_m / (speed_kph / 3.6) on every edge (module docstring contract)."""
    g = tiny_graph
    np.testing.assert_allclose(
        g.travel_time_s, g.length_m / (g.speed_kph.astype(np.float64) / 3.6), rtol=1e-12
    )


# ---------------------------------------------------------------------------------------------
# components


def _check_components(g: RoadGraph) -> None:
    tail = np.asarray(g.tail)
    head = np.asarray(g.head)
    matrix = csr_matrix(
        (np.ones(g.n_edges), (tail, head)), shape=(g.n_nodes, g.n_nodes), dtype=np.float64
    )
    _, scipy_labels = connected_components(matrix, directed=True, connection="strong")
    digraph = nx.DiGraph()
    digraph.add_nodes_from(range(g.n_nodes))
    digraph.add_edges_from(zip(tail.tolist(), head.tolist(), strict=True))
    nx_parts = {frozenset(c) for c in nx.strongly_connected_components(digraph)}
    ours = _partition(g.component)
    assert ours == _partition(scipy_labels)
    assert ours == nx_parts


def test_components_match_scipy_and_networkx(tiny_graph: RoadGraph, saved_tiny: Path) -> None:
    """Component labels partition nodes as scipy.sparse.csgraph.connected_components
    (connection='strong') and networkx.strongly_connected_components do."""
    _check_components(tiny_graph)
    _check_components(load_graph(saved_tiny))
    assert _partition(tiny_graph.component) == {
        frozenset(range(7)),
        frozenset({7, 8}),
        frozenset({9}),
    }


def test_components_match_on_random_graphs() -> None:
    """Random sparse digraphs (with parallel edges and self-loops): same partition as scipy
    connected_components(connection='strong') and networkx strongly_connected_components."""
    from dueroute.planner.graph import build_graph

    rng = np.random.default_rng(7)
    for n, m in ((1, 0), (5, 3), (40, 60), (200, 320)):
        tail = rng.integers(0, n, m)
        head = rng.integers(0, n, m)
        g = build_graph(
            lat=rng.uniform(40, 41, n),
            lon=rng.uniform(7, 8, n),
            osm_id=np.arange(n),
            tail=tail,
            head=head,
            length_m=rng.uniform(1, 100, m),
            speed_kph=np.full(m, 30.0),
            road_class=np.zeros(m, dtype=np.int8),
            speed_source=np.ones(m, dtype=np.int8),
        )
        _check_components(g)


# ---------------------------------------------------------------------------------------------
# snapping


def _haversine_m(lat1: float, lon1: float, lat2: np.ndarray, lon2: np.ndarray) -> np.ndarray:
    # Written out independently of planner.graph; mean earth radius 6371.009 km (IUGG).
    r = 6_371_009.0
    p1, p2 = np.radians(lat1), np.radians(lat2)
    a = (
        np.sin((p2 - p1) / 2) ** 2
        + np.cos(p1) * np.cos(p2) * np.sin(np.radians(lon2 - lon1) / 2) ** 2
    )
    return 2 * r * np.arcsin(np.sqrt(a))


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    lat=st.floats(44.95, 45.08, allow_nan=False),
    lon=st.floats(6.95, 7.09, allow_nan=False),
)
def test_snap_equals_brute_force_nearest(tiny_graph: RoadGraph, lat: float, lon: float) -> None:
    """snap() returns a node at the brute-force minimum great-circle (haversine) distance."""
    g = tiny_graph
    d = _haversine_m(lat, lon, np.asarray(g.lat), np.asarray(g.lon))
    got = g.snap(lat, lon, max_distance_m=1e7)
    assert d[got] <= d.min() + 1e-6


def test_snap_on_random_cloud_equals_brute_force() -> None:
    """Dense random node cloud: snap() matches the brute-force haversine nearest node."""
    from dueroute.planner.graph import build_graph

    rng = np.random.default_rng(3)
    n = 2000
    g = build_graph(
        lat=rng.uniform(-60, 70, n),
        lon=rng.uniform(-179, 179, n),
        osm_id=np.arange(n),
        tail=np.zeros(0, dtype=np.int64),
        head=np.zeros(0, dtype=np.int64),
        length_m=np.zeros(0),
        speed_kph=np.zeros(0, dtype=np.float32),
        road_class=np.zeros(0, dtype=np.int8),
        speed_source=np.zeros(0, dtype=np.int8),
    )
    for lat, lon in zip(rng.uniform(-89, 89, 200), rng.uniform(-180, 180, 200), strict=True):
        d = _haversine_m(lat, lon, np.asarray(g.lat), np.asarray(g.lon))
        assert d[g.snap(lat, lon, max_distance_m=3e7)] <= d.min() + 1e-3


def test_snap_far_point_says_how_far(tiny_graph: RoadGraph) -> None:
    """A point ~111 km from every node is refused, naming the distance and the limit."""
    with pytest.raises(NodeNotFound) as info:
        tiny_graph.snap(46.0, 7.0)
    message = str(info.value)
    nearest = _haversine_m(46.0, 7.0, np.asarray(tiny_graph.lat), np.asarray(tiny_graph.lon)).min()
    assert f"{nearest:,.0f} m" in message
    assert "500 m" in message


@pytest.mark.parametrize(
    ("lat", "lon"), [(91.0, 0.0), (-90.5, 0.0), (0.0, 181.0), (float("nan"), 0.0)]
)
def test_snap_rejects_impossible_coordinates(tiny_graph: RoadGraph, lat: float, lon: float) -> None:
    with pytest.raises(InvalidRequest, match="must be a number"):
        tiny_graph.snap(lat, lon)


# ---------------------------------------------------------------------------------------------
# node order


@settings(max_examples=40, deadline=None)
@given(n=st.integers(0, 300), seed=st.integers(0, 2**32 - 1), dup=st.booleans())
def test_hilbert_order_is_a_permutation(n: int, seed: int, dup: bool) -> None:
    """hilbert_order returns each index exactly once (also with repeated positions)."""
    rng = np.random.default_rng(seed)
    lat = rng.uniform(-80, 80, n)
    lon = rng.uniform(-180, 180, n)
    if dup and n > 1:
        lat[: n // 2] = lat[0]
        lon[: n // 2] = lon[0]
    order = hilbert_order(lat, lon)
    np.testing.assert_array_equal(np.sort(order), np.arange(n))


def test_spatial_order_renumbers_but_keeps_the_graph() -> None:
    """Hilbert renumbering is a relabelling: same edge multiset via osm_id, same costs."""
    a = make_tiny_graph(spatial_order=False)
    b = make_tiny_graph(spatial_order=True)

    def edges(g: RoadGraph) -> list[tuple[int, int, float]]:
        ids = np.asarray(g.osm_id)
        return sorted(
            zip(
                ids[g.tail].tolist(),
                ids[g.head].tolist(),
                np.round(g.travel_time_s, 9).tolist(),
                strict=True,
            )
        )

    assert edges(a) == edges(b)
    assert sorted(b.osm_id.tolist()) == sorted(a.osm_id.tolist())
    lat_by_id = dict(zip(b.osm_id.tolist(), b.lat.tolist(), strict=True))
    assert [lat_by_id[100 + i] for i in range(len(TINY_NODES))] == TINY_NODES[:, 0].tolist()


# ---------------------------------------------------------------------------------------------
# corrupt files


def _rewrite(src: Path, dst: Path, change: dict[str, np.ndarray | None]) -> Path:
    with np.load(src, allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    for k, v in change.items():
        if v is None:
            arrays.pop(k)
        else:
            arrays[k] = v
    with open(dst, "wb") as fh:
        np.savez(fh, **arrays)
    return dst


def _corrupt_cases(good: Path, tmp: Path) -> dict[str, tuple[Path, str]]:
    with np.load(good) as npz:
        indptr = npz["indptr"].copy()
        head = npz["head"]
        lat = npz["lat"].copy()
        geom_indptr = npz["geom_indptr"].copy()
    nan_lat = lat.copy()
    nan_lat[3] = np.nan
    bad_geom = geom_indptr.copy()
    bad_geom[-1] += 7  # points past the end of geom_lat
    meta = json.loads(str(np.load(good)["meta"][()]))
    future = dict(meta, format_version=99)
    bad_indptr = indptr.copy()
    bad_indptr[-1] += 5
    truncated = tmp / "truncated.npz"
    truncated.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    not_zip = tmp / "notzip.npz"
    not_zip.write_text("this is not a graph\n")
    deflated = tmp / "deflated.npz"
    with np.load(good) as npz:
        np.savez_compressed(deflated, **{k: npz[k] for k in npz.files})
    return {
        "truncated": (truncated, "not a readable compiled graph"),
        "missing array": (_rewrite(good, tmp / "missing.npz", {"head": None}), "missing arrays"),
        "wrong dtype": (
            _rewrite(good, tmp / "dtype.npz", {"head": head.astype(np.float64)}),
            "dtype",
        ),
        "indptr inconsistent": (
            _rewrite(good, tmp / "indptr.npz", {"indptr": bad_indptr}),
            "indptr",
        ),
        "head out of range": (
            _rewrite(good, tmp / "head.npz", {"head": head + 1000}),
            "head",
        ),
        "NaN latitude": (_rewrite(good, tmp / "nan.npz", {"lat": nan_lat}), "lat holds values"),
        "geometry index past the end": (
            _rewrite(good, tmp / "geom.npz", {"geom_indptr": bad_geom}),
            "geom_indptr",
        ),
        "restriction edge out of range": (
            _rewrite(
                good,
                tmp / "turns.npz",
                {
                    "turn_indptr": np.array([0, 2], dtype=np.int64),
                    "turn_edges": np.array([0, 10_000], dtype=np.int32),
                    "turn_kind": np.array([0], dtype=np.int8),
                },
            ),
            "turn_edges holds indices outside",
        ),
        "newer format": (
            _rewrite(good, tmp / "future.npz", {"meta": np.array(json.dumps(future))}),
            "format version 99",
        ),
        "not a zip": (not_zip, "not a readable compiled graph"),
        "compressed members": (deflated, "compressed"),
    }


def test_corrupt_files_raise_corrupt_graph_file(saved_tiny: Path, tmp_path: Path) -> None:
    """Each kind of damage is refused with CorruptGraphFile naming what is wrong."""
    for case, (path, words) in _corrupt_cases(saved_tiny, tmp_path).items():
        with pytest.raises(CorruptGraphFile, match=words):
            load_graph(path)
        if case == "truncated":  # numpy's own reader refuses it too
            with (
                pytest.raises((zipfile.BadZipFile, ValueError, OSError, EOFError)),
                np.load(path) as npz,
            ):
                [npz[k] for k in npz.files]


def test_version_1_file_loads_without_way_ids_or_restrictions(
    saved_tiny: Path, tmp_path: Path
) -> None:
    """A file written before format version 2 (no way ids, no restrictions) still loads."""
    meta = json.loads(str(np.load(saved_tiny)["meta"][()]))
    old = {
        name: None for name in ("way_indptr", "way_id", "turn_indptr", "turn_edges", "turn_kind")
    }
    old["meta"] = np.array(json.dumps(dict(meta, format_version=1)))
    g = load_graph(_rewrite(saved_tiny, tmp_path / "v1.npz", old))
    assert g.n_restrictions == 0
    assert g.way_indptr.shape == (g.n_edges + 1,) and g.edge_ways(0).size == 0


def test_way_ids_and_restrictions_follow_the_edge_renumbering() -> None:
    """build_graph renumbers edges into CSR order; way ids and restriction sequences given in
    input edge order must name the same (tail, head) pairs afterwards (checked by osm_id)."""
    lat = np.array([45.0, 45.0, 45.01, 45.01])
    lon = np.array([7.0, 7.01, 7.01, 7.0])
    osm_id = np.array([10, 11, 12, 13])
    # input edges, deliberately not in CSR order: 3->0, 1->2, 0->1, 2->3
    tail = np.array([3, 1, 0, 2])
    head = np.array([0, 2, 1, 3])
    ways = [[903], [901, 902], [900], [902]]
    way_indptr = np.cumsum([0] + [len(w) for w in ways])
    from dueroute.planner.graph import build_graph

    g = build_graph(
        lat=lat,
        lon=lon,
        osm_id=osm_id,
        tail=tail,
        head=head,
        length_m=np.full(4, 1000.0),
        speed_kph=np.full(4, 50.0, dtype=np.float32),
        road_class=np.zeros(4, dtype=np.int8),
        speed_source=np.zeros(4, dtype=np.int8),
        way_indptr=way_indptr,
        way_id=np.concatenate(ways),
        # no turn 0->1 then 1->2 (input edges 2, 1); only 1->2->3 (input edges 1, 3)
        turn_indptr=np.array([0, 2, 4]),
        turn_edges=np.array([2, 1, 1, 3]),
        turn_kind=np.array([0, 1], dtype=np.int8),
        spatial_order=True,
    )
    ids = np.asarray(g.osm_id)
    by_pair = {
        (int(ids[g.tail[e]]), int(ids[g.head[e]])): g.edge_ways(e).tolist()
        for e in range(g.n_edges)
    }
    assert by_pair == {(13, 10): [903], (11, 12): [901, 902], (10, 11): [900], (12, 13): [902]}
    kinds = []
    for i in range(g.n_restrictions):
        kind, edges = g.restriction(i)
        kinds.append((kind, [(int(ids[g.tail[e]]), int(ids[g.head[e]])) for e in edges]))
    assert kinds == [("no", [(10, 11), (11, 12)]), ("only", [(11, 12), (12, 13)])]


def test_missing_graph_file(tmp_path: Path) -> None:
    with pytest.raises(GraphFileNotFound, match="not found"):
        load_graph(tmp_path / "absent.npz")


def test_cli_reports_corrupt_graph_in_one_line(
    saved_tiny: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """CLI contract: one 'dueroute: error: ...' line on stderr, exit status 2, no traceback."""
    cases = _corrupt_cases(saved_tiny, tmp_path)
    argvs = [["graph", "info", str(path)] for path, _ in cases.values()]
    argvs += [
        ["graph", "info", str(tmp_path / "absent.npz")],
        ["graph", "info", str(tmp_path / "map.osm")],  # not a compiled graph
        ["graph", "plot", str(saved_tiny), "-o", str(tmp_path / "x.png"), "--bbox", "1,2,3"],
        ["graph", "plot", str(saved_tiny), "-o", str(tmp_path / "x.png"), "--bbox", "1,2,3,4"],
        ["graph", "plot", str(saved_tiny), "-o", str(tmp_path / "x.txt")],
    ]
    for argv in argvs:
        capsys.readouterr()
        assert cli_main(argv) == 2, argv
        captured = capsys.readouterr()
        lines = captured.err.strip().splitlines()
        assert len(lines) == 1, (argv, captured.err)
        assert lines[0].startswith("dueroute: error: "), lines[0]
        assert captured.out == ""


def test_cli_info_and_plot(
    saved_tiny: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """graph info --json has nodes, edges, path; graph plot writes a PNG (checked by its
    signature, RFC 2083) that matplotlib reads back with a real size."""
    capsys.readouterr()
    assert cli_main(["graph", "info", str(saved_tiny), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert (info["nodes"], info["edges"], info["path"]) == (10, 20, str(saved_tiny))
    assert info["strong_components"] == 3
    out = tmp_path / "tiny.png"
    assert (
        cli_main(["graph", "plot", str(saved_tiny), "-o", str(out), "--dpi", "40", "--json"]) == 0
    )
    result = json.loads(capsys.readouterr().out)
    assert result["path"] == str(out)
    # Twin directions are drawn once. Hand count: 7 straight two-way roads (7 pieces), the
    # bent two-way street (3), one-ways 5->6 and 6->9 (1 each), the bent 6->0 and the bent
    # parallel 0->1 (2 each): 16 straight pieces.
    assert result["segments"] == 16
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    import matplotlib.image

    image = matplotlib.image.imread(out)
    assert image.shape[0] > 50 and image.shape[1] > 50
    bbox_out = tmp_path / "part.png"
    argv = [
        "graph",
        "plot",
        str(saved_tiny),
        "-o",
        str(bbox_out),
        "--bbox",
        "44.99,6.99,45.005,7.03",
    ]
    assert cli_main([*argv, "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["segments"] < result["segments"]


# ---------------------------------------------------------------------------------------------
# edge geometry helpers


def test_edge_polylines_match_edge_coords(tiny_graph: RoadGraph) -> None:
    """edge_polylines holds, per edge, exactly the points edge_coords lists (hand-checked)."""
    from dueroute.planner.graph import edge_polylines

    ptr, lat, lon = edge_polylines(tiny_graph)
    for e in range(tiny_graph.n_edges):
        pts = list(zip(lon[ptr[e] : ptr[e + 1]], lat[ptr[e] : ptr[e + 1]], strict=True))
        assert pts == tiny_graph.edge_coords(e)
    some = np.array([3, 0, 7, 7, tiny_graph.n_edges - 1])
    ptr, lat, lon = edge_polylines(tiny_graph, some)
    for i, e in enumerate(some.tolist()):
        pts = list(zip(lon[ptr[i] : ptr[i + 1]], lat[ptr[i] : ptr[i + 1]], strict=True))
        assert pts == tiny_graph.edge_coords(e)


def test_reverse_edges_hand_checked_and_brute_force(tiny_graph: RoadGraph) -> None:
    """Hand-checked on the tiny graph: the bent two-way 1-4 street's directions reverse each
    other, the one-way 5 -> 6 has none, and the bent one-way service road 0 -> 1 is not the
    reverse of the primary 1 -> 0 (other geometry). On random graphs, reverse_edge_pairs equals
    a plain double loop over all edge pairs."""
    from dueroute.planner.graph import build_graph, reverse_edge_pairs

    g = tiny_graph

    def edge(t: int, h: int, cls: str | None = None) -> int:
        classes = g.meta["road_classes"]
        return next(
            e
            for e in range(g.n_edges)
            if g.tail[e] == t
            and g.head[e] == h
            and (cls is None or classes[g.road_class[e]] == cls)
        )

    assert g.reverse_edge[edge(1, 4)] == edge(4, 1)
    assert g.reverse_edge[edge(4, 1)] == edge(1, 4)
    assert g.reverse_edge[edge(5, 6)] == -1
    assert g.reverse_edge[edge(0, 1, "service")] == -1
    assert g.reverse_edge[edge(1, 0)] == edge(0, 1, "primary")

    rng = np.random.default_rng(3)
    for _ in range(20):
        n, m = 6, 30
        tail, head = rng.integers(0, n, m), rng.integers(0, n, m)
        inner = rng.integers(0, 3, m)
        pts = rng.choice(np.array([0.0, 0.001, 0.002]), size=(int(inner.sum()), 2))
        gptr = np.concatenate(([0], np.cumsum(inner)))
        r = build_graph(
            lat=45 + rng.random(n) * 0.01,
            lon=7 + rng.random(n) * 0.01,
            osm_id=np.arange(n),
            tail=tail,
            head=head,
            length_m=np.ones(m),
            speed_kph=np.full(m, 30.0),
            road_class=np.zeros(m, dtype=np.int8),
            speed_source=np.zeros(m, dtype=np.int8),
            geom_indptr=gptr,
            geom_lat=45 + pts[:, 0],
            geom_lon=7 + pts[:, 1],
        )

        geom = [
            list(
                zip(
                    r.geom_lat[r.geom_indptr[e] : r.geom_indptr[e + 1]].tolist(),
                    r.geom_lon[r.geom_indptr[e] : r.geom_indptr[e + 1]].tolist(),
                    strict=True,
                )
            )
            for e in range(m)
        ]
        want = [
            (e, f)
            for e in range(m)
            for f in range(m)
            if r.tail[f] == r.head[e] and r.head[f] == r.tail[e] and geom[f] == geom[e][::-1]
        ]
        e_, f_ = reverse_edge_pairs(r)
        assert list(zip(e_.tolist(), f_.tolist(), strict=True)) == want
