"""``/v1/policy``: the active weight policy; upload (with dry run) and rollback for admins."""

from __future__ import annotations

import asyncio

from fastapi import APIRouter, Query, Request
from fastapi.responses import JSONResponse

from dueroute.service.server.deps import AdminDep, StateDep
from dueroute.service.server.json_body import BodyError, check_media_type
from dueroute.service.server.policy_store import NothingToRollBack, PolicyRejected
from dueroute.service.server.schemas import ErrorBody, PolicyInfo, PolicyRefused

router = APIRouter(tags=["policy"])

_ADMIN_RESPONSES: dict[int | str, dict[str, object]] = {
    401: {"model": ErrorBody, "description": "missing or wrong bearer token"},
    404: {"model": ErrorBody, "description": "policy administration is disabled (no token)"},
}


@router.get(
    "/v1/policy",
    operation_id="get_policy",
    response_model=PolicyInfo,
    summary="The active policy's metadata",
    description="Also the policy a rollback would return to (previous_sha256) and any stored "
    "policy file found damaged at start-up (damaged), with what the service did about it.",
)
async def get_policy(state: StateDep) -> JSONResponse:
    return JSONResponse(state.policies.info())


@router.put(
    "/v1/policy",
    operation_id="put_policy",
    response_model=PolicyInfo,
    responses={
        **_ADMIN_RESPONSES,
        400: {"model": PolicyRefused, "description": "the file was refused; every problem"},
        413: {"model": ErrorBody, "description": "file larger than the policy size limit"},
        415: {"model": ErrorBody, "description": "Content-Type is not application/octet-stream"},
    },
    summary="Upload an ONNX policy: validated like 'dueroute policy check', then swapped in",
    description="The body is the .onnx file as application/octet-stream. Uploading a policy "
    "whose stored file was found damaged rewrites the file.",
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
    content_type = request.headers.get("content-type")
    if content_type is not None:  # none: RFC 9110 lets the recipient assume octet-stream
        try:
            check_media_type(content_type, "application/octet-stream")
        except BodyError as exc:
            return JSONResponse(status_code=exc.status, content={"detail": exc.detail})
    data = await request.body()
    store = state.policies
    try:
        # Validation and ONNX session creation take milliseconds: keep them off the event loop.
        if dry_run:
            info = await asyncio.to_thread(store.dry_run, data)
        else:
            snap = await asyncio.to_thread(store.swap, data)
            info = store.info(snap)
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
        state.metrics.policy_damaged.set(len(store.damaged))
    return JSONResponse(info)


@router.post(
    "/v1/policy/rollback",
    operation_id="rollback_policy",
    response_model=PolicyInfo,
    responses={**_ADMIN_RESPONSES, 409: {"model": ErrorBody, "description": "no earlier policy"}},
    description="Good history entries only: a stored file that fails its sha256 or the "
    "policy check is skipped.",
    summary="Re-activate the policy that was active before the current one",
)
async def rollback_policy(state: StateDep, _admin: AdminDep) -> JSONResponse:
    try:
        snap = await asyncio.to_thread(state.policies.rollback)
    except NothingToRollBack as exc:
        return JSONResponse(status_code=409, content={"detail": str(exc)})
    state.metrics.policy_swaps.labels(result="rolled_back").inc()
    state.metrics.set_policy(snap.sha256, snap.source, snap.fallback_controller)
    return JSONResponse(state.policies.info(snap))
