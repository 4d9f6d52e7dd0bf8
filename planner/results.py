"""What a search reports: improvements, weight steps, the stats snapshot and the final result.

These types are shared by the session (which fills them), the controllers and the features
(which read :class:`SearchStats`), the policies and the service; they live here so that none of
those needs to import the session itself.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any, overload

import numpy as np

#: Final states of a search (``PlanResult.status``): what the route is worth.
#:
#: ``optimal``   the route is proven optimal (bound = cost)
#: ``improved``  the search found a route better than the instant one; the bound says how far
#:               from optimal it may be (``stopped_by`` says why the search stopped: the
#:               deadline, the budget, or the proven gap reaching the gap target)
#: ``instant``   the instant route only (the search had no time to improve it)
#: ``no_route``  the destination cannot be reached
#: ``not_found`` the contract ran out before any route was found; this happens only without
#:               an instant route (no landmarks, or a pair outside the landmarks' component)
#: ``cancelled`` the caller stopped the search (the best route so far is still given)
STATUSES = ("optimal", "improved", "instant", "no_route", "not_found", "cancelled")

#: Why a search stopped (``PlanResult.stopped_by``).
STOP_REASONS = ("proof", "gap_target", "deadline", "budget", "cancel", "unreachable")


@dataclass(frozen=True)
class Improvement:
    """One new incumbent: when it was found and how good it was proven to be."""

    elapsed_ms: float  #: since the request arrived (``started_at``)
    expansions: int  #: total expansions when it was found
    cost_s: float  #: route cost (sum of its edges' travel_time_s)
    lower_bound_s: float  #: proven lower bound on the optimal cost at that moment
    gap: float  #: (cost - bound) / cost
    weight: float  #: weight in force when it was found
    source: str = "search"  #: ``instant`` for the instant route, else ``search``
    #: The route itself (int64 node and edge indices), given to ``on_improvement`` callbacks
    #: only; the improvements a result lists do not keep it (see :data:`IMPROVEMENT_FIELDS`).
    route_nodes: np.ndarray | None = field(default=None, repr=False, compare=False)
    route_edges: np.ndarray | None = field(default=None, repr=False, compare=False)
    #: The partial edges at the route's ends (``planner.endpoints.PartialEdge``, a route from
    #: or to a snapped point), given to callbacks with the route.
    route_start: Any = field(default=None, repr=False, compare=False)
    route_end: Any = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict[str, Any]:
        """The published fields (:data:`IMPROVEMENT_FIELDS`), non-finite numbers as None."""
        return {k: _json_num(getattr(self, k)) for k in IMPROVEMENT_FIELDS}


class ImprovementLog(Sequence[Improvement]):
    """A search's improvements, oldest first, held as rows of numbers.

    A weighted search can find hundreds of slightly cheaper routes in a millisecond; turning
    each into an :class:`Improvement` object as it is found would cost microseconds apiece
    inside the deadline. The log keeps one row per improvement (elapsed ms, expansions, cost,
    bound, gap, weight, source) and builds the objects only when they are read.
    """

    __slots__ = ("_rows", "_n", "_objects")

    _COLUMNS = 7  # elapsed_ms, expansions, cost_s, lower_bound_s, gap, weight, source

    def __init__(self, capacity: int = 16) -> None:
        self._rows = np.empty((max(1, capacity), self._COLUMNS), dtype=np.float64)
        self._n = 0
        self._objects: list[Improvement | None] = []

    def reserve(self, extra: int) -> np.ndarray:
        """Room for ``extra`` more rows; returns the array to write them into at ``len(self)``."""
        need = self._n + extra
        if need > self._rows.shape[0]:
            grown = np.empty((max(need, 2 * self._rows.shape[0]), self._COLUMNS))
            grown[: self._n] = self._rows[: self._n]
            self._rows = grown
        return self._rows

    def commit(self, count: int) -> None:
        """Count ``count`` rows written after :meth:`reserve`."""
        self._n += count
        self._objects.extend([None] * count)

    def append(self, imp: Improvement) -> None:
        rows = self.reserve(1)
        rows[self._n] = (
            imp.elapsed_ms,
            imp.expansions,
            imp.cost_s,
            imp.lower_bound_s,
            imp.gap,
            imp.weight,
            0.0 if imp.source == "instant" else 1.0,
        )
        self.commit(1)
        self._objects[-1] = imp

    def snapshot(self) -> ImprovementLog:
        """An independent copy (what a result keeps while the search may go on)."""
        out = ImprovementLog(self._n)
        out._rows[: self._n] = self._rows[: self._n]
        out._n = self._n
        out._objects = list(self._objects)
        return out

    def __len__(self) -> int:
        return self._n

    def published(self, last: int) -> list[dict[str, Any]]:
        """The published fields (:meth:`Improvement.to_dict`) of the last ``last`` rows,
        read straight from the rows (no objects: an answer lists them once)."""
        lo = max(0, self._n - max(0, last))
        out = []
        for r in self._rows[lo : self._n].tolist():
            out.append(
                {
                    "elapsed_ms": _json_num(r[0]),
                    "expansions": int(r[1]),
                    "cost_s": _json_num(r[2]),
                    "lower_bound_s": _json_num(r[3]),
                    "gap": _json_num(r[4]),
                    "weight": _json_num(r[5]),
                    "source": "instant" if r[6] == 0.0 else "search",
                }
            )
        return out

    def _get(self, i: int) -> Improvement:
        obj = self._objects[i]
        if obj is None:
            r = self._rows[i].tolist()
            obj = Improvement(
                elapsed_ms=r[0],
                expansions=int(r[1]),
                cost_s=r[2],
                lower_bound_s=r[3],
                gap=r[4],
                weight=r[5],
                source="instant" if r[6] == 0.0 else "search",
            )
            self._objects[i] = obj
        return obj

    @overload
    def __getitem__(self, index: int) -> Improvement: ...
    @overload
    def __getitem__(self, index: slice) -> list[Improvement]: ...
    def __getitem__(self, index: int | slice) -> Improvement | list[Improvement]:
        if isinstance(index, slice):
            return [self._get(i) for i in range(*index.indices(self._n))]
        i = index + self._n if index < 0 else index
        if not 0 <= i < self._n:
            raise IndexError("improvement index out of range")
        return self._get(i)

    def __eq__(self, other: object) -> bool:
        if isinstance(other, (ImprovementLog, list, tuple)):
            return list(self) == list(other)
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"ImprovementLog({list(self)!r})"


#: What an improvement reports (JSON, HTTP answers, event streams), in this order.
IMPROVEMENT_FIELDS = (
    "elapsed_ms",
    "expansions",
    "cost_s",
    "lower_bound_s",
    "gap",
    "weight",
    "source",
)


@dataclass(frozen=True)
class WeightStep:
    """The weight chosen for one decision step."""

    step: int
    elapsed_ms: float  #: when the step started, since ``started_at``
    expansions: int  #: total expansions when the step started
    weight: float


#: The numbers of a :class:`SearchStats` snapshot, in the order of its vector (``None`` values
#: are stored as ``inf`` for ``incumbent_cost_s`` and -1 for ``expansions_left``).
STATS_FIELDS: tuple[str, ...] = (
    "incumbent_cost_s",
    "lower_bound_s",
    "open_size",
    "open_mean_g_s",
    "open_mean_h_s",
    "open_min_f_s",
    "h_start_s",
    "expansions",
    "expansions_left",
    "contract_fraction_left",
    "elapsed_ms",
    "weight",
    "improvements",
    "steps_done",
    "steps_total",
    "steps_since_improvement",
    "expansions_since_improvement",
    "cpu_share_last_step",
    "nodes_touched",
    "reopened",
    "done",
    "expansion_rate_per_s",
    "instant_only",
    "time_left_ms",
)
STATS_INDEX = {name: i for i, name in enumerate(STATS_FIELDS)}
STATS_LEN = len(STATS_FIELDS)
_INT_FIELDS = frozenset(
    [
        "open_size",
        "expansions",
        "improvements",
        "steps_done",
        "steps_total",
        "steps_since_improvement",
        "expansions_since_improvement",
        "nodes_touched",
        "reopened",
    ]
)
_BOOL_FIELDS = frozenset(["done", "instant_only"])
#: Fields a keyword-built :class:`SearchStats` may leave out (0 then): ``time_left_ms`` is
#: wall-clock time left under a deadline, 0 under an expansion budget (no clock to read,
#: unless a simulation of deadlines sets it, see ``policies.env``).
_OPTIONAL_FIELDS = frozenset(["expansion_rate_per_s", "instant_only", "time_left_ms"])


class SearchStats:
    """Snapshot of a running search: everything the features and controllers need.

    Travel times in seconds; ``None`` means "not defined yet" (no incumbent, a deadline contract
    has no expansions left). ``open_min_f_s`` is ``inf`` when the open list is empty.

    Immutable and cheap: the numbers live in one float64 vector (:data:`STATS_FIELDS` order,
    :attr:`vector`), which is what the feature function reads; attributes decode it on access.
    Build one with keyword arguments (every field of :data:`STATS_FIELDS` plus ``mode``), or
    take it from ``Search.stats()``.
    """

    __slots__ = ("_v", "mode")
    _v: np.ndarray
    mode: str

    if TYPE_CHECKING:  # the fields are properties made below from STATS_FIELDS
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
        improvements: int
        steps_done: int
        steps_total: int
        steps_since_improvement: int
        expansions_since_improvement: int
        cpu_share_last_step: float
        nodes_touched: int
        reopened: int
        done: bool
        expansion_rate_per_s: float
        instant_only: bool
        time_left_ms: float

    def __init__(self, *, mode: str = "weighted", **fields: Any) -> None:
        missing = set(STATS_FIELDS) - set(fields) - _OPTIONAL_FIELDS
        extra = set(fields) - set(STATS_FIELDS)
        if missing or extra:
            raise TypeError(
                f"SearchStats fields: missing {sorted(missing)}, unknown {sorted(extra)}"
            )
        v = np.zeros(STATS_LEN, dtype=np.float64)
        for name, value in fields.items():
            v[STATS_INDEX[name]] = _encode(name, value)
        v.flags.writeable = False
        object.__setattr__(self, "_v", v)
        object.__setattr__(self, "mode", mode)

    @classmethod
    def from_vector(cls, vector: np.ndarray, mode: str) -> SearchStats:
        """Wrap a vector in :data:`STATS_FIELDS` order (it is copied, so it cannot change)."""
        obj = object.__new__(cls)
        v = np.array(vector, dtype=np.float64)
        v.flags.writeable = False
        object.__setattr__(obj, "_v", v)
        object.__setattr__(obj, "mode", mode)
        return obj

    @property
    def vector(self) -> np.ndarray:
        """float64[STATS_LEN], read-only."""
        return self._v

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("SearchStats is immutable; use replace()")

    def replace(self, **changes: Any) -> SearchStats:
        """A copy with some fields changed (like ``dataclasses.replace``)."""
        v = self._v.copy()
        mode = changes.pop("mode", self.mode)
        for name, value in changes.items():
            if name not in STATS_INDEX:
                raise TypeError(f"SearchStats has no field {name!r}")
            v[STATS_INDEX[name]] = _encode(name, value)
        return SearchStats.from_vector(v, mode)

    def as_dict(self) -> dict[str, Any]:
        out = {name: getattr(self, name) for name in STATS_FIELDS}
        out["mode"] = self.mode
        return out

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, SearchStats):
            return NotImplemented
        return self.mode == other.mode and bool(np.array_equal(self._v, other._v))

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        shown = ", ".join(f"{k}={v!r}" for k, v in self.as_dict().items())
        return f"SearchStats({shown})"


def _decoder(name: str, i: int) -> property:
    """A read-only property decoding field ``name`` (vector position ``i``)."""
    if name == "incumbent_cost_s":

        def get(self: SearchStats) -> Any:
            x = float(self._v[i])
            return None if math.isinf(x) else x
    elif name == "expansions_left":

        def get(self: SearchStats) -> Any:
            x = float(self._v[i])
            return None if x < 0 else int(x)
    elif name in _INT_FIELDS:

        def get(self: SearchStats) -> Any:
            return int(self._v[i])
    elif name in _BOOL_FIELDS:

        def get(self: SearchStats) -> Any:
            return bool(self._v[i] != 0.0)
    else:

        def get(self: SearchStats) -> Any:
            return float(self._v[i])

    return property(get, doc=f"``{name}`` (see :data:`STATS_FIELDS`)")


for _i, _name in enumerate(STATS_FIELDS):
    setattr(SearchStats, _name, _decoder(_name, _i))


def _encode(name: str, value: Any) -> float:
    if name == "incumbent_cost_s":
        return math.inf if value is None else float(value)
    if name == "expansions_left":
        return -1.0 if value is None else float(value)
    return float(value)


@dataclass
class PlanResult:
    """Answer of one search (see :data:`STATUSES` for ``status``).

    ``route`` holds road node indices (int64[k + 1]) and ``route_edges`` road edge indices
    (int64[k], so parallel edges are unambiguous) of the edges driven in full; both are ``None``
    when no route was found. A route from or to a point on a road adds the partial edges
    ``route_start`` / ``route_end`` (``planner.endpoints.PartialEdge``); a route between two
    points on the same edge is one partial edge and no full edge. ``origin`` / ``destination``
    are ``None`` for a snapped point (``origin_snap`` / ``destination_snap``).
    ``cost_s`` / ``gap`` are ``None`` when no route was found; ``lower_bound_s`` is ``None`` only
    for ``no_route``. ``stopped_by`` is one of :data:`STOP_REASONS`; ``instant_cost_s`` the cost
    of the instant route the search started from (``None`` when there was none);
    ``weight_capped`` is true when the runaway guard forced weight 1 (see ``planner.session``).
    """

    status: str
    origin: int | None
    destination: int | None
    route: np.ndarray | None
    route_edges: np.ndarray | None
    cost_s: float | None
    lower_bound_s: float | None
    gap: float | None
    improvements: Sequence[Improvement]
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
    stopped_by: str = "proof"
    instant_cost_s: float | None = None
    weight_capped: bool = False
    gap_target: float = 0.0
    #: wall time spent expanding (inside the kernel); ``elapsed_ms - kernel_ms`` is the rest:
    #: opening the query, the instant route, decision steps, reading routes back
    kernel_ms: float = 0.0
    #: wall time opening the query (validation done; workspace, target row, the instant route)
    open_ms: float = 0.0
    #: wall time deciding weights between steps (stats, features, the controller's decision):
    #: the control overhead
    control_ms: float = 0.0
    #: partial edges at the route's ends (a route from or to a point on a road)
    route_start: Any = None
    route_end: Any = None
    #: the snapped points (``planner.snap.RoadSnap``) when the route starts or ends at one
    origin_snap: Any = None
    destination_snap: Any = None
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (numpy arrays become lists; non-finite numbers become None)."""
        out: dict[str, Any] = {
            "status": self.status,
            "stopped_by": self.stopped_by,
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
            "instant_cost_s": _json_num(self.instant_cost_s),
            "weight_capped": self.weight_capped,
            "gap_target": self.gap_target,
            "kernel_ms": self.kernel_ms,
            "open_ms": self.open_ms,
            "control_ms": self.control_ms,
            "route_start": None if self.route_start is None else self.route_start.to_dict(),
            "route_end": None if self.route_end is None else self.route_end.to_dict(),
            "origin_point": None
            if self.origin_snap is None
            else snapped_point_dict(self.origin_snap),
            "destination_point": None
            if self.destination_snap is None
            else snapped_point_dict(self.destination_snap),
            "improvements": [i.to_dict() for i in self.improvements],
            "weights": [asdict(w) for w in self.weights],
        }
        out.update(self.extra)
        return out


def snapped_point_dict(snap: Any) -> dict[str, Any]:
    """A snapped point as answers give it: where it is, how far the query was, which edge."""
    return {
        "lat": snap.lat,
        "lon": snap.lon,
        "distance_m": snap.distance_m,
        "edge": snap.edge,
        "query": {"lat": snap.query_lat, "lon": snap.query_lon},
    }


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
