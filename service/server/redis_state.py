"""The shared backend of :mod:`service.server.shared_state`: Redis (``DUEROUTE_REDIS_URL``).

Keys (``dueroute:`` prefix; ``{id}`` a plan id, ``{fp}`` 16 hex digits of the graph
fingerprint, ``{sha}`` a policy's sha256):

=================================  ===============================================================
key                                holds
=================================  ===============================================================
``plan_id_key``                    the key plan ids are signed with (set once, by the first replica)
``plan:{id}:live``                 a running plan as GET answers it (JSON), rewritten at most every
                                   0.1 s by its replica; expires after the search deadline + TTL
``plan:{id}:lease``                the id of the replica running the plan, expiring after
                                   ``redis_lease_s`` unless renewed (every third of it)
``plan:{id}:final``                the final plan (JSON), kept ``background_ttl_s``
``plan:{id}:events``               stream: ``improvement`` entries (stream id ``0-{ordinal+1}``)
                                   then one ``final``; kept ``background_ttl_s`` after the final
``traffic:{fp}:journal``           stream of journal entries (stream id ``{seq}-1``; a compaction
                                   snapshot ``{seq}-2``), see ``traffic_store``
``traffic:{fp}:head``              hash: ``seq`` and ``at`` of the last entry
``policy:pointer``                 JSON: the active policy's sha256, its history, source, time
``policy:file:{sha}``              the policy file's bytes
``usage:{caller}:{window}:{index}`` a caller's usage in one fixed window (float)
=================================  ===============================================================

Channels (pub/sub): ``dueroute:announce:policy`` (a new active policy: every replica reads the
pointer, fetches the file, checks its sha256 and the policy check, then activates it),
``...:traffic`` (a new journal entry: every replica syncs at once, besides its 0.2 s poll) and
``...:cancel`` (DELETE of a plan another replica runs). Every replica also re-reads the policy
pointer once a second, so a missed message delays a swap by a second at most.

The request path of a waited plan never touches Redis: plan ids are signed locally with the
shared key, and usage counters add locally and merge in the background. A stored plan costs one
pipelined write when it is stored (on the event loop, bounded by a 0.25 s socket timeout); its
improvements, snapshots and final plan are written by one publisher thread. A replica that dies
stops renewing its leases; the first reader that finds a plan whose lease expired writes its
final plan with status ``error`` (SET NX: the first final wins, the owner's or the reader's).
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import hashlib
import json
import logging
import os
import secrets
import socket
import threading
import time
from collections.abc import AsyncIterator, Callable
from typing import Any
from urllib.parse import urlsplit

import redis
import redis.asyncio as aioredis
from redis.asyncio.retry import Retry as AsyncRetry
from redis.backoff import NoBackoff
from redis.exceptions import RedisError, ResponseError
from redis.retry import Retry

from dueroute.service.server.admission import Ticket
from dueroute.service.server.jobs import STREAM_BUFFER, PlanJob, dumps
from dueroute.service.server.plan_store import (
    KEEPALIVE_S,
    Event,
    Lookup,
    MemoryPlanStore,
    _job_events,
)
from dueroute.service.server.policy_store import (
    HISTORY_LIMIT,
    ActivePolicy,
    NothingToRollBack,
    PolicyRejected,
    PolicyStore,
    _now_iso,
    check_bytes,
)
from dueroute.service.server.shared_state import (
    MemoryUsage,
    SharedState,
    SharedStoreDown,
    window_index,
)
from dueroute.service.server.traffic_store import (
    JournalEntry,
    JournalError,
    _entry_from,
    fold_active,
)

log = logging.getLogger("dueroute.service.shared")

#: A running plan's snapshot (what GET answers on another replica) is rewritten at most this often.
SNAPSHOT_EVERY_S = 0.1
#: Journal entries in Redis before they are compacted into one snapshot entry.
COMPACT_ENTRIES = 2_000
TOPICS = ("policy", "traffic", "cancel")


def redacted(url: str) -> str:
    """``url`` without user and password (for messages and logs)."""
    parts = urlsplit(url)
    if parts.scheme == "unix":
        return f"unix://{parts.path}"
    host = parts.hostname or "localhost"
    port = f":{parts.port}" if parts.port else ""
    return f"{parts.scheme}://{host}{port}{parts.path}"


class RedisLink:
    """The connection to Redis every shared backend uses: a sync client (short timeouts), the
    health flag, an async client per event loop, and one thread that pings, listens to the
    announcement channels and runs the once-a-second checks.

    ``up`` turns false on the first failed command and true again at the first ping that
    answers; then the ``on_up`` callbacks run (re-publish what this replica holds).
    """

    def __init__(self, url: str, prefix: str = "dueroute") -> None:
        self.url = url
        self.where = redacted(url)
        self.prefix = prefix
        self.replica = f"{socket.gethostname()}:{os.getpid()}:{secrets.token_hex(3)}"
        #: typed Any: the client's responses depend on its options (bytes here)
        # one retry on a broken connection: a pooled connection to a restarted Redis fails
        # once, then a new one is made
        self.client: Any = redis.Redis.from_url(
            url,
            socket_timeout=0.25,
            socket_connect_timeout=0.25,
            retry=Retry(NoBackoff(), 1),
        )
        self.up = False
        self.up_since = time.monotonic()  # when ``up`` last turned true
        self.error: str | None = "not connected yet"
        self._handlers: dict[str, list[Callable[[str], None]]] = {t: [] for t in TOPICS}
        self._on_up: list[Callable[[], None]] = []
        self._ticks: list[Callable[[], None]] = []
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._aio: dict[asyncio.AbstractEventLoop, Any] = {}

    def key(self, *parts: str) -> str:
        return ":".join((self.prefix, *parts))

    def channel(self, topic: str) -> str:
        return self.key("announce", topic)

    # -- registration (before start) ---------------------------------------------------------
    def on(self, topic: str, callback: Callable[[str], None]) -> None:
        self._handlers[topic].append(callback)

    def on_up(self, callback: Callable[[], None]) -> None:
        self._on_up.append(callback)

    def every_second(self, callback: Callable[[], None]) -> None:
        self._ticks.append(callback)

    # -- health ------------------------------------------------------------------------------
    def failed(self, exc: BaseException) -> None:
        if self.up:
            log.error("the shared store is unreachable", extra={"redis": self.where})
        self.up = False
        self.error = f"{type(exc).__name__}: {exc}"

    def down(self, what: str) -> SharedStoreDown:
        return SharedStoreDown(
            f"{what} needs the shared store (Redis at {self.where}), which is unreachable "
            f"right now ({self.error}); waited plans are still answered. The service "
            "reconnects by itself: retry in a second"
        )

    def require(self, what: str) -> None:
        if not self.up:
            raise self.down(what)

    def _came_up(self) -> None:
        was_down = not self.up
        self.up, self.error = True, None
        if was_down:
            self.up_since = time.monotonic()
            log.info("the shared store is reachable", extra={"redis": self.where})
            for cb in self._on_up:
                self._call(cb)

    @staticmethod
    def _call(cb: Callable[..., None], *args: Any) -> None:
        try:
            cb(*args)
        except RedisError:
            raise
        except Exception:  # a callback's bug must not stop the link thread
            log.exception("shared-store callback failed")

    # -- async client ------------------------------------------------------------------------
    def aclient(self) -> Any:
        """The async client of the running event loop (one per loop)."""
        loop = asyncio.get_running_loop()
        client = self._aio.get(loop)
        if client is None:
            client = aioredis.Redis.from_url(
                self.url,
                socket_timeout=3.0,
                socket_connect_timeout=0.5,
                retry=AsyncRetry(NoBackoff(), 1),
            )
            self._aio = {lp: c for lp, c in self._aio.items() if not lp.is_closed()}
            self._aio[loop] = client
        return client

    async def aclose(self) -> None:
        client = self._aio.pop(asyncio.get_running_loop(), None)
        if client is not None:
            with contextlib.suppress(Exception):
                await client.aclose()

    # -- lifecycle ---------------------------------------------------------------------------
    def start(self) -> None:
        """Connect once now (a replica may start while Redis is down), then watch."""
        try:
            self.client.ping()
            self._came_up()
        except RedisError as exc:
            self.failed(exc)
            log.error(
                "the shared store is unreachable at start-up; retrying in the background",
                extra={"redis": self.where, "error": self.error},
            )
        self._thread = threading.Thread(target=self._run, name="dueroute-redis", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5.0)
        with contextlib.suppress(Exception):
            self.client.close()

    def _run(self) -> None:
        pubsub: Any = None
        next_ping = next_tick = 0.0
        while not self._stop.is_set():
            try:
                if pubsub is None:
                    pubsub = self.client.pubsub(ignore_subscribe_messages=True)
                    pubsub.subscribe(*(self.channel(t) for t in TOPICS))
                msg = pubsub.get_message(timeout=0.1)
                if msg is not None and msg.get("type") == "message":
                    topic = msg["channel"].decode().rsplit(":", 1)[-1]
                    data = msg["data"].decode(errors="replace")
                    for cb in self._handlers.get(topic, []):
                        self._call(cb, data)
                now = time.monotonic()
                if now >= next_ping:
                    self.client.ping()
                    self._came_up()
                    next_ping = now + 0.25
                if now >= next_tick:
                    for tick in self._ticks:
                        self._call(tick)
                    next_tick = now + 1.0
            except RedisError as exc:
                self.failed(exc)
                if pubsub is not None:
                    with contextlib.suppress(Exception):
                        pubsub.close()
                pubsub = None
                self._stop.wait(0.25)
        if pubsub is not None:
            with contextlib.suppress(Exception):
                pubsub.close()


# ------------------------------------------------------------------------------------------
# Plans


class _RemoteTicket(Ticket):
    """The ticket of a plan another replica runs: a cancel is announced to that replica."""

    plan: RemotePlan | None = None

    def request_cancel(self) -> None:
        if not self.cancel.is_set() and self.plan is not None:
            self.cancel.set()
            plan = self.plan
            plan._task = asyncio.get_running_loop().create_task(plan.store._cancel(plan))


class RemotePlan(PlanJob):
    """A stored plan another replica holds, as read from Redis (what the routes need of a
    :class:`PlanJob`: ``current_json``, ``finished``, ``ticket.request_cancel`` and
    ``future``).

    ``future`` runs until the final plan is known here (it is resolved after a cancel), so a
    DELETE waits for the final state as it does for a plan of this replica.
    """

    def __init__(self, store: RedisPlanStore, plan_id: str, body: bytes, finished: bool) -> None:
        super().__init__(
            plan_id=plan_id,
            origin_node=None,
            destination_node=None,
            deadline_ms=0,
            controller="",
            wait=False,
            arrival_s=0.0,
            search_deadline_s=0.0,
            policy_sha256=None,
        )
        self.store = store
        self.kept = True
        self.snapshot = body
        if finished:
            self.final_json = body
        self.future = concurrent.futures.Future()
        self.future.set_running_or_notify_cancel()
        if finished:
            self.future.set_result(None)
        ticket = _RemoteTicket(ticket_id=-1, arrival_s=0.0, search_deadline_s=0.0)
        ticket.plan = self
        self.ticket = ticket
        self._task: asyncio.Task[None] | None = None

    def current_json(self) -> bytes:
        return self.final_json if self.final_json is not None else self.snapshot


class RedisPlanStore:
    """:class:`plan_store.PlanStore` over Redis: this replica's plans are held in a
    :class:`MemoryPlanStore` (same limits and accounting) and mirrored to Redis; plans of other
    replicas are read from Redis (module docstring).
    """

    def __init__(self, link: RedisLink, inner: MemoryPlanStore, lease_s: float) -> None:
        self.link = link
        self.inner = inner
        self.max_plans, self.max_bytes, self.ttl_s = inner.max_plans, inner.max_bytes, inner.ttl_s
        self.ids = inner.ids
        self.lease_s = lease_s
        self._cond = threading.Condition()
        self._dirty: dict[str, PlanJob] = {}
        self._later: dict[str, PlanJob] = {}  # snapshot due once SNAPSHOT_EVERY_S has passed
        self._running: dict[str, PlanJob] = {}  # held here, not finished: leases renewed
        self._sent: dict[str, int] = {}  # last improvement ordinal written, per plan
        self._snapshot_at: dict[str, float] = {}
        self._renewed_at = -1e9
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        #: called by the publisher thread on every round (usage counters merge from there)
        self.flushers: list[Callable[[], None]] = []
        link.on("cancel", self._on_cancel)
        link.on_up(self._resync)

    def __len__(self) -> int:
        return len(self.inner)

    def _k(self, plan_id: str, what: str) -> str:
        return self.link.key("plan", plan_id, what)

    def _ttl_ms(self) -> int:
        return max(1, int(self.inner.ttl_s * 1000))

    def _live_ttl_ms(self, job: PlanJob) -> int:
        left = max(0.0, job.search_deadline_s - time.perf_counter())
        return max(1, int((left + self.inner.ttl_s + self.lease_s) * 1000))

    # -- ids and room ------------------------------------------------------------------------
    def new_id(self, *, kept: bool) -> str:
        return self.inner.new_id(kept=kept)

    def check_room(self, reserve_bytes: int) -> None:
        self.link.require("storing a plan (wait=false, or keep=true)")
        self.inner.check_room(reserve_bytes)

    # -- this replica's plans ----------------------------------------------------------------
    def put(self, job: PlanJob) -> None:
        self.inner.put(job)
        job.on_change = self._changed
        with self._cond:
            self._running[job.plan_id] = job
        # Written before the answer names the plan, so any replica finds it from then on. One
        # pipelined round trip on the event loop (socket timeout 0.25 s); if it fails, the
        # publisher thread writes it once the store is back.
        try:
            pipe = self.link.client.pipeline(transaction=True)
            self._write_running(pipe, job, force_snapshot=True)
            pipe.execute()
        except RedisError as exc:
            self.link.failed(exc)
            self._changed(job)

    def _changed(self, job: PlanJob) -> None:
        """Any thread (the search's): the plan changed; the publisher writes it. Never blocks
        for long (one uncontended lock)."""
        with self._cond:
            self._dirty[job.plan_id] = job
            self._cond.notify()

    def _write_running(self, pipe: Any, job: PlanJob, force_snapshot: bool = False) -> bool:
        """Queue the plan's new improvements, its lease and (when due) its snapshot; False
        when the snapshot was left for later."""
        pid = job.plan_id
        first, entries, _ = job.trace_since(self._sent.get(pid, -1))
        events = self._k(pid, "events")
        for i, entry in enumerate(entries):
            n = first + i
            pipe.xadd(
                events,
                {"kind": "improvement", "n": n, "data": dumps(entry)},
                id=f"0-{n + 1}",
                maxlen=STREAM_BUFFER,
                approximate=True,
            )
        if entries:
            self._sent[pid] = first + len(entries) - 1
        ttl = self._live_ttl_ms(job)
        pipe.set(self._k(pid, "lease"), self.link.replica, px=int(self.lease_s * 1000))
        now = time.monotonic()
        if not force_snapshot and now - self._snapshot_at.get(pid, -1e9) < SNAPSHOT_EVERY_S:
            return False
        self._snapshot_at[pid] = now
        pipe.set(self._k(pid, "live"), job.current_json(), px=ttl)
        pipe.pexpire(events, ttl)
        return True

    def _write_final(self, job: PlanJob) -> None:
        pid = job.plan_id
        body = job.final_json
        assert body is not None
        client = self.link.client
        won = client.set(self._k(pid, "final"), body, nx=True, px=self._ttl_ms())
        pipe = client.pipeline(transaction=False)
        events = self._k(pid, "events")
        if won:
            first, entries, _ = job.trace_since(self._sent.get(pid, -1))
            for i, entry in enumerate(entries):
                n = first + i
                pipe.xadd(
                    events, {"kind": "improvement", "n": n, "data": dumps(entry)}, id=f"0-{n + 1}"
                )
            pipe.xadd(events, {"kind": "final", "n": job.improvement_count, "data": body})
            # a finished plan's stream replays what its answer lists, then the final plan
            pipe.xtrim(events, maxlen=job.listed + 1, approximate=False)
        pipe.pexpire(events, self._ttl_ms())
        pipe.delete(self._k(pid, "live"), self._k(pid, "lease"))
        pipe.execute(raise_on_error=False)  # an improvement written before is refused: fine
        with self._cond:
            self._running.pop(pid, None)
            self._sent.pop(pid, None)
            self._snapshot_at.pop(pid, None)

    def _publish_round(self) -> None:
        """One round of the publisher thread (raises RedisError: the caller retries)."""
        with self._cond:
            if not self._dirty:
                wait = SNAPSHOT_EVERY_S if self._later else min(0.1, self.lease_s / 3)
                self._cond.wait(timeout=wait)
            batch, self._dirty = self._dirty, {}
            now = time.monotonic()
            due = [
                j
                for pid, j in self._later.items()
                if now - self._snapshot_at.get(pid, -1e9) >= SNAPSHOT_EVERY_S
            ]
            for j in due:
                self._later.pop(j.plan_id, None)
                batch.setdefault(j.plan_id, j)
            renew = now - self._renewed_at >= self.lease_s / 3
            running = list(self._running.values()) if renew else []
        if not self.link.up:
            self._requeue(batch)
            self._stop.wait(0.2)
            return
        try:
            pipe = self.link.client.pipeline(transaction=False)
            finals = []
            for job in batch.values():
                if job.finished:
                    finals.append(job)
                    continue
                try:
                    if not self._write_running(pipe, job):
                        with self._cond:
                            self._later[job.plan_id] = job
                except RedisError:
                    raise
                except Exception:  # this plan's snapshot: its final plan still follows
                    log.exception("mirroring a running plan failed", extra={"plan_id": job.plan_id})
            if renew:
                for job in running:
                    if not job.finished:
                        pipe.set(
                            self._k(job.plan_id, "lease"),
                            self.link.replica,
                            px=int(self.lease_s * 1000),
                        )
                self._renewed_at = now
            results = pipe.execute(raise_on_error=False)
            for r in results:
                if isinstance(r, RedisError) and not isinstance(r, ResponseError):
                    raise r
            for job in finals:
                self._write_final(job)
            for flush in self.flushers:
                flush()
        except RedisError as exc:
            self.link.failed(exc)
            self._requeue(batch)

    def _requeue(self, batch: dict[str, PlanJob]) -> None:
        with self._cond:
            for pid, job in batch.items():
                self._dirty.setdefault(pid, job)

    def _resync(self) -> None:
        """Redis is back (or reached for the first time): share the id key, re-publish every
        plan held here (whatever Redis lost; what it kept refuses the duplicates)."""
        client = self.link.client
        key_name = self.link.key("plan_id_key")
        client.set(key_name, secrets.token_bytes(32), nx=True)
        shared_key = client.get(key_name)
        if shared_key:
            self.ids.adopt(bytes(shared_key))
        held = self.inner.held()
        with self._cond:
            for job in held:
                self._sent.pop(job.plan_id, None)
                self._snapshot_at.pop(job.plan_id, None)
                self._dirty[job.plan_id] = job
            self._cond.notify()

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                self._publish_round()
            except Exception:  # never let the publisher die: log, wait, go on
                log.exception("publishing plans to the shared store failed")
                self._stop.wait(0.5)

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="dueroute-publish", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        with self._cond:
            self._cond.notify()
        if self._thread is not None:
            self._thread.join(timeout=5.0)

    def _on_cancel(self, plan_id: str) -> None:
        """Link thread: another replica was asked to cancel a plan this replica runs."""
        with self._cond:
            job = self._running.get(plan_id)
        if job is not None and not job.finished and job.ticket is not None:
            job.ticket.request_cancel()

    # -- lookups ---------------------------------------------------------------------------
    def lookup(self, plan_id: str) -> Lookup:
        return self.inner.lookup(plan_id)

    async def find(self, plan_id: str) -> Lookup:
        local = self.inner.lookup(plan_id)
        if local.job is not None or local.reason != "expired":
            return local  # held here, never issued by a replica, or never stored anywhere
        self.link.require("reading a plan another replica holds")
        try:
            found = await asyncio.wait_for(self._fetch(plan_id), 1.0)
        except (RedisError, TimeoutError) as exc:
            self.link.failed(exc)
            raise self.link.down("reading a plan another replica holds") from None
        if found is None:
            return local
        body, finished = found
        return Lookup(RemotePlan(self, plan_id, body, finished))

    async def _fetch(self, plan_id: str) -> tuple[bytes, bool] | None:
        """``(JSON, finished)`` of a plan in Redis, or None. A running plan whose lease ran
        out is ended here with status ``error`` (its replica stopped)."""
        r = self.link.aclient()
        final, live, lease = await r.mget(
            self._k(plan_id, "final"), self._k(plan_id, "live"), self._k(plan_id, "lease")
        )
        if final is not None:
            return bytes(final), True
        if live is None:
            return None
        if lease is not None:
            return bytes(live), False
        if time.monotonic() - self.link.up_since < self.lease_s:
            # Redis was unreachable a moment ago: its replica may not have renewed its
            # leases yet (it re-publishes as soon as it is back), so not dead yet
            return bytes(live), False
        return await self._declare_dead(plan_id, bytes(live)), True

    async def _declare_dead(self, plan_id: str, live: bytes) -> bytes:
        r = self.link.aclient()
        snap = json.loads(live)
        count = len(snap.get("improvements") or []) + int(snap.get("improvements_dropped") or 0)
        final = dict(
            snap,
            status="error",
            route=None,
            cost_s=None,
            gap=None,
            error=(
                "the replica running this plan stopped (its lease in the shared store was not "
                f"renewed for {self.lease_s:g} s); the plan ended without a final answer. "
                "Plan again"
            ),
        )
        body = dumps(final)
        won = await r.set(self._k(plan_id, "final"), body, nx=True, px=self._ttl_ms())
        if not won:
            again = await r.get(self._k(plan_id, "final"))
            return bytes(again) if again is not None else body
        events = self._k(plan_id, "events")
        pipe = r.pipeline(transaction=False)
        pipe.xadd(events, {"kind": "final", "n": count, "data": body})
        pipe.pexpire(events, self._ttl_ms())
        pipe.delete(self._k(plan_id, "live"))
        await pipe.execute(raise_on_error=False)
        log.warning("plan ended: its replica stopped", extra={"plan_id": plan_id})
        return body

    async def _cancel(self, plan: RemotePlan) -> None:
        """DELETE of a remote plan: announce it, then wait (up to 5 s) for its final plan."""
        try:
            r = self.link.aclient()
            await r.publish(self.link.channel("cancel"), plan.plan_id)
            end = time.monotonic() + 5.0
            while time.monotonic() < end:
                found = await self._fetch(plan.plan_id)
                if found is None:
                    break
                if found[1]:
                    plan.final_json = found[0]
                    break
                await asyncio.sleep(0.02)
        except RedisError as exc:
            self.link.failed(exc)
        finally:
            if not plan.future.done():
                plan.future.set_result(None)

    def expire(self) -> int:
        return self.inner.expire()

    def stats(self) -> dict[str, float | int]:
        return self.inner.stats()

    # -- events ----------------------------------------------------------------------------
    def events(self, job: PlanJob, after: int) -> AsyncIterator[Event | None]:
        if isinstance(job, RemotePlan):
            return self._remote_events(job.plan_id, after)
        return _job_events(job, after)

    async def _remote_events(self, plan_id: str, after: int) -> AsyncIterator[Event | None]:
        """The plan's stream in Redis as it grows; ends after ``final``, when the plan is gone,
        or when Redis cannot be read (a client resumes with Last-Event-ID)."""
        r = self.link.aclient()
        events = self._k(plan_id, "events")
        last: Any = f"0-{after + 1}" if after >= 0 else "0-0"
        quiet_s = 0.0
        while True:
            try:
                got = await r.xread({events: last}, count=256, block=1000)
                if not got:
                    quiet_s += 1.0
                    if await self._fetch(plan_id) is None:
                        return  # expired: nothing more will come
                    if quiet_s >= KEEPALIVE_S:
                        quiet_s = 0.0
                        yield None
                    continue
            except RedisError as exc:
                self.link.failed(exc)
                return
            quiet_s = 0.0
            for stream_id, fields in got[0][1]:
                last = stream_id
                kind = fields[b"kind"].decode()
                yield Event(kind, int(fields[b"n"]), bytes(fields[b"data"]))
                if kind == "final":
                    return


# ------------------------------------------------------------------------------------------
# Live traffic


class RedisTrafficStore:
    """``traffic_store.TrafficStore`` in Redis: the same journal entries and rules as the
    file backend, appended in WATCH/MULTI transactions (so ``seq`` and ``at`` follow the last
    entry exactly) and announced on the ``traffic`` channel."""

    def __init__(self, link: RedisLink, graph_fingerprint: str) -> None:
        self.link = link
        fp = graph_fingerprint[:16]
        self.stream = link.key("traffic", fp, "journal")
        self.head = link.key("traffic", fp, "head")

    def _append(
        self,
        kind: str,
        now: float,
        updates: list[dict[str, Any]] | None = None,
        due_at: float | None = None,
    ) -> JournalEntry | None:
        self.link.require("changing live traffic")

        def write(pipe: Any) -> JournalEntry | None:
            seq_raw, at_raw = pipe.hmget(self.head, "seq", "at")
            last_seq = int(seq_raw) if seq_raw else 0
            last_at = float(at_raw) if at_raw else 0.0
            t = float(now)
            if due_at is not None:
                if last_seq and last_at >= due_at:
                    return None  # an entry at or after the due time applies the expiry
                t = max(t, due_at)
            entry = JournalEntry(
                seq=last_seq + 1, kind=kind, at=max(t, last_at), updates=updates or []
            )
            line = json.dumps(entry.to_json(), separators=(",", ":"), allow_nan=False)
            pipe.multi()
            if kind == "clear":
                pipe.delete(self.stream)
            pipe.xadd(self.stream, {"e": line}, id=f"{entry.seq}-1")
            pipe.hset(self.head, mapping={"seq": entry.seq, "at": repr(entry.at)})
            pipe.publish(self.link.channel("traffic"), str(entry.seq))
            return entry

        try:
            entry: JournalEntry | None = self.link.client.transaction(
                write, self.head, value_from_callable=True
            )
            if entry is not None and entry.kind == "batch":
                self._compact_if_long()
        except RedisError as exc:
            self.link.failed(exc)
            raise self.link.down("changing live traffic") from None
        return entry

    def append_batch(self, updates: list[dict[str, Any]], now: float) -> JournalEntry:
        entry = self._append("batch", now, updates)
        assert entry is not None
        return entry

    def append_expiry(self, due_at: float, now: float) -> JournalEntry | None:
        return self._append("expire", now, due_at=due_at)

    def clear(self, now: float) -> JournalEntry:
        entry = self._append("clear", now)
        assert entry is not None
        return entry

    def _entries(self, rows: list[Any]) -> list[JournalEntry]:
        out = []
        for stream_id, fields in rows:
            where = f"Redis {self.stream} entry {stream_id.decode()}"
            try:
                obj = json.loads(fields[b"e"])
            except (KeyError, ValueError) as exc:
                raise JournalError(f"{where}: not a journal entry ({exc})") from None
            out.append(_entry_from(obj, where))
        return out

    def since(self, seq: int) -> list[JournalEntry]:
        if not self.link.up:
            return []  # nothing new can be known; the watcher tries again
        try:
            rows = self.link.client.xrange(self.stream, min=f"({seq}-1" if seq > 0 else "-")
        except RedisError as exc:
            self.link.failed(exc)
            return []
        return [e for e in self._entries(rows) if e.seq > seq]

    def _compact_if_long(self) -> None:
        """Summarise a long journal as one snapshot entry (same rule as the file backend)."""
        if self.link.client.xlen(self.stream) <= COMPACT_ENTRIES:
            return

        def write(pipe: Any) -> None:
            entries = self._entries(pipe.xrange(self.stream))
            if not entries:
                return
            last = entries[-1]
            active = fold_active([], entries)
            snap = JournalEntry(
                seq=last.seq,
                kind="snapshot",
                at=last.at,
                active=[{"batch": b, "position": p, "spec": s} for b, p, s in active],
            )
            line = json.dumps(snap.to_json(), separators=(",", ":"), allow_nan=False)
            pipe.multi()
            pipe.delete(self.stream)
            pipe.xadd(self.stream, {"e": line}, id=f"{snap.seq}-2")

        self.link.client.transaction(write, self.head)

    def describe(self) -> dict[str, Any]:
        return {
            "backend": "redis",
            "redis": self.link.where,
            "stream": self.stream,
            "reachable": self.link.up,
        }


# ------------------------------------------------------------------------------------------
# Policy


class SharedPolicyStore(PolicyStore):
    """The policy store with the active policy shared through Redis.

    An upload or rollback on any replica writes the file and the pointer (active sha256 and
    history) in one transaction and announces it; every replica (this one at once, before it
    answers) fetches the file, checks that its sha256 is the one the pointer names, runs the
    policy check and activates it, persisting it in its own policy directory too. The shared
    pointer wins over the start-up choice of a replica once one exists.
    """

    def __init__(
        self,
        link: RedisLink,
        policy_dir: Any,
        max_bytes: int,
        on_damaged: str = "previous",
        on_adopt: Callable[[ActivePolicy], None] | None = None,
    ) -> None:
        super().__init__(policy_dir, max_bytes, on_damaged=on_damaged)
        self.link = link
        self.on_adopt = on_adopt
        self.follow_error: str | None = None
        self._refused: set[str] = set()
        self._pointer_key = link.key("policy", "pointer")
        link.on("policy", lambda _sha: self.follow())
        link.every_second(self.follow)

    def _file_key(self, sha: str) -> str:
        return self.link.key("policy", "file", sha)

    def startup(self, initial: Any, default: Any) -> ActivePolicy:
        super().startup(initial, default)
        with contextlib.suppress(RedisError):
            self.follow()
        return self._active

    def _adopt(self, data: bytes, sha: str, history: list[str], source: str) -> ActivePolicy:
        if hashlib.sha256(data).hexdigest() != sha:
            raise PolicyRejected([f"the shared policy file is not the bytes of sha256 {sha}"])
        snap = self._activate(data, source=source, push_history=False, persist=False)
        with self._lock:
            self._history = [h for h in history if isinstance(h, str)][-HISTORY_LIMIT:]
            self._write_pointer()
        return snap

    def follow(self) -> None:
        """Activate the shared pointer's policy unless it is active here already."""
        if not self.link.up:
            return
        client = self.link.client
        raw = client.get(self._pointer_key)
        if raw is None:
            return
        pointer = json.loads(raw)
        sha, history = pointer.get("active"), list(pointer.get("history") or [])
        with self._lock:
            same = sha == self._active.sha256 and history == self._history
        if same or not isinstance(sha, str) or sha in self._refused:
            return
        data = client.get(self._file_key(sha))
        try:
            if data is None:
                raise PolicyRejected([f"the shared store has no file for policy {sha}"])
            snap = self._adopt(bytes(data), sha, history, source=str(pointer.get("source")))
        except PolicyRejected as exc:
            self._refused.add(sha)
            self.follow_error = f"policy {sha} not activated here: " + "; ".join(exc.problems)
            log.error("shared policy refused", extra={"sha256": sha, "problems": exc.problems})
            return
        self.follow_error = None
        log.info("activated the shared policy", extra={"sha256": sha})
        if self.on_adopt is not None:
            self.on_adopt(snap)

    def _transaction(self, what: str, write: Callable[[Any], Any]) -> Any:
        self.link.require(what)
        try:
            return self.link.client.transaction(write, self._pointer_key, value_from_callable=True)
        except RedisError as exc:
            self.link.failed(exc)
            raise self.link.down(what) from None

    def _shared_pointer(self, pipe: Any) -> dict[str, Any]:
        raw = pipe.get(self._pointer_key)
        if raw is not None:
            return dict(json.loads(raw))
        with self._lock:  # the first shared change: this replica's state is the start
            return {"active": self._active.sha256, "history": list(self._history)}

    def _local_bytes(self, sha: str) -> bytes | None:
        with contextlib.suppress(OSError):
            data = self._file(sha).read_bytes()
            if hashlib.sha256(data).hexdigest() == sha:
                return data
        return None

    def swap(self, data: bytes) -> ActivePolicy:
        problems = self.validate(data)
        if problems:
            raise PolicyRejected(problems)
        sha = hashlib.sha256(data).hexdigest()

        def write(pipe: Any) -> list[str]:
            pointer = self._shared_pointer(pipe)
            old, history = pointer.get("active"), list(pointer.get("history") or [])
            old_bytes = self._local_bytes(old) if isinstance(old, str) else None
            if isinstance(old, str) and old != sha:
                history = (history + [old])[-HISTORY_LIMIT:]
            body = {"active": sha, "history": history, "source": "upload"}
            pipe.multi()
            pipe.set(self._file_key(sha), data)
            if old_bytes is not None:  # so that a rollback on any replica can return to it
                pipe.set(self._file_key(str(old)), old_bytes, nx=True)
            pipe.set(self._pointer_key, json.dumps(dict(body, activated_at=_now_iso())))
            pipe.publish(self.link.channel("policy"), sha)
            return history

        history = self._transaction("activating a policy", write)
        self._refused.discard(sha)
        return self._adopt(data, sha, history, source="upload")

    def rollback(self) -> ActivePolicy:
        def write(pipe: Any) -> tuple[str, bytes, list[str]] | None:
            history = list(self._shared_pointer(pipe).get("history") or [])
            while history:
                sha = history.pop()
                data = pipe.get(self._file_key(sha)) or self._local_bytes(sha)
                if data is None or hashlib.sha256(data).hexdigest() != sha or check_bytes(data):
                    log.warning("skipping a missing or refused policy", extra={"sha256": sha})
                    continue
                body = {"active": sha, "history": history, "source": "rollback"}
                pipe.multi()
                pipe.set(self._file_key(sha), data)
                pipe.set(self._pointer_key, json.dumps(dict(body, activated_at=_now_iso())))
                pipe.publish(self.link.channel("policy"), sha)
                return sha, bytes(data), history
            return None

        found = self._transaction("rolling back the policy", write)
        if found is None:
            raise NothingToRollBack("there is no earlier policy to roll back to")
        sha, data, history = found
        return self._adopt(data, sha, history, source="rollback")


# ------------------------------------------------------------------------------------------
# Usage counters


class RedisUsage:
    """``shared_state.UsageCounters`` shared through Redis, without Redis on the request path.

    ``add`` counts at once in this process; the publisher thread adds the pending amounts to
    the shared counters (``INCRBYFLOAT``, expiring two windows later) every 0.1 s and reads
    back the shared totals of the windows in use, so a total lags other replicas' additions by
    about that. While Redis is unreachable the amounts wait and the totals are this replica's.
    """

    def __init__(self, link: RedisLink, clock: Callable[[], float] = time.time) -> None:
        self.link = link
        self.clock = clock
        self._lock = threading.Lock()
        self._pending: dict[tuple[str, float, int], float] = {}
        self._inflight: dict[tuple[str, float, int], float] = {}
        self._shared: dict[tuple[str, float, int], float] = {}
        self._local = MemoryUsage(clock)  # what this replica added (its floor while apart)

    def _key(self, caller: str, window_s: float, now: float | None) -> tuple[str, float, int]:
        t = self.clock() if now is None else now
        return caller, float(window_s), window_index(window_s, t)

    def add(self, caller: str, amount: float, window_s: float, now: float | None = None) -> float:
        key = self._key(caller, window_s, now)
        self._local.add(caller, amount, window_s, now)
        with self._lock:
            self._pending[key] = self._pending.get(key, 0.0) + float(amount)
            return self._total_locked(key, caller, window_s, now)

    def read(self, caller: str, window_s: float, now: float | None = None) -> float:
        key = self._key(caller, window_s, now)
        with self._lock:
            self._shared.setdefault(key, 0.0)  # watched from now on
            return self._total_locked(key, caller, window_s, now)

    def _total_locked(
        self, key: tuple[str, float, int], caller: str, window_s: float, now: float | None
    ) -> float:
        merged = self._shared.get(key, 0.0) + self._pending.get(key, 0.0)
        merged += self._inflight.get(key, 0.0)
        return max(merged, self._local.read(caller, window_s, now))

    def _rkey(self, key: tuple[str, float, int]) -> str:
        return self.link.key("usage", key[0], f"{key[1]:g}", str(key[2]))

    def flush(self, now: float | None = None) -> None:
        """Publisher thread: add what is pending, read back the totals in use (windows before
        the previous one at ``now`` are forgotten)."""
        now = self.clock() if now is None else now
        with self._lock:
            self._shared = {
                k: v for k, v in self._shared.items() if k[2] >= window_index(k[1], now) - 1
            }
            sending, self._pending = self._pending, {}
            self._inflight = dict(sending)
            watched = [k for k in self._shared if k not in sending]
        if not sending and not watched:
            return
        pipe = self.link.client.pipeline(transaction=False)
        for key, amount in sending.items():
            pipe.incrbyfloat(self._rkey(key), amount)
            pipe.pexpire(self._rkey(key), int(key[1] * 2000) + 1000)
        for key in watched:
            pipe.get(self._rkey(key))
        try:
            results = pipe.execute()
        except RedisError:
            with self._lock:  # not counted: send it again next time
                for key, amount in sending.items():
                    self._pending[key] = self._pending.get(key, 0.0) + amount
                self._inflight = {}
            raise
        totals = results[0 : 2 * len(sending) : 2]
        with self._lock:
            for key, total in zip(sending, totals, strict=True):
                self._shared[key] = float(total)
            for key, value in zip(watched, results[2 * len(sending) :], strict=True):
                self._shared[key] = float(value) if value is not None else 0.0
            self._inflight = {}


# ------------------------------------------------------------------------------------------
# The bundle


class RedisShared(SharedState):
    """Every store shared through Redis (``DUEROUTE_REDIS_URL``)."""

    backend = "redis"

    def __init__(self, settings: Any) -> None:
        super().__init__(settings)
        self.link = RedisLink(settings.redis_url)
        inner = self.plans
        assert isinstance(inner, MemoryPlanStore)
        self.redis_plans = RedisPlanStore(self.link, inner, settings.redis_lease_s)
        self.plans = self.redis_plans
        self.redis_usage = RedisUsage(self.link)
        self.usage = self.redis_usage
        self.redis_plans.flushers.append(self.redis_usage.flush)

    def policy_store(self, on_adopt: Callable[[Any], None] | None = None) -> PolicyStore:
        s = self.settings
        return SharedPolicyStore(
            self.link, s.policy_dir, s.max_policy_bytes, s.on_damaged_policy, on_adopt=on_adopt
        )

    def traffic_store(self, graph_fingerprint: str) -> RedisTrafficStore:
        return RedisTrafficStore(self.link, graph_fingerprint)

    def watch_traffic(self, sync: Callable[[], Any]) -> None:
        self.link.on("traffic", lambda _seq: sync())

    def require(self, what: str) -> None:
        self.link.require(what)

    def start(self) -> None:
        self.link.start()
        self.redis_plans.start()

    def stop(self) -> None:
        self.redis_plans.stop()
        self.link.stop()

    async def aclose(self) -> None:
        await self.link.aclose()

    def describe(self) -> dict[str, Any]:
        return {
            "backend": self.backend,
            "redis": self.link.where,
            "reachable": self.link.up,
            "error": self.link.error,
            "replica": self.link.replica,
        }
