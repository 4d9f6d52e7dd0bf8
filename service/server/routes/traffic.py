"""``/v1/traffic``: live travel times. Read for everyone; add a batch or clear for admins.

A batch is one JSON document ``{"updates": [...]}`` (the format is the ``planner/traffic.py``
docstring). It is validated against the graph, journaled durably (``traffic_store.py``) and
published as a new cost version before the answer is sent; plans that start afterwards search
on it, plans already running finish on the version they started with.
"""

from __future__ import annotations

import asyncio
import json
from typing import Annotated, Any

from fastapi import APIRouter, Depends, HTTPException, Query, Request
from fastapi.responses import JSONResponse
from pydantic import BaseModel, ConfigDict, Field

from dueroute.planner.traffic import TrafficDocumentError
from dueroute.service.server.deps import AppState, StateDep, check_admin
from dueroute.service.server.schemas import ErrorBody

router = APIRouter(tags=["traffic"])


class TrafficUpdateInfo(BaseModel):
    model_config = ConfigDict(extra="allow")
    batch_version: int
    position: int
    selection: str
    change: str
    value: float | None
    edges: int
    expires_at: str | None
    label: str | None = None


class TrafficInfo(BaseModel):
    """The current cost version and what is in force."""

    model_config = ConfigDict(extra="allow")
    version: int = Field(description="0 = free-flow costs; plans name the version they used")
    at: str | None = Field(description="when the version's operation was journaled (RFC 3339)")
    active_updates: int
    updates_by_kind: dict[str, int] = Field(description="factor, speed_kph, travel_time_s, closed")
    next_expiry: str | None = Field(description="earliest expires_at of an active update")
    edges_changed: int
    edges_closed: int
    edges_faster: int
    bound_quality: str
    bound_note: str | None
    updates: list[TrafficUpdateInfo]


class TrafficAccepted(BaseModel):
    model_config = ConfigDict(extra="allow")
    batch_version: int | None = Field(description="the version this batch produced")
    dry_run: bool = False
    updates: int
    traffic: TrafficInfo


_EXAMPLE = {
    "updates": [
        {"from_node": 10, "to_node": 11, "factor": 2.5, "expires_in_s": 1800},
        {"osm_way": 4242, "closed": True, "expires_at": "2030-01-31T18:00:00Z"},
        {
            "area": {
                "type": "Polygon",
                "coordinates": [
                    [[-31.30, 47.23], [-31.27, 47.23], [-31.27, 47.25], [-31.30, 47.23]]
                ],
            },
            "speed_kph": 20,
        },
        {
            "along": {"type": "LineString", "coordinates": [[-31.30, 47.23], [-31.25, 47.24]]},
            "buffer_m": 25,
            "direction": "forward",
            "factor": 0.8,
        },
    ]
}

_ADMIN_RESPONSES: dict[int | str, dict[str, Any]] = {
    401: {"model": ErrorBody, "description": "missing or wrong bearer token"},
    404: {"model": ErrorBody, "description": "traffic administration is disabled (no token)"},
    503: {"model": ErrorBody, "description": "still warming up (the graph is not loaded yet)"},
}


async def require_traffic_admin(request: Request, state: StateDep) -> None:
    """The policy endpoints' bearer-token check, with a message that names traffic."""
    try:
        check_admin(request, state)
    except HTTPException as exc:
        if exc.status_code == 404:
            raise HTTPException(
                status_code=404,
                detail="traffic administration is disabled: no admin token is configured "
                "(set DUEROUTE_ADMIN_TOKEN or start with --admin-token-file to enable it)",
            ) from None
        raise


TrafficAdminDep = Annotated[None, Depends(require_traffic_admin)]


def _not_ready(state: AppState) -> JSONResponse | None:
    if state.traffic is None:
        reason = state.warmup_error or "the service is warming up (loading the graph)"
        return JSONResponse(
            status_code=503,
            content={"detail": f"not ready: {reason}; retry shortly"},
            headers={"Retry-After": "1"},
        )
    return None


@router.get("/v1/traffic", response_model=TrafficInfo, summary="The current live cost version")
async def get_traffic(state: StateDep) -> JSONResponse:
    busy = _not_ready(state)
    if busy is not None:
        return busy
    return JSONResponse(state.traffic.info())


@router.post(
    "/v1/traffic",
    response_model=TrafficAccepted,
    responses={
        **_ADMIN_RESPONSES,
        413: {"model": ErrorBody, "description": "body above the traffic size limit"},
        422: {"model": ErrorBody, "description": "the batch was refused; every problem is listed"},
    },
    summary="Add a batch of live updates (slowdowns, speed-ups, closures, expiries)",
    openapi_extra={
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {
                    "schema": {"type": "object", "required": ["updates"]},
                    "example": _EXAMPLE,
                }
            },
        }
    },
)
async def post_traffic(
    request: Request,
    state: StateDep,
    _admin: TrafficAdminDep,
    dry_run: bool = Query(False, description="validate against the graph only; journal nothing"),
) -> JSONResponse:
    busy = _not_ready(state)
    if busy is not None:
        return busy
    traffic = state.traffic
    raw = await request.body()
    try:
        doc = json.loads(raw)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        return JSONResponse(
            status_code=422,
            content={
                "detail": f"the body is not valid JSON ({exc}); send a document such as "
                '{"updates": [{"from_node": 10, "to_node": 11, "factor": 2}]}'
            },
        )
    try:
        # Selections touch up to every node of the graph: off the event loop.
        updates = await asyncio.to_thread(traffic.parse, doc)
    except TrafficDocumentError as exc:
        return JSONResponse(
            status_code=422,
            content={"detail": str(exc), "problems": exc.problems},
        )
    if dry_run:
        return JSONResponse(
            {
                "batch_version": None,
                "dry_run": True,
                "updates": len(updates),
                "edges_selected": int(updates.edges.shape[0]),
                "traffic": traffic.info(),
            }
        )
    try:
        entry, _ = await asyncio.to_thread(traffic.submit, updates)
    except OSError as exc:
        return _not_journaled(exc)
    return JSONResponse(
        {
            "batch_version": entry.seq,
            "dry_run": False,
            "updates": len(updates),
            "traffic": traffic.info(),
        }
    )


@router.delete(
    "/v1/traffic",
    response_model=TrafficInfo,
    responses=_ADMIN_RESPONSES,
    summary="Clear every live update (back to free-flow costs, as a new version)",
)
async def delete_traffic(state: StateDep, _admin: TrafficAdminDep) -> JSONResponse:
    busy = _not_ready(state)
    if busy is not None:
        return busy
    try:
        await asyncio.to_thread(state.traffic.clear)
    except OSError as exc:
        return _not_journaled(exc)
    return JSONResponse(state.traffic.info())


def _not_journaled(exc: OSError) -> JSONResponse:
    return JSONResponse(
        status_code=500,
        content={
            "detail": "could not write the traffic journal durably, nothing was applied: "
            f"{exc.strerror or exc} ({getattr(exc, 'filename', None) or 'journal'}); check "
            "DUEROUTE_TRAFFIC_DIR"
        },
    )
