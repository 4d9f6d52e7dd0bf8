"""Where plans live between requests: a small store interface and its in-memory backend.

What is stored: every background plan (``wait=false``) and every waited plan whose request
asked ``keep=true``; nothing else. A stored plan stays readable (``GET``, ``DELETE``, the event
stream) while it runs and for ``ttl_s`` seconds after it finished, and is never evicted
earlier: when the store is full (``max_plans`` plans, or ``max_bytes`` by the byte estimate of
:meth:`PlanJob.estimated_bytes`), a new plan that asks to be stored is refused with
:class:`StoreFull` (503 + ``Retry-After``: when the first stored plan expires).

Plan ids say who issued them (:class:`PlanIds`): an id is a random token, its issue time and
whether the plan was stored, signed with a key this store holds. So every 404 has an exact
reason without remembering anything about plans that are gone: an id this store never issued
(or issued before a restart, or by another replica) is ``unknown``; a stored plan that is no
longer held has ``expired`` (nothing else removes one); a waited plan that was answered in
place was ``not_kept``.

The interface (:class:`PlanStore`) is what the routes use: ``new_id``, ``check_room``, ``put``,
``lookup``, ``expire``, ``events`` and ``stats``. The in-memory backend holds the live
:class:`PlanJob` objects; another backend (a shared one for several replicas) stores the final
JSON and the improvement events under the plan id and shares the id key.
"""

from __future__ import annotations

import asyncio
import base64
import binascii
import hashlib
import hmac
import secrets
import struct
import threading
import time
from collections import deque
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass
from typing import Literal, Protocol

from dueroute.service.server.jobs import PlanJob, dumps

#: How long an event stream waits for news before it sends a keep-alive comment.
KEEPALIVE_S = 15.0

GoneReason = Literal["unknown", "expired", "not_kept"]


class StoreFull(Exception):
    """No room for one more stored plan; ``retry_after_s`` is when the first one expires."""

    def __init__(self, message: str, retry_after_s: int, limit: str) -> None:
        super().__init__(message)
        self.retry_after_s = retry_after_s
        self.limit = limit  # "plans" or "bytes"


# ------------------------------------------------------------------------------------------
# Ids


@dataclass(frozen=True)
class IssuedId:
    kept: bool
    issued_wall_s: float  # time.time() when the id was issued


class PlanIds:
    """Signed plan ids: 21 bytes, URL-safe base64 (28 characters).

    Layout: 1 flag byte (bit 0: the plan is stored), the issue time in milliseconds since the
    epoch (6 bytes, big-endian), 5 random bytes, then the first 9 bytes of an HMAC-SHA256 over
    the first 12 with this store's key. Forging an id means guessing 72 bits of MAC.
    """

    _PAYLOAD = 12
    _MAC = 9

    def __init__(self, key: bytes | None = None) -> None:
        self._key = key if key is not None else secrets.token_bytes(32)
        #: keys this store signed with before (read, never used to sign)
        self._old_keys: list[bytes] = []

    def adopt(self, key: bytes) -> None:
        """Sign with ``key`` from now on (a shared key several replicas hold); ids signed with
        the keys before it stay readable."""
        if key != self._key:
            self._old_keys.append(self._key)
            self._key = key

    def _mac(self, payload: bytes, key: bytes | None = None) -> bytes:
        k = self._key if key is None else key
        return hmac.new(k, payload, hashlib.sha256).digest()[: self._MAC]

    def new(self, *, kept: bool, now_wall_s: float | None = None) -> str:
        now = time.time() if now_wall_s is None else now_wall_s
        payload = (
            bytes([1 if kept else 0])
            + struct.pack(">Q", int(now * 1000))[2:]
            + secrets.token_bytes(5)
        )
        return base64.urlsafe_b64encode(payload + self._mac(payload)).decode()

    def read(self, plan_id: str) -> IssuedId | None:
        """What the id says, or None if this store did not issue it."""
        if len(plan_id) != 28:
            return None
        try:
            raw = base64.urlsafe_b64decode(plan_id.encode("ascii"))
        except (ValueError, binascii.Error, UnicodeEncodeError):
            return None
        payload, mac = raw[: self._PAYLOAD], raw[self._PAYLOAD :]
        if len(raw) != self._PAYLOAD + self._MAC or not any(
            hmac.compare_digest(mac, self._mac(payload, key))
            for key in (self._key, *self._old_keys)
        ):
            return None
        issued_ms = struct.unpack(">Q", b"\0\0" + payload[1:7])[0]
        return IssuedId(kept=bool(payload[0] & 1), issued_wall_s=issued_ms / 1000.0)


# ------------------------------------------------------------------------------------------
# Interface


@dataclass(frozen=True)
class Lookup:
    """A stored plan, or why there is none."""

    job: PlanJob | None
    reason: GoneReason | None = None
    issued_wall_s: float | None = None


@dataclass(frozen=True)
class Event:
    """One server-sent event: ``improvement`` (ordinal id) or ``final`` (id = the count)."""

    kind: str
    event_id: int
    data: bytes


class PlanStore(Protocol):
    """What the routes need from a plan store (see the module docstring for the semantics)."""

    max_plans: int
    max_bytes: int
    ttl_s: float

    def new_id(self, *, kept: bool) -> str: ...

    def check_room(self, reserve_bytes: int) -> None:
        """Raise :class:`StoreFull` unless one more plan of ``reserve_bytes`` fits."""
        ...

    def put(self, job: PlanJob) -> None:
        """Store ``job`` (its id from :meth:`new_id` with ``kept=True``) until its TTL ends."""
        ...

    def lookup(self, plan_id: str) -> Lookup:
        """A plan this process holds (never waits)."""
        ...

    async def find(self, plan_id: str) -> Lookup:
        """Any stored plan: this process's, or (shared backend) one another replica holds."""
        ...

    def expire(self) -> int:
        """Forget plans whose TTL has ended; returns how many went."""
        ...

    def events(self, job: PlanJob, after: int) -> AsyncIterator[Event | None]:
        """Improvements with ordinal > ``after`` as they come, then ``final``; None is a
        keep-alive tick."""
        ...

    def stats(self) -> dict[str, float | int]: ...

    def __len__(self) -> int: ...


# ------------------------------------------------------------------------------------------
# In-memory backend


class MemoryPlanStore:
    """The plan store of one process: live jobs in a dict, expiry in finishing order.

    Thread-safe (one lock): the event loop puts, looks up and expires; worker threads report
    finished plans through ``PlanJob.on_finish``.

    Parameters
    ----------
    max_plans : int
        Plans held at once (running and finished).
    max_bytes : int
        Bound on the byte estimate of everything held. A running plan counts at its reserve
        until it finishes, then at its actual size; a finished plan larger than its reserve
        can take the total above the bound, and then new plans wait for expiries.
    ttl_s : float
        A finished plan is held this long after it finished.
    """

    def __init__(
        self,
        max_plans: int,
        max_bytes: int,
        ttl_s: float,
        ids: PlanIds | None = None,
        clock: Callable[[], float] = time.perf_counter,
    ) -> None:
        self.max_plans = max_plans
        self.max_bytes = max_bytes
        self.ttl_s = ttl_s
        self.ids = ids if ids is not None else PlanIds()
        self.clock = clock
        self._lock = threading.Lock()
        self._plans: dict[str, PlanJob] = {}
        self._bytes: dict[str, int] = {}  # what each held plan is counted at
        self._total_bytes = 0
        self._running = 0
        # (expires_at, plan_id) in finishing order; the TTL is one constant, so this is also
        # expiry order and expire() only looks at its head.
        self._expiry: deque[tuple[float, str]] = deque()
        self.expired_total = 0
        self.refused_total = 0
        self.stored_total = 0

    def __len__(self) -> int:
        return len(self._plans)

    # -- ids and room ------------------------------------------------------------------------
    def new_id(self, *, kept: bool) -> str:
        return self.ids.new(kept=kept)

    def check_room(self, reserve_bytes: int) -> None:
        with self._lock:
            self._expire_locked(self.clock())
            count, total = len(self._plans), self._total_bytes
            if count < self.max_plans and total + reserve_bytes <= self.max_bytes:
                return
            self.refused_total += 1
            retry = self._retry_after_locked(self.clock())
            if count >= self.max_plans:
                limit, what = "plans", f"it holds {count} of {self.max_plans} plans"
            else:
                limit = "bytes"
                what = (
                    f"its plans hold about {total:,} of {self.max_bytes:,} bytes and one more "
                    f"needs up to {reserve_bytes:,}"
                )
        raise StoreFull(
            f"the plan store is full: {what}; stored plans are kept {self.ttl_s:g} s after "
            f"they finish and never dropped early, so no room frees for about {retry} s. "
            "Retry after that, or ask with wait=true (and without keep) for an answer that "
            "is not stored",
            retry_after_s=retry,
            limit=limit,
        )

    def _retry_after_locked(self, now: float) -> int:
        if self._expiry:
            soonest = self._expiry[0][0]
        else:  # every held plan is running: the first ends by its deadline, then its TTL
            ends = [j.search_deadline_s for j in self._plans.values() if not j.finished]
            soonest = (min(ends) if ends else now) + self.ttl_s
        return max(1, int(-(-(soonest - now) // 1)))

    # -- plans -------------------------------------------------------------------------------
    def put(self, job: PlanJob) -> None:
        job.kept = True
        job.on_finish = self._settle
        with self._lock:
            self._plans[job.plan_id] = job
            self.stored_total += 1
            if job.finished:
                self._count_finished_locked(job)
            else:
                size = job.estimated_bytes()
                self._bytes[job.plan_id] = size
                self._total_bytes += size
                self._running += 1

    def _settle(self, job: PlanJob) -> None:
        """A held plan finished (any thread): count its real size, start its TTL."""
        with self._lock:
            if self._plans.get(job.plan_id) is job and job.plan_id in self._bytes:
                self._total_bytes -= self._bytes.pop(job.plan_id)
                self._running -= 1
                self._count_finished_locked(job)

    def _count_finished_locked(self, job: PlanJob) -> None:
        size = job.estimated_bytes()
        self._bytes[job.plan_id] = size
        self._total_bytes += size
        # The TTL starts now (the final plan was published a moment ago); the clock is read
        # under the lock, so the deque stays in expiry order.
        self._expiry.append((self.clock() + self.ttl_s, job.plan_id))

    def lookup(self, plan_id: str) -> Lookup:
        with self._lock:
            self._expire_locked(self.clock())
            job = self._plans.get(plan_id)
        if job is not None:
            return Lookup(job)
        issued = self.ids.read(plan_id)
        if issued is None:
            return Lookup(None, "unknown")
        return Lookup(None, "expired" if issued.kept else "not_kept", issued.issued_wall_s)

    async def find(self, plan_id: str) -> Lookup:
        return self.lookup(plan_id)

    def held(self) -> list[PlanJob]:
        """Every plan held now (running and finished)."""
        with self._lock:
            return list(self._plans.values())

    def expire(self) -> int:
        with self._lock:
            return self._expire_locked(self.clock())

    def _expire_locked(self, now: float) -> int:
        gone = 0
        while self._expiry and self._expiry[0][0] <= now:
            _, plan_id = self._expiry.popleft()
            if self._plans.pop(plan_id, None) is not None:
                self._total_bytes -= self._bytes.pop(plan_id, 0)
                gone += 1
        self.expired_total += gone
        return gone

    def stats(self) -> dict[str, float | int]:
        with self._lock:
            return {
                "plans": len(self._plans),
                "running": self._running,
                "bytes": self._total_bytes,
                "max_plans": self.max_plans,
                "max_bytes": self.max_bytes,
                "ttl_s": self.ttl_s,
                "stored_total": self.stored_total,
                "expired_total": self.expired_total,
                "refused_total": self.refused_total,
            }

    # -- events ------------------------------------------------------------------------------
    def events(self, job: PlanJob, after: int) -> AsyncIterator[Event | None]:
        return _job_events(job, after)


async def _job_events(job: PlanJob, after: int) -> AsyncIterator[Event | None]:
    """Improvements in the order found, then ``final``; None after a quiet keep-alive period.

    The worker adds every improvement before it publishes the final plan, and
    :meth:`PlanJob.trace_since` copies both under one lock, so once it says "finished" no
    improvement can follow the ones it returned.
    """
    wake = job.subscribe()
    sent = after
    try:
        while True:
            wake.clear()
            first, entries, finished = job.trace_since(sent)
            for i, entry in enumerate(entries):
                yield Event("improvement", first + i, dumps(entry))
            sent = first + len(entries) - 1
            if finished:
                assert job.final_json is not None
                yield Event("final", job.improvement_count, job.final_json)
                return
            try:
                await asyncio.wait_for(wake.wait(), timeout=KEEPALIVE_S)
            except TimeoutError:
                yield None
    finally:
        job.unsubscribe(wake)
