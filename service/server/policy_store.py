"""The policy store: validate, dry-run, swap atomically, roll back, persist across restarts.

Layout of the policy directory::

    <policy_dir>/files/<sha256>.onnx   every policy ever activated here (content-addressed)
    <policy_dir>/active.json           {"active": sha256 | null, "history": [older sha256, ...]}

``active.json`` is replaced atomically (write a temporary file, then ``os.replace``), so a crash
leaves either the old or the new pointer, never half of one. The in-memory active policy is one
reference to an immutable :class:`ActivePolicy`; a swap replaces that reference under a lock. A
plan takes the reference when it is admitted and keeps it, so plans in flight finish with the
policy they started with while new plans get the new one.

Validation is exactly ``dueroute policy check`` (:func:`policies.runtime.check_policy`); nothing
is written or swapped unless it reports no problem.
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
    """

    def __init__(self, policy_dir: Path, max_bytes: int) -> None:
        self.policy_dir = Path(policy_dir)
        self.files_dir = self.policy_dir / "files"
        self.pointer = self.policy_dir / "active.json"
        self.max_bytes = max_bytes
        self._lock = threading.Lock()
        self._history: list[str] = []
        self._active = ActivePolicy(sha256=None, policy=None, source="none")

    # -------------------------------------------------------------------------------------
    @property
    def active(self) -> ActivePolicy:
        """The current snapshot (a plain attribute read: atomic under the GIL)."""
        return self._active

    @property
    def history(self) -> list[str]:
        return list(self._history)

    def startup(self, initial: Path | None, default: Path | None) -> ActivePolicy:
        """Choose the policy at start-up; a bad explicit file raises (fail loudly).

        Order: ``initial`` (the ``--policy`` flag) > the persisted active policy > ``default``
        (the shipped policy) > none (``learned`` served by the fallback controller).
        """
        self.files_dir.mkdir(parents=True, exist_ok=True)
        persisted = self._read_pointer()
        self._history = [s for s in persisted.get("history", []) if self._file(s).is_file()]
        if initial is not None:
            data = _read_file(initial)
            self._activate(data, source=f"file:{initial}", push_history=True)
            return self._active
        sha = persisted.get("active")
        if sha and self._file(sha).is_file():
            data = self._file(sha).read_bytes()
            try:
                self._activate(data, source="policy_dir", push_history=False)
                return self._active
            except PolicyRejected as exc:
                log.error(
                    "persisted policy refused, ignoring it",
                    extra={"sha256": sha, "problems": exc.problems},
                )
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
                    extra={"path": str(default), "problems": exc.problems},
                )
        if self._active.policy is None:
            log.warning(
                "no policy available; controller 'learned' is served by the fallback",
                extra={"fallback_controller": FALLBACK_CONTROLLER},
            )
        return self._active

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
        return snap.info(active=False, dry_run=True)

    def swap(self, data: bytes) -> ActivePolicy:
        """Validate ``data`` and make it the active policy (atomic; persisted)."""
        return self._activate(data, source="upload", push_history=True)

    def rollback(self) -> ActivePolicy:
        """Re-activate the policy that was active before the current one."""
        with self._lock:
            while self._history:
                sha = self._history[-1]
                path = self._file(sha)
                if not path.is_file():
                    self._history.pop()
                    continue
                data = path.read_bytes()
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
        return snap

    def _file(self, sha: str) -> Path:
        return self.files_dir / f"{sha}.onnx"

    def _write_file(self, data: bytes, sha: str) -> Path:
        self.files_dir.mkdir(parents=True, exist_ok=True)
        final = self._file(sha)
        if final.is_file():
            return final
        tmp = self.files_dir / f".tmp-{sha}-{os.getpid()}-{threading.get_ident()}.onnx"
        tmp.write_bytes(data)
        os.replace(tmp, final)
        return final

    def _read_pointer(self) -> dict[str, Any]:
        if not self.pointer.is_file():
            return {}
        try:
            data = json.loads(self.pointer.read_text())
        except (OSError, json.JSONDecodeError) as exc:
            log.error("unreadable active-policy pointer, ignoring it", extra={"error": str(exc)})
            return {}
        return data if isinstance(data, dict) else {}

    def _write_pointer(self) -> None:
        body = {"active": self._active.sha256, "history": self._history, "updated_at": _now_iso()}
        tmp = self.pointer.with_name(f".active-{os.getpid()}-{threading.get_ident()}.json")
        tmp.write_text(json.dumps(body, indent=1))
        os.replace(tmp, self.pointer)


def _read_file(path: Path) -> bytes:
    try:
        return Path(path).read_bytes()
    except OSError as exc:
        raise PolicyRejected([f"cannot read policy file {path}: {exc.strerror or exc}"]) from exc
