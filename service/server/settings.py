"""Service settings from ``DUEROUTE_*`` environment variables (and ``dueroute serve`` flags).

Nothing here is built at import time: :func:`get_settings` builds and caches the settings on
first use, and :func:`service.app.create_app` calls it while starting, so a bad value stops the
service at start-up with a message naming the variable — never mid-request.
"""

from __future__ import annotations

import os
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Literal

from pydantic import Field, SecretStr, field_validator, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from dueroute.planner import limits

if TYPE_CHECKING:
    from dueroute.planner.turns import TurnProfile


def _default_policy_dir() -> Path:
    """``$XDG_STATE_HOME/dueroute/policies`` (``~/.local/state/...``): state, not cache."""
    base = os.environ.get("XDG_STATE_HOME") or str(Path.home() / ".local" / "state")
    return Path(base) / "dueroute" / "policies"


def _default_workers() -> int:
    return max(1, os.cpu_count() or 1)


class Settings(BaseSettings):
    """Every setting of the HTTP service; each is also the env var ``DUEROUTE_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="DUEROUTE_", extra="ignore", frozen=True)

    graph: str = Field(
        default="demo", description="compiled graph (.npz) or the word 'demo' for the demo region"
    )
    policy: Path | None = Field(
        default=None,
        description="ONNX policy file to activate at start-up; unset: the policy directory's "
        "active policy, else the shipped default policy, else none",
    )
    shipped_policy: bool = Field(
        default=True,
        description="with no --policy and nothing persisted, activate the policy shipped with "
        "dueroute (policies/default.onnx); false: 'learned' uses the fallback controller",
    )
    policy_dir: Path = Field(
        default_factory=_default_policy_dir,
        description="directory where uploaded policies and the active-policy pointer persist",
    )
    traffic_dir: Path | None = Field(
        default=None,
        description="directory of the live-traffic journal (accepted POST /v1/traffic "
        "batches; replicas sharing it converge); unset: 'traffic' beside the policy directory",
    )
    traffic_poll_s: float = Field(
        default=0.2,
        gt=0,
        le=10,
        description="how often the traffic journal is checked for batches other replicas wrote",
    )
    max_traffic_bytes: int = Field(
        default=8_000_000, ge=1024, description="largest POST /v1/traffic body in bytes (413 above)"
    )
    on_damaged_policy: Literal["previous", "refuse"] = Field(
        default="previous",
        description="when the stored active policy fails its sha256 or validity check at "
        "start-up: 'previous' starts with the newest good policy of its history and reports "
        "the damage on /v1/policy, /readyz and a metric; 'refuse' stops the start with a "
        "message naming the file",
    )
    uturns: Literal["forbid_at_junctions", "allow"] = Field(
        default="forbid_at_junctions",
        description="U-turns at junctions (three or more neighbours); dead ends always allow them",
    )
    turn_costs: str | None = Field(
        default=None,
        description="seconds added per turn, e.g. 'left=8,right=3,uturn=30' (any of the three); "
        "unset: none. Each profile has its own landmarks beside the graph",
    )
    admin_token: SecretStr | None = Field(
        default=None,
        description="bearer token for PUT /v1/policy, rollback and POST/DELETE /v1/traffic; "
        "unset disables them (404)",
    )
    host: str = Field(default="127.0.0.1", description="address to listen on")
    port: int = Field(default=8000, ge=0, le=65535, description="TCP port (0 picks a free one)")
    workers: int = Field(
        default_factory=_default_workers,
        ge=1,
        le=256,
        description="searches that run at once, each in its own thread",
    )
    deadline_tolerance_ms: float = Field(
        default=5.0,
        gt=0,
        le=1000,
        description="an accepted request is answered by arrival + deadline_ms + this",
    )
    response_headroom_ms: float = Field(
        default=1.0,
        ge=0,
        le=1000,
        description="what the service assumes it needs after a search (build and send the "
        "answer) until it has measured it; from then on the search stops the measured 95th "
        "percentile before the deadline",
    )
    min_search_ms: float = Field(
        default=5.0,
        ge=0,
        description="a plan that could not search at least this long (or half its deadline, "
        "if shorter) gets only the instant route, or 503 when that lane is full too",
    )
    max_in_flight: int | None = Field(
        default=None,
        ge=1,
        le=4096,
        description="admitted plans not yet finished (running, preempted or waiting), each on "
        "a thread of its own; unset: 16 per worker. Above it requests get 503",
    )
    header_timeout_s: float = Field(
        default=5.0,
        gt=0,
        le=600,
        description="a connection must send a request's headers within this long (408 and "
        "closed otherwise)",
    )
    body_timeout_s: float = Field(
        default=10.0,
        gt=0,
        le=600,
        description="a request's body must arrive within this long after its headers (408)",
    )
    max_connections: int = Field(
        default=1000,
        ge=8,
        le=1_000_000,
        description="open connections the service keeps; a new one above it gets 503 and is "
        "closed (keep it below the process's descriptor limit)",
    )
    api_keys_file: Path | None = Field(
        default=None,
        description="file of API keys, one 'name:key' per line: a request sending one in "
        "X-API-Key is that caller; without a key a caller is its client address (anonymous)",
    )
    caller_max_plans: int = Field(
        default=8,
        ge=1,
        description="unfinished plans (waited or background) one caller may have at once (429)",
    )
    caller_cpu_ms_per_s: float | None = Field(
        default=None,
        gt=0,
        description="search time one caller may use per second, in ms (a token bucket); "
        "unset: 1000 per worker, i.e. the whole machine when no one else asks",
    )
    caller_cpu_burst_ms: float = Field(
        default=4000.0,
        gt=0,
        description="the bucket's size: search time a caller may use at once after a pause",
    )
    anonymous_max_deadline_ms: int = Field(
        default=30_000,
        ge=1,
        description="largest deadline_ms a caller without an API key may ask (403 above)",
    )
    anonymous_slow_max_ms: int = Field(
        default=1_000,
        ge=1,
        description="largest deadline_ms a caller without an API key may ask with a slow "
        "controller (fixed weights above anonymous_max_weight, and random)",
    )
    anonymous_max_weight: float = Field(
        default=2.0,
        ge=1.0,
        description="fixed weights above this count as slow controllers for anonymous callers",
    )
    worker_nice: int = Field(
        default=10,
        ge=0,
        le=19,
        description="niceness of the search threads, so the thread answering requests gets "
        "a core first when every core is busy (Linux; 0 disables)",
    )
    max_deadline_ms: int = Field(
        default=int(limits.MAX_DEADLINE_MS),
        ge=1,
        le=int(limits.MAX_DEADLINE_MS),
        description="largest deadline_ms a request may ask",
    )
    max_body_bytes: int = Field(
        default=16_384, ge=256, description="largest request body (413 above)"
    )
    max_policy_bytes: int = Field(
        default=5_000_000,  # the limit of policies.runtime.MAX_POLICY_BYTES
        ge=1024,
        description="largest policy upload in bytes (413 above)",
    )
    snap_max_m: float = Field(
        default=limits.DEFAULT_SNAP_MAX_M,
        gt=0,
        description="a point farther than this from every road node is refused",
    )
    landmarks: bool = Field(
        default=True,
        description="use ALT landmarks (built beside the graph on first use); false: the "
        "great-circle bound alone",
    )
    steps: int = Field(
        default=limits.DEFAULT_STEPS, ge=1, le=1000, description="decision steps per search"
    )
    background_max: int = Field(
        default=10_000,
        ge=1,
        description="plans the plan store holds at once (background plans and wait=true "
        "plans with keep=true, running or finished); when full, new ones get 503",
    )
    background_max_bytes: int = Field(
        default=256 * 1024 * 1024,
        ge=1024 * 1024,
        description="bound on the plan store's byte estimate of what its plans hold; when "
        "reached, new stored plans get 503",
    )
    background_ttl_s: float = Field(
        default=300.0,
        gt=0,
        description="a stored plan is kept this long after it finished (never dropped earlier)",
    )
    improvements_listed: int = Field(
        default=20,
        ge=0,
        le=1000,
        description="how many of the last improvements a plan lists (full_trace=true: all, "
        "up to 10000); the count of earlier ones is in improvements_dropped",
    )
    warmup_searches: int = Field(
        default=3,
        ge=0,
        description="searches run at start-up (JIT compile) before /readyz is ready",
    )
    log_level: str = Field(default="info", description="debug, info, warning or error")
    log_json: bool = Field(default=True, description="structured JSON log lines on stderr")

    @field_validator("log_level")
    @classmethod
    def _level(cls, v: str) -> str:
        allowed = ("debug", "info", "warning", "error")
        if v.lower() not in allowed:
            raise ValueError(f"log_level must be one of {', '.join(allowed)}, got {v!r}")
        return v.lower()

    @field_validator("admin_token")
    @classmethod
    def _token(cls, v: SecretStr | None) -> SecretStr | None:
        if v is not None and v.get_secret_value() == "":
            return None  # an empty variable means "not configured"
        if v is not None and len(v.get_secret_value()) < 8:
            raise ValueError("admin_token must be at least 8 characters (or unset)")
        return v

    @field_validator("turn_costs")
    @classmethod
    def _turn_costs(cls, v: str | None) -> str | None:
        from dueroute.planner.errors import InvalidRequest
        from dueroute.planner.turns import parse_turn_costs

        if v is None or not v.strip():
            return None
        try:
            parse_turn_costs(v)
        except InvalidRequest as exc:
            raise ValueError(str(exc)) from None
        return v

    @property
    def turn_profile(self) -> TurnProfile:
        """The ``planner.turns.TurnProfile`` of ``uturns`` and ``turn_costs``."""
        from dueroute.planner.turns import TurnProfile, parse_turn_costs

        return TurnProfile(uturns=self.uturns, costs=parse_turn_costs(self.turn_costs))

    @property
    def traffic_state_dir(self) -> Path:
        """``traffic_dir``, or ``traffic`` beside the policy directory (same state directory)."""
        return (
            self.traffic_dir if self.traffic_dir is not None else self.policy_dir.parent / "traffic"
        )

    @model_validator(mode="after")
    def _consistent(self) -> Settings:
        if self.response_headroom_ms + self.min_search_ms >= self.max_deadline_ms:
            raise ValueError(
                "response_headroom_ms + min_search_ms must be below max_deadline_ms "
                f"({self.response_headroom_ms} + {self.min_search_ms} >= {self.max_deadline_ms})"
            )
        return self


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    """The settings from the environment, built once (raises ``ValidationError`` on bad values)."""
    return Settings()
