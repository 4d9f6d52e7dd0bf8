"""ONNX export, the onnxruntime-backed controller and policy-file validation."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
import pytest

from dueroute.planner.features import FEATURE_HIGH, FEATURE_LOW, FEATURE_NAMES, SCHEMA_VERSION
from dueroute.policies.dqn import QNetwork, init_params
from dueroute.policies.export import build_model, export_policy, policy_metadata
from dueroute.policies.runtime import (
    MAX_POLICY_BYTES,
    InvalidPolicy,
    LearnedController,
    check_policy,
    load_policy,
)

WEIGHTS = (1.0, 1.5, 2.0, 3.0, 4.0, 5.0)


def random_network(n_in: int = len(FEATURE_NAMES), n_out: int = 6, seed: int = 0) -> QNetwork:
    rng = np.random.default_rng(seed)
    return QNetwork(
        init_params(rng, n_in, 16, n_out),
        rng.uniform(0.0, 1.0, n_in),
        rng.uniform(0.5, 2.0, n_in),
    )


def metadata(**overrides) -> dict[str, str]:
    meta = policy_metadata(
        weights=WEIGHTS,
        action_kind="pick",
        initial_weight=2.0,
        contract_expansions=5000,
        decision_steps=10,
        training_config={"episodes": 1},
        graph_fingerprint="0" * 64,
        graph_name="test",
    )
    meta.update(overrides)
    return meta


def model_bytes(network: QNetwork | None = None, meta: dict[str, str] | None = None) -> bytes:
    return build_model(network or random_network(), meta or metadata()).SerializeToString()


@pytest.fixture()
def policy_file(tmp_path: Path) -> Path:
    path = tmp_path / "p.onnx"
    export_policy(random_network(), metadata(), path)
    return path


def test_exported_model_passes_onnx_checker(policy_file: Path):
    """The exported file passes the ONNX reference checker (onnx.checker, full check with shape
    inference) and records the schema, features, weights and contract in metadata_props."""
    model = onnx.load(str(policy_file))
    onnx.checker.check_model(model, full_check=True)
    meta = {p.key: p.value for p in model.metadata_props}
    assert meta["schema_version"] == str(SCHEMA_VERSION)
    assert json.loads(meta["feature_names"]) == list(FEATURE_NAMES)
    assert json.loads(meta["weights"]) == list(WEIGHTS)
    assert meta["contract_expansions"] == "5000"
    assert len(json.loads(meta["action_meanings"])) == 6


def test_onnxruntime_matches_numpy_network(policy_file: Path):
    """onnxruntime (an independent ONNX implementation) computes the same Q-values as the numpy
    network, normalisation included, within 1e-5."""
    network = random_network()
    policy = load_policy(policy_file)
    rng = np.random.default_rng(1)
    x = rng.uniform(FEATURE_LOW, FEATURE_HIGH, size=(64, len(FEATURE_NAMES))).astype(np.float32)
    np.testing.assert_allclose(policy.q_values(x), network.q_values(x), atol=1e-5, rtol=1e-5)
    np.testing.assert_allclose(policy.q_values(x[0]), network.q_values(x[0]), atol=1e-5)
    assert check_policy(policy_file) == []
    assert check_policy(policy_file.read_bytes()) == []


def test_learned_controller_picks_greedy_weight(policy_file: Path):
    policy = load_policy(policy_file)
    ctrl = LearnedController(policy)
    assert ctrl.reset(0) == 2.0
    x = np.full(len(FEATURE_NAMES), 0.5, dtype=np.float32)

    class Stats:
        weight = 2.0

    w = ctrl.decide(x, Stats())
    assert w == WEIGHTS[int(np.argmax(random_network().q_values(x)))]


def test_step_actions_move_one_place(tmp_path: Path):
    meta = metadata(
        action_kind="step",
        action_meanings=json.dumps(["lower", "keep", "raise"]),
    )
    path = tmp_path / "s.onnx"
    export_policy(random_network(n_out=3), meta, path)
    policy = load_policy(path)
    assert policy.next_weight(0, 2.0) == 1.5
    assert policy.next_weight(1, 2.0) == 2.0
    assert policy.next_weight(2, 5.0) == 5.0
    assert policy.next_weight(0, 1.0) == 1.0


BAD_CASES = {
    "empty": (lambda good: b"", "file is empty"),
    "not onnx": (lambda good: b"hello, this is not a model" * 10, "not an ONNX"),
    "truncated": (lambda good: good[: len(good) // 2], "not an ONNX"),
    "too large": (lambda good: b"\0" * (MAX_POLICY_BYTES + 1), "over the 5.0 MB limit"),
    "wrong input shape": (
        lambda good: model_bytes(random_network(n_in=len(FEATURE_NAMES) - 1)),
        f"expected float [batch, {len(FEATURE_NAMES)}]",
    ),
    "wrong output shape": (
        lambda good: model_bytes(random_network(n_out=4)),
        "expected [batch, 6]",
    ),
    "schema mismatch": (
        lambda good: model_bytes(meta=metadata(schema_version=str(SCHEMA_VERSION + 1))),
        "does not match this build's schema version",
    ),
    "feature names mismatch": (
        lambda good: model_bytes(
            meta=metadata(feature_names=json.dumps(["x"] + list(FEATURE_NAMES[1:])))
        ),
        "feature names do not match",
    ),
    "missing metadata": (
        lambda good: model_bytes(
            meta={k: v for k, v in metadata().items() if k != "contract_expansions"}
        ),
        "metadata lacks contract_expansions",
    ),
    "non-finite outputs": (lambda good: model_bytes(_nan_network()), "non-finite Q-values"),
}


def _nan_network() -> QNetwork:
    net = random_network()
    net.params["b3"][2] = np.nan
    return net


@pytest.mark.parametrize("case", sorted(BAD_CASES))
def test_check_policy_refuses_each_bad_kind(case: str, policy_file: Path, tmp_path: Path):
    make, message = BAD_CASES[case]
    data = make(policy_file.read_bytes())
    problems = check_policy(data)
    assert problems, case
    assert any(message in p for p in problems), problems
    path = tmp_path / "bad.onnx"
    path.write_bytes(data)
    assert any(message in p for p in check_policy(path))
    with pytest.raises(InvalidPolicy, match="refused"):
        load_policy(path)


def test_missing_file_is_reported(tmp_path: Path):
    assert check_policy(tmp_path / "nope.onnx") == [f"file not found: {tmp_path / 'nope.onnx'}"]


def test_shipped_default_policy_is_valid_for_this_build():
    """policies/default.onnx passes every check (ONNX checker, schema, probes); it must be
    retrained whenever the feature schema changes."""
    from dueroute.policies.runtime import DEFAULT_POLICY_PATH, default_policy

    assert check_policy(DEFAULT_POLICY_PATH) == []
    policy = default_policy()
    assert policy.weights == WEIGHTS
    config = json.loads(policy.metadata["training_config"])
    regime = policy.training_regime
    assert regime is not None and regime["contract"] == config["env"]["regime"]
    if regime["contract"] == "budget":
        assert config["env"]["budget_expansions"] == policy.contract_expansions
    else:  # the representative budget: the map at the deadline range's geometric mean
        from dueroute.policies.calibrate import Calibration

        lo, hi = regime["deadline_ms"]
        cal = Calibration.from_dict(regime["calibration"])
        assert cal.expansions_at((lo * hi) ** 0.5) == policy.contract_expansions
    assert regime["graph_fingerprint"] == policy.metadata["graph_fingerprint"]
    assert DEFAULT_POLICY_PATH.with_suffix(".md").is_file()


def test_resolve_controller():
    from dueroute.planner.errors import InvalidRequest
    from dueroute.policies.runtime import default_policy, resolve_controller

    learned = resolve_controller("learned")
    assert isinstance(learned, LearnedController) and learned.policy is default_policy()
    assert resolve_controller("fixed:2").reset(None) == 2.0
    assert resolve_controller("random", seed=3).name == "random"
    with pytest.raises(InvalidRequest):
        resolve_controller("fastest")
