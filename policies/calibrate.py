"""The deadline-to-expansions map of this machine: how training simulates wall-clock deadlines.

The service runs searches under wall-clock deadlines (1-50 ms) with a CPU share that depends
on the load; training must stay reproducible, so it counts expansions instead. A
:class:`Calibration` says how many expansions a search makes by a deadline on the machine it
was measured on, and what one decision of a learned policy costs there:

* ``expansions[i]``: the median expansions of a plain-A* search (``fixed:1``, one step, the
  instant route and opening included) stopped by the deadline ``deadlines_ms[i]``, over the
  calibration queries that the deadline stopped (a query solved earlier says nothing about
  capacity);
* ``expansion_rate_per_ms``: the median kernel rate (expansions per ms of kernel time) over
  every calibration search, used beyond the last measured deadline and for a deadline that
  stopped fewer than 5 searches (``rate * deadline``);
* ``decision_us``: the median cost of one decision (stats, features, an ONNX policy of the
  shipped shape) between real deadline steps, as ``planner.session.plan`` times control and
  the service's ``DecisionCost`` learns it (far above the same call in a tight loop: after a
  kernel step of milliseconds the policy's memory is out of the caches).

A search with CPU share ``s`` (``L`` searches per core: ``s = 1 / L``) that spends ``k``
decisions gets, by a deadline ``d``, the expansions of an uncontended search by
``s * d - k * decision_us`` (:meth:`Calibration.expansions_at`): the kernel runs at the CPU it
is given, and a decision takes its CPU time out of the search's. The number of decisions is
what the service gives a policy (:meth:`Calibration.steps_at`, the rule of
``planner.session.steps_for_deadline`` at the decision's wall-clock cost ``decision_us / s``).

The map is stored in a trained policy's metadata (``training_regime``), so a policy says for
which machine speed its training simulated the deadlines.
"""

from __future__ import annotations

import json
import math
import os
import platform
import time
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.session import Planner, plan, steps_for_deadline

#: Deadlines measured by default (ms): the service's usual range.
CALIBRATION_DEADLINES_MS: tuple[float, ...] = (1.0, 2.0, 5.0, 10.0, 20.0, 50.0)


@dataclass(frozen=True)
class Calibration:
    """A measured deadline-to-expansions map (see the module docstring)."""

    deadlines_ms: tuple[float, ...]
    expansions: tuple[float, ...]
    expansion_rate_per_ms: float
    decision_us: float
    queries: int = 0
    seed: int = 0
    graph_fingerprint: str = ""
    graph_name: str = ""
    machine: str = ""
    measured_utc: str = ""

    def __post_init__(self) -> None:
        problems = []
        d, e = self.deadlines_ms, self.expansions
        if len(d) == 0 or len(d) != len(e):
            problems.append(
                f"deadlines_ms and expansions need the same non-zero length, got {len(d)} "
                f"and {len(e)}"
            )
        elif any(not (math.isfinite(x) and x > 0) for x in d) or list(d) != sorted(set(d)):
            problems.append(f"deadlines_ms must be increasing positive numbers, got {list(d)}")
        elif any(not (math.isfinite(x) and x >= 0) for x in e) or list(e) != sorted(e):
            problems.append(f"expansions must be non-decreasing numbers >= 0, got {list(e)}")
        if not (math.isfinite(self.expansion_rate_per_ms) and self.expansion_rate_per_ms > 0):
            problems.append(f"expansion_rate_per_ms must be > 0, got {self.expansion_rate_per_ms}")
        if not (math.isfinite(self.decision_us) and self.decision_us > 0):
            problems.append(f"decision_us must be > 0, got {self.decision_us}")
        if problems:
            raise ValueError("invalid calibration: " + "; ".join(problems))

    def expansions_at(self, deadline_ms: float, cpu_share: float = 1.0, decisions: int = 0) -> int:
        """Expansions a search makes by ``deadline_ms`` at ``cpu_share`` after ``decisions``
        decisions (at least 1): the map at the effective uncontended time
        ``cpu_share * deadline_ms - decisions * decision_us / 1000``, linear through (0, 0)
        and the measured points, extended at the kernel rate past the last point."""
        t = cpu_share * deadline_ms - decisions * self.decision_us / 1000.0
        if t <= 0:
            return 1
        d = np.asarray((0.0, *self.deadlines_ms))
        e = np.asarray((0.0, *self.expansions))
        if t <= d[-1]:
            return max(1, int(round(float(np.interp(t, d, e)))))
        return max(1, int(round(e[-1] + self.expansion_rate_per_ms * (t - d[-1]))))

    def steps_at(self, deadline_ms: float, cpu_share: float = 1.0, max_steps: int = 20) -> int:
        """Decision steps the service gives a policy at this deadline and CPU share: at most
        ``max_steps``, control at most ``planner.session.CONTROL_SHARE`` of the deadline at
        the decision's wall-clock cost ``decision_us / cpu_share``."""
        return steps_for_deadline(deadline_ms, max_steps, self.decision_us / max(cpu_share, 1e-3))

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["deadlines_ms"] = list(self.deadlines_ms)
        out["expansions"] = list(self.expansions)
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Calibration:
        """The inverse of :meth:`to_dict`; raises ``ValueError`` saying what is wrong."""
        if not isinstance(data, dict):
            raise ValueError(f"a calibration is a JSON object, got {type(data).__name__}")
        need = ("deadlines_ms", "expansions", "expansion_rate_per_ms", "decision_us")
        missing = [k for k in need if k not in data]
        if missing:
            raise ValueError(f"calibration lacks {', '.join(missing)} (needs {', '.join(need)})")
        known = set(cls.__dataclass_fields__)
        try:
            values = {k: v for k, v in data.items() if k in known}
            values["deadlines_ms"] = tuple(float(x) for x in data["deadlines_ms"])
            values["expansions"] = tuple(float(x) for x in data["expansions"])
            values["expansion_rate_per_ms"] = float(data["expansion_rate_per_ms"])
            values["decision_us"] = float(data["decision_us"])
        except (TypeError, ValueError) as exc:
            raise ValueError(f"calibration numbers do not parse: {exc}") from None
        return cls(**values)

    def save(self, path: str | Path) -> Path:
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(self.to_dict(), indent=2) + "\n")
        return path


def load_calibration(path: str | Path) -> Calibration:
    """Read a calibration JSON file (``dueroute bench calibrate --out``); ``ValueError`` with
    the reason when it is missing or malformed."""
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"calibration file not found: {path}")
    try:
        data = json.loads(path.read_text())
    except ValueError as exc:
        raise ValueError(f"calibration file {path} is not valid JSON: {exc}") from None
    return Calibration.from_dict(data)


def machine_description() -> str:
    """CPU model and core count (for the record, not for any decision)."""
    model = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return f"{model}, {os.cpu_count()} logical cores"


def _probe_policy(n_actions: int = 3) -> Any:
    """A policy of the shipped shape with random weights (its cost is what is measured)."""
    from dueroute.planner.features import N_FEATURES
    from dueroute.policies.dqn import QNetwork, init_params
    from dueroute.policies.export import build_model, policy_metadata
    from dueroute.policies.runtime import load_policy

    rng = np.random.default_rng(0)
    net = QNetwork(
        init_params(rng, N_FEATURES, 64, n_actions),
        np.zeros(N_FEATURES, np.float32),
        np.ones(N_FEATURES, np.float32),
    )
    meta = policy_metadata(
        weights=(1.0, 1.5, 2.0, 3.0, 4.0, 5.0),
        action_kind="step",
        initial_weight=1.0,
        contract_expansions=1,
        decision_steps=20,
        training_config={},
        graph_fingerprint="calibration-probe",
    )
    return load_policy(build_model(net, meta).SerializeToString())


class _FixedSteps:
    """A learned controller that plan() does not size steps for (it keeps ``steps``): the
    probe must decide even when the process's decision-cost estimate would allow none."""

    def __init__(self, inner: Any) -> None:
        self.inner, self.name, self.mode = inner, inner.name, inner.mode

    def reset(self, seed: int | None) -> float:
        return float(self.inner.reset(seed))

    def decide(self, features: np.ndarray, stats: Any) -> float:
        return float(self.inner.decide(features, stats))


def measure_calibration(
    planner: Planner,
    queries: np.ndarray,
    deadlines_ms: tuple[float, ...] = CALIBRATION_DEADLINES_MS,
    *,
    seed: int = 0,
    decision_deadlines_ms: tuple[float, ...] = (20.0, 50.0),
    decision_steps: int = 8,
    progress: bool = False,
) -> Calibration:
    """Measure the map on ``planner``'s graph with the given queries (int64[n, 2]).

    Every query is searched at every deadline with ``fixed:1`` (one step), the deadlines in a
    shuffled order per query (against drift); then each query once more at each of
    ``decision_deadlines_ms`` in ``decision_steps`` steps with a random policy of the shipped
    shape, timing its decisions as ``plan()`` does (``PlanResult.control_ms`` / decisions,
    median over the searches that decided: ``decision_us``). Run it on a quiet machine
    (``flock /tmp/dueroute-timing.lock``): it measures wall-clock speed.
    """
    from tqdm import tqdm

    from dueroute.policies.runtime import LearnedController

    queries = np.asarray(queries, dtype=np.int64).reshape(-1, 2)
    if queries.shape[0] == 0:
        raise ValueError("calibration needs at least one query")
    deadlines = tuple(sorted({float(d) for d in deadlines_ms}))
    rng = np.random.default_rng(seed)
    planner.warm_up()
    # one untimed search per deadline first: compiled code and caches as in a running service
    o, d = (int(x) for x in queries[0])
    for dl in deadlines:
        plan(planner, o, d, deadline_ms=dl, controller="fixed:1")
    stopped: dict[float, list[int]] = {dl: [] for dl in deadlines}
    rates: list[float] = []
    bar = tqdm(
        total=queries.shape[0] * (len(deadlines) + 1),
        desc="calibrating",
        disable=not progress,
        mininterval=0.5,
    )
    for o, d in queries:
        for dl in rng.permutation(np.asarray(deadlines)):
            res = plan(planner, int(o), int(d), deadline_ms=float(dl), controller="fixed:1")
            if res.stopped_by == "deadline":
                stopped[float(dl)].append(res.expansions)
            if res.kernel_ms > 0 and res.expansions > 0:
                rates.append(res.expansions / res.kernel_ms)
            bar.update(1)
    policy = _probe_policy()
    per_decision: list[float] = []
    for o, d in queries:
        # timed as plan() times control (and as the service's DecisionCost learns it):
        # between deadline steps, with the search's memory in the caches
        for dl in decision_deadlines_ms:
            res = plan(
                planner,
                int(o),
                int(d),
                deadline_ms=dl,
                steps=decision_steps,
                controller=_FixedSteps(LearnedController(policy)),
            )
            decisions = len(res.weights) - 1
            if decisions > 0 and res.control_ms > 0:
                per_decision.append(res.control_ms * 1000.0 / decisions)
        bar.update(1)
    bar.close()
    if not rates:
        raise ValueError(
            "no calibration search expanded a node (every query was solved at its start); "
            "use a graph with longer queries"
        )
    rate = float(np.median(rates))
    expansions = []
    for dl in deadlines:
        runs = stopped[dl]
        # fewer than 5 stopped searches: the kernel rate says more than a handful of samples
        expansions.append(float(np.median(runs)) if len(runs) >= 5 else rate * dl)
    expansions = list(np.maximum.accumulate(np.asarray(expansions)))
    graph = planner.graph
    return Calibration(
        deadlines_ms=deadlines,
        expansions=tuple(float(x) for x in expansions),
        expansion_rate_per_ms=rate,
        decision_us=float(np.median(per_decision)) if per_decision else 30.0,
        queries=int(queries.shape[0]),
        seed=int(seed),
        graph_fingerprint=graph.fingerprint,
        graph_name=str(graph.name),
        machine=machine_description(),
        measured_utc=datetime.now(UTC).replace(microsecond=0).isoformat(),
    )


def calibration_summary(cal: Calibration) -> dict[str, Any]:
    """JSON-ready view with the derived numbers the trainer uses, per deadline and load."""
    rows = []
    for dl in cal.deadlines_ms:
        row: dict[str, Any] = {"deadline_ms": dl}
        for per_core in (1, 2, 4):
            share = 1.0 / per_core
            steps = cal.steps_at(dl, share)
            row[f"steps_{per_core}_per_core"] = steps
            row[f"expansions_{per_core}_per_core"] = cal.expansions_at(dl, share, steps - 1)
        rows.append(row)
    return {"calibration": cal.to_dict(), "derived": rows, "measured_at": time.time()}
