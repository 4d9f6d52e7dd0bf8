"""Telling callers apart and holding each to its share: concurrent plans, search CPU, caps.

A caller is identified by its API key (header ``X-API-Key``, checked against the service's
key file) or, without one, by its client address (``anon:<address>``). Each caller gets:

* at most ``caller_max_plans`` plans admitted and unfinished at once (waited or background);
* a **search CPU budget**: a token bucket (common practice for rate limits) that refills at
  ``caller_cpu_ms_per_s`` milliseconds of search per second up to ``caller_cpu_burst_ms``; a plan
  is charged the slot time it really used when it finishes, and a caller whose bucket is empty
  is refused (429 with Retry-After) until it refills;
* anonymous callers additionally may not ask a deadline above ``anonymous_max_deadline_ms``, or
  above ``anonymous_slow_max_ms`` with a slow controller (a fixed weight above
  ``anonymous_max_weight`` or ``random``: on roads with ALT these expand the most per route).

The limits are held in a :class:`CallerLimits` (one process, in memory); every method is
thread-safe, since plans finish on search threads.
"""

from __future__ import annotations

import hashlib
import hmac
import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

#: The request header that carries an API key.
API_KEY_HEADER = "x-api-key"


class CallerRefused(Exception):
    """The caller is over one of its limits: ``status`` (401, 403 or 429), the ``reason``
    (``api_key``, ``anonymous``, ``caller_plans``, ``caller_cpu``: a metric label) and why."""

    def __init__(
        self, status: int, reason: str, message: str, retry_after_s: int | None = None
    ) -> None:
        super().__init__(message)
        self.status = status
        self.reason = reason
        self.retry_after_s = retry_after_s


@dataclass(frozen=True)
class Caller:
    """Who asks: ``label`` names it in logs and metrics (never the key itself)."""

    label: str
    anonymous: bool


def load_api_keys(path: Path) -> dict[str, str]:
    """``{key: name}`` from a key file: one ``name:key`` per line, ``#`` comments allowed.

    Raises ``ValueError`` naming the line when the file is malformed.
    """
    keys: dict[str, str] = {}
    for number, raw in enumerate(path.read_text().splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        name, sep, key = line.partition(":")
        name, key = name.strip(), key.strip()
        if not sep or not name or len(key) < 16:
            raise ValueError(
                f"{path}:{number}: expected 'name:key' with a key of at least 16 characters"
            )
        if key in keys:
            raise ValueError(f"{path}:{number}: this key is already given to {keys[key]!r}")
        keys[key] = name
    return keys


class CallerLimits:
    """Per-caller admission limits (see the module docstring)."""

    def __init__(
        self,
        *,
        api_keys: dict[str, str] | None = None,
        max_plans: int = 8,
        cpu_ms_per_s: float = 1000.0,
        cpu_burst_ms: float = 2000.0,
        anonymous_max_deadline_ms: float = 30_000.0,
        anonymous_slow_max_ms: float = 1_000.0,
        anonymous_max_weight: float = 2.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.api_keys = dict(api_keys or {})
        self.max_plans = max_plans
        self.rate_s = cpu_ms_per_s / 1000.0
        self.burst_s = cpu_burst_ms / 1000.0
        self.anonymous_max_deadline_ms = anonymous_max_deadline_ms
        self.anonymous_slow_max_ms = anonymous_slow_max_ms
        self.anonymous_max_weight = anonymous_max_weight
        self.clock = clock
        self._lock = threading.Lock()
        self._plans: dict[str, int] = {}
        self._bucket: dict[str, tuple[float, float]] = {}  # label -> (tokens_s, at)
        self.refused_total: dict[str, int] = {}

    # -- who ---------------------------------------------------------------------------------
    def identify(self, api_key: str | None, client_host: str | None) -> Caller:
        """The caller of a request; raises :class:`CallerRefused` (401) for an unknown key."""
        if api_key is not None and api_key.strip():
            key = api_key.strip()
            for known, name in self.api_keys.items():
                if hmac.compare_digest(known.encode(), key.encode()):
                    return Caller(f"key:{name}", anonymous=False)
            if not self.api_keys:
                raise CallerRefused(
                    401,
                    "api_key",
                    "this service has no API keys configured, so X-API-Key cannot be checked; "
                    "send the request without it (anonymous callers are told apart by address)",
                )
            digest = hashlib.sha256(key.encode()).hexdigest()[:8]
            raise CallerRefused(
                401,
                "api_key",
                f"unknown API key (sha256 prefix {digest}) in X-API-Key; ask the operator",
            )
        return Caller(f"anon:{client_host or 'unknown'}", anonymous=True)

    # -- what it may ask ---------------------------------------------------------------------
    def check_request(self, caller: Caller, deadline_ms: float, controller: str) -> None:
        """Caps on what an anonymous caller may ask (403 saying the cap and how to lift it)."""
        if not caller.anonymous:
            return
        if deadline_ms > self.anonymous_max_deadline_ms:
            raise CallerRefused(
                403,
                "anonymous",
                f"deadline_ms {deadline_ms:g} is above the cap for anonymous callers "
                f"({self.anonymous_max_deadline_ms:g}); send an API key in X-API-Key to ask "
                "longer deadlines",
            )
        if deadline_ms > self.anonymous_slow_max_ms and self.is_slow(controller):
            raise CallerRefused(
                403,
                "anonymous",
                f"controller {controller!r} with deadline_ms {deadline_ms:g}: anonymous callers "
                f"may run fixed weights above {self.anonymous_max_weight:g} and 'random' for at "
                f"most {self.anonymous_slow_max_ms:g} ms; use another controller, a shorter "
                "deadline, or an API key in X-API-Key",
            )

    def is_slow(self, controller: str) -> bool:
        if controller == "random":
            return True
        if controller.startswith("fixed:"):
            try:
                return float(controller.partition(":")[2]) > self.anonymous_max_weight
            except ValueError:
                return False
        return False

    # -- how much it uses --------------------------------------------------------------------
    def _tokens_locked(self, label: str, now: float) -> float:
        tokens, at = self._bucket.get(label, (self.burst_s, now))
        return min(self.burst_s, tokens + (now - at) * self.rate_s)

    def acquire(self, caller: Caller) -> None:
        """Count one more plan of ``caller`` or raise :class:`CallerRefused` (429)."""
        now = self.clock()
        with self._lock:
            running = self._plans.get(caller.label, 0)
            if running >= self.max_plans:
                self._refused(caller)
                raise CallerRefused(
                    429,
                    "caller_plans",
                    f"too many plans at once for this caller: {running} unfinished, the limit "
                    f"is {self.max_plans}; wait for one to finish",
                    retry_after_s=1,
                )
            tokens = self._tokens_locked(caller.label, now)
            if tokens <= 0.0:
                self._refused(caller)
                wait_s = -tokens / self.rate_s if self.rate_s > 0 else 60.0
                raise CallerRefused(
                    429,
                    "caller_cpu",
                    f"this caller used its search time: {self.rate_s * 1000:g} ms of search "
                    f"per second (bursts up to {self.burst_s * 1000:g} ms); it refills in "
                    f"{wait_s * 1000:.0f} ms",
                    retry_after_s=max(1, math.ceil(wait_s)),
                )
            self._plans[caller.label] = running + 1

    def release(self, caller: Caller, search_s: float) -> None:
        """A plan of ``caller`` finished after ``search_s`` seconds on a search slot."""
        now = self.clock()
        with self._lock:
            left = self._plans.get(caller.label, 0) - 1
            if left > 0:
                self._plans[caller.label] = left
            else:
                self._plans.pop(caller.label, None)
            tokens = self._tokens_locked(caller.label, now) - max(0.0, search_s)
            if tokens >= self.burst_s and left <= 0:
                self._bucket.pop(caller.label, None)  # full again: forget it
            else:
                self._bucket[caller.label] = (tokens, now)

    def _refused(self, caller: Caller) -> None:
        self.refused_total[caller.label] = self.refused_total.get(caller.label, 0) + 1

    def snapshot(self) -> dict[str, object]:
        with self._lock:
            return {
                "callers_with_plans": len(self._plans),
                "max_plans": self.max_plans,
                "cpu_ms_per_s": self.rate_s * 1000.0,
                "cpu_burst_ms": self.burst_s * 1000.0,
                "api_keys": len(self.api_keys),
                "refused_total": sum(self.refused_total.values()),
            }
