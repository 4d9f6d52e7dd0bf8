"""``/v1/policy``: the active weight policy; upload (with dry run) and rollback for admins."""

from __future__ import annotations

import asyncio

from fastapi import APIRouter, Query, Request
from fastapi.responses import JSONResponse

from dueroute.service.server.deps import AdminDep, StateDep
from dueroute.service.server.policy_store import NothingToRollBack, PolicyRejected
from dueroute.service.server.schemas import ErrorBody, PolicyInfo

router = APIRouter(tags=["policy"])

_ADMIN_RESPONSES: dict[int | str, dict[str, object]] = {
    400: {"model": ErrorBody, "description": "the file was refused; every problem is listed"},
    401: {"model": ErrorBody, "description": "missing or wrong bearer token"},
    404: {"model": ErrorBody, "description": "policy administration is disabled (no token)"},
    413: {"model": ErrorBody, "description": "file larger than the policy size limit"},
}


@router.get("/v1/policy", response_model=PolicyInfo, summary="The active policy's metadata")
async def get_policy(state: StateDep) -> JSONResponse:
    return JSONResponse(state.policies.active.info())


@router.put(
    "/v1/policy",
    response_model=PolicyInfo,
    responses=_ADMIN_RESPONSES,
    summary="Upload an ONNX policy: validated like 'dueroute policy check', then swapped in",
    openapi_extra={
        "requestBody": {
            "required": True,
            "content": {
                "application/octet-stream": {"schema": {"type": "string", "format": "binary"}}
            },
        }
    },
)
async def put_policy(
    request: Request,
    state: StateDep,
    _admin: AdminDep,
    dry_run: bool = Query(False, description="validate and describe only; do not activate"),
) -> JSONResponse:
    data = await request.body()
    store = state.policies
    try:
        # Validation and ONNX session creation take milliseconds: keep them off the event loop.
        if dry_run:
            info = await asyncio.to_thread(store.dry_run, data)
        else:
            snap = await asyncio.to_thread(store.swap, data)
            info = snap.info()
    except PolicyRejected as exc:
        state.metrics.policy_swaps.labels(result="refused").inc()
        return JSONResponse(
            status_code=400,
            content={
                "detail": "policy refused, the active policy is unchanged: "
                + "; ".join(exc.problems),
                "problems": exc.problems,
            },
        )
    if not dry_run:
        active = store.active
        state.metrics.policy_swaps.labels(result="swapped").inc()
        state.metrics.set_policy(active.sha256, active.source, active.fallback_controller)
    return JSONResponse(info)


@router.post(
    "/v1/policy/rollback",
    response_model=PolicyInfo,
    responses={**_ADMIN_RESPONSES, 409: {"model": ErrorBody, "description": "no earlier policy"}},
    summary="Re-activate the policy that was active before the current one",
)
async def rollback_policy(state: StateDep, _admin: AdminDep) -> JSONResponse:
    try:
        snap = await asyncio.to_thread(state.policies.rollback)
    except NothingToRollBack as exc:
        return JSONResponse(status_code=409, content={"detail": str(exc)})
    state.metrics.policy_swaps.labels(result="rolled_back").inc()
    state.metrics.set_policy(snap.sha256, snap.source, snap.fallback_controller)
    return JSONResponse(snap.info())
