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
from datetime import UTC, datetime
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse, StreamingResponse
from pydantic import ValidationError

from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.snap import RoadSnap, snap_to_road
from dueroute.service.server.admission import Shed
from dueroute.service.server.deps import AppState, StateDep
from dueroute.service.server.jobs import (
    FULL_TRACE_MAX,
    STREAM_BUFFER,
    PlanJob,
    dumps,
    reserve_bytes,
)
from dueroute.service.server.json_body import BodyError, check_media_type, parse_json
from dueroute.service.server.messages import validation_message
from dueroute.service.server.plan_store import Lookup, StoreFull
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

_RESPONSES: dict[int | str, dict[str, Any]] = {
    **RESPONSES_4XX,
    202: {"model": PlanAccepted, "description": "wait=false: the plan runs in the background"},
    500: {
        "model": ErrorBody,
        "description": "wait=true: the plan failed (the text says what failed); the service "
        "goes on serving other plans",
    },
    503: {
        "model": ErrorBody,
        "description": "shed by admission control or the plan store is full (Retry-After "
        "says when to retry), still warming up (Retry-After: 1), or the graph could not be "
        "loaded (no Retry-After: it will not pass by retrying)",
    },
}

_GONE: dict[int | str, dict[str, Any]] = {
    404: {
        "model": ErrorBody,
        "description": "no such plan; the text says which: unknown to this service, "
        "expired (kept background_ttl_s after it finished), or never kept (wait=true "
        "without keep)",
    }
}


def _error(status: int, detail: str, retry_after_s: int | None = None) -> JSONResponse:
    headers = {"Retry-After": str(retry_after_s)} if retry_after_s is not None else None
    return JSONResponse(status_code=status, content={"detail": detail}, headers=headers)


def _json(
    body: dict[str, Any] | bytes, status: int = 200, headers: dict[str, str] | None = None
) -> Response:
    content = body if isinstance(body, bytes) else dumps(body)
    return Response(content, status_code=status, media_type="application/json", headers=headers)


def _resolve(state: AppState, place: Any, which: str) -> int | RoadSnap:
    """A node index, or a point snapped onto the nearest road (any point along an edge)."""
    assert state.engine is not None
    graph = state.engine.graph
    try:
        if isinstance(place, NodeRef):
            return int(graph.check_node(place.node))
        return snap_to_road(graph, place.lat, place.lon, state.settings.snap_max_m)
    except (NodeNotFound, InvalidRequest) as exc:
        raise _PlaceError(f"{which}: {exc}", 404 if isinstance(exc, NodeNotFound) else 422) from exc


class _PlaceError(Exception):
    def __init__(self, detail: str, status: int) -> None:
        super().__init__(detail)
        self.status = status


async def _read_request(request: Request, state: AppState) -> PlanRequest | JSONResponse:
    """The request body as a :class:`PlanRequest`, or the 400/415/422 answer saying why not."""
    try:
        check_media_type(request.headers.get("content-type"), "application/json")
        data = parse_json(await request.body())
    except BodyError as exc:
        return _error(exc.status, exc.detail)
    try:
        return PlanRequest.model_validate(data)
    except ValidationError as exc:
        return _error(422, validation_message(list(exc.errors()), state.settings))


@router.post(
    "/v1/plans",
    operation_id="create_plan",
    response_model=Plan,
    responses=_RESPONSES,
    summary="Plan a route answered by the deadline (or in the background)",
    description="With wait=true (the default) the answer is the plan, by arrival + "
    "deadline_ms + the documented tolerance; it is stored for GET only with keep=true. With "
    "wait=false the plan runs in the background (202): poll GET /v1/plans/{plan_id} or stream "
    "/v1/plans/{plan_id}/events; it is kept background_ttl_s after it finishes. The body must "
    "be application/json: numbers as JSON numbers, each key once.",
)
async def create_plan(request: Request, state: StateDep) -> Response:
    arrival_s: float = getattr(request.state, "arrival_s", None) or time.perf_counter()
    settings = state.settings
    metrics = state.metrics
    body = await _read_request(request, state)
    if isinstance(body, JSONResponse):
        metrics.plans.labels(outcome="rejected").inc()
        return body
    if not state.ready or state.engine is None:
        metrics.plans.labels(outcome="not_ready").inc()
        if state.warmup_error is not None:  # permanent until the operator fixes it
            return _error(
                503,
                f"not ready: the service could not load its graph ({state.warmup_error}); "
                "retrying will not help: the operator must fix the graph and restart",
            )
        return _error(
            503,
            "not ready: the service is warming up (loading the graph, JIT compile); retry shortly",
            retry_after_s=1,
        )
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

    kept = not body.wait or body.keep
    listed = FULL_TRACE_MAX if body.full_trace else settings.improvements_listed
    trace_limit = max(listed, STREAM_BUFFER) if kept else listed
    # Headroom = the configured time to build and send the answer + how late the event loop
    # runs timers right now (it will be that late to answer too). Short deadlines scale it
    # down, so a 1 ms request on an idle service is served (searching 0.6 ms), not refused.
    lag_ms = state.loop_lag.estimate_ms()
    headroom_ms = min(settings.response_headroom_ms + lag_ms, 0.4 * body.deadline_ms)
    budget_ms = body.deadline_ms - headroom_ms
    search_deadline_s = arrival_s + budget_ms / 1000.0
    min_search_s = min(settings.min_search_ms, 0.5 * budget_ms) / 1000.0
    try:
        if kept:  # room first: a stored plan is never dropped to make room later
            state.plans.check_room(reserve_bytes(trace_limit))
        ticket = state.admission.admit(arrival_s, search_deadline_s, min_search_s)
    except (Shed, StoreFull) as exc:
        outcome = "store_full" if isinstance(exc, StoreFull) else "shed"
        metrics.plans.labels(outcome=outcome).inc()
        if isinstance(exc, StoreFull):
            metrics.store_refusals.labels(limit=exc.limit).inc()
        else:
            metrics.sheds.inc()
        request.state.log = {"outcome": outcome, "deadline_ms": body.deadline_ms}
        return _error(503, str(exc), retry_after_s=exc.retry_after_s)

    active = state.policies.active  # the plan keeps this snapshot even if a swap happens
    uses_policy = body.controller == "learned" and active.policy is not None
    job = PlanJob(
        plan_id=state.plans.new_id(kept=kept),
        origin_node=origin if isinstance(origin, int) else None,
        destination_node=destination if isinstance(destination, int) else None,
        origin=origin,
        destination=destination,
        deadline_ms=body.deadline_ms,
        controller=body.controller
        if active.policy is not None or body.controller != "learned"
        else f"learned (fallback: {active.fallback_controller})",
        controller_spec=body.controller,
        gap_target=body.gap_target,
        wait=body.wait,
        waiting=body.wait,
        arrival_s=arrival_s,
        search_deadline_s=search_deadline_s,
        policy_sha256=active.sha256 if uses_policy else None,
        ticket=ticket,
        policy=active.policy,
        graph=state.engine.graph,
        listed=listed,
        trace_limit=trace_limit,
    )
    if kept:
        state.plans.put(job)  # before the worker starts: its end is always accounted
        metrics.background.set(len(state.plans))
    engine = state.engine
    job.future = state.admission.submit(ticket, lambda t: engine.run(job, t))
    metrics.queued.set(state.admission.queued)

    if not body.wait:
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
    job.release_final()
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
    if result["status"] == "error":
        request.state.log["error"] = result["error"]
        return _error(
            500,
            f"plan {job.plan_id} failed: {result['error']}. The service goes on serving; "
            "this is a fault of the service or its graph, not of the request",
        )
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


def _gone(plan_id: str, lookup: Lookup, state: AppState) -> JSONResponse:
    """The 404 of a plan that is not held, with its exact reason."""
    shown = plan_id if len(plan_id) <= 64 else plan_id[:64] + "..."
    issued = (
        datetime.fromtimestamp(lookup.issued_wall_s, UTC).isoformat(timespec="seconds")
        if lookup.issued_wall_s is not None
        else None
    )
    if lookup.reason == "expired":
        detail = (
            f"plan {shown!r} has expired: it was created at {issued} and finished plans are "
            f"kept {state.settings.background_ttl_s:g} s after they finish"
        )
    elif lookup.reason == "not_kept":
        detail = (
            f"plan {shown!r} (created at {issued}) was answered in place (wait=true) and not "
            "kept; ask with keep=true, or wait=false, to read a plan later"
        )
    else:
        detail = (
            f"no plan with id {shown!r}: this service did not issue it (a mistyped id, or "
            "one issued by another replica or before this service restarted)"
        )
    return _error(404, detail)


@router.get(
    "/v1/plans/{plan_id}",
    operation_id="get_plan",
    response_model=Plan,
    responses=_GONE,
    summary="The plan: its current best route while running, the final plan when done",
    description="A stored plan (background, or wait=true with keep=true) is readable while it "
    "runs and for background_ttl_s seconds after it finished; a failed plan has status "
    "error and says what failed in `error`.",
)
async def get_plan(plan_id: str, state: StateDep) -> Response:
    lookup = await state.plans.find(plan_id)
    if lookup.job is None:
        return _gone(plan_id, lookup, state)
    return _json(lookup.job.current_json())


@router.delete(
    "/v1/plans/{plan_id}",
    operation_id="cancel_plan",
    response_model=Plan,
    responses=_GONE,
    summary="Cancel a plan: stop its search and answer with its final state",
    description="Cancels, it does not delete: a running plan stops at its next check "
    "(status cancelled, with the best route found so far) and the answer is its final "
    "state; a finished plan is left as it is. The plan stays readable until its time to "
    "live ends, so a GET after DELETE answers 200 with the same final plan. Idempotent.",
)
async def cancel_plan(plan_id: str, state: StateDep) -> Response:
    lookup = await state.plans.find(plan_id)
    job = lookup.job
    if job is None:
        return _gone(plan_id, lookup, state)
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
    return _json(job.current_json())


def _sse(event: str, data: bytes, event_id: int | None = None) -> bytes:
    head = f"id: {event_id}\n" if event_id is not None else ""
    return f"{head}event: {event}\ndata: ".encode() + data + b"\n\n"


@router.get(
    "/v1/plans/{plan_id}/events",
    operation_id="plan_events",
    responses={
        200: {"description": "`improvement` events in order, then one `final` event (the Plan)"},
        **_GONE,
    },
    response_class=StreamingResponse,
    summary="Server-Sent Events: every improvement in order, then the final plan",
    description="Each `improvement` event's id is its ordinal (0, 1, ...), its data an "
    "ImprovementEvent; the last event is `final` (id = the number of improvements, data = "
    "the Plan). A stream opened after the plan finished replays the improvements its answer "
    "lists. A reader that falls more than 256 improvements behind skips the oldest (the ids "
    "show the gap). Send Last-Event-ID to resume after an event.",
)
async def plan_events(plan_id: str, request: Request, state: StateDep) -> Response:
    lookup = await state.plans.find(plan_id)
    job = lookup.job
    if job is None:
        return _gone(plan_id, lookup, state)
    after = -1
    last = request.headers.get("last-event-id")
    if last is not None and last.strip().isdigit():
        after = int(last.strip())
    return StreamingResponse(
        _stream(state, job, after),
        media_type="text/event-stream",
        headers={"Cache-Control": "no-cache", "X-Accel-Buffering": "no"},
    )


async def _stream(state: AppState, job: PlanJob, after: int) -> AsyncIterator[bytes]:
    async for event in state.plans.events(job, after):
        if event is None:
            yield b": keep-alive\n\n"
        else:
            yield _sse(event.kind, event.data, event.event_id)
