"""Search sessions: contracts, deadlines, decision steps and results around the numba kernel.

A :class:`Planner` wraps one road graph (and optionally its ALT landmarks) and hands out
:class:`Search` objects. A search runs under one *contract*: a wall-clock deadline
(``deadline_ms``, counted from ``started_at``, the moment the request arrived) or an expansion
budget (``budget_expansions``, reproducible). The contract is cut into decision steps; before
each step a controller picks the weight (see :mod:`dueroute.planner.controllers`), and
:func:`plan` drives that loop.

The instant route
-----------------
Every search of a reachable pair holds a complete route before it expands a node: the
landmarks' shortest-path trees give origin -> landmark -> destination routes; the best of the
few most promising ones, with the loop cut where the two halves meet
(:func:`dueroute.planner._kernel.instant_route`), is the first incumbent and the first
improvement (``source="instant"``). It costs microseconds and prunes the main search from its
first expansion. A pair the trees do not connect (outside the landmarks' strong component, or
no landmarks) starts with a greedy search (ANA*'s order before its first route) until a first
route, then hands over to the controller.

Contracts and steps
-------------------
* **Budget**: step ``k`` (0-based) ends when the search has made
  ``budget * (k + 1) // steps`` expansions in total, so the same query, controller and seed always
  give the same result.
* **Deadline**: step ``k`` ends at ``now + (deadline_at - now) / steps_left`` (the remaining
  time shared equally among the remaining steps), the last step at the deadline itself. The
  kernel reads the monotonic clock every 64 expansions (about 10 us) and returns at the step's
  end, so a step is one kernel call. The number of steps follows the contract
  (:func:`steps_for_deadline`): control costs at most :data:`CONTROL_SHARE` of the deadline.
* **Neither** (documented choice): the search runs to proven optimality under a safety budget
  of :data:`UNBOUNDED_BUDGET_PER_NODE` expansions per graph node (at least
  :data:`UNBOUNDED_BUDGET_MIN`).
* A **gap target** (``gap_target`` > 0) ends the search as soon as the proven gap
  ``(cost - bound) / cost`` is at or below it, like a MIP solver's relative gap tolerance.

Weights that cannot run away
----------------------------
Two things bound what any weight schedule can cost: (1) the instant route prunes every node
with ``g + h`` at or above its cost from the first expansion, so a search never leaves that
ellipse; (2) the kernel's runaway guard switches to weight 1 once the expansions exceed
:data:`RUNAWAY_FACTOR` times the distinct nodes touched (plus :data:`RUNAWAY_MIN`): a large
weight is then re-expanding nodes it reached too expensively, and under weight 1 with a
consistent heuristic each node is expanded at most once more (A*'s ordering invariant, Hart,
Nilsson & Raphael 1968). ``PlanResult.weight_capped`` says when it happened.

Bounds
------
``lower_bound_s = min(incumbent, min over open of g + h)`` (the running maximum of that value,
each of which is valid), equal to the cost once the search is proven. The reported route cost is
the sum of its edges' ``travel_time_s``.

Thread safety
-------------
A :class:`Planner` is shared by threads. Each running search holds one workspace from the
planner's pool (taken under a lock, returned when the search ends), so any number of searches
may run at once, in one thread or many; the kernel releases the GIL while it expands. A
workspace takes about 80 bytes per graph node (80 MB for a million nodes) and is allocated once
per concurrently running search, then reused.
"""

from __future__ import annotations

import math
import threading
import time
import weakref
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Any, Protocol

import numba
import numpy as np

from dueroute.planner import _kernel as K
from dueroute.planner.controllers import Controller, make_controller
from dueroute.planner.endpoints import (
    Ends,
    RoadRoute,
    assemble,
    direct_route,
    resolve,
    search_graph_for,
    target_row,
)
from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.features import compute_features
from dueroute.planner.graph import RoadGraph
from dueroute.planner.limits import (
    DEFAULT_CONTROLLER,
    DEFAULT_STEPS,
    MAX_BUDGET_EXPANSIONS,
    MAX_DEADLINE_MS,
    MAX_STEPS,
    MAX_WEIGHT,
    MIN_WEIGHT,
)
from dueroute.planner.results import (
    STATS_INDEX,
    STATS_LEN,
    Improvement,
    ImprovementLog,
    PlanResult,
    SearchStats,
    WeightStep,
    gap_of,
)
from dueroute.planner.snap import RoadSnap
from dueroute.planner.turns import TurnProfile

#: Safety cap when neither a deadline nor a budget is given (see the module docstring).
UNBOUNDED_BUDGET_PER_NODE = 20
UNBOUNDED_BUDGET_MIN = 10_000

#: Budget contracts check ``cancel`` at least every this many expansions; deadline steps at
#: least every this many seconds when a ``cancel`` event is given (a kernel call costs a few us).
BUDGET_CHUNK_EXPANSIONS = 50_000
CANCEL_CHECK_S = 0.001
#: The cancel object's ``searching`` hook is called around kernel runs at least this long.
KERNEL_HOOK_MIN_S = 0.0005

#: Landmarks the kernel evaluates per node: the best for the query's origin and destination.
#: A search is bound by memory, not arithmetic (measured with ``dueroute bench search``: the
#: same cost per expansion with 2, 4, 8 or 16 active landmarks, since one node's row is one
#: cache line either way), so by default all of them (up to 16) are active.
ACTIVE_LANDMARKS = 16

#: Runaway guard (see the module docstring).
RUNAWAY_FACTOR = 2.0
RUNAWAY_MIN = 10_000

#: Share of a deadline that decision steps may cost, and the cost of one decision the step
#: count starts from, by controller kind, before any is measured (:class:`DecisionCost`
#: follows what they really cost in this process: a few us for the built-in controllers; an
#: ONNX policy run between search steps, with the search's memory in the caches, measured
#: 25-140 us against 8 us in a tight loop).
CONTROL_SHARE = 0.02
STEP_COST_US = {"builtin": 5.0, "policy": 30.0}


class DecisionCost:
    """What one decision (stats, features, the controller) has cost lately, per controller
    kind: a running mean of the measured decisions of finished searches, so that the number
    of steps follows the real cost of control on this machine (:func:`steps_for_deadline`).

    Each search adds its mean decision cost with weight :attr:`ALPHA`; a sample is clipped to
    :attr:`CLIP` times the current estimate, so one search preempted mid-decision cannot make
    the next ones give up their steps.
    """

    ALPHA = 0.1
    CLIP = 4.0

    def __init__(self, start_us: dict[str, float]) -> None:
        self._us = dict(start_us)
        self._lock = threading.Lock()

    def us(self, kind: str) -> float:
        return self._us[kind]

    def record(self, kind: str, seconds: float, decisions: int) -> None:
        if decisions <= 0 or not seconds > 0.0:
            return
        sample = seconds * 1e6 / decisions
        with self._lock:
            old = self._us[kind]
            self._us[kind] = max(0.5, old + self.ALPHA * (min(sample, self.CLIP * old) - old))


#: The process's decision-cost estimate (``plan()`` reads and updates it).
DECISION_COST = DecisionCost(STEP_COST_US)

#: Longest route the instant route may have (edges); longer ones are left to the search.
INSTANT_MAX_EDGES = 1 << 16

MODES = ("weighted", "ana")

# positions in the live stats vector (planner.results.STATS_FIELDS)
_V_INCUMBENT = STATS_INDEX["incumbent_cost_s"]
_V_BOUND = STATS_INDEX["lower_bound_s"]
_V_H_START = STATS_INDEX["h_start_s"]
_V_EXPANSIONS = STATS_INDEX["expansions"]
_V_LEFT = STATS_INDEX["expansions_left"]
_V_FRAC = STATS_INDEX["contract_fraction_left"]
_V_ELAPSED = STATS_INDEX["elapsed_ms"]
_V_WEIGHT = STATS_INDEX["weight"]
_V_IMPROVEMENTS = STATS_INDEX["improvements"]
_V_STEPS_DONE = STATS_INDEX["steps_done"]
_V_STEPS_TOTAL = STATS_INDEX["steps_total"]
_V_STEPS_SINCE = STATS_INDEX["steps_since_improvement"]
_V_EXP_SINCE = STATS_INDEX["expansions_since_improvement"]
_V_CPU = STATS_INDEX["cpu_share_last_step"]
_V_TOUCHED = STATS_INDEX["nodes_touched"]
_V_DONE = STATS_INDEX["done"]
_V_RATE = STATS_INDEX["expansion_rate_per_s"]
_V_INSTANT = STATS_INDEX["instant_only"]
_V_TIME_LEFT = STATS_INDEX["time_left_ms"]
_MODE_CODE = {"weighted": K.MODE_WEIGHTED, "ana": K.MODE_ANA}
_EMPTY_I32 = np.zeros(0, dtype=np.int32)


class _Event(Protocol):
    def is_set(self) -> bool: ...


def steps_for_deadline(deadline_ms: float, steps: int, step_cost_us: float) -> int:
    """Decision steps for a deadline: at most ``steps``, at least 1, and no more than
    :data:`CONTROL_SHARE` of the deadline spent on control at ``step_cost_us`` per step."""
    affordable = int(CONTROL_SHARE * deadline_ms * 1000.0 / max(step_cost_us, 1e-3))
    return max(1, min(int(steps), affordable))


# ------------------------------------------------------------------------------------------
# Planner and workspaces


class _Workspace:
    """Kernel arrays for one running search on one graph (see ``planner._kernel``)."""

    def __init__(self, n_nodes: int) -> None:
        self.state, self.heap, self.istate, self.fstate = K.new_workspace(n_nodes)
        self.generation = 0
        self.route_buf = np.empty(INSTANT_MAX_EDGES, dtype=np.int64)
        self.src_node = np.zeros(1, dtype=np.int64)
        self.src_g = np.zeros(1, dtype=np.float64)

    def next_generations(self, count: int) -> int:
        """Reserve ``count`` fresh generations; returns the first."""
        if self.generation + count >= 2**31 - 1:  # stamps are int32: wrap once every 2^31
            self.state.view(np.int32)[:, K.SI_STAMP] = 0
            self.generation = 0
        first = self.generation + 1
        self.generation += count
        return first


def _readonly(a: np.ndarray, dtype: Any) -> np.ndarray:
    """C-contiguous, read-only view (one numba signature for built and memory-mapped graphs)."""
    arr = np.ascontiguousarray(np.asarray(a), dtype=dtype).view()
    arr.flags.writeable = False
    return arr


@dataclass(frozen=True)
class _Arrays:
    """What differs between searches on base costs and on a live cost version."""

    cost: np.ndarray  #: per kernel edge (arc)
    road_cost: np.ndarray  #: per road edge (partial edges at the ends)
    lm: np.ndarray
    tree_to: np.ndarray
    tree_from: np.ndarray
    lm_nodes: np.ndarray
    lm_unit: float
    lm_slack: float
    gc_scale: float


class Planner:
    """Reusable search engine over one road graph.

    Parameters
    ----------
    graph : RoadGraph
    landmarks : planner.heuristics.Landmarks, optional
        ALT landmark distances and trees (see ``planner.heuristics``): the ALT bound, the
        active landmarks and the instant route. ``None`` uses the great-circle bound alone
        (and a greedy first route instead of the instant one).
    active_landmarks : int
        Landmarks evaluated per node (the best for each query's origin and destination).
    turn_profile : planner.turns.TurnProfile, optional
        The U-turn rule and turn penalties (default: U-turns banned at junctions, none);
        landmarks must be built for the same profile (``load_or_build_landmarks``).

    A graph with turn restrictions is searched as its search graph of legal drives
    (``planner.turns``, built once per graph by ``planner.endpoints.search_graph_for``); its
    landmarks must then be built on that graph (``planner.endpoints.planning_graph``).
    """

    def __init__(
        self,
        graph: RoadGraph,
        landmarks: Any = None,
        active_landmarks: int = ACTIVE_LANDMARKS,
        turn_profile: TurnProfile | None = None,
    ) -> None:
        self.graph = graph
        #: how vehicles may turn (``planner.turns.TurnProfile``; default: U-turns banned at
        #: junctions, no turn costs)
        self.turn_profile = TurnProfile() if turn_profile is None else turn_profile
        self.search_graph, kg = search_graph_for(graph, self.turn_profile)
        #: the graph the kernel searches: ``graph`` itself, or one node per search state
        self.kernel_graph = kg
        n = kg.n_nodes
        self.n_nodes = n
        self._indptr = _readonly(kg.indptr, np.int64)
        self._tail = _readonly(kg.tail, np.int32)  # the instant route walks edges backwards
        self._head = _readonly(kg.head, np.int32)
        self._cost = _readonly(kg.travel_time_s, np.float64)
        self._road_cost = _readonly(graph.travel_time_s, np.float64)
        xyz, self._gc_margin, self._centre = K.sphere_points(kg.lat, kg.lon)
        coords = np.ascontiguousarray(xyz, dtype=np.float32)
        self._coords = _readonly(coords if n else np.zeros((1, 3)), np.float32)
        self._component = np.asarray(kg.component)
        self._gc_scale = (1.0 - 1e-9) / float(graph.max_speed_mps)
        self._lm_unit = 0.0
        if landmarks is None:
            self._lm = _readonly(np.zeros((max(n, 1), 0, 2), dtype=np.uint16), np.uint16)
            self._tree_to = _readonly(np.zeros((0, max(n, 1)), dtype=np.int32), np.int32)
            self._tree_from = self._tree_to
            self._lm_nodes = _EMPTY_I32
            self._lm_slack = 0.0
        else:
            check_graph = getattr(landmarks, "check_graph", None)
            if check_graph is not None:  # landmarks of another graph give wrong bounds
                check_graph(kg)
            lm = np.asarray(landmarks.lm)
            if lm.ndim != 3 or lm.shape[0] != n or lm.shape[2] != 2:
                raise InvalidRequest(
                    f"landmark rows must have shape (nodes={n}, L, 2), got {lm.shape}"
                )
            if lm.shape[1] > K.MAX_LANDMARKS:
                raise InvalidRequest(f"at most {K.MAX_LANDMARKS} landmarks, got {lm.shape[1]}")
            slack = float(landmarks.slack_s)
            if not (math.isfinite(slack) and slack >= 0.0):
                raise InvalidRequest(f"landmark slack_s must be finite and >= 0, got {slack!r}")
            if lm.dtype != np.uint16:
                raise InvalidRequest(f"landmark rows must be uint16 codes, got {lm.dtype}")
            self._lm = _readonly(lm, np.uint16)
            self._lm_unit = float(landmarks.unit_s)
            self._tree_to = _readonly(landmarks.tree_to, np.int32)
            self._tree_from = _readonly(landmarks.tree_from, np.int32)
            self._lm_nodes = _readonly(landmarks.nodes, np.int32)
            self._lm_slack = slack
        self.n_landmarks = int(self._lm.shape[1])
        # With landmarks the chord bound is almost never the larger term (measured on the demo
        # region: the same expansions with and without it), so it is skipped, saving a cache
        # line per node; without landmarks it is the heuristic.
        self.use_chord = self.n_landmarks == 0
        if not 0 <= int(active_landmarks) <= K.MAX_ACTIVE:
            raise InvalidRequest(f"active_landmarks must be in 0..{K.MAX_ACTIVE}")
        self.active_landmarks = min(int(active_landmarks), self.n_landmarks)
        self._arrays = _Arrays(
            cost=self._cost,
            road_cost=self._road_cost,
            lm=self._lm,
            tree_to=self._tree_to,
            tree_from=self._tree_from,
            lm_nodes=self._lm_nodes,
            lm_unit=self._lm_unit,
            lm_slack=self._lm_slack,
            gc_scale=self._gc_scale if self.use_chord else 0.0,
        )
        # the query-independent part of fstate, copied into every new query
        t = np.zeros(K.F_LOG, dtype=np.float64)
        t[K.F_WEIGHT] = 1.0
        t[K.F_GC_SCALE] = self._gc_scale if self.use_chord else 0.0
        t[K.F_GC_MARGIN] = self._gc_margin
        t[K.F_LM_SLACK] = self._lm_slack
        t[K.F_LM_UNIT] = self._lm_unit
        t[K.F_RUNAWAY_FACTOR] = RUNAWAY_FACTOR
        t[K.F_RUNAWAY_MIN] = RUNAWAY_MIN
        self._ftemplate = t
        self._entry: dict[str, Any] = {}  # compiled entry points (see _call)
        # arc costs of recent cost versions (turn rules: one gather per version, not per query)
        self._version_arrays: dict[int, tuple[Any, _Arrays]] = {}
        self._version_lock = threading.Lock()
        self._dag: tuple[np.ndarray, np.ndarray] | None = None
        self._dag_lock = threading.Lock()
        self._pool: list[_Workspace] = []
        self._pool_lock = threading.Lock()

    def _condensation(self) -> tuple[np.ndarray, np.ndarray]:
        """CSR (int64 indptr, int64 head) of the SCC condensation DAG, built on first use."""
        with self._dag_lock:
            if self._dag is None:
                comp = self._component.astype(np.int64)
                n_comp = int(comp.max()) + 1 if comp.size else 1
                tail_c = comp[np.asarray(self.kernel_graph.tail, dtype=np.int64)]
                head_c = comp[np.asarray(self.kernel_graph.head, dtype=np.int64)]
                keep = tail_c != head_c
                pairs = np.unique(np.stack((tail_c[keep], head_c[keep]), axis=1), axis=0)
                dindptr = np.zeros(n_comp + 1, dtype=np.int64)
                np.add.at(dindptr, pairs[:, 0] + 1, 1)
                self._dag = (np.cumsum(dindptr), np.ascontiguousarray(pairs[:, 1]))
            return self._dag

    # -- workspace pool --
    def _acquire(self) -> _Workspace:
        with self._pool_lock:
            if self._pool:
                return self._pool.pop()
        return _Workspace(self.n_nodes)

    def _release(self, ws: _Workspace) -> None:
        with self._pool_lock:
            self._pool.append(ws)

    def _run(self, ws: _Workspace, arrays: _Arrays | None = None) -> int:
        a = self._arrays if arrays is None else arrays
        args: tuple[Any, ...] = (self._indptr, self._head, a.cost, self._coords, a.lm)
        args += (ws.state, ws.heap, ws.istate, ws.fstate)
        return int(_call(K.run, self._entry, "run", args))

    def _open_query(
        self,
        ws: _Workspace,
        arrays: _Arrays | None = None,
        src_node: np.ndarray | None = None,
        src_g: np.ndarray | None = None,
    ) -> tuple[int, float, float, int, int]:
        a = self._arrays if arrays is None else arrays
        args: tuple[Any, ...] = (self._tail, self._head, a.cost, self._coords, a.lm)
        args += (a.lm_nodes, a.tree_to, a.tree_from, ws.state, ws.heap, ws.istate, ws.fstate)
        args += (
            ws.src_node if src_node is None else src_node,
            ws.src_g if src_g is None else src_g,
            ws.route_buf,
        )
        count, cost, h_start, src_i, tgt_i = _call(K.open_query, self._entry, "open_query", args)
        return int(count), float(cost), float(h_start), int(src_i), int(tgt_i)

    def arrays_for(self, costs: Any) -> _Arrays:
        """The cost and landmark arrays a search on live ``costs`` uses (``planner.traffic``
        ``CostVersion``), with the scalars that keep its bound proven: the chord bound at the
        version's top speed (used whenever the ALT term is weakened), the landmarks rebuilt for
        the version if it has them, and the landmark slack plus the version's total saving R
        (see ``planner/traffic.py``). Under turn rules the arc costs are the road costs
        gathered onto the arcs plus the turn costs, computed once per version."""
        if costs is None:
            return self._arrays
        key = id(costs)
        with self._version_lock:
            hit = self._version_arrays.get(key)
            if hit is not None and hit[0] is costs:
                return hit[1]
        arrays = self._arrays_for(costs)
        with self._version_lock:
            if len(self._version_arrays) >= 8:  # a few recent versions are all that run
                self._version_arrays.pop(next(iter(self._version_arrays)))
            self._version_arrays[key] = (costs, arrays)  # holding it keeps the id unique
        return arrays

    def _arrays_for(self, costs: Any) -> _Arrays:
        road = _readonly(costs.travel_time_s, np.float64)
        if road.shape != self._road_cost.shape:
            raise InvalidRequest(
                f"cost version {getattr(costs, 'version', '?')} has {road.shape[0]} edge costs; "
                f"this graph has {self._road_cost.shape[0]} edges"
            )
        sg = self.search_graph
        cost = road if sg.identity else _readonly(sg.arc_costs(road), np.float64)
        lms = getattr(costs, "landmarks", None)
        if lms is not None and self.n_landmarks:
            if np.asarray(lms.lm).shape != self._lm.shape:
                raise InvalidRequest("the cost version's landmarks do not match the planner's")
            lm = _readonly(lms.lm, np.uint16)
            tree_to = _readonly(lms.tree_to, np.int32)
            tree_from = _readonly(lms.tree_from, np.int32)
            nodes = _readonly(lms.nodes, np.int32)
            unit, slack = float(lms.unit_s), float(lms.slack_s)
        else:
            a = self._arrays
            lm, tree_to, tree_from, nodes = a.lm, a.tree_to, a.tree_from, a.lm_nodes
            unit, slack = self._lm_unit, self._lm_slack
        extra = float(getattr(costs, "landmark_slack_extra_s", 0.0) or 0.0)
        speed = float(getattr(costs, "max_speed_mps", 0.0) or self.graph.max_speed_mps)
        chord = self.use_chord or extra > 0.0
        return _Arrays(
            cost=cost,
            road_cost=road,
            lm=lm,
            tree_to=tree_to,
            tree_from=tree_from,
            lm_nodes=nodes,
            lm_unit=unit,
            lm_slack=slack + extra,
            gc_scale=(1.0 - 1e-9) / speed if chord else 0.0,
        )

    def warm_up(self) -> None:
        """Compile (or load from the numba cache) every kernel and build the component DAG, so
        the first timed request pays for neither."""
        _warm_kernel()
        if self.n_nodes:
            self._condensation()

    def start(
        self,
        origin: int | RoadSnap,
        destination: int | RoadSnap,
        deadline_ms: float | None = None,
        budget_expansions: int | None = None,
        steps: int = DEFAULT_STEPS,
        started_at: float | None = None,
        cancel: _Event | None = None,
        mode: str = "weighted",
        gap_target: float = 0.0,
        costs: Any = None,
    ) -> Search:
        """Open a search (see the module docstring for contracts and steps).

        Parameters
        ----------
        origin, destination : int or planner.snap.RoadSnap
            Road node indices (``NodeNotFound`` when outside ``0..n_nodes-1``), or points
            snapped onto roads (``planner.snap.snap_to_road``): the route then starts and ends
            at the points, with the partial edges' costs.
        deadline_ms : float, optional
            Wall-clock contract, counted from ``started_at``; ``0 < deadline_ms <= 60000``.
        budget_expansions : int, optional
            Expansion contract, ``1 <= budget_expansions <= 10**12``. At most one of the two.
        steps : int
            Decision steps the contract is cut into, ``1..10000``.
        started_at : float, optional
            ``time.perf_counter()`` when the request arrived; defaults to now.
        cancel : threading.Event-like, optional
            Checked between steps and (through the kernel's stop flag, see
            :meth:`Search.stop`) while expanding; when set the search ends ``cancelled``.
        mode : {"weighted", "ana"}
            Open-list order: ``g + w*h`` (Anytime Weighted A*) or the ANA* key.
        gap_target : float
            Stop once the proven relative gap is at or below this (``0 <= gap < 1``; 0: only
            when proven optimal).
        costs : planner.traffic.CostVersion, optional
            Live edge costs to search on instead of the graph's base costs; the search keeps
            this version from start to end, and its bounds stay proven (:meth:`arrays_for`).
        """
        t_arrival = time.perf_counter() if started_at is None else float(started_at)
        g = self.graph
        origin = origin if isinstance(origin, RoadSnap) else g.check_node(origin)
        if not isinstance(destination, RoadSnap):
            destination = g.check_node(destination)
        deadline_ms, budget_expansions, steps = validate_contract(
            deadline_ms, budget_expansions, steps
        )
        gap_target = validate_gap_target(gap_target)
        if mode not in _MODE_CODE:
            raise InvalidRequest(f"search mode must be one of {list(MODES)}, got {mode!r}")
        return Search(
            self,
            origin,
            destination,
            deadline_ms=deadline_ms,
            budget_expansions=budget_expansions,
            steps=steps,
            started_at=t_arrival,
            cancel=cancel,
            mode=mode,
            gap_target=gap_target,
            costs=costs,
        )


def _call(dispatcher: Any, cache: dict[str, Any], name: str, args: tuple[Any, ...]) -> Any:
    """Call a numba function through its compiled entry point for these argument types.

    numba's dispatcher resolves the types of every argument on each call (about a microsecond
    for nine arrays); a planner always passes the same types, so after the first call it keeps
    the compiled entry point and calls it directly. The first call goes through the dispatcher
    (compiling or loading from the cache as needed).
    """
    entry = cache.get(name)
    if entry is not None:
        return entry(*args)
    out = dispatcher(*args)
    sig = tuple(numba.typeof(a) for a in args)
    overload = dispatcher.overloads.get(sig)
    if overload is not None:
        cache[name] = overload.entry_point
    return out


_WARM_LOCK = threading.Lock()
_WARMED = False


def _warm_kernel() -> None:
    global _WARMED
    with _WARM_LOCK:
        if _WARMED:
            return
        from dueroute.planner.heuristics import build_landmarks

        lat = np.array([0.0, 0.0, 0.001, 0.001])
        lon = np.array([0.0, 0.001, 0.001, 0.0])
        graph = RoadGraph(
            indptr=np.array([0, 1, 2, 3, 4], dtype=np.int64),
            head=np.array([1, 2, 3, 0], dtype=np.int32),
            travel_time_s=np.array([10.0, 10.0, 10.0, 10.0]),
            length_m=np.array([112.0, 112.0, 112.0, 112.0]),
            speed_kph=np.full(4, 50.0, dtype=np.float32),
            road_class=np.zeros(4, dtype=np.int8),
            speed_source=np.zeros(4, dtype=np.int8),
            lat=lat,
            lon=lon,
            osm_id=np.arange(4, dtype=np.int64),
            component=np.zeros(4, dtype=np.int32),
            geom_indptr=np.zeros(5, dtype=np.int64),
            geom_lat=np.zeros(0),
            geom_lon=np.zeros(0),
        )
        with_lm = Planner(graph, landmarks=build_landmarks(graph, count=1, progress=False))
        plain = Planner(graph)
        for p in (with_lm, plain):
            plan(p, 0, 2, budget_expansions=10, steps=2, controller="decreasing")
            plan(p, 0, 2, budget_expansions=10, steps=2, controller="ana")
            plan(p, 0, 3, deadline_ms=5.0, steps=2, controller="fixed:2", gap_target=0.5)
            p._condensation()
        K.dag_reachable(*with_lm._condensation(), 0, 0)
        _WARMED = True


def validate_contract(
    deadline_ms: Any, budget_expansions: Any, steps: Any
) -> tuple[float | None, int | None, int]:
    """Check the contract arguments; raise :class:`InvalidRequest` saying what is allowed."""
    if deadline_ms is not None and budget_expansions is not None:
        raise InvalidRequest(
            "give either deadline_ms or budget_expansions, not both "
            f"(got deadline_ms={deadline_ms!r}, budget_expansions={budget_expansions!r})"
        )
    if deadline_ms is not None:
        if isinstance(deadline_ms, bool) or not isinstance(deadline_ms, (int, float, np.number)):
            raise InvalidRequest(f"deadline_ms must be a number, got {deadline_ms!r}")
        d = float(deadline_ms)
        if not (math.isfinite(d) and 0.0 < d <= MAX_DEADLINE_MS):
            raise InvalidRequest(
                f"deadline_ms must be > 0 and <= {MAX_DEADLINE_MS:.0f}, got {deadline_ms!r}"
            )
        deadline_ms = d
    if budget_expansions is not None:
        if isinstance(budget_expansions, bool) or not isinstance(
            budget_expansions, (int, np.integer)
        ):
            raise InvalidRequest(f"budget_expansions must be an integer, got {budget_expansions!r}")
        b = int(budget_expansions)
        if not 1 <= b <= MAX_BUDGET_EXPANSIONS:
            raise InvalidRequest(
                f"budget_expansions must be between 1 and {MAX_BUDGET_EXPANSIONS}, got {b}"
            )
        budget_expansions = b
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)):
        raise InvalidRequest(f"steps must be an integer, got {steps!r}")
    if not 1 <= int(steps) <= MAX_STEPS:
        raise InvalidRequest(f"steps must be between 1 and {MAX_STEPS}, got {int(steps)}")
    return deadline_ms, budget_expansions, int(steps)


def validate_gap_target(gap_target: Any) -> float:
    """A relative gap tolerance in ``[0, 1)``; raise :class:`InvalidRequest` otherwise."""
    if isinstance(gap_target, bool) or not isinstance(gap_target, (int, float, np.number)):
        raise InvalidRequest(f"gap_target must be a number in [0, 1), got {gap_target!r}")
    g = float(gap_target)
    if not (math.isfinite(g) and 0.0 <= g < 1.0):
        raise InvalidRequest(
            f"gap_target must be in [0, 1) (a relative gap such as 0.01 for 1 %), got {g!r}"
        )
    return g


# ------------------------------------------------------------------------------------------
# Search


class Search:
    """One running query (create with :meth:`Planner.start`).

    Call :meth:`run_step` with a weight until :attr:`done`, then :meth:`result`.
    :meth:`stats` may be called at any time.
    """

    def __init__(
        self,
        planner: Planner,
        origin: int | RoadSnap,
        destination: int | RoadSnap,
        *,
        deadline_ms: float | None,
        budget_expansions: int | None,
        steps: int,
        started_at: float,
        cancel: _Event | None,
        mode: str,
        gap_target: float,
        costs: Any = None,
    ) -> None:
        self.planner = planner
        #: the cost version searched (None: base costs), held from start to end
        self.costs = costs
        self._arrays = planner.arrays_for(costs)
        self.origin = origin
        self.destination = destination
        self.deadline_ms = deadline_ms
        self.budget_expansions = budget_expansions
        self.steps_total = steps
        self.started_at = started_at
        self.cancel = cancel
        #: the cancel object stops the kernel itself (see :func:`plan`): no polling needed
        self._cancel_bound = False
        self._stop_asked = False  # stop() was called
        #: told ``True`` before and ``False`` after a long kernel run (see :func:`plan`)
        self._on_kernel: Callable[[bool], None] | None = None
        self.mode = mode
        self._mode_code = _MODE_CODE[mode]
        self.gap_target = gap_target
        self.controller_name = ""
        self.on_improvement: Callable[[Improvement], None] | None = None
        if deadline_ms is None and budget_expansions is None:
            self._budget: int | None = max(
                UNBOUNDED_BUDGET_MIN, UNBOUNDED_BUDGET_PER_NODE * planner.n_nodes
            )
            self._deadline_at: float | None = None
        elif deadline_ms is not None:
            self._budget = None
            self._deadline_at = started_at + deadline_ms / 1000.0
        else:
            self._budget = budget_expansions
            self._deadline_at = None

        self.improvements = ImprovementLog()
        self._steps: list[tuple[int, float, int, float]] = []  # (step, elapsed_ms, exp, weight)
        self.steps_done = 0
        self.weight = float("nan")
        self._status: str | None = None
        self._stopped_by = "proof"
        self._route: np.ndarray | None = None
        self._route_edges: np.ndarray | None = None
        self._road: RoadRoute | None = None
        self._ends: Ends | None = None
        self._cost: float | None = None
        self._instant_cost: float | None = None
        #: kernel improvement count whose route self._route holds (0: the instant route)
        self._route_read = 0
        self._greedy_first = False  # no instant route: greedy until the first route
        self._log_seen = 0
        self._last_improvement_step = -1
        self._last_improvement_expansions = 0
        self._cpu_mark = -1.0  # thread CPU time at the end of the last step (-1: none yet)
        self._cpu_s = 0.0
        self._kernel_s = 0.0  # wall time inside kernel.run
        #: wall time opening the query (the instant route included) and deciding weights
        #: (``plan()`` adds each decision: stats, features, the controller)
        self.open_s = 0.0
        self.control_s = 0.0
        self._weight_capped = False
        self._final: np.ndarray | None = None  # the stats vector once done
        self._ws: _Workspace | None = None
        self._finished_at: float | None = None
        # the live stats vector (planner.results.STATS_FIELDS order)
        v = self._v = np.zeros(STATS_LEN, dtype=np.float64)
        v[_V_INCUMBENT] = math.inf
        v[_V_STEPS_TOTAL] = steps
        v[_V_CPU] = 1.0
        v[_V_WEIGHT] = 1.0
        v[_V_LEFT] = -1.0

        if isinstance(origin, int) and isinstance(destination, int):
            if origin == destination:
                self._set_route(
                    RoadRoute(
                        np.array([origin], dtype=np.int64),
                        np.zeros(0, dtype=np.int64),
                        None,
                        None,
                        0.0,
                    )
                )
                self._finish("optimal", "proof")
                return
            fast = planner.search_graph.identity
        else:
            fast = False
        if fast:
            if self._unreachable_nodes(int(origin), int(destination)):  # type: ignore[arg-type]
                self._finish("no_route", "unreachable")
                return
        else:
            self._ends = resolve(planner.search_graph, self._arrays.road_cost, origin, destination)
            if self._ends_unreachable(self._ends):
                self._finish("no_route", "unreachable")
                return
        t_open = time.perf_counter()
        ws = planner._acquire()
        self._ws = ws
        self._open(ws, origin, destination)
        self.open_s = time.perf_counter() - t_open

    def __del__(self) -> None:
        # a search dropped before it ended returns its workspace to the pool
        ws = getattr(self, "_ws", None)
        if ws is not None:
            self._ws = None
            self.planner._release(ws)

    def _unreachable_nodes(self, origin: int, destination: int) -> bool:
        planner = self.planner
        costs = self.costs
        if costs is not None and getattr(costs, "component", None) is not None:
            return not costs.may_reach(origin, destination)
        comp = planner._component
        return bool(comp[origin] != comp[destination]) and not _reachable_by_labels(
            planner, origin, destination
        )

    def _ends_unreachable(self, ends: Ends) -> bool:
        if ends.directs:
            return False
        if not ends.sources or not ends.targets:
            return True
        planner = self.planner
        costs = self.costs
        road = np.asarray(planner.search_graph.node_road)
        for src in ends.sources:
            for tg in ends.targets:
                if costs is not None and getattr(costs, "component", None) is not None:
                    if costs.may_reach(int(road[src.state]), int(road[tg.state])):
                        return False
                elif not self._unreachable_kernel(src.state, tg.state):
                    return False
        return True

    def _unreachable_kernel(self, a: int, b: int) -> bool:
        comp = self.planner._component
        return bool(comp[a] != comp[b]) and not _reachable_by_labels(self.planner, a, b)

    def _set_cost(self, cost: float) -> None:
        self._cost = cost
        self._v[_V_INCUMBENT] = cost

    def with_route(self, imp: Improvement) -> Improvement:
        """``imp`` carrying the current incumbent route (for ``on_improvement`` callbacks)."""
        rr = self._road
        return replace(
            imp,
            route_nodes=self._route,
            route_edges=self._route_edges,
            route_start=None if rr is None else rr.start,
            route_end=None if rr is None else rr.end,
        )

    def _set_route(self, rr: RoadRoute) -> None:
        self._road = rr
        self._route, self._route_edges = rr.nodes, rr.edges
        self._set_cost(rr.cost_s)

    def _open(self, ws: _Workspace, origin: Any, destination: Any) -> None:
        planner = self.planner
        ist, fst = ws.istate, ws.fstate
        ist[: K.I_TLM] = 0
        fst[: K.F_LOG] = planner._ftemplate
        arrays = self._arrays
        if arrays is not planner._arrays:
            fst[K.F_GC_SCALE] = arrays.gc_scale
            fst[K.F_LM_SLACK] = arrays.lm_slack
            fst[K.F_LM_UNIT] = arrays.lm_unit
        ist[K.I_GEN] = ws.next_generations(K.INSTANT_GENERATIONS + 1)
        ist[K.I_MODE] = self._mode_code
        fst[K.F_GAP_TARGET] = self.gap_target
        ist[K.I_N_ACTIVE] = planner.active_landmarks
        ends = self._ends
        if ends is None:  # a node to a node on the road graph: the kernel fills in the target
            ist[K.I_TNODE] = destination
            ws.src_node[0] = origin
            ws.src_g[0] = 0.0
            src_node, src_g = ws.src_node, ws.src_g
        else:
            src_node, src_g = self._set_ends(ws, ends)
        count, instant_cost, h_start, src_i, tgt_i = planner._open_query(
            ws, arrays, src_node, src_g
        )
        v = self._v
        v[_V_H_START] = h_start
        if math.isfinite(h_start):
            v[_V_BOUND] = h_start
        if count >= 0 and not math.isfinite(instant_cost):
            count = -1  # the trees' route uses a closed edge (live costs): no instant route
        best: RoadRoute | None = None
        if count >= 0:
            arcs = ws.route_buf[:count].copy()
            states = np.empty(count + 1, dtype=np.int64)
            states[0] = src_node[src_i]
            states[1:] = planner._head[arcs]
            best = self._road_route(
                states, arcs, max(src_i, 0), max(tgt_i, 0), known_cost=instant_cost
            )
        if ends is not None:
            for d in ends.directs:
                if best is None or d.cost < best.cost_s:
                    best = direct_route(ends, d)
        if best is not None:
            self._install_instant(best)
        elif ist[K.I_SIZE] == 0:  # nothing to search and no route
            self._finish("no_route", "unreachable")
        else:
            # no tree connects the pair: search greedily (ANA*'s order) until a first route
            self._greedy_first = True
            ist[K.I_MODE] = K.MODE_ANA

    def _set_ends(self, ws: _Workspace, ends: Ends) -> tuple[np.ndarray, np.ndarray]:
        """Write the target table, the target's position and landmark row; the sources."""
        planner = self.planner
        ist, fst = ws.istate, ws.fstate
        ist[K.I_N_TARGETS] = len(ends.targets)
        for k, tg in enumerate(ends.targets):
            ist[K.I_TNODE + k] = tg.state
            ist[K.I_TKIND + k] = tg.kind
            ist[K.I_TEDGE + k] = tg.arc
            fst[K.F_TCOST + k] = tg.exit_cost
        xyz, _, _ = K.sphere_points(
            np.array([ends.target_lat]), np.array([ends.target_lon]), planner._centre
        )
        fst[K.F_T_X : K.F_T_Z + 1] = np.asarray(xyz[0], dtype=np.float32)
        a = self._arrays
        n_lm = planner.n_landmarks
        if n_lm:
            ist[K.I_TLM : K.I_TLM + 2 * n_lm] = target_row(a.lm, a.lm_unit, ends.targets)
        src_node = np.array([src.state for src in ends.sources], dtype=np.int64)
        src_g = np.array([src.g0 for src in ends.sources], dtype=np.float64)
        return src_node, src_g

    def _road_route(
        self,
        states: np.ndarray,
        arcs: np.ndarray,
        src: int,
        tgt: int,
        known_cost: float | None = None,
    ) -> RoadRoute:
        """A kernel path (from source ``src`` to target ``tgt``) as a road route.

        ``known_cost``: the path's cost as the kernel summed it (node to node only)."""
        a = self._arrays
        ends = self._ends
        if ends is None:
            cost = float(K.route_cost(a.cost, arcs)) if known_cost is None else known_cost
            return RoadRoute(states, arcs, None, None, cost)
        return assemble(
            self.planner.search_graph, ends, states, arcs, a.cost, a.road_cost, src, tgt
        )

    def _install_instant(self, rr: RoadRoute) -> None:
        cost = rr.cost_s
        self._set_route(rr)
        self._instant_cost = cost
        ws = self._ws
        assert ws is not None
        ws.fstate[K.F_INCUMBENT] = cost
        v = self._v
        bound = min(v[_V_BOUND], cost)
        v[_V_BOUND] = bound
        v[_V_INSTANT] = 1.0
        self.improvements.append(
            Improvement(
                elapsed_ms=(time.perf_counter() - self.started_at) * 1000.0,
                expansions=0,
                cost_s=cost,
                lower_bound_s=bound,
                gap=gap_of(cost, bound),
                weight=float("nan"),
                source="instant",
            )
        )
        v[_V_IMPROVEMENTS] = 1.0
        self._last_improvement_step = 0

    # -- public API --
    @property
    def done(self) -> bool:
        return self._status is not None

    @property
    def status(self) -> str | None:
        return self._status

    @property
    def weight_capped(self) -> bool:
        """True once the runaway guard forced weight 1 (later weights are ignored)."""
        return self._weight_capped

    @property
    def weights(self) -> list[WeightStep]:
        """The weight chosen for each step so far."""
        return [
            WeightStep(step=k, elapsed_ms=t, expansions=e, weight=w) for k, t, e, w in self._steps
        ]

    def elapsed_ms(self) -> float:
        end = self._finished_at if self._finished_at is not None else time.perf_counter()
        return (end - self.started_at) * 1000.0

    def stop(self) -> None:
        """Ask the kernel to stop at its next check (any thread; about 10 us of search)."""
        self._stop_asked = True
        ws = self._ws
        if ws is not None:
            ws.istate[K.I_STOP] = 1

    def nudge(self) -> None:
        """Make the kernel return to Python at its next check (any thread), where the search
        asks its cancel object whether to stop (it may also wait there: a yield point)."""
        ws = self._ws
        if ws is not None:
            ws.istate[K.I_STOP] = 1

    def run_step(self, weight: float) -> None:
        """Run one decision step with ``weight`` (1..5; ignored by the key in ``ana`` mode).

        Returns when the step's share of the contract is spent, the optimum is proven, the gap
        target is reached or the search is cancelled. Calling it on a finished search does
        nothing.
        """
        if self._status is not None:
            return
        w = float(weight)
        if not (MIN_WEIGHT <= w <= MAX_WEIGHT):  # also refuses NaN
            raise InvalidRequest(
                f"weight must be a number in {MIN_WEIGHT:g}..{MAX_WEIGHT:g}, got {weight!r}"
            )
        ws = self._ws
        assert ws is not None
        ist, fst = ws.istate, ws.fstate
        k = self.steps_done
        wall0 = time.perf_counter()
        timed = self._deadline_at is not None
        if timed and self._cpu_mark < 0:
            self._cpu_mark = time.thread_time()
        if ist[K.I_RUNAWAY]:
            w = 1.0
        self.weight = w
        if not self._greedy_first and not ist[K.I_RUNAWAY]:
            fst[K.F_WEIGHT] = w
            ist[K.I_MODE] = self._mode_code
        self._steps.append((k, (wall0 - self.started_at) * 1000.0, int(ist[K.I_EXPANSIONS]), w))
        ist[K.I_RETURN_ON_IMPROVE] = (
            1 if (self.on_improvement is not None or self._greedy_first) else 0
        )
        if self._budget is not None:
            self._run_budget_step(ws, k)
        else:
            self._run_deadline_step(ws, k, wall0)
        wall1 = time.perf_counter()
        if timed:
            # one CPU-clock read per step: the CPU this step (and its control) received
            cpu1 = time.thread_time()
            cpu = cpu1 - self._cpu_mark
            self._cpu_mark = cpu1
            self._cpu_s += cpu
            if wall1 > wall0:
                self._v[_V_CPU] = min(1.0, cpu / (wall1 - wall0))
        self.steps_done = k + 1
        if self._status is None:
            self._collect_log(ws)
            out_of_time = timed and wall1 >= self._deadline_at  # type: ignore[operator]
            if self.steps_done >= self.steps_total or out_of_time:
                self._finish_unproven(ws, "deadline" if timed else "budget")

    def stats(self) -> SearchStats:
        """Snapshot for features and controllers (the final snapshot once done)."""
        if self._final is not None:
            return SearchStats.from_vector(self._final, self.mode)
        self._refresh()
        return SearchStats.from_vector(self._v, self.mode)

    def result(self) -> PlanResult:
        """The answer so far (final once :attr:`done`)."""
        ws = self._ws
        if ws is not None and self._status is None:
            self._collect_log(ws)
            self._refresh()
        status = self._status if self._status is not None else self._quality_status()
        cost = self._cost
        v = self._final if self._final is not None else self._v
        bound: float | None = float(v[_V_BOUND]) if cost is None else min(float(v[_V_BOUND]), cost)
        if status == "no_route":
            bound = None
        elif status == "optimal" and cost is not None:
            bound = cost
        rr = self._road
        o, d = self.origin, self.destination
        return PlanResult(
            status=status,
            origin=None if isinstance(o, RoadSnap) else int(o),
            destination=None if isinstance(d, RoadSnap) else int(d),
            route=self._route,
            route_edges=self._route_edges,
            route_start=None if rr is None else rr.start,
            route_end=None if rr is None else rr.end,
            origin_snap=o if isinstance(o, RoadSnap) else None,
            destination_snap=d if isinstance(d, RoadSnap) else None,
            cost_s=cost,
            lower_bound_s=bound,
            gap=None if cost is None or bound is None else gap_of(cost, bound),
            improvements=self.improvements.snapshot(),
            weights=self.weights,
            expansions=int(v[_V_EXPANSIONS]),
            elapsed_ms=self.elapsed_ms(),
            controller=self.controller_name,
            steps=self.steps_total,
            mode=self.mode,
            deadline_ms=self.deadline_ms,
            budget_expansions=self.budget_expansions,
            h_start_s=float(v[_V_H_START]),
            nodes_touched=int(v[_V_TOUCHED]) if self._final is not None else 0,
            stopped_by=self._stopped_by if self._status is not None else "deadline",
            instant_cost_s=self._instant_cost,
            weight_capped=self._weight_capped,
            gap_target=self.gap_target,
            kernel_ms=self._kernel_s * 1000.0,
            open_ms=self.open_s * 1000.0,
            control_ms=self.control_s * 1000.0,
        )

    def close(self) -> None:
        """End the search now (status ``cancelled`` if it was still running)."""
        if self._status is None:
            ws = self._ws
            if ws is not None:
                self._collect_log(ws)
            self._finish("cancelled", "cancel")

    # -- internals --
    def _quality_status(self) -> str:
        if self._cost is None:
            return "not_found"
        if self._route_read == 0 and self._instant_cost is not None:
            return "instant"
        return "improved"

    def _cancelled(self) -> bool:
        return self.cancel is not None and self.cancel.is_set()

    def _run_budget_step(self, ws: _Workspace, k: int) -> None:
        assert self._budget is not None
        target = self._budget * (k + 1) // self.steps_total
        ist = ws.istate
        ist[K.I_UNTIL_NS] = 0
        while self._status is None:
            if self._cancelled():
                self.close()
                return
            left = target - int(ist[K.I_EXPANSIONS])
            if left <= 0:
                return
            ist[K.I_LIMIT] = min(left, BUDGET_CHUNK_EXPANSIONS)
            self._handle(ws, self._kernel(ws))

    def _run_deadline_step(self, ws: _Workspace, k: int, now: float) -> None:
        assert self._deadline_at is not None
        steps_left = self.steps_total - k
        step_end = now + max(0.0, self._deadline_at - now) / steps_left
        if steps_left == 1:
            step_end = self._deadline_at
        ist = ws.istate
        ist[K.I_LIMIT] = -1
        # poll the cancel object between short kernel runs, unless it stops the kernel itself
        watch = self.cancel is not None and not self._cancel_bound
        while self._status is None:
            if watch and self.cancel.is_set():  # type: ignore[union-attr]
                self.close()
                return
            if now >= step_end:
                return
            until = min(step_end, now + CANCEL_CHECK_S) if watch else step_end
            ist[K.I_UNTIL_NS] = int(until * 1e9)
            hook = self._on_kernel if until - now >= KERNEL_HOOK_MIN_S else None
            if hook is not None:
                hook(True)
            try:
                status = self._kernel(ws)
            finally:
                if hook is not None:
                    hook(False)
            now = time.perf_counter()
            if status == K.TIME_UP:
                if until >= step_end:
                    return
                continue
            self._handle(ws, status)

    def _kernel(self, ws: _Workspace) -> int:
        t0 = time.perf_counter()
        status = self.planner._run(ws, self._arrays)
        self._kernel_s += time.perf_counter() - t0
        return int(status)

    def _handle(self, ws: _Workspace, status: int) -> None:
        if status == K.IMPROVED:
            self._on_improved(ws)
            if self._greedy_first:  # the first route: hand over to the controller
                self._greedy_first = False
                ws.istate[K.I_MODE] = self._mode_code
                if not ws.istate[K.I_RUNAWAY]:
                    ws.fstate[K.F_WEIGHT] = self.weight if math.isfinite(self.weight) else 1.0
                ws.istate[K.I_RETURN_ON_IMPROVE] = 1 if self.on_improvement is not None else 0
        elif status == K.PROVEN:
            self._collect_log(ws)
            if self._cost is not None:
                self._finish("optimal", "proof")
            else:
                self._finish("no_route", "unreachable")
        elif status == K.GAP_REACHED:
            self._finish_unproven(ws, "gap_target")
        elif status == K.STOPPED:
            if self._stop_asked:
                self.close()
                return
            # A nudge (or a stop flag left by a search that used this workspace before and
            # was stopped as it ended): clear the flag first, so a nudge that comes while
            # this runs sets it again and is never lost, then ask the cancel object and go
            # on if it says so.
            ws.istate[K.I_STOP] = 0
            if self.cancel is not None and self.cancel.is_set():
                self.close()

    def _finish_unproven(self, ws: _Workspace, reason: str) -> None:
        self._collect_log(ws)
        self._finish(self._quality_status(), reason)

    def _route_from_kernel(self, ws: _Workspace) -> None:
        """Read the incumbent route back from the parent pointers (when the kernel holds it)."""
        best = int(ws.istate[K.I_BEST_NODE])
        found = int(ws.istate[K.I_IMPROVEMENTS])
        if best < 0 or found == self._route_read:
            return
        planner = self.planner
        states, arcs = K.extract_route(ws.state, best, planner.n_nodes)
        if states.shape[0] == 0:  # cannot happen: parent pointers always lead back
            raise RuntimeError("internal error: route extraction failed")
        src = 0
        ends = self._ends
        if ends is not None:  # the source the path starts from (the cheapest of equal ones)
            first = int(states[0])
            cands = [i for i, x in enumerate(ends.sources) if x.state == first]
            src = min(cands, key=lambda i: ends.sources[i].g0) if cands else 0
        rr = self._road_route(states, arcs, src, max(0, int(ws.istate[K.I_BEST_TARGET])))
        self._set_route(rr)
        self._route_read = found
        self._v[_V_INSTANT] = 0.0
        if rr.cost_s < ws.fstate[K.F_INCUMBENT]:
            ws.fstate[K.F_INCUMBENT] = rr.cost_s  # prune with the real route cost

    def _on_improved(self, ws: _Workspace) -> None:
        self._route_from_kernel(ws)
        self._collect_log(ws, with_route=True)

    def _collect_log(self, ws: _Workspace, with_route: bool = False) -> None:
        """Move new entries of the kernel's improvement log into :attr:`improvements`."""
        ist = ws.istate
        count = int(ist[K.I_LOG_COUNT])
        if count == self._log_seen:
            return
        if int(ist[K.I_BEST_NODE]) >= 0:
            self._route_from_kernel(ws)
        v = self._v
        log = self.improvements
        lo, hi = self._log_seen, min(count, K.MAX_LOG)
        if hi > lo:
            at = len(log)
            rows = log.reserve(hi - lo)
            route_cost = self._cost if self._cost is not None else math.inf
            v[_V_BOUND] = K.collect_log(
                ws.fstate,
                lo,
                hi,
                count - 1,
                route_cost,
                float(v[_V_BOUND]),
                self.started_at,
                float(self.weight),
                rows,
                at,
            )
            log.commit(hi - lo)
            if self.on_improvement is not None:
                for i in range(at, at + hi - lo):
                    imp = log[i]
                    if with_route and i == at + hi - lo - 1 and hi == count:
                        imp = self.with_route(imp)
                    self.on_improvement(imp)
        self._log_seen = count
        v[_V_IMPROVEMENTS] = len(self.improvements)
        self._last_improvement_step = self.steps_done
        self._last_improvement_expansions = int(ist[K.I_EXPANSIONS])

    def _refresh(self) -> None:
        """Bring the live stats vector up to date (the kernel's part in one numba call)."""
        v = self._v
        ws = self._ws
        if ws is not None:
            K.refresh_stats(ws.heap, ws.istate, ws.fstate, v)
        elapsed_ms = self.elapsed_ms()
        v[_V_ELAPSED] = elapsed_ms
        expansions = v[_V_EXPANSIONS]
        if self._budget is not None:
            spare = max(0.0, self._budget - expansions)
            v[_V_FRAC] = spare / self._budget
            contract = self.deadline_ms is not None or self.budget_expansions is not None
            v[_V_LEFT] = spare if contract else -1.0  # the safety cap is not a contract
        else:
            assert self.deadline_ms is not None
            v[_V_FRAC] = max(0.0, 1.0 - elapsed_ms / self.deadline_ms)
            v[_V_TIME_LEFT] = max(0.0, self.deadline_ms - elapsed_ms)
        v[_V_WEIGHT] = self.weight if math.isfinite(self.weight) else 1.0
        v[_V_STEPS_DONE] = self.steps_done
        v[_V_STEPS_SINCE] = self.steps_done - (
            self._last_improvement_step if self._last_improvement_step >= 0 else 0
        )
        v[_V_EXP_SINCE] = expansions - self._last_improvement_expansions
        v[_V_RATE] = expansions / self._cpu_s if self._cpu_s > 0 else 0.0

    def _finish(self, status: str, reason: str) -> None:
        self._finished_at = time.perf_counter()
        ws = self._ws
        if ws is not None:
            if int(ws.istate[K.I_BEST_NODE]) >= 0:
                self._route_from_kernel(ws)
            self._weight_capped = bool(ws.istate[K.I_RUNAWAY])
        self._status = status
        self._stopped_by = reason
        self._refresh()
        v = self._v
        if status == "optimal" and self._cost is not None:
            v[_V_BOUND] = self._cost
        v[_V_DONE] = 1.0
        self._final = v
        if ws is not None:
            self._ws = None
            self.planner._release(ws)


def _reachable_by_labels(planner: Planner, origin: int, destination: int) -> bool:
    """Whether a directed path may exist between nodes in different SCCs.

    Different strongly-connected-component labels rule out a path *both* ways, but a path one
    way exists when the origin's component reaches the destination's in the condensation DAG
    (a one-way street out of a dead end). That DAG is built once per planner; the test walks
    components only.
    """
    dindptr, dhead = planner._condensation()
    return bool(
        K.dag_reachable(
            dindptr,
            dhead,
            int(planner._component[origin]),
            int(planner._component[destination]),
        )
    )


# ------------------------------------------------------------------------------------------
# plan()

_PLANNERS: weakref.WeakKeyDictionary[RoadGraph, Planner] = weakref.WeakKeyDictionary()
_PLANNERS_LOCK = threading.Lock()


def planner_for(graph_or_planner: RoadGraph | Planner) -> Planner:
    """The given planner, or a cached landmark-free planner for a graph."""
    if isinstance(graph_or_planner, Planner):
        return graph_or_planner
    if not isinstance(graph_or_planner, RoadGraph):
        raise InvalidRequest(
            f"expected a RoadGraph or Planner, got {type(graph_or_planner).__name__}"
        )
    with _PLANNERS_LOCK:
        p = _PLANNERS.get(graph_or_planner)
        if p is None:
            p = Planner(graph_or_planner)
            _PLANNERS[graph_or_planner] = p
        return p


def plan(
    graph_or_planner: RoadGraph | Planner,
    origin: int | RoadSnap,
    destination: int | RoadSnap,
    *,
    deadline_ms: float | None = None,
    budget_expansions: int | None = None,
    controller: str | Controller = DEFAULT_CONTROLLER,
    steps: int = DEFAULT_STEPS,
    on_improvement: Callable[[Improvement], None] | None = None,
    cancel: _Event | None = None,
    seed: int | None = None,
    started_at: float | None = None,
    gap_target: float = 0.0,
    costs: Any = None,
    every_improvement: bool = True,
) -> PlanResult:
    """Best route from ``origin`` to ``destination`` within the contract.

    Parameters
    ----------
    graph_or_planner : RoadGraph or Planner
    origin, destination : int or planner.snap.RoadSnap
        Road node indices or points snapped onto roads.
    deadline_ms, budget_expansions : optional
        The contract (at most one; see the module docstring when neither is given).
    controller : str or Controller
        A spec for :func:`planner.controllers.make_controller` (``"fixed:2"``, ``"random"``,
        ``"decreasing"``, ``"ana"``) or an object following the ``Controller`` protocol.
    steps : int
        Most decision steps (the controller is asked for a weight before each); under a
        deadline fewer when control would cost more than :data:`CONTROL_SHARE` of it.
    on_improvement : callable, optional
        Called with every :class:`Improvement`, in the search thread; the one it gets for a
        route found by the search carries the route (``route_nodes``, ``route_edges``).
    cancel : threading.Event-like, optional
        Polled (``is_set()``) every :data:`CANCEL_CHECK_S` while the search runs; an object
        that also has ``bind(nudge)`` is given the search's :meth:`Search.nudge` instead and
        calls it when it wants to be asked (cancellation, or a scheduler taking the CPU
        back): then the search asks ``is_set()`` at once, and never polls. Such an object
        may also have ``searching(flag)``, called with True before and False after each
        kernel run of at least :data:`KERNEL_HOOK_MIN_S` (a scheduler lowers the thread's
        priority while the kernel, which holds neither the GIL nor a lock, runs).
    seed : int, optional
        Seed for randomised controllers.
    started_at : float, optional
        ``time.perf_counter()`` at request arrival (the deadline counts from it).
    gap_target : float
        Stop as soon as the proven relative gap is at or below this (0: search until the
        deadline or the proof).
    costs : planner.traffic.CostVersion, optional
        Live edge costs (see :meth:`Planner.start`).
    every_improvement : bool
        False: ``on_improvement`` gets only the first route (the instant route, found when
        the search opens, else the search's first); the search then runs without stopping at
        each improvement to read its route back, which costs tens of microseconds of Python
        each. The result lists every improvement either way.
    """
    t0 = time.perf_counter() if started_at is None else started_at
    ctrl = make_controller(controller, seed=seed) if isinstance(controller, str) else controller
    planner = planner_for(graph_or_planner)
    kind = "policy" if getattr(ctrl, "uses_policy", False) else "builtin"
    if getattr(ctrl, "constant", False):
        # A weight that never changes needs no decisions: one step for the whole contract
        # (improvements, cancellation and the deadline are the kernel's, not the steps').
        validate_contract(deadline_ms, budget_expansions, steps)
        steps = 1
    elif deadline_ms is not None and budget_expansions is None:
        validate_contract(deadline_ms, None, steps)
        steps = steps_for_deadline(float(deadline_ms), steps, DECISION_COST.us(kind))
    wants_features = getattr(ctrl, "uses_features", True)
    search = planner.start(
        origin,
        destination,
        deadline_ms=deadline_ms,
        budget_expansions=budget_expansions,
        steps=steps,
        started_at=t0,
        cancel=cancel,
        mode=ctrl.mode,
        gap_target=gap_target,
        costs=costs,
    )
    search.controller_name = ctrl.name
    bind = getattr(cancel, "bind", None)
    if bind is not None:  # the cancel object nudges the kernel instead of being polled
        search._cancel_bound = True
        search._on_kernel = getattr(cancel, "searching", None)
        bind(search.nudge)
    if on_improvement is not None:
        for imp in search.improvements:  # the instant route, found when the search opened
            on_improvement(search.with_route(imp))
    if every_improvement:
        search.on_improvement = on_improvement
    elif on_improvement is not None and not search.improvements:
        search.on_improvement = _first_route_only(search, on_improvement)
    weight = _check_weight(ctrl.reset(seed), ctrl.name)
    decisions = 0
    while not search.done:
        search.run_step(weight)
        if search.done:
            break
        t_decide = time.perf_counter()
        stats = search.stats()
        features = compute_features(stats) if wants_features else _NO_FEATURES
        weight = _check_weight(ctrl.decide(features, stats), ctrl.name)
        search.control_s += time.perf_counter() - t_decide
        decisions += 1
    DECISION_COST.record(kind, search.control_s, decisions)
    return search.result()


def _first_route_only(
    search: Search, callback: Callable[[Improvement], None]
) -> Callable[[Improvement], None]:
    """``callback`` for the search's first route, then no more callbacks."""

    def first(imp: Improvement) -> None:
        callback(imp)
        if imp.route_nodes is not None:
            search.on_improvement = None  # the kernel stops returning on improvements

    return first


#: What a controller that declares ``uses_features = False`` is given instead of features.
_NO_FEATURES = np.zeros(0, dtype=np.float32)
_NO_FEATURES.flags.writeable = False


def _check_weight(w: Any, name: str) -> float:
    try:
        x = float(w)
    except (TypeError, ValueError):
        raise InvalidRequest(f"controller {name!r} returned a non-number weight {w!r}") from None
    if not (math.isfinite(x) and MIN_WEIGHT <= x <= MAX_WEIGHT):
        raise InvalidRequest(
            f"controller {name!r} returned weight {w!r}; weights must be in "
            f"{MIN_WEIGHT:g}..{MAX_WEIGHT:g}"
        )
    return x


__all__ = [
    "DECISION_COST",
    "DecisionCost",
    "Improvement",
    "NodeNotFound",
    "PlanResult",
    "Planner",
    "Search",
    "SearchStats",
    "WeightStep",
    "plan",
    "planner_for",
    "steps_for_deadline",
    "validate_contract",
    "validate_gap_target",
]
