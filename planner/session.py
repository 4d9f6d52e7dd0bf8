"""Search sessions: contracts, deadlines, decision steps and results around the numba kernel.

A :class:`Planner` wraps one road graph (and optionally its ALT landmarks) and hands out
:class:`Search` objects. A search runs under one *contract*: a wall-clock deadline
(``deadline_ms``, counted from ``started_at``, the moment the request arrived) or an expansion
budget (``budget_expansions``, reproducible). The contract is cut into ``steps`` decision steps;
before each step a controller picks the weight (see :mod:`planner.controllers`), and
:func:`plan` drives that loop.

Contracts and steps
-------------------
* **Budget**: step ``k`` (0-based) ends when the search has made
  ``budget * (k + 1) // steps`` expansions in total, so the same query, controller and seed always
  give the same result.
* **Deadline**: step ``k`` ends at ``now + (deadline_at - now) / steps_left`` (the remaining
  time shared equally among the remaining steps), the last step at the deadline itself.
* **Neither** (documented choice): the search runs to proven optimality under a safety budget
  of :data:`UNBOUNDED_BUDGET_PER_NODE` expansions per graph node (at least
  :data:`UNBOUNDED_BUDGET_MIN`); it ends ``contract_spent`` only if that cap is hit, which needs
  heavy reopening.

How the deadline is honoured
----------------------------
Python only touches the search between kernel chunks. Within a step, chunks are sized from the
measured expansion rate (an exponential moving average of expansions per second, started from
the previous search on the same workspace): each chunk is planned to take at most half the time
left in the step and at most :data:`MAX_CHUNK_S`, so the chunks shrink geometrically towards the
step end and an error in the rate estimate costs at most a fraction of a shrinking remainder. The
step stops when less than :data:`STOP_MARGIN_S` remains (about one chunk call's overhead).
Lateness is therefore bounded by the mis-estimate of the last, tiny chunk plus one call's
overhead; it is measured by ``tests/planner/test_session.py`` (printed, not asserted) and by
``dueroute bench deadline``. Path extraction after an improvement and ``on_improvement`` callbacks run in
the same thread and count against the deadline.

Bounds
------
``lower_bound_s = min(incumbent, min over open of g + h)`` (the running maximum of that value,
each of which is valid), equal to the cost once the search is proven. The reported route cost is
the sum of its edges' ``travel_time_s`` (it can be below the kernel's g of the destination when
an ancestor was reached more cheaply later); the kernel's incumbent is lowered to it so
pruning uses the real cost.

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
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

from dueroute.planner import _kernel as K
from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.graph import RoadGraph

if TYPE_CHECKING:
    from dueroute.planner.controllers import Controller
    from dueroute.planner.traffic import CostVersion

#: Longest accepted deadline (one day) and largest budget, to catch unit mistakes.
MAX_DEADLINE_MS = 86_400_000.0
MAX_BUDGET_EXPANSIONS = 10**12
MAX_STEPS = 10_000

#: Safety cap when neither a deadline nor a budget is given (see the module docstring).
UNBOUNDED_BUDGET_PER_NODE = 20
UNBOUNDED_BUDGET_MIN = 10_000

#: Deadline chunking (see the module docstring).
MAX_CHUNK_S = 0.002
STOP_MARGIN_S = 30e-6
FIRST_CHUNK_EXPANSIONS = 64
RATE_EMA = 0.5
#: Budget contracts check ``cancel`` at least every this many expansions.
BUDGET_CHUNK_EXPANSIONS = 50_000

STATUSES = ("optimal", "contract_spent", "no_route", "cancelled")
MODES = ("weighted", "ana")
_MODE_CODE = {"weighted": K.MODE_WEIGHTED, "ana": K.MODE_ANA}


class _Event(Protocol):
    def is_set(self) -> bool: ...


@dataclass(frozen=True)
class Improvement:
    """One new incumbent: when it was found and how good it was proven to be."""

    elapsed_ms: float  #: since the request arrived (``started_at``)
    expansions: int  #: total expansions when it was found
    cost_s: float  #: route cost (sum of its edges' travel_time_s)
    lower_bound_s: float  #: proven lower bound on the optimal cost at that moment
    gap: float  #: (cost - bound) / cost
    weight: float  #: weight in force when it was found


@dataclass(frozen=True)
class WeightStep:
    """The weight chosen for one decision step."""

    step: int
    elapsed_ms: float  #: when the step started, since ``started_at``
    expansions: int  #: total expansions when the step started
    weight: float


@dataclass(frozen=True)
class SearchStats:
    """Snapshot of a running search: everything the features and controllers need.

    Travel times in seconds; ``None`` means "not defined yet" (no incumbent, deadline contract
    has no expansions left). ``open_min_f_s`` is ``inf`` when the open list is empty.
    """

    incumbent_cost_s: float | None
    lower_bound_s: float
    open_size: int
    open_mean_g_s: float
    open_mean_h_s: float
    open_min_f_s: float
    h_start_s: float
    expansions: int
    expansions_left: int | None
    contract_fraction_left: float
    elapsed_ms: float
    weight: float
    mode: str
    improvements: int
    steps_done: int
    steps_total: int
    steps_since_improvement: int
    expansions_since_improvement: int
    cpu_share_last_step: float
    nodes_touched: int
    reopened: int
    done: bool


@dataclass
class PlanResult:
    """Answer of one search (see :data:`STATUSES` for ``status``).

    ``route`` holds node indices (int64[k + 1]) and ``route_edges`` edge indices (int64[k], so
    parallel edges are unambiguous); both are ``None`` when no route was found.
    ``cost_s`` / ``gap`` are ``None`` when no route was found; ``lower_bound_s`` is ``None`` only
    for ``no_route`` (a search stopped before its first route still proves a bound).
    """

    status: str
    origin: int
    destination: int
    route: np.ndarray | None
    route_edges: np.ndarray | None
    cost_s: float | None
    lower_bound_s: float | None
    gap: float | None
    improvements: list[Improvement]
    weights: list[WeightStep]
    expansions: int
    elapsed_ms: float
    controller: str
    steps: int
    mode: str = "weighted"
    deadline_ms: float | None = None
    budget_expansions: int | None = None
    h_start_s: float = 0.0
    nodes_touched: int = 0
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (numpy arrays become lists; non-finite numbers become None)."""
        out: dict[str, Any] = {
            "status": self.status,
            "origin": self.origin,
            "destination": self.destination,
            "cost_s": _json_num(self.cost_s),
            "lower_bound_s": _json_num(self.lower_bound_s),
            "gap": _json_num(self.gap),
            "route": None if self.route is None else [int(x) for x in self.route],
            "route_edges": None if self.route_edges is None else [int(x) for x in self.route_edges],
            "expansions": self.expansions,
            "elapsed_ms": self.elapsed_ms,
            "controller": self.controller,
            "mode": self.mode,
            "steps": self.steps,
            "deadline_ms": self.deadline_ms,
            "budget_expansions": self.budget_expansions,
            "h_start_s": _json_num(self.h_start_s),
            "nodes_touched": self.nodes_touched,
            "improvements": [
                {k: _json_num(v) for k, v in asdict(i).items()} for i in self.improvements
            ],
            "weights": [asdict(w) for w in self.weights],
        }
        out.update(self.extra)
        return out


def _json_num(x: Any) -> Any:
    if x is None:
        return None
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _gap(cost: float, bound: float) -> float:
    if cost <= 0.0:
        return 0.0
    return max(0.0, (cost - bound) / cost)


# ------------------------------------------------------------------------------------------
# Planner and workspaces


class _Workspace:
    """Kernel arrays for one running search on one graph (see ``planner._kernel``)."""

    def __init__(self, n_nodes: int) -> None:
        self.arrays = K.new_workspace(n_nodes)
        self.nodei, self.nodef, self.heap, self.istate, self.fstate = self.arrays
        self.generation = 0
        #: expansions per second measured by the last search on this workspace
        self.rate_hint: float | None = None

    def next_generation(self) -> int:
        self.generation += 1
        if self.generation >= 2**31 - 1:  # stamps are int32: wrap once every 2^31 queries
            self.nodei[:, K.N_STAMP] = 0
            self.generation = 1
        return self.generation


def _readonly(a: np.ndarray, dtype: Any) -> np.ndarray:
    """C-contiguous, read-only view (one numba signature for built and memory-mapped graphs)."""
    arr = np.ascontiguousarray(np.asarray(a), dtype=dtype).view()
    arr.flags.writeable = False
    return arr


class Planner:
    """Reusable search engine over one road graph.

    Parameters
    ----------
    graph : RoadGraph
    landmarks : object with ``lm_from``, ``lm_to`` (float32[n, L]) and ``slack_s`` (float), optional
        ALT landmark distances (``planner.heuristics.Landmarks``); see ``planner._kernel`` for
        the contract. ``None`` uses the great-circle bound alone.
    """

    def __init__(self, graph: RoadGraph, landmarks: Any = None) -> None:
        self.graph = graph
        n = graph.n_nodes
        self.n_nodes = n
        self._indptr = _readonly(graph.indptr, np.int64)
        self._head = _readonly(graph.head, np.int32)
        self._cost = _readonly(graph.travel_time_s, np.float64)
        coords, self._gc_margin = K.node_coords(graph.lat, graph.lon)
        self._coords = _readonly(coords if n else np.zeros((1, 3)), np.float32)
        self._component = np.asarray(graph.component)
        self._gc_scale = (1.0 - 1e-9) / float(graph.max_speed_mps)
        if landmarks is None:
            empty = _readonly(np.zeros((1, 0), dtype=np.float32), np.float32)
            self._lm_from, self._lm_to, self._lm_slack = empty, empty, 0.0
        else:
            check_graph = getattr(landmarks, "check_graph", None)
            if check_graph is not None:  # landmarks of another graph give wrong bounds
                check_graph(graph)
            lm_from = np.asarray(landmarks.lm_from)
            lm_to = np.asarray(landmarks.lm_to)
            if lm_from.ndim != 2 or lm_from.shape != lm_to.shape or lm_from.shape[0] != n:
                raise InvalidRequest(
                    f"landmark arrays must both have shape (nodes={n}, L), got "
                    f"{lm_from.shape} and {lm_to.shape}"
                )
            slack = float(landmarks.slack_s)
            if not (math.isfinite(slack) and slack >= 0.0):
                raise InvalidRequest(f"landmark slack_s must be finite and >= 0, got {slack!r}")
            self._lm_from = _readonly(lm_from, np.float32)
            self._lm_to = _readonly(lm_to, np.float32)
            self._lm_slack = slack
        self.n_landmarks = int(self._lm_from.shape[1])
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
                tail_c = comp[np.asarray(self.graph.tail, dtype=np.int64)]
                head_c = comp[np.asarray(self.graph.head, dtype=np.int64)]
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

    def _chunk(
        self,
        ws: _Workspace,
        cost: np.ndarray | None = None,
        lm_from: np.ndarray | None = None,
        lm_to: np.ndarray | None = None,
    ) -> int:
        """One kernel chunk; ``cost`` / ``lm_*`` replace the planner's (live traffic)."""
        return int(
            K.run_chunk(
                self._indptr,
                self._head,
                self._cost if cost is None else cost,
                self._coords,
                self._lm_from if lm_from is None else lm_from,
                self._lm_to if lm_to is None else lm_to,
                ws.nodei,
                ws.nodef,
                ws.heap,
                ws.istate,
                ws.fstate,
            )
        )

    def warm_up(self) -> None:
        """Compile (or load from the numba cache) every kernel and build the component DAG, so
        the first timed request pays for neither."""
        _warm_kernel()
        if self.n_nodes:
            self._condensation()

    def start(
        self,
        origin: int,
        destination: int,
        deadline_ms: float | None = None,
        budget_expansions: int | None = None,
        steps: int = 20,
        started_at: float | None = None,
        cancel: _Event | None = None,
        mode: str = "weighted",
        costs: CostVersion | None = None,
    ) -> Search:
        """Open a search (see the module docstring for contracts and steps).

        Parameters
        ----------
        origin, destination : int
            Node indices (``NodeNotFound`` when outside ``0..n_nodes-1``).
        deadline_ms : float, optional
            Wall-clock contract, counted from ``started_at``; ``0 < deadline_ms <= 86_400_000``.
        budget_expansions : int, optional
            Expansion contract, ``1 <= budget_expansions <= 10**12``. At most one of the two.
        steps : int
            Decision steps the contract is cut into, ``1..10000``.
        started_at : float, optional
            ``time.perf_counter()`` when the request arrived; defaults to now.
        cancel : threading.Event-like, optional
            Checked between kernel chunks; when set the search ends with status ``cancelled``.
        mode : {"weighted", "ana"}
            Open-list order: ``g + w*h`` (Anytime Weighted A*) or the ANA* key.
        costs : planner.traffic.CostVersion, optional
            Live edge costs to search on instead of the graph's base costs (the search keeps
            this version from start to end; bounds stay proven, see ``planner/traffic.py``).
        """
        t_arrival = time.perf_counter() if started_at is None else float(started_at)
        g = self.graph
        origin = g.check_node(origin)
        destination = g.check_node(destination)
        deadline_ms, budget_expansions, steps = validate_contract(
            deadline_ms, budget_expansions, steps
        )
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
            costs=costs,
        )


_WARM_LOCK = threading.Lock()
_WARMED = False


def _warm_kernel() -> None:
    global _WARMED
    with _WARM_LOCK:
        if _WARMED:
            return
        lat = np.array([0.0, 0.0, 0.001])
        lon = np.array([0.0, 0.001, 0.001])
        graph = RoadGraph(
            indptr=np.array([0, 1, 2, 2], dtype=np.int64),
            head=np.array([1, 2], dtype=np.int32),
            travel_time_s=np.array([10.0, 10.0]),
            length_m=np.array([112.0, 112.0]),
            speed_kph=np.array([50.0, 50.0], dtype=np.float32),
            road_class=np.zeros(2, dtype=np.int8),
            speed_source=np.zeros(2, dtype=np.int8),
            lat=lat,
            lon=lon,
            osm_id=np.arange(3, dtype=np.int64),
            component=np.array([0, 1, 2], dtype=np.int32),
            geom_indptr=np.zeros(3, dtype=np.int64),
            geom_lat=np.zeros(0),
            geom_lon=np.zeros(0),
        )
        tiny = Planner(graph)
        plan(tiny, 0, 2, budget_expansions=10, steps=2, controller="decreasing")
        plan(tiny, 0, 2, budget_expansions=10, steps=2, controller="ana")
        plan(tiny, 2, 0, budget_expansions=10, steps=2)  # no route: component DAG walk
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
                f"deadline_ms must be > 0 and <= {MAX_DEADLINE_MS:.0f} (one day), got {deadline_ms!r}"
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
        origin: int,
        destination: int,
        *,
        deadline_ms: float | None,
        budget_expansions: int | None,
        steps: int,
        started_at: float,
        cancel: _Event | None,
        mode: str,
        costs: CostVersion | None = None,
    ) -> None:
        self.planner = planner
        # Live costs: this search's cost array and landmark tables (a reference to one
        # immutable version, held from start to end).
        self.costs = costs
        cost_arr, lm_from, lm_to = planner._cost, planner._lm_from, planner._lm_to
        gc_scale, lm_slack = planner._gc_scale, planner._lm_slack
        if costs is not None:
            cost_arr = costs.travel_time_s
            gc_scale = (1.0 - 1e-9) / float(costs.max_speed_mps)
            if costs.landmarks is not None:
                lm_from, lm_to = costs.landmarks.lm_from, costs.landmarks.lm_to
                lm_slack = float(costs.landmarks.slack_s)
            lm_slack += float(costs.landmark_slack_extra_s)
        self._arrays = (cost_arr, lm_from, lm_to)
        self.origin = origin
        self.destination = destination
        self.deadline_ms = deadline_ms
        self.budget_expansions = budget_expansions
        self.steps_total = steps
        self.started_at = started_at
        self.cancel = cancel
        self.mode = mode
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

        self.improvements: list[Improvement] = []
        self.weights: list[WeightStep] = []
        self.steps_done = 0
        self.weight = float("nan")
        self._status: str | None = None
        self._route: np.ndarray | None = None
        self._route_edges: np.ndarray | None = None
        self._cost: float | None = None
        self._bound = 0.0
        self._h_start = 0.0
        self._expansions = 0
        self._last_improvement_step = -1
        self._last_improvement_expansions = 0
        self._cpu_share = 1.0
        self._final_stats: SearchStats | None = None
        self._ws: _Workspace | None = None
        self._finished_at: float | None = None

        comp = planner._component
        if origin == destination:
            self._route = np.array([origin], dtype=np.int64)
            self._route_edges = np.zeros(0, dtype=np.int64)
            self._cost = 0.0
            self._finish("optimal")
            return
        if costs is not None and costs.component is not None:
            unreachable = not costs.may_reach(origin, destination)
        else:
            unreachable = comp[origin] != comp[destination] and not _reachable_by_labels(
                planner, origin, destination
            )
        if unreachable:
            self._finish("no_route")
            return
        ws = planner._acquire()
        self._ws = ws
        # Return the workspace to the pool if the search is dropped before it ends.
        self._finalizer = weakref.finalize(self, planner._release, ws)
        ist, fst = ws.istate, ws.fstate
        ist[:] = 0
        fst[:] = 0.0
        ist[K.I_GEN] = ws.next_generation()
        ist[K.I_ORIGIN] = origin
        ist[K.I_TARGET] = destination
        ist[K.I_MODE] = _MODE_CODE[mode]
        fst[K.F_WEIGHT] = 1.0
        fst[K.F_GC_SCALE] = gc_scale
        fst[K.F_GC_MARGIN] = planner._gc_margin
        fst[K.F_LM_SLACK] = lm_slack
        self._h_start = float(
            K.start_query(
                planner._coords,
                lm_from,
                lm_to,
                ws.nodei,
                ws.nodef,
                ws.heap,
                ist,
                fst,
            )
        )
        self._bound = self._h_start if math.isfinite(self._h_start) else 0.0
        self._rate = ws.rate_hint
        if ist[K.I_SIZE] == 0:  # landmarks prove the destination unreachable
            self._finish("no_route")

    # -- public API --
    @property
    def done(self) -> bool:
        return self._status is not None

    @property
    def status(self) -> str | None:
        return self._status

    def elapsed_ms(self) -> float:
        end = self._finished_at if self._finished_at is not None else time.perf_counter()
        return (end - self.started_at) * 1000.0

    def run_step(self, weight: float) -> None:
        """Run one decision step with ``weight`` (>= 1; ignored by the key in ``ana`` mode).

        Returns when the step's share of the contract is spent, the optimum is proven or the
        search is cancelled. Calling it on a finished search does nothing.
        """
        if self.done:
            return
        w = float(weight)
        if not (math.isfinite(w) and w >= 1.0):
            raise InvalidRequest(f"weight must be a finite number >= 1, got {weight!r}")
        ws = self._ws
        assert ws is not None
        k = self.steps_done
        wall0 = time.perf_counter()
        # CPU share only matters against the wall clock; under budgets it is 1 by definition
        timed = self._deadline_at is not None
        cpu0 = time.thread_time() if timed else 0.0
        self.weight = w
        ws.fstate[K.F_WEIGHT] = w
        self.weights.append(
            WeightStep(
                step=k,
                elapsed_ms=(wall0 - self.started_at) * 1000.0,
                expansions=int(ws.istate[K.I_EXPANSIONS]),
                weight=w,
            )
        )
        if self._budget is not None:
            self._run_budget_step(ws, k)
        else:
            self._run_deadline_step(ws, k)
        wall1 = time.perf_counter()
        if timed and wall1 > wall0:
            self._cpu_share = min(1.0, (time.thread_time() - cpu0) / (wall1 - wall0))
        self.steps_done = k + 1
        out_of_time = self._deadline_at is not None and wall1 >= self._deadline_at
        if not self.done and (self.steps_done >= self.steps_total or out_of_time):
            self._finish("contract_spent")

    def stats(self) -> SearchStats:
        """Snapshot for features and controllers (the final snapshot once done)."""
        if self._final_stats is not None:
            return self._final_stats
        return self._snapshot()

    def result(self) -> PlanResult:
        """The answer so far (final once :attr:`done`)."""
        status = self._status if self._status is not None else "contract_spent"
        cost = self._cost
        # before any route the bound (min f over open) is still a valid, useful number
        bound: float | None = self._bound if cost is None else min(self._bound, cost)
        if status == "no_route":
            bound = None
        elif status == "optimal" and cost is not None:
            bound = cost
        return PlanResult(
            status=status,
            origin=self.origin,
            destination=self.destination,
            route=self._route,
            route_edges=self._route_edges,
            cost_s=cost,
            lower_bound_s=bound,
            gap=None if cost is None or bound is None else _gap(cost, bound),
            improvements=list(self.improvements),
            weights=list(self.weights),
            expansions=self._expansions_now(),
            elapsed_ms=self.elapsed_ms(),
            controller=self.controller_name,
            steps=self.steps_total,
            mode=self.mode,
            deadline_ms=self.deadline_ms,
            budget_expansions=self.budget_expansions,
            h_start_s=self._h_start,
            nodes_touched=self._final_stats.nodes_touched if self._final_stats else 0,
        )

    def close(self) -> None:
        """End the search now (status ``cancelled`` if it was still running)."""
        if not self.done:
            self._finish("cancelled")

    # -- internals --
    def _expansions_now(self) -> int:
        if self._ws is not None:
            return int(self._ws.istate[K.I_EXPANSIONS])
        return self._expansions

    def _cancelled(self) -> bool:
        return self.cancel is not None and self.cancel.is_set()

    def _run_budget_step(self, ws: _Workspace, k: int) -> None:
        assert self._budget is not None
        target = self._budget * (k + 1) // self.steps_total
        ist = ws.istate
        while not self.done:
            if self._cancelled():
                self._finish("cancelled")
                return
            left = target - int(ist[K.I_EXPANSIONS])
            if left <= 0:
                return
            ist[K.I_CHUNK] = min(left, BUDGET_CHUNK_EXPANSIONS)
            self._handle(self.planner._chunk(ws, *self._arrays))

    def _run_deadline_step(self, ws: _Workspace, k: int) -> None:
        assert self._deadline_at is not None
        now = time.perf_counter()
        steps_left = self.steps_total - k
        step_end = now + max(0.0, self._deadline_at - now) / steps_left
        if steps_left == 1:
            step_end = self._deadline_at
        ist = ws.istate
        while not self.done:
            now = time.perf_counter()
            left = step_end - now
            if left <= STOP_MARGIN_S:
                return
            if self._cancelled():
                self._finish("cancelled")
                return
            rate = self._rate
            if rate is None:
                chunk = FIRST_CHUNK_EXPANSIONS
            else:
                chunk = int(rate * min(0.5 * left, MAX_CHUNK_S))
                if chunk < 1:
                    if rate * (left - STOP_MARGIN_S) < 1.0:
                        return
                    chunk = 1
            before = int(ist[K.I_EXPANSIONS])
            ist[K.I_CHUNK] = chunk
            status = self.planner._chunk(ws, *self._arrays)
            t1 = time.perf_counter()
            made = int(ist[K.I_EXPANSIONS]) - before
            # rate from full chunks only (an early return says little about the rate)
            if status == K.CHUNK_DONE and made > 0 and t1 > now:
                r = made / (t1 - now)
                self._rate = r if self._rate is None else RATE_EMA * r + (1 - RATE_EMA) * self._rate
            self._handle(status)

    def _handle(self, status: int) -> None:
        if status == K.IMPROVED:
            self._on_improved()
        elif status == K.PROVEN:
            ws = self._ws
            assert ws is not None
            if math.isfinite(ws.fstate[K.F_INCUMBENT]) and self._cost is not None:
                self._finish("optimal")
            else:
                self._finish("no_route")

    def _on_improved(self) -> None:
        ws = self._ws
        assert ws is not None
        planner = self.planner
        nodes, edges = K.extract_route(ws.nodei, self.origin, self.destination, planner.n_nodes)
        if nodes.shape[0] == 0:  # cannot happen: parent pointers always lead back
            raise RuntimeError("internal error: route extraction failed")
        cost = float(np.sum(self._arrays[0][edges]))
        kernel_cost = float(ws.fstate[K.F_INCUMBENT])
        if cost < kernel_cost:
            ws.fstate[K.F_INCUMBENT] = cost  # prune with the real route cost
        self._route, self._route_edges, self._cost = nodes, edges, cost
        self._update_bound(ws)
        expansions = int(ws.istate[K.I_EXPANSIONS])
        bound = min(self._bound, cost)
        imp = Improvement(
            elapsed_ms=(time.perf_counter() - self.started_at) * 1000.0,
            expansions=expansions,
            cost_s=cost,
            lower_bound_s=bound,
            gap=_gap(cost, bound),
            weight=self.weight,
        )
        self.improvements.append(imp)
        self._last_improvement_step = self.steps_done
        self._last_improvement_expansions = expansions
        if self.on_improvement is not None:
            self.on_improvement(imp)

    def _update_bound(self, ws: _Workspace) -> None:
        inc = float(ws.fstate[K.F_INCUMBENT])
        if self._cost is not None:
            inc = min(inc, self._cost)
        min_f = K.open_min_f(ws.heap, ws.istate)
        b = min(inc, min_f)
        if math.isfinite(b) and b > self._bound:
            self._bound = b

    def _snapshot(self) -> SearchStats:
        ws = self._ws
        elapsed_ms = self.elapsed_ms()
        if ws is not None:
            ist, fst = ws.istate, ws.fstate
            size = int(ist[K.I_SIZE])
            self._update_bound(ws)
            expansions = int(ist[K.I_EXPANSIONS])
            min_f = K.open_min_f(ws.heap, ws.istate)
            mean_g = float(fst[K.F_SUM_G]) / size if size else 0.0
            mean_h = float(fst[K.F_SUM_H]) / size if size else 0.0
            touched, reopened = int(ist[K.I_TOUCHED]), int(ist[K.I_REOPENED])
        else:
            size, expansions, min_f, mean_g, mean_h = 0, self._expansions, math.inf, 0.0, 0.0
            touched, reopened = 0, 0
        if self._budget is not None:
            spare = max(0, self._budget - expansions)
            frac = spare / self._budget
            left: int | None = spare
            if self.deadline_ms is None and self.budget_expansions is None:
                left = None  # the safety cap is not a contract
        else:
            assert self.deadline_ms is not None
            left = None
            frac = max(0.0, 1.0 - elapsed_ms / self.deadline_ms)
        cost = self._cost
        bound = self._bound if cost is None else min(self._bound, cost)
        if self._status == "optimal" and cost is not None:
            bound = cost
        steps_since = (
            self.steps_done - self._last_improvement_step
            if self._last_improvement_step >= 0
            else self.steps_done
        )
        return SearchStats(
            incumbent_cost_s=cost,
            lower_bound_s=bound,
            open_size=size,
            open_mean_g_s=mean_g,
            open_mean_h_s=mean_h,
            open_min_f_s=min_f,
            h_start_s=self._h_start,
            expansions=expansions,
            expansions_left=left,
            contract_fraction_left=frac,
            elapsed_ms=elapsed_ms,
            weight=self.weight if math.isfinite(self.weight) else 1.0,
            mode=self.mode,
            improvements=len(self.improvements),
            steps_done=self.steps_done,
            steps_total=self.steps_total,
            steps_since_improvement=steps_since,
            expansions_since_improvement=expansions - self._last_improvement_expansions,
            cpu_share_last_step=self._cpu_share,
            nodes_touched=touched,
            reopened=reopened,
            done=self.done,
        )

    def _finish(self, status: str) -> None:
        self._finished_at = time.perf_counter()
        ws = self._ws
        if ws is not None:
            self._update_bound(ws)
            if status == "optimal" and self._cost is not None:
                self._bound = self._cost
            self._expansions = int(ws.istate[K.I_EXPANSIONS])
            if self._rate is not None:
                ws.rate_hint = self._rate
        self._status = status
        self._final_stats = self._snapshot()
        if ws is not None:
            self._ws = None
            self._finalizer.detach()
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
    origin: int,
    destination: int,
    *,
    deadline_ms: float | None = None,
    budget_expansions: int | None = None,
    controller: str | Controller = "decreasing",
    steps: int = 20,
    on_improvement: Callable[[Improvement], None] | None = None,
    cancel: _Event | None = None,
    seed: int | None = None,
    started_at: float | None = None,
    costs: CostVersion | None = None,
) -> PlanResult:
    """Best route from ``origin`` to ``destination`` within the contract.

    Parameters
    ----------
    graph_or_planner : RoadGraph or Planner
    origin, destination : int
        Node indices.
    deadline_ms, budget_expansions : optional
        The contract (at most one; see the module docstring when neither is given).
    controller : str or Controller
        A spec for :func:`planner.controllers.make_controller` (``"fixed:2"``, ``"random"``,
        ``"decreasing"``, ``"ana"``) or an object following the ``Controller`` protocol.
    steps : int
        Decision steps (the controller is asked for a weight before each).
    on_improvement : callable, optional
        Called with every :class:`Improvement`, in the search thread.
    cancel : threading.Event-like, optional
    seed : int, optional
        Seed for randomised controllers.
    started_at : float, optional
        ``time.perf_counter()`` at request arrival (the deadline counts from it).
    costs : planner.traffic.CostVersion, optional
        Live edge costs (see :meth:`Planner.start`).
    """
    from dueroute.planner.controllers import make_controller
    from dueroute.planner.features import compute_features

    t0 = time.perf_counter() if started_at is None else started_at
    ctrl = make_controller(controller, seed=seed) if isinstance(controller, str) else controller
    planner = planner_for(graph_or_planner)
    search = planner.start(
        origin,
        destination,
        deadline_ms=deadline_ms,
        budget_expansions=budget_expansions,
        steps=steps,
        started_at=t0,
        cancel=cancel,
        mode=ctrl.mode,
        costs=costs,
    )
    search.controller_name = ctrl.name
    search.on_improvement = on_improvement
    weight = _check_weight(ctrl.reset(seed), ctrl.name)
    while not search.done:
        search.run_step(weight)
        if search.done:
            break
        stats = search.stats()
        weight = _check_weight(ctrl.decide(compute_features(stats), stats), ctrl.name)
    return search.result()


def _check_weight(w: Any, name: str) -> float:
    try:
        x = float(w)
    except (TypeError, ValueError):
        raise InvalidRequest(f"controller {name!r} returned a non-number weight {w!r}") from None
    if not (math.isfinite(x) and x >= 1.0):
        raise InvalidRequest(f"controller {name!r} returned weight {w!r}; weights must be >= 1")
    return x


__all__ = [
    "Improvement",
    "NodeNotFound",
    "PlanResult",
    "Planner",
    "Search",
    "SearchStats",
    "WeightStep",
    "plan",
    "planner_for",
    "validate_contract",
]
