"""The compiled road graph: build, save, memory-mapped load, snapping.

A road graph is a directed graph in compressed-sparse-row form. Node ``i`` is row ``i``; its
outgoing edges are ``indptr[i]:indptr[i + 1]``. Edge costs are free-flow travel times in seconds.

The on-disk format is one uncompressed ``.npz`` file that ``numpy.load`` alone can read. Because
the members are stored (not deflated), :func:`load_graph` maps them straight from the file with
``numpy.memmap``: several worker processes then share one copy in the page cache.

Arrays (``n`` nodes, ``m`` directed edges, ``k`` interior geometry points):

==================  ==================  =====================================================
name                dtype, shape        meaning
==================  ==================  =====================================================
``indptr``          int64[n + 1]        CSR row pointer: edges of node i are indptr[i]:indptr[i+1]
``head``            int32[m]            node the edge leads to
``travel_time_s``   float64[m]          free-flow travel time, ``length_m / speed``
``length_m``        float64[m]          great-circle length along the road geometry
``speed_kph``       float32[m]          speed used for ``travel_time_s``
``road_class``      int8[m]             index into ``meta["road_classes"]`` (OSM ``highway``)
``speed_source``    int8[m]             0 = tagged ``maxspeed``, 1 = class default
``lat``, ``lon``    float64[n]          node position, WGS84 degrees
``osm_id``          int64[n]            OpenStreetMap node id (synthetic ids for generated maps)
``component``       int32[n]            strongly-connected-component label
``geom_indptr``     int64[m + 1]        interior points of edge e: geom_indptr[e]:geom_indptr[e+1]
``geom_lat``        float64[k]          interior geometry latitudes (endpoints not repeated)
``geom_lon``        float64[k]          interior geometry longitudes
``meta``            str (0-d)           JSON: format version, name, source, counts, speeds, ...
==================  ==================  =====================================================
"""

from __future__ import annotations

import hashlib
import json
import math
import zipfile
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

from dueroute.planner.errors import (
    CorruptGraphFile,
    GraphFileNotFound,
    InvalidRequest,
    NodeNotFound,
)

FORMAT_VERSION = 1

#: Mean earth radius in metres, the value osmnx uses for its great-circle lengths.
EARTH_RADIUS_M = 6_371_009.0

#: Default distance beyond which a point is "not on the road network".
DEFAULT_SNAP_MAX_M = 500.0

_NODE_ARRAYS = {
    "lat": np.float64,
    "lon": np.float64,
    "osm_id": np.int64,
    "component": np.int32,
}
_EDGE_ARRAYS = {
    "head": np.int32,
    "travel_time_s": np.float64,
    "length_m": np.float64,
    "speed_kph": np.float32,
    "road_class": np.int8,
    "speed_source": np.int8,
}
_OTHER_ARRAYS = {
    "indptr": np.int64,
    "geom_indptr": np.int64,
    "geom_lat": np.float64,
    "geom_lon": np.float64,
}
REQUIRED_ARRAYS = {**_OTHER_ARRAYS, **_NODE_ARRAYS, **_EDGE_ARRAYS}


@dataclass(frozen=True, eq=False)
class RoadGraph:
    """A compiled, read-only road graph (see the module docstring for every array)."""

    indptr: np.ndarray
    head: np.ndarray
    travel_time_s: np.ndarray
    length_m: np.ndarray
    speed_kph: np.ndarray
    road_class: np.ndarray
    speed_source: np.ndarray
    lat: np.ndarray
    lon: np.ndarray
    osm_id: np.ndarray
    component: np.ndarray
    geom_indptr: np.ndarray
    geom_lat: np.ndarray
    geom_lon: np.ndarray
    meta: dict[str, Any] = field(default_factory=dict)
    path: Path | None = None

    @property
    def n_nodes(self) -> int:
        return int(self.lat.shape[0])

    @property
    def n_edges(self) -> int:
        return int(self.head.shape[0])

    @property
    def name(self) -> str:
        return str(self.meta.get("name", self.path.stem if self.path else "graph"))

    @cached_property
    def max_speed_mps(self) -> float:
        """Fastest free-flow speed on any edge, in m/s (makes the great-circle bound admissible)."""
        if self.n_edges == 0:
            return 1.0
        return float(np.max(self.speed_kph)) / 3.6

    @cached_property
    def fingerprint(self) -> str:
        """sha256 over the topology and costs: identifies the graph a policy was trained on."""
        digest = hashlib.sha256()
        for arr in (self.indptr, self.head, self.travel_time_s):
            digest.update(np.ascontiguousarray(arr).tobytes())
        return digest.hexdigest()

    @cached_property
    def tail(self) -> np.ndarray:
        """int32[m]: the node each edge leaves from (derived from ``indptr``)."""
        return np.repeat(np.arange(self.n_nodes, dtype=np.int32), np.diff(self.indptr))

    def edges_of(self, node: int) -> slice:
        return slice(int(self.indptr[node]), int(self.indptr[node + 1]))

    def csr(self, weights: np.ndarray | None = None) -> csr_matrix:
        """The graph as a scipy CSR matrix of travel times (parallel edges keep the cheapest).

        Zero-cost edges are stored as a tiny positive value would change costs, so they are kept
        explicitly: scipy's csgraph treats explicit zeros in a CSR matrix as edges.
        """
        w = self.travel_time_s if weights is None else weights
        n = self.n_nodes
        order = np.lexsort((w, self.head, self.tail))
        tail, head, cost = self.tail[order], self.head[order], np.asarray(w)[order]
        keep = np.ones(len(order), dtype=bool)
        keep[1:] = (tail[1:] != tail[:-1]) | (head[1:] != head[:-1])
        tail, head, cost = tail[keep], head[keep], cost[keep]
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.add.at(indptr, tail.astype(np.int64) + 1, 1)
        return csr_matrix((cost, head, np.cumsum(indptr)), shape=(n, n))

    def check_node(self, node: int) -> int:
        """Return ``node`` as an int, or raise :class:`NodeNotFound` saying what is allowed."""
        if isinstance(node, bool) or not isinstance(node, (int, np.integer)):
            raise NodeNotFound(f"node must be an integer index, got {node!r}")
        if not 0 <= int(node) < self.n_nodes:
            raise NodeNotFound(
                f"node {int(node)} is not in the graph: valid node indices are 0..{self.n_nodes - 1}"
            )
        return int(node)

    def edge_coords(self, edge: int) -> list[tuple[float, float]]:
        """(lon, lat) points of one edge from its tail to its head, interior geometry included."""
        t = int(self.tail[edge])
        h = int(self.head[edge])
        a, b = int(self.geom_indptr[edge]), int(self.geom_indptr[edge + 1])
        pts = [(float(self.lon[t]), float(self.lat[t]))]
        pts += [
            (float(x), float(y))
            for x, y in zip(self.geom_lon[a:b], self.geom_lat[a:b], strict=True)
        ]
        pts.append((float(self.lon[h]), float(self.lat[h])))
        return pts

    @cached_property
    def _snap_tree(self) -> Any:
        from scipy.spatial import cKDTree

        return cKDTree(_unit_vectors(np.asarray(self.lat), np.asarray(self.lon)))

    def snap(self, lat: float, lon: float, max_distance_m: float = DEFAULT_SNAP_MAX_M) -> int:
        """Index of the node nearest to (lat, lon) by great-circle distance.

        Raises :class:`InvalidRequest` for coordinates outside WGS84 ranges and
        :class:`NodeNotFound` when the nearest node is farther than ``max_distance_m``.
        """
        if not (math.isfinite(lat) and -90.0 <= lat <= 90.0):
            raise InvalidRequest(f"latitude must be a number in [-90, 90], got {lat!r}")
        if not (math.isfinite(lon) and -180.0 <= lon <= 180.0):
            raise InvalidRequest(f"longitude must be a number in [-180, 180], got {lon!r}")
        if self.n_nodes == 0:
            raise NodeNotFound("the graph has no nodes to snap to")
        chord, idx = self._snap_tree.query(_unit_vectors(np.array([lat]), np.array([lon]))[0])
        distance_m = 2.0 * EARTH_RADIUS_M * math.asin(min(1.0, float(chord) / 2.0))
        if distance_m > max_distance_m:
            raise NodeNotFound(
                f"point ({lat:.6f}, {lon:.6f}) is {distance_m:,.0f} m from the nearest road node; "
                f"the limit is {max_distance_m:,.0f} m"
            )
        return int(idx)

    def info(self) -> dict[str, Any]:
        """Summary for ``dueroute graph info``."""
        classes = self.meta.get("road_classes", [])
        counts = np.bincount(np.asarray(self.road_class, dtype=np.int64), minlength=len(classes))
        n_comp = int(self.component.max()) + 1 if self.n_nodes else 0
        largest = int(np.bincount(self.component).max()) if self.n_nodes else 0
        return {
            "path": str(self.path) if self.path else None,
            "name": self.name,
            "nodes": self.n_nodes,
            "edges": self.n_edges,
            "strong_components": n_comp,
            "largest_component_nodes": largest,
            "bbox": {
                "south": float(np.min(self.lat)) if self.n_nodes else None,
                "west": float(np.min(self.lon)) if self.n_nodes else None,
                "north": float(np.max(self.lat)) if self.n_nodes else None,
                "east": float(np.max(self.lon)) if self.n_nodes else None,
            },
            "total_length_km": float(np.sum(self.length_m)) / 1000.0,
            "max_speed_kph": float(np.max(self.speed_kph)) if self.n_edges else None,
            "edges_by_class": {c: int(k) for c, k in zip(classes, counts, strict=False) if k},
            "edges_with_tagged_speed": int(np.sum(np.asarray(self.speed_source) == 0)),
            "fingerprint": self.fingerprint,
            "meta": {k: v for k, v in self.meta.items() if k != "road_classes"},
        }


def _unit_vectors(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    la, lo = np.radians(lat), np.radians(lon)
    return np.column_stack((np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)))


def great_circle_m(lat1: Any, lon1: Any, lat2: Any, lon2: Any) -> Any:
    """Haversine distance in metres on a sphere of radius :data:`EARTH_RADIUS_M` (as osmnx)."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dphi = p2 - p1
    dlmb = np.radians(np.asarray(lon2) - np.asarray(lon1))
    a = np.sin(dphi / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dlmb / 2) ** 2
    return 2.0 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))


# --------------------------------------------------------------------------------------------
# Building


def hilbert_order(lat: np.ndarray, lon: np.ndarray, bits: int = 16) -> np.ndarray:
    """Permutation that sorts nodes along a Hilbert curve over their bounding box.

    Nodes close on the map end up close in memory, so a search touches fewer cache lines.
    """
    n = lat.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    side = (1 << bits) - 1

    def scale(v: np.ndarray) -> np.ndarray:
        lo, hi = float(np.min(v)), float(np.max(v))
        span = hi - lo if hi > lo else 1.0
        return np.minimum(((v - lo) / span * side).astype(np.int64), side)

    x, y = scale(lon), scale(lat)
    d = np.zeros(n, dtype=np.int64)
    s = 1 << (bits - 1)
    while s > 0:
        rx = ((x & s) > 0).astype(np.int64)
        ry = ((y & s) > 0).astype(np.int64)
        d += s * s * ((3 * rx) ^ ry)
        # rotate the quadrant so the curve stays continuous
        flip = ry == 0
        swap_x = flip & (rx == 1)
        x = np.where(swap_x, side - x, x)
        y = np.where(swap_x, side - y, y)
        x, y = np.where(flip, y, x), np.where(flip, x, y)
        s >>= 1
    return np.argsort(d, kind="stable")


def build_graph(
    *,
    lat: np.ndarray,
    lon: np.ndarray,
    osm_id: np.ndarray,
    tail: np.ndarray,
    head: np.ndarray,
    length_m: np.ndarray,
    speed_kph: np.ndarray,
    road_class: np.ndarray,
    speed_source: np.ndarray,
    geom_indptr: np.ndarray | None = None,
    geom_lat: np.ndarray | None = None,
    geom_lon: np.ndarray | None = None,
    meta: dict[str, Any] | None = None,
    spatial_order: bool = True,
) -> RoadGraph:
    """Assemble a :class:`RoadGraph` from node and edge lists.

    Parameters
    ----------
    lat, lon : float64[n]
    osm_id : int64[n]
    tail, head : int[m]
        Edge endpoints as node indices into ``lat``/``lon``.
    length_m, speed_kph : float[m]
        ``travel_time_s`` is computed as ``length_m / (speed_kph / 3.6)``.
    road_class, speed_source : int8[m]
    geom_indptr, geom_lat, geom_lon : optional
        Interior geometry per input edge, in the input edge order.
    spatial_order : bool
        Renumber nodes along a Hilbert curve (see :func:`hilbert_order`).
    """
    n = int(lat.shape[0])
    m = int(tail.shape[0])
    tail = np.asarray(tail, dtype=np.int64)
    head = np.asarray(head, dtype=np.int64)
    if m and (tail.min() < 0 or head.min() < 0 or tail.max() >= n or head.max() >= n):
        raise InvalidRequest("edge endpoints must be node indices in 0..n-1")
    speed_kph = np.asarray(speed_kph, dtype=np.float32)
    if m and not np.all(speed_kph > 0):
        raise InvalidRequest("every edge needs a positive speed")
    if geom_indptr is None:
        geom_indptr = np.zeros(m + 1, dtype=np.int64)
        geom_lat = np.zeros(0)
        geom_lon = np.zeros(0)
    assert geom_lat is not None and geom_lon is not None

    # Node renumbering: new index of old node i is rank[i].
    perm = hilbert_order(lat, lon) if spatial_order else np.arange(n)
    rank = np.empty(n, dtype=np.int64)
    rank[perm] = np.arange(n)
    tail, head = rank[tail], rank[head]

    order = np.lexsort((head, tail))  # CSR order: by tail, then head
    counts = np.bincount(tail, minlength=n)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])

    glen = np.diff(geom_indptr)[order]
    new_gptr = np.zeros(m + 1, dtype=np.int64)
    np.cumsum(glen, out=new_gptr[1:])
    # Interior points of the e-th edge in CSR order: geom_indptr[order[e]] + 0..glen[e]-1
    # (vectorised: one np.arange per edge is too slow for million-edge graphs).
    within = np.arange(int(new_gptr[-1]), dtype=np.int64) - np.repeat(new_gptr[:-1], glen)
    gsel = np.repeat(np.asarray(geom_indptr, dtype=np.int64)[order], glen) + within

    length = np.asarray(length_m, dtype=np.float64)[order]
    speed = speed_kph[order]
    travel = length / (speed.astype(np.float64) / 3.6)
    head_sorted = head[order].astype(np.int32)

    csr = csr_matrix((np.ones(m, dtype=np.int8), head_sorted, indptr), shape=(n, n))
    _, labels = connected_components(csr, directed=True, connection="strong")

    info = dict(meta or {})
    info.setdefault("road_classes", [])
    info["format_version"] = FORMAT_VERSION
    info["spatial_order"] = "hilbert" if spatial_order else "input"
    return RoadGraph(
        indptr=indptr,
        head=head_sorted,
        travel_time_s=travel,
        length_m=length,
        speed_kph=speed,
        road_class=np.asarray(road_class, dtype=np.int8)[order],
        speed_source=np.asarray(speed_source, dtype=np.int8)[order],
        lat=np.asarray(lat, dtype=np.float64)[perm],
        lon=np.asarray(lon, dtype=np.float64)[perm],
        osm_id=np.asarray(osm_id, dtype=np.int64)[perm],
        component=labels.astype(np.int32),
        geom_indptr=new_gptr,
        geom_lat=np.asarray(geom_lat, dtype=np.float64)[gsel],
        geom_lon=np.asarray(geom_lon, dtype=np.float64)[gsel],
        meta=info,
    )


# --------------------------------------------------------------------------------------------
# Saving and loading


def save_graph(graph: RoadGraph, path: str | Path) -> Path:
    """Write ``graph`` as one uncompressed ``.npz`` (atomically: temp file, then rename)."""
    path = Path(path)
    if path.suffix != ".npz":
        raise InvalidRequest(f"a compiled graph file must end in .npz, got {path.name!r}")
    path.parent.mkdir(parents=True, exist_ok=True)
    arrays: dict[str, Any] = {
        name: np.ascontiguousarray(getattr(graph, name), dtype=dt)
        for name, dt in REQUIRED_ARRAYS.items()
    }
    meta = dict(graph.meta)
    meta["nodes"], meta["edges"] = graph.n_nodes, graph.n_edges
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        np.savez(fh, meta=np.array(json.dumps(meta, sort_keys=True)), **arrays)
    tmp.replace(path)
    return path


def _npz_member_offsets(path: Path) -> dict[str, tuple[int, np.dtype, tuple[int, ...], bool]]:
    """Locate each stored ``.npy`` member's data: (offset, dtype, shape, fortran_order)."""
    out = {}
    with zipfile.ZipFile(path) as zf, open(path, "rb") as raw:
        for info in zf.infolist():
            if not info.filename.endswith(".npy"):
                continue
            if info.compress_type != zipfile.ZIP_STORED:
                raise CorruptGraphFile(
                    f"{path}: member {info.filename} is compressed; cannot map it"
                )
            raw.seek(info.header_offset)
            local = raw.read(30)
            if local[:4] != b"PK\x03\x04":
                raise CorruptGraphFile(f"{path}: bad zip header for {info.filename}")
            name_len = int.from_bytes(local[26:28], "little")
            extra_len = int.from_bytes(local[28:30], "little")
            raw.seek(info.header_offset + 30 + name_len + extra_len)
            version = np.lib.format.read_magic(raw)
            if version == (1, 0):
                shape, fortran, dtype = np.lib.format.read_array_header_1_0(raw)
            else:
                shape, fortran, dtype = np.lib.format.read_array_header_2_0(raw)
            out[info.filename[:-4]] = (raw.tell(), dtype, shape, fortran)
    return out


def load_graph(path: str | Path, *, mmap: bool = True) -> RoadGraph:
    """Load a compiled graph; with ``mmap`` the arrays are read-only views of the file.

    Raises :class:`GraphFileNotFound` or :class:`CorruptGraphFile` with the reason.
    """
    path = Path(path)
    if not path.is_file():
        raise GraphFileNotFound(f"graph file not found: {path}")
    try:
        members = _npz_member_offsets(path)
        with np.load(path, allow_pickle=False) as npz:
            meta = json.loads(str(npz["meta"][()]))
            missing = sorted(set(REQUIRED_ARRAYS) - set(npz.files))
            if missing:
                raise CorruptGraphFile(f"{path}: not a dueroute graph, missing arrays {missing}")
            arrays: dict[str, np.ndarray] = {}
            for name, dtype in REQUIRED_ARRAYS.items():
                if mmap:
                    offset, dt, shape, fortran = members[name]
                    if dt.hasobject:
                        raise CorruptGraphFile(f"{path}: array {name} holds Python objects")
                    count = int(np.prod(shape)) if shape else 1
                    if count == 0:
                        arr = np.zeros(shape, dtype=dt)
                    else:
                        arr = np.memmap(
                            path,
                            dtype=dt,
                            mode="r",
                            offset=offset,
                            shape=shape,
                            order="F" if fortran else "C",
                        )
                else:
                    arr = npz[name]
                if arr.dtype != np.dtype(dtype):
                    raise CorruptGraphFile(
                        f"{path}: array {name} has dtype {arr.dtype}, expected {np.dtype(dtype)}"
                    )
                arrays[name] = arr
    except CorruptGraphFile:
        raise
    except (
        zipfile.BadZipFile,
        ValueError,
        OSError,
        KeyError,
        EOFError,
        json.JSONDecodeError,
    ) as exc:
        raise CorruptGraphFile(f"{path}: not a readable compiled graph ({exc})") from exc
    graph = RoadGraph(**arrays, meta=meta, path=path)
    _validate(graph)
    return graph


def _validate(g: RoadGraph) -> None:
    """Cheap structural checks so a truncated or hand-edited file fails loudly, not mid-search."""
    n, m = g.n_nodes, g.n_edges
    where = g.path or "graph"
    problems = []
    if g.indptr.shape != (n + 1,):
        problems.append(f"indptr has {g.indptr.shape[0]} entries, expected nodes + 1 = {n + 1}")
    elif n and (g.indptr[0] != 0 or g.indptr[-1] != m or np.any(np.diff(g.indptr) < 0)):
        problems.append("indptr is not a non-decreasing row pointer from 0 to the edge count")
    for name in _NODE_ARRAYS:
        if getattr(g, name).shape != (n,):
            problems.append(f"{name} has shape {getattr(g, name).shape}, expected ({n},)")
    for name in _EDGE_ARRAYS:
        if getattr(g, name).shape != (m,):
            problems.append(f"{name} has shape {getattr(g, name).shape}, expected ({m},)")
    if g.geom_indptr.shape != (m + 1,):
        problems.append("geom_indptr does not have edges + 1 entries")
    if g.geom_lat.shape != g.geom_lon.shape:
        problems.append("geom_lat and geom_lon differ in length")
    if not problems and m:
        if int(g.head.min()) < 0 or int(g.head.max()) >= n:
            problems.append("head holds node indices outside 0..nodes-1")
        if not np.all(np.isfinite(g.travel_time_s)) or float(g.travel_time_s.min()) < 0:
            problems.append("travel_time_s holds negative or non-finite costs")
    if problems:
        raise CorruptGraphFile(f"{where}: " + "; ".join(problems))
