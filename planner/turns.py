"""Turn rules as a search graph: the legal drives of a road graph, searchable node by node.

The search kernel is node-based: it finds shortest paths in a directed graph given as CSR
arrays. Turn restrictions and U-turn bans are rules about *pairs* (or longer sequences) of road
edges, so they cannot be checked node by node on the road graph. :func:`build_search_graph`
builds a second directed graph, the **search graph**, whose paths are exactly the legal drives
of the road graph, so that the same kernel can search it unchanged.

Legal drives
------------
A drive is a sequence of road edges ``e1, e2, ..., ek`` with ``head[ei] == tail[ei+1]``. It is
legal when

* it contains no banned sequence: for every ``no_*`` restriction ``from, via..., to`` (road
  edges, see ``planner.graph``) the sequence does not occur as consecutive edges of the drive;
* it obeys every ``only_*`` restriction: wherever ``from, via...`` occur as consecutive edges
  and the drive goes on, the next edge is ``to``;
* under ``uturns="forbid_at_junctions"`` (the default) it makes no U-turn at a junction: at a
  node with three or more distinct neighbours, an edge is never followed by one of its reverse
  edges (the edge back to the node it came from along the same geometry,
  :func:`~dueroute.planner.graph.reverse_edge_pairs`). U-turns at dead ends (one neighbour)
  are always allowed, and so are U-turns at the other nodes with two neighbours, where the
  road merely goes on (a road's end or a change of its tags). ``uturns="allow"`` allows every
  U-turn that no restriction bans. An ``only_*`` restriction whose ``to`` is the U-turn
  (``only_u_turn``) allows it: the sign names it explicitly.

A drive starts at a road node by any of its out-edges (no arrival, so no rule about the
arrival applies) or at a point on an edge (then it "arrived" by that edge).

Search nodes and arcs
---------------------
A search node is a road node together with an *arrival state*: what the rules need to know
about how the drive arrived there. An arc (search edge) drives one road edge; its cost is the
road edge's cost plus the turn cost of taking it after the arrival (:class:`TurnCosts`).

* **No restrictions and no turn costs: the search graph is the road graph** (identity
  mapping, the road graph's own arrays, nothing copied). U-turn bans need no expansion there:
  with non-negative costs, a shortest path extracted from a shortest-path tree (as every
  Dijkstra or A* search does) never visits a node twice, and a U-turn ``u -> v -> u`` visits
  ``u`` twice, so the shortest legal drive costs what the shortest path costs and the path the
  search returns is legal. (Walks with U-turns remain paths of the identity search graph;
  only its shortest paths are guaranteed legal -- which is all a search returns. The one
  exception is a "route" from a node back to itself, which a search answers without
  searching.)
* **Otherwise the graph is expanded edge-based at the nodes where the arrival matters**:
  junctions when U-turns are forbidden there, every node a restriction passes through (the
  head of its ``from`` and ``via`` edges), and every node but the two-neighbour ones when
  turn costs are set. Such a node gets one candidate state per arrival edge, whose arcs are
  its allowed turns: not the U-turn (at a junction, unless allowed), no banned turn, only the
  ``to`` edge under an ``only_*`` restriction. Every other node keeps one state (all
  out-edges, no turn cost), as in the road graph.
* **Via-way restrictions** need to remember more than the last edge: after ``from, via1`` the
  drive may be on its way into ``from, via1, via2, to``. The arrival states are therefore the
  states of a pattern-matching automaton over road edges (Aho & Corasick 1975) whose patterns
  are the restrictions' *triggers* ``from, via...``: a state is the longest suffix of the
  drive so far that is a prefix of some trigger (of length one: just the arrival edge). Its
  rules are the rules of every trigger among the suffixes it stands for (its failure chain),
  so overlapping restrictions are applied exactly. Driving edge ``f`` from state ``P`` leads
  to the longest suffix of ``P f`` that is a trigger prefix.
* **States with identical futures are merged**: candidate states at one road node whose arcs
  are the same (same allowed road edges, same turn costs, same successor states) become one
  search node. Merging states that have literally the same outgoing arcs never changes which
  drives are possible or what they cost; it keeps the graph small (one-way arrivals at a
  junction all share one state, for example).
* **Two ways to build the states, one result.** At a junction whose only arrival rule is the
  U-turn ban (no restriction passes through it, no turn costs, no duplicate reverse edges),
  arrival ``e``'s future is "every out-edge but ``reverse_edge[e]``", so arrivals are grouped
  by that one edge directly. Every other expanded node evaluates each (arrival, out-edge)
  pair -- rules, U-turn, turn class, successor -- and groups arrivals by the exact sequence of
  these codes (a sort, no hashing). With sparse restrictions and no turn costs almost every
  junction takes the first way, which is what makes a million-node build take seconds.

The search nodes of one road node are numbered consecutively, in road-node order, so the
search graph keeps the road graph's memory locality (Hilbert order).

Turn costs
----------
The turn angle at a node is the change of heading from the arrival to the departure,
measured on each edge between the node and its first polyline point at least
``TurnCosts.probe_m`` along the edge (the far end when the edge is shorter), with spherical
bearings. Within +-30 degrees a turn counts as straight and is free (common practice; the
threshold is configurable), beyond 150 degrees as a U-turn, otherwise right (clockwise) or
left. Turn costs are charged at every node except those with exactly two neighbours, where the
road merely bends and nobody turns (junctions, dead ends, a loop's own node).

Searching it (for the kernel)
-----------------------------
* Start at road node ``v``: the kernel starts from several search nodes at once, with initial
  ``g``: :meth:`SearchGraph.start_states` lists ``(entry_state[e], cost of e)`` for every
  out-edge ``e`` of ``v``.
* Reach road node ``t`` at any of its states, :meth:`SearchGraph.target_states`; a point on
  edge ``e`` from any search node that may drive ``e``, :meth:`SearchGraph.states_departing_by`.
* Heuristics are those of the road node ``node_road[s]``: every legal drive is a road path
  and turn costs are non-negative, so great-circle and ALT bounds computed on the road graph
  stay admissible.
* Live costs never need a rebuild: :meth:`SearchGraph.arc_costs` recomputes
  ``cost_s = road_cost[road_edge] + turn_cost_s``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import (
    TURN_NO,
    TURN_ONLY,
    RoadGraph,
    check_edge_costs,
    edge_polylines,
    great_circle_m,
)

#: Allowed values of ``uturns``.
UTURN_POLICIES = ("forbid_at_junctions", "allow")

#: Turn classes (index into :data:`TURN_CLASSES`).
TURN_STRAIGHT = 0
TURN_RIGHT = 1
TURN_LEFT = 2
TURN_UTURN = 3
TURN_CLASSES = ("straight", "right", "left", "uturn")

# Upper bound on distinct turn-cost values in a state signature (one per turn class).
_N_COST_CODES = 4


@dataclass(frozen=True)
class TurnCosts:
    """Fixed penalties for turning, in seconds, added to the road cost of the edge turned into.

    A turn is classified by its angle (see the module docstring); all penalties zero means no
    turn costs at all.
    """

    #: Penalty for a left turn (counter-clockwise beyond ``straight_max_deg``), seconds.
    left_s: float = 0.0
    #: Penalty for a right turn (clockwise beyond ``straight_max_deg``), seconds.
    right_s: float = 0.0
    #: Penalty for a U-turn (a turn at least ``uturn_min_deg`` sharp), seconds.
    uturn_s: float = 0.0
    #: A turn within +-this angle is straight and free, degrees (30: common practice).
    straight_max_deg: float = 30.0
    #: A turn at least this sharp is a U-turn, degrees (150: our choice, not a standard).
    uturn_min_deg: float = 150.0
    #: Headings are measured to the first polyline point at least this far along the edge, m.
    probe_m: float = 15.0

    def __post_init__(self) -> None:
        for name in ("left_s", "right_s", "uturn_s"):
            value = getattr(self, name)
            if not _is_real(value) or not (0.0 <= value < math.inf):
                raise InvalidRequest(
                    f"turn cost {name} must be a finite number of seconds >= 0, got {value!r}"
                )
        a, b = self.straight_max_deg, self.uturn_min_deg
        if not (_is_real(a) and _is_real(b) and 0.0 <= a < b <= 180.0):
            raise InvalidRequest(
                "turn angles must satisfy 0 <= straight_max_deg < uturn_min_deg <= 180, got "
                f"straight_max_deg={a!r}, uturn_min_deg={b!r}"
            )
        if not _is_real(self.probe_m) or not (0.0 < self.probe_m < math.inf):
            raise InvalidRequest(f"probe_m must be a finite distance > 0 m, got {self.probe_m!r}")

    @property
    def class_costs_s(self) -> np.ndarray:
        """float64[4]: penalty per turn class, indexed by ``TURN_STRAIGHT .. TURN_UTURN``."""
        return np.array([0.0, self.right_s, self.left_s, self.uturn_s], dtype=np.float64)

    @property
    def is_zero(self) -> bool:
        return self.left_s == 0.0 and self.right_s == 0.0 and self.uturn_s == 0.0


@dataclass(frozen=True)
class TurnProfile:
    """How a vehicle may turn: the U-turn rule and the turn penalties of its profile.

    The default (U-turns banned at junctions, no penalties) is what a graph is searched with
    unless a caller says otherwise; each profile gets its own search graph and landmarks.
    """

    uturns: str = "forbid_at_junctions"
    costs: TurnCosts | None = None

    def __post_init__(self) -> None:
        if self.uturns not in UTURN_POLICIES:
            raise InvalidRequest(
                f"uturns must be one of {list(UTURN_POLICIES)}, got {self.uturns!r}"
            )
        if self.costs is not None and not isinstance(self.costs, TurnCosts):
            raise InvalidRequest(
                f"turn costs must be a TurnCosts or None, got {type(self.costs).__name__}"
            )
        if self.costs is not None and self.costs.is_zero:
            object.__setattr__(self, "costs", None)  # all zero is no turn costs

    @property
    def is_default(self) -> bool:
        return self.uturns == "forbid_at_junctions" and self.costs is None

    @property
    def tag(self) -> str:
        """A short name for files derived from the profile ('' for the default)."""
        if self.is_default:
            return ""
        c = self.costs
        text = f"{self.uturns}|" + (
            "none"
            if c is None
            else f"{c.left_s!r},{c.right_s!r},{c.uturn_s!r},{c.straight_max_deg!r},"
            f"{c.uturn_min_deg!r},{c.probe_m!r}"
        )
        return hashlib.sha256(text.encode()).hexdigest()[:10]

    def describe(self) -> dict[str, Any]:
        """JSON-ready: the U-turn rule and the penalties (seconds)."""
        c = self.costs
        return {
            "uturns": self.uturns,
            "turn_costs_s": None
            if c is None
            else {"left": c.left_s, "right": c.right_s, "uturn": c.uturn_s},
        }


#: Keys of :func:`parse_turn_costs`.
TURN_COST_KEYS = ("left", "right", "uturn")


def parse_turn_costs(text: str | None) -> TurnCosts | None:
    """``"left=8,right=3,uturn=30"`` (seconds; any subset, each key once) as :class:`TurnCosts`;
    None or ``""`` for none. Raises :class:`InvalidRequest` naming what is wrong."""
    if text is None or not text.strip():
        return None
    values: dict[str, float] = {}
    for part in text.split(","):
        key, sep, raw = part.strip().partition("=")
        key = key.strip()
        if not sep or key not in TURN_COST_KEYS:
            raise InvalidRequest(
                f"turn costs: {part.strip()!r} is not KEY=SECONDS with KEY one of "
                f"{', '.join(TURN_COST_KEYS)} (e.g. left=8,right=3,uturn=30)"
            )
        if key in values:
            raise InvalidRequest(f"turn costs: {key} given twice")
        try:
            value = float(raw)
        except ValueError:
            raise InvalidRequest(
                f"turn costs: {key}={raw.strip()!r} is not a number of seconds"
            ) from None
        values[key] = value
    return TurnCosts(
        left_s=values.get("left", 0.0),
        right_s=values.get("right", 0.0),
        uturn_s=values.get("uturn", 0.0),
    )


def _is_real(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


# --------------------------------------------------------------------------------------------
# Road-graph structure the rules need


def neighbour_count(graph: RoadGraph) -> np.ndarray:
    """int64[n]: number of distinct other nodes each node shares an edge with (either way).

    Junction: 3 or more; dead end: 1. Self-loops and parallel edges do not count twice.
    """
    n = graph.n_nodes
    tail = np.asarray(graph.tail, dtype=np.int64)
    head = np.asarray(graph.head, dtype=np.int64)
    a = np.concatenate((tail, head))
    b = np.concatenate((head, tail))
    keep = a != b
    pairs = np.sort(a[keep] * n + b[keep])
    first = np.ones(pairs.shape[0], dtype=bool)
    first[1:] = pairs[1:] != pairs[:-1]
    return np.bincount(pairs[first] // n, minlength=n).astype(np.int64)


def _bearing_deg(lat1: np.ndarray, lon1: np.ndarray, lat2: Any, lon2: Any) -> np.ndarray:
    """Initial great-circle bearing from point 1 to point 2, degrees clockwise from north."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    y = np.sin(dl) * np.cos(p2)
    x = np.cos(p1) * np.sin(p2) - np.sin(p1) * np.cos(p2) * np.cos(dl)
    return np.degrees(np.arctan2(y, x))


def edge_end_headings(
    graph: RoadGraph, probe_m: float = 15.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Heading of every edge where it leaves its tail and where it arrives at its head.

    Each heading is measured between the end node and the first polyline point at least
    ``probe_m`` along the edge from that node (the far end when the edge is shorter), as a
    spherical bearing (degrees clockwise from north).

    Returns
    -------
    depart_deg, arrive_deg : float64[m]
        Direction of travel leaving ``tail[e]`` and arriving at ``head[e]``.
    depart_ok, arrive_ok : bool[m]
        False where the probe point coincides with the node (zero-length edge): no heading.
    """
    m = graph.n_edges
    tail, head = np.asarray(graph.tail), np.asarray(graph.head)
    lat, lon = np.asarray(graph.lat), np.asarray(graph.lon)
    # Without interior points the probe point is the far end; only bent edges need distances
    # along their polylines (a few percent of the edges of a simplified road graph).
    out_lat, out_lon = lat[head], lon[head]
    in_lat, in_lon = lat[tail], lon[tail]
    bent = np.flatnonzero(np.diff(np.asarray(graph.geom_indptr)) > 0)
    if bent.size:
        ptr, plat, plon = edge_polylines(graph, bent)
        seg = great_circle_m(plat[:-1], plon[:-1], plat[1:], plon[1:])
        seg[ptr[1:-1] - 1] = 0.0  # no segment from one edge's head to the next edge's tail
        dist = np.zeros(plat.shape[0], dtype=np.float64)
        np.cumsum(seg, out=dist[1:])
        first, last = ptr[:-1], ptr[1:] - 1
        # dist is non-decreasing over all edges, so one searchsorted finds every probe point
        o = np.clip(np.searchsorted(dist, dist[first] + probe_m, side="left"), first + 1, last)
        i = np.clip(np.searchsorted(dist, dist[last] - probe_m, side="right") - 1, first, last - 1)
        out_lat[bent], out_lon[bent] = plat[o], plon[o]
        in_lat[bent], in_lon[bent] = plat[i], plon[i]
    t_lat, t_lon, h_lat, h_lon = lat[tail], lon[tail], lat[head], lon[head]
    depart = _bearing_deg(t_lat, t_lon, out_lat, out_lon)
    arrive = np.mod(_bearing_deg(h_lat, h_lon, in_lat, in_lon) + 180.0, 360.0)
    depart_ok = (out_lat != t_lat) | (out_lon != t_lon)
    arrive_ok = (in_lat != h_lat) | (in_lon != h_lon)
    assert depart.shape == (m,)
    return depart, arrive, depart_ok, arrive_ok


def turn_angles_deg(
    graph: RoadGraph, arrive_edges: np.ndarray, depart_edges: np.ndarray, probe_m: float = 15.0
) -> np.ndarray:
    """float64[k]: signed turn angle from each arrival edge into its departure edge.

    Positive is clockwise (a right turn), in ``[-180, 180)``; 0 where an edge has no heading
    (zero length). ``head[arrive_edges[i]]`` must be ``tail[depart_edges[i]]``.
    """
    depart, arrive, depart_ok, arrive_ok = edge_end_headings(graph, probe_m)
    return _turn_angles(depart, arrive, depart_ok, arrive_ok, arrive_edges, depart_edges)


def _turn_angles(
    depart: np.ndarray,
    arrive: np.ndarray,
    depart_ok: np.ndarray,
    arrive_ok: np.ndarray,
    e: np.ndarray,
    f: np.ndarray,
) -> np.ndarray:
    angle = np.mod(depart[f] - arrive[e] + 180.0, 360.0) - 180.0
    angle[~(depart_ok[f] & arrive_ok[e])] = 0.0
    return angle


def classify_turns(angle_deg: np.ndarray, turn_costs: TurnCosts) -> np.ndarray:
    """int8[k]: turn class (``TURN_STRAIGHT .. TURN_UTURN``) of each signed angle."""
    a = np.abs(np.asarray(angle_deg, dtype=np.float64))
    cls = np.where(np.asarray(angle_deg) > 0, TURN_RIGHT, TURN_LEFT).astype(np.int8)
    cls[a <= turn_costs.straight_max_deg] = TURN_STRAIGHT
    cls[a >= turn_costs.uturn_min_deg] = TURN_UTURN
    return cls


def check_restrictions(graph: RoadGraph) -> None:
    """Raise :class:`InvalidRequest` unless every turn restriction is a well-formed sequence.

    ``load_graph`` checks this for files; graphs built in memory are checked here, because the
    search graph trusts the sequences.
    """
    ptr = np.asarray(graph.turn_indptr, dtype=np.int64)
    seq = np.asarray(graph.turn_edges, dtype=np.int64)
    kind = np.asarray(graph.turn_kind)
    r, m = kind.shape[0], graph.n_edges
    if ptr.shape != (r + 1,) or ptr[0] != 0 or ptr[-1] != seq.shape[0]:
        raise InvalidRequest(
            f"turn_indptr must have {r + 1} entries from 0 to {seq.shape[0]} (one per "
            f"restriction plus one), got shape {ptr.shape}"
        )
    if r == 0:
        return
    lens = np.diff(ptr)
    bad = np.flatnonzero(lens < 2)
    if bad.size:
        raise InvalidRequest(
            f"turn restriction {int(bad[0])} has {int(lens[bad[0]])} edges; a restriction is "
            "a sequence from, via..., to of at least two edges"
        )
    bad = np.flatnonzero((kind != TURN_NO) & (kind != TURN_ONLY))
    if bad.size:
        raise InvalidRequest(
            f"turn restriction {int(bad[0])} has kind {int(kind[bad[0]])}; allowed are "
            f"{TURN_NO} (no_*) and {TURN_ONLY} (only_*)"
        )
    outside = np.flatnonzero((seq < 0) | (seq >= m))
    if outside.size:
        i = int(np.searchsorted(ptr, int(outside[0]), side="right")) - 1
        raise InvalidRequest(f"turn restriction {i} names an edge outside 0..{m - 1}")
    owner = np.repeat(np.arange(r, dtype=np.int64), lens)
    pos = np.flatnonzero(owner[1:] == owner[:-1])  # consecutive positions in one restriction
    broken = pos[np.asarray(graph.head)[seq[pos]] != np.asarray(graph.tail)[seq[pos + 1]]]
    if broken.size:
        j = int(broken[0])
        raise InvalidRequest(
            f"turn restriction {int(owner[j])}: edge {int(seq[j])} ends at node "
            f"{int(graph.head[seq[j]])} but the next edge {int(seq[j + 1])} starts at node "
            f"{int(graph.tail[seq[j + 1]])}; each edge must start where the previous one ends"
        )


# --------------------------------------------------------------------------------------------
# The search graph


@dataclass(frozen=True, eq=False)
class SearchGraph:
    """Directed graph whose paths are the legal drives of ``graph`` (see the module docstring).

    ``S`` search nodes, ``A`` arcs (search edges), on a road graph of ``n`` nodes and ``m``
    edges. Search node and arc ids fit int32.

    Attributes
    ----------
    graph : RoadGraph
        The road graph (a reference, not a copy).
    indptr : int64[S + 1]
        CSR row pointer: the arcs leaving search node ``s`` are ``indptr[s]:indptr[s + 1]``.
    head : int32[A]
        Search node each arc leads to.
    cost_s : float64[A]
        ``road_cost_s[road_edge] + turn_cost_s``: what the kernel sums.
    turn_cost_s : float64[A]
        Turn penalty of each arc (read-only zeros without turn costs).
    road_cost_s : float64[m]
        Road edge costs ``cost_s`` was computed from (``graph.travel_time_s`` by default).
    entry_state : int32[m]
        ``entry_state[e]``: the search node "arrived at ``head[e]`` by ``e``" (with no longer
        history; via-way states are reached from it by the arcs).
    road_edge : int32[A]
        Road edge each arc drives (property).
    node_road : int32[S]
        Road node of each search node (property).
    node_states_indptr : int64[n + 1], node_states : int32[S]
        Search nodes of road node ``v``: ``node_states[node_states_indptr[v]:...[v + 1]]``;
        they are numbered consecutively, so ``node_states[k] == k`` (properties).
    identity : bool
        True when the search graph is the road graph itself (no restrictions, no turn costs):
        ``indptr``, ``head`` and ``entry_state`` are then the road graph's own arrays.
    uturns : str
        The U-turn policy it was built with (:data:`UTURN_POLICIES`).
    turn_costs : TurnCosts or None
    info : dict
        Counts for reports: ``road_nodes``, ``search_nodes``, ``arcs``, ``size_ratio``
        (search nodes / road nodes), ``junctions``, ``expanded_nodes``, ``via_way_states``,
        ``restrictions`` (``no``, ``only``, ``via_way``), ``only_conflicts``.
    """

    graph: RoadGraph
    indptr: np.ndarray
    head: np.ndarray
    cost_s: np.ndarray
    turn_cost_s: np.ndarray
    road_cost_s: np.ndarray
    entry_state: np.ndarray
    identity: bool
    uturns: str
    turn_costs: TurnCosts | None
    info: dict[str, Any] = field(default_factory=dict)
    # None in the identity case: the properties then build them on first use
    mapped_road_edge: np.ndarray | None = field(default=None, repr=False)
    mapped_node_road: np.ndarray | None = field(default=None, repr=False)
    mapped_node_states_indptr: np.ndarray | None = field(default=None, repr=False)

    @property
    def n_states(self) -> int:
        return int(self.indptr.shape[0]) - 1

    @property
    def n_arcs(self) -> int:
        return int(self.head.shape[0])

    @cached_property
    def road_edge(self) -> np.ndarray:
        if self.mapped_road_edge is not None:
            return self.mapped_road_edge
        return _readonly(np.arange(self.graph.n_edges, dtype=np.int32))

    @cached_property
    def node_road(self) -> np.ndarray:
        if self.mapped_node_road is not None:
            return self.mapped_node_road
        return _readonly(np.arange(self.graph.n_nodes, dtype=np.int32))

    @cached_property
    def node_states_indptr(self) -> np.ndarray:
        if self.mapped_node_states_indptr is not None:
            return self.mapped_node_states_indptr
        return _readonly(np.arange(self.graph.n_nodes + 1, dtype=np.int64))

    @cached_property
    def node_states(self) -> np.ndarray:
        return _readonly(np.arange(self.n_states, dtype=np.int32))

    @cached_property
    def arc_tail(self) -> np.ndarray:
        """int32[A]: search node each arc leaves from (derived from ``indptr``)."""
        return np.repeat(np.arange(self.n_states, dtype=np.int32), np.diff(self.indptr))

    @cached_property
    def _arcs_by_road_edge(self) -> tuple[np.ndarray, np.ndarray]:
        """Inverse of ``road_edge``: arcs of road edge e are ``arcs[ptr[e]:ptr[e + 1]]``."""
        order = np.argsort(self.road_edge, kind="stable").astype(np.int64)
        counts = np.bincount(self.road_edge, minlength=self.graph.n_edges)
        ptr = np.zeros(self.graph.n_edges + 1, dtype=np.int64)
        np.cumsum(counts, out=ptr[1:])
        return ptr, order

    def start_states(self, node: int) -> tuple[np.ndarray, np.ndarray]:
        """Where a drive starting at road node ``node`` is after its first edge.

        Returns
        -------
        states : int64[k]
            ``entry_state[e]`` for every out-edge ``e`` of ``node``, in the road graph's edge
            order (``graph.edges_of(node)``; the same state may appear twice).
        g_s : float64[k]
            Initial cost of each: ``road_cost_s[e]`` (a start has no arrival, so no turn).
        """
        v = self.graph.check_node(node)
        edges = self.graph.edges_of(v)
        return (
            np.asarray(self.entry_state[edges], dtype=np.int64),
            np.asarray(self.road_cost_s[edges], dtype=np.float64),
        )

    def target_states(self, node: int) -> np.ndarray:
        """int64[k]: search nodes at which a drive has reached road node ``node``."""
        v = self.graph.check_node(node)
        ptr = self.node_states_indptr
        return np.arange(int(ptr[v]), int(ptr[v + 1]), dtype=np.int64)

    def arcs_on(self, edge: int) -> np.ndarray:
        """int64[k]: arcs that drive road edge ``edge`` (one per search node allowed to)."""
        e = self._check_edge(edge)
        if self.identity:
            return np.array([e], dtype=np.int64)
        ptr, arcs = self._arcs_by_road_edge
        return arcs[int(ptr[e]) : int(ptr[e + 1])]

    def states_departing_by(self, edge: int) -> np.ndarray:
        """int64[k]: search nodes (at ``tail[edge]``) from which the drive may take ``edge``.

        A destination on edge ``edge`` is reached from these, plus the partial edge cost.
        """
        return np.asarray(self.arc_tail[self.arcs_on(edge)], dtype=np.int64)

    def road_edges_of(self, arcs: np.ndarray) -> np.ndarray:
        """int64[k]: the road edges a path of arcs drives (translate a found route back)."""
        arcs = np.asarray(arcs, dtype=np.int64)
        if arcs.size and (int(arcs.min()) < 0 or int(arcs.max()) >= self.n_arcs):
            raise InvalidRequest(f"arc ids must be in 0..{self.n_arcs - 1}")
        return np.asarray(self.road_edge[arcs], dtype=np.int64)

    def arc_costs(self, road_cost_s: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """float64[A]: arc costs for new road costs, ``road_cost_s[road_edge] + turn_cost_s``.

        Vectorised (one gather and one add over the arcs), so live costs never need a
        rebuild. In the identity case without ``out`` the road costs are returned as they are.

        Parameters
        ----------
        road_cost_s : float64[m]
            Cost of every road edge, seconds: finite or ``+inf`` (closed), never negative.
        out : float64[A], optional
            Array to write into (reused between cost versions).
        """
        cost = check_edge_costs(self.graph.n_edges, road_cost_s)
        if out is not None and (out.shape != (self.n_arcs,) or out.dtype != np.float64):
            raise InvalidRequest(
                f"out must be a float64 array of shape ({self.n_arcs},), got "
                f"{out.dtype}{list(out.shape)}"
            )
        if self.identity:
            if out is None:
                return cost
            out[:] = cost
            return out
        out = np.take(cost, self.road_edge, out=out)
        out += self.turn_cost_s
        return out

    def with_costs(self, road_cost_s: np.ndarray) -> SearchGraph:
        """The same search graph over new road costs (shares every structural array)."""
        cost = check_edge_costs(self.graph.n_edges, road_cost_s)
        return dataclasses.replace(self, cost_s=self.arc_costs(cost), road_cost_s=cost)

    def _check_edge(self, edge: int) -> int:
        if isinstance(edge, bool) or not isinstance(edge, (int, np.integer)):
            raise InvalidRequest(f"edge must be an integer index, got {edge!r}")
        if not 0 <= int(edge) < self.graph.n_edges:
            raise InvalidRequest(
                f"edge {int(edge)} is not in the graph: valid edge indices are "
                f"0..{self.graph.n_edges - 1}"
            )
        return int(edge)


def _readonly(arr: np.ndarray) -> np.ndarray:
    arr.flags.writeable = False
    return arr


def build_search_graph(
    graph: RoadGraph,
    *,
    uturns: str = "forbid_at_junctions",
    turn_costs: TurnCosts | None = None,
    costs: np.ndarray | None = None,
) -> SearchGraph:
    """Build the search graph of the legal drives of ``graph`` (see the module docstring).

    Parameters
    ----------
    graph : RoadGraph
        Road graph with its turn restrictions (``turn_indptr/turn_edges/turn_kind``).
    uturns : {"forbid_at_junctions", "allow"}
        U-turns at junctions (three or more neighbours) are banned by default; dead ends and
        two-neighbour nodes always allow them.
    turn_costs : TurnCosts, optional
        Turn penalties; None (or all zero) for none.
    costs : float64[m], optional
        Road edge costs in seconds (live costs; ``+inf`` closes an edge). Default
        ``graph.travel_time_s``.

    Returns
    -------
    SearchGraph
        The road graph itself (``identity``) when there are no restrictions and no turn costs.

    Raises
    ------
    InvalidRequest
        Unknown ``uturns``, a ``turn_costs`` that is not a :class:`TurnCosts`, costs of the
        wrong shape or with negative / NaN entries, malformed restrictions.
    """
    if uturns not in UTURN_POLICIES:
        raise InvalidRequest(f"uturns must be one of {list(UTURN_POLICIES)}, got {uturns!r}")
    if turn_costs is not None and not isinstance(turn_costs, TurnCosts):
        raise InvalidRequest(
            f"turn_costs must be a TurnCosts or None, got {type(turn_costs).__name__}"
        )
    road_cost = check_edge_costs(graph.n_edges, graph.travel_time_s if costs is None else costs)
    check_restrictions(graph)
    if turn_costs is not None and turn_costs.is_zero:
        turn_costs = None
    if graph.n_restrictions == 0 and turn_costs is None:
        return _identity(graph, road_cost, uturns)
    return _expand(graph, road_cost, uturns, turn_costs)


def _identity(graph: RoadGraph, road_cost: np.ndarray, uturns: str) -> SearchGraph:
    n, m = graph.n_nodes, graph.n_edges
    info = _base_info(graph)
    info.update(search_nodes=n, arcs=m, size_ratio=1.0, expanded_nodes=0, via_way_states=0)
    return SearchGraph(
        graph=graph,
        indptr=graph.indptr,
        head=graph.head,
        cost_s=road_cost,
        turn_cost_s=np.broadcast_to(np.float64(0.0), (m,)),
        road_cost_s=road_cost,
        entry_state=graph.head,
        identity=True,
        uturns=uturns,
        turn_costs=None,
        info=info,
    )


def _base_info(graph: RoadGraph) -> dict[str, Any]:
    kind = np.asarray(graph.turn_kind)
    lens = np.diff(np.asarray(graph.turn_indptr))
    return {
        "road_nodes": graph.n_nodes,
        "road_edges": graph.n_edges,
        "restrictions": {
            "no": int(np.sum(kind == TURN_NO)),
            "only": int(np.sum(kind == TURN_ONLY)),
            "via_way": int(np.sum(lens > 2)),
        },
        "only_conflicts": 0,
    }


def _member(sorted_keys: np.ndarray, query: np.ndarray) -> np.ndarray:
    """bool[k]: which ``query`` values occur in the sorted array ``sorted_keys``."""
    if sorted_keys.size == 0:
        return np.zeros(query.shape[0], dtype=bool)
    i = np.minimum(np.searchsorted(sorted_keys, query), sorted_keys.size - 1)
    return sorted_keys[i] == query


@dataclass
class _Automaton:
    """Trigger prefixes of length >= 2 (via-way restrictions) as Aho-Corasick states.

    A plain state is an edge id ``e`` (drive ended by ``e``, no longer trigger prefix); a deep
    state is ``("d", i)`` for the prefix ``keys[i]``. Only via-way restrictions create deep
    states, so this part is small and plain Python.
    """

    keys: list[tuple[int, ...]]
    index: dict[tuple[int, ...], int]
    rules: list[list[tuple[int, int]]]  # (kind, to) of restrictions triggered by keys[i]
    fail: list[tuple[str, int]]  # ("d", i) or ("e", edge): longest proper suffix state

    def step(self, state: tuple[str, int], f: int) -> tuple[str, int]:
        """State after driving edge ``f`` from ``state``: longest suffix that is a prefix."""
        while state[0] == "d":
            key = self.keys[state[1]] + (f,)
            i = self.index.get(key)
            if i is not None:
                return ("d", i)
            state = self.fail[state[1]]
        i = self.index.get((state[1], f))
        return ("d", i) if i is not None else ("e", f)


def _automaton(ptr: np.ndarray, seq: np.ndarray, kind: np.ndarray) -> _Automaton:
    keys: list[tuple[int, ...]] = []
    index: dict[tuple[int, ...], int] = {}
    rules: list[list[tuple[int, int]]] = []
    for i in np.flatnonzero(np.diff(ptr) > 2).tolist():
        s = tuple(seq[ptr[i] : ptr[i + 1]].tolist())
        trigger = s[:-1]
        for j in range(2, len(trigger) + 1):
            if trigger[:j] not in index:
                index[trigger[:j]] = len(keys)
                keys.append(trigger[:j])
                rules.append([])
        rules[index[trigger]].append((int(kind[i]), s[-1]))
    fail: list[tuple[str, int]] = []
    for key in keys:
        found: tuple[str, int] = ("e", key[-1])
        for k in range(1, len(key) - 1):
            suffix = index.get(key[k:])
            if suffix is not None:
                found = ("d", suffix)
                break
        fail.append(found)
    return _Automaton(keys, index, rules, fail)


def _expand(
    graph: RoadGraph, road_cost: np.ndarray, uturns: str, turn_costs: TurnCosts | None
) -> SearchGraph:
    n, m = graph.n_nodes, graph.n_edges
    assert m < 2**31 - 1, "edge ids must fit int32"
    tail = np.asarray(graph.tail, dtype=np.int64)
    head = np.asarray(graph.head, dtype=np.int64)
    road_ptr = np.asarray(graph.indptr, dtype=np.int64)
    outdeg = np.diff(road_ptr)
    indeg = np.bincount(head, minlength=n)
    nbr = neighbour_count(graph)
    junction = nbr >= 3
    costed_node = nbr != 2  # where turn costs are charged: not where the road merely goes on
    forbid = uturns == "forbid_at_junctions"
    info = _base_info(graph)

    # ---- restrictions: two-edge ones vectorised, via-way ones through the automaton
    tptr = np.asarray(graph.turn_indptr, dtype=np.int64)
    tseq = np.asarray(graph.turn_edges, dtype=np.int64)
    tkind = np.asarray(graph.turn_kind, dtype=np.int64)
    short = np.flatnonzero(np.diff(tptr) == 2)
    s_from, s_to, s_kind = tseq[tptr[short]], tseq[tptr[short] + 1], tkind[short]
    no_keys = np.unique(s_from[s_kind == TURN_NO] * m + s_to[s_kind == TURN_NO])
    only_keys = np.unique(s_from[s_kind == TURN_ONLY] * m + s_to[s_kind == TURN_ONLY])
    only_count = np.bincount(only_keys // m, minlength=m)  # distinct only_* rules after e
    auto = _automaton(tptr, tseq, tkind)
    deep2 = sorted((k[0] * m + k[1], i) for k, i in auto.index.items() if len(k) == 2)
    deep2_keys = np.array([k for k, _ in deep2], dtype=np.int64)
    deep2_ids = np.array([i for _, i in deep2], dtype=np.int64)
    rule_edge = np.zeros(m, dtype=bool)  # arrivals with a two-edge rule or a via-way start
    rule_edge[s_from] = True
    rule_edge[deep2_keys // m] = True

    # ---- reverse edges (U-turns): the lowest one by a gather, duplicates by a lookup
    rev_e, rev_f = graph.reverse_pairs
    rev_first = np.asarray(graph.reverse_edge, dtype=np.int64)
    n_rev = np.bincount(rev_e, minlength=m)

    # ---- road nodes by what their arrival states need
    #   rule nodes: per-pair evaluation (restrictions pass through, or turn costs apply);
    #   U-turn nodes: junctions whose only arrival rule is the U-turn ban, grouped at once;
    #   every other node keeps the one state of the road graph.
    last_pos = np.zeros(tseq.shape[0], dtype=bool)
    last_pos[tptr[1:] - 1] = True
    rule_node = np.zeros(n, dtype=bool)
    rule_node[head[tseq[~last_pos]]] = True  # every node a restriction passes through
    if turn_costs is not None:
        rule_node |= costed_node & (indeg > 0)
    uturn_node = np.zeros(n, dtype=bool)
    if forbid:
        uturn_node[head[rev_e]] = True
        uturn_node &= junction
        several = np.zeros(n, dtype=bool)  # an arrival with duplicate reverses: per pair
        several[head[n_rev > 1]] = True
        rule_node |= uturn_node & several
        uturn_node &= ~rule_node
    expanded = rule_node | uturn_node

    # ---- candidate states at rule nodes: one per arrival edge, then the via-way states
    plain_edges = np.flatnonzero(rule_node[head])
    n_deep = len(auto.keys)
    deep_last = np.array([k[-1] for k in auto.keys], dtype=np.int64)
    row_last = np.concatenate((plain_edges, deep_last))
    row_v = head[row_last]
    n_plain, n_rows = plain_edges.size, row_last.size

    # every (row, out-edge) pair, in road CSR order within a row
    d = outdeg[row_v]
    pair_ptr = np.zeros(n_rows + 1, dtype=np.int64)
    np.cumsum(d, out=pair_ptr[1:])
    n_pairs = int(pair_ptr[-1])
    pair_row = np.repeat(np.arange(n_rows, dtype=np.int64), d)
    pair_f = np.arange(n_pairs, dtype=np.int64) + np.repeat(road_ptr[row_v] - pair_ptr[:-1], d)
    pair_e = row_last[pair_row]
    allowed = np.ones(n_pairs, dtype=bool)
    # two-edge rules, only where the arrival has one
    ruled = np.flatnonzero((pair_row < n_plain) & rule_edge[pair_e])
    rkey = pair_e[ruled] * m + pair_f[ruled]
    ocount = only_count[pair_e[ruled]]
    only_hit = (ocount == 1) & _member(only_keys, rkey)
    allowed[ruled] = ~_member(no_keys, rkey) & ((ocount == 0) | only_hit)
    if forbid:  # an only_* rule's own `to` stays allowed even if it is the U-turn
        uturn = rev_first[pair_e] == pair_f
        dup = np.flatnonzero(n_rev[pair_e] > 1)
        uturn[dup] |= _member(rev_e * m + rev_f, pair_e[dup] * m + pair_f[dup])
        uturn &= junction[head[pair_e]]
        uturn[ruled[only_hit]] = False
        allowed &= ~uturn
    conflicts = int(np.sum(only_count > 1))
    next_deep = np.full(n_pairs, -1, dtype=np.int64)
    if deep2_keys.size:
        pos = np.minimum(np.searchsorted(deep2_keys, rkey), deep2_keys.size - 1)
        hit = deep2_keys[pos] == rkey
        next_deep[ruled[hit]] = deep2_ids[pos[hit]]
    cls = np.zeros(n_pairs, dtype=np.int8)
    cost_code = np.zeros(_N_COST_CODES, dtype=np.int64)
    class_cost = np.zeros(_N_COST_CODES, dtype=np.float64)
    if turn_costs is not None:
        dep, arr, dep_ok, arr_ok = edge_end_headings(graph, turn_costs.probe_m)
        turned = np.flatnonzero(costed_node[head[pair_e]])
        angle = _turn_angles(dep, arr, dep_ok, arr_ok, pair_e[turned], pair_f[turned])
        cls[turned] = classify_turns(angle, turn_costs)
        class_cost = turn_costs.class_costs_s
        _, cost_code = np.unique(class_cost, return_inverse=True)

    # via-way states: their rules and successors, in plain Python (few of them)
    if n_deep:
        plain_rules = _plain_rules(auto, s_from, s_to, s_kind)
        for i in range(n_deep):
            banned: set[int] = set()
            only: set[int] | None = None
            state: tuple[str, int] = ("d", i)
            while True:
                chain_rules = (
                    auto.rules[state[1]] if state[0] == "d" else plain_rules.get(state[1], [])
                )
                for k, to in chain_rules:
                    if k == TURN_NO:
                        banned.add(to)
                    else:
                        only = {to} if only is None else only & {to}
                if state[0] == "e":
                    break
                state = auto.fail[state[1]]
            conflicts += only is not None and not only
            lo, hi = int(pair_ptr[n_plain + i]), int(pair_ptr[n_plain + i + 1])
            for p in range(lo, hi):
                f = int(pair_f[p])
                if f in banned or (only is not None and f not in only):
                    allowed[p] = False
                elif only is not None:  # the rule's own `to`, even if it is the U-turn
                    allowed[p] = True
                nxt = auto.step(("d", i), f)
                next_deep[p] = nxt[1] if nxt[0] == "d" else -1

    # merge rows with identical futures: same node, same code for every out-edge
    code = np.where(allowed, 1 + cost_code[cls] + _N_COST_CODES * (next_deep + 1), 0)
    row_group, rule_group_v, group_rep = _group_rows(row_v, d, pair_ptr, code)

    # ---- U-turn nodes: arrival e's future is "every out-edge but rev_first[e]", so arrivals
    # group by that one edge (arrivals without a reverse form one group). Out-edges of a node
    # are contiguous in CSR order, so one sort key orders the groups by node as well.
    u_edges = np.flatnonzero(uturn_node[head])
    u_excl = rev_first[u_edges]
    u_key = np.where(u_excl >= 0, 2 * u_excl + 1, 2 * road_ptr[head[u_edges]])
    u_order = np.argsort(u_key, kind="stable")
    u_sorted = u_key[u_order]
    u_new = np.ones(u_sorted.size, dtype=bool)
    u_new[1:] = u_sorted[1:] != u_sorted[:-1]
    u_row_group = np.empty(u_edges.size, dtype=np.int64)
    u_row_group[u_order] = np.cumsum(u_new) - 1
    u_group_v = head[u_edges[u_order[u_new]]]
    u_group_excl = u_excl[u_order[u_new]]

    # ---- search node ids: states of one road node are consecutive, nodes in order
    n_rule_groups = rule_group_v.size
    group_v = np.concatenate((rule_group_v, u_group_v))  # a node is in one part only
    counts = np.where(expanded, 0, 1) + np.bincount(group_v, minlength=n)
    node_states_indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=node_states_indptr[1:])
    n_states = int(node_states_indptr[-1])
    assert n_states < 2**31 - 1, "search node ids must fit int32"
    # each part's groups come sorted by node: rank within the node = position minus the
    # position of the node's first group
    rule_sid = node_states_indptr[rule_group_v] + (
        np.arange(n_rule_groups) - np.searchsorted(rule_group_v, rule_group_v, side="left")
    )
    u_sid = node_states_indptr[u_group_v] + (
        np.arange(u_group_v.size) - np.searchsorted(u_group_v, u_group_v, side="left")
    )
    row_sid = rule_sid[row_group]
    entry_state = node_states_indptr[head].copy()  # non-expanded heads: their one state
    entry_state[plain_edges] = row_sid[:n_plain]
    entry_state[u_edges] = u_sid[u_row_group]
    deep_sid = row_sid[n_plain : n_plain + n_deep]

    # ---- arcs, in three runs each sorted by search node: rule-node groups (their first
    # row's allowed pairs), U-turn-node groups, the one state of every other node
    rep_d = d[group_rep]
    rep_pairs = np.arange(int(rep_d.sum()), dtype=np.int64) + np.repeat(
        pair_ptr[group_rep] - (np.cumsum(rep_d) - rep_d), rep_d
    )
    rep_tail = np.repeat(rule_sid, rep_d)
    keep = allowed[rep_pairs]
    rep_pairs, rep_tail = rep_pairs[keep], rep_tail[keep]
    f_rule = pair_f[rep_pairs]
    head_rule = entry_state[f_rule]
    if n_deep:
        nd = next_deep[rep_pairs]
        head_rule = np.where(nd >= 0, deep_sid[np.maximum(nd, 0)], head_rule)
    turn_rule = class_cost[cls[rep_pairs]]

    u_d = outdeg[u_group_v]
    f_u = np.arange(int(u_d.sum()), dtype=np.int64) + np.repeat(
        road_ptr[u_group_v] - (np.cumsum(u_d) - u_d), u_d
    )
    tail_u = np.repeat(u_sid, u_d)
    keep = f_u != np.repeat(u_group_excl, u_d)
    f_u, tail_u = f_u[keep], tail_u[keep]

    f_one = np.flatnonzero(~expanded[tail])
    tail_one = node_states_indptr[tail[f_one]]
    arc_tail = np.concatenate((rep_tail, tail_u, tail_one))
    order = np.argsort(arc_tail, kind="stable")  # three sorted runs: a merge
    road_edge = np.concatenate((f_rule, f_u, f_one))[order]
    arc_head = np.concatenate((head_rule, entry_state[f_u], entry_state[f_one]))[order]
    turn_cost = np.concatenate((turn_rule, np.zeros(f_u.size + f_one.size)))[order]
    indptr = np.zeros(n_states + 1, dtype=np.int64)
    np.cumsum(np.bincount(arc_tail, minlength=n_states), out=indptr[1:])
    node_road = np.repeat(np.arange(n, dtype=np.int32), counts)

    turn_cost = _readonly(turn_cost)
    info.update(
        search_nodes=n_states,
        arcs=int(road_edge.size),
        size_ratio=n_states / max(n, 1),
        junctions=int(junction.sum()),
        expanded_nodes=int(expanded.sum()),
        rule_nodes=int(rule_node.sum()),
        via_way_states=n_deep,
        candidate_states=n_rows + u_edges.size,
        only_conflicts=conflicts,
    )
    return SearchGraph(
        graph=graph,
        indptr=_readonly(indptr),
        head=_readonly(arc_head.astype(np.int32)),
        cost_s=road_cost[road_edge] + turn_cost,
        turn_cost_s=turn_cost,
        road_cost_s=road_cost,
        entry_state=_readonly(entry_state.astype(np.int32)),
        identity=False,
        uturns=uturns,
        turn_costs=turn_costs,
        info=info,
        mapped_road_edge=_readonly(road_edge.astype(np.int32)),
        mapped_node_road=_readonly(node_road),
        mapped_node_states_indptr=_readonly(node_states_indptr),
    )


def _plain_rules(
    auto: _Automaton, s_from: np.ndarray, s_to: np.ndarray, s_kind: np.ndarray
) -> dict[int, list[tuple[int, int]]]:
    """Two-edge rules of the edges that end a via-way state's failure chain."""
    ends = {state[1] for state in auto.fail if state[0] == "e"}
    ends |= {key[-1] for key in auto.keys}
    out: dict[int, list[tuple[int, int]]] = {}
    sel = np.flatnonzero(np.isin(s_from, np.fromiter(ends, dtype=np.int64)))
    for j in sel.tolist():
        out.setdefault(int(s_from[j]), []).append((int(s_kind[j]), int(s_to[j])))
    return out


def _group_rows(
    row_v: np.ndarray, d: np.ndarray, pair_ptr: np.ndarray, code: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Group candidate states by (node, code of every out-edge): exact, no hashing.

    All rows of one node have the same number of out-edges ``d``, so rows are grouped per
    value of ``d`` with a lexicographic sort of ``(node, codes)``; when a row's codes fit one
    int64 they are packed into it (two sort keys instead of ``d + 1``).

    Returns
    -------
    row_group : int64[rows]
        Group of each row.
    group_v : int64[groups]
        Node of each group, non-decreasing.
    group_rep : int64[groups]
        One row of each group (its first).
    """
    n_rows = row_v.shape[0]
    row_group = np.empty(n_rows, dtype=np.int64)
    bits = max(1, int(code.max()).bit_length()) if code.size else 1
    batch_v: list[np.ndarray] = []
    batch_rep: list[np.ndarray] = []
    offset = 0
    for deg in np.unique(d).tolist():
        rows = np.flatnonzero(d == deg)
        codes = code[pair_ptr[rows][:, None] + np.arange(deg)]
        if deg * bits <= 62:
            packed = np.zeros(rows.size, dtype=np.int64)
            for j in range(deg):
                packed |= codes[:, j] << (bits * j)
            codes = packed[:, None]
        keys = [codes[:, j] for j in range(codes.shape[1])]
        order = np.lexsort((*keys[::-1], row_v[rows]))  # primary key: the node
        rs = rows[order]
        new = np.ones(rs.size, dtype=bool)
        if rs.size > 1:
            c = codes[order]
            new[1:] = (row_v[rs[1:]] != row_v[rs[:-1]]) | np.any(c[1:] != c[:-1], axis=1)
        row_group[rs] = offset + np.cumsum(new) - 1
        batch_v.append(row_v[rs[new]])
        batch_rep.append(rs[new])
        offset += int(new.sum())
    group_v = np.concatenate(batch_v) if batch_v else np.zeros(0, dtype=np.int64)
    group_rep = np.concatenate(batch_rep) if batch_rep else np.zeros(0, dtype=np.int64)
    # batches hold disjoint node sets, each sorted by node: order the groups by node
    by_node = np.argsort(group_v, kind="stable")
    rank = np.empty_like(by_node)
    rank[by_node] = np.arange(by_node.size)
    return rank[row_group], group_v[by_node], group_rep[by_node]


# --------------------------------------------------------------------------------------------
# Synthetic restrictions (benchmarks)


def synthetic_restrictions(
    graph: RoadGraph,
    count: int,
    *,
    only_share: float = 0.25,
    via_way_share: float = 0.1,
    seed: int = 0,
) -> RoadGraph:
    """``graph`` with ``count`` random turn restrictions at junctions (for benchmarks).

    Each restriction picks a random junction, a random arrival edge and a random departure
    that is not its U-turn; ``via_way_share`` of them drive one or two more edges first (a
    via-way restriction). ``only_share`` of them are ``only_*``, the rest ``no_*``. The road
    arrays are shared with ``graph``; only the ``turn_*`` arrays are new.
    """
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 0:
        raise InvalidRequest(f"count must be an integer >= 0, got {count!r}")
    for name, share in (("only_share", only_share), ("via_way_share", via_way_share)):
        if not _is_real(share) or not 0.0 <= share <= 1.0:
            raise InvalidRequest(f"{name} must be a number in [0, 1], got {share!r}")
    rng = np.random.default_rng(seed)
    n = graph.n_nodes
    head = np.asarray(graph.head, dtype=np.int64)
    road_ptr = np.asarray(graph.indptr, dtype=np.int64)
    rev = np.asarray(graph.reverse_edge, dtype=np.int64)
    in_order = np.argsort(head, kind="stable")
    in_ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(head, minlength=n), out=in_ptr[1:])
    outdeg, indeg = np.diff(road_ptr), np.diff(in_ptr)
    nodes = np.flatnonzero((neighbour_count(graph) >= 3) & (indeg > 0) & (outdeg > 1))
    seqs: list[list[int]] = []
    if nodes.size == 0 or count == 0:
        return _with_restrictions(graph, seqs, [])

    def pick_out(v: int, not_edge: int) -> int:
        lo, hi = int(road_ptr[v]), int(road_ptr[v + 1])
        options = [f for f in range(lo, hi) if f != not_edge]
        return int(options[rng.integers(len(options))]) if options else -1

    attempts = 0
    while len(seqs) < count and attempts < 20 * count:
        attempts += 1
        v = int(nodes[rng.integers(nodes.size)])
        e = int(in_order[in_ptr[v] + rng.integers(indeg[v])])
        seq = [e]
        extra = int(rng.integers(1, 3)) if rng.random() < via_way_share else 0
        for _ in range(extra + 1):
            f = pick_out(int(head[seq[-1]]), int(rev[seq[-1]]))
            if f < 0:
                break
            seq.append(f)
        if len(seq) == extra + 2:
            seqs.append(seq)
    kinds = (rng.random(len(seqs)) < only_share).astype(np.int8)
    return _with_restrictions(graph, seqs, kinds.tolist())


def _with_restrictions(graph: RoadGraph, seqs: list[list[int]], kinds: list[int]) -> RoadGraph:
    ptr = np.zeros(len(seqs) + 1, dtype=np.int64)
    np.cumsum([len(s) for s in seqs], out=ptr[1:])
    edges = np.array([e for s in seqs for e in s], dtype=np.int32)
    meta = dict(graph.meta)
    meta["synthetic_restrictions"] = len(seqs)
    return dataclasses.replace(
        graph,
        turn_indptr=ptr,
        turn_edges=edges,
        turn_kind=np.asarray(kinds, dtype=np.int8),
        meta=meta,
    )
