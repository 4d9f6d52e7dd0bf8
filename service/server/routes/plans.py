"""``/v1/plans``: plan a route by a deadline (wait, background, event stream, cancel).

Deadline arithmetic (all ``time.perf_counter`` seconds). ``arrival_s`` is when the request's
first byte was read (:mod:`dueroute.service.server.http_edge`):

* a deadline below the service's measured floor (:class:`ResponseFloor`: the time a plan needs
  outside its search, 95th percentile) is refused at once with 503 naming the floor;
* search deadline = arrival + deadline_ms - the measured time after a search (build the route
  and the JSON, send it): the search stops there, wherever it started;
* the plan searches only while it holds a CPU slot (:mod:`dueroute.service.server.admission`:
  EDF, preemption, the instant lane), so it answers by its deadline with at least the instant
  route;
* watchdog = arrival + deadline_ms + 1 ms: if a starved search has not returned by then, the
  handler cancels it and answers with the best route found so far (counted in a metric);
* a waiting client that hangs up cancels its search (it stops within
  ``planner.session.CANCEL_CHECK_S``) and frees its slot.

``POST /v1/plans`` is served by :func:`serve_create_plan`, a lean ASGI handler the app calls
before the framework's layers; the FastAPI route below runs the same :func:`answer_plan` and
publishes the OpenAPI description.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import AsyncIterator, Awaitable, Callable, MutableMapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse, StreamingResponse
from pydantic import ValidationError

from dueroute.planner.errors import InvalidRequest, NodeNotFound
from dueroute.planner.snap import RoadSnap, snap_to_road
from dueroute.service.server.admission import Shed
from dueroute.service.server.callers import API_KEY_HEADER, Caller, CallerRefused
from dueroute.service.server.deps import AppState, StateDep
from dueroute.service.server.http_edge import (
    BodyTimeout,
    BodyTooLarge,
    Disconnected,
    read_body,
    wait_disconnect,
)
from dueroute.service.server.jobs import (
    FULL_TRACE_MAX,
    STREAM_BUFFER,
    PlanJob,
    dumps,
    reserve_bytes,
    with_timings,
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

Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]

#: The watchdog fires this long after the deadline (the search itself ends before it).
WATCHDOG_SLACK_S = 0.001

router = APIRouter(tags=["plans"])
log = logging.getLogger("dueroute.service.plans")
log_edge = logging.getLogger("dueroute.service")  # the request log of every endpoint

_RESPONSES: dict[int | str, dict[str, Any]] = {
    **RESPONSES_4XX,
    202: {"model": PlanAccepted, "description": "wait=false: the plan runs in the background"},
    500: {
        "model": ErrorBody,
        "description": "wait=true: the plan failed (the text says what failed); the service "
        "goes on serving other plans",
    },
    401: {"model": ErrorBody, "description": "X-API-Key names no key this service knows"},
    403: {
        "model": ErrorBody,
        "description": "above a cap for anonymous callers (deadline, slow controllers); an "
        "API key lifts it",
    },
    408: {"model": ErrorBody, "description": "the body did not arrive in time"},
    429: {
        "model": ErrorBody,
        "description": "this caller is over its limit of plans at once or of search time "
        "per second (Retry-After says when to retry)",
    },
    503: {
        "model": ErrorBody,
        "description": "the deadline is below the service's floor (the text names it), "
        "shed by admission control or the plan store is full (Retry-After says when to "
        "retry), still warming up (Retry-After: 1), or the graph could not be loaded (no "
        "Retry-After: it will not pass by retrying)",
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


@dataclass
class Answer:
    """One answer to ``POST /v1/plans``: status, headers, JSON body, and what to log."""

    status: int
    body: bytes
    headers: dict[str, str] = field(default_factory=dict)
    job: PlanJob | None = None
    log: dict[str, Any] = field(default_factory=dict)


def _refusal(
    status: int, detail: str, retry_after_s: int | None = None, **log_fields: Any
) -> Answer:
    headers = {"Retry-After": str(retry_after_s)} if retry_after_s is not None else {}
    return Answer(status, dumps({"detail": detail}), headers, log=log_fields)


def _read_plan_request(
    state: AppState, content_type: str | None, raw: bytes
) -> PlanRequest | Answer:
    """The body as a :class:`PlanRequest`, or the 400/415/422 answer saying why not."""
    try:
        check_media_type(content_type, "application/json")
        data = parse_json(raw)
    except BodyError as exc:
        return _refusal(exc.status, exc.detail)
    try:
        return PlanRequest.model_validate(data)
    except ValidationError as exc:
        return _refusal(422, validation_message(list(exc.errors()), state.settings))


async def answer_plan(
    state: AppState,
    arrival_s: float,
    content_type: str | None,
    raw: bytes,
    api_key: str | None,
    client_host: str | None,
    receive: Receive | None,
) -> Answer | None:
    """Everything of ``POST /v1/plans`` between the body and the bytes sent back.

    ``receive`` (the ASGI receive of the request, its body read) is watched for the client
    hanging up while a waited plan runs: then the search is cancelled and None returned.
    """
    settings = state.settings
    metrics = state.metrics
    body = _read_plan_request(state, content_type, raw)
    if isinstance(body, Answer):
        metrics.plans.labels(outcome="rejected").inc()
        return body
    if not state.ready or state.engine is None:
        metrics.plans.labels(outcome="not_ready").inc()
        if state.warmup_error is not None:  # permanent until the operator fixes it
            return _refusal(
                503,
                f"not ready: the service could not load its graph ({state.warmup_error}); "
                "retrying will not help: the operator must fix the graph and restart",
            )
        return _refusal(
            503,
            "not ready: the service is warming up (loading the graph, JIT compile); retry shortly",
            retry_after_s=1,
        )
    if body.deadline_ms > settings.max_deadline_ms:
        metrics.plans.labels(outcome="rejected").inc()
        return _refusal(
            422,
            f"deadline_ms: {body.deadline_ms} is above this service's maximum "
            f"(allowed: an integer number of milliseconds, 1..{settings.max_deadline_ms})",
        )
    try:
        caller = state.callers.identify(api_key, client_host)
        state.callers.check_request(caller, body.deadline_ms, body.controller)
    except CallerRefused as exc:
        metrics.refusals.labels(reason=exc.reason).inc()
        metrics.plans.labels(outcome="rejected").inc()
        return _refusal(exc.status, str(exc), exc.retry_after_s, outcome=exc.reason)
    floor_ms = state.floor.floor_ms()
    if body.deadline_ms < floor_ms:
        metrics.refusals.labels(reason="floor").inc()
        metrics.plans.labels(outcome="shed").inc()
        return _refusal(
            503,
            f"deadline_ms {body.deadline_ms} is below this service's floor of {floor_ms:.2f} ms "
            "(the time a plan takes here outside its search: reading, snapping, dispatching, "
            "building and sending the answer; 95th percentile of the last seconds), so it "
            f"cannot be honoured; ask deadline_ms >= {int(floor_ms) + 1}",
            retry_after_s=1,
            outcome="below_floor",
        )
    try:
        origin = _resolve(state, body.origin, "origin")
        destination = _resolve(state, body.destination, "destination")
    except _PlaceError as exc:
        metrics.plans.labels(outcome="rejected").inc()
        return _refusal(exc.status, str(exc))

    kept = not body.wait or body.keep
    listed = FULL_TRACE_MAX if body.full_trace else settings.improvements_listed
    trace_limit = max(listed, STREAM_BUFFER) if kept else listed
    # The search stops the measured answer time before the deadline (a waited plan; a
    # background plan has no answer to send, but reads the same way).
    after_s = state.floor.after_s()
    search_deadline_s = arrival_s + max(0.0, body.deadline_ms / 1000.0 - after_s)
    budget_s = search_deadline_s - arrival_s
    min_search_s = min(settings.min_search_ms / 1000.0, 0.5 * budget_s)
    try:
        state.callers.acquire(caller)
    except CallerRefused as exc:
        metrics.refusals.labels(reason=exc.reason).inc()
        metrics.plans.labels(outcome="shed").inc()
        return _refusal(exc.status, str(exc), exc.retry_after_s, outcome=exc.reason)
    try:
        if kept:  # room first: a stored plan is never dropped to make room later
            state.plans.check_room(reserve_bytes(trace_limit))
        ticket = state.admission.admit(
            arrival_s, search_deadline_s, min_search_s, caller.label, instant_lane=body.wait
        )
    except (Shed, StoreFull) as exc:
        state.callers.release(caller, 0.0)
        outcome = "store_full" if isinstance(exc, StoreFull) else "shed"
        metrics.plans.labels(outcome=outcome).inc()
        if isinstance(exc, StoreFull):
            metrics.store_refusals.labels(limit=exc.limit).inc()
        else:
            metrics.sheds.inc()
        return _refusal(
            503, str(exc), exc.retry_after_s, outcome=outcome, deadline_ms=body.deadline_ms
        )

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
    job.future.add_done_callback(lambda _f: _plan_done(state, caller, job))

    if not body.wait:
        url = f"/v1/plans/{job.plan_id}"
        accepted = {
            "plan_id": job.plan_id,
            "status": "running",
            "links": {"self": url, "events": f"{url}/events"},
        }
        metrics.plans.labels(outcome="accepted_background").inc()
        return Answer(
            202,
            dumps(accepted),
            {"Location": url},
            job=job,
            log={"plan_id": job.plan_id, "outcome": "accepted_background"},
        )

    answer_by_s = arrival_s + body.deadline_ms / 1000.0 + WATCHDOG_SLACK_S
    waiter = asyncio.wrap_future(job.future)
    watch = asyncio.ensure_future(wait_disconnect(receive)) if receive is not None else None
    try:
        waits: set[asyncio.Future[Any]] = {waiter} if watch is None else {waiter, watch}
        await asyncio.wait(
            waits,
            timeout=max(0.0, answer_by_s - time.perf_counter()),
            return_when=asyncio.FIRST_COMPLETED,
        )
    finally:
        if watch is not None and not watch.done():
            watch.cancel()
    if watch is not None and watch.done() and not watch.cancelled() and not job.finished:
        # The client hung up: stop the search now and give its slot back.
        ticket.request_cancel()
        job.release_final()
        metrics.disconnects.inc()
        metrics.plans.labels(outcome="disconnected").inc()
        return None
    if job.finished:
        result = job.final or job.current()
        encoded = job.final_json
    else:
        # The search overran its deadline (a starved thread): stop it and answer with what
        # it has now. The worker may finish while this snapshot is taken: a waiting caller
        # never gets a "running" plan, whichever side won. A plan whose thread never even
        # started is opened here, for its instant route (microseconds), so that it still
        # answers with a route.
        if job.claim():
            ticket.instant_only = True
            engine.run_claimed(job, ticket)
        else:
            ticket.request_cancel()  # it stops at once, with what it has
            if job.best is None and not job.finished:
                # its thread started so late that it has not even recorded its instant route
                # (microseconds once it runs): wait for it, within the deadline tolerance
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(
                        asyncio.shield(waiter), settings.deadline_tolerance_ms / 2000.0
                    )
        result = dict(job.final or job.current())
        if result["status"] == "running":
            result["status"] = job.interim_status()
        encoded = None
        metrics.watchdog.inc()
    job.release_final()
    now = time.perf_counter()
    timings = dict(result["timings"])
    timings["total_ms"] = (now - arrival_s) * 1000.0
    _observe(state, job, result, timings, now)
    log_fields = {
        "plan_id": job.plan_id,
        "outcome": result["status"],
        "deadline_ms": body.deadline_ms,
        "queue_ms": round(timings["queue_ms"], 3),
        "search_ms": round(timings["search_ms"], 3),
        "gap": result["gap"],
        "caller": caller.label,
    }
    if result["status"] == "error":
        log_fields["error"] = result["error"]
        return _refusal(
            500,
            f"plan {job.plan_id} failed: {result['error']}. The service goes on serving; "
            "this is a fault of the service or its graph, not of the request",
            **log_fields,
        )
    if encoded is not None:
        content = with_timings(encoded, timings)
    else:
        content = dumps({**result, "timings": timings})
    return Answer(200, content, {"Server-Timing": _server_timing(timings)}, job=job, log=log_fields)


def _plan_done(state: AppState, caller: Caller, job: PlanJob) -> None:
    """On the search thread, when a plan's run ended: charge its caller, learn the floor."""
    ticket = job.ticket
    assert ticket is not None
    state.callers.release(caller, ticket.slot_s)
    if ticket.started_s is not None and not ticket.waited and not ticket.instant_only:
        state.floor.record_before(ticket.started_s, ticket.started_s - job.arrival_s)


def _headers(scope: Message) -> tuple[str | None, str | None]:
    content_type = api_key = None
    for key, value in scope.get("headers", ()):
        if key == b"content-type":
            content_type = value.decode("latin-1")
        elif key == API_KEY_HEADER.encode():
            api_key = value.decode("latin-1")
    return content_type, api_key


async def serve_create_plan(state: AppState, scope: Message, receive: Receive, send: Send) -> None:
    """``POST /v1/plans`` as a plain ASGI handler (see the module docstring)."""
    arrival_s = scope.get("state", {}).get("arrival_s") or time.perf_counter()
    settings = state.settings
    content_type, api_key = _headers(scope)
    client = scope.get("client")
    answer: Answer | None
    try:
        raw = await read_body(receive, settings.max_body_bytes, settings.body_timeout_s)
    except Disconnected:
        return
    except BodyTimeout:
        answer = _refusal(
            408, f"the request's body did not arrive within {settings.body_timeout_s:g} s"
        )
        answer.headers["Connection"] = "close"
    except BodyTooLarge as exc:
        answer = _refusal(413, str(exc))
        answer.headers["Connection"] = "close"
    else:
        try:
            answer = await answer_plan(
                state,
                arrival_s,
                content_type,
                raw,
                api_key,
                client[0] if client else None,
                receive,
            )
        except Exception as exc:
            log.exception("unhandled error", extra={"path": "/v1/plans"})
            answer = _refusal(500, f"internal error ({type(exc).__name__}); see the service log")
    if answer is None:  # the client hung up
        _log_request(arrival_s, 499, {"outcome": "disconnected"})
        return
    headers = [
        (b"content-type", b"application/json"),
        (b"content-length", str(len(answer.body)).encode()),
    ]
    headers += [(k.lower().encode(), v.encode()) for k, v in answer.headers.items()]
    await send({"type": "http.response.start", "status": answer.status, "headers": headers})
    await send({"type": "http.response.body", "body": answer.body})
    sent_s = time.perf_counter()
    job = answer.job
    if job is not None and job.search_end_s is not None and answer.status == 200:
        state.floor.record_after(sent_s, sent_s - job.search_end_s)
    _log_request(arrival_s, answer.status, answer.log, sent_s)


def _log_request(
    arrival_s: float, status: int, fields: dict[str, Any], now_s: float | None = None
) -> None:
    if log_edge.isEnabledFor(logging.INFO):
        now = time.perf_counter() if now_s is None else now_s
        line = {
            "method": "POST",
            "path": "/v1/plans",
            "status": status,
            "duration_ms": round((now - arrival_s) * 1000.0, 3),
        }
        line.update(fields)
        log_edge.info("request", extra=line)


@router.post(
    "/v1/plans",
    operation_id="create_plan",
    response_model=Plan,
    responses=_RESPONSES,
    summary="Plan a route answered by the deadline (or in the background)",
    description="With wait=true (the default) the answer is the plan, by arrival + "
    "deadline_ms + the documented tolerance, and it always carries a route for a reachable "
    "pair (the instant route when there was no time to search: status instant); it is "
    "stored for GET only with keep=true. A deadline below the service's measured floor is "
    "refused with 503 naming it. With wait=false the plan runs in the background (202): poll "
    "GET /v1/plans/{plan_id} or stream /v1/plans/{plan_id}/events; it is kept "
    "background_ttl_s after it finishes. Callers are told apart by X-API-Key (optional) or "
    "their address, each with limits (429). The body must be application/json: numbers as "
    "JSON numbers, each key once.",
)
async def create_plan(request: Request, state: StateDep) -> Response:
    """The same handler behind the framework (the app serves this path itself first)."""
    arrival_s: float = getattr(request.state, "arrival_s", None) or time.perf_counter()
    answer = await answer_plan(
        state,
        arrival_s,
        request.headers.get("content-type"),
        await request.body(),
        request.headers.get(API_KEY_HEADER),
        request.client.host if request.client else None,
        request.receive,
    )
    if answer is None:
        return Response(status_code=499)
    request.state.log = answer.log
    return Response(
        answer.body,
        status_code=answer.status,
        media_type="application/json",
        headers=answer.headers,
    )


def _server_timing(timings: dict[str, float]) -> str:
    """W3C Server Timing header: lets a load tester read timings without parsing the body."""
    return ", ".join(
        f"{name};dur={timings[f'{name}_ms']:.3f}" for name in ("queue", "search", "total")
    )


def _observe(
    state: AppState, job: PlanJob, result: dict[str, Any], timings: dict[str, float], now_s: float
) -> None:
    m = state.metrics
    m.plans.labels(outcome=result["status"]).inc()
    total_s = now_s - job.arrival_s
    m.latency.observe(total_s)
    m.overhead.observe(max(0.0, total_s - timings["search_ms"] / 1000.0))
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
        assert job.ticket is not None
        job.ticket.request_cancel()
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
