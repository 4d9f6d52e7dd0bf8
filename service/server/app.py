"""Build the FastAPI app: state, middleware, error shapes, routers, start-up warm-up.

``create_app(settings)`` builds an independent app (own metrics registry, worker pool, plan
store and policy store), so tests can run several side by side. ``dueroute serve`` calls it
with the settings from the environment and flags.

Start-up order: settings are validated and the policy store chooses the active policy before
the server accepts connections (a bad ``--policy`` stops the start with a message); loading the
graph, the landmarks and the JIT warm-up searches then run in a background thread, during
which ``/healthz`` answers and ``/readyz`` and ``POST /v1/plans`` say 503 "warming up".
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import gc
import json
import logging
import re
import sys
import time
import weakref
from collections.abc import AsyncIterator, Awaitable, Callable, MutableMapping
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

from fastapi import FastAPI, HTTPException, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from dueroute.planner.errors import InvalidRequest
from dueroute.policies.runtime import DEFAULT_POLICY_PATH
from dueroute.service.server.admission import Admission, ResponseFloor
from dueroute.service.server.callers import CallerLimits, load_api_keys
from dueroute.service.server.deps import AppState
from dueroute.service.server.http_edge import BodyTooLarge
from dueroute.service.server.jobs import PlanningEngine
from dueroute.service.server.messages import validation_message
from dueroute.service.server.metrics import ServiceMetrics
from dueroute.service.server.redis_state import RedisShared
from dueroute.service.server.settings import Settings, get_settings
from dueroute.service.server.shared_state import (
    SharedCallerLimits,
    SharedState,
    SharedStoreDown,
)

log = logging.getLogger("dueroute.service")

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]

#: The interpreter's thread switch interval while serving (see ``warm_up``).
GIL_SWITCH_INTERVAL_S = 0.001

#: Shipped default policy (may not exist yet: then ``learned`` uses the fallback controller).
DEFAULT_POLICY = DEFAULT_POLICY_PATH

# ------------------------------------------------------------------------------------------
# Structured logs


class JsonLogFormatter(logging.Formatter):
    """One JSON object per line: time, level, logger, message and any ``extra`` fields."""

    _std = set(vars(logging.makeLogRecord({}))) | {"message", "asctime"}

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": record.getMessage(),
        }
        for key, value in vars(record).items():
            if key not in self._std and not key.startswith("_"):
                out[key] = value
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return json.dumps(out, default=str)


class _StderrHandler(logging.StreamHandler):
    """Writes to whatever ``sys.stderr`` is at the time (test runners swap it)."""

    @property
    def stream(self) -> Any:
        return sys.stderr

    @stream.setter
    def stream(self, value: Any) -> None:
        pass


def configure_logging(level: str = "info", as_json: bool = True) -> None:
    """Send ``dueroute.*`` logs to stderr, as JSON lines unless ``as_json`` is false."""
    root = logging.getLogger("dueroute")
    handler = _StderrHandler()
    handler.setFormatter(
        JsonLogFormatter() if as_json else logging.Formatter("%(levelname)s %(name)s %(message)s")
    )
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False


# ------------------------------------------------------------------------------------------
# Edge middleware: arrival time, body limit, access log (pure ASGI: no per-request task)


class EdgeMiddleware:
    """Stamps the arrival time, enforces the body limit (413) and writes one log line."""

    def __init__(self, app: Any, settings: Settings) -> None:
        self.app = app
        self.settings = settings

    def _limit(self, scope: Scope) -> int:
        if scope.get("path") == "/v1/policy" and scope.get("method") == "PUT":
            return self.settings.max_policy_bytes
        if scope.get("path") == "/v1/traffic" and scope.get("method") == "POST":
            return self.settings.max_traffic_bytes
        return self.settings.max_body_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        stamped = scope.setdefault("state", {}).get("arrival_s")
        arrival_s = stamped if stamped else time.perf_counter()
        scope["state"]["arrival_s"] = arrival_s
        limit = self._limit(scope)
        status = {"code": 0}

        async def send_logged(message: Message) -> None:
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        length = None
        for key, value in scope.get("headers", []):
            if key == b"content-length":
                with contextlib.suppress(ValueError):
                    length = int(value)
        if length is not None and length > limit:
            await _too_large(send_logged, length, limit)
        else:
            received = 0
            body_done = False
            body_by = time.perf_counter() + self.settings.body_timeout_s

            async def receive_limited() -> Message:
                nonlocal received, body_done
                if body_done:
                    return await receive()
                try:
                    async with asyncio.timeout(max(0.0, body_by - time.perf_counter())):
                        message = await receive()
                except TimeoutError:
                    raise HTTPException(
                        status_code=408,
                        detail="the request's body did not arrive within "
                        f"{self.settings.body_timeout_s:g} s",
                        headers={"Connection": "close"},
                    ) from None
                body_done = message["type"] != "http.request" or not message.get("more_body")
                if message["type"] == "http.request":
                    received += len(message.get("body", b""))
                    if received > limit:
                        raise HTTPException(
                            status_code=413, detail=_too_large_text(received, limit)
                        )
                return message

            await self.app(scope, receive_limited, send_logged)
        if log.isEnabledFor(logging.INFO):
            fields = {
                "method": scope.get("method"),
                "path": scope.get("path"),
                "status": status["code"],
                "duration_ms": round((time.perf_counter() - arrival_s) * 1000.0, 3),
            }
            fields.update(scope["state"].get("log") or {})  # what the handler adds (plan id, ...)
            log.info("request", extra=fields)


def _too_large_text(size: int, limit: int) -> str:
    return str(BodyTooLarge(size, limit))


async def _too_large(send: Send, size: int, limit: int) -> None:
    body = json.dumps({"detail": _too_large_text(size, limit)}).encode()
    await send(
        {
            "type": "http.response.start",
            "status": 413,
            "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(body)).encode()),
                (b"connection", b"close"),
            ],
        }
    )
    await send({"type": "http.response.body", "body": body})


def _caller_limits(settings: Settings, shared: SharedState | None = None) -> CallerLimits:
    keys: dict[str, str] = {}
    if settings.api_keys_file is not None:
        try:
            keys = load_api_keys(settings.api_keys_file)
        except OSError as exc:
            raise InvalidRequest(
                f"cannot read the API keys file {settings.api_keys_file}: {exc.strerror or exc}"
            ) from None
        except ValueError as exc:  # says the line and what a line must be
            raise InvalidRequest(f"the API keys file is not valid: {exc}") from None
    cpu = settings.caller_cpu_ms_per_s
    # with a shared store, a caller's search-time budget holds across replicas
    make: Any = CallerLimits
    if shared is not None and shared.backend != "memory":
        make = functools.partial(SharedCallerLimits, shared.usage)
    return make(
        api_keys=keys,
        max_plans=settings.caller_max_plans,
        cpu_ms_per_s=cpu if cpu is not None else 1000.0 * settings.workers,
        cpu_burst_ms=settings.caller_cpu_burst_ms,
        anonymous_max_deadline_ms=settings.anonymous_max_deadline_ms,
        anonymous_slow_max_ms=settings.anonymous_slow_max_ms,
        anonymous_max_weight=settings.anonymous_max_weight,
    )


class DuerouteApp(FastAPI):
    """The FastAPI app, with ``POST /v1/plans`` served by a lean ASGI handler.

    The plans endpoint is the one with a deadline: it skips the framework's middleware,
    routing and dependency layers (about 0.2 ms a request here) and is served by
    :func:`dueroute.service.server.routes.plans.serve_create_plan`, which does everything the
    edge middleware does for the other endpoints (body limit and timeout, request log). The
    FastAPI route of the same path stays, for the published OpenAPI document.
    """

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and scope["method"] == "POST" and scope["path"] == "/v1/plans":
            from dueroute.service.server.routes.plans import serve_create_plan

            scope["app"] = self
            await serve_create_plan(self.state.dueroute, scope, receive, send)
            return
        await super().__call__(scope, receive, send)


# ------------------------------------------------------------------------------------------
# Warm-up


def warm_up(state: AppState) -> None:
    """Load the graph and landmarks, build the planner, run the JIT warm-up searches.

    Runs on a thread at start-up; sets ``state.engine`` and ``state.ready`` when done.
    """
    from dueroute.demo_data.build import resolve_graph_path
    from dueroute.planner.heuristics import load_or_build_landmarks
    from dueroute.planner.session import Planner

    t0 = time.perf_counter()
    settings = state.settings
    from dueroute.planner.graph import load_graph

    graph = load_graph(resolve_graph_path(settings.graph))
    t_graph = time.perf_counter()
    profile = settings.turn_profile
    landmarks = (
        load_or_build_landmarks(graph, progress=False, turn_profile=profile)
        if settings.landmarks
        else None
    )
    t_lm = time.perf_counter()
    planner = Planner(graph, landmarks=landmarks, turn_profile=profile)
    planner.warm_up()
    if graph.n_nodes:  # builds the snapping k-d tree now, not inside the first request
        from dueroute.planner.snap import snap_to_road

        snap_to_road(graph, float(graph.lat[0]), float(graph.lon[0]), settings.snap_max_m)
    engine = PlanningEngine(graph, planner, steps=settings.steps)
    state.policies.set_graph(graph.fingerprint, str(graph.meta.get("name") or ""))
    from dueroute.service.server.traffic_store import LiveTraffic

    t_traffic = time.perf_counter()
    traffic = LiveTraffic(
        graph,
        landmarks,
        state.shared.traffic_store(graph.fingerprint),
        poll_s=settings.traffic_poll_s,
        background_nice=19 if settings.worker_nice else 0,
        turn_profile=profile,
    )
    traffic.start()  # replays the journal: the same version and costs as before a restart
    state.shared.watch_traffic(traffic.sync)  # another replica's batch: applied at once
    engine.traffic = traffic
    state.traffic = traffic
    # Every worker thread runs the warm-up searches at once: threads exist, numba has
    # compiled, and the planner holds one workspace per worker before the first request.
    t_done_traffic = time.perf_counter()
    searches = sum(
        state.admission.prestart(lambda: _warmup_searches(engine, state, settings.warmup_searches))
    )
    t_done = time.perf_counter()
    state.warmup = {
        # names and fingerprints only: no server paths in public answers
        "graph": Path(str(graph.path)).name if graph.path is not None else settings.graph,
        "graph_name": graph.meta.get("name"),
        "nodes": graph.n_nodes,
        "edges": graph.n_edges,
        "graph_fingerprint": graph.fingerprint,
        "load_graph_ms": round((t_graph - t0) * 1000.0, 1),
        "landmarks": landmarks.count if landmarks is not None else 0,
        "landmarks_ms": round((t_lm - t_graph) * 1000.0, 1),
        "warmup_ms": round((t_done - t_lm) * 1000.0, 1),
        "warmup_searches": searches,
        "traffic_version": traffic.current.version,
        "turn_profile": profile.describe(),
        "traffic_replay_ms": round((t_done_traffic - t_traffic) * 1000.0, 1),
    }
    # Collect start-up garbage once and move everything alive now out of the collector's
    # view (gc.freeze), so no full collection of import-time objects stalls a request later.
    gc.collect()
    gc.freeze()
    _watch_gc(state)
    # The search threads hold the GIL only between kernel calls, but a thread that wants it
    # waits up to the switch interval (5 ms by default) for a holder that does not block:
    # an answer's JSON or a new request's parsing then waits behind a search's Python. A
    # short interval hands the GIL over sooner, at a small cost in throughput.
    sys.setswitchinterval(GIL_SWITCH_INTERVAL_S)
    state.engine = engine
    state.ready = True
    state.metrics.ready.set(1)
    log.info("ready", extra=state.warmup)


#: Metrics of every live app; one process-wide collector callback feeds them all.
_GC_METRICS: weakref.WeakSet[ServiceMetrics] = weakref.WeakSet()
_GC_STARTED: dict[str, float] = {}


def _on_gc(phase: str, info: dict[str, Any]) -> None:
    """Time every garbage collection (a pause for all threads); log the long ones."""
    if phase == "start":
        if _GC_METRICS:  # only while an app lives in this process
            _GC_STARTED["t"] = time.perf_counter()
        return
    t0 = _GC_STARTED.pop("t", None)
    if t0 is None:
        return
    pause_s = time.perf_counter() - t0
    generation = str(info.get("generation"))
    for metrics in list(_GC_METRICS):
        metrics.gc_pause.labels(generation=generation).observe(pause_s)
    if pause_s > 0.005:
        log.warning(
            "long garbage-collector pause",
            extra={"pause_ms": round(pause_s * 1000.0, 2), "generation": generation},
        )


def _watch_gc(state: AppState) -> None:
    _GC_METRICS.add(state.metrics)
    if _on_gc not in gc.callbacks:
        gc.callbacks.append(_on_gc)


def _warmup_searches(engine: PlanningEngine, state: AppState, count: int) -> int:
    """Run ``count`` searches per controller kind so numba compiles before the first request."""
    import numpy as np

    from dueroute.planner.session import plan

    graph = engine.graph
    if graph.n_nodes < 2 or count <= 0:
        return 0
    comp = np.asarray(graph.component)
    biggest = int(np.bincount(comp).argmax())
    nodes = np.flatnonzero(comp == biggest)
    rng = np.random.default_rng()
    active = state.policies.active
    specs = ["decreasing", "ana", "learned" if active.policy is not None else "fixed:2"]
    done = 0
    for spec in specs:
        for _ in range(count):
            o, d = (int(x) for x in rng.choice(nodes, size=2))
            controller = engine.make_controller(spec, active.policy)
            plan(engine.planner, o, d, deadline_ms=50.0, controller=controller, steps=engine.steps)
            done += 1
    # Then the whole path of a plan (the improvement records, the route's GeoJSON, the JSON),
    # waited and stored, so the first requests do not pay for what runs once.
    from dueroute.service.server.admission import Ticket
    from dueroute.service.server.jobs import PlanJob

    for kept in (False, True) * max(1, count):
        o, d = (int(x) for x in rng.choice(nodes, size=2))
        now = time.perf_counter()
        ticket = Ticket(0, now, now + 0.05)
        job = PlanJob(
            plan_id="warm-up",
            origin_node=o,
            destination_node=d,
            deadline_ms=50,
            controller="decreasing",
            wait=not kept,
            arrival_s=now,
            search_deadline_s=now + 0.05,
            policy_sha256=None,
            ticket=ticket,
            graph=graph,
            kept=kept,
        )
        engine.run(job, ticket)
        done += 1
    return done


# ------------------------------------------------------------------------------------------
# App factory


def create_app(settings: Settings | None = None) -> FastAPI:
    """A new app. ``settings`` default: :func:`get_settings` (environment, validated now)."""
    settings = settings if settings is not None else get_settings()
    metrics = ServiceMetrics()
    shared = RedisShared(settings) if settings.redis_url is not None else SharedState(settings)
    shared.start()  # the shared store (if any) before the policy: its pointer wins
    policies = shared.policy_store(
        on_adopt=lambda snap: metrics.set_policy(snap.sha256, snap.source, snap.fallback_controller)
    )
    # Choose the active policy now: a bad --policy file (or, with on_damaged_policy=refuse, a
    # damaged stored one) fails the start, loudly.
    active = policies.startup(settings.policy, DEFAULT_POLICY if settings.shipped_policy else None)
    metrics.set_policy(active.sha256, active.source, active.fallback_controller)
    metrics.policy_damaged.set(len(policies.damaged))
    state = AppState(
        settings=settings,
        metrics=metrics,
        admission=Admission(
            settings.workers,
            settings.min_search_ms,
            worker_nice=settings.worker_nice,
            max_inflight=settings.max_in_flight,
        ),
        callers=_caller_limits(settings, shared),
        floor=ResponseFloor(initial_before_ms=0.5, initial_after_ms=settings.response_headroom_ms),
        plans=shared.plans,
        policies=policies,
        shared=shared,
    )

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # Counted, so an app whose lifespan is entered twice (a test client per call inside a
        # running one) warms up once and shuts its worker pool down only after the last exit.
        state.lifespans += 1
        if not state.tasks:
            state.tasks.append(asyncio.create_task(_warm(state)))
            state.tasks.append(asyncio.create_task(_sweep(state)))
            state.tasks.append(asyncio.create_task(state.loop_lag.run()))
        try:
            yield
        finally:
            state.lifespans -= 1
            if state.lifespans == 0:
                await _shutdown(state)

    app = DuerouteApp(
        title="dueroute",
        version="1",
        summary="Best road route by a deadline, with a proven lower bound and gap.",
        lifespan=lifespan,
        docs_url=None,  # served below from the packaged Swagger UI, not a CDN
        redoc_url=None,
    )
    app.state.dueroute = state

    @app.exception_handler(RequestValidationError)
    async def _on_validation(request: Request, exc: RequestValidationError) -> JSONResponse:
        if request.url.path == "/v1/plans":
            state.metrics.plans.labels(outcome="rejected").inc()
        return JSONResponse(
            status_code=422, content={"detail": validation_message(list(exc.errors()), settings)}
        )

    @app.exception_handler(StarletteHTTPException)
    async def _on_http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        headers = dict(getattr(exc, "headers", None) or {})
        if exc.status_code == 405:
            # One path may be served by several routes (GET and DELETE /v1/plans/{id}): list
            # every method allowed on it (RFC 9110 section 15.5.6), not the first route's only.
            allowed = sorted(_allowed_methods(routes_table, request.scope.get("path", "")))
            headers["Allow"] = ", ".join(allowed)
            detail = f"method {request.method} is not allowed here; allowed: {', '.join(allowed)}"
            return JSONResponse(status_code=405, content={"detail": detail}, headers=headers)
        detail = exc.detail if isinstance(exc.detail, str) else json.dumps(exc.detail)
        return JSONResponse(
            status_code=exc.status_code, content={"detail": detail}, headers=headers or None
        )

    @app.exception_handler(SharedStoreDown)
    async def _on_shared_down(request: Request, exc: SharedStoreDown) -> JSONResponse:
        headers = {"Retry-After": str(exc.retry_after_s)}
        return JSONResponse(status_code=503, content={"detail": str(exc)}, headers=headers)

    @app.exception_handler(Exception)
    async def _on_error(request: Request, exc: Exception) -> JSONResponse:
        log.exception("unhandled error", extra={"path": request.url.path})
        return JSONResponse(
            status_code=500,
            content={"detail": f"internal error ({type(exc).__name__}); see the service log"},
        )

    from dueroute.service.server.routes import docs, health, plans, policy, traffic

    routers = (plans.router, policy.router, traffic.router, health.router, docs.router)
    for router in routers:
        app.include_router(router)
    docs.mount_assets(app)
    routes_table = _route_table(app, routers)
    base_openapi = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            finish_openapi(base_openapi())
        return app.openapi_schema  # type: ignore[return-value]

    app.openapi = openapi  # type: ignore[method-assign]
    app.add_middleware(EdgeMiddleware, settings=settings)
    return app


def _route_table(app: FastAPI, routers: Any) -> list[tuple[Any, set[str]]]:
    """(path regex, methods) of every route: the app's own and each router's."""
    table: list[tuple[Any, set[str]]] = []
    candidates = list(app.router.routes)
    for router in routers:
        candidates += list(router.routes)
    for route in candidates:
        regex = getattr(route, "path_regex", None)
        methods = getattr(route, "methods", None)
        if regex is not None and methods:
            table.append((regex, set(methods)))
    return table


def _allowed_methods(table: list[tuple[Any, set[str]]], path: str) -> set[str]:
    methods: set[str] = set()
    for regex, route_methods in table:
        if regex.match(path):
            methods |= route_methods
    return methods


# ------------------------------------------------------------------------------------------
# The published OpenAPI document: what FastAPI generates, made to match every answer


def _component_schemas(model: Any) -> dict[str, Any]:
    """``model``'s JSON Schema and those it refers to, keyed for ``components.schemas``."""
    schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
    defs = schema.pop("$defs", {})
    return {model.__name__: schema, **defs}


def finish_openapi(spec: dict[str, Any]) -> None:
    """Fix up FastAPI's document in place so that it says what the service sends.

    * every 422 answer is an :class:`ErrorBody` (one message string), as the handler sends,
      not FastAPI's default list of errors;
    * ``POST /v1/plans`` reads its body itself (strict JSON, see ``json_body``): its request
      body is published from :class:`PlanRequest`;
    * the event stream is ``text/event-stream``, each event described with its ``data``
      shape (``ImprovementEvent``, ``Plan``);
    * the admin endpoints name their bearer token; a new background plan links to what can
      be done with its id.
    """
    from dueroute.service.server.schemas import ImprovementEvent, PlanRequest

    schemas = spec.setdefault("components", {}).setdefault("schemas", {})
    error_ref = {"$ref": "#/components/schemas/ErrorBody"}
    for ops in spec.get("paths", {}).values():
        for op in ops.values():
            invalid = op.get("responses", {}).get("422")
            if invalid is not None:
                invalid["content"] = {"application/json": {"schema": error_ref}}
                if invalid.get("description") == "Validation Error":
                    invalid["description"] = "a parameter or the body does not match the schema"
    for name in ("HTTPValidationError", "ValidationError"):
        schemas.pop(name, None)
    schemas.update(_component_schemas(PlanRequest))
    schemas.update(_component_schemas(ImprovementEvent))
    create = spec["paths"]["/v1/plans"]["post"]
    create["requestBody"] = {
        "required": True,
        "content": {"application/json": {"schema": {"$ref": "#/components/schemas/PlanRequest"}}},
    }
    # OpenAPI links: what a client (or a stateful tester) does with a new plan's id
    plan_id = {"plan_id": "$response.body#/plan_id"}
    create["responses"]["202"]["links"] = {
        name: {"operationId": op, "parameters": plan_id, "description": text}
        for name, op, text in (
            ("poll", "get_plan", "the plan as it runs and once it finished"),
            ("events", "plan_events", "its improvements as Server-Sent Events"),
            ("cancel", "cancel_plan", "stop it"),
        )
    }
    stream = spec["paths"]["/v1/plans/{plan_id}/events"]["get"]["responses"]["200"]

    # One event of the stream (OpenAPI 3.1 has no itemSchema yet: for text/event-stream the
    # schema describes each event, as OpenAPI 3.2 spells out); data is JSON whose shape
    # contentSchema gives (JSON Schema 2020-12, section 8.5).
    def event(kind: str, data_ref: str, id_text: str) -> dict[str, Any]:
        return {
            "type": "object",
            "required": ["event", "id", "data"],
            "properties": {
                "event": {"const": kind},
                "id": {"type": "string", "pattern": "^[0-9]+$", "description": id_text},
                "data": {
                    "type": "string",
                    "contentMediaType": "application/json",
                    "contentSchema": {"$ref": f"#/components/schemas/{data_ref}"},
                },
            },
        }

    stream["content"] = {
        "text/event-stream": {
            "schema": {
                "description": "Server-Sent Events (WHATWG HTML): `improvement` events in "
                "the order found, then one `final` event; `: keep-alive` comments every 15 s "
                "while nothing happens",
                "oneOf": [
                    event("improvement", "ImprovementEvent", "the improvement's ordinal"),
                    event("final", "Plan", "the number of improvements"),
                ],
            },
            "example": 'id: 0\nevent: improvement\ndata: {"elapsed_ms":0.4,"expansions":'
            '120,"cost_s":812.5,"lower_bound_s":640.2,"gap":0.212,"weight":2.0,"route":'
            '{"travel_time_s":812.5,"length_m":9120.0,"node_count":88}}\n\n'
            'id: 1\nevent: final\ndata: {"plan_id":"...","status":"optimal",...}\n\n',
        }
    }
    spec.setdefault("components", {})["securitySchemes"] = {
        "admin_token": {
            "type": "http",
            "scheme": "bearer",
            "description": "the admin token (DUEROUTE_ADMIN_TOKEN or --admin-token-file)",
        }
    }
    for path, method in (("/v1/policy", "put"), ("/v1/policy/rollback", "post")):
        spec["paths"][path][method]["security"] = [{"admin_token": []}]


async def _shutdown(state: AppState) -> None:
    _GC_METRICS.discard(state.metrics)  # a stopped app no longer times or logs collections
    loop = asyncio.get_running_loop()
    mine = [t for t in state.tasks if t.get_loop() is loop]
    for task in state.tasks:
        if task in mine:
            task.cancel()
        else:
            with contextlib.suppress(RuntimeError):  # that loop is already closed
                task.get_loop().call_soon_threadsafe(task.cancel)
    for task in mine:
        with contextlib.suppress(asyncio.CancelledError, Exception):
            await task
    state.tasks.clear()
    if state.traffic is not None:
        await asyncio.to_thread(state.traffic.stop)
    await asyncio.to_thread(state.admission.shutdown)
    await state.shared.aclose()
    await asyncio.to_thread(state.shared.stop)


async def _warm(state: AppState) -> None:
    if state.ready:  # a second lifespan of the same app: already warm
        return
    state.warmup_error = None
    try:
        await asyncio.to_thread(warm_up, state)
        # The warm-up (JIT, a full collection) stalled the loop; that says nothing about
        # serving, so the lag estimate starts afresh.
        state.loop_lag.reset()
    except Exception as exc:  # keep serving /healthz; /readyz reports the reason
        full = f"{type(exc).__name__}: {exc}"
        state.warmup_error = public_text(full)
        log.error("warm-up failed", extra={"error": full})


_DIRECTORIES = re.compile(r"(?:~|\.{1,2})?(?:/[^/\s:;'\"(),]+)+/(?=[^/\s:;'\"(),]+)")


def public_text(text: str) -> str:
    """``text`` with directories left out of every file path (``/srv/g/x.npz`` -> ``x.npz``),
    for answers anyone may read; the log keeps the full text."""
    return _DIRECTORIES.sub("", text)


async def _sweep(state: AppState) -> None:
    """Expire finished plans once a second, and keep the gauges current."""
    while True:
        await asyncio.sleep(1.0)
        state.plans.expire()
        state.metrics.observe_store(state.plans.stats())
        state.metrics.loop_lag.set(state.loop_lag.estimate_ms() / 1000.0)
