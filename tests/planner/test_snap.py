"""Snapping to the nearest point on a road, against independent references.

* Brute force over every segment of every edge in numpy with the cross-track / along-track
  formulas of spherical navigation (Ed Williams, "Aviation Formulary"; right spherical
  triangle, Napier's rules) -- a different computation from the module's vector projection.
* geographiclib (Karney 2013): distances on the same sphere (flattening 0), where they must
  agree to the micrometre, and on the WGS84 ellipsoid, where the sphere may differ by at most
  its ratio to the ellipsoid's extreme radii of curvature (computed from geographiclib's
  WGS84 constants, about 0.56 %).
"""

from __future__ import annotations

import gc
import math
import weakref

import numpy as np
import pytest
from geographiclib.geodesic import Geodesic
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.graph import EARTH_RADIUS_M, RoadGraph, build_graph
from dueroute.planner.snap import RoadSnap, RoadSnapper, road_snapper, snap_to_road
from tests.conftest import make_tiny_graph

SPHERE = Geodesic(EARTH_RADIUS_M, 0.0)
WGS84 = Geodesic.WGS84

#: Spherical vs ellipsoidal distance: the local scale of the ellipsoid lies between its
#: smallest radius of curvature (meridional, equator: a (1 - e^2)) and its largest (polar:
#: a / sqrt(1 - e^2)).
_E2 = WGS84.f * (2 - WGS84.f)
SPHERE_VS_ELLIPSOID = max(
    EARTH_RADIUS_M / (WGS84.a * (1 - _E2)) - 1, 1 - EARTH_RADIUS_M / (WGS84.a / math.sqrt(1 - _E2))
)


# ---------------------------------------------------------------------------------------------
# the brute-force reference


def _haversine_rad(lat1, lon1, lat2, lon2):
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    h = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * np.arcsin(np.sqrt(np.clip(h, 0, 1)))


def _bearing(lat1, lon1, lat2, lon2):
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    return np.arctan2(
        np.sin(dl) * np.cos(p2), np.cos(p1) * np.sin(p2) - np.sin(p1) * np.cos(p2) * np.cos(dl)
    )


def segments(g: RoadGraph) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Every segment of every edge, from RoadGraph.edge_coords: (edge, lat1, lon1, lat2, lon2)."""
    rows = []
    for e in range(g.n_edges):
        pts = g.edge_coords(e)
        rows += [(e, a[1], a[0], b[1], b[0]) for a, b in zip(pts[:-1], pts[1:], strict=True)]
    arr = np.array(rows, dtype=np.float64).reshape(-1, 5)
    return arr[:, 0].astype(np.int64), arr[:, 1], arr[:, 2], arr[:, 3], arr[:, 4]


def brute_distances_m(g: RoadGraph, lat: float, lon: float) -> tuple[np.ndarray, np.ndarray]:
    """Distance from the point to every segment (Aviation Formulary cross-track distance where
    the foot of the perpendicular lies on the segment, else the nearer end)."""
    edge, la1, lo1, la2, lo2 = segments(g)
    d13 = _haversine_rad(la1, lo1, lat, lon)
    d23 = _haversine_rad(la2, lo2, lat, lon)
    d12 = _haversine_rad(la1, lo1, la2, lo2)
    dtheta = _bearing(la1, lo1, lat, lon) - _bearing(la1, lo1, la2, lo2)
    xt = np.arcsin(np.clip(np.sin(d13) * np.sin(dtheta), -1, 1))
    at = np.arctan2(np.sin(d13) * np.cos(dtheta), np.cos(d13))  # Napier: tan at = tan d13 cos
    inside = (at >= 0) & (at <= d12) & (d12 > 0)
    dist = np.where(inside, np.abs(xt), np.minimum(d13, d23))
    return edge, dist * EARTH_RADIUS_M


def random_graph(seed: int) -> RoadGraph:
    """Random roads over a few km: bends, very long straight segments (beyond the sample
    spacing), repeated points (zero-length segments), sub-metre segments, one-way and two-way
    roads."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 12))
    lat = 45.0 + rng.random(n) * 0.05
    lon = 7.0 + rng.random(n) * 0.05
    if rng.random() < 0.3:
        lat[0], lon[0] = 45.0 - 0.2, 7.0 - 0.2  # a 30 km road to somewhere
    tail, head, gptr, glat, glon = [], [], [0], [], []
    for _ in range(int(rng.integers(1, 16))):
        a, b = (int(x) for x in rng.integers(0, n, 2))
        if a == b:
            continue
        k = int(rng.integers(0, 4))
        pts = [
            (
                lat[a] + (lat[b] - lat[a]) * (j + 1) / (k + 1) + rng.normal(0, 2e-3),
                lon[a] + (lon[b] - lon[a]) * (j + 1) / (k + 1) + rng.normal(0, 2e-3),
            )
            for j in range(k)
        ]
        if pts and rng.random() < 0.2:
            pts.insert(0, pts[0])  # a repeated point
        if pts and rng.random() < 0.2:
            pts.insert(1, (pts[0][0] + 5e-6, pts[0][1] + 3e-6))  # a segment of 0.6 m
        directions = [(a, b, pts)]
        if rng.random() < 0.6:
            directions.append((b, a, pts[::-1]))
        for t, h, p in directions:
            tail.append(t)
            head.append(h)
            glat += [x[0] for x in p]
            glon += [x[1] for x in p]
            gptr.append(len(glat))
    if not tail:
        tail, head, gptr = [0], [1], [0, 0]
    m = len(tail)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(n),
        tail=np.array(tail),
        head=np.array(head),
        length_m=np.full(m, 1000.0),
        speed_kph=rng.choice([30.0, 50.0, 90.0], m),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.zeros(m, dtype=np.int8),
        geom_indptr=np.array(gptr),
        geom_lat=np.array(glat),
        geom_lon=np.array(glon),
    )


def check_snap(g: RoadGraph, snap: RoadSnap, lat: float, lon: float) -> None:
    """One snap against the brute force and geographiclib."""
    edge, dist = brute_distances_m(g, lat, lon)
    best = float(dist.min())
    assert snap.distance_m == pytest.approx(best, rel=1e-9, abs=1e-6)
    # the snapped edge holds a nearest segment
    assert float(dist[edge == snap.edge].min()) == pytest.approx(best, rel=1e-9, abs=1e-6)
    # the snapped point is that far (geographiclib, same sphere) and lies on the edge
    inv = SPHERE.Inverse(lat, lon, snap.lat, snap.lon)["s12"]
    assert inv == pytest.approx(snap.distance_m, rel=1e-9, abs=1e-6)
    _, on_edge = brute_distances_m(g, snap.lat, snap.lon)
    assert float(on_edge[edge == snap.edge].min()) < 1e-6
    # fraction by length along the polyline (geographiclib lengths on the sphere)
    pts = g.edge_coords(snap.edge)
    seg_len = [
        SPHERE.Inverse(a[1], a[0], b[1], b[0])["s12"]
        for a, b in zip(pts[:-1], pts[1:], strict=True)
    ]
    tail_pts = snap.coords_from_tail
    along = sum(
        SPHERE.Inverse(a[1], a[0], b[1], b[0])["s12"]
        for a, b in zip(tail_pts[:-1], tail_pts[1:], strict=True)
    )
    total = sum(seg_len)
    if total > 0:
        assert snap.fraction == pytest.approx(along / total, rel=1e-7, abs=1e-9)
    # both directions of a two-way road, one of a one-way road
    rev = [f for f in range(g.n_edges) if f == int(g.reverse_edge[snap.edge])]
    assert [s.edge for s in snap.sides] == [snap.edge, *rev]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**32 - 1),
    spacing=st.sampled_from([3.0, 50.0, 2000.0]),
    queries=st.lists(
        st.tuples(st.floats(-0.3, 0.35), st.floats(-0.3, 0.35)), min_size=1, max_size=8
    ),
)
def test_nearest_point_matches_brute_force(seed: int, spacing: float, queries) -> None:
    """Random roads and points near and far (hypothesis): the snapped distance equals the
    brute-force minimum over every segment (Aviation Formulary formulas), for any sample
    spacing of the index; the point is at that geographiclib distance and on the edge."""
    g = random_graph(seed)
    snapper = RoadSnapper(g, sample_spacing_m=spacing)
    for dlat, dlon in queries:
        lat, lon = 45.0 + dlat, 7.0 + dlon
        check_snap(g, snapper.snap(lat, lon, max_distance_m=math.inf), lat, lon)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), t=st.floats(0.0, 1.0))
def test_points_on_the_road_snap_onto_it(seed: int, t: float) -> None:
    """A point on a segment (geographiclib's geodesic, i.e. the great-circle arc) and every
    polyline vertex snap at distance ~0 (within 1e-6 m)."""
    g = random_graph(seed)
    snapper = RoadSnapper(g)
    edge, la1, lo1, la2, lo2 = segments(g)
    i = seed % edge.size
    line = SPHERE.InverseLine(la1[i], lo1[i], la2[i], lo2[i])
    p = line.Position(t * line.s13)
    assert snapper.snap(p["lat2"], p["lon2"]).distance_m < 1e-6
    for la, lo in zip(la1, lo1, strict=True):
        s = snapper.snap(float(la), float(lo))
        assert s.distance_m < 1e-6


# ---------------------------------------------------------------------------------------------
# a long road, both ways and one way


def long_road(two_way: bool) -> RoadGraph:
    """A 6.1 km straight road (no interior points) between two nodes, plus a short side road."""
    lat = np.array([45.0, 45.05, 45.02, 45.021])
    lon = np.array([7.0, 7.03, 7.03, 7.031])
    tail, head = [0, 2], [1, 3]
    if two_way:
        tail, head = [0, 1, 2], [1, 0, 3]
    m = len(tail)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(4),
        tail=np.array(tail),
        head=np.array(head),
        length_m=np.full(m, 6100.0),
        speed_kph=np.full(m, 61.0),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.zeros(m, dtype=np.int8),
        spatial_order=False,
    )


@pytest.mark.parametrize("two_way", [True, False])
def test_middle_of_a_long_edge(two_way: bool) -> None:
    """A point 4 m beside the middle of a 6 km road snaps within 1 m of the middle (computed
    with geographiclib on the sphere), for both directions of a two-way road and only the
    legal direction of a one-way; the partial routes start and end there."""
    g = long_road(two_way)
    line = SPHERE.InverseLine(45.0, 7.0, 45.05, 7.03)
    mid = line.Position(line.s13 / 2)
    beside = SPHERE.Direct(mid["lat2"], mid["lon2"], mid["azi2"] + 90.0, 4.0)
    snap = snap_to_road(g, beside["lat2"], beside["lon2"])
    assert snap.distance_m == pytest.approx(4.0, abs=1e-3)
    off = SPHERE.Inverse(snap.lat, snap.lon, mid["lat2"], mid["lon2"])["s12"]
    assert off < 1.0
    forward = next(e for e in range(g.n_edges) if g.tail[e] == 0)
    edges = [s.edge for s in snap.sides]
    if two_way:
        backward = next(e for e in range(g.n_edges) if g.tail[e] == 1)
        assert sorted(edges) == sorted([forward, backward])
    else:
        assert edges == [forward]
        assert snap.reverse_edge is None
    for side in snap.sides:
        assert side.fraction == pytest.approx(0.5, abs=1e-4)
        cost = float(g.travel_time_s[side.edge])
        assert side.cost_to_head_s + side.cost_from_tail_s == pytest.approx(cost)
        assert side.cost_to_head_s == pytest.approx(cost / 2, rel=1e-3)
        for pos in (side.coords_to_head[0], side.coords_from_tail[-1]):
            start = SPHERE.Inverse(pos[1], pos[0], mid["lat2"], mid["lon2"])["s12"]
            assert start < 1.0
        head = int(g.head[side.edge])
        tail = int(g.tail[side.edge])
        assert side.coords_to_head[-1] == (float(g.lon[head]), float(g.lat[head]))
        assert side.coords_from_tail[0] == (float(g.lon[tail]), float(g.lat[tail]))


def test_partial_polylines_join_to_the_edge(tiny_graph: RoadGraph) -> None:
    """On the hand-made graph (bent two-way street 1-4, bent one-way 6 -> 0): the two partial
    polylines, joined at the snapped point, are the edge's polyline with that point inserted;
    the reverse side holds the same lines backwards; lengths add up to the edge's length."""
    g = tiny_graph
    for lat, lon in ((45.005, 7.0121), (45.008, 6.9962), (45.0005, 7.005)):
        snap = snap_to_road(g, lat, lon)
        check_snap(g, snap, lat, lon)
        side = snap.sides[0]
        full = g.edge_coords(side.edge)
        joined = list(side.coords_from_tail) + list(side.coords_to_head[1:])
        assert [p for p in joined if p != (snap.lon, snap.lat)] == full
        assert side.length_from_tail_m + side.length_to_head_m == pytest.approx(
            float(g.length_m[side.edge]), rel=1e-9
        )
        if len(snap.sides) == 2:
            back = snap.sides[1]
            assert back.coords_from_tail == side.coords_to_head[::-1]
            assert back.coords_to_head == side.coords_from_tail[::-1]
            assert back.fraction == pytest.approx(1 - side.fraction)
            assert g.edge_coords(back.edge) == full[::-1]
    # the bent one-way 6 -> 0 has one side only
    one_way = snap_to_road(g, 45.008, 6.9962)
    assert one_way.reverse_edge is None
    assert (int(g.tail[one_way.edge]), int(g.head[one_way.edge])) == (6, 0)


def test_distances_against_geographiclib_wgs84() -> None:
    """Spherical snap distances are within the sphere-vs-WGS84 bound of geographiclib's
    ellipsoidal distance between the same two points (about 0.56 %)."""
    g = make_tiny_graph()
    rng = np.random.default_rng(4)
    for _ in range(50):
        lat, lon = 45.0 + rng.uniform(-0.01, 0.04), 7.0 + rng.uniform(-0.01, 0.05)
        snap = snap_to_road(g, lat, lon, max_distance_m=math.inf)
        ellipsoid = WGS84.Inverse(lat, lon, snap.lat, snap.lon)["s12"]
        assert snap.distance_m == pytest.approx(ellipsoid, rel=SPHERE_VS_ELLIPSOID, abs=1e-6)
    assert 0.005 < SPHERE_VS_ELLIPSOID < 0.006


def test_live_costs_scale_the_partial_costs() -> None:
    g = long_road(True)
    costs = g.travel_time_s * np.array([1.0, 3.0, 1.0])
    costs[2] = np.inf
    snap = snap_to_road(g, 45.01, 7.006, costs=costs)
    for side in snap.sides:
        assert side.cost_from_tail_s + side.cost_to_head_s == pytest.approx(costs[side.edge])
    closed = snap_to_road(g, 45.0205, 7.0305, costs=costs)  # on the closed side road
    assert closed.cost_from_tail_s == math.inf and closed.cost_to_head_s == math.inf
    assert closed.to_dict()["sides"][0]["cost_from_tail_s"] is None  # JSON has no inf
    at_tail = snap_to_road(g, 45.0, 7.0, costs=costs)  # exactly at a node: no 0 * inf = NaN
    assert at_tail.distance_m == 0.0 and min(at_tail.fraction, 1 - at_tail.fraction) == 0.0


# ---------------------------------------------------------------------------------------------
# refusals and bad input


def test_far_points_are_refused_naming_distance_and_limit() -> None:
    g = make_tiny_graph()
    far = SPHERE.Direct(45.0, 7.0, 225.0, 1234.0)  # 1,234 m south-west of node 0
    assert float(brute_distances_m(g, far["lat2"], far["lon2"])[1].min()) == pytest.approx(1234.0)
    with pytest.raises(NodeNotFound, match=r"is 1,234 m from the nearest road; the limit is 500 m"):
        snap_to_road(g, far["lat2"], far["lon2"])
    assert snap_to_road(g, far["lat2"], far["lon2"], 1300).distance_m == pytest.approx(1234.0)
    with pytest.raises(NodeNotFound, match="the limit is 20 m"):
        snap_to_road(g, far["lat2"], far["lon2"], max_distance_m=20)


@pytest.mark.parametrize(
    ("lat", "lon", "message"),
    [
        (91.0, 7.0, r"latitude must be a number in \[-90, 90\], got 91.0"),
        (float("nan"), 7.0, "latitude must be a number"),
        (45.0, -180.5, r"longitude must be a number in \[-180, 180\], got -180.5"),
        (45.0, float("inf"), "longitude must be a number"),
        ("45", 7.0, "latitude must be a number"),
        (45.0, True, "longitude must be a number"),
    ],
)
def test_bad_coordinates(lat, lon, message: str) -> None:
    with pytest.raises(InvalidRequest, match=message):
        snap_to_road(make_tiny_graph(), lat, lon)


def test_bad_limits_costs_and_empty_graphs() -> None:
    g = make_tiny_graph()
    for bad in (-1.0, float("nan"), "500", None):
        with pytest.raises(InvalidRequest, match="max_distance_m must be a distance >= 0"):
            snap_to_road(g, 45.0, 7.0, bad)  # type: ignore[arg-type]
    with pytest.raises(InvalidRequest, match="one entry per edge"):
        snap_to_road(g, 45.0, 7.0, costs=np.ones(2))
    with pytest.raises(InvalidRequest, match="sample_spacing_m must be"):
        RoadSnapper(g, sample_spacing_m=0.0)
    empty = build_graph(
        lat=np.array([45.0]),
        lon=np.array([7.0]),
        osm_id=np.array([1]),
        tail=np.zeros(0, dtype=np.int64),
        head=np.zeros(0, dtype=np.int64),
        length_m=np.zeros(0),
        speed_kph=np.zeros(0),
        road_class=np.zeros(0, dtype=np.int8),
        speed_source=np.zeros(0, dtype=np.int8),
    )
    with pytest.raises(NodeNotFound, match="no roads to snap to"):
        snap_to_road(empty, 45.0, 7.0)
    snap = snap_to_road(g, 45.005, 7.0121)
    with pytest.raises(InvalidRequest, match="does not pass through"):
        snap.side(-5)
    assert snap.side(snap.edge) is snap.sides[0]


def test_one_snapper_per_graph_released_with_it() -> None:
    g = make_tiny_graph()
    assert road_snapper(g) is road_snapper(g)
    ref = weakref.ref(g)
    del g
    gc.collect()
    assert ref() is None  # the cached snapper does not keep its graph alive


def test_node_snapping_still_works(tiny_graph: RoadGraph) -> None:
    """RoadGraph.snap (nearest node) is unchanged; a point 11 m from the primary road 0 -> 1
    but about 400 m from either end is refused by node snapping at 300 m, not by road
    snapping (distances: geographiclib on the sphere)."""
    lat, lon = 45.0001, 7.005
    assert tiny_graph.snap(lat, lon) in (0, 1)
    with pytest.raises(NodeNotFound, match="from the nearest road node; the limit is 300 m"):
        tiny_graph.snap(lat, lon, 300.0)
    road = snap_to_road(tiny_graph, lat, lon, 300.0)
    # (the great-circle road bulges about a centimetre north of latitude 45 mid-way)
    assert road.distance_m == pytest.approx(SPHERE.Inverse(lat, lon, 45.0, 7.005)["s12"], abs=0.05)
    assert road.distance_m < 12.0
    assert (int(tiny_graph.tail[road.edge]), int(tiny_graph.head[road.edge])) in ((0, 1), (1, 0))
