"""Prometheus metrics, one :class:`CollectorRegistry` per app (tests build several apps)."""

from __future__ import annotations

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    Info,
    generate_latest,
)

# Buckets in seconds: the interesting range is a few ms to a minute (deadline_ms <= 60000).
_LATENCY_BUCKETS_S = (
    0.001,
    0.0025,
    0.005,
    0.01,
    0.025,
    0.05,
    0.1,
    0.25,
    0.5,
    1.0,
    2.5,
    5.0,
    10.0,
    30.0,
    60.0,
)
_GAP_BUCKETS = (0.0, 0.001, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0)
_LATE_BUCKETS_S = (0.0, 0.0005, 0.001, 0.002, 0.005, 0.01, 0.025, 0.1)


class ServiceMetrics:
    """Every metric the service exports; ``render()`` is the ``/metrics`` body."""

    content_type = CONTENT_TYPE_LATEST

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.plans = Counter(
            "dueroute_plans",
            "Plan requests by outcome (optimal, improved, instant, no_route, not_found, "
            "cancelled, error, shed, store_full, rejected, not_ready, accepted_background)",
            ["outcome"],
            registry=r,
        )
        self.sheds = Counter(
            "dueroute_sheds", "Requests refused by admission control (503)", registry=r
        )
        self.refusals = Counter(
            "dueroute_refusals",
            "Plan requests refused before a search: below the service's floor (floor), over "
            "a caller's limits (caller_plans, caller_cpu), above an anonymous cap (anonymous), "
            "an unknown API key (api_key)",
            ["reason"],
            registry=r,
        )
        self.disconnects = Counter(
            "dueroute_client_disconnects",
            "wait=true plans whose client hung up before the answer (their search stopped)",
            registry=r,
        )
        self.late_answers = Counter(
            "dueroute_late_answers",
            "Answers built later than arrival + deadline_ms + DUEROUTE_DEADLINE_TOLERANCE_MS",
            registry=r,
        )
        self.watchdog = Counter(
            "dueroute_watchdog_answers",
            "wait=true answers given at the deadline because the search had not returned",
            registry=r,
        )
        self.latency = Histogram(
            "dueroute_plan_latency_seconds",
            "Arrival to answer built, for plans answered with wait=true",
            buckets=_LATENCY_BUCKETS_S,
            registry=r,
        )
        self.overhead = Histogram(
            "dueroute_plan_overhead_seconds",
            "Answer time minus search time (queue + snapping + serialisation)",
            buckets=_LATENCY_BUCKETS_S,
            registry=r,
        )
        self.gap = Histogram(
            "dueroute_plan_gap",
            "Gap of the answered route, (cost - bound) / cost",
            buckets=_GAP_BUCKETS,
            registry=r,
        )
        self.late = Histogram(
            "dueroute_plan_late_seconds",
            "How far past arrival + deadline_ms an answer was built (0 when on time)",
            buckets=_LATE_BUCKETS_S,
            registry=r,
        )
        self.loop_lag = Gauge(
            "dueroute_loop_lag_seconds",
            "Largest event-loop timer lag in the last second (added to the response headroom)",
            registry=r,
        )
        self.gc_pause = Histogram(
            "dueroute_gc_pause_seconds",
            "Python garbage-collector pauses (every thread waits for them)",
            ["generation"],
            buckets=(0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1),
            registry=r,
        )
        self.busy_workers = Gauge("dueroute_busy_workers", "Searches running now", registry=r)
        self.queued = Gauge(
            "dueroute_queued_plans", "Admitted plans waiting for a worker", registry=r
        )
        self.background = Gauge("dueroute_stored_plans", "Plans held in the plan store", registry=r)
        self.store_bytes = Gauge(
            "dueroute_plan_store_bytes",
            "The plan store's byte estimate of what its plans hold",
            registry=r,
        )
        self.store_running = Gauge(
            "dueroute_plan_store_running", "Stored plans still running", registry=r
        )
        self.store_expired = Gauge(
            "dueroute_plan_store_expired",
            "Stored plans forgotten after their time to live, since start",
            registry=r,
        )
        self.store_refusals = Counter(
            "dueroute_plan_store_refusals",
            "Plans refused (503) because the plan store was full, by the limit reached",
            ["limit"],
            registry=r,
        )
        self.policy_damaged = Gauge(
            "dueroute_policy_damaged_files",
            "Stored policy files that failed their sha256 or validity check at start-up",
            registry=r,
        )
        self.policy_swaps = Counter(
            "dueroute_policy_changes",
            "Policy swaps and rollbacks by result",
            ["result"],
            registry=r,
        )
        self.policy = Info("dueroute_active_policy", "The active policy", registry=r)
        self.ready = Gauge("dueroute_ready", "1 once the graph is loaded and warmed up", registry=r)

    def set_policy(self, sha256: str | None, source: str, fallback: str | None) -> None:
        self.policy.info(
            {"sha256": sha256 or "", "source": source, "fallback_controller": fallback or ""}
        )

    def observe_store(self, stats: dict[str, float | int]) -> None:
        self.background.set(stats["plans"])
        self.store_bytes.set(stats["bytes"])
        self.store_running.set(stats["running"])
        self.store_expired.set(stats["expired_total"])

    def render(self) -> bytes:
        return generate_latest(self.registry)
