"""Live traffic: documents, selections and cost versions, checked against scipy and shapely.

References: scipy ``csgraph.dijkstra`` on the changed costs (optimal answers, bounds);
shapely (``Polygon.contains``, ``LineString.distance``) for the ``area`` and ``along``
selections; RFC 3339 / RFC 7946 for the document's date-times and geometries; the ALT theorem
(Goldberg & Harrelson 2005) for what a landmark bound may claim.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.graph import build_graph, great_circle_m
from dueroute.planner.heuristics import build_landmarks
from dueroute.planner.session import Planner, plan
from dueroute.planner.traffic import (
    MAX_SPEED_KPH,
    CostLayer,
    TrafficDocumentError,
    costs_from_document,
    parse_document,
    parse_rfc3339,
    rfc3339,
    sample_scenario,
)
from tests.planner.test_kernel import grid_graph, random_graph

NOW = 2_000_000_000.0  # a fixed "now" (2033-05-18) so expiry checks are reproducible


def _optimum(graph, costs, origins):
    """scipy csgraph.dijkstra on the changed costs (closed edges are +inf: never relaxed)."""
    return np.atleast_2d(dijkstra(graph.csr(costs), directed=True, indices=origins))


def _errors(doc, graph) -> list[str]:
    with pytest.raises(TrafficDocumentError) as info:
        parse_document(doc, graph, now=NOW)
    return info.value.problems


# --------------------------------------------------------------------------------------------
# Documents: every bad update gets a precise error


@pytest.mark.parametrize(
    ("update", "expected"),
    [
        ({"factor": 2}, "needs exactly one selection (got none)"),
        ({"from_node": 0, "to_node": 1}, "needs exactly one change (got none)"),
        ({"from_node": 0, "to_node": 1, "factor": 2, "closed": True}, "got factor, closed"),
        ({"from_node": 0, "factor": 2}, "to_node is missing"),
        (
            {"from_node": 0, "to_node": 99, "factor": 2},
            "updates[0].to_node: must be a node index in 0..9",
        ),
        ({"from_node": 0, "to_node": 3, "factor": 2}, "there is no edge from node 0 to node 3"),
        ({"from_node": 0, "to_node": 1, "factor": 0}, "updates[0].factor: must be a number > 0"),
        ({"from_node": 0, "to_node": 1, "factor": "2"}, 'got "2"'),
        ({"from_node": 0, "to_node": 1, "factor": True}, "updates[0].factor"),
        (
            {"from_node": 0, "to_node": 1, "speed_kph": 301},
            "updates[0].speed_kph: must be a number > 0 and <= 300",
        ),
        ({"from_node": 0, "to_node": 1, "travel_time_s": -1}, "updates[0].travel_time_s"),
        ({"from_node": 0, "to_node": 1, "closed": False}, "only true is allowed"),
        ({"from_node": 0, "to_node": 1, "factor": 0.001}, "no edge may be faster than 300 km/h"),
        ({"from_node": 0, "to_node": 1, "factor": 2, "expires_at": "tomorrow"}, "RFC 3339"),
        (
            {"from_node": 0, "to_node": 1, "factor": 2, "expires_at": "2030-01-01T00:00:00"},
            "RFC 3339",
        ),
        (
            {"from_node": 0, "to_node": 1, "factor": 2, "expires_at": "2020-01-01T00:00:00Z"},
            "not in the future",
        ),
        ({"from_node": 0, "to_node": 1, "factor": 2, "expires_in_s": 0}, "expires_in_s: must be"),
        (
            {
                "from_node": 0,
                "to_node": 1,
                "factor": 2,
                "expires_in_s": 5,
                "expires_at": "2040-01-01T00:00:00Z",
            },
            "not both",
        ),
        ({"from_node": 0, "to_node": 1, "factor": 2, "speed": 3}, "unknown key(s) ['speed']"),
        ({"osm_way": 5, "factor": 2}, "carries no OSM way ids"),
        ({"osm_way": -5, "factor": 2}, "positive OpenStreetMap way id"),
        (
            {"area": {"type": "Point", "coordinates": [7, 45]}, "factor": 2},
            "must be a GeoJSON Polygon",
        ),
        (
            {
                "area": {
                    "type": "Polygon",
                    "coordinates": [[[7, 45], [8, 45], [8, 46], [7, 45.5]]],
                },
                "factor": 2,
            },
            "must end where it starts",
        ),
        (
            {
                "area": {"type": "Polygon", "coordinates": [[[7, 45], [8, 45], [7, 45]]]},
                "factor": 2,
            },
            "at least 4 positions",
        ),
        (
            {
                "area": {"type": "Polygon", "coordinates": [[[7, 95], [8, 45], [8, 46], [7, 95]]]},
                "factor": 2,
            },
            "a position is [lon, lat]",
        ),
        (
            {
                "area": {"type": "Polygon", "coordinates": [[[0, 0], [1, 0], [1, 1], [0, 0]]]},
                "factor": 2,
            },
            "no edge has both ends inside",
        ),
        (
            {"along": {"type": "LineString", "coordinates": [[7, 45], [7.02, 45]]}, "factor": 2},
            "needs a buffer",
        ),
        (
            {
                "along": {"type": "LineString", "coordinates": [[7, 45]]},
                "buffer_m": 10,
                "factor": 2,
            },
            "at least 2 positions",
        ),
        (
            {
                "along": {"type": "LineString", "coordinates": [[7, 45], [7.02, 45]]},
                "buffer_m": 10,
                "direction": "up",
                "factor": 2,
            },
            "direction: must be one of both, forward, backward",
        ),
        (
            {"from_node": 0, "to_node": 1, "buffer_m": 5, "factor": 2},
            "buffer_m: only used with 'along'",
        ),
        ({"from_node": 0, "to_node": 1, "factor": 2, "label": 7}, "label: must be a string"),
    ],
)
def test_bad_updates_get_precise_errors(tiny_graph, update, expected) -> None:
    """Each malformed update is refused with a message naming the update, the field and what
    is allowed (RFC 3339 date-times, RFC 7946 geometries, the documented ranges)."""
    problems = _errors({"updates": [update]}, tiny_graph)
    assert any(expected in p for p in problems), problems
    assert all(p.startswith("updates[0]") for p in problems), problems


def test_document_level_errors_and_all_problems_at_once(tiny_graph) -> None:
    """Every problem of a document is reported in one error, each with its update index."""
    assert "must be a JSON object" in _errors([], tiny_graph)[0]
    assert "'updates' must be a list" in " ".join(_errors({"updates": 3}, tiny_graph))
    assert "is empty" in " ".join(_errors({"updates": []}, tiny_graph))
    assert "unknown top-level key" in " ".join(_errors({"updates": [], "x": 1}, tiny_graph))
    doc = {
        "updates": [
            {"from_node": 0, "to_node": 1, "factor": 2},  # fine
            {"from_node": 0, "to_node": 1, "factor": -1},
            {"from_node": 0, "to_node": 1},
        ]
    }
    problems = _errors(doc, tiny_graph)
    assert [p.split(":")[0].split(".")[0] for p in problems] == ["updates[1]", "updates[2]"]
    with pytest.raises(TrafficDocumentError, match=r"traffic document refused: updates\[1\]"):
        parse_document(doc, tiny_graph, now=NOW)


def test_rfc3339_round_trip() -> None:
    """RFC 3339 section 5.6: 'Z' and numeric offsets; a time zone is required."""
    assert parse_rfc3339("2033-05-18T03:33:20Z") == NOW
    assert parse_rfc3339("2033-05-18T05:33:20+02:00") == NOW
    assert parse_rfc3339("2033-05-18t03:33:20.500z") == NOW + 0.5
    assert rfc3339(NOW) == "2033-05-18T03:33:20.000Z"
    for bad in ("2033-05-18", "2033-05-18T03:33:20", "18/05/2033 03:33", 5):
        with pytest.raises(ValueError):
            parse_rfc3339(bad)  # type: ignore[arg-type]


def test_expires_in_s_becomes_an_absolute_time(tiny_graph) -> None:
    (u,) = parse_document(
        {"updates": [{"from_node": 0, "to_node": 1, "factor": 2, "expires_in_s": 90}]},
        tiny_graph,
        now=NOW,
    )
    assert u.expires_at == NOW + 90
    assert u.spec["expires_at"] == "2033-05-18T03:34:50.000Z" and "expires_in_s" not in u.spec


# --------------------------------------------------------------------------------------------
# Selections


def test_node_pair_selects_every_parallel_edge_one_direction(tiny_graph) -> None:
    """conftest's hand-checked fact: 0 -> 1 has two parallel edges (primary and service)."""
    (u,) = parse_document({"updates": [{"from_node": 0, "to_node": 1, "closed": True}]}, tiny_graph)
    g = tiny_graph
    assert len(u.edges) == 2
    assert set(g.tail[u.edges]) == {0} and set(g.head[u.edges]) == {1}


def _graph_with_ways():
    """A 3x3 grid whose rows are OSM ways 101..103 and columns 201..203 (both directions)."""
    g0 = grid_graph(3, seed=1)
    tail, head = np.asarray(g0.tail), np.asarray(g0.head)
    lat, lon = np.asarray(g0.lat), np.asarray(g0.lon)
    ways = []
    for t, h in zip(tail, head, strict=True):
        same_row = abs(lat[t] - lat[h]) < abs(lon[t] - lon[h])
        row_rank = np.argsort(np.argsort(lat))[t] // 3
        col_rank = np.argsort(np.argsort(lon))[t] // 3
        ways.append(101 + row_rank if same_row else 201 + col_rank)
    m = tail.shape[0]
    g = build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(g0.n_nodes, dtype=np.int64),
        tail=tail,
        head=head,
        length_m=np.asarray(g0.length_m),
        speed_kph=np.asarray(g0.speed_kph),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        way_indptr=np.arange(m + 1, dtype=np.int64),
        way_id=np.array(ways, dtype=np.int64),
    )
    return g


def test_osm_way_selects_exactly_the_edges_along_the_way() -> None:
    """Against a brute-force scan of ``graph.edge_ways(e)`` for every edge."""
    g = _graph_with_ways()
    for way in np.unique(np.asarray(g.way_id)):
        (u,) = parse_document({"updates": [{"osm_way": int(way), "factor": 2}]}, g)
        expected = [e for e in range(g.n_edges) if int(way) in g.edge_ways(e)]
        assert u.edges.tolist() == expected
    problems = _errors({"updates": [{"osm_way": 999, "factor": 2}]}, g)
    assert "no edge of the graph runs along OSM way 999" in problems[0]
    problems = _errors({"updates": [{"osm_way": 101, "direction": "forward", "factor": 2}]}, g)
    assert "only 'both' is possible with osm_way" in problems[0]


def test_area_selection_matches_shapely() -> None:
    """Edges with both ends inside a polygon with a hole: shapely ``Polygon.contains``."""
    shapely = pytest.importorskip("shapely")
    from shapely.geometry import Point, Polygon

    g = random_graph(800, 3000, seed=3, span_deg=0.05)
    outer = [[11.005, 48.005], [11.045, 48.01], [11.04, 48.045], [11.01, 48.04], [11.005, 48.005]]
    hole = [[11.02, 48.02], [11.03, 48.02], [11.03, 48.03], [11.02, 48.03], [11.02, 48.02]]
    (u,) = parse_document(
        {"updates": [{"area": {"type": "Polygon", "coordinates": [outer, hole]}, "factor": 1.5}]},
        g,
    )
    poly = Polygon(outer, [hole])
    inside = np.array([poly.contains(Point(x, y)) for x, y in zip(g.lon, g.lat, strict=True)])
    expected = np.flatnonzero(inside[np.asarray(g.tail)] & inside[np.asarray(g.head)])
    assert shapely is not None
    assert u.edges.tolist() == expected.tolist()


def test_along_selection_matches_shapely_distance_and_direction() -> None:
    """Edges whose geometry lies within buffer_m of a line (shapely ``distance`` in the same
    local metric plane), and ``direction`` by the sign of the edge along the line."""
    pytest.importorskip("shapely")
    from shapely.geometry import LineString, Point

    g = grid_graph(30, seed=4, spacing_deg=0.0005)
    lat0, lon0 = float(np.mean(g.lat)), float(np.mean(g.lon))
    line = [[11.0, 48.004], [11.006, 48.0075], [11.014, 48.0075]]
    buf = 40.0
    k = math.pi * 6_371_009.0 / 180.0
    arr = np.array(line)
    lat_c, lon_c = float(arr[:, 1].mean()), float(arr[:, 0].mean())
    cos0 = math.cos(math.radians(lat_c))

    def xy(lat, lon):
        return (lon - lon_c) * k * cos0, (lat - lat_c) * k

    shape = LineString([xy(p[1], p[0]) for p in line])
    dist = np.array([shape.distance(Point(*xy(a, b))) for a, b in zip(g.lat, g.lon, strict=True)])
    tail, head = np.asarray(g.tail), np.asarray(g.head)
    (u,) = parse_document(
        {
            "updates": [
                {"along": {"type": "LineString", "coordinates": line}, "buffer_m": buf, "factor": 2}
            ]
        },
        g,
    )
    chosen = set(u.edges.tolist())
    worst = np.maximum(dist[tail], dist[head])
    # away from the buffer's edge (rounding of the two projections), the sets agree exactly
    clear_in = set(np.flatnonzero(worst < buf * 0.99).tolist())
    clear_out = set(np.flatnonzero(worst > buf * 1.01).tolist())
    assert clear_in <= chosen and not (chosen & clear_out)
    assert lat0 and lon0
    line = [[11.0, 48.0075], [11.014, 48.0075]]  # straight west to east for the direction
    chosen = set(
        parse_document(
            {
                "updates": [
                    {
                        "along": {"type": "LineString", "coordinates": line},
                        "buffer_m": buf,
                        "factor": 2,
                    }
                ]
            },
            g,
        )[0].edges.tolist()
    )
    fwd = parse_document(
        {
            "updates": [
                {
                    "along": {"type": "LineString", "coordinates": line},
                    "buffer_m": buf,
                    "direction": "forward",
                    "factor": 2,
                }
            ]
        },
        g,
    )[0]
    back = parse_document(
        {
            "updates": [
                {
                    "along": {"type": "LineString", "coordinates": line},
                    "buffer_m": buf,
                    "direction": "backward",
                    "factor": 2,
                }
            ]
        },
        g,
    )[0]
    assert set(fwd.edges.tolist()) | set(back.edges.tolist()) <= chosen
    assert not set(fwd.edges.tolist()) & set(back.edges.tolist())
    # the line runs west to east: forward edges head east (lon grows), backward edges west
    assert np.all(np.asarray(g.lon)[head[fwd.edges]] > np.asarray(g.lon)[tail[fwd.edges]])
    assert np.all(np.asarray(g.lon)[head[back.edges]] < np.asarray(g.lon)[tail[back.edges]])


# --------------------------------------------------------------------------------------------
# Cost versions


def test_later_updates_win_and_factor_multiplies_the_base(tiny_graph) -> None:
    g = tiny_graph
    doc = {
        "updates": [
            {"from_node": 0, "to_node": 1, "factor": 3},
            {"from_node": 0, "to_node": 1, "factor": 2},  # later in the batch: wins
            {"from_node": 1, "to_node": 2, "speed_kph": 30},
        ]
    }
    layer = CostLayer(g, refine="off")
    v1 = layer.apply(parse_document(doc, g, now=NOW), at=NOW)
    e01 = [e for e in range(g.n_edges) if g.tail[e] == 0 and g.head[e] == 1]
    e12 = [e for e in range(g.n_edges) if g.tail[e] == 1 and g.head[e] == 2]
    assert np.allclose(v1.travel_time_s[e01], 2 * g.travel_time_s[e01])
    assert np.allclose(v1.travel_time_s[e12], g.length_m[e12] / (30 / 3.6))
    v2 = layer.apply(
        parse_document({"updates": [{"from_node": 0, "to_node": 1, "closed": True}]}, g), at=NOW
    )
    assert v2.version == 2 and np.all(np.isinf(v2.travel_time_s[e01]))
    assert v1.travel_time_s[e01[0]] == 2 * g.travel_time_s[e01[0]]  # v1 is a snapshot
    assert not v2.travel_time_s.flags.writeable
    assert v2.updates_by_kind == {"factor": 2, "speed_kph": 1, "travel_time_s": 0, "closed": 1}
    v3 = layer.clear(at=NOW)
    assert v3.version == 3 and np.array_equal(v3.travel_time_s, g.travel_time_s)
    with pytest.raises(ValueError, match="not after the current version 3"):
        layer.clear(version=3)


def test_expiry_stops_an_update_and_makes_a_new_version(tiny_graph) -> None:
    g = tiny_graph
    layer = CostLayer(g, refine="off")
    doc = {
        "updates": [
            {"from_node": 0, "to_node": 1, "closed": True, "expires_in_s": 60},
            {"from_node": 1, "to_node": 2, "factor": 2},
        ]
    }
    v1 = layer.apply(parse_document(doc, g, now=NOW), at=NOW)
    assert v1.next_expiry == NOW + 60 and v1.edges_closed == 2
    assert layer.expire(at=NOW + 59) is None
    v2 = layer.expire(at=NOW + 60)
    assert v2 is not None and v2.version == 2 and v2.edges_closed == 0
    assert v2.next_expiry is None and len(v2.active) == 1
    # an apply after the expiry time drops the expired update too (same rule)
    layer2 = CostLayer(g, refine="off")
    layer2.apply(parse_document(doc, g, now=NOW), at=NOW)
    v = layer2.apply(
        parse_document({"updates": [{"from_node": 2, "to_node": 3, "factor": 2}]}, g), at=NOW + 61
    )
    assert v.edges_closed == 0 and len(v.active) == 2


def test_max_speed_and_slack_follow_the_proof(tiny_graph) -> None:
    """max_speed_mps = max length / time; R = sum of max(0, base - new) (module docstring)."""
    g = tiny_graph
    layer = CostLayer(g, refine="off")
    v = layer.apply(
        parse_document(
            {
                "updates": [
                    {"from_node": 0, "to_node": 1, "speed_kph": 200},
                    {"from_node": 2, "to_node": 3, "factor": 0.5},
                    {"from_node": 5, "to_node": 4, "closed": True},
                ]
            },
            g,
        )
    )
    c = v.travel_time_s
    finite = np.isfinite(c) & (np.asarray(g.length_m) > 0)
    assert v.max_speed_mps == pytest.approx(float(np.max(g.length_m[finite] / c[finite])))
    assert v.max_speed_mps * 3.6 == pytest.approx(200.0)
    expected_r = float(
        np.sum(np.maximum(0.0, g.travel_time_s - np.where(np.isinf(c), g.travel_time_s, c)))
    )
    assert v.landmark_slack_extra_s == pytest.approx(expected_r)
    assert v.bound_quality == "weakened" and "lowered by" in v.bound_note
    assert "top speed rose" in v.bound_note
    assert v.edges_faster == 3  # two parallel 0 -> 1 edges and 2 -> 3


def _searches_agree_with_dijkstra(graph, planner, version, pairs_rng, n_origins=4, n_dest=6):
    """Optimal answers equal scipy on the changed costs, every bound <= the optimum, routes
    use open edges only, unreachable pairs are no_route (without expansions when the version
    carries SCC labels or the landmarks prove it)."""
    origins = pairs_rng.integers(0, graph.n_nodes, n_origins)
    dist = _optimum(graph, version.travel_time_s, origins)
    costs = version.travel_time_s
    for i, s in enumerate(origins):
        for t in pairs_rng.integers(0, graph.n_nodes, n_dest):
            opt = float(dist[i, t])
            exact = plan(planner, int(s), int(t), controller="fixed:1", costs=version)
            if not math.isfinite(opt):
                assert exact.status == "no_route" and exact.route is None
                if version.component is not None or version.edges_closed == 0:
                    assert exact.expansions == 0
                continue
            assert exact.status == "optimal"
            assert exact.cost_s == pytest.approx(opt, rel=1e-9, abs=1e-9)
            assert np.all(np.isfinite(costs[exact.route_edges]))
            assert float(np.sum(costs[exact.route_edges])) == pytest.approx(exact.cost_s, rel=1e-12)
            for controller, budget in (("fixed:3", 25), ("ana", 40), ("decreasing", 15)):
                res = plan(
                    planner,
                    int(s),
                    int(t),
                    controller=controller,
                    budget_expansions=budget,
                    steps=3,
                    costs=version,
                )
                assert res.lower_bound_s is not None
                assert res.lower_bound_s <= opt * (1 + 1e-9) + 1e-9, (
                    controller,
                    res.lower_bound_s,
                    opt,
                )
                for imp in res.improvements:
                    assert imp.lower_bound_s <= opt * (1 + 1e-9) + 1e-9
                    assert imp.cost_s >= opt * (1 - 1e-9) - 1e-9
                if res.route_edges is not None:
                    assert np.all(np.isfinite(costs[res.route_edges]))


_OPS = st.lists(
    st.tuples(
        st.sampled_from(["slow", "fast", "close", "area", "time", "expire", "clear"]),
        st.integers(0, 10**6),
        st.floats(0.4, 3.0),
        st.sampled_from([None, 30.0, 120.0]),
    ),
    min_size=1,
    max_size=7,
)


def _op_update(graph, rng_val, factor, expires, kind):
    tail, head = np.asarray(graph.tail), np.asarray(graph.head)
    e = rng_val % graph.n_edges
    upd: dict = {"from_node": int(tail[e]), "to_node": int(head[e])}
    if kind == "slow":
        upd["factor"] = 1.0 + factor
    elif kind == "fast":
        upd["factor"] = max(min(factor, 0.99), 0.45)  # random graphs top out at 110 km/h
    elif kind == "close":
        upd["closed"] = True
    else:
        v = rng_val % graph.n_nodes
        lat, lon = float(graph.lat[v]), float(graph.lon[v])
        d = 0.004
        ring = [
            [lon - d, lat - d],
            [lon + d, lat - d],
            [lon + d, lat + d],
            [lon - d, lat + d],
            [lon - d, lat - d],
        ]
        upd = {"area": {"type": "Polygon", "coordinates": [ring]}, "factor": max(factor, 0.5)}
    if expires is not None:
        upd["expires_in_s"] = expires
    return upd


def _run_sequence(graph, planner, landmarks, ops, refine, seed):
    layer = CostLayer(graph, landmarks, refine=refine)
    now = NOW
    rng = np.random.default_rng(seed)
    try:
        for kind, val, factor, expires in ops:
            if kind == "time":
                now += 45.0
                continue
            if kind == "expire":
                layer.expire(at=now)
            elif kind == "clear":
                layer.clear(at=now)
            else:
                upd = _op_update(graph, val, factor, expires, kind)
                try:
                    ups = parse_document({"updates": [upd]}, graph, now=now)
                except TrafficDocumentError:
                    continue  # e.g. an area with no edge inside: refused, nothing applied
                layer.apply(ups, at=now)
            version = layer.current
            assert version.version >= 0
            _searches_agree_with_dijkstra(graph, planner, version, rng)
    finally:
        layer.close()


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ops=_OPS, seed=st.integers(0, 2**16), refine=st.sampled_from(["off", "sync"]))
def test_random_update_sequences_on_random_graphs(ops, seed, refine) -> None:
    """Random slowdowns, speed-ups, closures, areas and expiries on a random geometric graph
    with ALT landmarks: every version's answers agree with scipy ``csgraph.dijkstra`` and every
    bound stays below the optimum (admissibility, module docstring of planner.traffic)."""
    g = random_graph(70, 260, seed=seed % 7, detour=0.4, span_deg=0.03)
    lm = build_landmarks(g, count=4, progress=False)
    _run_sequence(g, Planner(g, landmarks=lm), lm, ops, refine, seed)


@pytest.fixture(scope="module")
def demo_tiny():
    from dueroute.demo_data.build import demo_graph_path
    from dueroute.planner.graph import load_graph
    from dueroute.planner.heuristics import load_or_build_landmarks

    g = load_graph(demo_graph_path("tiny"))
    lm = load_or_build_landmarks(g, progress=False)
    return g, lm, Planner(g, landmarks=lm)


@settings(
    max_examples=12,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(ops=_OPS, seed=st.integers(0, 2**16), refine=st.sampled_from(["off", "sync"]))
def test_random_update_sequences_on_the_tiny_demo_region(demo_tiny, ops, seed, refine) -> None:
    """The same checks on the tiny demo region (osmnx import, 16 landmarks)."""
    g, lm, planner = demo_tiny
    _run_sequence(g, planner, lm, ops, refine, seed)


def test_scenarios_on_the_tiny_demo_region(demo_tiny) -> None:
    """sample_scenario documents (many slowdowns, speed-ups, closures, areas) at once."""
    g, lm, planner = demo_tiny
    for seed in range(3):
        rng = np.random.default_rng(seed)
        doc = sample_scenario(g, rng, slowdowns=200, speedups=30, closures=40, areas=3)
        version = costs_from_document(g, doc, lm, now=NOW)
        assert version.edges_closed > 0 and version.component is not None
        _searches_agree_with_dijkstra(g, planner, version, rng, n_origins=3, n_dest=8)


def test_without_the_extra_slack_speed_ups_break_the_landmark_bound(demo_tiny) -> None:
    """Negative control: the same speed-ups with R set to 0 give a 'bound' above scipy's
    optimum for some query, so the slack (not luck) keeps the bounds proven."""
    g, lm, planner = demo_tiny
    rng = np.random.default_rng(5)
    m = g.n_edges
    picks = rng.choice(m, 400, replace=False)
    ups = []
    for e in picks:
        lo, hi = g.indptr[g.tail[e]], g.indptr[g.tail[e] + 1]
        par = lo + np.flatnonzero(np.asarray(g.head[lo:hi]) == g.head[e])
        top = float(np.max(g.speed_kph[par]))
        ups.append(
            {
                "from_node": int(g.tail[e]),
                "to_node": int(g.head[e]),
                "factor": max(0.3, top / MAX_SPEED_KPH * 1.01),
            }
        )
    layer = CostLayer(g, lm, refine="off")
    v = layer.apply(parse_document({"updates": ups}, g))
    assert v.landmark_slack_extra_s > 0
    broken = dataclasses.replace(v, landmark_slack_extra_s=0.0)
    origins = rng.integers(0, g.n_nodes, 6)
    dist = _optimum(g, v.travel_time_s, origins)
    worst_ok, worst_broken = 0.0, 0.0
    for i, s in enumerate(origins):
        for t in rng.integers(0, g.n_nodes, 10):
            if not math.isfinite(dist[i, t]) or s == t:
                continue
            for version, store in ((v, "ok"), (broken, "broken")):
                res = plan(
                    planner,
                    int(s),
                    int(t),
                    controller="fixed:1",
                    budget_expansions=1,
                    steps=1,
                    costs=version,
                )
                ratio = res.lower_bound_s / dist[i, t]
                if store == "ok":
                    worst_ok = max(worst_ok, ratio)
                else:
                    worst_broken = max(worst_broken, ratio)
    assert worst_ok <= 1 + 1e-9
    assert worst_broken > 1.0


def test_closure_that_disconnects_gives_no_route_at_once(tiny_graph) -> None:
    """conftest: node 9 is entered only by the one-way 6 -> 9. Closing it cuts every path
    into 9 (scipy agrees); with the version's SCC labels the search ends before expanding."""
    g = tiny_graph
    planner = Planner(g)
    doc = {"updates": [{"from_node": 6, "to_node": 9, "closed": True}]}
    off = costs_from_document(g, doc, refine="off")
    assert off.component is None
    slow = plan(planner, 0, 9, controller="fixed:1", costs=off)
    assert slow.status == "no_route" and slow.expansions > 0
    v = costs_from_document(g, doc)
    assert v.component is not None and not v.may_reach(0, 9) and v.may_reach(0, 3)
    assert math.isinf(_optimum(g, v.travel_time_s, [0])[0, 9])
    res = plan(planner, 0, 9, controller="fixed:1", costs=v)
    assert res.status == "no_route" and res.expansions == 0


def test_background_refinement_keeps_the_version_and_attaches_labels(demo_tiny) -> None:
    g, lm, planner = demo_tiny
    layer = CostLayer(g, lm, refine="background")
    try:
        rng = np.random.default_rng(9)
        doc = sample_scenario(g, rng, slowdowns=10, speedups=60, closures=20, areas=0)
        v = layer.apply(parse_document(doc, g))
        assert v.refining and v.component is None
        assert layer.wait_refined(timeout=60)
        cur = layer.current
        assert cur.version == v.version and cur.travel_time_s is v.travel_time_s
        assert cur.component is not None and not cur.refining
        assert cur.landmark_basis == v.version and cur.landmark_slack_extra_s == 0.0
        assert cur.bound_quality in ("full", "weakened")
        _searches_agree_with_dijkstra(g, planner, cur, rng, n_origins=2, n_dest=6)
        # a later slowdown keeps the rebuilt landmarks (costs only went up from their basis)
        v2 = layer.apply(
            parse_document(
                {
                    "updates": [
                        {"from_node": int(g.tail[0]), "to_node": int(g.head[0]), "factor": 2}
                    ]
                },
                g,
            )
        )
        assert v2.landmark_basis == v.version and v2.landmark_slack_extra_s == 0.0
    finally:
        layer.close()


def test_rebuilt_landmarks_are_not_used_once_a_closure_they_saw_reopens(demo_tiny) -> None:
    """Landmarks built with an edge closed say 'unreachable' where the reopened edge gives a
    path; the layer must fall back to the base landmarks (with their slack) then."""
    g, lm, planner = demo_tiny
    rng = np.random.default_rng(11)
    doc = sample_scenario(g, rng, slowdowns=0, speedups=80, closures=0, areas=0)
    doc["updates"] += [
        {"from_node": int(g.tail[e]), "to_node": int(g.head[e]), "closed": True, "expires_in_s": 10}
        for e in rng.choice(g.n_edges, 30, replace=False)
    ]
    layer = CostLayer(g, lm, refine="sync")
    v1 = layer.apply(parse_document(doc, g, now=NOW), at=NOW)
    assert v1.landmark_basis == 1
    v2 = layer.expire(at=NOW + 11)
    assert v2 is not None and v2.edges_closed == 0 and v2.landmark_basis in (0, 2)
    _searches_agree_with_dijkstra(g, planner, v2, rng, n_origins=2, n_dest=6)


def test_sample_scenario_is_a_valid_document(tiny_graph) -> None:
    doc = sample_scenario(
        tiny_graph, np.random.default_rng(0), slowdowns=5, speedups=2, closures=2, areas=1
    )
    ups = parse_document(doc, tiny_graph)
    assert {u.change for u in ups} <= {"factor", "closed"}
    kinds = [u.change for u in ups]
    assert kinds.count("closed") == 2


def test_great_circle_sanity_of_the_local_plane() -> None:
    """The along selection's local plane agrees with the haversine (as osmnx) to 0.5 % for
    city-sized offsets at mid latitudes (common practice: equirectangular is fine at < 50 km)."""
    from dueroute.planner.traffic import _Plane

    plane = _Plane(47.2, -31.0)
    for dlat, dlon in ((0.01, 0.0), (0.0, 0.02), (0.05, -0.05)):
        x, y = plane.xy(np.array([47.2 + dlat]), np.array([-31.0 + dlon]))
        planar = float(np.hypot(x, y)[0])
        exact = float(great_circle_m(47.2, -31.0, 47.2 + dlat, -31.0 + dlon))
        assert planar == pytest.approx(exact, rel=5e-3)


def test_batch_merge_equals_applying_updates_one_by_one(demo_tiny) -> None:
    """The vectorised merge of a batch (later wins) gives exactly the costs of writing the
    updates one after the other in plain Python."""
    from dueroute.planner.traffic import Batch

    g, _, _ = demo_tiny
    rng = np.random.default_rng(2)
    doc = sample_scenario(g, rng, slowdowns=300, speedups=50, closures=50, areas=4)
    tail, head = np.asarray(g.tail), np.asarray(g.head)
    for e in rng.choice(g.n_edges, 100):  # the same pairs again: overlaps the later one wins
        doc["updates"].append({"from_node": int(tail[e]), "to_node": int(head[e]), "factor": 2.5})
    ups = parse_document(doc, g)
    expected = np.array(g.travel_time_s, dtype=np.float64)
    for u in ups:
        for e, c in zip(u.edges.tolist(), u.costs.tolist(), strict=True):
            expected[e] = c
    layer = CostLayer(g, refine="off")
    v = layer.apply(Batch(ups))
    assert np.array_equal(v.travel_time_s, expected)
    v2 = CostLayer(g, refine="off").apply(ups)  # a plain list is prepared the same way
    assert np.array_equal(v2.travel_time_s, expected)
