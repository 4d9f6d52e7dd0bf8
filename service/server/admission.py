"""Admission control: worker slots, a FIFO queue, and shedding what cannot start in time.

Every admitted plan holds a *search deadline* ``search_deadline_s`` (``perf_counter`` seconds):
arrival + deadline_ms - response headroom. The search never runs past it, whenever it starts,
so a plan occupies a worker slot until at most its search deadline. That gives a worst-case
schedule that needs no guess about how long searches take:

* a running plan frees its slot by its search deadline (earlier if it proves the optimum),
  plus the largest overrun seen in the last second (a thread starved of CPU ends late);
* queued plans take slots in FIFO order (the thread pool's order) and each frees its slot by
  its own search deadline, or at once if it can no longer start in time.

A new request is admitted if a worker is free now, or if, in that worst case, it starts at
least ``min_search_ms`` before its own search deadline; otherwise it is shed at once (503 +
``Retry-After``). The
estimate is pessimistic when searches finish early, never optimistic — but an admitted plan
never waits past its deadline in any case: a plan that starts late simply searches for less time
(and one that cannot start at all answers at once without searching).
"""

from __future__ import annotations

import asyncio
import contextlib
import heapq
import itertools
import math
import os
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any


@dataclass(eq=False)
class Ticket:
    """One admitted plan's claim on a worker slot."""

    ticket_id: int
    arrival_s: float
    search_deadline_s: float
    started_s: float | None = None
    finished_s: float | None = None
    cancel: threading.Event = field(default_factory=threading.Event)


class Shed(Exception):
    """The request cannot start in time; ``retry_after_s`` is when a slot is expected free."""

    def __init__(self, message: str, retry_after_s: int) -> None:
        super().__init__(message)
        self.retry_after_s = retry_after_s


class Admission:
    """Bounded worker pool with deadline-aware admission.

    Parameters
    ----------
    workers : int
        Searches that run at once; each runs in its own thread (the search kernel releases
        the GIL, so threads run on separate cores).
    min_search_ms : float
        A plan must be able to search at least this long or it is shed.
    clock : callable
        ``time.perf_counter`` (injected in tests).
    worker_nice : int
        Niceness added to each search thread (Linux schedules threads separately), so the
        event-loop thread that answers requests gets a core first when every core is busy.
    """

    def __init__(
        self,
        workers: int,
        min_search_ms: float,
        clock: Callable[[], float] = time.perf_counter,
        worker_nice: int = 0,
    ) -> None:
        if workers < 1:
            raise ValueError(f"workers must be >= 1, got {workers}")
        self.workers = workers
        self.min_search_s = min_search_ms / 1000.0
        self.clock = clock
        self._lock = threading.Lock()
        # Invariant: every admitted, unfinished ticket is in exactly one of these two.
        self._running: dict[int, Ticket] = {}
        self._queued: dict[int, Ticket] = {}  # insertion order == FIFO order of the pool
        self._ids = itertools.count(1)
        self.worker_nice = worker_nice
        self._executor: ThreadPoolExecutor | None = None
        self.admitted_total = 0
        self.shed_total = 0
        self._overrun_s = RecentMax(window_s=1.0)  # how late searches freed their worker

    def _pool(self) -> ThreadPoolExecutor:
        """The worker pool, (re)created on first use after construction or shutdown."""
        with self._lock:
            if self._executor is None:
                self._executor = ThreadPoolExecutor(
                    max_workers=self.workers,
                    thread_name_prefix="dueroute-search",
                    initializer=self._renice,
                )
            return self._executor

    def _renice(self) -> None:
        if self.worker_nice > 0 and hasattr(os, "setpriority"):
            with contextlib.suppress(OSError):  # not permitted or not supported: keep going
                os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), self.worker_nice)

    # ---------------------------------------------------------------------------------------
    def estimate_start_s(self, now_s: float) -> float:
        """Worst-case time at which a plan arriving now would get a worker slot."""
        with self._lock:
            return self._estimate_locked(now_s)

    def _estimate_locked(self, now_s: float) -> float:
        # A search frees its worker by its deadline plus the overrun seen lately (a starved
        # thread finishes late); one past that is assumed to finish any moment.
        overrun = self._overrun_s.value
        free = [max(now_s, t.search_deadline_s + overrun) for t in self._running.values()]
        free += [now_s] * (self.workers - len(free))
        heapq.heapify(free)
        for t in self._queued.values():
            start = heapq.heappop(free)
            # Starts at ``start`` and frees the slot by its deadline (at once if too late).
            heapq.heappush(free, max(start, t.search_deadline_s + overrun))
        return free[0]

    def admit(
        self, arrival_s: float, search_deadline_s: float, min_search_s: float | None = None
    ) -> Ticket:
        """Admit a plan or raise :class:`Shed` (never blocks).

        ``min_search_s`` overrides the configured minimum (a request whose whole deadline is
        shorter than the minimum asks for less).
        """
        need_s = self.min_search_s if min_search_s is None else min_search_s
        now = self.clock()
        with self._lock:
            start = self._estimate_locked(now)
            # A free worker always takes the plan: it starts now and searches what is left
            # (perhaps nothing, for a deadline shorter than the request's own handling).
            if start > now and start + need_s > search_deadline_s:
                self.shed_total += 1
                wait_s = max(0.0, start - now)
                busy = len(self._running)
                queued = len(self._queued)
                raise Shed(
                    f"overloaded: {busy} of {self.workers} workers busy and {queued} plans "
                    f"queued; a worker is expected free in {wait_s * 1000:.0f} ms, too late to "
                    f"search at least {need_s * 1000:.1f} ms before the deadline. "
                    "Retry later or with a longer deadline_ms.",
                    retry_after_s=max(1, math.ceil(wait_s)),
                )
            ticket = Ticket(next(self._ids), arrival_s, search_deadline_s)
            self._queued[ticket.ticket_id] = ticket
            self.admitted_total += 1
            return ticket

    def submit(self, ticket: Ticket, fn: Callable[[Ticket], Any]) -> Future[Any]:
        """Run ``fn(ticket)`` on a worker thread; the ticket moves queued -> running -> done."""

        def run() -> Any:
            with self._lock:
                self._queued.pop(ticket.ticket_id, None)
                self._running[ticket.ticket_id] = ticket
                ticket.started_s = self.clock()
            try:
                return fn(ticket)
            finally:
                with self._lock:
                    self._running.pop(ticket.ticket_id, None)
                    ticket.finished_s = self.clock()
                    self._overrun_s.record(
                        ticket.finished_s, max(0.0, ticket.finished_s - ticket.search_deadline_s)
                    )

        try:
            return self._pool().submit(run)
        except RuntimeError:  # pool shut down: release the claim
            with self._lock:
                self._queued.pop(ticket.ticket_id, None)
            raise

    def prestart(self, fn: Callable[[], Any]) -> list[Any]:
        """Run ``fn`` once on every worker thread at the same time (start-up only).

        Starts all the pool's threads now rather than on the first requests, and lets ``fn``
        warm per-thread state (the planner pools one search workspace per concurrent search).
        """
        barrier = threading.Barrier(self.workers)

        def run() -> Any:
            barrier.wait(timeout=60)
            return fn()

        pool = self._pool()
        futures = [pool.submit(run) for _ in range(self.workers)]
        return [f.result() for f in futures]

    def release(self, ticket: Ticket) -> None:
        """Drop a ticket that was admitted but never submitted (the request failed early)."""
        with self._lock:
            self._queued.pop(ticket.ticket_id, None)

    @property
    def busy(self) -> int:
        return len(self._running)

    @property
    def queued(self) -> int:
        return len(self._queued)

    def snapshot(self) -> dict[str, Any]:
        now = self.clock()
        with self._lock:
            start = self._estimate_locked(now)
            return {
                "workers": self.workers,
                "busy": len(self._running),
                "queued": len(self._queued),
                "next_free_in_ms": max(0.0, (start - now) * 1000.0),
                "recent_overrun_ms": self._overrun_s.value * 1000.0,
                "admitted_total": self.admitted_total,
                "shed_total": self.shed_total,
            }

    def shutdown(self) -> None:
        with self._lock:
            tickets = list(self._running.values()) + list(self._queued.values())
        for t in tickets:
            t.cancel.set()
        with self._lock:
            pool, self._executor = self._executor, None
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=False)


class RecentMax:
    """A high quantile (default the largest) of the values recorded in the last ``window_s``
    seconds (0 when none)."""

    def __init__(self, window_s: float = 1.0, quantile: float = 1.0) -> None:
        self.window_s = window_s
        self.quantile = quantile
        self._samples: deque[tuple[float, float]] = deque()  # (time, value), oldest first
        self.value = 0.0

    def record(self, now_s: float, value: float) -> None:
        self._samples.append((now_s, value))
        while self._samples and self._samples[0][0] < now_s - self.window_s:
            self._samples.popleft()
        if self.quantile >= 1.0:
            self.value = max(v for _, v in self._samples)
        else:
            ordered = sorted(v for _, v in self._samples)
            self.value = ordered[min(len(ordered) - 1, int(self.quantile * len(ordered)))]


class LoopLag:
    """How late the event loop runs a timer right now: the delay an answer would see.

    A task sleeps ``interval_s`` over and over and records how much later than asked it woke.
    :meth:`estimate_ms` is the 95th percentile of the lag in the last ``window_s`` seconds:
    it follows a loop that is busy (overload), not a rare hiccup of a shared machine, which
    would otherwise cut every search short for a whole window. The plans route
    adds it to the response headroom (the search stops that much earlier) and fires its
    watchdog that much earlier, so an answer keeps the deadline while the loop is busy (many
    connections, the GIL shared with the search threads) instead of arriving late by the lag.
    """

    def __init__(
        self, interval_s: float = 0.005, window_s: float = 1.0, quantile: float = 0.95
    ) -> None:
        self.interval_s = interval_s
        self._lag_s = RecentMax(window_s, quantile)

    def record(self, now_s: float, lag_s: float) -> None:
        self._lag_s.record(now_s, lag_s)

    def estimate_ms(self) -> float:
        return self._lag_s.value * 1000.0

    def reset(self) -> None:
        """Forget the samples (after start-up work that will not recur)."""
        self._lag_s = RecentMax(self._lag_s.window_s, self._lag_s.quantile)

    async def run(self) -> None:
        while True:
            t0 = time.perf_counter()
            await asyncio.sleep(self.interval_s)
            t1 = time.perf_counter()
            self.record(t1, max(0.0, t1 - t0 - self.interval_s))
