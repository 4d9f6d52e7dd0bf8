"""Load, validate and run ONNX weight policies; the ``learned`` controller.

:func:`check_policy` lists every problem of a candidate file (bytes or path) without raising;
:func:`load_policy` returns a ready :class:`Policy` or raises :class:`InvalidPolicy` with that
list. Both are pure (no global state touched) and take milliseconds for a policy of a few
kilobytes, so the service can validate and hot-swap a policy inside a request.

A :class:`Policy` owns one onnxruntime ``InferenceSession`` limited to one intra-op and one
inter-op thread (the search already keeps the cores busy). ``InferenceSession.run`` is safe to
call from several threads at once, so one loaded policy is shared by every concurrent search.
"""

from __future__ import annotations

import hashlib
import json
import math
import threading
import weakref
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.features import FEATURE_HIGH, FEATURE_LOW, FEATURE_NAMES, SCHEMA_VERSION
from dueroute.policies.export import ACTION_KINDS, INPUT_NAME, POLICY_FORMAT, REQUIRED_METADATA

#: A policy file larger than this is refused (the shipped one is a few tens of kilobytes).
MAX_POLICY_BYTES = 5_000_000

#: The policy shipped with dueroute, used by ``--controller learned`` without ``--policy``.
DEFAULT_POLICY_PATH = Path(__file__).with_name("default.onnx")

LEARNED = "learned"


class InvalidPolicy(InvalidRequest):
    """A policy file was refused; ``problems`` lists every reason (also in the message)."""

    def __init__(self, source: str, problems: list[str]) -> None:
        self.problems = list(problems)
        super().__init__(f"policy {source} refused: " + "; ".join(problems))


@dataclass(frozen=True, eq=False)
class Policy:
    """A validated policy file ready to run.

    Attributes
    ----------
    sha256 : str
        Hex digest of the file bytes (identifies the policy in responses and metrics).
    metadata : dict[str, str]
        The file's ``metadata_props`` (see :mod:`policies.export`).
    weights : tuple of float
        Search weights the actions refer to.
    action_kind : str
        ``pick`` (action i sets ``weights[i]``) or ``step`` (lower / keep / raise).
    """

    sha256: str
    size_bytes: int
    metadata: dict[str, str]
    weights: tuple[float, ...]
    action_kind: str
    action_meanings: tuple[str, ...]
    initial_weight: float
    contract_expansions: int
    decision_steps: int
    path: Path | None = None
    _session: Any = field(default=None, repr=False)

    @property
    def n_actions(self) -> int:
        return len(self.action_meanings)

    def q_values(self, features: np.ndarray) -> np.ndarray:
        """float32[B, n_actions] for ``features`` float32[B, n_features] (or one row)."""
        x = np.ascontiguousarray(features, dtype=np.float32)
        single = x.ndim == 1
        out = self._session.run(None, {INPUT_NAME: x.reshape(1, -1) if single else x})[0]
        return out[0] if single else out

    def best_action(self, features: np.ndarray) -> int:
        """The greedy action for one feature row: the search's hot path.

        Runs the same ONNX model in the same onnxruntime session as :meth:`q_values`, through
        an I/O binding made once per thread: the input and output buffers are bound by address,
        so a call copies the feature row in, runs, and reads the Q-values in place, with no
        allocation or name lookup (about a third of ``run``'s cost).
        """
        io = getattr(_BINDINGS, "by_policy", None)
        if io is None:
            # keyed by the policy itself, weakly: a new policy never gets the binding (and
            # buffers) of a freed one with the same id, and a freed policy's binding goes too
            io = _BINDINGS.by_policy = weakref.WeakKeyDictionary()
        bound = io.get(self)
        if bound is None:
            bound = io[self] = _Bound(self._session, int(features.shape[-1]), self.n_actions)
        bound.x[0, :] = features
        self._session.run_with_iobinding(bound.binding)
        q = bound.y[0]
        best = 0
        for i in range(1, q.shape[0]):
            if q[i] > q[best]:
                best = i
        return best

    def next_weight(self, action: int, current_weight: float) -> float:
        """The weight an action selects, given the weight of the step that just ran."""
        if self.action_kind == "pick":
            return self.weights[action]
        here = nearest_index(self.weights, current_weight)
        return self.weights[min(max(here + action - 1, 0), len(self.weights) - 1)]

    def info(self) -> dict[str, Any]:
        """JSON-ready description (for ``GET /v1/policy`` and ``dueroute policy check``)."""
        return {
            "path": str(self.path) if self.path is not None else None,
            "sha256": self.sha256,
            "size_bytes": self.size_bytes,
            "schema_version": int(self.metadata["schema_version"]),
            "feature_names": json.loads(self.metadata["feature_names"]),
            "weights": list(self.weights),
            "action_kind": self.action_kind,
            "action_meanings": list(self.action_meanings),
            "initial_weight": self.initial_weight,
            "contract_expansions": self.contract_expansions,
            "decision_steps": self.decision_steps,
            "graph_fingerprint": self.metadata.get("graph_fingerprint"),
            "graph_name": self.metadata.get("graph_name"),
            "created_utc": self.metadata.get("created_utc"),
            "training_regime": self.training_regime,
        }

    @property
    def training_regime(self) -> dict[str, Any] | None:
        """The ``training_regime`` metadata (``None``: a file written before it existed)."""
        raw = self.metadata.get("training_regime")
        if raw is None:
            return None
        value = json.loads(raw)  # checked by check_policy
        return value if isinstance(value, dict) else None

    def graph_warning(self, fingerprint: str, name: str = "") -> str | None:
        """A warning when the policy was trained on another graph than ``fingerprint`` (the
        graph it steers searches on); ``None`` when they match."""
        trained = self.metadata.get("graph_fingerprint", "")
        if trained == fingerprint:
            return None
        trained_name = self.metadata.get("graph_name") or "?"
        return (
            f"the policy was trained on graph {trained_name!r} (fingerprint {trained[:12]}...), "
            f"not on {name or 'this graph'!r} (fingerprint {fingerprint[:12]}...): its "
            "features are scale-free, but its decisions were learned on another road network; "
            "retrain on this graph ('dueroute train GRAPH') or expect weaker choices"
        )


def nearest_index(weights: tuple[float, ...], w: float) -> int:
    """Index of the weight closest to ``w`` (the first of ties)."""
    best = 0
    for i in range(1, len(weights)):
        if abs(weights[i] - w) < abs(weights[best] - w):
            best = i
    return best


#: Per-thread I/O bindings (an onnxruntime IOBinding is not safe to share between threads).
_BINDINGS = threading.local()


class _Bound:
    """Input and output buffers bound once to a session (see :meth:`Policy.best_action`)."""

    def __init__(self, session: Any, n_features: int, n_actions: int) -> None:
        self.x = np.zeros((1, n_features), dtype=np.float32)
        self.y = np.zeros((1, n_actions), dtype=np.float32)
        out_name = session.get_outputs()[0].name
        self.binding = session.io_binding()
        self.binding.bind_input(
            INPUT_NAME, "cpu", 0, np.float32, list(self.x.shape), self.x.ctypes.data
        )
        self.binding.bind_output(
            out_name, "cpu", 0, np.float32, list(self.y.shape), self.y.ctypes.data
        )


class LearnedController:
    """Controller backed by an ONNX policy: the greedy action of its Q-values at each step.

    Follows the ``planner.controllers.Controller`` protocol. Holds no per-search state besides
    the last action (for traces), so it is cheap to create one per search; the :class:`Policy`
    (and its onnxruntime session) is shared.
    """

    name = LEARNED
    mode = "weighted"
    uses_policy = True  #: a decision step costs an ONNX run (planner.session sizes steps by it)

    def __init__(self, policy: Policy) -> None:
        self.policy = policy
        self.last_action: int | None = None

    def reset(self, seed: int | None = None) -> float:
        self.last_action = None
        return self.policy.initial_weight

    def decide(self, features: np.ndarray, stats: Any) -> float:
        action = self.policy.best_action(features)
        self.last_action = action
        return self.policy.next_weight(action, stats.weight)


# --------------------------------------------------------------------------------------------
# Validation


def _read(source: bytes | str | Path) -> tuple[bytes | None, str, Path | None, list[str]]:
    if isinstance(source, (bytes, bytearray, memoryview)):
        return bytes(source), "upload", None, []
    path = Path(source)
    if not path.is_file():
        return None, str(path), path, [f"file not found: {path}"]
    size = path.stat().st_size
    if size > MAX_POLICY_BYTES:
        return None, str(path), path, [_too_large(size)]
    return path.read_bytes(), str(path), path, []


def _too_large(size: int) -> str:
    return (
        f"file is {size / 1e6:.1f} MB, over the {MAX_POLICY_BYTES / 1e6:.1f} MB limit for a "
        "policy (a trained dueroute policy is a few tens of kB)"
    )


def _probe_inputs(n_features: int) -> np.ndarray:
    """Feature rows a running search can produce: zeros, the range ends, and random rows."""
    rng = np.random.default_rng(0)
    if n_features == len(FEATURE_NAMES):
        low, high = FEATURE_LOW, FEATURE_HIGH
    else:
        low, high = np.zeros(n_features, np.float32), np.ones(n_features, np.float32)
    rows = [np.zeros(n_features), low, high, (low + high) / 2]
    rows += list(rng.uniform(low, high, size=(28, n_features)))
    return np.asarray(rows, dtype=np.float32)


def _dims(value_info: Any) -> list[int | str]:
    shape = value_info.type.tensor_type.shape
    return [d.dim_value if d.HasField("dim_value") else (d.dim_param or "?") for d in shape.dim]


@dataclass
class _Inspection:
    problems: list[str]
    metadata: dict[str, str] = field(default_factory=dict)
    session: Any = None
    data: bytes = b""


def _inspect(data: bytes) -> _Inspection:
    """Every check of :func:`check_policy`; also returns the session when all pass."""
    import onnx
    import onnxruntime as ort

    problems: list[str] = []
    if len(data) == 0:
        return _Inspection(
            ["file is empty (0 bytes); expected an ONNX model written by 'dueroute train'"]
        )
    if len(data) > MAX_POLICY_BYTES:
        return _Inspection([_too_large(len(data))])
    try:
        model = onnx.load_model_from_string(data)
    except Exception as exc:  # protobuf raises DecodeError and friends
        return _Inspection(
            [
                f"not an ONNX model (it does not parse as an ONNX protobuf: {exc}); the file may "
                "be truncated or of another kind"
            ]
        )
    if len(model.graph.node) == 0 or not model.opset_import:
        return _Inspection(
            [
                "not an ONNX policy: the model has no graph nodes or no opset (a truncated file, or "
                "not an ONNX model at all)"
            ]
        )
    try:
        onnx.checker.check_model(model)
    except Exception as exc:
        problems.append(f"fails the ONNX checker: {str(exc).splitlines()[0]}")

    meta = {p.key: p.value for p in model.metadata_props}
    missing = [k for k in REQUIRED_METADATA if k not in meta]
    if missing:
        problems.append(
            f"metadata lacks {', '.join(missing)} (a dueroute policy records "
            f"{', '.join(REQUIRED_METADATA)})"
        )
    if "format" in meta and meta["format"] != POLICY_FORMAT:
        problems.append(f"metadata format is {meta['format']!r}, expected {POLICY_FORMAT!r}")
    if "schema_version" in meta and meta["schema_version"] != str(SCHEMA_VERSION):
        problems.append(
            f"feature schema version {meta['schema_version']!r} does not match this build's "
            f"schema version {SCHEMA_VERSION}; retrain the policy with this version"
        )
    names = _json_list(meta, "feature_names", problems)
    if names is not None and tuple(names) != FEATURE_NAMES:
        diff = [
            f"#{i}: {a!r} vs {b!r}"
            for i, (a, b) in enumerate(zip(names, FEATURE_NAMES, strict=False))
            if a != b
        ]
        problems.append(
            f"feature names do not match schema {SCHEMA_VERSION} (file has {len(names)}, "
            f"expected {len(FEATURE_NAMES)}"
            + (f"; first differences {', '.join(diff[:3])}" if diff else "")
            + ")"
        )
    weights = _json_list(meta, "weights", problems)
    if weights is not None and not (
        weights
        and all(isinstance(w, (int, float)) and math.isfinite(w) and w >= 1.0 for w in weights)
    ):
        problems.append(f"weights must be a non-empty list of finite numbers >= 1, got {weights}")
        weights = None
    meanings = _json_list(meta, "action_meanings", problems)
    kind = meta.get("action_kind")
    if kind is not None and kind not in ACTION_KINDS:
        problems.append(f"action_kind must be one of {', '.join(ACTION_KINDS)}, got {kind!r}")
    for key in ("contract_expansions", "decision_steps"):
        if key in meta and not (meta[key].isdigit() and int(meta[key]) > 0):
            problems.append(f"{key} must be a positive integer, got {meta[key]!r}")
    if "initial_weight" in meta:
        try:
            w0 = float(meta["initial_weight"])
            if not (math.isfinite(w0) and w0 >= 1.0):
                raise ValueError
        except ValueError:
            problems.append(f"initial_weight must be a number >= 1, got {meta['initial_weight']!r}")
    if "training_config" in meta:
        try:
            json.loads(meta["training_config"])
        except ValueError:
            problems.append("training_config is not valid JSON")
    if "training_regime" in meta:
        try:
            regime = json.loads(meta["training_regime"])
        except ValueError:
            regime = None
        if not isinstance(regime, dict):
            problems.append("training_regime must be a JSON object")

    n_actions = None
    if meanings is not None:
        n_actions = len(meanings)
        if kind == "pick" and weights is not None and len(weights) != n_actions:
            problems.append(
                f"action_kind 'pick' needs one action per weight: {len(weights)} weights, "
                f"{n_actions} action meanings"
            )
        if kind == "step" and n_actions != 3:
            problems.append(f"action_kind 'step' needs 3 actions, metadata lists {n_actions}")

    inputs = [
        i for i in model.graph.input if i.name not in {t.name for t in model.graph.initializer}
    ]
    if len(inputs) != 1:
        problems.append(f"expected exactly one input ({INPUT_NAME!r}), found {len(inputs)}")
    else:
        dims = _dims(inputs[0])
        elem = inputs[0].type.tensor_type.elem_type
        if elem != onnx.TensorProto.FLOAT or len(dims) != 2 or dims[1] != len(FEATURE_NAMES):
            problems.append(
                f"input {inputs[0].name!r} is {onnx.TensorProto.DataType.Name(elem).lower()} "
                f"{dims}; expected float [batch, {len(FEATURE_NAMES)}] (one row of "
                f"{len(FEATURE_NAMES)} features per search)"
            )
    if len(model.graph.output) != 1:
        problems.append(f"expected exactly one output (Q-values), found {len(model.graph.output)}")
    else:
        dims = _dims(model.graph.output[0])
        want = n_actions if n_actions is not None else "n_actions"
        if len(dims) != 2 or (n_actions is not None and dims[1] != n_actions):
            problems.append(
                f"output {model.graph.output[0].name!r} has shape {dims}; expected "
                f"[batch, {want}] (one Q-value per action)"
            )
    if problems:
        return _Inspection(problems, meta)

    try:
        options = ort.SessionOptions()
        options.intra_op_num_threads = 1
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.log_severity_level = 3
        session = ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
    except Exception as exc:
        return _Inspection([f"onnxruntime cannot load the model: {str(exc).splitlines()[0]}"], meta)
    probes = _probe_inputs(len(FEATURE_NAMES))
    try:
        out = np.asarray(session.run(None, {session.get_inputs()[0].name: probes})[0])
    except Exception as exc:
        return _Inspection([f"running the model on probe inputs failed: {exc}"], meta)
    if out.shape != (len(probes), n_actions):
        problems.append(
            f"on a batch of {len(probes)} probe inputs the output has shape {list(out.shape)}, "
            f"expected [{len(probes)}, {n_actions}]"
        )
    elif not np.all(np.isfinite(out)):
        bad = int(np.sum(~np.all(np.isfinite(out), axis=1)))
        problems.append(
            f"non-finite Q-values (NaN or infinity) on {bad} of {len(probes)} probe inputs "
            "within the feature ranges"
        )
    return _Inspection(problems, meta, session if not problems else None, data)


def _json_list(meta: dict[str, str], key: str, problems: list[str]) -> list[Any] | None:
    if key not in meta:
        return None
    try:
        value = json.loads(meta[key])
    except ValueError:
        problems.append(f"metadata {key} is not valid JSON")
        return None
    if not isinstance(value, list):
        problems.append(f"metadata {key} must be a JSON list, got {type(value).__name__}")
        return None
    return value


def check_policy(source: bytes | str | Path) -> list[str]:
    """Every problem that makes ``source`` unusable as a policy; an empty list means usable.

    Checks, in order: the file exists and is at most :data:`MAX_POLICY_BYTES`; it is not
    empty; it parses as ONNX and passes ``onnx.checker``; its metadata has every key of
    :data:`policies.export.REQUIRED_METADATA` with the feature schema and names of this build;
    one float input ``[batch, n_features]`` and one output ``[batch, n_actions]``; onnxruntime
    loads it and returns finite Q-values on probe inputs spanning the feature ranges.
    """
    data, _, _, problems = _read(source)
    if problems or data is None:
        return problems
    return _inspect(data).problems


def load_policy(source: bytes | str | Path) -> Policy:
    """Validate and load a policy file (or uploaded bytes); raises :class:`InvalidPolicy`."""
    data, label, path, problems = _read(source)
    if problems or data is None:
        raise InvalidPolicy(label, problems)
    found = _inspect(data)
    if found.problems:
        raise InvalidPolicy(label, found.problems)
    meta = found.metadata
    weights = tuple(float(w) for w in json.loads(meta["weights"]))
    return Policy(
        sha256=hashlib.sha256(data).hexdigest(),
        size_bytes=len(data),
        metadata=meta,
        weights=weights,
        action_kind=meta["action_kind"],
        action_meanings=tuple(json.loads(meta["action_meanings"])),
        initial_weight=float(meta["initial_weight"]),
        contract_expansions=int(meta["contract_expansions"]),
        decision_steps=int(meta["decision_steps"]),
        path=path,
        _session=found.session,
    )


@lru_cache(maxsize=1)
def default_policy() -> Policy:
    """The shipped :data:`DEFAULT_POLICY_PATH`, loaded once per process."""
    return load_policy(DEFAULT_POLICY_PATH)


def resolve_controller(spec: str, policy: Policy | None = None, seed: int | None = None) -> Any:
    """A controller for ``spec``: ``learned`` (``policy`` or the shipped default) or any spec
    :func:`planner.controllers.make_controller` knows (``fixed:W``, ``random``, ``decreasing``,
    ``ana``)."""
    if spec == LEARNED:
        return LearnedController(policy if policy is not None else default_policy())
    from dueroute.planner.controllers import make_controller

    return make_controller(spec, seed=seed)
