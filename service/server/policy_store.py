"""The policy store: validate, dry-run, swap atomically, roll back, persist across restarts.

Layout of the policy directory::

    <policy_dir>/files/<sha256>.onnx   every policy ever activated here (content-addressed)
    <policy_dir>/active.json           {"active": sha256 | null, "history": [older sha256, ...]}

Every file is written durably: to a temporary file in the same directory, ``fsync``, renamed
over the final name (``os.replace``, atomic on POSIX), then the directory is ``fsync``-ed so the
rename itself survives a power cut. A crash therefore leaves the old or the new file, never
half of one; the temporary files it may leave (``.tmp-*``) are removed at the next start. A
policy file is written before the pointer that names it, so the pointer never names a file that
was not complete on disk.

At start-up every stored file's sha256 is checked against its name. A damaged *active* policy
(missing, truncated, not the bytes its name says, or refused by the checker) is never replaced
silently: with ``on_damaged="previous"`` the store starts with the newest good policy of the
history (else the shipped default, else none) and lists the damage in :attr:`damaged` (shown on
``GET /v1/policy``, ``/readyz`` and a metric); with ``on_damaged="refuse"`` it raises
:class:`PolicyDamaged` naming the file. The pointer is left as it is until an administrator
acts, so every restart reports the damage again. Uploading a policy whose stored file is
damaged rewrites the file.

The in-memory active policy is one reference to an immutable :class:`ActivePolicy`; a swap
replaces that reference under a lock. A plan takes the reference when it is admitted and keeps
it, so plans in flight finish with the policy they started with while new plans get the new one.

Validation is exactly ``dueroute policy check`` (:func:`policies.runtime.check_policy`); nothing
is written or swapped unless it reports no problem.

Once the served graph is known (:meth:`PolicyStore.set_graph`, at the end of the warm-up), a
policy trained on another graph (its ``graph_fingerprint``) is still served, but with a warning:
in the log when it becomes active (or when the graph is set) and in ``warnings`` on
``GET /v1/policy`` and in dry-run answers.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import os
import threading
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from dueroute.planner import limits

log = logging.getLogger("dueroute.service.policy")

#: Controller that serves ``learned`` while no policy is active.
FALLBACK_CONTROLLER = limits.FALLBACK_CONTROLLER

#: How many earlier policies rollback can return to.
HISTORY_LIMIT = 20


class PolicyRejected(Exception):
    """A policy file failed validation; ``problems`` lists every reason."""

    def __init__(self, problems: list[str]) -> None:
        super().__init__("; ".join(problems))
        self.problems = problems


class NothingToRollBack(Exception):
    """Rollback asked for with no earlier policy in the history."""


class PolicyDamaged(Exception):
    """The stored active policy is damaged and the store was told to refuse to start."""


@dataclass(frozen=True)
class ActivePolicy:
    """An immutable snapshot of the policy plans use (``policy`` is None: fallback controller)."""

    sha256: str | None
    policy: Any
    metadata: dict[str, Any] = field(default_factory=dict)
    source: str = "none"
    activated_at: str | None = None

    @property
    def fallback_controller(self) -> str | None:
        return FALLBACK_CONTROLLER if self.policy is None else None

    def info(self, *, active: bool = True, dry_run: bool = False) -> dict[str, Any]:
        """Metadata as ``GET /v1/policy`` shows it (the store adds history and damage)."""
        out: dict[str, Any] = dict(self.metadata)
        out.update(
            sha256=self.sha256,
            active=active,
            dry_run=dry_run,
            source=self.source,
            fallback_controller=self.fallback_controller,
            activated_at=self.activated_at,
        )
        return out


def _now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def policy_metadata(policy: Any) -> dict[str, Any]:
    """JSON-safe metadata of a loaded :class:`policies.runtime.Policy`."""
    info = dict(policy.info())
    info.pop("path", None)  # a server-side path says nothing useful to a client
    meta = policy.metadata
    trained: dict[str, Any] = {
        "graph_name": meta.get("graph_name"),
        "graph_fingerprint": meta.get("graph_fingerprint"),
        "created_utc": meta.get("created_utc"),
    }
    with contextlib.suppress(ValueError, TypeError):
        trained["training_config"] = json.loads(meta.get("training_config", "null"))
    info["trained_on"] = trained
    return info


def check_bytes(data: bytes) -> list[str]:
    """Every problem ``dueroute policy check`` finds in ``data`` (empty list: usable)."""
    from dueroute.policies.runtime import check_policy

    return list(check_policy(data))


def load_bytes(data: bytes) -> Any:
    """A ready :class:`policies.runtime.Policy` (raises :class:`PolicyRejected`)."""
    from dueroute.policies.runtime import InvalidPolicy, load_policy

    try:
        return load_policy(data)
    except InvalidPolicy as exc:
        raise PolicyRejected(exc.problems) from None


class PolicyStore:
    """Holds the active policy and its history; thread-safe.

    Parameters
    ----------
    policy_dir : Path
        Where policies and the active pointer persist (created if missing).
    max_bytes : int
        Largest accepted policy file.
    on_damaged : str
        ``previous`` or ``refuse``: what :meth:`startup` does when the stored active policy
        is damaged (see the module docstring).
    """

    def __init__(self, policy_dir: Path, max_bytes: int, on_damaged: str = "previous") -> None:
        if on_damaged not in ("previous", "refuse"):
            raise ValueError(f"on_damaged must be 'previous' or 'refuse', got {on_damaged!r}")
        self.policy_dir = Path(policy_dir)
        self.files_dir = self.policy_dir / "files"
        self.pointer = self.policy_dir / "active.json"
        self.max_bytes = max_bytes
        self.on_damaged = on_damaged
        self._lock = threading.Lock()
        self._history: list[str] = []
        self._active = ActivePolicy(sha256=None, policy=None, source="none")
        #: Files found damaged at start-up (``file`` relative to the policy directory,
        #: ``sha256``, ``problem``, ``action``); an upload that rewrites one removes it.
        self._damaged: list[dict[str, Any]] = []
        #: (fingerprint, name) of the graph the service searches, once known
        self._graph: tuple[str, str] | None = None

    def set_graph(self, fingerprint: str, name: str = "") -> None:
        """Record the served graph; logs a warning if the active policy was trained on another."""
        self._graph = (fingerprint, name)
        self._warn_if_foreign(self._active)

    def graph_warnings(self, snap: ActivePolicy) -> list[str]:
        """Why ``snap`` may not fit the served graph (empty: it fits, or nothing to compare)."""
        if snap.policy is None or self._graph is None:
            return []
        warning = snap.policy.graph_warning(*self._graph)
        return [warning] if warning else []

    def _warn_if_foreign(self, snap: ActivePolicy) -> None:
        for warning in self.graph_warnings(snap):
            log.warning(
                "policy trained on another graph", extra={"sha256": snap.sha256, "detail": warning}
            )

    # -------------------------------------------------------------------------------------
    @property
    def active(self) -> ActivePolicy:
        """The current snapshot (a plain attribute read: atomic under the GIL)."""
        return self._active

    @property
    def history(self) -> list[str]:
        return list(self._history)

    @property
    def damaged(self) -> list[dict[str, Any]]:
        return [{"was_active": False, **d} for d in self._damaged]

    def info(self, snap: ActivePolicy | None = None, **kwargs: Any) -> dict[str, Any]:
        """``snap.info(**kwargs)`` (default: the active policy) with the store's view added:
        the policy a rollback would return to and the damage found at start-up."""
        snap = snap if snap is not None else self._active
        out = snap.info(**kwargs)
        out["warnings"] = self.graph_warnings(snap)
        with self._lock:
            out["previous_sha256"] = self._history[-1] if self._history else None
            out["damaged"] = self.damaged
        return out

    def startup(self, initial: Path | None, default: Path | None) -> ActivePolicy:
        """Choose the policy at start-up; a bad explicit file raises (fail loudly).

        Order: ``initial`` (the ``--policy`` flag) > the persisted active policy (or, when it
        is damaged, the newest good one of its history) > ``default`` (the shipped policy) >
        none (``learned`` served by the fallback controller).
        """
        self.files_dir.mkdir(parents=True, exist_ok=True)
        self._remove_stale_temporaries()
        bad_files = self._verify_files()
        persisted, pointer_problem = self._read_pointer()
        stored = sorted(
            (p for p in self.files_dir.glob("*.onnx") if p.stem not in bad_files),
            key=lambda p: p.stat().st_mtime,
        )
        history = [s for s in persisted.get("history", []) if isinstance(s, str)]
        self._history = [s for s in history if s not in bad_files and self._file(s).is_file()]
        if initial is not None:
            for problem in bad_files.values():
                self._damaged.append(dict(problem, action="not used (--policy was given)"))
            data = _read_file(initial)
            self._activate(data, source=f"file:{Path(initial).name}", push_history=True)
            return self._active

        sha = persisted.get("active")
        damage: dict[str, Any] | None = None
        if pointer_problem is not None:
            damage = {"file": "active.json", "sha256": None, "problem": pointer_problem}
            # which policy was active is unknown: the newest stored good file is the best guess
            candidates = [p.stem for p in reversed(stored)]
        elif isinstance(sha, str) and sha:
            if sha in bad_files:
                damage = bad_files[sha]
            elif not self._file(sha).is_file():
                damage = {
                    "file": f"files/{sha}.onnx",
                    "sha256": sha,
                    "problem": "the file the pointer names is missing",
                }
            else:
                try:  # the pointer already says so: nothing to write
                    self._activate(
                        self._file(sha).read_bytes(),
                        source="policy_dir",
                        push_history=False,
                        persist=False,
                    )
                except PolicyRejected as exc:
                    damage = {
                        "file": f"files/{sha}.onnx",
                        "sha256": sha,
                        "problem": "refused by the policy check: " + "; ".join(exc.problems),
                    }
            candidates = list(reversed(self._history))
        else:
            candidates = []
            default_sha = _sha_of(default)
            stored = [p for p in stored if p.stem != default_sha]  # stored by the default
            if not self.pointer.is_file() and stored:
                # No pointer but stored files: the first upload was interrupted before its
                # pointer was written (the policy before it, the default, was never stored).
                self._damaged.append(
                    {
                        "file": "active.json",
                        "sha256": None,
                        "problem": f"missing while {len(stored)} stored policy file(s) exist "
                        "(an upload was interrupted before its pointer was written, or the "
                        "pointer was deleted)",
                        "action": "none of them activated: the state before that upload",
                    }
                )
        for bad_sha, problem in bad_files.items():
            if damage is None or bad_sha != damage.get("sha256"):
                self._damaged.append(dict(problem, action="not used"))
        if damage is None:
            if self._active.policy is None:
                self._start_default(default)
            return self._active

        where = self.policy_dir / damage["file"]
        if self.on_damaged == "refuse":
            raise PolicyDamaged(
                f"the stored active policy is damaged: {where}: {damage['problem']}. "
                "Re-upload that policy, remove the file and the pointer, or start with "
                "--on-damaged-policy previous to start with the newest good policy of the "
                "history"
            )
        for candidate in candidates:
            try:  # not persisted: the pointer keeps naming the damaged one until an admin acts
                self._activate(
                    self._file(candidate).read_bytes(),
                    source="policy_dir",
                    push_history=False,
                    persist=False,
                )
            except (OSError, PolicyRejected):
                continue
            if candidate in self._history:  # rolled back to it: older entries stay
                del self._history[self._history.index(candidate) :]
            action = f"started with the newest good policy of the history ({candidate})"
            break
        else:
            self._start_default(default)
            action = (
                f"no good policy in the history; started with {self._active.source}"
                if self._active.policy is not None
                else "no good policy in the history; 'learned' is served by the fallback "
                f"controller {FALLBACK_CONTROLLER}"
            )
        self._damaged.insert(0, dict(damage, action=action, was_active=True))
        log.error(
            "the stored active policy is damaged; not using it",
            extra={"file": str(where), "problem": damage["problem"], "action": action},
        )
        return self._active

    def _start_default(self, default: Path | None) -> None:
        if default is not None and default.is_file():
            try:
                # Not persisted: a newer shipped default replaces it on the next start, while
                # an uploaded or --policy file stays active across restarts.
                self._activate(
                    _read_file(default),
                    source=f"default:{default.name}",
                    push_history=False,
                    persist=False,
                )
            except PolicyRejected as exc:
                log.error(
                    "shipped default policy refused; serving 'learned' with the fallback",
                    extra={"file": default.name, "problems": exc.problems},
                )
        if self._active.policy is None:
            log.warning(
                "no policy available; controller 'learned' is served by the fallback",
                extra={"fallback_controller": FALLBACK_CONTROLLER},
            )

    def _remove_stale_temporaries(self) -> None:
        """Temporary files a crash left mid-write (never read: the rename had not happened)."""
        for folder in (self.policy_dir, self.files_dir):
            for tmp in folder.glob(".tmp-*"):
                log.warning("removing an interrupted write", extra={"file": tmp.name})
                with contextlib.suppress(OSError):
                    tmp.unlink()

    def _verify_files(self) -> dict[str, dict[str, Any]]:
        """sha256 of every stored policy against its name: {sha256: problem} of the bad."""
        bad: dict[str, dict[str, Any]] = {}
        for path in sorted(self.files_dir.glob("*.onnx")):
            sha = path.stem
            try:
                data = path.read_bytes()
            except OSError as exc:
                problem = f"unreadable: {exc.strerror or exc}"
            else:
                digest = hashlib.sha256(data).hexdigest()
                if digest == sha:
                    continue
                problem = (
                    f"holds {len(data)} bytes whose sha256 is {digest[:16]}..., not the "
                    "sha256 its name says (truncated or overwritten)"
                )
            bad[sha] = {"file": f"files/{path.name}", "sha256": sha, "problem": problem}
            log.error("damaged stored policy", extra={"file": path.name, "problem": problem})
        return bad

    # -------------------------------------------------------------------------------------
    def validate(self, data: bytes) -> list[str]:
        """Every problem with ``data`` as a policy file (size checked first)."""
        if len(data) > self.max_bytes:
            return [f"policy file is {len(data)} bytes; the limit is {self.max_bytes} bytes"]
        return check_bytes(data)

    def dry_run(self, data: bytes) -> dict[str, Any]:
        """Validate and load ``data`` without activating it; returns its metadata."""
        problems = self.validate(data)
        if problems:
            raise PolicyRejected(problems)
        sha = hashlib.sha256(data).hexdigest()
        policy = load_bytes(data)
        snap = ActivePolicy(sha, policy, policy_metadata(policy), source="upload")
        return self.info(snap, active=False, dry_run=True)

    def swap(self, data: bytes) -> ActivePolicy:
        """Validate ``data`` and make it the active policy (atomic; persisted)."""
        return self._activate(data, source="upload", push_history=True)

    def rollback(self) -> ActivePolicy:
        """Re-activate the policy that was active before the current one."""
        with self._lock:
            while self._history:
                sha = self._history[-1]
                path = self._file(sha)
                try:
                    data = path.read_bytes()
                except OSError:
                    self._history.pop()
                    continue
                if hashlib.sha256(data).hexdigest() != sha:
                    self._history.pop()
                    log.warning("skipping damaged policy in history", extra={"sha256": sha})
                    continue
                problems = check_bytes(data)
                if problems:  # e.g. the feature schema changed since it was stored
                    self._history.pop()
                    log.warning("skipping refused policy in history", extra={"sha256": sha})
                    continue
                policy = load_bytes(data)
                self._history.pop()
                self._active = ActivePolicy(
                    sha, policy, policy_metadata(policy), source="rollback", activated_at=_now_iso()
                )
                self._write_pointer()
                return self._active
        raise NothingToRollBack("there is no earlier policy to roll back to")

    # -------------------------------------------------------------------------------------
    def _activate(
        self, data: bytes, *, source: str, push_history: bool, persist: bool = True
    ) -> ActivePolicy:
        problems = self.validate(data)
        if problems:
            raise PolicyRejected(problems)
        sha = hashlib.sha256(data).hexdigest()
        policy = load_bytes(data)
        # Stored even when not persisted as active (the shipped default), so a rollback can
        # return to it; complete on disk before the pointer names it.
        self._write_file(data, sha)
        snap = ActivePolicy(
            sha, policy, policy_metadata(policy), source=source, activated_at=_now_iso()
        )
        with self._lock:
            old = self._active.sha256
            if push_history and old is not None and old != sha:
                self._history.append(old)
                del self._history[:-HISTORY_LIMIT]
            self._active = snap  # the swap: one reference assignment
            if persist:
                self._write_pointer()
        log.info("policy activated", extra={"sha256": sha, "source": source, "previous": old})
        self._warn_if_foreign(snap)
        return snap

    def _file(self, sha: str) -> Path:
        return self.files_dir / f"{sha}.onnx"

    def _write_file(self, data: bytes, sha: str) -> Path:
        """Store ``data`` as ``files/<sha>.onnx`` unless an intact copy is there already."""
        self.files_dir.mkdir(parents=True, exist_ok=True)
        final = self._file(sha)
        with contextlib.suppress(OSError):
            if hashlib.sha256(final.read_bytes()).hexdigest() == sha:
                return final
        durable_write(final, data)  # missing or damaged: (re)write it
        with self._lock:
            repaired = [d for d in self._damaged if d.get("sha256") == sha]
            self._damaged = [d for d in self._damaged if d.get("sha256") != sha]
        if repaired:
            log.warning("rewrote a damaged stored policy", extra={"sha256": sha})
        return final

    def _read_pointer(self) -> tuple[dict[str, Any], str | None]:
        """The pointer's content and, when it exists but cannot be used, why."""
        if not self.pointer.is_file():
            return {}, None
        try:
            data = json.loads(self.pointer.read_text())
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            log.error("unreadable active-policy pointer", extra={"error": str(exc)})
            return {}, f"unreadable ({exc})"
        if not isinstance(data, dict) or not isinstance(data.get("active"), str | None):
            return {}, "not an object with an 'active' sha256"
        return data, None

    def _write_pointer(self) -> None:
        body = {"active": self._active.sha256, "history": self._history, "updated_at": _now_iso()}
        durable_write(self.pointer, json.dumps(body, indent=1).encode())


def durable_write(path: Path, data: bytes) -> None:
    """Replace ``path`` by ``data`` so that a crash at any point leaves the old or the new
    content: temporary file, fsync, rename, fsync of the directory."""
    tmp = path.with_name(f".tmp-{path.name}-{os.getpid()}-{threading.get_ident()}")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view) :]
        os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(tmp, path)
    fsync_dir(path.parent)


def fsync_dir(folder: Path) -> None:
    """Make a rename inside ``folder`` durable (POSIX; a no-op where directories cannot be
    opened)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:  # some file systems refuse fsync on a directory
        pass
    finally:
        os.close(fd)


def _sha_of(path: Path | None) -> str | None:
    if path is None:
        return None
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return None


def _read_file(path: Path) -> bytes:
    try:
        return Path(path).read_bytes()
    except OSError as exc:
        raise PolicyRejected([f"cannot read policy file {path}: {exc.strerror or exc}"]) from exc
