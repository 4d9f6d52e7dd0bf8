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
    Discriminator,
    Field,
    Strict,
    StrictBool,
    StrictInt,
    Tag,
)

from dueroute.planner import limits

#: Largest deadline the schema allows (``dueroute.planner.limits``); the service may be
#: configured lower.
MAX_DEADLINE_MS = int(limits.MAX_DEADLINE_MS)

#: ``fixed:W`` with W in ``limits.MIN_WEIGHT..MAX_WEIGHT`` (1..5); the pattern alone says it,
#: so OpenAPI clients see the rule (a test checks it against ``planner.controllers``).
CONTROLLER_PATTERN = r"^(learned|decreasing|ana|random|fixed:([1-4](\.[0-9]+)?|5(\.0+)?))$"

PlanStatus = Literal[
    "running", "optimal", "improved", "instant", "no_route", "not_found", "cancelled", "error"
]

#: How many of the last improvements a plan lists without ``full_trace`` (settings may change
#: it); the published default.
DEFAULT_IMPROVEMENTS_LISTED = 20


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
    """A WGS84 point; the service snaps it to the nearest point on a road (the route starts or
    ends part-way along that road, in each direction the road may be driven)."""

    # strict: a JSON number only ("47.13" and true are refused, 47 is 47.0)
    model_config = ConfigDict(extra="forbid", strict=True)
    lat: float = Field(..., ge=-90.0, le=90.0, allow_inf_nan=False, description="degrees north")
    lon: float = Field(..., ge=-180.0, le=180.0, allow_inf_nan=False, description="degrees east")


def place_kind(value: Any) -> str | None:
    """Which kind of place an object is, by its keys: ``node``, ``point`` or None (neither or
    both), so a bad place gets the errors of the one kind it meant, not of both."""
    if isinstance(value, NodeRef):
        return "node"
    if isinstance(value, PointRef):
        return "point"
    if not isinstance(value, dict):
        return None
    by_node = "node" in value
    by_point = "lat" in value or "lon" in value
    if by_node != by_point:
        return "node" if by_node else "point"
    return None


#: The error type of a place that is neither kind (see ``app._validation_message``).
PLACE_ERROR = "place_kind"

Place = Annotated[
    Annotated[NodeRef, Tag("node")] | Annotated[PointRef, Tag("point")],
    Discriminator(
        place_kind,
        custom_error_type=PLACE_ERROR,
        custom_error_message="a place is an object with either node, or lat and lon",
    ),
]


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
    gap_target: Annotated[float, Strict()] = Field(  # a JSON number (true/"0.1" refused)
        default=0.0,
        ge=0.0,
        lt=1.0,
        allow_inf_nan=False,
        description="relative gap tolerance, like a MIP solver's: the search stops as soon as "
        "(cost - bound) / cost is at or below it and answers at once (0: search until the "
        "deadline or the proof)",
    )
    keep: StrictBool = Field(
        False,
        description="wait=true only: also keep the answered plan in the plan store for GET "
        "(background plans are always kept); refused with 503 when the store is full",
    )
    full_trace: StrictBool = Field(
        False,
        description="list every improvement (at most 10000, the oldest beyond that are "
        "dropped and counted) instead of the last few",
    )


class RouteProperties(BaseModel):
    travel_time_s: float
    length_m: float
    node_ids: list[int] = Field(description="OpenStreetMap node ids along the route")
    node_indices: list[int] = Field(description="node indices in the compiled graph")
    start_partial: PartialEdgeOut | None = Field(
        None, description="the part of an edge the route starts on (origin given as a point)"
    )
    end_partial: PartialEdgeOut | None = Field(
        None, description="the part of an edge the route ends on (destination given as a point)"
    )


class PartialEdgeOut(BaseModel):
    """Part of one road edge at an end of a route (a place given as a point on a road)."""

    edge: int = Field(description="edge index in the compiled graph")
    from_fraction: float = Field(description="where the part starts, 0 = the edge's tail")
    to_fraction: float = Field(description="where it ends, 1 = the edge's head (by length)")
    cost_s: float = Field(description="travel time of the part under the costs searched")


class SnappedPoint(BaseModel):
    """Where a place given as a point was snapped: the nearest point on a road."""

    lat: float
    lon: float
    distance_m: float = Field(description="great-circle distance from the point given")
    edge: int = Field(description="the edge the snapped point lies on")
    query: dict[str, float] = Field(description="the point given (lat, lon)")


class LineString(BaseModel):
    type: Literal["LineString"] = "LineString"
    coordinates: list[list[float]] = Field(description="[lon, lat] positions (RFC 7946)")


class RouteFeature(BaseModel):
    """GeoJSON Feature (RFC 7946) whose LineString follows the road geometry."""

    type: Literal["Feature"] = "Feature"
    geometry: LineString
    properties: RouteProperties


class Improvement(BaseModel):
    """A new best route found by the search."""

    elapsed_ms: float = Field(description="since the request arrived")
    expansions: int = Field(description="node expansions so far")
    cost_s: float = Field(description="travel time of the new route")
    lower_bound_s: float = Field(description="proven lower bound on the optimum at that moment")
    gap: float = Field(description="(cost_s - lower_bound_s) / cost_s")
    weight: float | None = Field(description="weight in force (null for the instant route)")
    source: Literal["instant", "search"] = Field(
        description="instant: the route every search starts from; search: found by the search"
    )


class RouteSummary(BaseModel):
    travel_time_s: float
    length_m: float
    node_count: int


class ImprovementEvent(Improvement):
    """The data of an ``improvement`` event of ``GET /v1/plans/{plan_id}/events``."""

    route: RouteSummary | None = Field(None, description="the new route in brief")


class Timings(BaseModel):
    queue_ms: float = Field(description="arrival to search start")
    search_ms: float = Field(description="search start to search end")
    total_ms: float = Field(description="arrival to the answer being built")


class Plan(BaseModel):
    """A plan: the best route found, its proven bound and gap, and how the search went."""

    plan_id: str
    status: PlanStatus = Field(
        description="running; optimal (proven); improved (the deadline or gap target came "
        "first: the best route the search found); instant (the deadline came first: the route "
        "every search opens with); no_route (proven unreachable); not_found (the deadline came "
        "before any route); cancelled (DELETE, with the best route so far); error (the plan "
        "failed: see error)"
    )
    origin_node: int | None = Field(description="the origin node (null: given as a point)")
    destination_node: int | None = Field(
        description="the destination node (null: given as a point)"
    )
    origin_point: SnappedPoint | None = Field(
        None, description="where an origin given as a point was snapped onto a road"
    )
    destination_point: SnappedPoint | None = Field(
        None, description="where a destination given as a point was snapped onto a road"
    )
    route: RouteFeature | None
    cost_s: float | None
    lower_bound_s: float
    gap: float | None
    improvements: list[Improvement] = Field(
        description="the last improvements, oldest first (all of them, up to 10000, with "
        "full_trace=true)"
    )
    improvements_dropped: int = Field(
        description="how many earlier improvements are not listed", ge=0
    )
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
    error: str | None = Field(description="what failed, for status error; else null")


class PlanLinks(BaseModel):
    self: str
    events: str


class PlanAccepted(BaseModel):
    plan_id: str
    status: Literal["running"] = "running"
    links: PlanLinks


class ErrorBody(BaseModel):
    detail: str = Field(description="what was wrong and what is allowed")


class PolicyRefused(BaseModel):
    """A policy upload that was refused: every problem, and the same text joined."""

    detail: str
    problems: list[str]


class PolicyDamage(BaseModel):
    """A file in the policy directory that failed its check at start-up."""

    file: str = Field(description="its name inside the policy directory")
    sha256: str | None = Field(description="the policy the file should hold")
    problem: str
    action: str = Field(description="what the service did about it")
    was_active: bool = Field(description="the pointer named it as the active policy")


class TrainedOn(BaseModel):
    graph_name: str | None
    graph_fingerprint: str | None
    created_utc: str | None
    training_config: Any = None


class PolicyInfo(BaseModel):
    """Metadata of a policy (the active one, or one checked in a dry run)."""

    sha256: str | None
    active: bool
    dry_run: bool
    source: str = Field(
        description="where it came from: 'file:NAME' (--policy), 'upload', 'rollback', "
        "'policy_dir' (persisted), 'default:NAME' (shipped), 'none'"
    )
    fallback_controller: str | None = Field(
        description="controller used for 'learned' while no policy is active"
    )
    activated_at: str | None
    previous_sha256: str | None = Field(
        description="the policy POST /v1/policy/rollback would re-activate (null: none)"
    )
    damaged: list[PolicyDamage] = Field(
        description="stored policy files found damaged at start-up (empty: none)"
    )
    size_bytes: int | None = None
    schema_version: int | None = None
    feature_names: list[str] | None = None
    weights: list[float] | None = None
    action_kind: str | None = None
    action_meanings: list[str] | None = None
    initial_weight: float | None = None
    contract_expansions: int | None = None
    decision_steps: int | None = None
    graph_fingerprint: str | None = None
    graph_name: str | None = None
    created_utc: str | None = None
    trained_on: TrainedOn | None = None
    training_regime: dict[str, Any] | None = Field(
        None,
        description="what the policy was trained for: contract kind, deadline range, CPU "
        "shares, graph fingerprint, feature schema, the machine's deadline-to-expansions map",
    )
    warnings: list[str] = Field(
        default_factory=list,
        description="why the policy may not fit this service, e.g. trained on another graph",
    )


class Health(BaseModel):
    status: str
    detail: dict[str, Any] = Field(default_factory=dict)


RESPONSES_4XX: dict[int | str, dict[str, Any]] = {
    400: {
        "model": ErrorBody,
        "description": "the body is not readable JSON: syntax, encoding, a duplicate key, "
        "nesting deeper than 16, or a number literal longer than 40 characters",
    },
    404: {"model": ErrorBody, "description": "unknown node, point off the network, unknown id"},
    413: {"model": ErrorBody, "description": "request body too large"},
    415: {"model": ErrorBody, "description": "Content-Type is not application/json"},
    422: {"model": ErrorBody, "description": "body does not match the schema"},
}
