"""Request and response models of the HTTP API (published as OpenAPI at ``/openapi.json``).

Field constraints here are what OpenAPI publishes and what a 422 explains; limits that depend
on settings (the largest deadline) are checked in the route with a message of the same shape.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    StrictBool,
    StrictInt,
)

from dueroute.planner import limits

#: Largest deadline the schema allows (``dueroute.planner.limits``); the service may be
#: configured lower.
MAX_DEADLINE_MS = int(limits.MAX_DEADLINE_MS)

#: ``fixed:W`` with W in ``limits.MIN_WEIGHT..MAX_WEIGHT`` (1..5); the pattern alone says it,
#: so OpenAPI clients see the rule (a test checks it against ``planner.controllers``).
CONTROLLER_PATTERN = r"^(learned|decreasing|ana|random|fixed:([1-4](\.[0-9]+)?|5(\.0+)?))$"

PlanStatus = Literal[
    "running", "optimal", "improved", "instant", "no_route", "not_found", "cancelled"
]


def _whole_number(v: Any) -> Any:
    """JSON Schema counts 40.0 as an integer; accept it, but never a string or a boolean."""
    if isinstance(v, float) and v.is_integer():
        return int(v)
    return v


#: An integer in the JSON Schema sense: 5 and 5.0 pass; 5.5, "5" and true do not.
WholeNumber = Annotated[StrictInt, BeforeValidator(_whole_number)]


class NodeRef(BaseModel):
    """A graph node by its index (0..n_nodes-1)."""

    model_config = ConfigDict(extra="forbid")
    node: WholeNumber = Field(..., ge=0, description="node index in the compiled graph")


class PointRef(BaseModel):
    """A WGS84 point; the service snaps it to the nearest road node."""

    model_config = ConfigDict(extra="forbid")
    lat: float = Field(..., ge=-90.0, le=90.0, allow_inf_nan=False)
    lon: float = Field(..., ge=-180.0, le=180.0, allow_inf_nan=False)


Place = NodeRef | PointRef


class PlanRequest(BaseModel):
    """Body of ``POST /v1/plans``."""

    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {
                    "origin": {"node": 0},
                    "destination": {"node": 10},
                    "deadline_ms": 50,
                    "controller": "decreasing",
                    "wait": True,
                }
            ]
        },
    )

    origin: Place
    destination: Place
    deadline_ms: WholeNumber = Field(
        default=...,
        ge=1,
        le=MAX_DEADLINE_MS,
        description="answer by arrival + deadline_ms (+ the documented tolerance)",
    )
    controller: str = Field(
        default=limits.DEFAULT_CONTROLLER,
        pattern=CONTROLLER_PATTERN,
        description="weight controller: " + limits.controller_spec_help(),
    )
    wait: StrictBool = Field(
        True, description="true: answer with the plan; false: 202 and run in the background"
    )
    gap_target: float = Field(
        default=0.0,
        ge=0.0,
        lt=1.0,
        allow_inf_nan=False,
        description="relative gap tolerance, like a MIP solver's: the search stops as soon as "
        "(cost - bound) / cost is at or below it and answers at once (0: search until the "
        "deadline or the proof)",
    )


class RouteProperties(BaseModel):
    travel_time_s: float
    length_m: float
    node_ids: list[int] = Field(description="OpenStreetMap node ids along the route")
    node_indices: list[int] = Field(description="node indices in the compiled graph")


class LineString(BaseModel):
    type: Literal["LineString"] = "LineString"
    coordinates: list[list[float]] = Field(description="[lon, lat] positions (RFC 7946)")


class RouteFeature(BaseModel):
    """GeoJSON Feature (RFC 7946) whose LineString follows the road geometry."""

    type: Literal["Feature"] = "Feature"
    geometry: LineString
    properties: RouteProperties


class Improvement(BaseModel):
    elapsed_ms: float
    expansions: int
    cost_s: float
    lower_bound_s: float
    gap: float
    weight: float | None = Field(description="weight in force (null for the instant route)")
    source: Literal["instant", "search"] = Field(
        description="instant: the route every search starts from; search: found by the search"
    )


class Timings(BaseModel):
    queue_ms: float = Field(description="arrival to search start")
    search_ms: float = Field(description="search start to search end")
    total_ms: float = Field(description="arrival to the answer being built")


class Plan(BaseModel):
    plan_id: str
    status: PlanStatus
    origin_node: int
    destination_node: int
    route: RouteFeature | None
    cost_s: float | None
    lower_bound_s: float
    gap: float | None
    improvements: list[Improvement]
    expansions: int
    controller: str
    policy_sha256: str | None
    deadline_ms: int
    timings: Timings
    traffic_version: int | None = Field(
        None, description="live cost version the search ran on (GET /v1/traffic); null: none"
    )
    bound_quality: Literal["full", "weakened"] | None = Field(
        None,
        description="'weakened': some edges are faster than the costs the landmarks were built "
        "on, so the bound was lowered to stay proven (see bound_note)",
    )
    bound_note: str | None = None


class PlanLinks(BaseModel):
    self: str
    events: str


class PlanAccepted(BaseModel):
    plan_id: str
    status: Literal["running"] = "running"
    links: PlanLinks


class ErrorBody(BaseModel):
    detail: Any = Field(description="what was wrong and what is allowed")


class PolicyInfo(BaseModel):
    """Metadata of a policy (the active one, or one checked in a dry run)."""

    model_config = ConfigDict(extra="allow")
    sha256: str | None
    active: bool = True
    dry_run: bool = False
    source: str = Field(description="where it came from: 'file', 'upload', 'none'")
    fallback_controller: str | None = Field(
        None, description="controller used for 'learned' while no policy is active"
    )
    schema_version: Any = None
    feature_names: list[str] | None = None
    weights: list[float] | None = None
    trained_on: Any = None
    activated_at: str | None = None
    previous_sha256: str | None = None


class Health(BaseModel):
    status: str
    detail: dict[str, Any] = Field(default_factory=dict)


RESPONSES_4XX: dict[int | str, dict[str, Any]] = {
    404: {"model": ErrorBody, "description": "unknown node, point off the network, unknown id"},
    413: {"model": ErrorBody, "description": "request body too large"},
    422: {"model": ErrorBody, "description": "body does not match the schema"},
}
