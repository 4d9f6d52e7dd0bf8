"""What a search reports: improvements, weight steps, the stats snapshot and the final result.

These types are shared by the session (which fills them), the controllers and the features
(which read :class:`SearchStats`), the policies and the service; they live here so that none of
those needs to import the session itself.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

#: Final states of a search (``PlanResult.status``).
STATUSES = ("optimal", "contract_spent", "no_route", "cancelled")


@dataclass(frozen=True)
class Improvement:
    """One new incumbent: when it was found and how good it was proven to be."""

    elapsed_ms: float  #: since the request arrived (``started_at``)
    expansions: int  #: total expansions when it was found
    cost_s: float  #: route cost (sum of its edges' travel_time_s)
    lower_bound_s: float  #: proven lower bound on the optimal cost at that moment
    gap: float  #: (cost - bound) / cost
    weight: float  #: weight in force when it was found
    #: The route itself (int64 node and edge indices), given to ``on_improvement`` callbacks
    #: only; the improvements a result lists do not keep it (see :data:`IMPROVEMENT_FIELDS`).
    route_nodes: np.ndarray | None = field(default=None, repr=False, compare=False)
    route_edges: np.ndarray | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict[str, Any]:
        """The published fields (:data:`IMPROVEMENT_FIELDS`), non-finite numbers as None."""
        return {k: _json_num(getattr(self, k)) for k in IMPROVEMENT_FIELDS}


#: What an improvement reports (JSON, HTTP answers, event streams), in this order.
IMPROVEMENT_FIELDS = ("elapsed_ms", "expansions", "cost_s", "lower_bound_s", "gap", "weight")


@dataclass(frozen=True)
class WeightStep:
    """The weight chosen for one decision step."""

    step: int
    elapsed_ms: float  #: when the step started, since ``started_at``
    expansions: int  #: total expansions when the step started
    weight: float


@dataclass(frozen=True)
class SearchStats:
    """Snapshot of a running search: everything the features and controllers need.

    Travel times in seconds; ``None`` means "not defined yet" (no incumbent, deadline contract
    has no expansions left). ``open_min_f_s`` is ``inf`` when the open list is empty.
    """

    incumbent_cost_s: float | None
    lower_bound_s: float
    open_size: int
    open_mean_g_s: float
    open_mean_h_s: float
    open_min_f_s: float
    h_start_s: float
    expansions: int
    expansions_left: int | None
    contract_fraction_left: float
    elapsed_ms: float
    weight: float
    mode: str
    improvements: int
    steps_done: int
    steps_total: int
    steps_since_improvement: int
    expansions_since_improvement: int
    cpu_share_last_step: float
    nodes_touched: int
    reopened: int
    done: bool


@dataclass
class PlanResult:
    """Answer of one search (see :data:`STATUSES` for ``status``).

    ``route`` holds node indices (int64[k + 1]) and ``route_edges`` edge indices (int64[k], so
    parallel edges are unambiguous); both are ``None`` when no route was found.
    ``cost_s`` / ``gap`` are ``None`` when no route was found; ``lower_bound_s`` is ``None`` only
    for ``no_route`` (a search stopped before its first route still proves a bound).
    """

    status: str
    origin: int
    destination: int
    route: np.ndarray | None
    route_edges: np.ndarray | None
    cost_s: float | None
    lower_bound_s: float | None
    gap: float | None
    improvements: list[Improvement]
    weights: list[WeightStep]
    expansions: int
    elapsed_ms: float
    controller: str
    steps: int
    mode: str = "weighted"
    deadline_ms: float | None = None
    budget_expansions: int | None = None
    h_start_s: float = 0.0
    nodes_touched: int = 0
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (numpy arrays become lists; non-finite numbers become None)."""
        out: dict[str, Any] = {
            "status": self.status,
            "origin_node": self.origin,
            "destination_node": self.destination,
            "cost_s": _json_num(self.cost_s),
            "lower_bound_s": _json_num(self.lower_bound_s),
            "gap": _json_num(self.gap),
            "node_indices": None if self.route is None else [int(x) for x in self.route],
            "edge_indices": None
            if self.route_edges is None
            else [int(x) for x in self.route_edges],
            "expansions": self.expansions,
            "elapsed_ms": self.elapsed_ms,
            "controller": self.controller,
            "mode": self.mode,
            "steps": self.steps,
            "deadline_ms": self.deadline_ms,
            "budget_expansions": self.budget_expansions,
            "h_start_s": _json_num(self.h_start_s),
            "nodes_touched": self.nodes_touched,
            "improvements": [i.to_dict() for i in self.improvements],
            "weights": [asdict(w) for w in self.weights],
        }
        out.update(self.extra)
        return out


def _json_num(x: Any) -> Any:
    if x is None:
        return None
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def gap_of(cost: float, bound: float) -> float:
    """The relative gap ``(cost - bound) / cost`` (0 for a zero-cost route; never negative)."""
    if cost <= 0.0:
        return 0.0
    return max(0.0, (cost - bound) / cost)
