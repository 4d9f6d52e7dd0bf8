"""Planning jobs: one search per plan, answered in place (wait), in the background, or streamed.

A :class:`PlanJob` is written by exactly one worker thread (improvements, then the final plan)
and read by the event loop. Readers never lock: ``improvements`` only grows (list appends are
atomic under the GIL) and ``final`` is assigned once, after which the job never changes.
Event-loop waiters are woken with ``loop.call_soon_threadsafe``.

The :class:`PlanStore` keeps plans for ``GET``/``DELETE``/event streams: at most
``background_max`` at once, each finished plan forgotten ``background_ttl_s`` after it
finished; when full, the oldest finished plan makes room, and when every slot holds a running
plan a new background plan is refused (:class:`StoreFull`).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import secrets
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from dueroute.planner.results import Improvement
from dueroute.planner.session import plan
from dueroute.service.server.admission import Ticket

log = logging.getLogger("dueroute.service.jobs")


def new_plan_id() -> str:
    return secrets.token_urlsafe(12)


# ------------------------------------------------------------------------------------------
# Route geometry


def route_feature(graph: Any, nodes: Any, edges: Any, costs: Any = None) -> dict[str, Any] | None:
    """GeoJSON Feature (RFC 7946) for a route given as node and edge indices.

    The LineString is the concatenation of ``graph.edge_coords(e)`` for every edge, with the
    shared point between consecutive edges written once; computed with array indexing so a
    long route costs microseconds, not one Python call per edge.

    Parameters
    ----------
    nodes : int[k + 1]
        Node indices along the route.
    edges : int[k]
        Edge indices along the route (``edges[i]`` leads from ``nodes[i]`` to ``nodes[i+1]``).
    costs : planner.traffic.CostVersion, optional
        The live costs the route was searched on (its ``travel_time_s``); default the graph's.
    """
    if nodes is None or len(nodes) == 0:
        return None
    times = graph.travel_time_s if costs is None else costs.travel_time_s
    nodes_a = np.asarray(nodes, dtype=np.int64)
    edges_a = np.asarray(edges if edges is not None else [], dtype=np.int64)
    lat, lon = graph.lat, graph.lon
    if edges_a.shape[0] == 0:  # origin == destination: a single point, written twice
        x, y = float(lon[nodes_a[0]]), float(lat[nodes_a[0]])
        coords = [[x, y], [x, y]]
    else:
        gptr = graph.geom_indptr
        starts = np.asarray(gptr[edges_a], dtype=np.int64)
        glen = np.asarray(gptr[edges_a + 1], dtype=np.int64) - starts
        n_pts = edges_a.shape[0] + int(glen.sum()) + 1
        out_lon = np.empty(n_pts)
        out_lat = np.empty(n_pts)
        # Edge i writes its tail at tail_pos[i], then its interior points; the final head last.
        tail_pos = np.arange(edges_a.shape[0]) + np.concatenate(([0], np.cumsum(glen)[:-1]))
        tails = nodes_a[:-1]
        out_lon[tail_pos] = lon[tails]
        out_lat[tail_pos] = lat[tails]
        if int(glen.sum()):
            interior_pos = np.repeat(tail_pos + 1, glen) + (
                np.arange(int(glen.sum())) - np.repeat(np.cumsum(glen) - glen, glen)
            )
            src = np.repeat(starts, glen) + (
                np.arange(int(glen.sum())) - np.repeat(np.cumsum(glen) - glen, glen)
            )
            out_lon[interior_pos] = graph.geom_lon[src]
            out_lat[interior_pos] = graph.geom_lat[src]
        out_lon[-1] = lon[nodes_a[-1]]
        out_lat[-1] = lat[nodes_a[-1]]
        coords = np.column_stack((out_lon, out_lat)).tolist()
    return {
        "type": "Feature",
        "geometry": {"type": "LineString", "coordinates": coords},
        "properties": {
            "travel_time_s": float(np.sum(times[edges_a])) if edges_a.size else 0.0,
            "length_m": float(np.sum(graph.length_m[edges_a])) if edges_a.size else 0.0,
            "node_ids": np.asarray(graph.osm_id[nodes_a]).tolist(),
            "node_indices": nodes_a.tolist(),
        },
    }


def improvement_dict(imp: Improvement) -> dict[str, Any]:
    """The published fields of one improvement (``IMPROVEMENT_FIELDS``), JSON-safe."""
    return imp.to_dict()


def _float_or_none(v: Any) -> float | None:
    if v is None:
        return None
    f = float(v)
    return f if np.isfinite(f) else None


# ------------------------------------------------------------------------------------------
# Jobs


@dataclass(eq=False)
class PlanJob:
    """One plan: request, progress written by its worker thread, and the final answer."""

    plan_id: str
    origin_node: int
    destination_node: int
    deadline_ms: int
    controller: str
    wait: bool
    arrival_s: float
    search_deadline_s: float
    policy_sha256: str | None
    controller_spec: str = ""  # what to build; ``controller`` is the label answers carry
    gap_target: float = 0.0  # stop once the proven gap is at or below this
    ticket: Ticket | None = None
    policy: Any = None
    future: Any = None  # concurrent.futures.Future of the worker run
    graph: Any = None
    #: the live cost version the search runs on (taken when the search starts), or None
    costs: Any = None
    improvements: list[dict[str, Any]] = field(default_factory=list)
    #: (int64[k + 1] node indices, int64[k] edge indices) of the incumbent route, or None
    best: tuple[Any, Any] | None = None
    best_cost_s: float | None = None
    best_bound_s: float = 0.0
    expansions: int = 0
    status: str = "running"
    started_s: float | None = None
    search_end_s: float | None = None
    final: dict[str, Any] | None = None
    finished_wall: float | None = None  # time.monotonic() when final was set (for the TTL)
    done: threading.Event = field(default_factory=threading.Event)
    _subscribers: list[tuple[asyncio.AbstractEventLoop, asyncio.Event]] = field(
        default_factory=list
    )
    _sub_lock: threading.Lock = field(default_factory=threading.Lock)

    @property
    def cancel(self) -> threading.Event:
        assert self.ticket is not None
        return self.ticket.cancel

    @property
    def finished(self) -> bool:
        return self.final is not None

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
        found = any(i.get("source") == "search" for i in self.improvements)
        return "improved" if found else "instant"

    def best_route(self) -> dict[str, Any] | None:
        best = self.best
        if best is None or self.graph is None:
            return None
        return route_feature(self.graph, best[0], best[1], self.costs)

    def timings(self, now_s: float | None = None) -> dict[str, float]:
        now = time.perf_counter() if now_s is None else now_s
        start = self.started_s if self.started_s is not None else now
        end = self.search_end_s if self.search_end_s is not None else now
        return {
            "queue_ms": (start - self.arrival_s) * 1000.0,
            "search_ms": max(0.0, end - start) * 1000.0 if self.started_s is not None else 0.0,
            "total_ms": (now - self.arrival_s) * 1000.0,
        }

    def current(self) -> dict[str, Any]:
        """The plan as it stands: the final plan once finished, else the current best."""
        if self.final is not None:
            return self.final
        cost = self.best_cost_s
        bound = self.best_bound_s
        return {
            "plan_id": self.plan_id,
            "status": "running",
            "origin_node": self.origin_node,
            "destination_node": self.destination_node,
            "route": self.best_route(),
            "cost_s": cost,
            "lower_bound_s": bound,
            "gap": _gap(cost, bound),
            "improvements": [_published(i) for i in self.improvements],
            "expansions": self.expansions,
            "controller": self.controller,
            "policy_sha256": self.policy_sha256,
            "deadline_ms": self.deadline_ms,
            "timings": self.timings(),
            **traffic_fields(self.costs),
        }


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
    return json.dumps(obj, separators=(",", ":"), allow_nan=False).encode()


# ------------------------------------------------------------------------------------------
# Store


class StoreFull(Exception):
    def __init__(self, message: str, retry_after_s: int) -> None:
        super().__init__(message)
        self.retry_after_s = retry_after_s


class PlanStore:
    """Bounded plan store with a TTL for finished plans (event-loop thread only)."""

    def __init__(self, max_plans: int, ttl_s: float) -> None:
        self.max_plans = max_plans
        self.ttl_s = ttl_s
        self._plans: OrderedDict[str, PlanJob] = OrderedDict()  # insertion order = age
        self.expired_total = 0
        self.evicted_total = 0

    def __len__(self) -> int:
        return len(self._plans)

    def get(self, plan_id: str) -> PlanJob | None:
        self.expire()
        return self._plans.get(plan_id)

    def expire(self, now_wall: float | None = None) -> int:
        """Forget finished plans older than the TTL; returns how many went."""
        now = time.monotonic() if now_wall is None else now_wall
        gone = [
            pid
            for pid, job in self._plans.items()
            if job.finished_wall is not None and now - job.finished_wall >= self.ttl_s
        ]
        for pid in gone:
            del self._plans[pid]
        self.expired_total += len(gone)
        return len(gone)

    def reserve(self, *, required: bool, now_s: float) -> bool:
        """Make room for one plan; ``required`` (background) raises :class:`StoreFull`."""
        self.expire()
        if len(self._plans) < self.max_plans:
            return True
        for pid, job in self._plans.items():  # oldest first
            if job.finished:
                del self._plans[pid]
                self.evicted_total += 1
                return True
        if not required:
            return False
        soonest = min(j.search_deadline_s for j in self._plans.values())
        raise StoreFull(
            f"the plan store is full: all {self.max_plans} slots hold running background plans; "
            "retry when one finishes, cancel one with DELETE /v1/plans/{plan_id}, or use "
            "wait=true",
            retry_after_s=max(1, int(np.ceil(max(0.0, soonest - now_s)))),
        )

    def add(self, job: PlanJob) -> None:
        self._plans[job.plan_id] = job

    def running(self) -> int:
        return sum(1 for j in self._plans.values() if not j.finished)


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
        """Search until the job's search deadline, the optimum, or cancellation; set ``final``.

        Runs on a worker thread, through :func:`dueroute.planner.session.plan` (the one search
        loop); each improvement records its route for the current-best view. Never raises: a
        failure is logged and the job ends ``no_route`` with an ``error`` field, so no caller
        waits forever.
        """
        job.started_s = ticket.started_s if ticket.started_s is not None else time.perf_counter()
        result = None
        error: str | None = None
        try:
            if ticket.cancel.is_set():
                status = "cancelled"
            else:
                # a search whose deadline the queue already ate still answers with the
                # instant route (the session opens the query before it looks at the clock).
                # The newest cost version when the search starts; kept to the end (a new
                # version is a new snapshot, so publishing one never pauses this search).
                if self.traffic is not None:
                    job.costs = self.traffic.current
                # Deadline counted from arrival: the search ends at job.search_deadline_s.
                result = plan(
                    self.planner,
                    job.origin_node,
                    job.destination_node,
                    deadline_ms=(job.search_deadline_s - job.arrival_s) * 1000.0,
                    controller=self.make_controller(
                        job.controller_spec or job.controller, job.policy
                    ),
                    steps=self.steps,
                    on_improvement=lambda imp: self._record(job, imp),
                    cancel=ticket.cancel,
                    started_at=job.arrival_s,
                    gap_target=job.gap_target,
                    costs=job.costs,
                )
                status = str(result.status)
        except Exception as exc:  # never leave a caller waiting
            log.exception("search failed", extra={"plan_id": job.plan_id})
            status = "no_route"
            error = f"{type(exc).__name__}: {exc}"
        return self.finish(job, status, result, error)

    def _record(self, job: PlanJob, imp: Improvement) -> None:
        """Called in the search thread on every improvement (counts against the deadline)."""
        entry = improvement_dict(imp)
        nodes, edges = imp.route_nodes, imp.route_edges
        if edges is not None and nodes is not None:
            entry["route"] = {
                "travel_time_s": entry["cost_s"],
                "length_m": float(np.sum(self.graph.length_m[edges])),
                "node_count": int(len(nodes)),
            }
        if job.costs is not None:
            entry["traffic_version"] = job.costs.version  # the event stream names it too
        job.best = (nodes, edges)  # one assignment: readers see both or neither
        job.best_cost_s = entry["cost_s"]
        job.best_bound_s = entry["lower_bound_s"] or 0.0
        job.expansions = entry["expansions"]
        job.improvements.append(entry)
        job.notify()

    def finish(
        self, job: PlanJob, status: str, result: Any, error: str | None = None
    ) -> dict[str, Any]:
        """Publish the final plan (once) and wake every waiter."""
        job.search_end_s = time.perf_counter()
        final = self._final(job, status, result)
        if error is not None:
            final["error"] = error
        job.final = final
        job.status = final["status"]
        job.finished_wall = time.monotonic()
        job.done.set()
        job.notify()
        return final

    def _final(self, job: PlanJob, status: str, result: Any) -> dict[str, Any]:
        if result is not None:
            feature = route_feature(self.graph, result.route, result.route_edges, job.costs)
            cost = _float_or_none(result.cost_s)
            bound = _float_or_none(result.lower_bound_s)
            if bound is None:
                bound = job.best_bound_s
            gap = _float_or_none(result.gap)
            improvements = [improvement_dict(i) for i in result.improvements]
            expansions = int(result.expansions)
        else:
            feature = job.best_route()
            cost = job.best_cost_s
            bound = job.best_bound_s
            gap = _gap(cost, bound)
            improvements = [_published(i) for i in job.improvements]
            expansions = job.expansions
        if feature is None and status not in ("cancelled", "no_route", "not_found"):
            status = "not_found"
        return {
            "plan_id": job.plan_id,
            "status": status,
            "origin_node": job.origin_node,
            "destination_node": job.destination_node,
            "route": feature,
            "cost_s": cost if feature is not None else None,
            "lower_bound_s": bound,
            "gap": gap if feature is not None else None,
            "improvements": improvements,
            "expansions": expansions,
            "controller": job.controller,
            "policy_sha256": job.policy_sha256,
            "deadline_ms": job.deadline_ms,
            "timings": job.timings(),
            **traffic_fields(job.costs),
        }
