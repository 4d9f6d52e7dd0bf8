"""Admission control with a fake clock: the worst-case schedule admits and sheds as designed.

The rule checked is the list-scheduling argument of the module docstring (common practice for
deadline admission: a job is admitted only if, with every earlier job occupying its slot until
its own deadline, it still starts ``min_search_ms`` before its deadline).
"""

from __future__ import annotations

import threading

import pytest

from dueroute.service.server.admission import Admission, Shed


class Clock:
    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def test_free_slots_admit_at_once():
    clock = Clock()
    adm = Admission(workers=2, min_search_ms=5.0, clock=clock)
    assert adm.estimate_start_s(clock.t) == clock.t
    adm.admit(clock.t, clock.t + 0.1)
    adm.admit(clock.t, clock.t + 0.1)
    assert adm.queued == 2


def test_queue_estimate_is_the_worst_case_list_schedule():
    clock = Clock()
    adm = Admission(workers=2, min_search_ms=5.0, clock=clock)
    gate = threading.Event()
    started = threading.Barrier(3)

    def work(ticket):
        started.wait()
        gate.wait()

    # two running plans with search deadlines at +0.05 s and +0.2 s
    t1 = adm.admit(clock.t, clock.t + 0.05)
    t2 = adm.admit(clock.t, clock.t + 0.2)
    f1, f2 = adm.submit(t1, work), adm.submit(t2, work)
    started.wait()
    assert adm.busy == 2 and adm.queued == 0
    assert adm.estimate_start_s(clock.t) == pytest.approx(clock.t + 0.05)
    # a plan whose deadline leaves < 5 ms after +0.05 s is shed, with Retry-After >= 1 s
    with pytest.raises(Shed) as shed:
        adm.admit(clock.t, clock.t + 0.054)
    assert shed.value.retry_after_s >= 1 and "2 of 2 workers busy" in str(shed.value)
    # one that can still search >= 5 ms is admitted and queued behind the first slot
    q = adm.admit(clock.t, clock.t + 0.3)
    assert adm.queued == 1
    # the next one would start when the queued plan frees that slot (+0.3) or the other (+0.2)
    assert adm.estimate_start_s(clock.t) == pytest.approx(clock.t + 0.2)
    adm.release(q)
    gate.set()
    f1.result(5)
    f2.result(5)
    assert adm.busy == 0 and adm.queued == 0
    assert adm.shed_total == 1 and adm.admitted_total == 3
    adm.shutdown()


def test_a_plan_that_cannot_start_frees_its_slot_at_once():
    """A queued plan whose deadline passes before a slot frees takes no slot time."""
    clock = Clock()
    adm = Admission(workers=1, min_search_ms=0.0, clock=clock)
    adm._running[99] = type("T", (), {"search_deadline_s": clock.t + 1.0})()  # busy until +1 s
    adm.admit(clock.t, clock.t + 1.0)  # starts at +1 s with zero time left: frees at once
    assert adm.estimate_start_s(clock.t) == pytest.approx(clock.t + 1.0)


def test_workers_must_be_positive():
    with pytest.raises(ValueError, match="workers must be >= 1"):
        Admission(workers=0, min_search_ms=1.0)


def test_recent_max_forgets_old_values():
    from dueroute.service.server.admission import RecentMax

    m = RecentMax(window_s=1.0)
    m.record(10.0, 0.004)
    m.record(10.5, 0.001)
    assert m.value == 0.004
    m.record(11.2, 0.002)  # the 0.004 at t=10.0 is older than a second now
    assert m.value == 0.002


def test_recent_overrun_extends_a_workers_busy_time():
    """A search that freed its worker 30 ms after its deadline makes the next estimates assume
    running searches do the same (for a second)."""
    clock = Clock()
    adm = Admission(workers=1, min_search_ms=1.0, clock=clock)
    late = adm.admit(clock.t, clock.t - 0.03)  # its deadline passed 30 ms ago
    adm.submit(late, lambda t: None).result(5)
    gate = threading.Event()
    running = adm.admit(clock.t, clock.t + 0.01)
    fut = adm.submit(running, lambda t: gate.wait(5))
    while adm.busy == 0:
        pass
    assert adm.estimate_start_s(clock.t) == pytest.approx(clock.t + 0.04)
    gate.set()
    fut.result(5)
    adm.shutdown()


def test_loop_lag_measures_a_blocked_loop():
    import asyncio
    import time

    from dueroute.service.server.admission import LoopLag

    async def scenario() -> float:
        lag = LoopLag(interval_s=0.001, window_s=5.0, quantile=1.0)
        task = asyncio.create_task(lag.run())
        await asyncio.sleep(0.01)
        time.sleep(0.03)  # block the loop for 30 ms
        await asyncio.sleep(0.01)
        task.cancel()
        return lag.estimate_ms()

    assert asyncio.run(scenario()) >= 20.0
