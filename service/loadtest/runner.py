"""Load test: what a deadline buys in latency and route quality, under load.

The load tester drives a running dueroute service over HTTP (contract: ``POST /v1/plans`` with
``wait=true``) with a closed-loop async client. The grid is controllers x concurrency levels x
deadlines; each cell keeps ``concurrency`` requests in flight for ``duration_s`` seconds (and
at most ``max_requests`` requests), then the next cell starts.

Per cell it reports, all measured by the client:

* throughput (answers per second of cell wall time),
* latency p50 / p95 / p99 / max of answered requests,
* late answers (latency beyond ``deadline_ms + tolerance_ms``),
* shed rate (503 or 429 with ``Retry-After``) and errors (other non-2xx, transport errors, bad bodies),
* mean / median / p95 gap and the share of answers proven optimal,
* with a reference: true quality ``optimal cost / returned cost`` from exact costs computed
  locally with :func:`scipy.sparse.csgraph.dijkstra` on the same graph, plus checks that the
  server searches the same graph (returned route is a path of the local graph with the claimed
  cost, osm ids agree, no lower bound above the optimum).

Safety: the target must be on the loopback interface (this machine may only load itself), the
client never follows redirects (so it talks to the given URL only), every loop is bounded in
count and time, and the results gathered so far survive an interrupt.
"""

from __future__ import annotations

import asyncio
import csv
import ipaddress
import json
import math
import random
import time
import zlib
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.service.loadtest.lean_http import LeanClient, LeanHTTPError

#: Host names accepted as loopback without resolving them (resolution could be redirected).
LOOPBACK_NAMES = frozenset({"localhost", "localhost."})

#: Upper limits that keep a mistyped grid from running for hours.
MAX_CONCURRENCY = 256
MAX_CELLS = 200
MAX_DURATION_S = 600.0
MAX_REQUESTS_PER_CELL = 1_000_000
MAX_DEADLINE_MS = 60_000

#: Plan statuses the contract allows in a ``wait=true`` answer.
FINAL_STATUSES = frozenset({"optimal", "improved", "instant", "no_route", "not_found", "cancelled"})

#: Relative tolerance when comparing costs summed in a different order (server vs local).
COST_RTOL = 1e-6


# --------------------------------------------------------------------------------------------
# Target and configuration


def require_loopback(url: str) -> str:
    """Return ``url`` without a trailing slash, or refuse it unless it is on this machine.

    Allowed: ``http``/``https`` URLs whose host is ``localhost``, an IPv4 address in
    ``127.0.0.0/8`` or the IPv6 loopback ``::1``. Names are not resolved, so a DNS entry cannot
    point the load elsewhere.

    Raises
    ------
    InvalidRequest
        For any other scheme or host, saying what is allowed.
    """
    parts = urlsplit(url.strip())
    allowed = "allowed hosts: localhost, 127.0.0.0/8, ::1 (this machine may only load itself)"
    if parts.scheme not in ("http", "https"):
        raise InvalidRequest(
            f"--url must be an http:// or https:// URL such as http://127.0.0.1:8000, got {url!r}"
        )
    host = parts.hostname
    if not host:
        raise InvalidRequest(f"--url {url!r} names no host; {allowed}")
    try:
        port = parts.port
    except ValueError as exc:
        raise InvalidRequest(f"--url {url!r} has an invalid port ({exc})") from None
    if parts.query or parts.fragment or parts.username or parts.password:
        raise InvalidRequest(f"--url {url!r} must be a plain base URL (no user, query or fragment)")
    if host.lower() not in LOOPBACK_NAMES:
        try:
            address = ipaddress.ip_address(host)
        except ValueError:
            raise InvalidRequest(
                f"refusing to load {host!r}: not a loopback address; {allowed}"
            ) from None
        if not address.is_loopback:
            raise InvalidRequest(f"refusing to load {host}: not a loopback address; {allowed}")
    del port  # validated above; kept in the URL as given
    return url.strip().rstrip("/")


@dataclass(frozen=True)
class LoadTestConfig:
    """One load-test grid. Units are in the names; every loop is bounded by these values."""

    url: str
    """base URL of the service (loopback only)"""
    concurrency: tuple[int, ...] = (1, 2, 4, 8)
    """requests kept in flight, one cell per level"""
    deadlines_ms: tuple[int, ...] = (5, 10, 20, 50)
    """request deadlines in milliseconds, one cell per deadline"""
    controllers: tuple[str, ...] = ("learned",)
    """weight controllers to compare (the request's ``controller`` field)"""
    duration_s: float = 10.0
    """wall time each cell keeps sending new requests"""
    max_requests: int = 20_000
    """most requests one cell sends, whatever its duration"""
    tolerance_ms: float = 5.0
    """an answer later than deadline_ms + this is counted late"""
    shed_backoff_ms: float = 20.0
    """a worker whose request was shed waits min(Retry-After, this) before its next one"""
    timeout_margin_s: float = 10.0
    """a request is abandoned (counted an error) after deadline + this"""
    warmup_requests: int = 3
    """unrecorded requests per controller before the grid (JIT, caches, connections)"""
    ready_timeout_s: float = 60.0
    """how long to wait for GET /readyz to answer 200 before giving up"""
    seed: int = 0
    """seed of the query order"""

    def __post_init__(self) -> None:
        object.__setattr__(self, "url", require_loopback(self.url))
        if not self.concurrency:
            raise InvalidRequest("--concurrency needs at least one level")
        for c in self.concurrency:
            if not 1 <= c <= MAX_CONCURRENCY:
                raise InvalidRequest(f"concurrency must be in 1..{MAX_CONCURRENCY}, got {c}")
        if not self.deadlines_ms:
            raise InvalidRequest("--deadlines needs at least one deadline")
        for d in self.deadlines_ms:
            if not 1 <= d <= MAX_DEADLINE_MS:
                raise InvalidRequest(f"deadline_ms must be in 1..{MAX_DEADLINE_MS}, got {d}")
        if not self.controllers:
            raise InvalidRequest("--controller needs at least one controller")
        if not (math.isfinite(self.duration_s) and 0 < self.duration_s <= MAX_DURATION_S):
            raise InvalidRequest(
                f"--duration must be in (0, {MAX_DURATION_S:g}] seconds, got {self.duration_s}"
            )
        if not 1 <= self.max_requests <= MAX_REQUESTS_PER_CELL:
            raise InvalidRequest(
                f"--max-requests must be in 1..{MAX_REQUESTS_PER_CELL}, got {self.max_requests}"
            )
        if not (math.isfinite(self.tolerance_ms) and self.tolerance_ms >= 0):
            raise InvalidRequest(f"--tolerance-ms must be >= 0, got {self.tolerance_ms}")
        if self.n_cells > MAX_CELLS:
            raise InvalidRequest(
                f"the grid has {self.n_cells} cells (controllers x concurrency x deadlines); "
                f"the limit is {MAX_CELLS}"
            )

    @property
    def n_cells(self) -> int:
        return len(self.controllers) * len(self.concurrency) * len(self.deadlines_ms)

    def cells(self) -> list[tuple[str, int, int]]:
        """(controller, concurrency, deadline_ms) in run order."""
        return [
            (k, c, d) for k in self.controllers for c in self.concurrency for d in self.deadlines_ms
        ]


# --------------------------------------------------------------------------------------------
# Queries


def random_reachable_pairs(graph: Any, n: int, seed: int = 0) -> tuple[list[tuple[int, int]], str]:
    """``n`` reproducible (origin, destination) pairs with a directed route between them.

    Returns the pairs and a description of how they were drawn. First choice: the project's
    query sets (:func:`demo_data.queries.sample_queries`, the documented mix of short, medium
    and long trips). A graph too small or odd for that mix gets pairs drawn uniformly from the
    largest strongly-connected component instead (:func:`uniform_reachable_pairs`).
    """
    if n < 1:
        raise InvalidRequest(f"--random needs at least 1 query, got {n}")
    from dueroute.demo_data.queries import DEFAULT_MIX, sample_queries

    try:
        pairs = [(int(o), int(d)) for o, d in sample_queries(graph, n, seed)]
        mix = ", ".join(f"{100 * v:.0f}% {k}" for k, v in DEFAULT_MIX.items())
        return pairs, f"dueroute.demo_data.queries.sample_queries (seed {seed}; {mix})"
    except InvalidRequest as exc:
        pairs = uniform_reachable_pairs(graph, n, seed)
        return pairs, f"uniform in the largest component (seed {seed}; the trip mix failed: {exc})"


def uniform_reachable_pairs(graph: Any, n: int, seed: int = 0) -> list[tuple[int, int]]:
    """``n`` pairs of distinct nodes drawn uniformly from the largest strongly-connected
    component (``graph.component``), so a directed route exists both ways."""
    comp = np.asarray(graph.component, dtype=np.int64)
    if comp.size == 0:
        raise InvalidRequest("the graph has no nodes; no queries to draw")
    nodes = np.flatnonzero(comp == int(np.bincount(comp).argmax()))
    if nodes.size < 2:
        raise InvalidRequest("the graph has no two nodes connected both ways; no queries to draw")
    rng = np.random.default_rng(seed)
    origin = rng.integers(nodes.size, size=n)
    # a uniform other member: draw from size - 1 slots and skip over the origin's own slot
    other = rng.integers(nodes.size - 1, size=n)
    other = other + (other >= origin)
    return [(int(nodes[o]), int(nodes[d])) for o, d in zip(origin, other, strict=True)]


# --------------------------------------------------------------------------------------------
# Reference: exact costs and graph agreement


class Reference:
    """Exact optimal costs of the query pairs on the local graph, and per-plan checks.

    Parameters
    ----------
    graph : planner.graph.RoadGraph
        The same compiled graph the service searches.
    pairs : sequence of (int, int)
        Query pairs (node indices).
    costs : planner.traffic.CostVersion, optional
        Live traffic the service searches under (``--traffic``): optima and route costs are
        computed on its ``travel_time_s`` (closed edges ``+inf``), and answers naming another
        ``traffic_version`` than ``expected_version`` (when given) are counted.
    """

    def __init__(
        self,
        graph: Any,
        pairs: Sequence[tuple[int, int]],
        costs: Any = None,
        expected_version: int | None = None,
        turn_profile: Any = None,
    ) -> None:
        from dueroute.planner.endpoints import legal_distances, search_graph_for
        from dueroute.planner.turns import TurnProfile

        self.graph = graph
        self.n_nodes = int(graph.n_nodes)
        self.costs = costs
        self.expected_version = expected_version
        road_cost = np.asarray(graph.travel_time_s if costs is None else costs.travel_time_s)
        # cheapest of parallel edges, on the live costs when given
        self.csr = graph.csr(None if costs is None else costs.travel_time_s)
        self.osm_id = np.asarray(graph.osm_id)
        self.turn_profile = TurnProfile() if turn_profile is None else turn_profile
        sg, _ = search_graph_for(graph, self.turn_profile)
        #: a route's cost is the sum of its road edges' costs (no turn costs to add)
        self.checks_path_cost = sg.identity or float(np.max(sg.turn_cost_s, initial=0.0)) == 0.0
        # under turn rules the optimum is the legal one (planner.endpoints.legal_distances)
        self.optimal_s: dict[tuple[int, int], float] = {}
        origins = sorted({o for o, _ in pairs})
        wanted: dict[int, list[int]] = {}
        for o, d in pairs:
            wanted.setdefault(o, []).append(d)
        chunk = 32  # rows of the dense distance matrix held at once: chunk x n float64
        for i in range(0, len(origins), chunk):
            block = origins[i : i + chunk]
            dist = legal_distances(graph, block, self.turn_profile, road_cost)
            for row, o in enumerate(block):
                for d in wanted[o]:
                    self.optimal_s[(o, d)] = float(dist[row, d])

    def path_cost_s(self, node_indices: Sequence[int]) -> float | None:
        """Cost of the node path on the local graph, or None if a step is not an edge."""
        idx = np.asarray(node_indices, dtype=np.int64)
        if idx.size == 0:
            return None
        if idx.min() < 0 or idx.max() >= self.n_nodes:
            return None
        if idx.size == 1:
            return 0.0
        u, v = idx[:-1], idx[1:]
        total = 0.0
        indptr, indices, data = self.csr.indptr, self.csr.indices, self.csr.data
        for a, b in zip(u.tolist(), v.tolist(), strict=True):
            row = indices[indptr[a] : indptr[a + 1]]
            hit = np.flatnonzero(row == b)
            if hit.size == 0:
                return None
            total += float(data[indptr[a] + hit[0]])
        return total

    def check(self, origin: int, destination: int, plan: dict[str, Any]) -> dict[str, Any]:
        """True quality of one answer and the graph-agreement checks.

        Returns a dict with ``optimal_s``, ``quality`` (optimal / returned cost; 0 when a route
        exists but none was returned; None when no route exists), and booleans
        ``route_mismatch`` (route is not a path of the local graph with the claimed cost or its
        osm ids differ), ``cost_below_optimal`` and ``bound_above_optimal`` (both impossible on
        the same graph).
        """
        opt = self.optimal_s.get((origin, destination))
        out: dict[str, Any] = {
            "optimal_s": opt,
            "quality": None,
            "route_mismatch": False,
            "cost_below_optimal": False,
            "bound_above_optimal": False,
        }
        if opt is None:
            return out
        cost = plan.get("cost_s")
        bound = plan.get("lower_bound_s")
        if math.isfinite(opt):
            if cost is None:
                out["quality"] = 0.0
            else:
                cost = float(cost)
                out["quality"] = 1.0 if cost <= 0.0 and opt <= 0.0 else opt / cost
                out["cost_below_optimal"] = cost < opt * (1.0 - COST_RTOL) - 1e-9
            if bound is not None and math.isfinite(float(bound)):
                out["bound_above_optimal"] = float(bound) > opt * (1.0 + COST_RTOL) + 1e-9
        elif cost is not None:
            out["cost_below_optimal"] = True  # the server found a route the local graph lacks
        route = plan.get("route")
        if route is not None and cost is not None and self.checks_path_cost:
            props = route.get("properties", {}) if isinstance(route, dict) else {}
            nodes = props.get("node_indices")
            path_cost = self.path_cost_s(nodes) if nodes else None
            mismatch = path_cost is None or not math.isclose(
                path_cost, float(cost), rel_tol=COST_RTOL, abs_tol=1e-6
            )
            if not mismatch and nodes and (nodes[0] != origin or nodes[-1] != destination):
                mismatch = True
            ids = props.get("node_ids")
            if not mismatch and ids is not None and nodes:
                mismatch = [int(x) for x in ids] != self.osm_id[np.asarray(nodes)].tolist()
            out["route_mismatch"] = bool(mismatch)
        return out


# --------------------------------------------------------------------------------------------
# Statistics (pure functions, checked against numpy in the tests)


def percentile(sorted_values: Sequence[float], q: float) -> float | None:
    """The ``q``-th percentile (0..100) of already sorted values, linear interpolation.

    Same definition as ``numpy.percentile(..., method="linear")``: position ``(n - 1) q / 100``
    between the two nearest ranks. None for no values.
    """
    n = len(sorted_values)
    if n == 0:
        return None
    if not 0.0 <= q <= 100.0:
        raise ValueError(f"percentile q must be in [0, 100], got {q}")
    pos = (n - 1) * q / 100.0
    lo = int(math.floor(pos))
    hi = min(lo + 1, n - 1)
    frac = pos - lo
    a, b = float(sorted_values[lo]), float(sorted_values[hi])
    return a + (b - a) * frac if frac else a


def distribution(values: Sequence[float]) -> dict[str, float | None]:
    """mean, p50, p95, p99, min and max of ``values`` (None entries when empty)."""
    s = sorted(float(v) for v in values)
    if not s:
        return {
            "n": 0,
            "mean": None,
            "p50": None,
            "p95": None,
            "p99": None,
            "min": None,
            "max": None,
        }
    return {
        "n": len(s),
        "mean": math.fsum(s) / len(s),
        "p50": percentile(s, 50),
        "p95": percentile(s, 95),
        "p99": percentile(s, 99),
        "min": s[0],
        "max": s[-1],
    }


def empirical_cdf(values: Sequence[float]) -> tuple[list[float], list[float]]:
    """Sorted values and their cumulative shares ``i / n`` (i = 1..n): the step CDF."""
    s = sorted(float(v) for v in values)
    n = len(s)
    return s, [(i + 1) / n for i in range(n)]


@dataclass
class RequestRecord:
    """What the client saw for one request (times in ms, costs in s)."""

    controller: str
    concurrency: int
    deadline_ms: int
    origin: int
    destination: int
    latency_ms: float
    http_status: int | None  # None: transport error or timeout
    plan_status: str | None = None
    cost_s: float | None = None
    lower_bound_s: float | None = None
    gap: float | None = None
    expansions: int | None = None
    server_total_ms: float | None = None
    queue_ms: float | None = None
    quality: float | None = None
    optimal_s: float | None = None
    route_mismatch: bool = False
    cost_below_optimal: bool = False
    bound_above_optimal: bool = False
    traffic_version: int | None = None
    traffic_version_mismatch: bool = False
    error: str | None = None

    @property
    def answered(self) -> bool:
        return self.http_status == 200 and self.plan_status in FINAL_STATUSES

    @property
    def shed(self) -> bool:
        return self.http_status in (429, 503)  # refused with Retry-After


@dataclass
class CellResult:
    controller: str
    concurrency: int
    deadline_ms: int
    wall_s: float = 0.0
    client_cpu_s: float = 0.0  # CPU time the load tester itself used during the cell
    complete: bool = False
    records: list[RequestRecord] = field(default_factory=list)


def summarize_cell(cell: CellResult, tolerance_ms: float) -> dict[str, Any]:
    """Per-cell statistics (see the module docstring for each number)."""
    recs = cell.records
    answers = [r for r in recs if r.answered]
    shed = [r for r in recs if r.shed]
    errors = [r for r in recs if not r.answered and not r.shed]
    lat = distribution([r.latency_ms for r in answers])
    late = sum(1 for r in answers if r.latency_ms > cell.deadline_ms + tolerance_ms)
    # the service's own clock (arrival to answer built): excludes HTTP and client overhead
    srv = [float(r.server_total_ms) for r in answers if r.server_total_ms is not None]
    late_srv = sum(1 for v in srv if v > cell.deadline_ms + tolerance_ms)
    routed = [r for r in answers if r.cost_s is not None]
    gaps = sorted(float(r.gap) for r in routed if r.gap is not None)
    proven = [1.0 - g for g in gaps]  # bound / cost: quality proven by the server itself
    qualities = sorted(float(r.quality) for r in answers if r.quality is not None)
    n_req, n_ans = len(recs), len(answers)
    error_kinds: dict[str, int] = {}
    for r in errors:
        key = r.error or f"HTTP {r.http_status}"
        error_kinds[key] = error_kinds.get(key, 0) + 1
    return {
        "controller": cell.controller,
        "concurrency": cell.concurrency,
        "deadline_ms": cell.deadline_ms,
        "complete": cell.complete,
        "wall_s": cell.wall_s,
        # share of one core the load generator used: it competes with the service on one host
        "client_cpu_share": cell.client_cpu_s / cell.wall_s if cell.wall_s > 0 else None,
        "requests": n_req,
        "answers": n_ans,
        "throughput_per_s": n_ans / cell.wall_s if cell.wall_s > 0 else None,
        "latency_ms": lat,
        "late": late,
        "late_share": late / n_ans if n_ans else None,
        "server_latency_ms": distribution(srv),
        "late_by_server_clock": late_srv,
        "late_by_server_clock_share": late_srv / len(srv) if srv else None,
        "shed": len(shed),
        "shed_share": len(shed) / n_req if n_req else None,
        "errors": len(errors),
        "error_kinds": dict(sorted(error_kinds.items(), key=lambda kv: -kv[1])[:5]),
        "with_route_share": len(routed) / n_ans if n_ans else None,
        "optimal_share": sum(1 for r in answers if r.plan_status == "optimal") / n_ans
        if n_ans
        else None,
        "gap": {
            "n": len(gaps),
            "mean": math.fsum(gaps) / len(gaps) if gaps else None,
            "median": percentile(gaps, 50),
            "p95": percentile(gaps, 95),
        },
        "proven_quality_mean": math.fsum(proven) / len(proven) if proven else None,
        "quality": {
            "n": len(qualities),
            "mean": math.fsum(qualities) / len(qualities) if qualities else None,
            "median": percentile(qualities, 50),
            "p5": percentile(qualities, 5),
            "exact_share": sum(1 for q in qualities if q >= 1.0 - COST_RTOL) / len(qualities)
            if qualities
            else None,
        },
        "route_mismatches": sum(1 for r in answers if r.route_mismatch),
        "cost_below_optimal": sum(1 for r in answers if r.cost_below_optimal),
        "bound_above_optimal": sum(1 for r in answers if r.bound_above_optimal),
        "traffic_version_mismatches": sum(1 for r in answers if r.traffic_version_mismatch),
        "queue_ms_mean": _mean([r.queue_ms for r in answers]),
        "expansions_mean": _mean([r.expansions for r in answers]),
    }


def _mean(values: Sequence[float | int | None]) -> float | None:
    vals = [float(v) for v in values if v is not None]
    return math.fsum(vals) / len(vals) if vals else None


# --------------------------------------------------------------------------------------------
# Running the grid


@dataclass
class LoadTestResult:
    """Everything a run gathered; filled as it goes so an interrupt keeps what was measured."""

    config: LoadTestConfig
    queries: list[tuple[int, int]]
    cells: list[CellResult] = field(default_factory=list)
    server: dict[str, Any] = field(default_factory=dict)
    graph_check: dict[str, Any] = field(default_factory=dict)
    reference: bool = False
    queries_source: str = ""
    started_at: float = field(default_factory=time.time)
    finished_at: float | None = None
    interrupted: bool = False


class TargetError(InvalidRequest):
    """The target service is not reachable, not ready or refuses the test's requests."""


def _parse_retry_after_s(value: str | None) -> float | None:
    if value is None:
        return None
    try:
        return max(0.0, float(value))
    except ValueError:
        return None  # HTTP-date form: ignore, use the configured backoff


async def _one_request(
    client: Any,
    config: LoadTestConfig,
    controller: str,
    concurrency: int,
    deadline_ms: int,
    pair: tuple[int, int],
    keep_route: bool = False,
) -> tuple[RequestRecord, float | None, dict[str, Any] | None]:
    """Send one plan request.

    Returns its record, the Retry-After (s) of a shed answer, and (with ``keep_route``) the
    few plan fields the reference check needs — checked after the cell so that the check's
    CPU time never delays the timing of requests still in flight.
    """
    import httpx

    origin, destination = pair
    body = {
        "origin": {"node": origin},
        "destination": {"node": destination},
        "deadline_ms": deadline_ms,
        "controller": controller,
        "wait": True,
    }
    rec = RequestRecord(
        controller=controller,
        concurrency=concurrency,
        deadline_ms=deadline_ms,
        origin=origin,
        destination=destination,
        latency_ms=0.0,
        http_status=None,
    )
    timeout_s = deadline_ms / 1000.0 + config.timeout_margin_s
    t0 = time.perf_counter()
    try:
        resp = await client.post("/v1/plans", json=body, timeout=timeout_s)
        rec.latency_ms = (time.perf_counter() - t0) * 1000.0
    except (httpx.TimeoutException, TimeoutError):
        rec.latency_ms = (time.perf_counter() - t0) * 1000.0
        rec.error = f"timeout after {timeout_s:g} s"
        return rec, None, None
    except (httpx.HTTPError, LeanHTTPError) as exc:
        rec.latency_ms = (time.perf_counter() - t0) * 1000.0
        rec.error = f"transport: {type(exc).__name__}"
        return rec, None, None
    rec.http_status = resp.status_code
    if resp.status_code in (429, 503):  # refused with Retry-After (overload, caller limit)
        return rec, _parse_retry_after_s(resp.headers.get("retry-after")), None
    if resp.status_code != 200:
        rec.error = f"HTTP {resp.status_code}: {_detail(resp)}"
        return rec, None, None
    kept: dict[str, Any] | None = None
    try:
        plan = resp.json()
        rec.plan_status = plan.get("status")
        if rec.plan_status not in FINAL_STATUSES:
            rec.error = f"unexpected plan status {rec.plan_status!r}"
            return rec, None, None
        rec.cost_s = _opt_float(plan.get("cost_s"))
        rec.lower_bound_s = _opt_float(plan.get("lower_bound_s"))
        rec.gap = _opt_float(plan.get("gap"))
        exp = plan.get("expansions")
        rec.expansions = int(exp) if exp is not None else None
        timings = plan.get("timings") or {}
        rec.server_total_ms = _opt_float(timings.get("total_ms"))
        rec.queue_ms = _opt_float(timings.get("queue_ms"))
        tv = plan.get("traffic_version")
        rec.traffic_version = int(tv) if isinstance(tv, int) else None
        if plan.get("origin_node") != origin or plan.get("destination_node") != destination:
            rec.route_mismatch = True
        if keep_route:
            route = plan.get("route")
            props = route.get("properties", {}) if isinstance(route, dict) else {}
            kept = {
                "cost_s": rec.cost_s,
                "lower_bound_s": rec.lower_bound_s,
                "route": None
                if route is None
                else {
                    "properties": {
                        "node_indices": props.get("node_indices"),
                        "node_ids": props.get("node_ids"),
                    }
                },
            }
    except (ValueError, TypeError, AttributeError) as exc:
        rec.plan_status = None
        rec.error = f"bad plan body: {type(exc).__name__}"
    return rec, None, kept


def apply_reference(rec: RequestRecord, reference: Reference, plan: dict[str, Any]) -> None:
    """Fill the record's true quality and graph-agreement flags from the reference."""
    chk = reference.check(rec.origin, rec.destination, plan)
    rec.quality = chk["quality"]
    rec.optimal_s = chk["optimal_s"]
    rec.route_mismatch = rec.route_mismatch or chk["route_mismatch"]
    rec.cost_below_optimal = chk["cost_below_optimal"]
    rec.bound_above_optimal = chk["bound_above_optimal"]
    expected = reference.expected_version
    # an answer that never searched (its deadline passed in the queue) names no version
    rec.traffic_version_mismatch = (
        expected is not None and rec.traffic_version is not None and rec.traffic_version != expected
    )


def _opt_float(v: Any) -> float | None:
    return float(v) if v is not None else None


def _detail(resp: Any) -> str:
    try:
        detail = resp.json().get("detail")
    except (ValueError, AttributeError):
        detail = None
    text = detail if isinstance(detail, str) else json.dumps(detail) if detail else resp.text
    return str(text)[:200]


async def run_cell(
    client: Any,
    config: LoadTestConfig,
    cell: CellResult,
    queries: Sequence[tuple[int, int]],
    reference: Reference | None = None,
    on_record: Callable[[RequestRecord], None] | None = None,
) -> CellResult:
    """Keep ``cell.concurrency`` requests in flight until the duration or the request cap.

    Records land in ``cell.records`` as they complete, so a cancelled cell keeps its data.
    Bounded: a worker starts a request only while time and the request budget remain, and
    each request is abandoned after ``deadline + timeout_margin_s``.
    """
    label = f"{config.seed}/{cell.controller}/{cell.concurrency}/{cell.deadline_ms}"
    rng = random.Random(zlib.crc32(label.encode()))  # same order in every run of this cell
    order = list(queries)
    rng.shuffle(order)
    issued = 0
    t_start = time.perf_counter()
    cpu_start = time.process_time()
    t_stop = t_start + config.duration_s

    pending: list[tuple[RequestRecord, dict[str, Any]]] = []

    async def worker() -> None:
        nonlocal issued
        while time.perf_counter() < t_stop and issued < config.max_requests:
            pair = order[issued % len(order)]
            issued += 1  # single-threaded event loop: no other worker runs in between
            rec, retry_after_s, kept = await _one_request(
                client,
                config,
                cell.controller,
                cell.concurrency,
                cell.deadline_ms,
                pair,
                keep_route=reference is not None,
            )
            cell.records.append(rec)
            if kept is not None:
                pending.append((rec, kept))
            if on_record is not None:
                on_record(rec)
            if rec.shed:
                wait_s = config.shed_backoff_ms / 1000.0
                if retry_after_s is not None:
                    wait_s = min(wait_s, retry_after_s)
                wait_s = min(wait_s, max(0.0, t_stop - time.perf_counter()))
                if wait_s > 0:
                    await asyncio.sleep(wait_s)

    try:
        await asyncio.gather(*(worker() for _ in range(cell.concurrency)))
        cell.complete = True
    finally:
        cell.wall_s = time.perf_counter() - t_start
        cell.client_cpu_s = time.process_time() - cpu_start
        if reference is not None:
            for rec, kept in pending:
                apply_reference(rec, reference, kept)
    return cell


async def wait_ready(client: Any, timeout_s: float) -> dict[str, Any]:
    """Poll ``GET /readyz`` until it answers 200 (bounded by ``timeout_s``); return its body."""
    import httpx

    t_end = time.perf_counter() + timeout_s
    last = "no answer"
    while True:
        try:
            resp = await client.get("/readyz", timeout=5.0)
            if resp.status_code == 200:
                try:
                    body = resp.json()
                except ValueError:
                    body = {}
                return body if isinstance(body, dict) else {}
            last = f"/readyz answered {resp.status_code}"
        except httpx.HTTPError as exc:
            last = f"cannot connect ({type(exc).__name__})"
        if time.perf_counter() >= t_end:
            raise TargetError(
                f"the service at {client.base_url} is not ready after {timeout_s:g} s: {last}; "
                "start it with 'dueroute serve' (or raise --ready-timeout)"
            )
        await asyncio.sleep(0.5)


def _find_key(obj: Any, names: tuple[str, ...], depth: int = 0) -> Any:
    """First value stored under one of ``names`` anywhere in a small JSON document."""
    if depth > 4:
        return None
    if isinstance(obj, dict):
        for k in names:
            if k in obj and not isinstance(obj[k], (dict, list)):
                return obj[k]
        for v in obj.values():
            found = _find_key(v, names, depth + 1)
            if found is not None:
                return found
    return None


def check_server_graph(ready_body: dict[str, Any], graph: Any) -> dict[str, Any]:
    """Compare the server's graph (as /readyz describes it) with the local one.

    Uses the graph fingerprint when the service reports one, else its node count; when the
    service reports neither, says so: the per-answer route checks (path of the local graph with
    the claimed cost, osm ids) then carry the comparison.
    """
    fp = _find_key(ready_body, ("graph_fingerprint", "fingerprint"))
    if fp is not None:
        ok = str(fp) == graph.fingerprint
        return {
            "method": "fingerprint",
            "ok": ok,
            "server": str(fp),
            "local": graph.fingerprint,
        }
    nodes = _find_key(ready_body, ("graph_nodes", "nodes", "n_nodes"))
    if nodes is not None:
        try:
            ok = int(nodes) == graph.n_nodes
        except (TypeError, ValueError):
            ok = False
        return {"method": "node_count", "ok": ok, "server": nodes, "local": graph.n_nodes}
    return {
        "method": "answers",
        "ok": None,
        "detail": "the service reports no graph fingerprint or node count; every answer's "
        "route is checked against the local graph instead (route_mismatches)",
    }


async def _warm_up(client: Any, config: LoadTestConfig, queries: Sequence[tuple[int, int]]) -> None:
    """Unrecorded requests per controller; a refusal (4xx) stops the run with its reason."""
    deadline = max(config.deadlines_ms)
    for controller in config.controllers:
        for i in range(config.warmup_requests):
            rec, _, _ = await _one_request(
                client, config, controller, 1, deadline, queries[i % len(queries)]
            )
            if rec.http_status is not None and 400 <= rec.http_status < 500:
                raise TargetError(
                    f"the service refused a warm-up request for controller {controller!r} "
                    f"({rec.error}); fix the --controller value or the queries"
                )


async def run_loadtest(
    config: LoadTestConfig,
    queries: Sequence[tuple[int, int]],
    *,
    graph: Any = None,
    reference: Reference | None = None,
    result: LoadTestResult | None = None,
    transport: Any = None,
    on_record: Callable[[RequestRecord], None] | None = None,
    on_cell: Callable[[CellResult], None] | None = None,
    traffic_doc: dict[str, Any] | None = None,
    admin_token: str | None = None,
) -> LoadTestResult:
    """Run the whole grid; ``result`` (if given) is filled in place as cells complete.

    ``transport`` replaces the network transport (tests pass an in-process ASGI transport).
    The client never follows redirects: every request goes to ``config.url``.

    With ``traffic_doc`` and ``admin_token`` the service's live traffic is first cleared and
    set to exactly this document (``DELETE`` then ``POST /v1/traffic``), and answers that name
    another ``traffic_version`` are counted (``traffic_version_mismatches``); the reference
    should then hold the same document's costs.
    """
    import httpx

    if not queries:
        raise InvalidRequest("no queries to send")
    if result is None:
        result = LoadTestResult(config=config, queries=list(queries))
    result.reference = reference is not None
    biggest = max(config.concurrency)
    limits = httpx.Limits(max_connections=biggest, max_keepalive_connections=biggest)
    async with httpx.AsyncClient(
        base_url=config.url,
        limits=limits,
        follow_redirects=False,
        transport=transport,
        headers={"user-agent": "dueroute-loadtest"},
    ) as client:
        ready = await wait_ready(client, config.ready_timeout_s)
        result.server = {"readyz": ready}
        if graph is not None:
            result.graph_check = check_server_graph(ready, graph)
            if result.graph_check.get("ok") is False:
                gc = result.graph_check
                raise TargetError(
                    f"the service searches a different graph ({gc['method']}: server "
                    f"{gc['server']}, local {gc['local']}); pass the graph the service uses"
                )
        served = _find_key(ready, ("turn_profile",))
        if reference is not None and served is not None:
            local = reference.turn_profile.describe()
            if served != local:
                raise TargetError(
                    f"the service searches with another turn profile ({served}) than the local "
                    f"reference ({local}); pass the service's --turn-costs and --uturns"
                )
        try:
            resp = await client.get("/v1/policy", timeout=5.0)
            if resp.status_code == 200:
                result.server["policy"] = resp.json()
        except (httpx.HTTPError, ValueError):
            pass  # the policy is context for the report, not needed for the run
        if traffic_doc is not None and admin_token is not None:
            result.server["traffic"] = await _set_traffic(client, traffic_doc, admin_token)
            if reference is not None:
                reference.expected_version = result.server["traffic"]["version"]
        else:
            try:
                resp = await client.get("/v1/traffic", timeout=5.0)
                if resp.status_code == 200:
                    result.server["traffic"] = _traffic_summary(resp.json())
            except (httpx.HTTPError, ValueError):
                pass  # context for the report only
        # The plan requests go through the lean client (a fraction of httpx's CPU per request,
        # which this machine's cores would otherwise take from the service); an in-process
        # transport (tests) keeps httpx.
        plans_client: Any = client if transport is not None else LeanClient(config.url)
        try:
            await _warm_up(plans_client, config, queries)
            for controller, concurrency, deadline_ms in config.cells():
                cell = CellResult(controller, concurrency, deadline_ms)
                result.cells.append(cell)
                await run_cell(plans_client, config, cell, queries, reference, on_record)
                if on_cell is not None:
                    on_cell(cell)
        finally:
            if plans_client is not client:
                await plans_client.aclose()
    result.finished_at = time.time()
    return result


def _traffic_summary(info: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in info.items() if k != "updates"}


async def _set_traffic(client: Any, doc: dict[str, Any], token: str) -> dict[str, Any]:
    """Make the service's live traffic exactly ``doc``; returns its traffic summary."""
    headers = {"Authorization": f"Bearer {token}"}
    resp = await client.delete("/v1/traffic", headers=headers, timeout=30.0)
    if resp.status_code != 200:
        raise TargetError(f"DELETE /v1/traffic was refused ({_detail(resp)})")
    resp = await client.post("/v1/traffic", json=doc, headers=headers, timeout=60.0)
    if resp.status_code != 200:
        raise TargetError(f"POST /v1/traffic was refused ({_detail(resp)})")
    return _traffic_summary(resp.json()["traffic"])


# --------------------------------------------------------------------------------------------
# Reports


def summarize(result: LoadTestResult) -> dict[str, Any]:
    """The ``summary.json`` document."""
    cfg = asdict(result.config)
    return {
        "tool": "dueroute loadtest",
        "config": cfg,
        "queries": len(result.queries),
        "queries_source": result.queries_source,
        "reference": result.reference,
        "graph_check": result.graph_check,
        "server": result.server,
        "started_at": _iso(result.started_at),
        "finished_at": _iso(result.finished_at) if result.finished_at is not None else None,
        "interrupted": result.interrupted,
        "cells": [summarize_cell(c, result.config.tolerance_ms) for c in result.cells],
    }


def _iso(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


def _fmt(v: Any, spec: str = ".1f", none: str = "–") -> str:
    return none if v is None else format(v, spec)


def _pct(v: float | None) -> str:
    return "–" if v is None else f"{100.0 * v:.1f}%"


def markdown_table(summary: dict[str, Any]) -> str:
    """One row per cell: the table ``summary.md`` holds and the README quotes."""
    ref = bool(summary.get("reference"))
    head = [
        "controller",
        "conc.",
        "deadline ms",
        "answers/s",
        "p50 ms",
        "p95 ms",
        "p99 ms",
        "max ms",
        "server p95 ms",
        "late",
        "late (server)",
        "shed",
        "errors",
        "mean gap",
        "p95 gap",
        "optimal",
    ]
    if ref:
        head += ["quality mean", "quality p5"]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for c in summary["cells"]:
        lat, gap, q = c["latency_ms"], c["gap"], c["quality"]
        row = [
            c["controller"],
            str(c["concurrency"]),
            str(c["deadline_ms"]),
            _fmt(c["throughput_per_s"]),
            _fmt(lat["p50"]),
            _fmt(lat["p95"]),
            _fmt(lat["p99"]),
            _fmt(lat["max"]),
            _fmt(c["server_latency_ms"]["p95"]),
            _pct(c["late_share"]),
            _pct(c["late_by_server_clock_share"]),
            _pct(c["shed_share"]),
            str(c["errors"]),
            _pct(gap["mean"]),
            _pct(gap["p95"]),
            _pct(c["optimal_share"]),
        ]
        if ref:
            row += [_fmt(q["mean"], ".3f"), _fmt(q["p5"], ".3f")]
        lines.append("| " + " | ".join(row) + " |")
    return "\n".join(lines)


def markdown_report(summary: dict[str, Any]) -> str:
    cfg = summary["config"]
    gc = summary.get("graph_check") or {}
    notes = [
        f"# dueroute load test — {summary['started_at']}",
        "",
        f"Target {cfg['url']}; {summary['queries']} queries "
        f"({summary.get('queries_source') or 'given'}); {cfg['duration_s']:g} s per cell "
        f"(at most {cfg['max_requests']} requests); late = beyond deadline + "
        f"{cfg['tolerance_ms']:g} ms (client-measured latency, includes HTTP overhead).",
    ]
    if summary.get("interrupted"):
        notes.append("")
        notes.append("**Interrupted**: the table holds the cells measured before the stop.")
    if gc:
        notes.append("")
        notes.append(f"Graph check: {gc.get('method')} — {gc.get('ok', gc.get('detail'))}")
    notes += ["", markdown_table(summary), ""]
    traffic = (summary.get("server") or {}).get("traffic")
    if traffic and (traffic.get("version") or traffic.get("source")):
        mism = sum(c.get("traffic_version_mismatches", 0) for c in summary["cells"])
        notes.append(
            f"Live traffic: {traffic.get('source') or 'as the service had it'}, cost version "
            f"{traffic.get('version')} ({traffic.get('active_updates')} updates, "
            f"{traffic.get('edges_changed', 0):,} edges changed, bound "
            f"{traffic.get('bound_quality')}); answers on another version: {mism}."
        )
    if summary.get("reference"):
        notes.append(
            "quality = optimal cost / returned cost, exact costs from scipy.sparse.csgraph."
            "dijkstra on the same graph and costs (0 when a route exists but none was returned)."
        )
    notes.append(
        "Latencies are client-measured (HTTP and client included); 'server p95' and "
        "'late (server)' use the service's own timings.total_ms (arrival to answer built)."
    )
    shares = [c["client_cpu_share"] for c in summary["cells"] if c.get("client_cpu_share")]
    if shares:
        notes.append(
            f"The load generator itself used {100 * min(shares):.0f}–{100 * max(shares):.0f} % "
            "of one core per cell (on the same host as the service, it competes for the CPU)."
        )
    notes.append("gap = (cost - lower bound) / cost as the service proved it.")
    return "\n".join(notes) + "\n"


def write_outputs(result: LoadTestResult, out_dir: str | Path) -> dict[str, Path]:
    """Write summary.json, summary.md, requests.csv and the plots; return their paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    summary = summarize(result)
    paths = {
        "summary_json": out / "summary.json",
        "summary_md": out / "summary.md",
        "requests_csv": out / "requests.csv",
    }
    paths["summary_json"].write_text(json.dumps(summary, indent=2, default=str) + "\n")
    paths["summary_md"].write_text(markdown_report(summary))
    records = [r for c in result.cells for r in c.records]
    with open(paths["requests_csv"], "w", newline="") as fh:
        names = [f for f in RequestRecord.__dataclass_fields__]
        writer = csv.DictWriter(fh, fieldnames=names)
        writer.writeheader()
        for r in records:
            writer.writerow(asdict(r))
    paths.update(write_plots(result, out))
    return paths


def _quality_of(r: RequestRecord, use_reference: bool) -> float | None:
    """True quality with a reference, else the proven one (bound / cost = 1 - gap)."""
    if use_reference:
        return r.quality
    if r.cost_s is None:
        return 0.0
    return 1.0 - r.gap if r.gap is not None else None


def write_plots(result: LoadTestResult, out: Path, *, max_points: int = 4000) -> dict[str, Path]:
    """Three PNGs: latency vs quality per deadline, latency CDF per concurrency, quality vs
    deadline per controller."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import ScalarFormatter

    use_ref = result.reference
    qlabel = "quality = optimal / returned cost" if use_ref else "proven quality = bound / cost"
    deadlines = sorted({c.deadline_ms for c in result.cells})
    concs = sorted({c.concurrency for c in result.cells})
    controllers = list(dict.fromkeys(c.controller for c in result.cells))
    colors = plt.get_cmap("viridis")
    paths: dict[str, Path] = {}
    rng = random.Random(0)

    def color(i: int, n: int) -> Any:
        return colors(0.1 + 0.8 * (i / max(1, n - 1)))

    # 1. latency against quality, one colour per deadline
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for i, d in enumerate(deadlines):
        pts = [
            (r.latency_ms, q)
            for c in result.cells
            if c.deadline_ms == d
            for r in c.records
            if r.answered and (q := _quality_of(r, use_ref)) is not None
        ]
        if not pts:
            continue
        if len(pts) > max_points // max(1, len(deadlines)):
            pts = rng.sample(pts, max_points // max(1, len(deadlines)))
        lat_pts = [p[0] for p in pts]
        q_pts = [p[1] for p in pts]
        ax.scatter(lat_pts, q_pts, s=6, alpha=0.35, color=color(i, len(deadlines)), label=f"{d} ms")
        lat_sorted = sorted(lat_pts)
        p50 = float(np.percentile(lat_sorted, 50))
        p95 = float(np.percentile(lat_sorted, 95))
        ymean = float(np.mean(q_pts))
        ax.plot([p50], [ymean], marker="o", ms=9, mec="black", color=color(i, len(deadlines)))
        ax.plot([p95], [ymean], marker="^", ms=9, mec="black", color=color(i, len(deadlines)))
        ax.axvline(d, color=color(i, len(deadlines)), lw=0.8, ls=":")
    ax.set_xscale("log")
    ax.set_xlabel("client latency (ms, log); dotted = deadline; ● p50, ▲ p95 at mean quality")
    ax.set_ylabel(qlabel)
    ax.set_title("Latency against route quality, per deadline")
    ax.grid(True, alpha=0.3)
    ax.legend(title="deadline", fontsize=8)
    fig.tight_layout()
    paths["plot_latency_quality"] = out / "latency_vs_quality.png"
    fig.savefig(paths["plot_latency_quality"], dpi=110)
    plt.close(fig)

    # 2. latency CDF, one panel per deadline, one line per concurrency
    ncol = len(deadlines) or 1
    fig, axes = plt.subplots(1, ncol, figsize=(3.2 * ncol, 3.4), squeeze=False, sharey=True)
    for j, d in enumerate(deadlines):
        ax = axes[0][j]
        for i, conc in enumerate(concs):
            lat = [
                r.latency_ms
                for c in result.cells
                if c.deadline_ms == d and c.concurrency == conc
                for r in c.records
                if r.answered
            ]
            if lat:
                cdf_x, cdf_y = empirical_cdf(lat)
                ax.step(cdf_x, cdf_y, where="post", color=color(i, len(concs)), label=f"{conc}")
        if not ax.lines:
            ax.text(
                0.5,
                0.5,
                "no answers\n(all shed or failed)",
                ha="center",
                va="center",
                transform=ax.transAxes,
            )
        ax.axvline(d + result.config.tolerance_ms, color="red", lw=0.8, ls="--")
        ax.set_xscale("log")
        ax.set_title(f"deadline {d} ms")
        ax.set_xlabel("latency (ms, log)")
        ax.grid(True, alpha=0.3)
    axes[0][0].set_ylabel("share of answers")
    axes[0][-1].legend(title="concurrency", fontsize=8)
    fig.suptitle("Latency CDF per concurrency (red: deadline + tolerance)")
    fig.tight_layout()
    paths["plot_latency_cdf"] = out / "latency_cdf.png"
    fig.savefig(paths["plot_latency_cdf"], dpi=110)
    plt.close(fig)

    # 3. quality against deadline, one line per controller (line style per concurrency)
    fig, ax = plt.subplots(figsize=(6.5, 4))
    styles = ["-", "--", ":", "-."]
    for i, k in enumerate(controllers):
        for j, conc in enumerate(concs):
            dl_x: list[int] = []
            q_y: list[float] = []
            for d in deadlines:
                qs = [
                    q
                    for c in result.cells
                    if c.controller == k and c.concurrency == conc and c.deadline_ms == d
                    for r in c.records
                    if r.answered and (q := _quality_of(r, use_ref)) is not None
                ]
                if qs:
                    dl_x.append(d)
                    q_y.append(float(np.mean(qs)))
            if dl_x:
                ax.plot(
                    dl_x,
                    q_y,
                    marker="o",
                    ls=styles[j % len(styles)],
                    color=color(i, len(controllers)),
                    label=f"{k}, conc. {conc}",
                )
    _deadline_axis(ax, deadlines)
    ax.set_ylabel(f"mean {qlabel}")
    ax.set_title("Quality against deadline, per controller")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7)
    fig.tight_layout()
    paths["plot_quality_deadline"] = out / "quality_vs_deadline.png"
    fig.savefig(paths["plot_quality_deadline"], dpi=110)
    plt.close(fig)

    # 4. overview: what a deadline buys (latency, quality, shed share against the deadline)
    summary = [summarize_cell(c, result.config.tolerance_ms) for c in result.cells]
    fig, axes = plt.subplots(1, 3, figsize=(13, 3.8))
    for i, k in enumerate(controllers):
        for j, conc in enumerate(concs):
            cells = sorted(
                (c for c in summary if c["controller"] == k and c["concurrency"] == conc),
                key=lambda c: c["deadline_ms"],
            )
            style = dict(color=color(i, len(controllers)), ls=styles[j % len(styles)], marker="o")
            label = f"{k}, conc. {conc}"
            ans = [c for c in cells if c["answers"]]
            axes[0].plot(
                [c["deadline_ms"] for c in ans],
                [c["latency_ms"]["p95"] for c in ans],
                label=label,
                **style,
            )
            qkey = "mean" if use_ref else None
            by_deadline: list[tuple[int, float]] = [
                (int(c["deadline_ms"]), float(q))
                for c in ans
                if (q := c["quality"][qkey] if qkey else c["proven_quality_mean"]) is not None
            ]
            if by_deadline:
                axes[1].plot(
                    [d for d, _ in by_deadline],
                    [q for _, q in by_deadline],
                    label=label,
                    **style,
                )
            axes[2].plot(
                [c["deadline_ms"] for c in cells],
                [100.0 * (c["shed_share"] or 0.0) for c in cells],
                label=label,
                **style,
            )
    lim = [min(deadlines), max(deadlines)] if deadlines else [1, 2]
    axes[0].plot(
        lim,
        [v + result.config.tolerance_ms for v in lim],
        color="red",
        lw=0.8,
        ls="--",
        label="deadline + tolerance",
    )
    axes[0].set_yscale("log")
    axes[0].yaxis.set_major_formatter(ScalarFormatter())
    axes[0].yaxis.set_minor_formatter(ScalarFormatter())
    axes[0].set_ylabel("p95 client latency (ms, log)")
    axes[1].set_ylabel(f"mean {qlabel}")
    axes[2].set_ylabel("shed (503) share of requests (%)")
    for ax in axes:
        _deadline_axis(ax, deadlines)
        ax.grid(True, alpha=0.3)
    axes[0].legend(fontsize=7)
    fig.suptitle("What a deadline buys: latency, route quality and shedding against the deadline")
    fig.tight_layout()
    paths["plot_overview"] = out / "overview.png"
    fig.savefig(paths["plot_overview"], dpi=100)
    plt.close(fig)
    return paths


def _deadline_axis(ax: Any, deadlines: Sequence[int]) -> None:
    """Log x axis labelled with the deadlines themselves."""
    from matplotlib.ticker import NullFormatter

    ax.set_xscale("log")
    ax.set_xticks(list(deadlines))
    ax.set_xticklabels([str(d) for d in deadlines])
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("deadline (ms, log)")
