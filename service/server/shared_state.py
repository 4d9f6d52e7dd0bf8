"""The state replicas share: one interface, an in-memory backend (one process) and its errors.

What a replica keeps and what several replicas must share:

===================  ==========================================  ============================
state                in memory (one process, the default)        Redis (``DUEROUTE_REDIS_URL``)
===================  ==========================================  ============================
stored plans         :class:`plan_store.MemoryPlanStore`         ``redis_state.RedisPlanStore``
and their events                                                 (final JSON + event stream)
live cost batches    ``traffic_store.JournalStore`` (a file)     ``redis_state.RedisTrafficStore``
active policy and    ``policy_store.PolicyStore`` (a directory)  ``redis_state.SharedPolicyStore``
its history
usage counters       :class:`MemoryUsage`                        ``redis_state.RedisUsage``
===================  ==========================================  ============================

:class:`SharedState` bundles one backend of each and is what the app builds at start-up
(``app.create_app``). Per replica in every case: the graph, the search threads and their queue
(admission control), the plans' search state, metrics.

A shared backend may become unreachable. Then what does not need it goes on (waited plans, the
plans this replica holds, reading the policy and the costs it has) and what would diverge or be
lost without it is refused with :class:`SharedStoreDown` (503 + ``Retry-After``): storing a
plan, reading a plan another replica holds, policy and traffic writes. It recovers by itself.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol

from dueroute.service.server.callers import Caller, CallerLimits
from dueroute.service.server.plan_store import MemoryPlanStore, PlanStore, StoreFull
from dueroute.service.server.policy_store import PolicyStore
from dueroute.service.server.traffic_store import JournalStore, TrafficStore


class SharedStoreDown(StoreFull):
    """The shared store is unreachable: the request needs it and is refused (503)."""

    def __init__(self, message: str, retry_after_s: int = 1) -> None:
        super().__init__(message, retry_after_s=retry_after_s, limit="shared_store")


# ------------------------------------------------------------------------------------------
# Usage counters (per-caller fairness limits)


class UsageCounters(Protocol):
    """How much each caller used in fixed time windows (``window_s`` long, aligned to the
    unix epoch), for limits that must hold across replicas.

    ``amount`` is whatever the limiter counts (requests, search milliseconds). Never blocks
    the request path: a shared backend counts locally at once and merges in the background,
    so a total may lag the other replicas' additions by a fraction of a second.
    """

    def add(self, caller: str, amount: float, window_s: float, now: float | None = None) -> float:
        """Add ``amount`` to ``caller``'s current window; returns the window's total."""
        ...

    def read(self, caller: str, window_s: float, now: float | None = None) -> float:
        """``caller``'s total in the current window (0 when nothing was added)."""
        ...


def window_index(window_s: float, now: float) -> int:
    """The fixed window ``now`` (unix seconds) falls in."""
    return int(now // window_s)


class MemoryUsage:
    """:class:`UsageCounters` of one process (thread-safe); windows older than the previous
    one are dropped as new ones start."""

    def __init__(self, clock: Callable[[], float] = time.time) -> None:
        self.clock = clock
        self._lock = threading.Lock()
        self._totals: dict[tuple[str, float, int], float] = {}

    def add(self, caller: str, amount: float, window_s: float, now: float | None = None) -> float:
        t = self.clock() if now is None else now
        key = (caller, float(window_s), window_index(window_s, t))
        with self._lock:
            total = self._totals.get(key, 0.0) + float(amount)
            self._totals[key] = total
            if len(self._totals) > 4096:  # amortised: forget windows that can never be read
                self._prune_locked(t)
            return total

    def read(self, caller: str, window_s: float, now: float | None = None) -> float:
        t = self.clock() if now is None else now
        with self._lock:
            return self._totals.get((caller, float(window_s), window_index(window_s, t)), 0.0)

    def _prune_locked(self, now: float) -> None:
        self._totals = {
            k: v for k, v in self._totals.items() if k[2] >= window_index(k[1], now) - 1
        }


class SharedCallerLimits(CallerLimits):
    """:class:`callers.CallerLimits` whose search-time budget holds across replicas.

    Every plan's search time is added to the caller's :class:`UsageCounters` (windows of
    ``window_s``); before admitting a plan, what the caller used on *other* replicas since the
    last look (the shared total minus this replica's own additions) is taken from its token
    bucket too. So the caller's refill rate and burst hold for the whole cluster, within the
    counters' merge delay (about 0.1 s with Redis). The cap on plans at once stays per replica.
    """

    def __init__(self, usage: UsageCounters, *, window_s: float = 10.0, **limits: Any) -> None:
        super().__init__(**limits)
        self.usage = usage
        self.window_s = window_s
        self._own: dict[tuple[str, int], float] = {}  # (label, window): added here
        self._charged: dict[tuple[str, int], float] = {}  # (label, window): others' taken

    def release(self, caller: Caller, search_s: float) -> None:
        super().release(caller, search_s)
        if search_s > 0:
            now = time.time()
            key = (caller.label, window_index(self.window_s, now))
            with self._lock:
                self._own[key] = self._own.get(key, 0.0) + search_s
            self.usage.add(caller.label, search_s, self.window_s, now=now)

    def acquire(self, caller: Caller) -> None:
        self._charge_others(caller.label)
        super().acquire(caller)

    def _charge_others(self, label: str) -> None:
        wall = time.time()
        current = window_index(self.window_s, wall)
        # this window and the one before (additions merge with a delay); never a read on Redis
        totals = {
            w: self.usage.read(label, self.window_s, now=(w + 0.5) * self.window_s)
            for w in (current - 1, current)
        }
        now = self.clock()
        with self._lock:
            taken = 0.0
            for w, total in totals.items():
                others = max(0.0, total - self._own.get((label, w), 0.0))
                taken += max(0.0, others - self._charged.get((label, w), 0.0))
                self._charged[(label, w)] = max(others, self._charged.get((label, w), 0.0))
            if taken > 0.0:
                self._bucket[label] = (self._tokens_locked(label, now) - taken, now)
            if len(self._charged) > 4096:
                for table in (self._own, self._charged):
                    for k in [k for k in table if k[1] < current - 1]:
                        del table[k]


# ------------------------------------------------------------------------------------------
# The bundle


class SharedState:
    """The in-memory backend of every store (one process); ``redis_state.RedisShared`` is
    the shared one with the same methods."""

    backend = "memory"

    def __init__(self, settings: Any) -> None:
        self.settings = settings
        self.plans: PlanStore = MemoryPlanStore(
            settings.background_max, settings.background_max_bytes, settings.background_ttl_s
        )
        self.usage: UsageCounters = MemoryUsage()

    def policy_store(self, on_adopt: Callable[[Any], None] | None = None) -> PolicyStore:
        """The policy store (``on_adopt``: called when another replica's policy is adopted)."""
        s = self.settings
        return PolicyStore(s.policy_dir, s.max_policy_bytes, on_damaged=s.on_damaged_policy)

    def traffic_store(self, graph_fingerprint: str) -> TrafficStore:
        return JournalStore(Path(self.settings.traffic_state_dir), graph_fingerprint)

    def watch_traffic(self, sync: Callable[[], Any]) -> None:
        """Call ``sync`` when another replica announces a cost batch (nothing to do here: one
        process, or replicas sharing the journal directory, which they poll)."""

    def require(self, what: str) -> None:
        """Raise :class:`SharedStoreDown` unless ``what`` can be done now (always can here)."""

    def start(self) -> None:
        """Connect and start background threads (nothing to start in memory)."""

    def stop(self) -> None:
        """Stop the background threads."""

    async def aclose(self) -> None:
        """Close what the running event loop opened."""

    def describe(self) -> dict[str, Any]:
        """For ``/readyz``."""
        return {"backend": self.backend}
