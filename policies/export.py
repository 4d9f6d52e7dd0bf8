"""Write a trained Q-network as an ONNX policy file with its contract in the metadata.

The graph computes ``q_values = MLP((features - mean) / std)`` in ``float32``:

    features [batch, k] ─ Sub(mean) ─ Div(std) ─ Gemm ─ Relu ─ Gemm ─ Relu ─ Gemm ─ q_values [batch, a]

so the input normalisation estimated during training travels inside the file and the runtime
feeds raw feature vectors from :func:`planner.features.compute_features`.

Metadata (``metadata_props``, all values are strings; lists and objects are JSON):

=========================  ===================================================================
key                        value
=========================  ===================================================================
``format``                 :data:`POLICY_FORMAT`
``schema_version``         feature schema version the policy was trained with
``feature_names``          JSON list, the input columns in order
``weights``                JSON list of the search weights the actions refer to
``action_kind``            ``pick`` (action i selects ``weights[i]``) or ``step``
                           (0 lower / 1 keep / 2 raise, one place in ``weights``)
``action_meanings``        JSON list, one human-readable meaning per output column
``initial_weight``         weight of the first decision step, before any feature exists
``contract_expansions``    expansion budget per search used in training
``decision_steps``         decision steps per contract used in training
``training_config``        JSON object: trainer and environment settings
``graph_fingerprint``      sha256 of the training graph (``RoadGraph.fingerprint``)
``graph_name``             name of the training graph
``created_utc``            ISO 8601 time the file was written
``training_regime``        JSON object (optional; files before it lack it): the contracts the
                           policy was trained for, see :func:`training_regime`
=========================  ===================================================================
"""

from __future__ import annotations

import json
import os
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from dueroute.planner.features import FEATURE_NAMES, SCHEMA_VERSION
from dueroute.policies.dqn import QNetwork

#: Identifies a dueroute policy file (bumped if the metadata contract changes).
POLICY_FORMAT = "dueroute-policy-1"

#: ONNX operator set of the exported graph (Sub, Div, Gemm, Relu exist in every recent opset;
#: 17 is old enough for any onnxruntime >= 1.13 and new enough for the installed checker).
OPSET = 17

INPUT_NAME = "features"
OUTPUT_NAME = "q_values"

REQUIRED_METADATA = (
    "format",
    "schema_version",
    "feature_names",
    "weights",
    "action_kind",
    "action_meanings",
    "initial_weight",
    "contract_expansions",
    "decision_steps",
    "training_config",
    "graph_fingerprint",
    "created_utc",
)

ACTION_KINDS = ("pick", "step")
STEP_ACTION_MEANINGS = ("lower weight one place", "keep weight", "raise weight one place")


def action_meanings(action_kind: str, weights: tuple[float, ...]) -> tuple[str, ...]:
    """Human-readable meaning of each action (one per Q-value column)."""
    if action_kind == "pick":
        return tuple(f"set weight {w:g}" for w in weights)
    if action_kind == "step":
        return STEP_ACTION_MEANINGS
    raise ValueError(f"action_kind must be one of {ACTION_KINDS}, got {action_kind!r}")


def policy_metadata(
    *,
    weights: tuple[float, ...],
    action_kind: str,
    initial_weight: float,
    contract_expansions: int,
    decision_steps: int,
    training_config: dict[str, Any],
    graph_fingerprint: str,
    graph_name: str = "",
    created_utc: str | None = None,
    regime: dict[str, Any] | None = None,
) -> dict[str, str]:
    """The ``metadata_props`` of a policy file (see the module docstring)."""
    created = created_utc or datetime.now(UTC).replace(microsecond=0).isoformat()
    extra = {} if regime is None else {"training_regime": json.dumps(regime, sort_keys=True)}
    return extra | {
        "format": POLICY_FORMAT,
        "schema_version": str(SCHEMA_VERSION),
        "feature_names": json.dumps(list(FEATURE_NAMES)),
        "weights": json.dumps([float(w) for w in weights]),
        "action_kind": action_kind,
        "action_meanings": json.dumps(list(action_meanings(action_kind, weights))),
        "initial_weight": repr(float(initial_weight)),
        "contract_expansions": str(int(contract_expansions)),
        "decision_steps": str(int(decision_steps)),
        "training_config": json.dumps(training_config, sort_keys=True),
        "graph_fingerprint": graph_fingerprint,
        "graph_name": graph_name,
        "created_utc": created,
    }


def training_regime(
    *,
    contract: str,
    graph_fingerprint: str,
    graph_name: str,
    decision_steps_max: int,
    budget_expansions: int | None = None,
    deadline_ms: tuple[float, float] | None = None,
    searches_per_core: tuple[int, ...] = (1,),
    calibration: dict[str, Any] | None = None,
    traffic_scenarios: int = 0,
) -> dict[str, Any]:
    """The ``training_regime`` metadata: what contracts, loads and graph the policy saw.

    ``contract`` is ``budget`` (every episode ``budget_expansions``) or ``deadline`` (the
    service's deadlines, ``deadline_ms`` = (min, max) drawn log-uniformly, simulated with the
    measured ``calibration`` map at CPU shares ``1 / searches_per_core``); the feature schema
    (version and names) is this build's.
    """
    out: dict[str, Any] = {
        "contract": contract,
        "graph_fingerprint": graph_fingerprint,
        "graph_name": graph_name,
        "feature_schema": {"version": SCHEMA_VERSION, "names": list(FEATURE_NAMES)},
        "decision_steps_max": int(decision_steps_max),
        "traffic_scenarios": int(traffic_scenarios),
    }
    if contract == "budget":
        out["budget_expansions"] = int(budget_expansions or 0)
        out["searches_per_core"] = [1]
        out["cpu_shares"] = [1.0]
    else:
        assert deadline_ms is not None
        out["deadline_ms"] = [float(deadline_ms[0]), float(deadline_ms[1])]
        out["deadline_sampling"] = "log-uniform"
        out["searches_per_core"] = [int(x) for x in searches_per_core]
        out["cpu_shares"] = [round(1.0 / x, 4) for x in searches_per_core]
        out["calibration"] = calibration
    return out


def build_model(network: QNetwork, metadata: dict[str, str]) -> onnx.ModelProto:
    """ONNX model of ``network`` with normalisation baked in, ``metadata`` as metadata_props."""
    p = {k: np.asarray(v, dtype=np.float32) for k, v in network.params.items()}
    n_in, n_out = network.n_inputs, network.n_actions
    initializers = [
        numpy_helper.from_array(np.asarray(network.obs_mean, dtype=np.float32), "obs_mean"),
        numpy_helper.from_array(np.asarray(network.obs_std, dtype=np.float32), "obs_std"),
        *(numpy_helper.from_array(p[k], k) for k in ("w1", "b1", "w2", "b2", "w3", "b3")),
    ]
    nodes = [
        helper.make_node("Sub", [INPUT_NAME, "obs_mean"], ["centred"], name="centre"),
        helper.make_node("Div", ["centred", "obs_std"], ["scaled"], name="scale"),
        helper.make_node("Gemm", ["scaled", "w1", "b1"], ["z1"], name="dense1"),
        helper.make_node("Relu", ["z1"], ["h1"], name="relu1"),
        helper.make_node("Gemm", ["h1", "w2", "b2"], ["z2"], name="dense2"),
        helper.make_node("Relu", ["z2"], ["h2"], name="relu2"),
        helper.make_node("Gemm", ["h2", "w3", "b3"], [OUTPUT_NAME], name="q_head"),
    ]
    graph = helper.make_graph(
        nodes,
        "dueroute_weight_policy",
        [helper.make_tensor_value_info(INPUT_NAME, TensorProto.FLOAT, ["batch", n_in])],
        [helper.make_tensor_value_info(OUTPUT_NAME, TensorProto.FLOAT, ["batch", n_out])],
        initializer=initializers,
    )
    opset = min(OPSET, onnx.defs.onnx_opset_version())
    model = helper.make_model(
        graph,
        opset_imports=[helper.make_opsetid("", opset)],
        producer_name="dueroute",
        doc_string="Q-values of search-weight actions from metalevel search features",
    )
    model.ir_version = helper.find_min_ir_version_for([helper.make_opsetid("", opset)])
    helper.set_model_props(model, metadata)
    return model


def export_policy(network: QNetwork, metadata: dict[str, str], path: str | Path) -> bytes:
    """Check the model with the ONNX checker, then write it atomically; returns the bytes."""
    model = build_model(network, metadata)
    onnx.checker.check_model(model, full_check=True)
    data = model.SerializeToString()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_bytes(data)
    os.replace(tmp, path)
    return data
