"""Great-circle and ALT landmark bounds checked against exact distances from scipy csgraph."""

from __future__ import annotations

import dataclasses
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.errors import CorruptGraphFile, GraphFileNotFound, InvalidRequest
from dueroute.planner.graph import build_graph, great_circle_m, save_graph
from dueroute.planner.heuristics import (
    METHODS,
    Landmarks,
    alt_bound_s,
    build_landmarks,
    great_circle_bound_s,
    heuristic_s,
    landmarks_path,
    largest_component_nodes,
    load_landmarks,
    load_or_build_landmarks,
    save_landmarks,
)


def random_graph(
    seed: int, n: int = 120, m: int = 420, *, zero_cost: bool = False, stretch: float = 2.0
):
    """Random directed road-like graph: several strong components, some unreachable pairs.

    Edge lengths are >= the great-circle distance between the ends (as on real roads), so the
    great-circle bound must hold.
    """
    rng = np.random.default_rng(seed)
    lat = rng.uniform(48.0, 48.05, n)
    lon = rng.uniform(11.0, 11.07, n)
    tail = rng.integers(n, size=m)
    head = rng.integers(n, size=m)
    length = great_circle_m(lat[tail], lon[tail], lat[head], lon[head])
    length = length * rng.uniform(1.0, stretch, m)
    if zero_cost:
        length[rng.random(m) < 0.1] = 0.0
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(n, dtype=np.int64),
        tail=tail,
        head=head,
        length_m=length,
        speed_kph=rng.choice([30.0, 50.0, 90.0, 130.0], m).astype(np.float32),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        meta={"name": f"random-{seed}"},
    )


def line_graph(costs_s: np.ndarray):
    """Two-way chain 0 - 1 - ... - k with the given edge travel times (speed 3.6 km/h = 1 m/s)."""
    k = costs_s.shape[0]
    n = k + 1
    tail = np.concatenate([np.arange(k), np.arange(1, n)])
    head = np.concatenate([np.arange(1, n), np.arange(k)])
    length = np.concatenate([costs_s, costs_s])
    return build_graph(
        lat=np.full(n, 10.0),
        lon=np.full(n, 20.0),  # every node at one point: the great-circle bound is 0
        osm_id=np.arange(n, dtype=np.int64),
        tail=tail,
        head=head,
        length_m=length,
        speed_kph=np.full(2 * k, 3.6, dtype=np.float32),
        road_class=np.zeros(2 * k, dtype=np.int8),
        speed_source=np.ones(2 * k, dtype=np.int8),
        spatial_order=False,
    )


def all_bounds(graph, landmarks: Landmarks | None, great_circle: bool = True) -> np.ndarray:
    """h[v, t] for every pair, as the kernel computes it (or the landmark term alone)."""
    n = graph.n_nodes
    if not great_circle:
        assert landmarks is not None
        return np.stack([alt_bound_s(landmarks, np.arange(n), t) for t in range(n)], axis=1)
    return np.stack([heuristic_s(graph, landmarks, np.arange(n), t) for t in range(n)], axis=1)


def assert_admissible_and_consistent(
    graph, landmarks: Landmarks, great_circle: bool = True, expect_no_path_proofs: bool = True
) -> None:
    exact = dijkstra(graph.csr())  # exact[v, t] = d(v -> t), inf where no path
    h = all_bounds(graph, landmarks, great_circle)
    assert not np.any(np.isnan(h)), "a bound must never be NaN"
    assert np.all(h >= 0.0)
    reachable = np.isfinite(exact)
    over = h[reachable] - exact[reachable]
    assert over.max() <= 0.0, f"bound exceeds the true distance by {over.max()} s"
    # h = inf (allowed only where there is no path, checked above); on the random graphs,
    # with several components, the landmarks should prove some pairs unreachable
    if expect_no_path_proofs:
        assert np.any(np.isinf(h)) == bool(np.any(~reachable))
    # consistency h(v) <= c(v, w) + h(w) on every edge and destination where h(v) is finite
    c = np.asarray(graph.travel_time_s)[:, None]
    hv, hw = h[graph.tail], h[graph.head]
    finite = np.isfinite(hv)
    violation = hv[finite] - np.broadcast_to(c, hv.shape)[finite] - hw[finite]
    assert violation.max() <= landmarks.consistency_tolerance_s


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_alt_admissible_and_consistent_on_random_graphs(method: str, seed: int) -> None:
    """ALT bounds never exceed the exact distance and are consistent (Goldberg & Harrelson 2005).

    Reference: all-pairs distances from ``scipy.sparse.csgraph.dijkstra``. The graphs have
    several strong components, so many pairs have no path. Seed 2 adds zero-cost edges between
    distant points (the great-circle bound does not hold there, so only the landmark term is
    checked on that graph).
    """
    zero_cost = seed == 2
    graph = random_graph(seed, zero_cost=zero_cost)
    assert int(graph.component.max()) > 0, "the test graph should have several components"
    landmarks = build_landmarks(graph, count=6, method=method, seed=seed, progress=False)
    assert landmarks.count == 6
    assert_admissible_and_consistent(graph, landmarks, great_circle=not zero_cost)


@pytest.mark.parametrize("method", METHODS)
def test_stored_distances_match_scipy(method: str) -> None:
    """The decoded rows equal scipy csgraph.dijkstra distances within half a unit (the 16-bit
    rounding to nearest); missing distances decode to +inf, as in scipy, never NaN. The rows
    are one contiguous uint16 block per node."""
    graph = random_graph(5)
    lm = build_landmarks(graph, count=5, method=method, progress=False)
    assert lm.lm.dtype == np.uint16 and lm.lm.flags.c_contiguous
    assert lm.lm.shape == (graph.n_nodes, 5, 2)
    exact_from = dijkstra(graph.csr(), indices=lm.nodes)  # [i, v]
    exact_to = dijkstra(graph.csr().T.tocsr(), indices=lm.nodes)
    for stored, exact in ((lm.lm_from, exact_from.T), (lm.lm_to, exact_to.T)):
        assert stored.shape == (graph.n_nodes, 5)
        finite = np.isfinite(exact)
        assert (~finite).any(), "the test graph should have unreachable nodes"
        assert np.all(np.abs(stored[finite] - exact[finite]) <= lm.unit_s / 2 * (1 + 1e-9))
        assert np.all(np.isposinf(stored[~finite]))
    assert lm.max_distance_s == pytest.approx(
        max(exact_from[np.isfinite(exact_from)].max(), exact_to[np.isfinite(exact_to)].max())
    )


def test_great_circle_bound_admissible() -> None:
    """Great-circle length / top speed never exceeds the exact travel time (scipy csgraph)."""
    graph = random_graph(3, stretch=1.0)
    exact = dijkstra(graph.csr())
    h = all_bounds(graph, None)
    reachable = np.isfinite(exact)
    assert np.all(h[reachable] <= exact[reachable])
    v, t = 4, 9
    assert great_circle_bound_s(graph, v, t) == pytest.approx(h[v, t])


@pytest.mark.parametrize("method", METHODS)
def test_landmarks_distinct_and_in_largest_component(method: str) -> None:
    """Selection picks distinct nodes inside the largest strong component (scipy labels)."""
    graph = random_graph(7)
    from scipy.sparse.csgraph import connected_components

    _, labels = connected_components(graph.csr(), directed=True, connection="strong")
    biggest = np.argmax(np.bincount(labels))
    lm = build_landmarks(graph, count=12, method=method, seed=3, progress=False)
    assert len(set(lm.nodes.tolist())) == lm.count == 12
    assert np.all(labels[lm.nodes] == biggest)
    np.testing.assert_array_equal(
        np.sort(largest_component_nodes(graph)), np.flatnonzero(labels == biggest)
    )


def test_farthest_selection_follows_the_definition() -> None:
    """Farthest selection (Goldberg & Harrelson 2005): landmark k+1 maximises the round-trip
    distance to the nearest of landmarks 1..k, recomputed here with scipy csgraph.dijkstra."""
    graph = random_graph(11)
    lm = build_landmarks(graph, count=5, method="farthest", seed=0, progress=False)
    scc = largest_component_nodes(graph)
    fwd = dijkstra(graph.csr(), indices=lm.nodes)[:, scc]
    bwd = dijkstra(graph.csr().T.tocsr(), indices=lm.nodes)[:, scc]
    round_trip = fwd + bwd
    for k in range(1, 5):
        nearest = round_trip[:k].min(axis=0)
        chosen = np.flatnonzero(scc == lm.nodes[k])[0]
        assert nearest[chosen] == pytest.approx(nearest.max(), rel=1e-12)
        assert nearest[chosen] > 0


def test_distinct_even_when_the_component_is_tiny() -> None:
    """A two-node component gets two landmarks, not sixteen copies."""
    graph = line_graph(np.array([5.0]))
    lm = build_landmarks(graph, count=16, method="farthest", progress=False)
    assert sorted(lm.nodes.tolist()) == [0, 1]
    assert build_landmarks(graph, count=16, method="avoid", progress=False).count == 2


def test_quantization_slack_on_adversarial_distances() -> None:
    """Edge costs with fractional parts, chosen so the 16-bit rounding (half a unit either way)
    goes both ways: with ``slack_s`` every bound stays admissible against scipy
    csgraph.dijkstra, also when evaluated in integer codes as the kernel does; without the slack
    some bound would exceed the true distance, so the slack is doing real work."""
    rng = np.random.default_rng(0)
    costs = 100.0 * rng.uniform(0.9, 1.1, 40) + rng.uniform(0, 1, 40) / 3.0
    graph = line_graph(costs)
    lm = build_landmarks(graph, count=3, method="farthest", progress=False)
    exact = dijkstra(graph.csr())
    h = all_bounds(graph, lm)
    assert np.all(h <= exact)

    # the kernel's formula: integer code differences (no path = 65535), scaled once
    codes = np.asarray(lm.lm).astype(np.int64)
    for t in range(graph.n_nodes):
        d1 = codes[:, :, 0] - codes[t, :, 0][None, :]
        d2 = codes[t, :, 1][None, :] - codes[:, :, 1]
        term = np.max(np.maximum(d1, d2), axis=1) * lm.unit_s - lm.slack_s
        reachable = np.isfinite(exact[:, t])
        assert np.all(np.maximum(term, 0.0)[reachable] <= exact[reachable, t])

    unslacked = dataclasses.replace(lm, slack_s=0.0)
    assert np.any(all_bounds(graph, unslacked) > exact), "adversarial case not adversarial"


def test_trees_are_shortest_path_trees() -> None:
    """Each landmark's trees hold, for every node, an edge of a shortest path to / from the
    landmark: its cost closes the distance gap exactly (Bellman's optimality condition,
    distances from scipy csgraph.dijkstra), and -1 only at the landmark or without a path."""
    graph = random_graph(6)
    lm = build_landmarks(graph, count=4, progress=False)
    csr = graph.csr()
    d_from = dijkstra(csr, indices=lm.nodes)
    d_to = dijkstra(csr.T.tocsr(), indices=lm.nodes)
    tail, head, cost = np.asarray(graph.tail), np.asarray(graph.head), graph.travel_time_s
    for i, landmark in enumerate(lm.nodes):
        into = lm.tree_from[i]
        has = into >= 0
        assert np.array_equal(has, np.isfinite(d_from[i]) & (np.arange(graph.n_nodes) != landmark))
        v = np.flatnonzero(has)
        e = into[has]
        assert np.all(head[e] == v)
        np.testing.assert_allclose(d_from[i, tail[e]] + cost[e], d_from[i, v], rtol=1e-12)
        out = lm.tree_to[i]
        has = out >= 0
        assert np.array_equal(has, np.isfinite(d_to[i]) & (np.arange(graph.n_nodes) != landmark))
        v = np.flatnonzero(has)
        e = out[has]
        assert np.all(tail[e] == v)
        np.testing.assert_allclose(cost[e] + d_to[i, head[e]], d_to[i, v], rtol=1e-12)


def test_zero_landmarks_leave_the_great_circle_bound() -> None:
    graph = random_graph(4)
    lm = build_landmarks(graph, count=0, progress=False)
    assert lm.lm.shape == (graph.n_nodes, 0, 2) and lm.lm_to.shape == (graph.n_nodes, 0)
    assert alt_bound_s(lm, 3, 7) == 0.0
    assert heuristic_s(graph, lm, 3, 7) == pytest.approx(great_circle_bound_s(graph, 3, 7))


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"count": -1}, "landmark count must be in 0..64"),
        ({"count": 2.5}, "must be an integer"),
        ({"method": "random"}, "must be one of avoid, farthest"),
    ],
)
def test_bad_arguments_are_refused(kwargs: dict, message: str) -> None:
    graph = random_graph(0, n=20, m=60)
    with pytest.raises(InvalidRequest, match=message):
        build_landmarks(graph, progress=False, **kwargs)


# ---------------------------------------------------------------------------------------------
# Files


def test_file_round_trip_is_memory_mapped(tmp_path: Path) -> None:
    graph = random_graph(8)
    lm = build_landmarks(graph, count=4, method="avoid", progress=False)
    path = save_landmarks(lm, tmp_path / "g.landmarks.npz")
    with zipfile.ZipFile(path) as zf:  # numpy alone can read it, members stored uncompressed
        assert {i.compress_type for i in zf.infolist()} == {zipfile.ZIP_STORED}
    loaded = load_landmarks(path, graph)
    for name in ("lm", "tree_to", "tree_from"):
        arr = getattr(loaded, name)
        assert isinstance(arr, np.memmap) and arr.flags.c_contiguous
        assert arr.ctypes.data % 64 == 0, f"{name} rows do not start on a cache line"
        np.testing.assert_array_equal(arr, getattr(lm, name))
    np.testing.assert_array_equal(loaded.nodes, lm.nodes)
    assert loaded.slack_s == lm.slack_s and loaded.unit_s == lm.unit_s
    assert loaded.max_distance_s == lm.max_distance_s
    assert loaded.method == "avoid" and loaded.graph_fingerprint == graph.fingerprint
    with np.load(path) as plain:  # numpy's own reader (the padding is a standard zip field)
        np.testing.assert_array_equal(plain["lm"], lm.lm)
        np.testing.assert_array_equal(plain["tree_from"], lm.tree_from)


def test_landmarks_of_another_graph_are_refused(tmp_path: Path) -> None:
    graph, other = random_graph(8), random_graph(9)
    path = save_landmarks(build_landmarks(graph, count=3, progress=False), tmp_path / "a.npz")
    with pytest.raises(InvalidRequest, match="belong to another graph"):
        load_landmarks(path, other)


@pytest.mark.parametrize("damage", ["truncate", "garbage", "missing", "shape", "tree", "dtype"])
def test_corrupt_landmark_files_are_refused(tmp_path: Path, damage: str) -> None:
    graph = random_graph(8)
    lm = build_landmarks(graph, count=3, progress=False)
    path = save_landmarks(lm, tmp_path / "lm.npz")
    if damage == "truncate":
        path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    elif damage == "garbage":
        path.write_bytes(b"this is not a zip file at all")
    else:
        meta = np.load(path)["meta"]
        arrays = {
            "meta": meta,
            "nodes": lm.nodes,
            "lm": lm.lm,
            "tree_to": lm.tree_to,
            "tree_from": lm.tree_from,
        }
        if damage == "missing":
            del arrays["tree_to"]
        elif damage == "shape":
            arrays["lm"] = lm.lm[:-1]
        elif damage == "tree":
            bad = lm.tree_to.copy()
            bad[0, 0] = graph.n_edges + 10  # an edge the graph does not have
            arrays["tree_to"] = bad
        else:
            arrays["lm"] = lm.lm.astype(np.float32)
        with open(path, "wb") as fh:
            np.savez(fh, **arrays)
    with pytest.raises(CorruptGraphFile, match=str(path.name)):
        load_landmarks(path, graph)


def test_missing_file_is_reported(tmp_path: Path) -> None:
    with pytest.raises(GraphFileNotFound, match="landmark file not found"):
        load_landmarks(tmp_path / "nope.landmarks.npz")


def test_load_or_build_stores_beside_the_graph_and_rebuilds_when_stale(tmp_path: Path) -> None:
    graph_path = save_graph(random_graph(8), tmp_path / "town.npz")
    from dueroute.planner.graph import load_graph

    graph = load_graph(graph_path)
    first = load_or_build_landmarks(graph, count=3, progress=False)
    assert first.path == landmarks_path(graph_path) == tmp_path / "town.landmarks.npz"
    stamp = first.path.stat().st_mtime_ns
    again = load_or_build_landmarks(graph, count=3, progress=False)
    assert again.path.stat().st_mtime_ns == stamp  # reused, not rebuilt
    np.testing.assert_array_equal(again.lm, first.lm)

    # the graph is recompiled with other costs: the old file is stale and gets replaced
    other_path = save_graph(random_graph(9), graph_path)
    other = load_graph(other_path)
    fresh = load_or_build_landmarks(other, count=3, progress=False)
    assert fresh.graph_fingerprint == other.fingerprint
    more = load_or_build_landmarks(other, count=5, progress=False)
    assert more.count == 5

    # a damaged cache file is reported with what to do about it
    more.path.write_bytes(b"garbage")
    with pytest.raises(CorruptGraphFile, match="delete it and it is rebuilt"):
        load_or_build_landmarks(other, count=5, progress=False)
    assert load_or_build_landmarks(other, count=5, progress=False, rebuild=True).count == 5


# ---------------------------------------------------------------------------------------------
# Real OpenStreetMap fixtures


def _import_fixture(osm_dir: Path, name: str):
    path = osm_dir / name
    from dueroute.planner.osm_import import import_map

    return import_map(path)


@pytest.mark.parametrize("name", ["west-oakland.osm.bz2", "aguascalientes.osm.bz2"])
@pytest.mark.parametrize("method", METHODS)
def test_alt_admissible_on_osm_fixtures(osm_dir: Path, name: str, method: str) -> None:
    """ALT bounds on real OpenStreetMap roads (fixtures published with osmnx) are admissible
    and consistent against scipy csgraph.dijkstra (Goldberg & Harrelson 2005)."""
    graph = _import_fixture(osm_dir, name)
    if graph.n_nodes > 1200:  # all-pairs check: keep a sample of destinations
        pytest.skip("fixture larger than expected for an all-pairs check")
    landmarks = build_landmarks(graph, count=8, method=method, progress=False)
    assert_admissible_and_consistent(graph, landmarks)


# ---------------------------------------------------------------------------------------------
# Through the search kernel


@pytest.mark.parametrize("method", METHODS)
def test_kernel_with_landmarks_is_exact(method: str) -> None:
    """With ALT landmarks (+inf for missing distances) the weight-1 search returns exactly the
    scipy csgraph.dijkstra optimum, every reported lower bound stays <= that optimum
    (Goldberg & Harrelson 2005: ALT is admissible), and pairs with no path end ``no_route``."""
    from dueroute.planner.session import Planner, plan

    graph = random_graph(21, n=60, m=200, zero_cost=False)
    landmarks = build_landmarks(graph, count=4, method=method, progress=False)
    planner = Planner(graph, landmarks=landmarks)
    exact = dijkstra(graph.csr())
    rng = np.random.default_rng(0)
    pairs = rng.integers(graph.n_nodes, size=(150, 2))
    unreachable = 0
    for o, d in pairs.tolist():
        result = plan(planner, o, d, controller="fixed:1", steps=1)
        if not np.isfinite(exact[o, d]):
            unreachable += 1
            assert result.status == "no_route", (o, d)
            continue
        assert result.status == "optimal", (o, d, result.status)
        assert result.cost_s == pytest.approx(exact[o, d], rel=1e-9, abs=1e-9)
        for imp in result.improvements:
            assert imp.lower_bound_s <= exact[o, d] * (1 + 1e-12) + 1e-12
    assert unreachable > 0, "the sample should include pairs without a path"


def test_load_or_build_works_when_the_folder_is_read_only(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A graph in a folder we may not write to still gets landmarks (in memory), with the
    reason recorded; no temp file is left behind."""
    import dueroute.planner.heuristics as heuristics
    from dueroute.planner.graph import load_graph

    graph = load_graph(save_graph(random_graph(8), tmp_path / "town.npz"))
    real_open = open

    def refuse(path, *args, **kwargs):
        if str(path).endswith(".tmp"):
            raise PermissionError(13, "Permission denied", str(path))
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr("builtins.open", refuse)
    lm = heuristics.load_or_build_landmarks(graph, count=3, progress=False)
    monkeypatch.undo()
    assert lm.count == 3 and lm.path is None
    assert "town.landmarks.npz" in lm.meta["not_saved"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["town.npz"]


@st.composite
def small_digraphs(draw):
    """Small directed graphs with arbitrary costs (zero included), parallel edges, loops."""
    n = draw(st.integers(2, 18))
    m = draw(st.integers(1, 3 * n))
    tail = np.array(draw(st.lists(st.integers(0, n - 1), min_size=m, max_size=m)))
    head = np.array(draw(st.lists(st.integers(0, n - 1), min_size=m, max_size=m)))
    cost = np.array(
        draw(
            st.lists(
                st.one_of(st.just(0.0), st.floats(0.0, 1e5, allow_nan=False)),
                min_size=m,
                max_size=m,
            )
        )
    )
    return build_graph(
        lat=np.full(n, 10.0),
        lon=np.full(n, 20.0),  # one point: only the landmark term is tested
        osm_id=np.arange(n, dtype=np.int64),
        tail=tail,
        head=head,
        length_m=cost,
        speed_kph=np.full(m, 3.6, dtype=np.float32),  # 1 m/s: travel_time_s == length_m
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        spatial_order=False,
    )


@settings(max_examples=60, deadline=None)
@given(graph=small_digraphs(), method=st.sampled_from(METHODS), count=st.integers(0, 5))
def test_alt_admissible_and_consistent_property(graph, method: str, count: int) -> None:
    """Property test (hypothesis): on any small directed graph, ALT bounds never exceed the
    scipy csgraph.dijkstra distance and are consistent within the float32 tolerance
    (Goldberg & Harrelson 2005)."""
    landmarks = build_landmarks(graph, count=count, method=method, progress=False)
    assert landmarks.count == min(count, largest_component_nodes(graph).shape[0])
    assert len(set(landmarks.nodes.tolist())) == landmarks.count
    assert_admissible_and_consistent(
        graph, landmarks, great_circle=False, expect_no_path_proofs=False
    )
