"""Scheduling searches on the CPUs: an earliest-deadline-first queue, preemption, admission.

The service runs at most ``workers`` searches at once (by default one per core): a search that
shares a core with another gets half of it and misses its quality. Every admitted plan holds a
:class:`Ticket` with its *search deadline* (``perf_counter`` seconds, arrival + deadline_ms -
the time the answer needs after the search). A plan runs on a thread of its own, but searches
only while its ticket holds one of the ``workers`` *slots*:

* **EDF.** Free slots go to the waiting tickets in order of search deadline (earliest first;
  Liu & Layland 1973 show EDF meets every deadline any scheduler can on one processor).
* **Preemption.** When a ticket waits and every slot is taken, the running ticket with the
  latest deadline (if later than the waiter's by more than :data:`PREEMPT_MARGIN_S`) is asked
  to yield. It does so at its next check (the search checks its ticket at least every
  ``planner.session.CANCEL_CHECK_S``) and waits, parked with its workspace, until a slot is
  free for it again. So a 60 s background search never holds a core against a 50 ms request.
* **The instant lane.** A ticket still waiting when its search deadline is near stops waiting
  and runs without a slot: the search opens (the instant route, microseconds) and ends at once,
  so a waiting request whose deadline passes is answered with a route, never dropped.

**Admission** (:meth:`Admission.admit`, never blocks) predicts when a new plan would get a slot:
with EDF and preemption only the plans with earlier deadlines stand before it, and each of those
is expected to occupy a slot for its remaining budget times the share of their budget recent
searches really used (searches that prove the optimum end early; the mean of the last 10 s:
what matters is the work ahead in total, not one search's). A plan that can search at least ``min_search_ms`` is admitted; one that cannot
is admitted to the instant lane while that lane has room (the instant route is all the time
allows), otherwise shed at once (503 with Retry-After).

Per-caller limits (:mod:`dueroute.service.server.callers`) are checked before any of this.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import math
import os
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

log = logging.getLogger("dueroute.service.admission")

#: Each search thread's own niceness (what :meth:`Admission._set_searching` restores).
_THREAD_NICE = threading.local()


def _nice_can_be_restored() -> bool:
    """Whether a thread of this process can lower its niceness and raise it back (Linux lets
    an unprivileged process only lower its priority unless RLIMIT_NICE allows more)."""
    if not hasattr(os, "setpriority"):
        return False
    answer: list[bool] = []

    def probe() -> None:  # in a throw-away thread: whatever it leaves behind goes with it
        tid = threading.get_native_id()
        try:
            base = os.getpriority(os.PRIO_PROCESS, tid)
            if base >= 19:
                answer.append(False)
                return
            os.setpriority(os.PRIO_PROCESS, tid, base + 1)
            os.setpriority(os.PRIO_PROCESS, tid, base)
            answer.append(True)
        except OSError:
            answer.append(False)

    thread = threading.Thread(target=probe, name="dueroute-nice-probe")
    thread.start()
    thread.join()
    return bool(answer and answer[0])


#: A running search is preempted only for a waiter whose deadline is earlier by more than this
#: (two plans with nearly the same deadline do not take turns).
PREEMPT_MARGIN_S = 0.002
#: A waiting ticket leaves for the instant lane this long before its search deadline.
INSTANT_RESERVE_S = 0.0003
#: How long a preempted search needs to notice and yield its slot (its check interval).
YIELD_LATENCY_S = 0.001


@dataclass(eq=False)
class Ticket:
    """One admitted plan's claim on the CPUs; also the search's cancel flag and yield point.

    The search calls :meth:`is_set` between short runs of the kernel (the ``cancel``
    protocol of :func:`dueroute.planner.session.plan`): it answers whether to stop, and when
    the scheduler asked this ticket to yield, it first gives the slot up and waits for it back.
    """

    ticket_id: int
    arrival_s: float
    search_deadline_s: float
    caller: str = ""
    #: admitted to the instant lane: runs without a slot until its first route (the instant
    #: route, found when the search opens; else the greedy search's first), then answers
    instant_only: bool = False
    route_found: bool = False  # set by the plan's first improvement
    started_s: float | None = None
    finished_s: float | None = None
    cancel: threading.Event = field(default_factory=threading.Event)
    #: seconds this ticket held a slot (the search CPU it was given)
    slot_s: float = 0.0
    holds_slot: bool = False
    waited: bool = False  # found no free slot at first
    preempted: int = 0  # times it yielded its slot
    _preempt: bool = False
    _slot_since: float = 0.0
    _nudge: Callable[[], None] | None = field(default=None, repr=False)
    _wake: threading.Event = field(default_factory=threading.Event, repr=False)
    _scheduler: Admission | None = field(default=None, repr=False)

    def bind(self, nudge: Callable[[], None]) -> None:
        """The search's nudge (makes its kernel return and ask :meth:`is_set`)."""
        self._nudge = nudge
        if self.cancel.is_set() or self._preempt or (self.instant_only and self.route_found):
            nudge()

    def request_cancel(self) -> None:
        """Stop the plan's search (any thread): it ends within microseconds, or leaves the
        queue at once if it waits for a slot."""
        self.cancel.set()
        self.poke()
        if self._scheduler is not None:
            self._scheduler.wake(self)

    def searching(self, running: bool) -> None:
        """Around a long kernel run (called by the search, in its thread)."""
        if self._scheduler is not None:
            self._scheduler._set_searching(self, running)

    def poke(self) -> None:
        nudge = self._nudge
        if nudge is not None:
            nudge()

    def is_set(self) -> bool:
        if self.cancel.is_set() or (self.instant_only and self.route_found):
            return True
        if self._preempt and self._scheduler is not None:
            self._scheduler._yield(self)
        return self.cancel.is_set()

    @property
    def budget_s(self) -> float:
        return max(0.0, self.search_deadline_s - self.arrival_s)


class Shed(Exception):
    """The request cannot be served in time; ``retry_after_s`` is when to try again."""

    def __init__(self, message: str, retry_after_s: int) -> None:
        super().__init__(message)
        self.retry_after_s = retry_after_s


class Admission:
    """EDF scheduler of searches on ``workers`` slots, with deadline-aware admission.

    Parameters
    ----------
    workers : int
        Searches that run at once (slots); by default the number of cores.
    min_search_ms : float
        A plan must be able to search at least this long, else it gets the instant lane or is
        shed.
    clock : callable
        ``time.perf_counter`` (injected in tests).
    worker_nice : int
        Niceness added to each search thread (Linux schedules threads separately), so the
        event-loop thread that answers requests gets a core first when every core is busy.
    max_inflight : int
        Admitted plans not yet finished (running, parked, waiting), each on its own thread;
        default 16 per slot. Above it requests are shed.
    instant_lane : int
        Plans that may be in the instant lane at once (default: ``workers``): each runs
        Python beside the searches, so more would slow every thread down (the GIL).
    """

    def __init__(
        self,
        workers: int,
        min_search_ms: float,
        clock: Callable[[], float] = time.perf_counter,
        worker_nice: int = 0,
        max_inflight: int | None = None,
        instant_lane: int | None = None,
    ) -> None:
        if workers < 1:
            raise ValueError(f"workers must be >= 1, got {workers}")
        self.workers = workers
        self.min_search_s = min_search_ms / 1000.0
        self.clock = clock
        self.worker_nice = worker_nice
        if worker_nice > 0 and not _nice_can_be_restored():
            log.warning(
                "search threads run at the process's priority: this process may lower a "
                "thread's niceness but not raise it back (not root, RLIMIT_NICE 0), so "
                "worker_nice is not used",
                extra={"worker_nice": worker_nice},
            )
            self.worker_nice = 0
        self.max_inflight = max_inflight if max_inflight is not None else 16 * workers
        self.instant_lane = instant_lane if instant_lane is not None else workers
        self._lock = threading.Lock()
        # Invariant: every admitted, unfinished ticket is in _inflight; those holding a slot
        # are in _running (at most ``workers``), those wanting one in _waiting.
        self._inflight: dict[int, Ticket] = {}
        self._running: dict[int, Ticket] = {}
        self._waiting: dict[int, Ticket] = {}
        self._ids = itertools.count(1)
        self._executor: ThreadPoolExecutor | None = None
        self.admitted_total = 0
        self.instant_total = 0
        self.shed_total = 0
        self.preempted_total = 0
        #: mean share of its budget a finished search held a slot (early proofs end early)
        self.used_share = RecentQuantile(
            window_s=10.0, quantile=None, initial=1.0, min_samples=8, clock=clock
        )

    # ---------------------------------------------------------------------------------------
    # threads

    def _pool(self) -> ThreadPoolExecutor:
        with self._lock:
            if self._executor is None:
                self._executor = ThreadPoolExecutor(
                    max_workers=self.max_inflight + self.workers,
                    thread_name_prefix="dueroute-search",
                )
            return self._executor

    def _set_searching(self, t: Ticket, searching: bool) -> None:
        """Lower this thread's priority while its kernel runs, restore it after.

        Called in the ticket's own thread, around a long kernel run only (the kernel holds
        no lock and not the GIL). While searching it runs ``worker_nice`` below the rest of
        the process, so that everything else (the event loop, opening a query, an
        instant-lane plan, building an answer) gets a core first when every slot is busy.
        Python code never runs at the lower priority: a thread holding the GIL or a lock
        while it waits for a core would stall every other thread (priority inversion). Only
        used where the priority can be restored (:func:`_nice_can_be_restored`).
        """
        if self.worker_nice <= 0:
            return
        with contextlib.suppress(OSError):  # not supported after all: keep going
            tid = threading.get_native_id()
            base = getattr(_THREAD_NICE, "base", None)
            if base is None:
                base = _THREAD_NICE.base = os.getpriority(os.PRIO_PROCESS, tid)
            os.setpriority(
                os.PRIO_PROCESS, tid, min(19, base + self.worker_nice) if searching else base
            )

    # ---------------------------------------------------------------------------------------
    # prediction

    def predict_start_s(self, now_s: float, search_deadline_s: float) -> float:
        """When a plan with this search deadline, arriving now, is expected to get a slot."""
        with self._lock:
            return self._predict_locked(now_s, search_deadline_s)

    def _remaining_s(self, t: Ticket, now_s: float, start_s: float, share: float) -> float:
        """Expected slot time ``t`` still needs from ``start_s`` (at most until its deadline),
        if searches use ``share`` of their budget."""
        expected = t.budget_s * share
        held = t.slot_s + (now_s - t._slot_since if t.holds_slot else 0.0)
        return max(0.0, min(t.search_deadline_s - start_s, expected - held))

    def _predict_locked(self, now_s: float, deadline_s: float) -> float:
        share = self.used_share.value
        free: list[float] = []
        for t in self._running.values():
            if t.search_deadline_s <= deadline_s + PREEMPT_MARGIN_S:
                free.append(now_s + self._remaining_s(t, now_s, now_s, share))
            else:  # it would be preempted for this plan
                free.append(now_s + YIELD_LATENCY_S)
        free += [now_s] * (self.workers - len(free))
        ahead = sorted(
            (t for t in self._waiting.values() if t.search_deadline_s <= deadline_s),
            key=lambda t: (t.search_deadline_s, t.ticket_id),
        )
        for t in ahead:  # EDF: each takes the slot that frees first
            free.sort()
            start = free[0]
            free[0] = start + self._remaining_s(t, now_s, start, share)
        return min(free)

    # ---------------------------------------------------------------------------------------
    # admission

    def admit(
        self,
        arrival_s: float,
        search_deadline_s: float,
        min_search_s: float | None = None,
        caller: str = "",
        instant_lane: bool = True,
    ) -> Ticket:
        """Admit a plan (possibly to the instant lane) or raise :class:`Shed`; never blocks.

        ``min_search_s`` overrides the configured minimum (a short deadline asks for less);
        ``instant_lane=False`` (a background plan: nobody waits for a quick answer) sheds
        instead of taking the instant lane.
        """
        need_s = self.min_search_s if min_search_s is None else min_search_s
        now = self.clock()
        with self._lock:
            if len(self._inflight) >= self.max_inflight:
                self.shed_total += 1
                raise Shed(
                    f"overloaded: {len(self._inflight)} plans in flight, the most this service "
                    f"takes ({self.max_inflight}); retry shortly",
                    retry_after_s=1,
                )
            start = self._predict_locked(now, search_deadline_s)
            instant = start + need_s > search_deadline_s
            if instant:
                lane = sum(1 for t in self._inflight.values() if t.instant_only)
                if lane >= self.instant_lane or not instant_lane:
                    self.shed_total += 1
                    wait_s = max(0.0, start - now)
                    raise Shed(
                        f"overloaded: {len(self._running)} of {self.workers} searches running "
                        f"and {len(self._waiting)} waiting; a search slot is expected in "
                        f"{wait_s * 1000:.1f} ms, too late to search at least "
                        f"{need_s * 1000:.1f} ms before this plan's deadline. Retry later or "
                        "with a longer deadline_ms.",
                        retry_after_s=max(1, math.ceil(wait_s)),
                    )
                self.instant_total += 1
            ticket = Ticket(
                next(self._ids),
                arrival_s,
                search_deadline_s,
                caller=caller,
                instant_only=instant,
                _scheduler=self,
            )
            self._inflight[ticket.ticket_id] = ticket
            self.admitted_total += 1
            return ticket

    def submit(self, ticket: Ticket, fn: Callable[[Ticket], Any]) -> Future[Any]:
        """Run ``fn(ticket)`` on a thread once the ticket holds a slot (or the instant lane)."""

        def run() -> Any:
            if not ticket.instant_only:
                self._acquire(ticket)
            ticket.started_s = self.clock()
            try:
                return fn(ticket)
            finally:
                self._finish(ticket)

        try:
            return self._pool().submit(run)
        except RuntimeError:  # pool shut down: release the claim
            self.release(ticket)
            raise

    def _acquire(self, t: Ticket) -> None:
        """Wait (EDF) for a slot; leave for the instant lane near the deadline or on cancel.

        Slots are handed over, not contended for: whoever frees one gives it to the
        earliest-deadline waiter and wakes that thread alone (:meth:`_dispatch_locked`), so a
        freed slot wakes one thread, not every waiting one.
        """
        if t.cancel.is_set():
            return
        with self._lock:
            self._waiting[t.ticket_id] = t
            self._dispatch_locked()
            if t.holds_slot:
                return
            t.waited = True
            self._ask_preempt_locked()
        self._wait_for_slot(t, leave_before_s=INSTANT_RESERVE_S)

    def _wait_for_slot(self, t: Ticket, leave_before_s: float) -> None:
        """Block until ``t`` is handed a slot, cancelled, or ``leave_before_s`` before its
        deadline (then it goes on without a slot)."""
        while True:
            left = t.search_deadline_s - leave_before_s - self.clock()
            if left > 0 and not t.cancel.is_set():
                t._wake.wait(timeout=left)
            with self._lock:
                t._wake.clear()
                if t.holds_slot:
                    return
                left = t.search_deadline_s - leave_before_s - self.clock()
                if t.cancel.is_set() or left <= 0:
                    self._waiting.pop(t.ticket_id, None)
                    if leave_before_s > 0:
                        t.instant_only = not t.cancel.is_set()  # out of time: instant lane
                    return

    def _dispatch_locked(self) -> None:
        """Hand free slots to the earliest-deadline waiters and wake each of them."""
        while self._waiting and len(self._running) < self.workers:
            first = min(self._waiting.values(), key=lambda w: (w.search_deadline_s, w.ticket_id))
            del self._waiting[first.ticket_id]
            if first.cancel.is_set():  # it leaves the queue anyway: the slot goes on
                first._wake.set()
                continue
            self._running[first.ticket_id] = first
            first.holds_slot = True
            first._slot_since = self.clock()
            first._wake.set()

    def _drop_slot_locked(self, t: Ticket) -> None:
        if t.holds_slot:
            t.holds_slot = False
            t.slot_s += self.clock() - t._slot_since
            self._running.pop(t.ticket_id, None)
            self._dispatch_locked()

    def end_search(self, t: Ticket) -> None:
        """The plan's search is over (called in its thread): free the slot now, before the
        answer is built."""
        with self._lock:
            self._drop_slot_locked(t)
            self._ask_preempt_locked()

    def _ask_preempt_locked(self) -> None:
        """If a waiter is more urgent than a running search and no slot is free, ask the
        running search with the latest deadline to yield."""
        if len(self._running) < self.workers or not self._waiting:
            return
        urgent = min(t.search_deadline_s for t in self._waiting.values())
        candidates = [t for t in self._running.values() if not t._preempt]
        if not candidates:
            return
        latest = max(candidates, key=lambda t: t.search_deadline_s)
        if latest.search_deadline_s > urgent + PREEMPT_MARGIN_S:
            latest._preempt = True
            latest.poke()

    def _yield(self, t: Ticket) -> None:
        """Called by the preempted search itself: give the slot up, wait to get one back
        (until its deadline at the latest: then it ends without one)."""
        with self._lock:
            t._preempt = False
            if not t.holds_slot:
                return
            self._waiting[t.ticket_id] = t  # waits first: the slot goes to the urgent one
            self._drop_slot_locked(t)
            if t.holds_slot:  # nobody more urgent after all: keep searching
                return
            t.preempted += 1
            self.preempted_total += 1
        self._wait_for_slot(t, leave_before_s=0.0)

    def _finish(self, t: Ticket) -> None:
        with self._lock:
            self._waiting.pop(t.ticket_id, None)
            self._drop_slot_locked(t)
            self._inflight.pop(t.ticket_id, None)
            t.finished_s = self.clock()
            if not t.instant_only and t.budget_s > 0 and not t.cancel.is_set():
                self.used_share.record(t.finished_s, min(1.0, t.slot_s / t.budget_s))
            self._ask_preempt_locked()

    def release(self, ticket: Ticket) -> None:
        """Drop a ticket that was admitted but never submitted (the request failed early)."""
        with self._lock:
            self._inflight.pop(ticket.ticket_id, None)
            self._waiting.pop(ticket.ticket_id, None)
            self._drop_slot_locked(ticket)

    def wake(self, ticket: Ticket | None = None) -> None:
        """Wake a waiting ticket (it was cancelled: it leaves the queue at once), or all."""
        with self._lock:
            targets = [ticket] if ticket is not None else list(self._waiting.values())
        for t in targets:
            t._wake.set()

    def prestart(self, fn: Callable[[], Any]) -> list[Any]:
        """Run ``fn`` once on ``workers`` threads at the same time (start-up only).

        Starts threads now rather than on the first requests, and lets ``fn`` warm
        per-thread state (the planner pools one search workspace per concurrent search).
        """
        barrier = threading.Barrier(self.workers)

        def run() -> Any:
            barrier.wait(timeout=60)
            return fn()

        pool = self._pool()
        futures = [pool.submit(run) for _ in range(self.workers)]
        results = [f.result() for f in futures]
        # Then every other thread the pool may need: a thread started while the service is
        # busy waits for the interpreter lock to even begin (seen: 6 ms), past short deadlines.
        spare = self.max_inflight
        gate = threading.Barrier(spare + 1) if spare else None
        if gate is not None:
            held = [pool.submit(gate.wait, 60) for _ in range(spare)]
            gate.wait(timeout=60)
            for f in held:
                f.result()
        return results

    @property
    def busy(self) -> int:
        return len(self._running)

    @property
    def queued(self) -> int:
        return len(self._waiting)

    def snapshot(self) -> dict[str, Any]:
        now = self.clock()
        with self._lock:
            start = self._predict_locked(now, math.inf)
            return {
                "workers": self.workers,
                "busy": len(self._running),
                "queued": len(self._waiting),
                "in_flight": len(self._inflight),
                "max_in_flight": self.max_inflight,
                "next_free_in_ms": max(0.0, (start - now) * 1000.0),
                "used_share_mean": self.used_share.value,
                "admitted_total": self.admitted_total,
                "instant_total": self.instant_total,
                "shed_total": self.shed_total,
                "preempted_total": self.preempted_total,
            }

    def shutdown(self) -> None:
        with self._lock:
            tickets = list(self._inflight.values())
        for t in tickets:
            t.request_cancel()
        self.wake()
        with self._lock:
            pool, self._executor = self._executor, None
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=False)


class RecentQuantile:
    """A quantile (``None``: the mean) of the values recorded in the last ``window_s`` seconds.

    ``initial`` while fewer than ``min_samples`` values are held (a fresh service has no
    measurements, and old values expire even when nothing new is recorded, so an estimate
    never sticks at a stale high). At most ``max_samples`` are held; reading :attr:`value`
    recomputes the quantile only after something changed.
    """

    def __init__(
        self,
        window_s: float = 1.0,
        quantile: float | None = 1.0,
        initial: float = 0.0,
        min_samples: int = 1,
        max_samples: int = 512,
        clock: Callable[[], float] = time.perf_counter,
    ) -> None:
        self.window_s = window_s
        self.quantile = quantile
        self.initial = initial
        self.min_samples = min_samples
        self.clock = clock
        self._samples: deque[tuple[float, float]] = deque(maxlen=max_samples)
        self._lock = threading.Lock()
        self._value = initial
        self._dirty = False
        self._computed_at = -math.inf

    #: with many samples, the quantile is recomputed at most this often (sorting is not free)
    REFRESH_S = 0.05

    def record(self, now_s: float, value: float) -> None:
        with self._lock:
            self._samples.append((now_s, value))
            self._dirty = True

    @property
    def value(self) -> float:
        with self._lock:
            samples = self._samples
            now = self.clock()
            horizon = now - self.window_s
            while samples and samples[0][0] < horizon:
                samples.popleft()
                self._dirty = True
            if self._dirty and (len(samples) < 64 or now - self._computed_at >= self.REFRESH_S):
                self._computed_at = now
                n = len(samples)
                if n < self.min_samples:
                    self._value = self.initial
                elif self.quantile is None:
                    self._value = sum(v for _, v in samples) / n
                elif self.quantile >= 1.0:
                    self._value = max(v for _, v in samples)
                else:
                    ordered = sorted(v for _, v in samples)
                    self._value = ordered[min(n - 1, int(self.quantile * n))]
                self._dirty = False
            return self._value

    def __len__(self) -> int:
        return len(self._samples)


class LoopLag:
    """How late the event loop runs a timer right now: the delay an answer would see.

    A task sleeps ``interval_s`` over and over and records how much later than asked it woke;
    :meth:`estimate_ms` is the 95th percentile of the last ``window_s`` seconds. Reported on
    ``/readyz`` and as a metric; the answer-time estimate of :class:`ResponseFloor` already
    contains it, since it is measured end to end.
    """

    def __init__(
        self, interval_s: float = 0.005, window_s: float = 1.0, quantile: float = 0.95
    ) -> None:
        self.interval_s = interval_s
        self._lag_s = RecentQuantile(window_s, quantile)

    def record(self, now_s: float, lag_s: float) -> None:
        self._lag_s.record(now_s, lag_s)

    def estimate_ms(self) -> float:
        return self._lag_s.value * 1000.0

    def reset(self) -> None:
        """Forget the samples (after start-up work that will not recur)."""
        self._lag_s = RecentQuantile(self._lag_s.window_s, self._lag_s.quantile)

    async def run(self) -> None:
        while True:
            t0 = time.perf_counter()
            await asyncio.sleep(self.interval_s)
            t1 = time.perf_counter()
            self.record(t1, max(0.0, t1 - t0 - self.interval_s))


class ResponseFloor:
    """The service's own floor: time a plan needs outside its search, measured.

    * ``before``: from the request's first byte to the search's start when a slot was free
      (read and parse the body, snap, admit, hand to a thread);
    * ``after``: from the search's end to the last byte of the answer handed to the socket
      (build the route and the JSON, wake the event loop, send).

    :meth:`after_s` (95th percentile of the last ``window_s`` seconds) is how long before the
    deadline a search stops. :meth:`floor_ms`, the shortest deadline the service honours, is
    the 90th percentiles of both plus a small margin: a robust statistic, so that a few
    stalls of a shared machine do not lock short deadlines out for a whole window. Before
    ``min_samples`` answers, the ``initial_*`` values hold.
    """

    def __init__(
        self,
        initial_before_ms: float,
        initial_after_ms: float,
        window_s: float = 2.0,
        min_samples: int = 20,
        clock: Callable[[], float] = time.perf_counter,
    ) -> None:
        b0, a0 = initial_before_ms / 1000.0, initial_after_ms / 1000.0
        self._before = RecentQuantile(window_s, 0.9, b0, min_samples, clock=clock)
        self._after = RecentQuantile(window_s, 0.95, a0, min_samples, clock=clock)
        self._after_typical = RecentQuantile(window_s, 0.9, a0, min_samples, clock=clock)

    def record_before(self, now_s: float, seconds: float) -> None:
        self._before.record(now_s, seconds)

    def record_after(self, now_s: float, seconds: float) -> None:
        self._after.record(now_s, seconds)
        self._after_typical.record(now_s, seconds)

    def after_s(self) -> float:
        return self._after.value

    def floor_ms(self) -> float:
        return (self._before.value + self._after_typical.value) * 1000.0 + 0.1

    def snapshot(self) -> dict[str, float]:
        return {
            "floor_ms": self.floor_ms(),
            "before_search_p90_ms": self._before.value * 1000.0,
            "after_search_p90_ms": self._after_typical.value * 1000.0,
            "after_search_p95_ms": self._after.value * 1000.0,
            "samples": float(min(len(self._before), len(self._after))),
        }
