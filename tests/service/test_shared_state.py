"""The shared-state interface without Redis: usage counters in memory, shared plan-id keys,
the Redis URL setting. (The Redis backend is tested against a real server in
``test_shared_redis.py``.)"""

from __future__ import annotations

import pytest
from pydantic import ValidationError

from dueroute.service.server.plan_store import PlanIds
from dueroute.service.server.settings import Settings
from dueroute.service.server.shared_state import MemoryUsage, window_index


def test_usage_counts_per_caller_in_fixed_windows() -> None:
    """Fixed windows aligned to the epoch: [k*w, (k+1)*w) is window k (hand-checked values)."""
    usage = MemoryUsage()
    assert window_index(60, 119.999) == 1 and window_index(60, 120.0) == 2
    assert usage.add("a", 2.0, 60, now=60.0) == 2.0
    assert usage.add("a", 0.5, 60, now=119.0) == 2.5
    assert usage.add("b", 1.0, 60, now=119.0) == 1.0  # another caller: its own total
    assert usage.read("a", 60, now=119.5) == 2.5
    assert usage.read("a", 60, now=120.0) == 0.0  # a new window starts empty
    assert usage.read("a", 3600, now=119.0) == 0.0  # another window length: its own counter


def test_old_windows_are_forgotten() -> None:
    usage = MemoryUsage()
    for i in range(5000):
        usage.add(f"caller-{i}", 1.0, 1.0, now=float(i))
    assert len(usage._totals) <= 4097
    assert usage.read("caller-4999", 1.0, now=4999.0) == 1.0


def test_plan_ids_after_adopting_a_shared_key() -> None:
    """Ids signed with the key a store had before it adopted the shared one stay readable;
    ids of another key (another cluster) are not (HMAC-SHA256, RFC 2104)."""
    ids = PlanIds(b"k" * 32)
    old = ids.new(kept=True)
    ids.adopt(b"s" * 32)
    new = ids.new(kept=False)
    assert ids.read(old) is not None and ids.read(old).kept  # type: ignore[union-attr]
    assert PlanIds(b"s" * 32).read(new) is not None  # any replica holding the shared key
    assert PlanIds(b"s" * 32).read(old) is None
    assert PlanIds(b"x" * 32).read(new) is None


def test_redis_url_setting() -> None:
    assert Settings(redis_url="redis://cache:6379/0").redis_url == "redis://cache:6379/0"
    assert Settings(redis_url="").redis_url is None  # an empty variable: not configured
    with pytest.raises(ValidationError, match="redis_url must start with redis://"):
        Settings(redis_url="http://cache:6379")
    with pytest.raises(ValidationError):
        Settings(redis_lease_s=0.1)


def test_a_callers_search_budget_holds_across_two_limiters() -> None:
    """Two replicas' limiters on one set of counters: search time a caller used on one is
    taken from its token bucket on the other (token bucket: common practice for rate limits)."""
    from dueroute.service.server.callers import Caller, CallerRefused
    from dueroute.service.server.shared_state import SharedCallerLimits

    usage = MemoryUsage()
    limits = dict(max_plans=10, cpu_ms_per_s=1.0, cpu_burst_ms=100.0)
    one, two = SharedCallerLimits(usage, **limits), SharedCallerLimits(usage, **limits)
    caller, other = Caller("key:alpha", False), Caller("key:beta", False)
    one.acquire(caller)
    one.release(caller, 0.15)  # 150 ms of search: more than the 100 ms burst
    with pytest.raises(CallerRefused) as refused:
        two.acquire(caller)
    assert refused.value.status == 429
    two.acquire(other)  # another caller is not charged
    with pytest.raises(CallerRefused):
        one.acquire(caller)  # and on the first its own use emptied the bucket
