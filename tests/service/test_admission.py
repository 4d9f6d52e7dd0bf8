"""The search scheduler: EDF order, preemption, the instant lane, the admission predictor.

References: earliest-deadline-first is the optimal uniprocessor deadline schedule (Liu &
Layland 1973) — the tests check the order it defines, not speed; the predictor is the
list-scheduling argument of the module docstring, checked with a fake clock. No test asserts
a wall-clock time: waits below are generous timeouts that only end a broken test.
"""

from __future__ import annotations

import asyncio
import threading
import time
from typing import Any

import pytest

from dueroute.service.server.admission import (
    Admission,
    LoopLag,
    RecentQuantile,
    ResponseFloor,
    Shed,
    Ticket,
)

WAIT = 10.0  # seconds: only a broken scheduler gets near this


class Clock:
    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def _held(adm: Admission, t: Ticket, clock: Clock) -> None:
    """Put ``t`` on a slot as a running search would be (for the predictor tests)."""
    t.holds_slot = True
    t._slot_since = clock.t
    adm._running[t.ticket_id] = t
    adm._inflight[t.ticket_id] = t


def test_free_slots_admit_at_once():
    clock = Clock()
    adm = Admission(workers=2, min_search_ms=5.0, clock=clock)
    assert adm.predict_start_s(clock.t, clock.t + 0.1) == clock.t
    a = adm.admit(clock.t, clock.t + 0.1)
    assert not a.instant_only and adm.snapshot()["in_flight"] == 1


def test_prediction_counts_only_plans_with_earlier_deadlines():
    """With EDF and preemption, a plan waits only for those due before it; one running with a
    later deadline gives its slot up (within the yield latency)."""
    clock = Clock()
    adm = Admission(workers=1, min_search_ms=5.0, clock=clock)
    early = adm.admit(clock.t, clock.t + 0.05)
    _held(adm, early, clock)
    # fresh service: a search is assumed to use all of its budget (used share 1.0)
    assert adm.predict_start_s(clock.t, clock.t + 0.2) == pytest.approx(clock.t + 0.05)
    # a plan due before the running one preempts it: a slot at once (plus the yield latency)
    assert adm.predict_start_s(clock.t, clock.t + 0.01) < clock.t + 0.002
    # searches lately used 10 % of their budget: the running one is expected done at +5 ms
    for _ in range(20):
        adm.used_share.record(clock.t, 0.1)
    assert adm.predict_start_s(clock.t, clock.t + 0.2) == pytest.approx(clock.t + 0.005)


def test_waiting_plans_are_scheduled_in_deadline_order_in_the_prediction():
    clock = Clock()
    adm = Admission(workers=1, min_search_ms=1.0, clock=clock)
    running = adm.admit(clock.t, clock.t + 0.02)
    _held(adm, running, clock)
    waiting = adm.admit(clock.t, clock.t + 0.1)
    adm._waiting[waiting.ticket_id] = waiting
    # a plan due at +0.2 waits for both: +0.02 (the running one), then the waiting one's budget
    assert adm.predict_start_s(clock.t, clock.t + 0.2) == pytest.approx(clock.t + 0.1)
    # one due at +0.05 waits only for the running one (EDF puts it before the +0.1 plan)
    assert adm.predict_start_s(clock.t, clock.t + 0.05) == pytest.approx(clock.t + 0.02)


def test_no_time_to_search_gets_the_instant_lane_then_a_fast_503():
    clock = Clock()
    adm = Admission(workers=1, min_search_ms=5.0, clock=clock, instant_lane=1)
    busy = adm.admit(clock.t, clock.t + 1.0)
    _held(adm, busy, clock)
    lane = adm.admit(clock.t, clock.t + 1.002)  # a slot at +1.0 leaves 2 ms < 5 ms
    assert lane.instant_only
    with pytest.raises(Shed) as shed:
        adm.admit(clock.t, clock.t + 1.003)
    assert shed.value.retry_after_s >= 1
    assert "1 of 1 searches running" in str(shed.value)
    assert adm.shed_total == 1 and adm.instant_total == 1


def test_in_flight_bound_sheds():
    clock = Clock()
    adm = Admission(workers=1, min_search_ms=0.0, clock=clock, max_inflight=2)
    adm.admit(clock.t, clock.t + 1)
    adm.admit(clock.t, clock.t + 2)
    with pytest.raises(Shed, match="the most this service takes"):
        adm.admit(clock.t, clock.t + 3)


def _search(ticket: Ticket, log: list[str], name: str, stop: threading.Event) -> None:
    """A stand-in search: checks its ticket like the planner does, until told to stop."""
    log.append(f"start {name}")
    while not stop.is_set():
        if ticket.is_set():
            break
        time.sleep(0.0005)
    log.append(f"end {name}")


def test_free_slots_go_in_deadline_order():
    adm = Admission(workers=1, min_search_ms=0.0)
    now = time.perf_counter()
    log: list[str] = []
    gate = threading.Event()
    blocker = adm.admit(now, now + WAIT)
    started = threading.Event()

    def hold(t: Ticket) -> None:  # holds the slot and never checks its ticket
        started.set()
        gate.wait(WAIT)

    futures = [adm.submit(blocker, hold)]
    assert started.wait(WAIT)
    for name, due in (("c", 3.0), ("b", 2.0), ("d", 4.0)):
        t = adm.admit(now, now + WAIT + due)
        futures.append(adm.submit(t, lambda t, n=name: log.append(n)))
    _until(lambda: adm.queued >= 3)
    gate.set()
    for f in futures:
        f.result(WAIT)
    assert log == ["b", "c", "d"]  # earliest deadline first, not arrival order
    adm.shutdown()


def test_a_later_deadline_yields_its_slot_and_resumes():
    adm = Admission(workers=1, min_search_ms=0.0)
    now = time.perf_counter()
    log: list[str] = []
    stop_long, stop_short = threading.Event(), threading.Event()
    long = adm.admit(now, now + 2 * WAIT)
    f_long = adm.submit(long, lambda t: _search(t, log, "long", stop_long))
    _until(lambda: adm.busy != 0)
    short = adm.admit(now, now + WAIT)
    assert not short.instant_only  # it preempts: a slot is predicted at once
    f_short = adm.submit(short, lambda t: _search(t, log, "short", stop_short))
    deadline = time.perf_counter() + WAIT
    while "start short" not in log and time.perf_counter() < deadline:
        time.sleep(0.001)
    assert log == ["start long", "start short"]
    assert long.preempted == 1 and not long.holds_slot and short.holds_slot
    assert adm.busy == 1  # never more searches than slots
    stop_short.set()
    f_short.result(WAIT)
    deadline = time.perf_counter() + WAIT
    while not long.holds_slot and time.perf_counter() < deadline:
        time.sleep(0.001)
    assert long.holds_slot  # back on the slot once the urgent one finished
    stop_long.set()
    f_long.result(WAIT)
    assert log == ["start long", "start short", "end short", "end long"]
    assert adm.busy == 0 and adm.queued == 0 and adm.preempted_total == 1
    adm.shutdown()


def _until(condition: Any) -> None:
    """Wait for ``condition()`` (a broken scheduler fails here instead of hanging)."""
    end = time.perf_counter() + WAIT
    while not condition():
        assert time.perf_counter() < end, "the scheduler never got there"
        time.sleep(0.001)


def _hold_the_only_slot(adm: Admission) -> tuple[threading.Event, Any]:
    """A plan that holds the slot (and never checks its ticket) until the gate is set."""
    gate = threading.Event()
    now = time.perf_counter()
    future = adm.submit(adm.admit(now, now + WAIT), lambda t: gate.wait(WAIT))
    _until(lambda: adm.busy != 0)
    return gate, future


def test_a_waiting_plan_leaves_for_the_instant_lane_before_its_deadline():
    """A plan that never gets a slot still runs (without one) just before its deadline, so a
    waiting request is answered, never dropped."""
    adm = Admission(workers=1, min_search_ms=0.0)
    gate, f_block = _hold_the_only_slot(adm)
    soon = adm.admit(time.perf_counter(), time.perf_counter() + 0.05)
    seen: dict[str, bool] = {}
    f_soon = adm.submit(soon, lambda t: seen.update(slot=t.holds_slot))
    f_soon.result(WAIT)  # finishes while the blocker still holds the only slot
    assert seen == {"slot": False} and soon.waited
    gate.set()
    f_block.result(WAIT)
    adm.shutdown()


def test_cancel_leaves_the_queue_at_once():
    adm = Admission(workers=1, min_search_ms=0.0)
    now = time.perf_counter()
    gate, f_block = _hold_the_only_slot(adm)
    queued = adm.admit(now, now + 2 * WAIT)
    f = adm.submit(queued, lambda t: t.cancel.is_set())
    _until(lambda: adm.queued != 0)
    queued.cancel.set()
    adm.wake()
    assert f.result(WAIT) is True  # ran (to answer "cancelled") without waiting for the slot
    gate.set()
    f_block.result(WAIT)
    adm.shutdown()


def test_workers_must_be_positive():
    with pytest.raises(ValueError, match="workers must be >= 1"):
        Admission(workers=0, min_search_ms=1.0)


def test_recent_values_expire_even_without_new_ones():
    clock = Clock()
    m = RecentQuantile(window_s=1.0, quantile=1.0, clock=clock)
    m.record(clock.t, 0.004)
    clock.t += 0.5
    m.record(clock.t, 0.001)
    assert m.value == 0.004
    clock.t += 0.7  # the 0.004 is older than a second now
    assert m.value == 0.001
    clock.t += 5.0
    assert m.value == 0.0  # nothing left: the initial value


def test_recent_quantile_needs_its_minimum_of_samples():
    clock = Clock()
    q = RecentQuantile(window_s=10.0, quantile=0.5, initial=7.0, min_samples=3, clock=clock)
    q.record(clock.t, 1.0)
    q.record(clock.t, 2.0)
    assert q.value == 7.0
    q.record(clock.t, 3.0)
    assert q.value == 2.0


def test_floor_is_what_a_plan_takes_outside_its_search():
    clock = Clock()
    floor = ResponseFloor(initial_before_ms=0.5, initial_after_ms=1.0, min_samples=10, clock=clock)
    assert floor.floor_ms() == pytest.approx(1.6)
    for _ in range(20):
        floor.record_before(clock.t, 0.0003)
        floor.record_after(clock.t, 0.0004)
    assert floor.floor_ms() == pytest.approx(0.8)
    assert floor.after_s() == pytest.approx(0.0004)


def test_loop_lag_measures_a_blocked_loop():
    async def scenario() -> float:
        lag = LoopLag(interval_s=0.001, window_s=5.0, quantile=1.0)
        task = asyncio.create_task(lag.run())
        await asyncio.sleep(0.01)
        time.sleep(0.03)  # block the loop for 30 ms
        await asyncio.sleep(0.01)
        task.cancel()
        return lag.estimate_ms()

    assert asyncio.run(scenario()) >= 20.0


def test_search_threads_keep_their_priority_where_it_could_not_be_restored(monkeypatch):
    """An unprivileged process may lower a thread's priority but not raise it back
    (Linux setpriority(2), RLIMIT_NICE): then worker_nice is not used at all."""
    import dueroute.service.server.admission as admission

    assert isinstance(admission._nice_can_be_restored(), bool)
    monkeypatch.setattr(admission, "_nice_can_be_restored", lambda: False)
    assert Admission(workers=1, min_search_ms=0.0, worker_nice=10).worker_nice == 0
