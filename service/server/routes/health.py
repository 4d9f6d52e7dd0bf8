"""Operations: liveness, readiness (graph loaded + warmed up) and Prometheus metrics."""

from __future__ import annotations

import time

from fastapi import APIRouter, Response
from fastapi.responses import JSONResponse

from dueroute.service.server.deps import StateDep
from dueroute.service.server.schemas import Health

router = APIRouter(tags=["operations"])


@router.get(
    "/healthz", operation_id="healthz", response_model=Health, summary="The process is alive"
)
async def healthz(state: StateDep) -> JSONResponse:
    return JSONResponse(
        {"status": "alive", "detail": {"uptime_s": round(time.time() - state.started_wall, 1)}}
    )


@router.get(
    "/readyz",
    operation_id="readyz",
    response_model=Health,
    responses={
        503: {
            "model": Health,
            "description": "still warming up (status warming_up), or the warm-up failed "
            "(status failed, detail.error says why, naming the file and array)",
        }
    },
    summary="Ready once the graph is loaded and the search kernel is warmed up",
)
async def readyz(state: StateDep) -> JSONResponse:
    detail = {
        "admission": state.admission.snapshot(),
        "plan_store": state.plans.stats(),
        "floor": state.floor.snapshot(),
        "callers": state.callers.snapshot(),
        "loop_lag_ms": round(state.loop_lag.estimate_ms(), 3),
        **state.warmup,
    }
    damaged = state.policies.damaged
    if damaged:  # served, but an operator must know: the stored policy was not usable
        detail["policy_damaged"] = damaged
    if state.ready:
        return JSONResponse({"status": "ready", "detail": detail})
    status = "failed" if state.warmup_error is not None else "warming_up"
    if state.warmup_error is not None:
        detail["error"] = state.warmup_error
    return JSONResponse(status_code=503, content={"status": status, "detail": detail})


@router.get(
    "/metrics",
    operation_id="metrics",
    response_class=Response,
    responses={200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
    summary="Prometheus metrics",
)
async def metrics(state: StateDep) -> Response:
    m = state.metrics
    m.busy_workers.set(state.admission.busy)
    m.queued.set(state.admission.queued)
    m.observe_store(state.plans.stats())
    m.loop_lag.set(state.loop_lag.estimate_ms() / 1000.0)
    return Response(m.render(), media_type=m.content_type)
