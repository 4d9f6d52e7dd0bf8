"""Operations: liveness, readiness (graph loaded + warmed up) and Prometheus metrics."""

from __future__ import annotations

import time

from fastapi import APIRouter, Response
from fastapi.responses import JSONResponse

from dueroute.service.server.deps import StateDep
from dueroute.service.server.schemas import Health

router = APIRouter(tags=["operations"])


@router.get("/healthz", response_model=Health, summary="The process is alive")
async def healthz(state: StateDep) -> JSONResponse:
    return JSONResponse(
        {"status": "alive", "detail": {"uptime_s": round(time.time() - state.started_wall, 1)}}
    )


@router.get(
    "/readyz",
    response_model=Health,
    responses={503: {"model": Health, "description": "still warming up, or warm-up failed"}},
    summary="Ready once the graph is loaded and the search kernel is warmed up",
)
async def readyz(state: StateDep) -> JSONResponse:
    detail = {
        "admission": state.admission.snapshot(),
        "loop_lag_ms": round(state.loop_lag.estimate_ms(), 3),
        **state.warmup,
    }
    if state.ready:
        return JSONResponse({"status": "ready", "detail": detail})
    status = "failed" if state.warmup_error is not None else "warming_up"
    if state.warmup_error is not None:
        detail["error"] = state.warmup_error
    return JSONResponse(status_code=503, content={"status": status, "detail": detail})


@router.get(
    "/metrics",
    response_class=Response,
    responses={200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
    summary="Prometheus metrics",
)
async def metrics(state: StateDep) -> Response:
    m = state.metrics
    m.busy_workers.set(state.admission.busy)
    m.queued.set(state.admission.queued)
    m.background.set(len(state.plans))
    m.loop_lag.set(state.loop_lag.estimate_ms() / 1000.0)
    return Response(m.render(), media_type=m.content_type)
