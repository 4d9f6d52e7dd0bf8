"""``/v1/plans``: plan a route by a deadline (wait, background, event stream, cancel).

Deadline arithmetic (all ``time.perf_counter`` seconds; ``arrival_s`` is stamped by the edge
middleware as soon as the request reaches the app):

* search deadline = arrival + deadline_ms - headroom, headroom = ``response_headroom_ms`` +
  the event loop's current timer lag (:class:`service.admission.LoopLag`): the search stops
  there, wherever it started, leaving time to build and send the answer;
* watchdog = arrival + deadline_ms - loop lag: if the search has not returned by then (it
  overran its deadline), the handler cancels it and answers with the best route found so
  far, so an accepted request is answered by arrival + deadline_ms + ``deadline_tolerance_ms``.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import AsyncIterator
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse, StreamingResponse

from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.service.server.admission import Shed
from dueroute.service.server.deps import AppState, StateDep
from dueroute.service.server.jobs import PlanJob, StoreFull, dumps, new_plan_id
from dueroute.service.server.schemas import (
    RESPONSES_4XX,
    ErrorBody,
    NodeRef,
    Plan,
    PlanAccepted,
    PlanRequest,
)

router = APIRouter(tags=["plans"])
log = logging.getLogger("dueroute.service.plans")

_SSE_KEEPALIVE_S = 15.0

_RESPONSES: dict[int | str, dict[str, Any]] = {
    **RESPONSES_4XX,
    202: {"model": PlanAccepted, "description": "wait=false: the plan runs in the background"},
    503: {
        "model": ErrorBody,
        "description": "shed by admission control (Retry-After says when to retry), plan "
        "store full, or still warming up",
    },
}


def _error(status: int, detail: str, retry_after_s: int | None = None) -> JSONResponse:
    headers = {"Retry-After": str(retry_after_s)} if retry_after_s is not None else None
    return JSONResponse(status_code=status, content={"detail": detail}, headers=headers)


def _json(
    body: dict[str, Any], status: int = 200, headers: dict[str, str] | None = None
) -> Response:
    return Response(dumps(body), status_code=status, media_type="application/json", headers=headers)


def _resolve(state: AppState, place: Any, which: str) -> int:
    assert state.engine is not None
    graph = state.engine.graph
    try:
        if isinstance(place, NodeRef):
            return graph.check_node(place.node)
        return graph.snap(place.lat, place.lon, state.settings.snap_max_m)
    except (NodeNotFound, InvalidRequest) as exc:
        raise _PlaceError(f"{which}: {exc}", 404 if isinstance(exc, NodeNotFound) else 422) from exc


class _PlaceError(Exception):
    def __init__(self, detail: str, status: int) -> None:
        super().__init__(detail)
        self.status = status


@router.post(
    "/v1/plans",
    response_model=Plan,
    responses=_RESPONSES,
    summary="Plan a route answered by the deadline (or in the background)",
)
async def create_plan(body: PlanRequest, request: Request, state: StateDep) -> Response:
    arrival_s: float = getattr(request.state, "arrival_s", None) or time.perf_counter()
    settings = state.settings
    metrics = state.metrics
    if not state.ready or state.engine is None:
        metrics.plans.labels(outcome="not_ready").inc()
        reason = state.warmup_error or "the service is warming up (loading the graph, JIT compile)"
        return _error(503, f"not ready: {reason}; retry shortly", retry_after_s=1)
    if body.deadline_ms > settings.max_deadline_ms:
        metrics.plans.labels(outcome="rejected").inc()
        return _error(
            422,
            f"deadline_ms: {body.deadline_ms} is above this service's maximum "
            f"(allowed: an integer number of milliseconds, 1..{settings.max_deadline_ms})",
        )
    try:
        origin = _resolve(state, body.origin, "origin")
        destination = _resolve(state, body.destination, "destination")
    except _PlaceError as exc:
        metrics.plans.labels(outcome="rejected").inc()
        return _error(exc.status, str(exc))

    # Headroom = the configured time to build and send the answer + how late the event loop
    # runs timers right now (it will be that late to answer too). Short deadlines scale it
    # down, so a 1 ms request on an idle service is served (searching 0.6 ms), not refused.
    lag_ms = state.loop_lag.estimate_ms()
    headroom_ms = min(settings.response_headroom_ms + lag_ms, 0.4 * body.deadline_ms)
    budget_ms = body.deadline_ms - headroom_ms
    search_deadline_s = arrival_s + budget_ms / 1000.0
    min_search_s = min(settings.min_search_ms, 0.5 * budget_ms) / 1000.0
    try:
        if not body.wait:
            state.plans.reserve(required=True, now_s=time.perf_counter())
        ticket = state.admission.admit(arrival_s, search_deadline_s, min_search_s)
    except (Shed, StoreFull) as exc:
        metrics.plans.labels(outcome="shed").inc()
        metrics.sheds.inc()
        request.state.log = {"outcome": "shed", "deadline_ms": body.deadline_ms}
        return _error(503, str(exc), retry_after_s=exc.retry_after_s)

    active = state.policies.active  # the plan keeps this snapshot even if a swap happens
    uses_policy = body.controller == "learned" and active.policy is not None
    job = PlanJob(
        plan_id=new_plan_id(),
        origin_node=origin,
        destination_node=destination,
        deadline_ms=body.deadline_ms,
        controller=body.controller
        if active.policy is not None or body.controller != "learned"
        else f"learned (fallback: {active.fallback_controller})",
        controller_spec=body.controller,
        gap_target=body.gap_target,
        wait=body.wait,
        arrival_s=arrival_s,
        search_deadline_s=search_deadline_s,
        policy_sha256=active.sha256 if uses_policy else None,
        ticket=ticket,
        policy=active.policy,
        graph=state.engine.graph,
    )
    engine = state.engine
    job.future = state.admission.submit(ticket, lambda t: engine.run(job, t))
    metrics.queued.set(state.admission.queued)

    if not body.wait:
        state.plans.add(job)
        metrics.background.set(len(state.plans))
        url = f"/v1/plans/{job.plan_id}"
        accepted = {
            "plan_id": job.plan_id,
            "status": "running",
            "links": {"self": url, "events": f"{url}/events"},
        }
        metrics.plans.labels(outcome="accepted_background").inc()
        request.state.log = {"plan_id": job.plan_id, "outcome": "accepted_background"}
        return _json(accepted, status=202, headers={"Location": url})

    # The watchdog is a timer too: set it the current loop lag early (never before the search
    # deadline) so that it fires by the deadline.
    answer_by_s = max(search_deadline_s, arrival_s + (body.deadline_ms - lag_ms) / 1000.0)
    waiter = asyncio.wrap_future(job.future)
    try:
        await asyncio.wait_for(
            asyncio.shield(waiter), timeout=max(0.0, answer_by_s - time.perf_counter())
        )
        result = dict(job.final or job.current())
    except TimeoutError:
        # The search overran its deadline (or never got a worker): stop it and answer with
        # what it has now. A plan still queued gives its queue place back at once.
        ticket.cancel.set()
        if job.future.cancel():
            state.admission.release(ticket)
            engine.finish(job, job.interim_status(), None)
        # The worker may finish while this snapshot is taken: a waiting caller never gets
        # a "running" plan, whichever side won.
        result = dict(job.current())
        if result["status"] == "running":
            result["status"] = job.interim_status()
        metrics.watchdog.inc()
    now = time.perf_counter()
    timings = dict(result["timings"])
    timings["total_ms"] = (now - arrival_s) * 1000.0
    result["timings"] = timings
    _observe(state, job, result, now)
    request.state.log = {
        "plan_id": job.plan_id,
        "outcome": result["status"],
        "deadline_ms": body.deadline_ms,
        "queue_ms": round(timings["queue_ms"], 3),
        "search_ms": round(timings["search_ms"], 3),
        "gap": result["gap"],
    }
    if state.plans.reserve(required=False, now_s=now):
        state.plans.add(job)
    return _json(result, headers={"Server-Timing": _server_timing(timings)})


def _server_timing(timings: dict[str, float]) -> str:
    """W3C Server Timing header: lets a load tester read timings without parsing the body."""
    return ", ".join(
        f"{name};dur={timings[f'{name}_ms']:.3f}" for name in ("queue", "search", "total")
    )


def _observe(state: AppState, job: PlanJob, result: dict[str, Any], now_s: float) -> None:
    m = state.metrics
    m.plans.labels(outcome=result["status"]).inc()
    total_s = now_s - job.arrival_s
    m.latency.observe(total_s)
    m.overhead.observe(max(0.0, total_s - result["timings"]["search_ms"] / 1000.0))
    late_ms = (total_s - job.deadline_ms / 1000.0) * 1000.0
    m.late.observe(max(0.0, late_ms) / 1000.0)
    if late_ms > state.settings.deadline_tolerance_ms:  # the promise broken: count and say so
        m.late_answers.inc()
        log.warning(
            "answer later than the deadline tolerance",
            extra={"plan_id": job.plan_id, "late_ms": round(late_ms, 3)},
        )
    if result.get("gap") is not None:
        m.gap.observe(result["gap"])
    m.queued.set(state.admission.queued)


def _unknown(plan_id: str, state: AppState) -> JSONResponse:
    return _error(
        404,
        f"no plan with id {plan_id!r}: unknown, or finished more than "
        f"{state.settings.background_ttl_s:g} s ago and expired",
    )


@router.get(
    "/v1/plans/{plan_id}",
    response_model=Plan,
    responses={404: {"model": ErrorBody}},
    summary="The plan: its current best route while running, the final plan when done",
)
async def get_plan(plan_id: str, state: StateDep) -> Response:
    job = state.plans.get(plan_id)
    if job is None:
        return _unknown(plan_id, state)
    return _json(job.current())


@router.delete(
    "/v1/plans/{plan_id}",
    response_model=Plan,
    responses={404: {"model": ErrorBody}},
    summary="Cancel a plan (returns its final state)",
)
async def cancel_plan(plan_id: str, state: StateDep) -> Response:
    job = state.plans.get(plan_id)
    if job is None:
        return _unknown(plan_id, state)
    if not job.finished:
        job.cancel.set()
        if job.future is not None and job.future.cancel():
            # Never started: finish it here and give its queue slot back.
            assert job.ticket is not None and state.engine is not None
            state.admission.release(job.ticket)
            state.engine.finish(job, "cancelled", None)
        elif job.future is not None:
            # Running: the search stops at its next check of the cancel flag.
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(asyncio.shield(asyncio.wrap_future(job.future)), 5.0)
    return _json(job.current())


def _sse(event: str, data: dict[str, Any], event_id: int | None = None) -> bytes:
    head = f"id: {event_id}\n" if event_id is not None else ""
    return f"{head}event: {event}\ndata: ".encode() + dumps(data) + b"\n\n"


@router.get(
    "/v1/plans/{plan_id}/events",
    responses={
        200: {
            "content": {"text/event-stream": {"schema": {"type": "string"}}},
            "description": "`improvement` events in order, then one `final` event (the Plan)",
        },
        404: {"model": ErrorBody},
    },
    response_class=StreamingResponse,
    summary="Server-Sent Events: every improvement in order, then the final plan",
)
async def plan_events(plan_id: str, state: StateDep) -> Response:
    job = state.plans.get(plan_id)
    if job is None:
        return _unknown(plan_id, state)
    return StreamingResponse(
        _stream(job),
        media_type="text/event-stream",
        headers={"Cache-Control": "no-cache", "X-Accel-Buffering": "no"},
    )


async def _stream(job: PlanJob) -> AsyncIterator[bytes]:
    """Improvements in the order the search found them, then ``final``.

    The worker appends every improvement before it sets ``final``, so once ``final`` is seen,
    one more drain delivers any improvement not yet sent.
    """
    wake = job.subscribe()
    sent = 0
    try:
        while True:
            is_final = job.final is not None
            improvements = job.improvements
            while sent < len(improvements):
                yield _sse("improvement", improvements[sent], sent)
                sent += 1
            if is_final:
                assert job.final is not None
                yield _sse("final", job.final, sent)
                return
            try:
                await asyncio.wait_for(wake.wait(), timeout=_SSE_KEEPALIVE_S)
            except TimeoutError:
                yield b": keep-alive\n\n"
            wake.clear()
    finally:
        job.unsubscribe(wake)
