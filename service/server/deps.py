"""``Annotated`` dependencies shared by the routers."""

from __future__ import annotations

import asyncio
import hmac
import time
from dataclasses import dataclass, field
from typing import Annotated, Any

from fastapi import Depends, HTTPException, Request

from dueroute.service.server.admission import Admission, LoopLag, ResponseFloor
from dueroute.service.server.callers import CallerLimits
from dueroute.service.server.jobs import PlanningEngine
from dueroute.service.server.metrics import ServiceMetrics
from dueroute.service.server.plan_store import PlanStore
from dueroute.service.server.policy_store import PolicyStore
from dueroute.service.server.settings import Settings


@dataclass(eq=False)
class AppState:
    """Everything one app instance owns (tests build several apps side by side)."""

    settings: Settings
    metrics: ServiceMetrics
    admission: Admission
    plans: PlanStore
    policies: PolicyStore
    callers: CallerLimits = field(default_factory=CallerLimits)
    floor: ResponseFloor = field(default_factory=lambda: ResponseFloor(0.5, 1.0))
    loop_lag: LoopLag = field(default_factory=LoopLag)
    engine: PlanningEngine | None = None  # set once the graph is loaded and warmed up
    traffic: Any = None  # service.server.traffic_store.LiveTraffic, set with the engine
    ready: bool = False
    warmup_error: str | None = None  # why the warm-up failed (a permanent failure)
    warmup: dict[str, Any] = field(default_factory=dict)
    started_wall: float = field(default_factory=time.time)
    tasks: list[asyncio.Task[Any]] = field(default_factory=list)
    lifespans: int = 0  # lifespans entered and not yet left


async def get_state(request: Request) -> AppState:
    # async: FastAPI runs a plain-def dependency on its thread pool, a thread hop per request
    state: AppState = request.app.state.dueroute
    return state


StateDep = Annotated[AppState, Depends(get_state)]


async def get_app_settings(state: StateDep) -> Settings:
    return state.settings


SettingsDep = Annotated[Settings, Depends(get_app_settings)]


def check_admin(request: Request, state: AppState) -> None:
    """Admin endpoints: 404 when no token is configured, 401 unless the bearer token matches.

    The token is compared with :func:`hmac.compare_digest`, whose time does not depend on
    where the first difference is.
    """
    expected = state.settings.admin_token
    if expected is None:
        raise HTTPException(
            status_code=404,
            detail="policy administration is disabled: no admin token is configured "
            "(set DUEROUTE_ADMIN_TOKEN or start with --admin-token-file to enable it)",
        )
    header = request.headers.get("authorization", "")
    scheme, _, given = header.partition(" ")
    ok = scheme.lower() == "bearer" and hmac.compare_digest(
        given.strip().encode(), expected.get_secret_value().encode()
    )
    if not ok:
        raise HTTPException(
            status_code=401,
            detail="missing or wrong admin token: send 'Authorization: Bearer <token>'",
            headers={"WWW-Authenticate": "Bearer"},
        )


async def require_admin(request: Request, state: StateDep) -> None:
    check_admin(request, state)


AdminDep = Annotated[None, Depends(require_admin)]
