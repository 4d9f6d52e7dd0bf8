"""Snapping a point to the nearest point on a road, respecting one-way direction.

A road is an edge's polyline (tail, interior geometry points, head); each pair of consecutive
points is a *segment*, the great-circle arc between them on the sphere of radius
:data:`~dueroute.planner.graph.EARTH_RADIUS_M` (the sphere osmnx measures edge lengths on).
:meth:`RoadSnapper.snap` finds the point on any segment nearest to the query point by
great-circle distance -- exactly, not approximately -- and returns a :class:`RoadSnap`: the
snapped point, its distance, and for each legal direction of travel through it (the edge, and
its reverse edge when the road is two-way) the fraction along the edge, the partial costs to
its head and from its tail, and the partial polylines for the route geometry.

Exact nearest segment with a spatial index
------------------------------------------
Every segment is sampled at both ends and at equal angular steps of at most
``sample_spacing_m`` in between (spherical linear interpolation, so the samples lie on the
arc); a k-d tree (``scipy.spatial.cKDTree``) holds the samples as unit vectors. Any point of a
segment is then within ``sample_spacing_m / 2`` of one of its own samples. A query

1. takes the nearest sample and computes the exact distance ``d1`` to its segment (an upper
   bound on the distance ``d*`` to the nearest segment);
2. collects every segment with a sample within ``d1 + sample_spacing_m / 2`` (plus 1 mm for
   rounding). The nearest segment is among them: its nearest point lies within ``d*`` of the
   query, and one of its samples within ``sample_spacing_m / 2`` of that point, so within
   ``d* + sample_spacing_m / 2 <= d1 + sample_spacing_m / 2`` of the query (triangle
   inequality);
3. computes the exact distance to each candidate and keeps the smallest (ties: lowest edge id).

The ball in step 2 holds only samples at most ``sample_spacing_m / 2`` farther than the
nearest one, so a query touches a handful of segments, near the network or far from it.

Point to segment on the sphere: the query's projection onto the segment's great-circle plane,
normalised, is the nearest point of the whole circle; if it lies between the segment's ends it
is the nearest point of the segment, otherwise the nearer end is. Everything is computed from
differences of nearby unit vectors and angles from chords, accurate to nanometres even on
metre-long segments (see :func:`_nearest_on_arcs`).

Each road is indexed once: an edge and its reverse (same geometry backwards, see
:func:`~dueroute.planner.graph.reverse_edge_pairs`) share their segments, and the snap reports
both directions.
"""

from __future__ import annotations

import math
import threading
import weakref
from dataclasses import dataclass
from typing import Any

import numpy as np
from numba import njit
from scipy.spatial import cKDTree

from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.graph import (
    DEFAULT_SNAP_MAX_M,
    EARTH_RADIUS_M,
    RoadGraph,
    check_edge_costs,
    edge_polylines,
)

#: Default largest angular step between samples of a segment, in metres along the arc.
DEFAULT_SAMPLE_SPACING_M = 50.0

#: Added to the candidate radius to cover rounding in the samples' positions, metres.
_RADIUS_MARGIN_M = 1e-3

Position = tuple[float, float]  # GeoJSON order: (lon, lat)


@dataclass(frozen=True)
class SnapSide:
    """One legal direction of travel through the snapped point: a directed edge.

    Attributes
    ----------
    edge : int
        The road edge.
    fraction : float
        Position of the snapped point along the edge by length, 0 at its tail, 1 at its head.
    length_from_tail_m, length_to_head_m : float
        Length along the edge's polyline from the tail to the point and from it to the head.
    cost_from_tail_s, cost_to_head_s : float
        Partial edge costs, proportional to length: ``cost[edge] * fraction`` and
        ``cost[edge] * (1 - fraction)`` (a route ending here, one starting here).
    coords_from_tail, coords_to_head : tuple of (lon, lat)
        GeoJSON positions (RFC 7946 order) of the partial polylines: the edge's tail, its
        geometry up to the point, the point; and the point, the rest of the geometry, the head.
        Each has at least two positions.
    """

    edge: int
    fraction: float
    length_from_tail_m: float
    length_to_head_m: float
    cost_from_tail_s: float
    cost_to_head_s: float
    coords_from_tail: tuple[Position, ...]
    coords_to_head: tuple[Position, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "edge": self.edge,
            "fraction": self.fraction,
            "length_from_tail_m": self.length_from_tail_m,
            "length_to_head_m": self.length_to_head_m,
            "cost_from_tail_s": _json_num(self.cost_from_tail_s),
            "cost_to_head_s": _json_num(self.cost_to_head_s),
        }


@dataclass(frozen=True)
class RoadSnap:
    """The nearest point on a road to a query point (see the module docstring).

    Attributes
    ----------
    lat, lon : float
        The snapped point, WGS84 degrees.
    distance_m : float
        Great-circle distance from the query point to the snapped point (osmnx's sphere).
    query_lat, query_lon : float
        The point that was snapped.
    sides : tuple of SnapSide
        Each legal direction through the point: the edge, then its reverse edge if the road is
        two-way. A one-way road has one side.
    """

    lat: float
    lon: float
    distance_m: float
    query_lat: float
    query_lon: float
    sides: tuple[SnapSide, ...]

    @property
    def edge(self) -> int:
        """The edge the point lies on (``sides[0].edge``)."""
        return self.sides[0].edge

    @property
    def reverse_edge(self) -> int | None:
        """The same road the other way, or None for a one-way road."""
        return self.sides[1].edge if len(self.sides) > 1 else None

    @property
    def fraction(self) -> float:
        return self.sides[0].fraction

    @property
    def cost_to_head_s(self) -> float:
        return self.sides[0].cost_to_head_s

    @property
    def cost_from_tail_s(self) -> float:
        return self.sides[0].cost_from_tail_s

    @property
    def coords_to_head(self) -> tuple[Position, ...]:
        return self.sides[0].coords_to_head

    @property
    def coords_from_tail(self) -> tuple[Position, ...]:
        return self.sides[0].coords_from_tail

    def side(self, edge: int) -> SnapSide:
        """The side of ``edge`` (one of :attr:`sides`)."""
        for s in self.sides:
            if s.edge == edge:
                return s
        raise InvalidRequest(
            f"edge {edge!r} does not pass through this snapped point; its edges are "
            f"{[s.edge for s in self.sides]}"
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary: the snapped point, its distance, and the sides."""
        return {
            "lat": self.lat,
            "lon": self.lon,
            "distance_m": self.distance_m,
            "query": {"lat": self.query_lat, "lon": self.query_lon},
            "sides": [s.to_dict() for s in self.sides],
        }


def _json_num(x: float) -> float | None:
    return x if math.isfinite(x) else None


def unit_vectors(lat: Any, lon: Any) -> np.ndarray:
    """float64[k, 3]: points on the unit sphere for WGS84 degrees (spherical model)."""
    la, lo = np.radians(np.asarray(lat, dtype=np.float64)), np.radians(np.asarray(lon))
    cl = np.cos(la)
    return np.stack((cl * np.cos(lo), cl * np.sin(lo), np.sin(la)), axis=-1)


def _angle(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Angle between unit vectors (rows), radians, from their chord: accurate for tiny angles."""
    chord = np.linalg.norm(np.asarray(u) - np.asarray(v), axis=-1)
    return 2.0 * np.arcsin(np.minimum(1.0, 0.5 * chord))


@njit(cache=True, nogil=True)
def _angle3(ux, uy, uz, vx, vy, vz):
    dx, dy, dz = vx - ux, vy - uy, vz - uz
    return 2.0 * math.asin(min(1.0, 0.5 * math.sqrt(dx * dx + dy * dy + dz * dz)))


@njit(cache=True, nogil=True)
def _nearest_on_arcs(q, a, b, cand, out):
    """Index into ``cand`` of the arc ``a[s] -> b[s]`` nearest to ``q`` (ties: lowest ``s``).

    ``q`` float64[3]; ``a``, ``b`` float64[S, 3] unit vectors; ``cand`` int64[k] arc ids (may
    repeat). Writes ``out[:] = distance_rad, along_rad (from a), where (0 inside the arc,
    1 at a, 2 at b), px, py, pz`` of the nearest point; returns -1 when ``cand`` is empty.

    The query's projection onto the arc's great-circle plane, normalised, is the nearest
    point of the whole circle; if it lies between the ends (both cross-product signs agree
    with the plane's normal) it is the nearest point of the arc, otherwise the nearer end is.
    Precision: every quantity is built from differences of nearby unit vectors (exact in
    floating point for close points) -- the plane's normal as ``a x (b - a)``, the offset from
    it as ``(q - a) . n``, angles from chords -- so a metre-long segment keeps nanometre
    accuracy instead of losing it to the cancellation in ``a x b``.
    """
    qx, qy, qz = q[0], q[1], q[2]
    best = -1
    best_s = -1
    best_d = math.inf
    for i in range(cand.shape[0]):
        s = cand[i]
        ax, ay, az = a[s, 0], a[s, 1], a[s, 2]
        bx, by, bz = b[s, 0], b[s, 1], b[s, 2]
        dx, dy, dz = bx - ax, by - ay, bz - az
        nx = ay * dz - az * dy
        ny = az * dx - ax * dz
        nz = ax * dy - ay * dx
        nn = math.sqrt(nx * nx + ny * ny + nz * nz)
        inside = False
        px, py, pz = ax, ay, az
        if nn > 0.0:  # else a == b: the arc is a point
            hx, hy, hz = nx / nn, ny / nn, nz / nn
            off = (qx - ax) * hx + (qy - ay) * hy + (qz - az) * hz
            px, py, pz = qx - off * hx, qy - off * hy, qz - off * hz
            pn = math.sqrt(px * px + py * py + pz * pz)
            if pn > 0.0:  # else q is a pole of the circle: the ends are as near as any point
                px, py, pz = px / pn, py / pn, pz / pn
                # (a x p) . n >= 0 and (p x b) . n >= 0, with p - a and b - p for precision
                ex, ey, ez = px - ax, py - ay, pz - az
                c1 = (ay * ez - az * ey) * nx + (az * ex - ax * ez) * ny + (ax * ey - ay * ex) * nz
                fx, fy, fz = bx - px, by - py, bz - pz
                c2 = (py * fz - pz * fy) * nx + (pz * fx - px * fz) * ny + (px * fy - py * fx) * nz
                inside = c1 >= 0.0 and c2 >= 0.0
        if inside:
            d = _angle3(qx, qy, qz, px, py, pz)
            along = _angle3(ax, ay, az, px, py, pz)
            where = 0.0
        else:
            da = _angle3(qx, qy, qz, ax, ay, az)
            db = _angle3(qx, qy, qz, bx, by, bz)
            if da <= db:
                d, along, where = da, 0.0, 1.0
                px, py, pz = ax, ay, az
            else:
                d, along, where = db, _angle3(ax, ay, az, bx, by, bz), 2.0
                px, py, pz = bx, by, bz
        if d < best_d or (d == best_d and s < best_s):
            best, best_s, best_d = i, s, d
            out[0], out[1], out[2] = d, along, where
            out[3], out[4], out[5] = px, py, pz
    return best


def _check_point(lat: Any, lon: Any) -> tuple[float, float]:
    for name, value, lim in (("latitude", lat, 90.0), ("longitude", lon, 180.0)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise InvalidRequest(f"{name} must be a number in [-{lim:g}, {lim:g}], got {value!r}")
        if not (math.isfinite(float(value)) and -lim <= float(value) <= lim):
            raise InvalidRequest(f"{name} must be a number in [-{lim:g}, {lim:g}], got {value!r}")
    return float(lat), float(lon)


class RoadSnapper:
    """Spatial index over every road segment of a graph (see the module docstring).

    Build once per graph (a few seconds for a million edges) and share it: queries only read.
    :func:`road_snapper` keeps one per graph.

    Parameters
    ----------
    graph : RoadGraph
    sample_spacing_m : float
        Largest step between samples of a segment, metres. Smaller uses more memory (about
        ``total road length / sample_spacing_m`` samples) and makes each query's candidate
        ball smaller.
    """

    def __init__(self, graph: RoadGraph, *, sample_spacing_m: float = DEFAULT_SAMPLE_SPACING_M):
        if not (
            isinstance(sample_spacing_m, (int, float))
            and not isinstance(sample_spacing_m, bool)
            and 0.0 < sample_spacing_m < math.inf
        ):
            raise InvalidRequest(
                f"sample_spacing_m must be a finite distance > 0 m, got {sample_spacing_m!r}"
            )
        # Arrays only, never the graph: road_snapper() caches snappers per graph in a
        # weak-key dictionary, which a reference back to the graph would keep alive forever.
        m = graph.n_edges
        self.n_edges = m
        self.sample_spacing_m = float(sample_spacing_m)
        self.travel_time_s = graph.travel_time_s
        self.reverse_edge = graph.reverse_edge
        ptr, plat, plon = edge_polylines(graph)
        self.point_ptr, self.point_lat, self.point_lon = ptr, plat, plon
        xyz = unit_vectors(plat, plon)
        # index each road once: an edge with no reverse, or the lower of the pair
        ids = np.arange(m, dtype=np.int64)
        indexed = (self.reverse_edge < 0) | (ids <= self.reverse_edge)
        per_edge = np.where(indexed, np.diff(ptr) - 1, 0)
        self.seg_edge = np.repeat(ids, per_edge)
        seg_start = np.repeat(ptr[:-1] - (np.cumsum(per_edge) - per_edge), per_edge)
        self.seg_a = np.arange(self.seg_edge.size, dtype=np.int64) + seg_start  # point index
        a, b = xyz[self.seg_a], xyz[self.seg_a + 1]
        self.seg_a_xyz, self.seg_b_xyz = a, b
        seg_rad = _angle(a, b)
        # length of every edge's polyline, and of its part before each segment
        all_seg = _angle(xyz[:-1], xyz[1:]) if xyz.shape[0] > 1 else np.zeros(0)
        cum = np.zeros(xyz.shape[0], dtype=np.float64)
        if all_seg.size:
            all_seg[ptr[1:-1] - 1] = 0.0  # no segment between one edge and the next
            np.cumsum(all_seg, out=cum[1:])
        self.edge_rad = cum[ptr[1:] - 1] - cum[ptr[:-1]]
        self.seg_before_rad = cum[self.seg_a] - cum[ptr[:-1]][self.seg_edge]
        # samples: both ends and equal angular steps of at most the spacing in between
        step_rad = self.sample_spacing_m / EARTH_RADIUS_M
        k = np.maximum(1, np.ceil(seg_rad / step_rad)).astype(np.int64)
        owner = np.repeat(np.arange(k.size, dtype=np.int64), k + 1)
        j = np.arange(owner.size, dtype=np.int64) - np.repeat(np.cumsum(k + 1) - (k + 1), k + 1)
        t = (j / k[owner])[:, None]
        theta = seg_rad[owner][:, None]
        sin_t = np.sin(theta)
        safe = np.where(sin_t > 0.0, sin_t, 1.0)
        slerp = (np.sin((1.0 - t) * theta) * a[owner] + np.sin(t * theta) * b[owner]) / safe
        samples = np.where(sin_t > 0.0, slerp, a[owner])
        self.sample_seg = owner
        self.n_samples = int(owner.size)
        self._tree = cKDTree(samples) if owner.size else None

    @property
    def n_segments(self) -> int:
        return int(self.seg_edge.size)

    def nearest(self, lat: float, lon: float) -> tuple[int, float, float, int, np.ndarray]:
        """Exact nearest segment: ``(segment, distance_m, along_rad, where, point_xyz)``.

        Raises :class:`InvalidRequest` for bad coordinates and :class:`NodeNotFound` for a
        graph without roads.
        """
        lat, lon = _check_point(lat, lon)
        if self._tree is None:
            raise NodeNotFound("the graph has no roads to snap to")
        q = unit_vectors(lat, lon)
        out = np.empty(6, dtype=np.float64)
        _, i = self._tree.query(q)
        first = self.sample_seg[int(i) : int(i) + 1]
        _nearest_on_arcs(q, self.seg_a_xyz, self.seg_b_xyz, first, out)
        radius = out[0] + (0.5 * self.sample_spacing_m + _RADIUS_MARGIN_M) / EARTH_RADIUS_M
        chord = 2.0 * math.sin(min(radius, math.pi) / 2.0)
        near = np.asarray(self._tree.query_ball_point(q, chord), dtype=np.int64)
        cand = np.concatenate((first, self.sample_seg[near]))
        best = _nearest_on_arcs(q, self.seg_a_xyz, self.seg_b_xyz, cand, out)
        return int(cand[best]), float(out[0]) * EARTH_RADIUS_M, float(out[1]), int(out[2]), out[3:]

    def snap(
        self,
        lat: float,
        lon: float,
        max_distance_m: float = DEFAULT_SNAP_MAX_M,
        *,
        costs: np.ndarray | None = None,
    ) -> RoadSnap:
        """Snap (lat, lon) to the nearest point on a road.

        Parameters
        ----------
        lat, lon : float
            WGS84 degrees.
        max_distance_m : float
            Refuse points farther than this from every road (``>= 0``; ``inf`` for no limit).
        costs : float64[m], optional
            Edge costs for the partial costs (live costs); default the graph's travel times.

        Raises
        ------
        InvalidRequest
            Coordinates outside WGS84 ranges or not numbers, a bad limit, bad costs.
        NodeNotFound
            The nearest road is farther than ``max_distance_m`` (the message names both), or
            the graph has no roads.
        """
        lat, lon = _check_point(lat, lon)
        if (
            isinstance(max_distance_m, bool)
            or not isinstance(max_distance_m, (int, float, np.integer, np.floating))
            or not float(max_distance_m) >= 0.0
        ):
            raise InvalidRequest(
                f"max_distance_m must be a distance >= 0 m (inf for no limit), got "
                f"{max_distance_m!r}"
            )
        cost = self.travel_time_s if costs is None else check_edge_costs(self.n_edges, costs)
        seg, distance_m, along_rad, where, point = self.nearest(lat, lon)
        if distance_m > max_distance_m:
            raise NodeNotFound(
                f"point ({lat:.6f}, {lon:.6f}) is {distance_m:,.0f} m from the nearest road; "
                f"the limit is {max_distance_m:,.0f} m"
            )
        e = int(self.seg_edge[seg])
        a = int(self.seg_a[seg])
        if where == 1:  # exactly at a polyline point: keep its own coordinates
            s_lat, s_lon = float(self.point_lat[a]), float(self.point_lon[a])
        elif where == 2:
            s_lat, s_lon = float(self.point_lat[a + 1]), float(self.point_lon[a + 1])
        else:
            s_lat = math.degrees(math.atan2(point[2], math.hypot(point[0], point[1])))
            s_lon = math.degrees(math.atan2(point[1], point[0]))
        total = float(self.edge_rad[e])
        from_tail = float(self.seg_before_rad[seg]) + along_rad
        fraction = min(1.0, max(0.0, from_tail / total)) if total > 0.0 else 0.0
        lo, hi = int(self.point_ptr[e]), int(self.point_ptr[e + 1])
        pts = list(zip(self.point_lon[lo:hi].tolist(), self.point_lat[lo:hi].tolist(), strict=True))
        here = (s_lon, s_lat)
        j = a - lo  # the point lies between pts[j] and pts[j + 1]
        head_part = _line([here, *pts[j + 1 :]])
        tail_part = _line([*pts[: j + 1], here])
        sides = [_side(e, fraction, total, cost, tail_part, head_part)]
        r = int(self.reverse_edge[e])
        if r >= 0 and r != e:
            back = 1.0 - fraction
            sides.append(_side(r, back, total, cost, head_part[::-1], tail_part[::-1]))
        return RoadSnap(
            lat=s_lat,
            lon=s_lon,
            distance_m=distance_m,
            query_lat=lat,
            query_lon=lon,
            sides=tuple(sides),
        )


def _line(points: list[Position]) -> tuple[Position, ...]:
    """Drop repeated consecutive positions, keeping at least two (a GeoJSON LineString)."""
    out = [points[0]]
    for p in points[1:]:
        if p != out[-1]:
            out.append(p)
    if len(out) == 1:
        out.append(out[0])
    return tuple(out)


def _side(
    edge: int,
    fraction: float,
    total_rad: float,
    cost: np.ndarray,
    from_tail: tuple[Position, ...],
    to_head: tuple[Position, ...],
) -> SnapSide:
    c = float(cost[edge])
    total_m = total_rad * EARTH_RADIUS_M
    return SnapSide(
        edge=edge,
        fraction=fraction,
        length_from_tail_m=total_m * fraction,
        length_to_head_m=total_m * (1.0 - fraction),
        cost_from_tail_s=c * fraction if fraction > 0.0 else 0.0,
        cost_to_head_s=c * (1.0 - fraction) if fraction < 1.0 else 0.0,
        coords_from_tail=from_tail,
        coords_to_head=to_head,
    )


_SNAPPERS: weakref.WeakKeyDictionary[RoadGraph, RoadSnapper] = weakref.WeakKeyDictionary()
_SNAPPERS_LOCK = threading.Lock()


def road_snapper(graph: RoadGraph) -> RoadSnapper:
    """The :class:`RoadSnapper` of ``graph``, built on first use and kept while the graph lives.

    Thread-safe; call it once at service start so that no request pays for the build.
    """
    with _SNAPPERS_LOCK:
        snapper = _SNAPPERS.get(graph)
        if snapper is None:
            snapper = RoadSnapper(graph)
            _SNAPPERS[graph] = snapper
        return snapper


def snap_to_road(
    graph: RoadGraph,
    lat: float,
    lon: float,
    max_distance_m: float = DEFAULT_SNAP_MAX_M,
    *,
    costs: np.ndarray | None = None,
) -> RoadSnap:
    """Snap (lat, lon) to the nearest point on a road of ``graph`` (:meth:`RoadSnapper.snap`)."""
    return road_snapper(graph).snap(lat, lon, max_distance_m, costs=costs)
