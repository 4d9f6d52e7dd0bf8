"""Planning jobs: one search per plan, answered in place (wait), in the background, or streamed.

A :class:`PlanJob` is written by exactly one worker thread (improvements, then the final plan)
and read by the event loop. The improvement trace is a bounded ring guarded by a small lock
(the worker appends, readers copy); the final plan is published once, as a dict for a waiting
request and as its JSON bytes for everything else, after which the job never changes.
Event-loop waiters are woken with ``loop.call_soon_threadsafe``.

Answers list the last ``listed`` improvements and count the ones dropped before them
(``improvements_dropped``); ``full_trace=true`` lists up to :data:`FULL_TRACE_MAX`. A job that
fails in any way (the search, the route geometry, the JSON) ends with status ``error`` and an
``error`` text, never half-finished: :meth:`PlanningEngine.run` never raises.

Where plans are kept between requests is :mod:`service.server.plan_store`.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import json
import logging
import math
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson

from dueroute.planner.results import Improvement, ImprovementLog, snapped_point_dict
from dueroute.planner.session import plan
from dueroute.service.server.admission import Ticket

log = logging.getLogger("dueroute.service.jobs")


#: Improvements a stored plan holds for its event stream while it runs; a reader that falls
#: further behind than this skips the oldest (the event ids show the gap).
STREAM_BUFFER = 256

#: The most improvements an answer lists with ``full_trace=true`` (the oldest beyond it are
#: dropped and counted, so even a full trace is bounded: about 1.3 MB of JSON).
FULL_TRACE_MAX = 10_000

#: The deadline a plan without search time runs with: it is past when the search opens, so the
#: search answers with its instant route.
INSTANT_DEADLINE_MS = 1e-3

#: Byte estimates for the plan store's memory bound (measured with ``tracemalloc`` on
#: CPython 3.11: one held improvement with its route summary is ~700 bytes of Python objects).
IMPROVEMENT_BYTES = 700
#: The job object, its ticket, ids, timings and locks.
PLAN_OVERHEAD_BYTES = 4_096
#: What a running plan's route is assumed to hold until it finishes and its size is known
#: (a 2,000-edge route as node and edge arrays plus its geometry as JSON).
ROUTE_RESERVE_BYTES = 64 * 1024


# ------------------------------------------------------------------------------------------
# Route geometry

#: Decimal places of route coordinates: 1e-7 degrees is about 1 cm. RFC 7946 (section 11.2)
#: notes that 6 places (about 10 cm) suffice and that extra precision only costs size; fewer
#: digits also make the answer's JSON about twice as fast to write.
COORD_DECIMALS = 7


def route_feature(
    graph: Any,
    nodes: Any,
    edges: Any,
    costs: Any = None,
    start: Any = None,
    end: Any = None,
) -> dict[str, Any] | None:
    """GeoJSON Feature (RFC 7946) for a route given as node and edge indices.

    The LineString is the concatenation of ``graph.edge_coords(e)`` for every edge, with the
    shared point between consecutive edges written once; computed with array indexing so a
    long route costs microseconds, not one Python call per edge. A route from or to a point on
    a road starts or ends with part of an edge (``start`` / ``end``).

    Parameters
    ----------
    nodes : int[k + 1]
        Node indices along the full edges of the route (empty: a route within one edge).
    edges : int[k]
        Edge indices along the route (``edges[i]`` leads from ``nodes[i]`` to ``nodes[i+1]``).
    costs : planner.traffic.CostVersion, optional
        The live costs the route was searched on (its ``travel_time_s``); default the graph's.
    start, end : planner.endpoints.PartialEdge, optional
        The part of an edge driven from the snapped origin, and up to the snapped destination
        (for a route within one edge, ``start`` alone).
    """
    n_nodes = 0 if nodes is None else len(nodes)
    if n_nodes == 0 and start is None:
        return None
    times = graph.travel_time_s if costs is None else costs.travel_time_s
    nodes_a = np.asarray(nodes if n_nodes else [], dtype=np.int64)
    edges_a = np.asarray(edges if edges is not None else [], dtype=np.int64)
    coords = _full_edge_coords(graph, nodes_a, edges_a) if n_nodes else []
    if start is not None:
        head = [list(p) for p in start.coords]
        coords = head + coords[1:] if coords else head
    if end is not None:
        coords = coords + [list(p) for p in end.coords[1:]]
    if len(coords) == 1:  # origin == destination: a single point, written twice
        coords = coords * 2
    travel = float(np.asarray(times)[edges_a].sum()) if edges_a.size else 0.0
    length = float(np.asarray(graph.length_m)[edges_a].sum()) if edges_a.size else 0.0
    for part in (start, end):
        if part is not None:
            travel += float(part.cost_s)
            length += float(graph.length_m[part.edge]) * (part.to_fraction - part.from_fraction)
    return {
        "type": "Feature",
        "geometry": {"type": "LineString", "coordinates": coords},
        "properties": {
            "travel_time_s": travel,
            "length_m": length,
            "node_ids": np.asarray(graph.osm_id)[nodes_a].tolist(),
            "node_indices": nodes_a.tolist(),
            "start_partial": None if start is None else start.to_dict(),
            "end_partial": None if end is None else end.to_dict(),
        },
    }


def _full_edge_coords(graph: Any, nodes_a: np.ndarray, edges_a: np.ndarray) -> list[list[float]]:
    # one compiled pass (the same with numpy array operations cost about 150 us a route)
    coords: list[list[float]] = np.round(
        graph.route_coords(nodes_a, edges_a), COORD_DECIMALS
    ).tolist()
    return coords


def snapped_point(snap: Any) -> dict[str, Any] | None:
    """Where a place given as a point was snapped to (None for a place given as a node)."""
    if snap is None or isinstance(snap, int):
        return None
    return snapped_point_dict(snap)


def improvement_dict(imp: Improvement) -> dict[str, Any]:
    """The published fields of one improvement (``IMPROVEMENT_FIELDS``), JSON-safe."""
    return imp.to_dict()


def _float_or_none(v: Any) -> float | None:
    if v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


# ------------------------------------------------------------------------------------------
# Jobs


@dataclass(eq=False)
class PlanJob:
    """One plan: request, progress written by its worker thread, and the final answer.

    ``listed`` is how many of the last improvements an answer lists; ``trace_limit`` how many
    the job holds (at least ``listed``; more for a stored plan's event stream).
    """

    plan_id: str
    origin_node: int | None  #: None for a place given as a point
    destination_node: int | None
    deadline_ms: int
    controller: str
    wait: bool
    arrival_s: float
    search_deadline_s: float
    policy_sha256: str | None
    controller_spec: str = ""  # what to build; ``controller`` is the label answers carry
    gap_target: float = 0.0  # stop once the proven gap is at or below this
    #: what the search starts from and goes to: a node index or a ``planner.snap.RoadSnap``
    #: (default: the nodes)
    origin: Any = None
    destination: Any = None
    ticket: Ticket | None = None
    policy: Any = None
    future: Any = None  # concurrent.futures.Future of the worker run
    graph: Any = None
    #: the live cost version the search runs on (taken when the search starts), or None
    costs: Any = None
    kept: bool = False  # held in the plan store (background, or wait=true with keep=true)
    #: A request waits for the final plan as a dict (wait=true, until it has answered).
    waiting: bool = False
    listed: int = 20
    trace_limit: int = 20
    #: Every improvement's published fields plus a route summary, oldest first; at most
    #: ``trace_limit`` are held, ``improvement_count`` counts them all.
    trace: deque[dict[str, Any]] = field(default_factory=deque)
    improvement_count: int = 0
    #: Some improvement came from the search (not only the instant route it opened with).
    found_by_search: bool = False
    #: (int64[k + 1] node indices, int64[k] edge indices, start PartialEdge or None, end
    #: PartialEdge or None) of the incumbent route, or None
    best: tuple[Any, Any, Any, Any] | None = None
    best_cost_s: float | None = None
    best_bound_s: float = 0.0
    expansions: int = 0
    status: str = "running"
    started_s: float | None = None
    search_end_s: float | None = None
    #: The final plan as a dict, kept only while a waiting request needs it.
    final: dict[str, Any] | None = None
    #: The final plan as JSON (what GET, DELETE and the event stream send); set once.
    final_json: bytes | None = None
    finished_s: float | None = None  # time.perf_counter() when the final plan was published
    #: Called once, in the thread that publishes the final plan (the store's accounting).
    on_finish: Callable[[PlanJob], None] | None = None
    #: Called on every change (an improvement, the final plan), in the thread that made it
    #: (a shared plan store mirrors the plan from there; it must not block).
    on_change: Callable[[PlanJob], None] | None = None
    done: threading.Event = field(default_factory=threading.Event)
    _subscribers: list[tuple[asyncio.AbstractEventLoop, asyncio.Event]] = field(
        default_factory=list
    )
    _sub_lock: threading.Lock = field(default_factory=threading.Lock)
    #: Guards ``trace``, ``improvement_count`` and the publication of the final plan.
    lock: threading.Lock = field(default_factory=threading.Lock)
    _claimed: bool = False

    def __post_init__(self) -> None:
        self.trace_limit = max(self.trace_limit, self.listed)
        self.trace = deque(self.trace, maxlen=self.trace_limit)

    @property
    def finished(self) -> bool:
        return self.final_json is not None

    def claim(self) -> bool:
        """Take the right to run this plan's search (once: its thread, or the handler that
        found it never started by its deadline)."""
        with self.lock:
            if self._claimed:
                return False
            self._claimed = True
            return True

    # -- written by the worker thread ----------------------------------------------------
    def add_improvement(self, entry: dict[str, Any]) -> None:
        with self.lock:
            self.trace.append(entry)
            self.improvement_count += 1
            if entry.get("source") == "search":
                self.found_by_search = True

    def trace_since(self, after: int) -> tuple[int, list[dict[str, Any]], bool]:
        """``(first, entries, finished)``: held improvements with ordinal > ``after``.

        ``first`` is the ordinal of ``entries[0]`` (above ``after + 1`` when older ones were
        dropped); ``finished`` says the final plan was published before the copy, so no
        improvement can follow these.
        """
        with self.lock:
            held_from = self.improvement_count - len(self.trace)
            first = max(after + 1, held_from)
            entries = list(itertools.islice(self.trace, first - held_from, None))
            return first, entries, self.final_json is not None

    # -- notifications (worker thread -> event loop) --------------------------------------
    def subscribe(self) -> asyncio.Event:
        ev = asyncio.Event()
        with self._sub_lock:
            self._subscribers.append((asyncio.get_running_loop(), ev))
        return ev

    def unsubscribe(self, ev: asyncio.Event) -> None:
        with self._sub_lock:
            self._subscribers = [(lp, e) for lp, e in self._subscribers if e is not ev]

    def notify(self) -> None:
        if self.on_change is not None:
            self.on_change(self)
        with self._sub_lock:
            subs = list(self._subscribers)
        for loop, ev in subs:
            with contextlib.suppress(RuntimeError):  # loop closed
                loop.call_soon_threadsafe(ev.set)

    # -- views -----------------------------------------------------------------------------
    def interim_status(self) -> str:
        """The status of the best route so far, for an answer given before the search ended."""
        if self.best is None:
            return "not_found"
        return "improved" if self.found_by_search else "instant"

    def points(self) -> dict[str, Any]:
        """``origin_point`` / ``destination_point``: where places given as points snapped."""
        return {
            "origin_point": snapped_point(self.origin),
            "destination_point": snapped_point(self.destination),
        }

    def best_route(self) -> dict[str, Any] | None:
        best = self.best
        if best is None or self.graph is None:
            return None
        return route_feature(self.graph, best[0], best[1], self.costs, best[2], best[3])

    def timings(self, now_s: float | None = None) -> dict[str, float]:
        now = time.perf_counter() if now_s is None else now_s
        start = self.started_s if self.started_s is not None else now
        end = self.search_end_s if self.search_end_s is not None else now
        return {
            "queue_ms": (start - self.arrival_s) * 1000.0,
            "search_ms": max(0.0, end - start) * 1000.0 if self.started_s is not None else 0.0,
            "total_ms": (now - self.arrival_s) * 1000.0,
        }

    def listed_improvements(self) -> tuple[list[dict[str, Any]], int]:
        """The last ``listed`` improvements (published fields) and how many came before them."""
        with self.lock:
            entries = list(self.trace)[-self.listed :] if self.listed else []
            count = self.improvement_count
        return [_published(e) for e in entries], count - len(entries)

    def release_final(self) -> None:
        """The waiting request has answered: keep only the JSON from now on."""
        with self.lock:
            self.waiting = False
            self.final = None

    def current(self) -> dict[str, Any]:
        """The plan as it stands: the final plan once finished, else the current best."""
        if self.final is not None:
            return self.final
        if self.final_json is not None:
            return dict(json.loads(self.final_json))
        cost = self.best_cost_s
        bound = self.best_bound_s
        improvements, dropped = self.listed_improvements()
        status, error = "running", None
        try:
            route = self.best_route()
        except Exception as exc:  # say so: never a running plan that silently lost its route
            log.exception("building the current route failed", extra={"plan_id": self.plan_id})
            status, route = "error", None
            error = f"building the answer failed: {type(exc).__name__}: {exc}"
        return {
            "plan_id": self.plan_id,
            "status": status,
            "origin_node": self.origin_node,
            "destination_node": self.destination_node,
            **self.points(),
            "route": route,
            "cost_s": cost,
            "lower_bound_s": bound,
            "gap": _gap(cost, bound),
            "improvements": improvements,
            "improvements_dropped": dropped,
            "expansions": self.expansions,
            "controller": self.controller,
            "policy_sha256": self.policy_sha256,
            "deadline_ms": self.deadline_ms,
            **traffic_fields(self.costs),
            "error": error,
            "timings": self.timings(),  # last: see with_timings
        }

    def current_json(self) -> bytes:
        """:meth:`current` as JSON (the published bytes once finished: no re-encoding)."""
        final_json = self.final_json
        if final_json is not None:
            return final_json
        return dumps(self.current())

    def estimated_bytes(self) -> int:
        """What this plan holds, for the plan store's memory bound.

        Running: the fixed parts, a full trace ring and :data:`ROUTE_RESERVE_BYTES`. Finished:
        the fixed parts, the held trace and the final plan's JSON (the dict is dropped once no
        request waits for it).
        """
        final_json = self.final_json
        if final_json is None:
            return PLAN_OVERHEAD_BYTES + self.trace_limit * IMPROVEMENT_BYTES + ROUTE_RESERVE_BYTES
        return PLAN_OVERHEAD_BYTES + len(self.trace) * IMPROVEMENT_BYTES + len(final_json)


def reserve_bytes(trace_limit: int) -> int:
    """:meth:`PlanJob.estimated_bytes` of a running plan holding up to ``trace_limit``."""
    return PLAN_OVERHEAD_BYTES + trace_limit * IMPROVEMENT_BYTES + ROUTE_RESERVE_BYTES


def traffic_fields(costs: Any) -> dict[str, Any]:
    """The cost version a plan was searched on (``None`` fields: it never searched)."""
    if costs is None:
        return {"traffic_version": None, "bound_quality": None, "bound_note": None}
    return dict(costs.answer_fields())


def _published(entry: dict[str, Any]) -> dict[str, Any]:
    """An improvement as a Plan lists it (the event stream adds a route summary)."""
    return {k: v for k, v in entry.items() if k not in ("route", "traffic_version")}


def _gap(cost: float | None, bound: float) -> float | None:
    if cost is None:
        return None
    if cost <= 0:
        return 0.0
    return max(0.0, (cost - bound) / cost)


def dumps(obj: Any) -> bytes:
    """Compact JSON (orjson: writing an answer's coordinates with the standard library took
    most of the service's time outside the search). A non-finite float is written ``null``."""
    return orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY)


_TIMINGS_KEY = b',"timings":'


def with_timings(body: bytes, timings: dict[str, float]) -> bytes:
    """A plan's JSON with its ``timings`` replaced, without encoding the rest again.

    Every plan dict ends with its ``timings`` (a flat object), so the encoded plan ends with
    ``,"timings":{...}}``; the answer's total time is known only when it is sent.
    """
    at = body.rfind(_TIMINGS_KEY)
    if at < 0 or not body.endswith(b"}}"):
        raise ValueError("not a plan's JSON: no trailing timings object")
    return body[:at] + _TIMINGS_KEY + dumps(timings) + b"}"


# ------------------------------------------------------------------------------------------
# Engine: the planner glue used by every job


class PlanningEngine:
    """Graph + planner + controllers; runs one job on a worker thread.

    Parameters
    ----------
    graph : planner.graph.RoadGraph
    planner : planner.session.Planner
    steps : int
        Decision steps per search.
    """

    def __init__(self, graph: Any, planner: Any, steps: int) -> None:
        self.graph = graph
        self.planner = planner
        self.steps = steps
        #: live traffic (``service.server.traffic_store.LiveTraffic``); None: base costs only
        self.traffic: Any = None

    def make_controller(self, spec: str, policy: Any) -> Any:
        """A fresh controller for one search (``learned`` without a policy: the fallback)."""
        from dueroute.planner.controllers import make_controller
        from dueroute.service.server.policy_store import FALLBACK_CONTROLLER

        if spec == "learned":
            if policy is None:
                return make_controller(FALLBACK_CONTROLLER)
            from dueroute.policies.runtime import resolve_controller

            return resolve_controller("learned", policy=policy)
        return make_controller(spec)

    def run(self, job: PlanJob, ticket: Ticket) -> dict[str, Any]:
        """Search until the job's search deadline, the optimum, or cancellation; publish it.

        Runs on a worker thread, through :func:`dueroute.planner.session.plan` (the one search
        loop); each improvement records its route for the current-best view. Never raises:
        any failure (search, route geometry, JSON) is logged and the job ends with status
        ``error`` and an ``error`` text saying what failed, so no caller or stream waits
        forever and the worker is free for the next plan.
        """
        if not job.claim():  # the handler ran it already (it never got a thread in time)
            return job.current()
        return self.run_claimed(job, ticket)

    def run_claimed(self, job: PlanJob, ticket: Ticket) -> dict[str, Any]:
        """:meth:`run` for a plan already claimed by the caller."""
        try:
            job.started_s = (
                ticket.started_s if ticket.started_s is not None else time.perf_counter()
            )
            result = None
            if ticket.cancel.is_set():
                status = "cancelled"
            else:
                # a search whose deadline the queue already ate still answers with the
                # instant route (the session opens the query before it looks at the clock).
                # The newest cost version when the search starts; kept to the end (a new
                # version is a new snapshot, so publishing one never pauses this search).
                if self.traffic is not None:
                    job.costs = self.traffic.current
                origin = job.origin if job.origin is not None else job.origin_node
                destination = (
                    job.destination if job.destination is not None else job.destination_node
                )
                assert origin is not None and destination is not None
                # Deadline counted from arrival. An instant-lane plan stops at its first route
                # (its ticket says "stop" once one is found): the instant route at once, else
                # the greedy search's first route, by the deadline at the latest.
                deadline_ms = max(
                    INSTANT_DEADLINE_MS, (job.search_deadline_s - job.arrival_s) * 1000.0
                )
                result = plan(
                    self.planner,
                    origin,
                    destination,
                    deadline_ms=deadline_ms,
                    controller=self.make_controller(
                        job.controller_spec or job.controller, job.policy
                    ),
                    steps=self.steps,
                    on_improvement=lambda imp: self._record(job, imp),
                    cancel=ticket,  # also where the scheduler preempts the search
                    started_at=job.arrival_s,
                    gap_target=job.gap_target,
                    costs=job.costs,
                    # a stored plan shows every improvement as it comes (GET, the event
                    # stream); a waited one answers once, so its search never stops for them
                    every_improvement=job.kept or ticket.instant_only,
                )
                status = str(result.status)
                if ticket.instant_only and status == "cancelled" and not ticket.cancel.is_set():
                    status = job.interim_status()  # stopped at its first route, as asked
        except Exception as exc:
            log.exception("search failed", extra={"plan_id": job.plan_id})
            self._end_search(ticket)
            return self.fail(job, f"the search failed: {type(exc).__name__}: {exc}")
        self._end_search(ticket)
        return self.finish(job, status, result)

    @staticmethod
    def _end_search(ticket: Ticket) -> None:
        """Give the CPU slot back before building the answer (next search starts now)."""
        scheduler = ticket._scheduler
        if scheduler is not None:
            scheduler.end_search(ticket)

    def _record(self, job: PlanJob, imp: Improvement) -> None:
        """Called in the search thread on every improvement (counts against the deadline)."""
        entry = improvement_dict(imp)
        nodes, edges = imp.route_nodes, imp.route_edges
        start, end = imp.route_start, imp.route_end
        if edges is not None and nodes is not None:
            length = float(np.sum(self.graph.length_m[edges]))
            for part in (start, end):
                if part is not None:
                    length += float(self.graph.length_m[part.edge]) * (
                        part.to_fraction - part.from_fraction
                    )
            entry["route"] = {
                "travel_time_s": entry["cost_s"],
                "length_m": length,
                "node_count": int(len(nodes)),
            }
        if job.costs is not None:
            entry["traffic_version"] = job.costs.version  # the event stream names it too
        job.best = (nodes, edges, start, end)  # one assignment: readers see all or none
        job.best_cost_s = entry["cost_s"]
        job.best_bound_s = entry["lower_bound_s"] or 0.0
        job.expansions = entry["expansions"]
        job.add_improvement(entry)
        if job.ticket is not None and nodes is not None:
            job.ticket.route_found = True
            if job.ticket.instant_only:
                job.ticket.poke()  # it stops at its first route: now
        job.notify()

    def finish(self, job: PlanJob, status: str, result: Any) -> dict[str, Any]:
        """Build and publish the final plan; a failure while building it ends in ``error``."""
        if job.finished:
            return job.current()
        job.search_end_s = time.perf_counter()
        try:
            final = self._final(job, status, result)
            body = dumps(final)
        except Exception as exc:
            log.exception("building the final plan failed", extra={"plan_id": job.plan_id})
            return self.fail(job, f"building the answer failed: {type(exc).__name__}: {exc}")
        return self._publish(job, final, body)

    def fail(self, job: PlanJob, error: str) -> dict[str, Any]:
        """Publish a final plan with status ``error`` (touches neither graph nor route)."""
        if job.finished:
            return job.current()
        if job.search_end_s is None:
            job.search_end_s = time.perf_counter()
        improvements, dropped = job.listed_improvements()
        final = {
            "plan_id": job.plan_id,
            "status": "error",
            "origin_node": job.origin_node,
            "destination_node": job.destination_node,
            **job.points(),
            "route": None,
            "cost_s": None,
            "lower_bound_s": _float_or_none(job.best_bound_s) or 0.0,
            "gap": None,
            "improvements": [
                {k: _float_or_none(v) if k != "expansions" else v for k, v in i.items()}
                for i in improvements
            ],
            "improvements_dropped": dropped,
            "expansions": int(job.expansions),
            "controller": job.controller,
            "policy_sha256": job.policy_sha256,
            "deadline_ms": job.deadline_ms,
            **traffic_fields(job.costs),
            "error": error,
            "timings": job.timings(),  # last: see with_timings
        }
        try:
            body = dumps(final)
        except (TypeError, ValueError):  # something unwritable in the improvements: list none
            final["improvements"] = []
            final["improvements_dropped"] = job.improvement_count
            body = dumps(final)
        return self._publish(job, final, body)

    def _publish(self, job: PlanJob, final: dict[str, Any], body: bytes) -> dict[str, Any]:
        with job.lock:
            if job.final_json is not None:  # published already (never twice)
                return job.current()
            # A finished plan's stream replays what its answer lists: trim the ring to that.
            while len(job.trace) > job.listed:
                job.trace.popleft()
            job.final = final if job.waiting else None  # only a waiting request needs the dict
            job.final_json = body
            job.status = final["status"]
            job.finished_s = time.perf_counter()
            job.best = None  # the route is in the JSON now
        if job.on_finish is not None:  # accounted before anyone is told it finished
            try:
                job.on_finish(job)
            except Exception:  # the store's bookkeeping must not undo a published answer
                log.exception("plan store bookkeeping failed", extra={"plan_id": job.plan_id})
        job.done.set()
        job.notify()
        return final

    def _final(self, job: PlanJob, status: str, result: Any) -> dict[str, Any]:
        limit = job.listed
        if result is not None:
            feature = route_feature(
                self.graph,
                result.route,
                result.route_edges,
                job.costs,
                result.route_start,
                result.route_end,
            )
            cost = _float_or_none(result.cost_s)
            bound = _float_or_none(result.lower_bound_s)
            if bound is None:
                bound = job.best_bound_s
            gap = _float_or_none(result.gap)
            found = result.improvements
            if not limit:
                improvements = []
            elif isinstance(found, ImprovementLog):
                improvements = found.published(limit)
            else:
                improvements = [improvement_dict(i) for i in list(found[-limit:])]
            dropped = len(found) - len(improvements)
            expansions = int(result.expansions)
        else:
            feature = job.best_route()
            cost = job.best_cost_s
            bound = job.best_bound_s
            gap = _gap(cost, bound)
            improvements, dropped = job.listed_improvements()
            expansions = job.expansions
        if feature is None and status not in ("cancelled", "no_route", "not_found"):
            status = "not_found"
        return {
            "plan_id": job.plan_id,
            "status": status,
            "origin_node": job.origin_node,
            "destination_node": job.destination_node,
            **job.points(),
            "route": feature,
            "cost_s": cost if feature is not None else None,
            "lower_bound_s": bound,
            "gap": gap if feature is not None else None,
            "improvements": improvements,
            "improvements_dropped": dropped,
            "expansions": expansions,
            "controller": job.controller,
            "policy_sha256": job.policy_sha256,
            "deadline_ms": job.deadline_ms,
            **traffic_fields(job.costs),
            "error": None,
            "timings": job.timings(),  # last: see with_timings
        }
