"""Lower bounds on travel time: the great-circle bound and ALT landmarks.

Kernel contract (agreed with ``planner/_kernel.py``, checked against it)
-----------------------------------------------------------------------
The kernel receives, from a :class:`Landmarks`, the array ``lm`` (``uint16[n, L, 2]``,
node-major and C-contiguous: row ``v`` holds ``L`` pairs ``(d(v -> landmark_i),
d(landmark_i -> v))`` in units of ``unit_s`` seconds, :data:`INF_CODE` for "no path"; 4L bytes,
one 64-byte cache line for 16 landmarks; ``L`` may be 0), the scalars ``unit_s`` and
``slack_s``, and computes for a node ``v`` and destination ``t``, in float64::

    h(v) = max(chord_m(v, t) * (1 - 1e-9) / max_speed_mps,
               max_i max(lm_from[t, i] - lm_from[v, i], lm_to[v, i] - lm_to[t, i]) - slack_s,
               0)

with ``lm_from[v, i] = unit_s * lm[v, i, 1] ~ d(landmark_i -> v)`` and ``lm_to[v, i] =
unit_s * lm[v, i, 0] ~ d(v -> landmark_i)`` in seconds on free-flow costs, ``i`` over the
query's *active* landmarks
(a subset; any subset gives a valid bound). The kernel also receives the landmarks'
shortest-path trees (``tree_to``, ``tree_from``, int32[L, n], edge indices), from which it
builds the *instant route* of every query (origin -> landmark -> destination). The kernel's first term uses the chord (straight line through the earth),
which never exceeds the great-circle distance; :func:`great_circle_bound_s` here is the
great-circle version of the same bound (>= the kernel's, still admissible), kept as the
reference the tests check. ``(1 - 1e-9)`` absorbs last-bit differences between two distance
evaluations of a straight edge driven at top speed.

Missing distances are stored as ``+inf``; the arrays never hold NaN or negative values. The
kernel must skip a NaN difference (``inf - inf``): it compares ``d > best``, which is false for
NaN, and starts from ``best = -inf``. Every case of an ALT difference is then a valid bound
(shown for ``lm_from``, ``D = d(landmark -> .)``; ``lm_to`` is the mirror image):

===========  ===========  ===========  ===================================================
``D(t)``     ``D(v)``     term         why it is admissible
===========  ===========  ===========  ===================================================
finite       finite       D(t) - D(v)  triangle inequality D(t) <= D(v) + d(v, t)
finite       inf          -inf         trivially
inf          finite       +inf         the landmark reaches v but not t, so v cannot reach
                                       t: d(v, t) = inf, and the kernel prunes v
inf          inf          NaN, skipped the landmark says nothing about this pair
===========  ===========  ===========  ===================================================

``h = +inf`` is exact (no path), so the session can report ``no_route`` when even the origin
gets it. Consistency ``h(v) <= c(v, w) + h(w)`` holds wherever ``h(v)`` is finite:
``D(w) <= D(v) + c(v, w)``, and a node the landmark reaches has successors it reaches.

Quantization and the slack (the math)
-------------------------------------
A search is bound by memory: each node it touches costs a cache line for its workspace record
and one for its landmark row, so the rows are stored as 16-bit integers, one 64-byte line for
16 landmarks (float32 rows took two lines and made every expansion a third slower). With
``Dmax`` the largest finite distance, ``unit_s = Dmax / 65534`` and each finite distance ``A``
is stored as ``a = round(A / unit_s)``, so ``|a * unit_s - A| <= unit_s / 2`` (plus float64
rounding, relative 2**-53, negligible); ``65535`` (:data:`INF_CODE`) stands for "no path".
A difference of two stored values is then off by at most ``unit_s`` from the exact difference,
and so is a difference between a stored value and an exact one (a target row derived from
exact partial edge costs). Subtracting ``slack_s = unit_s * (1 + 1e-6)`` keeps every ALT term
admissible: ``stored term - slack_s < A - B``. For the demo region (``Dmax`` about 95 min) that
is 0.09 s, against trips of minutes.

Consistency survives up to the rounding: for an edge ``v -> w``,
``h(v) <= c(v, w) + h(w) + 2 unit_s``, i.e. the stored heuristic is consistent within
:attr:`Landmarks.consistency_tolerance_s`. Subtracting a constant keeps the exact ALT potentials
consistent, and a max of consistent heuristics is consistent; only this rounding term is
left, and the kernel's reopening of closed nodes keeps the search exact regardless.

Costs that only go up
---------------------
Landmark distances are computed on free-flow costs (``graph.travel_time_s``). If a caller later
raises some edge costs (congestion, closures as large costs), every true distance ``d'(v, t)``
is >= the free-flow ``d(v, t)`` >= ``h(v)``, so the bound stays admissible, and
``h(v) <= c(v, w) + h(w) <= c'(v, w) + h(w)`` keeps it consistent. Lowered costs would break
both: rebuild the landmarks for such a graph, or lower the bound by the total decrease
(live traffic does both; the proof is in the ``planner/traffic.py`` docstring, and
:func:`landmarks_on_costs` rebuilds the same landmarks on other costs). A graph compiled with other costs has another
fingerprint, so its stale landmark file is refused (``load_landmarks``) or rebuilt
(``load_or_build_landmarks``); ``Landmarks.check_graph(graph)`` makes the same test.

Landmark file
-------------
``<graph>.landmarks.npz`` beside the compiled graph (``demo.npz`` -> ``demo.landmarks.npz``),
an uncompressed ``.npz`` so :func:`load_landmarks` maps the arrays from the file:

=============  ===============  ========================================================
name           dtype, shape     meaning
=============  ===============  ========================================================
``nodes``      int32[L]         landmark node indices (all in the largest strong component)
``lm``         uint16[n, L, 2]  ``lm[v, i, 0] ~ d(v -> landmark_i) / unit_s``, ``lm[v, i, 1]
                                ~ d(landmark_i -> v) / unit_s``, 65535 when there is no path
``tree_to``    int32[L, n]      edge leaving v on a shortest path v -> landmark_i (-1 at
                                the landmark and where there is no path)
``tree_from``  int32[L, n]      edge entering v on a shortest path landmark_i -> v (-1 as
                                above)
``meta``       str (0-d)        JSON: kind, format version, graph fingerprint, method, seed,
                                count, unit_s, slack_s, max_distance_s, build_s
=============  ===============  ========================================================

Every array's data starts on a 64-byte boundary of the file (the zip entries are padded), so a
memory-mapped row never straddles two cache lines. Format version 2 (16-bit interleaved rows,
trees) replaced version 1 (float32 ``lm_from``/``lm_to``, no trees); a version 1 file is
rebuilt on first use.
"""

from __future__ import annotations

import json
import math
import os
import sys
import time
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numba import njit
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.errors import (
    CorruptGraphFile,
    GraphFileError,
    GraphFileNotFound,
    InvalidRequest,
)
from dueroute.planner.graph import (
    RoadGraph,
    _npz_member_offsets,
    great_circle_m,
    write_npz_aligned,
)
from dueroute.planner.limits import DEFAULT_LANDMARKS, MAX_LANDMARKS

LANDMARK_FORMAT_VERSION = 2

#: Landmark selection methods: Goldberg & Harrelson 2005 (farthest), Goldberg & Werneck 2005 (avoid).
METHODS = ("avoid", "farthest")

DEFAULT_COUNT = DEFAULT_LANDMARKS

#: Upper limit on the landmark count (memory is 8 bytes x nodes x count).
MAX_COUNT = MAX_LANDMARKS

#: Code of "no path" in a landmark row; finite distances use 0..INF_CODE - 1.
INF_CODE = 65535

#: Slack as a multiple of the unit (see the module docstring).
SLACK_PER_UNIT = 1.0 + 1e-6

#: Multiplies the great-circle bound (the kernel uses the same factor), see great_circle_bound_s.
GREAT_CIRCLE_SAFETY = 1.0 - 1e-9


def great_circle_bound_s(graph: RoadGraph, v: Any, t: int) -> Any:
    """Great-circle lower bound on travel time from ``v`` to ``t`` in seconds.

    Admissible by construction: every edge's length is at least the great-circle distance
    between its ends, and no edge is faster than ``graph.max_speed_mps``. The factor
    :data:`GREAT_CIRCLE_SAFETY` (as in the kernel) absorbs floating-point differences between
    this haversine and the one that measured the edge.

    Parameters
    ----------
    graph : RoadGraph
    v : int or int[k]
        Node index or indices.
    t : int
        Destination node index.

    Returns
    -------
    float or float64[k]
    """
    dist_m = great_circle_m(graph.lat[v], graph.lon[v], graph.lat[t], graph.lon[t])
    return dist_m * GREAT_CIRCLE_SAFETY / graph.max_speed_mps


def unit_for(max_distance_s: float) -> float:
    """Seconds per stored unit for distances up to ``max_distance_s`` (module docstring)."""
    return max(float(max_distance_s), 1e-3) / (INF_CODE - 1)


def slack_for(max_distance_s: float) -> float:
    """Slack in seconds that keeps the 16-bit ALT bounds admissible (module docstring)."""
    return unit_for(max_distance_s) * SLACK_PER_UNIT


def quantize(dist: np.ndarray, unit_s: float) -> np.ndarray:
    """float64 distances (inf = no path) -> uint16 codes (:data:`INF_CODE` = no path)."""
    q = np.full(dist.shape, INF_CODE, dtype=np.uint16)
    finite = np.isfinite(dist)
    q[finite] = np.minimum(np.rint(dist[finite] / unit_s), INF_CODE - 1).astype(np.uint16)
    return q


def dequantize(q: np.ndarray, unit_s: float) -> np.ndarray:
    """uint16 codes -> float64 seconds (inf for :data:`INF_CODE`)."""
    out = q.astype(np.float64) * unit_s
    out[q == INF_CODE] = np.inf
    return out


class StaleLandmarks(GraphFileError):
    """A landmark file written by another format version (derived data: rebuilt on use)."""


@dataclass(frozen=True, eq=False)
class Landmarks:
    """ALT landmark distances for one graph (see the module docstring for the kernel contract).

    Attributes
    ----------
    nodes : int32[L]
        Landmark node indices, distinct, all in the graph's largest strong component.
    lm : uint16[n, L, 2]
        ``lm[v, i, 0] ~ d(v -> nodes[i]) / unit_s``, ``lm[v, i, 1] ~ d(nodes[i] -> v) /
        unit_s``; :data:`INF_CODE` where no path exists (seconds: :attr:`lm_to`,
        :attr:`lm_from`).
    tree_to, tree_from : int32[L, n]
        Shortest-path trees to and from each landmark, as edge indices (-1 at the root and
        where there is no path).
    unit_s : float
        Seconds per stored unit.
    slack_s : float
        Subtracted from the landmark bound so the rounding never makes it inadmissible.
    max_distance_s : float
        Largest finite distance stored (``slack_s = slack_for(max_distance_s)``).
    method : str
        ``"avoid"`` or ``"farthest"``.
    graph_fingerprint : str
        :attr:`RoadGraph.fingerprint` of the graph the distances belong to.
    """

    nodes: np.ndarray
    lm: np.ndarray
    tree_to: np.ndarray
    tree_from: np.ndarray
    unit_s: float
    slack_s: float
    max_distance_s: float
    method: str
    graph_fingerprint: str
    meta: dict[str, Any] = field(default_factory=dict)
    path: Path | None = None

    @property
    def count(self) -> int:
        return int(self.nodes.shape[0])

    @property
    def n_nodes(self) -> int:
        return int(self.lm.shape[0])

    @property
    def lm_to(self) -> np.ndarray:
        """float64[n, L] seconds (decoded): ``d(v -> landmark_i)`` as stored, inf = no path."""
        return dequantize(np.asarray(self.lm[:, :, 0]), self.unit_s)

    @property
    def lm_from(self) -> np.ndarray:
        """float64[n, L] seconds (decoded): ``d(landmark_i -> v)`` as stored, inf = no path."""
        return dequantize(np.asarray(self.lm[:, :, 1]), self.unit_s)

    @property
    def consistency_tolerance_s(self) -> float:
        """``h(v) <= c(v, w) + h(w) + tolerance`` for every edge (the rounding only)."""
        return 2.0 * self.unit_s

    def check_graph(self, graph: RoadGraph) -> None:
        """Raise :class:`InvalidRequest` unless these landmarks were built for ``graph``, and
        :class:`CorruptGraphFile` when a tree names an edge the graph does not have (the
        kernel walks the trees without bounds checks)."""
        if self.graph_fingerprint != graph.fingerprint or self.n_nodes != graph.n_nodes:
            where = f" in {self.path}" if self.path is not None else ""
            raise InvalidRequest(
                f"the landmarks{where} belong to another graph (fingerprint "
                f"{self.graph_fingerprint[:12]}..., {self.n_nodes} nodes), not to "
                f"{graph.name} (fingerprint {graph.fingerprint[:12]}..., {graph.n_nodes} nodes); "
                "rebuild them for this graph"
            )
        for name in ("tree_to", "tree_from"):
            tree = getattr(self, name)
            if tree.size and (int(tree.min()) < -1 or int(tree.max()) >= graph.n_edges):
                raise CorruptGraphFile(
                    f"the landmarks{'' if self.path is None else ' in ' + str(self.path)}: "
                    f"{name} holds edge indices outside -1..{graph.n_edges - 1}; rebuild them"
                )


def alt_bound_s(landmarks: Landmarks, v: Any, t: int) -> Any:
    """The kernel's landmark term ``max(ALT - slack_s, 0)`` in float64 (numpy reference).

    ``+inf`` means the landmarks prove there is no path from ``v`` to ``t``.

    Parameters
    ----------
    v : int or int[k]
    t : int

    Returns
    -------
    float or float64[k]
    """
    v_arr = np.atleast_1d(np.asarray(v, dtype=np.int64))
    if landmarks.count == 0:
        out = np.zeros(v_arr.shape[0])
    else:
        rows = np.asarray(landmarks.lm)
        unit = landmarks.unit_s
        f_t = dequantize(rows[t, :, 1], unit)
        to_t = dequantize(rows[t, :, 0], unit)
        with np.errstate(invalid="ignore"):  # inf - inf: no information, skipped like the kernel
            fwd = f_t[None, :] - dequantize(rows[v_arr, :, 1], unit)
            bwd = dequantize(rows[v_arr, :, 0], unit) - to_t[None, :]
        both = np.fmax(fwd, bwd)  # fmax ignores a NaN operand
        both[np.isnan(both)] = -np.inf
        out = np.maximum(np.max(both, axis=1) - landmarks.slack_s, 0.0)
    return float(out[0]) if np.ndim(v) == 0 else out


def heuristic_s(graph: RoadGraph, landmarks: Landmarks | None, v: Any, t: int) -> Any:
    """``max(great-circle bound, landmark bound, 0)``: the kernel's ``h`` with the arc in place
    of the chord (so never below the kernel's value, and still admissible)."""
    gc = great_circle_bound_s(graph, v, t)
    if landmarks is None:
        return gc
    return np.maximum(gc, alt_bound_s(landmarks, v, t))


# --------------------------------------------------------------------------------------------
# Building


def landmarks_path(graph_path: str | Path) -> Path:
    """``<graph>.landmarks.npz`` beside a compiled graph file."""
    p = Path(graph_path)
    return p.with_name(p.stem + ".landmarks.npz")


def largest_component_nodes(graph: RoadGraph) -> np.ndarray:
    """int64[k]: nodes of the largest strongly connected component (ties: lowest label)."""
    if graph.n_nodes == 0:
        return np.zeros(0, dtype=np.int64)
    comp = np.asarray(graph.component)
    label = int(np.argmax(np.bincount(comp)))
    return np.flatnonzero(comp == label)


def build_landmarks(
    graph: RoadGraph,
    count: int = DEFAULT_COUNT,
    method: str = "avoid",
    seed: int = 0,
    progress: bool = True,
) -> Landmarks:
    """Choose ``count`` landmarks and compute their distances in both directions.

    Distances come from ``scipy.sparse.csgraph.dijkstra`` on the free-flow costs
    (``graph.csr()``); ``d(v -> landmark)`` uses the transposed matrix. Landmarks are chosen
    inside the largest strongly connected component, so each reaches, and is reached from, a
    large part of the map.

    Parameters
    ----------
    graph : RoadGraph
    count : int
        Number of landmarks, 0..MAX_COUNT; fewer when the largest component is smaller.
    method : {"avoid", "farthest"}
        ``farthest`` (Goldberg & Harrelson 2005): each new landmark is the node farthest
        (round trip) from those chosen so far. ``avoid`` (Goldberg & Werneck 2005): grow a
        shortest-path tree from a random root, weigh each node by how badly the current
        landmarks bound its distance, and descend into the heaviest landmark-free subtree.
    seed : int
        Seeds the random start (farthest) and roots (avoid).
    progress : bool
        Show a tqdm bar on stderr, one step per landmark.
    """
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)):
        raise InvalidRequest(f"landmark count must be an integer, got {count!r}")
    if not 0 <= int(count) <= MAX_COUNT:
        raise InvalidRequest(f"landmark count must be in 0..{MAX_COUNT}, got {count}")
    if method not in METHODS:
        raise InvalidRequest(f"landmark method must be one of {', '.join(METHODS)}, got {method!r}")
    started = time.perf_counter()
    n = graph.n_nodes
    scc = largest_component_nodes(graph)
    count = min(int(count), int(scc.shape[0]))
    rng = np.random.default_rng(seed)
    forward = graph.csr()
    backward = forward.T.tocsr()
    scc_forward = forward[scc][:, scc] if method == "avoid" and count else None

    nodes: list[int] = []
    dist_from = np.empty((count, n))  # row i: d(landmark_i -> v), float64, inf = no path
    dist_to = np.empty((count, n))  # row i: d(v -> landmark_i)
    pred_from = np.empty((count, n), dtype=np.int64)  # predecessor of v on landmark_i -> v
    pred_to = np.empty((count, n), dtype=np.int64)  # successor of v on v -> landmark_i
    # round-trip distance from the nearest chosen landmark, per SCC node (farthest selection)
    nearest_round_trip = np.full(scc.shape[0], np.inf)

    from tqdm import tqdm

    bar = tqdm(
        total=count,
        desc=f"landmarks ({method})",
        unit="lm",
        file=sys.stderr,
        disable=not progress,
        dynamic_ncols=True,
    )
    try:
        if method == "farthest" and count:
            start = int(scc[rng.integers(scc.shape[0])])
            round_trip = (
                dijkstra(forward, indices=start)[scc] + dijkstra(backward, indices=start)[scc]
            )
            candidate = int(scc[int(np.argmax(round_trip))])
        for i in range(count):
            if method == "farthest":
                if i > 0:
                    score = nearest_round_trip.copy()
                    score[np.isin(scc, nodes)] = -np.inf
                    candidate = int(scc[int(np.argmax(score))])
            else:
                assert scc_forward is not None
                candidate = _avoid_pick(scc, scc_forward, dist_from[:i], dist_to[:i], nodes, rng)
            nodes.append(candidate)
            dist_from[i], pred_from[i] = dijkstra(
                forward, indices=candidate, return_predecessors=True
            )
            dist_to[i], pred_to[i] = dijkstra(backward, indices=candidate, return_predecessors=True)
            nearest_round_trip = np.minimum(nearest_round_trip, dist_from[i][scc] + dist_to[i][scc])
            bar.update(1)
    finally:
        bar.close()

    built = _assemble(graph, nodes, dist_from, pred_from, dist_to, pred_to)
    return Landmarks(
        **built,
        method=method,
        graph_fingerprint=graph.fingerprint,
        meta={
            "seed": int(seed),
            "requested_count": int(count),
            "build_s": time.perf_counter() - started,
        },
    )


def landmarks_on_costs(graph: RoadGraph, landmarks: Landmarks, costs: np.ndarray) -> Landmarks:
    """The same landmark nodes with their distances and trees recomputed on other edge costs.

    Used for live traffic (``planner/traffic.py``): ALT built on costs ``c`` is admissible for
    any costs ``>= c``. ``costs`` is float64[m] with ``+inf`` for closed edges (scipy's
    ``csgraph.dijkstra`` never relaxes an infinite edge, so closed edges carry no path, and the
    trees never use one). The result keeps the graph's fingerprint in ``graph_fingerprint`` (it
    belongs to that graph) and records in ``meta["costs"]`` that it was not built on the base
    costs; it is never saved beside the graph.
    """
    started = time.perf_counter()
    costs = np.asarray(costs, dtype=np.float64)
    nodes = np.asarray(landmarks.nodes, dtype=np.int64)
    forward = graph.csr(costs)
    backward = forward.T.tocsr()
    n = graph.n_nodes
    if nodes.size:
        dist_from, pred_from = dijkstra(
            forward, directed=True, indices=nodes, return_predecessors=True
        )
        dist_to, pred_to = dijkstra(
            backward, directed=True, indices=nodes, return_predecessors=True
        )
        dist_from, dist_to = np.atleast_2d(dist_from), np.atleast_2d(dist_to)
        pred_from, pred_to = np.atleast_2d(pred_from), np.atleast_2d(pred_to)
    else:
        dist_from = dist_to = np.zeros((0, n))
        pred_from = pred_to = np.zeros((0, n), dtype=np.int64)
    built = _assemble(graph, nodes, dist_from, pred_from, dist_to, pred_to, costs)
    return Landmarks(
        **built,
        method=landmarks.method,
        graph_fingerprint=graph.fingerprint,
        meta={"costs": "live", "build_s": time.perf_counter() - started},
    )


def _assemble(
    graph: RoadGraph,
    nodes: Any,
    dist_from: np.ndarray,
    pred_from: np.ndarray,
    dist_to: np.ndarray,
    pred_to: np.ndarray,
    costs: np.ndarray | None = None,
) -> dict[str, Any]:
    """Quantized rows, trees as edge indices, unit and slack from scipy's distance and
    predecessor arrays (float64 / int [L, n]); read-only arrays."""
    n = graph.n_nodes
    count = len(nodes)
    max_distance_s = max(_finite_max(dist_from), _finite_max(dist_to))
    unit_s = unit_for(max_distance_s)
    lm = np.empty((n, count, 2), dtype=np.uint16)
    lm[:, :, 0] = quantize(dist_to.T, unit_s)
    lm[:, :, 1] = quantize(dist_from.T, unit_s)
    edge_of = _cheapest_edge_lookup(graph, costs)
    tree_from = edge_of(pred_from, np.arange(n)[None, :])  # edge pred -> v
    tree_to = edge_of(np.arange(n)[None, :], pred_to)  # edge v -> successor
    for arr in (lm, tree_from, tree_to):
        arr.flags.writeable = False
    return {
        "nodes": np.asarray(nodes, dtype=np.int32),
        "lm": lm,
        "tree_to": tree_to,
        "tree_from": tree_from,
        "unit_s": unit_s,
        "slack_s": slack_for(max_distance_s),
        "max_distance_s": max_distance_s,
    }


def _cheapest_edge_lookup(graph: RoadGraph, costs: np.ndarray | None = None) -> Any:
    """``edge_of(tails, heads) -> int32`` array: the cheapest edge (under ``costs``, default the
    graph's) from each tail to each head (-1 where a tail is negative, i.e. scipy's "no
    predecessor"). The shortest-path trees come from ``graph.csr(costs)``, which keeps the
    cheapest of parallel edges, so this picks that one."""
    n = graph.n_nodes
    tail = np.asarray(graph.tail, dtype=np.int64)
    head = np.asarray(graph.head, dtype=np.int64)
    keys = tail * n + head
    w = np.asarray(graph.travel_time_s if costs is None else costs)
    order = np.lexsort((w, keys))
    sorted_keys = keys[order]
    first = np.ones(order.shape[0], dtype=bool)
    first[1:] = sorted_keys[1:] != sorted_keys[:-1]
    uniq_keys, uniq_edges = sorted_keys[first], order[first]

    def edge_of(tails: np.ndarray, heads: np.ndarray) -> np.ndarray:
        t, h = np.broadcast_arrays(tails, heads)
        valid = (t >= 0) & (h >= 0)
        q = np.where(valid, t * n + h, 0)
        pos = np.minimum(np.searchsorted(uniq_keys, q), max(uniq_keys.shape[0] - 1, 0))
        found = valid & (uniq_keys.shape[0] > 0)
        if uniq_keys.shape[0]:
            found &= uniq_keys[pos] == q
        out = np.where(found, uniq_edges[pos] if uniq_keys.shape[0] else -1, -1)
        return np.ascontiguousarray(out, dtype=np.int32)

    return edge_of


def _finite_max(dist: np.ndarray) -> float:
    if dist.size == 0:
        return 0.0
    return float(np.max(np.where(np.isfinite(dist), dist, 0.0)))


def _avoid_pick(
    scc: np.ndarray,
    scc_forward: Any,
    dist_from: np.ndarray,
    dist_to: np.ndarray,
    chosen: list[int],
    rng: np.random.Generator,
) -> int:
    """One step of avoid selection (Goldberg & Werneck 2005), inside the largest component.

    Root ``r`` is a random non-landmark node. In the shortest-path tree from ``r`` every node
    weighs ``d(r, v) - lb(r, v)`` (how much the current landmarks underestimate); a subtree
    that holds a landmark weighs 0. From ``r`` we walk to the heaviest child until a leaf,
    which becomes the new landmark. Falls back to the node farthest from ``r`` when every
    subtree is covered.
    """
    k = scc.shape[0]
    local_chosen = np.searchsorted(scc, np.asarray(chosen, dtype=np.int64))
    is_landmark = np.zeros(k, dtype=np.bool_)
    is_landmark[local_chosen] = True
    free = np.flatnonzero(~is_landmark)
    root = int(free[rng.integers(free.shape[0])])
    dist, pred = dijkstra(scc_forward, indices=root, return_predecessors=True)
    if dist_from.shape[0]:
        d_from = dist_from[:, scc]  # [i, local v]
        d_to = dist_to[:, scc]
        lower = np.maximum(
            d_from - d_from[:, root : root + 1], d_to[:, root : root + 1] - d_to
        ).max(axis=0)
        lower = np.maximum(lower, 0.0)
    else:
        lower = np.zeros(k)
    weight = np.where(np.isfinite(dist), np.maximum(dist - lower, 0.0), 0.0)
    parent = np.where(pred < 0, -1, pred).astype(np.int64)
    order = np.argsort(parent, kind="stable")
    child_ptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(np.bincount(parent[parent >= 0], minlength=k), out=child_ptr[1:])
    children = order[np.count_nonzero(parent < 0) :]
    leaf = _avoid_descend(root, parent, child_ptr, children, weight, is_landmark)
    if leaf < 0 or is_landmark[leaf]:
        score = np.where(is_landmark | ~np.isfinite(dist), -np.inf, dist)
        leaf = int(np.argmax(score))
    return int(scc[leaf])


@njit(cache=True, nogil=True)
def _avoid_descend(
    root: int,
    parent: np.ndarray,
    child_ptr: np.ndarray,
    children: np.ndarray,
    weight: np.ndarray,
    is_landmark: np.ndarray,
) -> int:
    """Subtree weights (zero where a landmark is inside), then the heaviest descent from root.

    ``children[child_ptr[p]:child_ptr[p + 1]]`` are the tree children of ``p``. Returns the
    leaf reached, or -1 when no child of the root has a positive landmark-free weight.
    """
    k = parent.shape[0]
    # breadth-first order from the root: every parent precedes its children
    bfs = np.empty(k, dtype=np.int64)
    bfs[0] = root
    head = 0
    tail = 1
    while head < tail:
        p = bfs[head]
        head += 1
        for j in range(child_ptr[p], child_ptr[p + 1]):
            bfs[tail] = children[j]
            tail += 1
    size = np.zeros(k)
    covered = np.zeros(k, dtype=np.bool_)
    for j in range(tail - 1, -1, -1):  # children before parents
        v = bfs[j]
        size[v] += weight[v]
        covered[v] = covered[v] or is_landmark[v]
        p = parent[v]
        if p >= 0 and v != root:
            size[p] += size[v]
            covered[p] = covered[p] or covered[v]
    for j in range(tail):
        if covered[bfs[j]]:
            size[bfs[j]] = 0.0
    v = root
    while True:
        best = -1
        best_size = 0.0
        for j in range(child_ptr[v], child_ptr[v + 1]):
            c = children[j]
            if size[c] > best_size or (best < 0 and v != root and not covered[c]):
                best = c
                best_size = size[c]
        if best < 0:
            return v if v != root else -1
        v = best


# --------------------------------------------------------------------------------------------
# Saving and loading


def save_landmarks(landmarks: Landmarks, path: str | Path) -> Path:
    """Write ``landmarks`` as one uncompressed ``.npz`` (temp file, then rename)."""
    path = Path(path)
    if path.suffix != ".npz":
        raise InvalidRequest(f"a landmark file must end in .npz, got {path.name!r}")
    path.parent.mkdir(parents=True, exist_ok=True)
    meta = dict(landmarks.meta)
    meta.update(
        format_version=LANDMARK_FORMAT_VERSION,
        kind="dueroute-landmarks",
        graph_fingerprint=landmarks.graph_fingerprint,
        method=landmarks.method,
        count=landmarks.count,
        nodes=landmarks.n_nodes,
        unit_s=landmarks.unit_s,
        slack_s=landmarks.slack_s,
        max_distance_s=landmarks.max_distance_s,
    )
    # one temp file per process: several workers may build the same landmarks at once, and
    # the rename makes whichever finishes last the complete file readers see
    tmp = path.with_name(f"{path.name}.{os.getpid()}.tmp")
    try:
        write_npz_aligned(
            tmp,
            {
                "meta": np.array(json.dumps(meta, sort_keys=True)),
                "nodes": np.ascontiguousarray(landmarks.nodes, dtype=np.int32),
                "lm": np.ascontiguousarray(landmarks.lm, dtype=np.uint16),
                "tree_to": np.ascontiguousarray(landmarks.tree_to, dtype=np.int32),
                "tree_from": np.ascontiguousarray(landmarks.tree_from, dtype=np.int32),
            },
        )
        tmp.replace(path)
    finally:
        tmp.unlink(missing_ok=True)
    return path


_LANDMARK_ARRAYS = {
    "nodes": np.int32,
    "lm": np.uint16,
    "tree_to": np.int32,
    "tree_from": np.int32,
}


def load_landmarks(
    path: str | Path, graph: RoadGraph | None = None, *, mmap: bool = True
) -> Landmarks:
    """Load a landmark file; with ``mmap`` the distance arrays are read-only views of the file.

    Raises :class:`GraphFileNotFound`, :class:`CorruptGraphFile` (unreadable, missing or
    mis-shaped arrays, non-finite values) or :class:`InvalidRequest` (built for another graph,
    when ``graph`` is given).
    """
    path = Path(path)
    if not path.is_file():
        raise GraphFileNotFound(f"landmark file not found: {path}")
    try:
        members = _npz_member_offsets(path)
        with np.load(path, allow_pickle=False) as npz:
            if "meta" not in npz.files:
                raise CorruptGraphFile(f"{path}: not a dueroute landmark file (no meta)")
            meta = json.loads(str(npz["meta"][()]))
            if not isinstance(meta, dict) or meta.get("kind") != "dueroute-landmarks":
                raise CorruptGraphFile(f"{path}: not a dueroute landmark file")
            if meta.get("format_version") != LANDMARK_FORMAT_VERSION:
                raise StaleLandmarks(
                    f"{path}: landmark file format {meta.get('format_version')!r}, this "
                    f"dueroute writes {LANDMARK_FORMAT_VERSION}; it is rebuilt on first use"
                )
            missing = sorted(set(_LANDMARK_ARRAYS) - set(npz.files))
            if missing:
                raise CorruptGraphFile(f"{path}: landmark file is missing arrays {missing}")
            arrays: dict[str, np.ndarray] = {}
            for name, dtype in _LANDMARK_ARRAYS.items():
                offset, dt, shape, fortran = members[name]
                if dt != np.dtype(dtype):
                    raise CorruptGraphFile(
                        f"{path}: array {name} has dtype {dt}, expected {np.dtype(dtype)}"
                    )
                if fortran and len(shape) > 1:
                    raise CorruptGraphFile(f"{path}: array {name} is not node-major (C order)")
                count = int(np.prod(shape)) if shape else 1
                if mmap and count:
                    arrays[name] = np.memmap(path, dtype=dt, mode="r", offset=offset, shape=shape)
                else:
                    arrays[name] = np.ascontiguousarray(npz[name])
            unit_s = float(meta["unit_s"])
            slack_s = float(meta["slack_s"])
            max_distance_s = float(meta["max_distance_s"])
            method = str(meta["method"])
            graph_fingerprint = str(meta["graph_fingerprint"])
    except (CorruptGraphFile, GraphFileNotFound, StaleLandmarks):
        raise
    except (
        zipfile.BadZipFile,
        ValueError,
        TypeError,
        OSError,
        KeyError,
        EOFError,
        json.JSONDecodeError,
    ) as exc:
        raise CorruptGraphFile(f"{path}: not a readable landmark file ({exc})") from exc
    landmarks = Landmarks(
        nodes=arrays["nodes"],
        lm=arrays["lm"],
        tree_to=arrays["tree_to"],
        tree_from=arrays["tree_from"],
        unit_s=unit_s,
        slack_s=slack_s,
        max_distance_s=max_distance_s,
        method=method,
        graph_fingerprint=graph_fingerprint,
        meta=meta,
        path=path,
    )
    _validate(landmarks, path)
    if graph is not None:
        landmarks.check_graph(graph)
    return landmarks


def _validate(lm: Landmarks, path: Path) -> None:
    """Structural checks, plus the slack the admissibility proof relies on."""
    problems = []
    k = lm.nodes.shape[0]
    n = lm.lm.shape[0] if lm.lm.ndim == 3 else -1
    if lm.nodes.ndim != 1:
        problems.append("nodes is not one-dimensional")
    if lm.lm.shape != (n, k, 2):
        problems.append(f"lm has shape {lm.lm.shape}, expected (nodes, {k} landmarks, 2)")
    elif k and (int(lm.nodes.min()) < 0 or int(lm.nodes.max()) >= n):
        problems.append("nodes holds indices outside the graph")
    for name in ("tree_to", "tree_from"):
        if getattr(lm, name).shape != (k, max(n, 0)):
            problems.append(f"{name} has shape {getattr(lm, name).shape}, expected ({k}, nodes)")
    if lm.method not in METHODS:
        problems.append(f"unknown method {lm.method!r}")
    if not (math.isfinite(lm.max_distance_s) and lm.max_distance_s >= 0):
        problems.append("max_distance_s is not a finite non-negative number")
    elif not (math.isfinite(lm.unit_s) and lm.unit_s >= unit_for(lm.max_distance_s) * 0.999999):
        problems.append("unit_s is too small for the stored distances")
    elif not lm.slack_s >= lm.unit_s * SLACK_PER_UNIT * 0.999999:
        problems.append("slack_s is too small for the stored unit")
    if problems:
        raise CorruptGraphFile(f"{path}: " + "; ".join(problems))


def load_or_build_landmarks(
    graph: RoadGraph,
    count: int = DEFAULT_COUNT,
    method: str = "avoid",
    seed: int = 0,
    progress: bool = True,
    *,
    path: str | Path | None = None,
    rebuild: bool = False,
    turn_profile: Any = None,
) -> Landmarks:
    """Landmarks stored beside the graph, built (and saved) when missing or stale.

    For a graph with turn restrictions (or a ``turn_profile`` with turn costs,
    ``planner.turns.TurnProfile``) they are built on the graph the search runs on, its search
    graph of legal drives (``planner.endpoints.planning_graph``), and stored as
    ``<graph>.turns.landmarks.npz`` (``<graph>.turns-<profile tag>.landmarks.npz``).

    The file is ``path`` or ``<graph>.landmarks.npz``. A file built for another version of the
    graph (fingerprint differs) or with another count or method is rebuilt and replaced; a
    corrupt file raises :class:`CorruptGraphFile` (delete it, or pass ``rebuild=True``). A graph
    that was never saved (``graph.path is None``) and no ``path`` gives landmarks in memory, and
    so does a folder we may not write to (``meta["not_saved"]`` says why).
    """
    from dueroute.planner.endpoints import planning_graph

    # a graph with turn rules is searched as its search graph
    graph = planning_graph(graph, turn_profile)
    target = Path(path) if path is not None else None
    if target is None and graph.path is not None:
        target = landmarks_path(graph.path)
    if target is not None and target.is_file() and not rebuild:
        try:
            found: Landmarks | None = load_landmarks(target)
        except StaleLandmarks:
            found = None  # another format version: rebuild below
        except CorruptGraphFile as exc:
            raise CorruptGraphFile(
                f"{exc}; it is derived data: delete it and it is rebuilt from the graph"
            ) from exc
        wanted = min(int(count), int(largest_component_nodes(graph).shape[0]))
        if found is not None and (
            found.graph_fingerprint == graph.fingerprint
            and found.n_nodes == graph.n_nodes
            and found.count == wanted
            and found.method == method
        ):
            return found
    built = build_landmarks(graph, count=count, method=method, seed=seed, progress=progress)
    if target is None:
        return built
    try:
        save_landmarks(built, target)
    except OSError as exc:  # read-only folder, disk full: the search still works from memory
        built.meta["not_saved"] = f"{target}: {exc}"
        return built
    return load_landmarks(target, graph)
