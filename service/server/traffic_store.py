"""Durable live traffic: a journal of cost operations, and the live cost layer fed from it.

The journal is the single source of truth for cost versions. Every accepted operation is one
entry with a sequence number ``seq`` (= the cost version it produces) and a time stamp ``at``
(unix seconds, never decreasing along the journal):

==========  =================================================================================
kind        effect on the active updates
==========  =================================================================================
batch       appends its updates (``updates``: the normalised update objects, with
            ``expires_in_s`` already turned into an absolute ``expires_at``)
expire      nothing by itself (see below); written when an update's expiry falls due
clear       drops every update (``DELETE /v1/traffic``)
snapshot    replaces the active updates with ``active`` (compaction; same ``seq`` as the
            entry it summarises, so it makes no new version)
==========  =================================================================================

After each entry, updates whose ``expires_at`` is not later than the entry's ``at`` are
dropped. The costs of version ``k`` are therefore a pure function of entries ``1..k``: a
restart replays the journal and gets the same version number and the same costs, and every
process that reads the same journal converges to the same versions. An expiry falls due
between entries; the first process to notice appends an ``expire`` entry (under the journal
lock, and only if no entry at or after that time exists yet), so expiries also become numbered
versions that every replica shares.

Store interface
---------------
:class:`TrafficStore` is what :class:`LiveTraffic` needs from a backend: ``append_batch``,
``append_expiry``, ``clear`` and ``since(seq)``. :class:`JournalStore` is the file backend:
``<traffic_dir>/<graph fingerprint, 16 hex>/journal.jsonl``, one JSON object per line, appended
under an exclusive ``flock`` on ``journal.lock``, each append ``fsync``-ed (and the directory
``fsync``-ed when a file is created or replaced) before it is acknowledged. Readers take no lock:
they read complete lines only, from where they stopped. A writer that finds a torn last line
(a crash mid-write; never acknowledged) truncates it before appending. ``clear`` compacts the
file: a new file holding only the clear entry replaces the old one by rename; readers notice
the new inode and re-read from its start. A journal per graph fingerprint keeps the updates of
one graph away from another graph's node and edge indices.

Several processes sharing the directory converge by polling: :class:`LiveTraffic` checks the
journal every ``poll_s`` (0.2 s by default) and applies what is new.
"""

from __future__ import annotations

import contextlib
import dataclasses
import fcntl
import json
import logging
import math
import os
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from dueroute.planner.traffic import (
    Batch,
    CostLayer,
    CostVersion,
    Update,
    parse_document,
    parse_rfc3339,
    rfc3339,
)

log = logging.getLogger("dueroute.service.traffic")

KINDS = ("batch", "expire", "clear", "snapshot")

#: A journal larger than this is compacted to one snapshot entry after an append.
COMPACT_BYTES = 32 * 1024 * 1024


class JournalError(Exception):
    """The journal cannot be read as a sequence of entries (the message names file and line)."""


@dataclass(frozen=True)
class JournalEntry:
    """One operation of the journal (see the module docstring)."""

    seq: int
    kind: str
    at: float
    updates: list[dict[str, Any]] = field(default_factory=list)
    #: snapshot only: ``[{"batch": seq, "position": i, "spec": {...}}, ...]`` in apply order
    active: list[dict[str, Any]] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"seq": self.seq, "kind": self.kind, "at": self.at}
        if self.kind == "batch":
            out["updates"] = self.updates
        if self.kind == "snapshot":
            out["active"] = self.active
        return out


class TrafficStore(Protocol):
    """What the live traffic needs from a durable backend (journal file today, Redis later)."""

    def append_batch(self, updates: list[dict[str, Any]], now: float) -> JournalEntry:
        """Durably append a batch; returns its entry (``seq`` = the version it produces)."""
        ...

    def append_expiry(self, due_at: float, now: float) -> JournalEntry | None:
        """Append an ``expire`` entry unless an entry at or after ``due_at`` exists already."""
        ...

    def clear(self, now: float) -> JournalEntry:
        """Durably drop every update; returns the clear entry."""
        ...

    def since(self, seq: int) -> list[JournalEntry]:
        """Entries after ``seq`` in order; starts with a clear or snapshot when older ones are
        gone (compaction), which fully determines the state."""
        ...

    def describe(self) -> dict[str, Any]:
        """Where the store keeps its data (for ``GET /v1/traffic``)."""
        ...


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _entry_from(obj: Any, where: str) -> JournalEntry:
    if not isinstance(obj, dict):
        raise JournalError(f"{where}: not a JSON object")
    seq, kind, at = obj.get("seq"), obj.get("kind"), obj.get("at")
    if isinstance(seq, bool) or not isinstance(seq, int) or seq < 1:
        raise JournalError(f"{where}: 'seq' must be a positive integer, got {seq!r}")
    if kind not in KINDS:
        raise JournalError(f"{where}: 'kind' must be one of {KINDS}, got {kind!r}")
    if isinstance(at, bool) or not isinstance(at, (int, float)) or not math.isfinite(at):
        raise JournalError(f"{where}: 'at' must be a unix time, got {at!r}")
    updates = obj.get("updates", [])
    active = obj.get("active", [])
    if not isinstance(updates, list) or not isinstance(active, list):
        raise JournalError(f"{where}: 'updates' and 'active' must be lists")
    return JournalEntry(seq=seq, kind=kind, at=float(at), updates=updates, active=active)


class JournalStore:
    """The file backend of :class:`TrafficStore` (module docstring).

    Parameters
    ----------
    directory : Path
        The traffic state directory (``DUEROUTE_TRAFFIC_DIR``).
    graph_fingerprint : str
        The graph the updates refer to; its journal lives in a sub-folder of its own.
    """

    def __init__(self, directory: Path, graph_fingerprint: str) -> None:
        self.root = Path(directory)
        self.dir = self.root / graph_fingerprint[:16]
        self.path = self.dir / "journal.jsonl"
        self.lock_path = self.dir / "journal.lock"
        self.graph_fingerprint = graph_fingerprint
        self._mutex = threading.Lock()
        self._ino: int | None = None
        self._offset = 0
        self._line = 0
        #: entries from the last clear/snapshot (or the first entry) on
        self._entries: list[JournalEntry] = []
        self.compactions = 0

    # -- reading --
    def _read_new(self) -> None:
        """Read complete lines appended since the last call (re-read a replaced file)."""
        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            self._ino, self._offset, self._line, self._entries = None, 0, 0, []
            return
        if st.st_ino != self._ino or st.st_size < self._offset:
            self._ino, self._offset, self._line = st.st_ino, 0, 0
            self._entries = []
        if st.st_size == self._offset:
            return
        with open(self.path, "rb") as fh:
            fh.seek(self._offset)
            data = fh.read(st.st_size - self._offset)
        end = data.rfind(b"\n")
        if end < 0:
            return  # a line being written (or torn): wait for its newline
        last_seq = self._entries[-1].seq if self._entries else 0
        for raw in data[: end + 1].splitlines():
            self._line += 1
            where = f"{self.path}: line {self._line}"
            try:
                obj = json.loads(raw)
            except (json.JSONDecodeError, UnicodeDecodeError) as exc:
                raise JournalError(f"{where}: not JSON ({exc})") from None
            entry = _entry_from(obj, where)
            same_seq_snapshot = entry.kind == "snapshot" and entry.seq == last_seq
            if entry.seq <= last_seq and not same_seq_snapshot:
                raise JournalError(
                    f"{where}: seq {entry.seq} does not follow {last_seq} (entries must be in "
                    "increasing order)"
                )
            if entry.kind in ("clear", "snapshot"):
                self._entries = []
            self._entries.append(entry)
            last_seq = entry.seq
        self._offset += end + 1

    def since(self, seq: int) -> list[JournalEntry]:
        with self._mutex:
            self._read_new()
            return [e for e in self._entries if e.seq > seq]

    def last(self) -> JournalEntry | None:
        with self._mutex:
            self._read_new()
            return self._entries[-1] if self._entries else None

    # -- writing --
    def _make_dir(self) -> None:
        """Create the journal folder on the first write (fsync-ing each new parent)."""
        missing = []
        d = self.dir
        while not d.is_dir():
            missing.append(d)
            d = d.parent
        for d in reversed(missing):
            with contextlib.suppress(FileExistsError):
                d.mkdir()
            _fsync_dir(d.parent)

    @contextlib.contextmanager
    def _locked(self) -> Any:
        self._make_dir()
        with self._mutex, open(self.lock_path, "a+b") as lock:
            fcntl.flock(lock.fileno(), fcntl.LOCK_EX)
            try:
                self._read_new()
                self._repair_tail()
                yield
            finally:
                fcntl.flock(lock.fileno(), fcntl.LOCK_UN)

    def _repair_tail(self) -> None:
        """Under the lock: drop a torn last line (written by a writer that crashed)."""
        with contextlib.suppress(FileNotFoundError):
            if os.stat(self.path).st_size > self._offset:
                log.warning("dropping a torn last journal line", extra={"journal": str(self.path)})
                with open(self.path, "r+b") as fh:
                    fh.truncate(self._offset)
                    fh.flush()
                    os.fsync(fh.fileno())

    def _next(self, now: float) -> tuple[int, float]:
        last = self._entries[-1] if self._entries else None
        seq = last.seq + 1 if last is not None else 1
        at = max(float(now), last.at if last is not None else 0.0)
        return seq, at

    def _append(self, entry: JournalEntry) -> JournalEntry:
        line = json.dumps(entry.to_json(), separators=(",", ":"), allow_nan=False) + "\n"
        created = not self.path.exists()
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, line.encode())
            os.fsync(fd)
        finally:
            os.close(fd)
        if created:
            _fsync_dir(self.dir)
        self._read_new()
        return entry

    def _rewrite(self, entry: JournalEntry) -> None:
        """Replace the journal by one holding only ``entry`` (clear, compaction)."""
        tmp = self.dir / f"journal.jsonl.{os.getpid()}.tmp"
        line = json.dumps(entry.to_json(), separators=(",", ":"), allow_nan=False) + "\n"
        with open(tmp, "wb") as fh:
            fh.write(line.encode())
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.path)
        _fsync_dir(self.dir)
        self.compactions += 1
        self._read_new()

    def append_batch(self, updates: list[dict[str, Any]], now: float) -> JournalEntry:
        with self._locked():
            seq, at = self._next(now)
            entry = self._append(JournalEntry(seq=seq, kind="batch", at=at, updates=updates))
            if os.stat(self.path).st_size > COMPACT_BYTES:
                self._compact()
            return entry

    def append_expiry(self, due_at: float, now: float) -> JournalEntry | None:
        with self._locked():
            last = self._entries[-1] if self._entries else None
            if last is not None and last.at >= due_at:
                return None  # an entry at or after the due time already applies the expiry
            seq, at = self._next(max(now, due_at))
            return self._append(JournalEntry(seq=seq, kind="expire", at=at))

    def clear(self, now: float) -> JournalEntry:
        with self._locked():
            seq, at = self._next(now)
            entry = JournalEntry(seq=seq, kind="clear", at=at)
            self._rewrite(entry)
            return entry

    def _compact(self) -> None:
        """Under the lock: summarise the journal as one snapshot with the last entry's seq."""
        last = self._entries[-1]
        active = fold_active([], self._entries)
        snap = JournalEntry(
            seq=last.seq,
            kind="snapshot",
            at=last.at,
            active=[{"batch": b, "position": p, "spec": s} for b, p, s in active],
        )
        self._rewrite(snap)

    def describe(self) -> dict[str, Any]:
        with contextlib.suppress(FileNotFoundError):
            size = os.stat(self.path).st_size
            return {"backend": "journal", "path": str(self.path), "bytes": size}
        return {"backend": "journal", "path": str(self.path), "bytes": 0}


def _expires_at(spec: dict[str, Any]) -> float | None:
    text = spec.get("expires_at")
    return parse_rfc3339(text) if isinstance(text, str) else None


def fold_active(
    active: list[tuple[int, int, dict[str, Any]]], entries: list[JournalEntry]
) -> list[tuple[int, int, dict[str, Any]]]:
    """The active updates ``(batch seq, position, spec)`` after ``entries`` (pure; the rule of
    the module docstring). Used for compaction and checked against the live layer in tests."""
    out = list(active)
    for e in entries:
        if e.kind == "batch":
            out += [(e.seq, i, spec) for i, spec in enumerate(e.updates)]
        elif e.kind == "clear":
            out = []
        elif e.kind == "snapshot":
            out = [(int(a["batch"]), int(a["position"]), dict(a["spec"])) for a in e.active]
        out = [a for a in out if (x := _expires_at(a[2])) is None or x > e.at]
    return out


# --------------------------------------------------------------------------------------------
# Live traffic of one service process


class LiveTraffic:
    """The service's cost layer, kept in step with a :class:`TrafficStore`.

    ``current`` is the newest version (an attribute read: plans take it when their search
    starts and keep it). ``submit``/``clear`` write through the store and return once the new
    version is published here; a watcher thread applies what other processes wrote and
    appends ``expire`` entries when an update's expiry falls due.

    Parameters
    ----------
    graph, landmarks
        The service's graph and its base-cost landmarks (passed to :class:`CostLayer`).
    store : TrafficStore
    poll_s : float
        How often the watcher looks at the store (convergence across processes).
    refine : str
        :class:`CostLayer` refinement mode (``background`` in the service).
    background_nice : int
        Niceness of the refinement thread.
    """

    def __init__(
        self,
        graph: Any,
        landmarks: Any,
        store: TrafficStore,
        *,
        poll_s: float = 0.2,
        refine: str = "background",
        background_nice: int = 0,
        clock: Any = time.time,
        turn_profile: Any = None,
    ) -> None:
        self.graph = graph
        self.store = store
        self.poll_s = poll_s
        self.clock = clock
        self.layer = CostLayer(
            graph,
            landmarks,
            refine=refine,
            background_nice=background_nice,
            clock=clock,
            turn_profile=turn_profile,
        )
        self._sync_lock = threading.Lock()
        self._resolved: dict[int, Batch] = {}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.error: str | None = None
        self.last_sync_wall: float | None = None
        self.applied_entries = 0

    @property
    def current(self) -> CostVersion:
        return self.layer.current

    # -- lifecycle --
    def start(self) -> CostVersion:
        """Replay the store (raises :class:`JournalError` on a corrupt journal), then watch."""
        self.sync(raise_errors=True)
        self._thread = threading.Thread(target=self._watch, name="dueroute-traffic", daemon=True)
        self._thread.start()
        return self.current

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5.0)
        self.layer.close()

    # -- writing --
    def parse(self, doc: Any, now: float | None = None) -> Batch:
        """Validate a document against the graph and prepare it (``TrafficDocumentError``)."""
        updates = parse_document(
            doc, self.graph, now=self.clock() if now is None else now, where="traffic batch"
        )
        return Batch(updates)

    def submit(self, updates: Batch) -> tuple[JournalEntry, CostVersion]:
        """Journal a validated batch and publish it; returns its entry and the version now."""
        entry = self.store.append_batch([u.spec for u in updates.updates], self.clock())
        self._resolved[entry.seq] = updates
        self.sync(raise_errors=True)
        return entry, self.current

    def clear(self) -> tuple[JournalEntry, CostVersion]:
        entry = self.store.clear(self.clock())
        self.sync(raise_errors=True)
        return entry, self.current

    # -- applying --
    def sync(self, raise_errors: bool = False) -> CostVersion:
        """Apply every store entry after the current version (one new version at most)."""
        with self._sync_lock:
            try:
                entries = self.store.since(self.current.version)
                if entries:
                    self._apply(entries)
                self.error = None
            except Exception as exc:
                self.error = f"{type(exc).__name__}: {exc}"
                log.error("live traffic could not be applied", extra={"error": self.error})
                if raise_errors:
                    raise
            self.last_sync_wall = self.clock()
            return self.current

    def _resolve(self, entry: JournalEntry) -> Batch:
        mine = self._resolved.pop(entry.seq, None)
        if mine is not None:
            return mine
        return Batch(
            parse_document(
                {"updates": entry.updates},
                self.graph,
                now=entry.at,
                check_expiry=False,
                where=f"journal entry {entry.seq}",
            )
        )

    def _apply(self, entries: list[JournalEntry]) -> None:
        layer = self.layer
        last = entries[-1]
        if len(entries) == 1 and last.kind == "batch" and last.seq > layer.current.version:
            layer.apply(self._resolve(last), version=last.seq, at=last.at)
            self.applied_entries += 1
            return
        # Several entries (a restart, a process catching up) or a non-batch entry: fold them
        # into the active list and publish the last one's version.
        cur = layer.current
        active: list[tuple[Update, int]] = list(zip(cur.active, cur.active_batches, strict=True))
        for e in entries:
            if e.kind == "batch":
                active += [(u, e.seq) for u in self._resolve(e).updates]
            elif e.kind == "clear":
                active = []
            elif e.kind == "snapshot":
                active = self._from_snapshot(e)
            active = [a for a in active if a[0].expires_at is None or a[0].expires_at > e.at]
            self.applied_entries += 1
        if last.seq > layer.current.version:
            layer.replace(
                [u for u, _ in active], [b for _, b in active], version=last.seq, at=last.at
            )
        for seq in [s for s in self._resolved if s <= last.seq]:
            self._resolved.pop(seq, None)

    def _from_snapshot(self, e: JournalEntry) -> list[tuple[Update, int]]:
        out: list[tuple[Update, int]] = []
        by_batch: dict[int, list[tuple[int, dict[str, Any]]]] = {}
        order: list[int] = []
        for a in e.active:
            b = int(a["batch"])
            if b not in by_batch:
                by_batch[b] = []
                order.append(b)
            by_batch[b].append((int(a["position"]), dict(a["spec"])))
        for b in order:
            specs = by_batch[b]
            parsed = parse_document(
                {"updates": [s for _, s in specs]},
                self.graph,
                now=e.at,
                check_expiry=False,
                where=f"journal snapshot {e.seq}",
            )
            out += [
                (dataclasses.replace(u, position=position), b)
                for u, (position, _) in zip(parsed, specs, strict=True)
            ]
        return out

    def _watch(self) -> None:
        while not self._stop.is_set():
            nxt = self.current.next_expiry
            now = self.clock()
            wait = self.poll_s if nxt is None else max(0.0, min(self.poll_s, nxt - now))
            if self._stop.wait(wait):
                return
            self.sync()
            nxt = self.current.next_expiry
            if nxt is not None and nxt <= self.clock():
                try:
                    self.store.append_expiry(nxt, self.clock())
                except Exception as exc:
                    self.error = f"{type(exc).__name__}: {exc}"
                    log.error("could not journal an expiry", extra={"error": self.error})
                    self._stop.wait(1.0)
                self.sync()

    def info(self) -> dict[str, Any]:
        """``GET /v1/traffic``."""
        out = self.current.info()
        out["store"] = self.store.describe()
        out["last_sync"] = rfc3339(self.last_sync_wall)
        out["error"] = self.error
        return out
