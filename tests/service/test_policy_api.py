"""Policy hot swap over HTTP: validation, tokens, dry run, rollback, persistence, swaps under load.

Bad files are built here independently of ``policies/``'s own tests and must be refused with
the reason; the ONNX ones are made with the ``onnx`` package's helpers and checked with its
checker (``onnx.checker``, the open ONNX standard's reference validator) where that matters.
"""

from __future__ import annotations

import hashlib
import json
import threading
import time
from pathlib import Path

import numpy as np
import onnx
import pytest

from dueroute.planner.features import FEATURE_NAMES, N_FEATURES, SCHEMA_VERSION
from tests.service.conftest import ADMIN_TOKEN, policy_bytes, policy_meta, policy_network

AUTH = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
OCTET = {"content-type": "application/octet-stream"}


def _nan_policy() -> bytes:
    net = policy_network()
    net.params["b3"][0] = np.nan
    return policy_bytes(net)


BAD_FILES = {
    "empty": lambda good: b"",
    "not onnx": lambda good: b"GIF89a this is a picture, not a model" * 4,
    "truncated": lambda good: good[: len(good) // 2],
    "wrong input size": lambda good: policy_bytes(policy_network(n_in=N_FEATURES + 2)),
    "wrong output size": lambda good: policy_bytes(policy_network(n_out=4)),
    "schema mismatch": lambda good: policy_bytes(
        meta=policy_meta(schema_version=str(SCHEMA_VERSION + 1))
    ),
    "feature names mismatch": lambda good: policy_bytes(
        meta=policy_meta(feature_names=json.dumps(list(reversed(FEATURE_NAMES))))
    ),
    "NaN outputs": lambda good: _nan_policy(),
    "missing metadata": lambda good: policy_bytes(
        meta={k: v for k, v in policy_meta().items() if k != "weights"}
    ),
}


@pytest.fixture()
def admin(make_client, tiny_graph_path):
    return make_client(tiny_graph_path, admin_token=ADMIN_TOKEN, max_policy_bytes=32_000)


def test_good_policy_swaps_and_is_used(admin):
    good = policy_bytes()
    onnx.checker.check_model(onnx.load_from_string(good), full_check=True)
    r = admin.put("/v1/policy", content=good, headers={**AUTH, **OCTET})
    assert r.status_code == 200, r.text
    sha = hashlib.sha256(good).hexdigest()
    info = r.json()
    assert info["sha256"] == sha and info["schema_version"] == SCHEMA_VERSION
    assert info["feature_names"] == list(FEATURE_NAMES) and info["weights"][0] == 1.0
    assert info["trained_on"]["graph_name"] == "test"
    assert admin.get("/v1/policy").json()["sha256"] == sha
    plan = admin.post(
        "/v1/plans",
        json={
            "origin": {"node": 0},
            "destination": {"node": 3},
            "deadline_ms": 100,
            "controller": "learned",
        },
    ).json()
    assert plan["controller"] == "learned" and plan["policy_sha256"] == sha
    assert f'sha256="{sha}"' in admin.get("/metrics").text


@pytest.mark.parametrize("kind", sorted(BAD_FILES))
def test_bad_policy_files_are_refused_and_the_old_one_stays(admin, kind):
    good = policy_bytes()
    assert admin.put("/v1/policy", content=good, headers={**AUTH, **OCTET}).status_code == 200
    bad = BAD_FILES[kind](good)
    r = admin.put("/v1/policy", content=bad, headers={**AUTH, **OCTET})
    assert r.status_code == 400, (kind, r.text)
    body = r.json()
    assert body["problems"] and "active policy is unchanged" in body["detail"]
    assert admin.get("/v1/policy").json()["sha256"] == hashlib.sha256(good).hexdigest()
    # a dry run of the same file gives the same refusal
    r = admin.put("/v1/policy?dry_run=true", content=bad, headers={**AUTH, **OCTET})
    assert r.status_code == 400 and r.json()["problems"] == body["problems"]


def test_over_the_body_limit_is_413_and_nothing_changes(admin):
    before = admin.get("/v1/policy").json()["sha256"]
    r = admin.put("/v1/policy", content=b"\0" * 40_000, headers={**AUTH, **OCTET})
    assert r.status_code == 413 and "32000 bytes" in r.json()["detail"]
    assert admin.get("/v1/policy").json()["sha256"] == before


def test_store_refuses_an_oversized_file_before_parsing_it(tmp_path: Path):
    from dueroute.service.server.policy_store import PolicyRejected, PolicyStore

    store = PolicyStore(tmp_path / "p", max_bytes=2_000)
    store.startup(None, None)
    with pytest.raises(PolicyRejected, match="the limit is 2000 bytes"):
        store.swap(policy_bytes() + b"\0" * 5_000)
    assert store.active.sha256 is None


def test_dry_run_does_not_activate(admin):
    r = admin.put("/v1/policy?dry_run=true", content=policy_bytes(), headers={**AUTH, **OCTET})
    assert r.status_code == 200 and r.json()["dry_run"] is True and r.json()["active"] is False
    assert admin.get("/v1/policy").json()["sha256"] is None


@pytest.mark.parametrize(
    "headers",
    [
        {},
        {"Authorization": "Bearer wrong-token-xyz"},
        {"Authorization": ADMIN_TOKEN},
        {"Authorization": "Basic " + ADMIN_TOKEN},
    ],
)
def test_wrong_or_missing_token_is_401(admin, headers):
    """401 with ``WWW-Authenticate: Bearer`` as RFC 6750 section 3 asks."""
    r = admin.put("/v1/policy", content=policy_bytes(), headers={**headers, **OCTET})
    assert r.status_code == 401 and r.headers["www-authenticate"] == "Bearer"
    assert "Authorization: Bearer" in r.json()["detail"]
    assert admin.post("/v1/policy/rollback", headers=headers).status_code == 401
    assert admin.get("/v1/policy").json()["sha256"] is None


def test_admin_endpoints_are_404_without_a_token(make_client, tiny_graph_path):
    client = make_client(tiny_graph_path)
    r = client.put("/v1/policy", content=policy_bytes(), headers={**AUTH, **OCTET})
    assert r.status_code == 404 and "disabled" in r.json()["detail"]
    assert client.post("/v1/policy/rollback", headers=AUTH).status_code == 404


def test_rollback_and_persistence_across_restarts(make_client, tiny_graph_path, tmp_path):
    first, second = policy_bytes(seed=1), policy_bytes(seed=2)
    sha1, sha2 = (hashlib.sha256(b).hexdigest() for b in (first, second))
    a = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    assert a.post("/v1/policy/rollback", headers=AUTH).status_code == 409
    a.put("/v1/policy", content=first, headers={**AUTH, **OCTET})
    a.put("/v1/policy", content=second, headers={**AUTH, **OCTET})
    assert a.get("/v1/policy").json()["sha256"] == sha2
    # a restart (new app, same policy directory) keeps the active policy
    b = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    assert b.get("/v1/policy").json()["sha256"] == sha2
    r = b.post("/v1/policy/rollback", headers=AUTH)
    assert r.status_code == 200 and r.json()["sha256"] == sha1
    c = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    assert c.get("/v1/policy").json()["sha256"] == sha1
    pointer = json.loads((tmp_path / "policies" / "active.json").read_text())
    assert pointer["active"] == sha1


def test_bad_startup_policy_fails_loudly(tiny_graph_path, tmp_path):
    from dueroute.service.server.app import create_app
    from dueroute.service.server.policy_store import PolicyRejected
    from tests.service.conftest import settings_for

    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"not a model")
    with pytest.raises(PolicyRejected, match="ONNX"):
        create_app(settings_for(tiny_graph_path, tmp_path, policy=bad))


def test_requests_during_swaps_all_succeed(make_client, grid_graph_path):
    """Plans in flight keep the policy they started with; every request during swaps is 200."""
    client = make_client(grid_graph_path, admin_token=ADMIN_TOKEN, workers=2)
    files = [policy_bytes(seed=s) for s in range(3)]
    shas = {hashlib.sha256(b).hexdigest() for b in files}
    client.put("/v1/policy", content=files[0], headers={**AUTH, **OCTET})
    results: list[tuple[int, str | None]] = []
    stop = threading.Event()

    def load() -> None:
        rng = np.random.default_rng(threading.get_ident() % 1000)
        while not stop.is_set():
            o, d = (int(x) for x in rng.integers(0, 90_000, 2))
            r = client.post(
                "/v1/plans",
                json={
                    "origin": {"node": o},
                    "destination": {"node": d},
                    "deadline_ms": 200,
                    "controller": "learned",
                },
            )
            results.append((r.status_code, r.json().get("policy_sha256")))

    threads = [threading.Thread(target=load) for _ in range(2)]
    for t in threads:
        t.start()
    swaps = []
    for i in range(20):
        r = client.put("/v1/policy", content=files[(i + 1) % 3], headers={**AUTH, **OCTET})
        swaps.append(r.status_code)
        time.sleep(0.05)
    stop.set()
    for t in threads:
        t.join()
    assert swaps == [200] * 20
    assert len(results) >= 10 and all(code == 200 for code, _ in results), results
    assert {sha for _, sha in results} <= shas
    print(f"\n{len(results)} plans during 20 swaps, all 200, policies seen: {len(set(results))}")


def test_a_plan_in_flight_keeps_the_policy_it_started_with(make_client, grid_graph_path):
    client = make_client(grid_graph_path, admin_token=ADMIN_TOKEN)
    old, new = policy_bytes(seed=5), policy_bytes(seed=6)
    client.put("/v1/policy", content=old, headers={**AUTH, **OCTET})
    r = client.post(
        "/v1/plans",
        json={
            "origin": {"node": 0},
            "destination": {"node": 89_999},
            "deadline_ms": 400,
            "controller": "learned",
            "wait": False,
        },
    )
    url = r.headers["location"]
    assert client.put("/v1/policy", content=new, headers={**AUTH, **OCTET}).status_code == 200
    with client.stream("GET", url + "/events") as resp:
        resp.read()
    final = client.get(url).json()
    assert final["status"] != "running"
    assert final["policy_sha256"] == hashlib.sha256(old).hexdigest()
    assert client.get("/v1/policy").json()["sha256"] == hashlib.sha256(new).hexdigest()


def test_policy_store_keeps_the_snapshot_for_plans_in_flight(tmp_path: Path):
    """The store swaps one reference: a snapshot taken before a swap is unchanged after it."""
    from dueroute.service.server.policy_store import PolicyStore

    store = PolicyStore(tmp_path / "p", max_bytes=1_000_000)
    store.startup(None, None)
    store.swap(policy_bytes(seed=1))
    held = store.active
    store.swap(policy_bytes(seed=2))
    assert held.sha256 == hashlib.sha256(policy_bytes(seed=1)).hexdigest()
    assert store.active.sha256 != held.sha256 and held.policy is not store.active.policy


def test_shipped_default_is_used_but_an_upload_outlives_it(tmp_path: Path):
    """Start-up order: persisted upload > shipped default > none; the default is not pinned."""
    from dueroute.service.server.policy_store import PolicyStore

    default = tmp_path / "default.onnx"
    default.write_bytes(policy_bytes(seed=7))
    store = PolicyStore(tmp_path / "p", max_bytes=1_000_000)
    assert store.startup(None, default).source == "default:default.onnx"
    default.write_bytes(policy_bytes(seed=8))  # a newer release ships a new default
    store = PolicyStore(tmp_path / "p", max_bytes=1_000_000)
    assert store.startup(None, default).sha256 == hashlib.sha256(policy_bytes(seed=8)).hexdigest()
    store.swap(policy_bytes(seed=9))
    store = PolicyStore(tmp_path / "p", max_bytes=1_000_000)
    assert store.startup(None, default).sha256 == hashlib.sha256(policy_bytes(seed=9)).hexdigest()
    assert store.rollback().sha256 == hashlib.sha256(policy_bytes(seed=8)).hexdigest()


def test_a_policy_from_another_graph_is_served_with_a_warning(admin, tiny_graph_path, caplog):
    """The fingerprint the policy file records (its graph_fingerprint metadata) is compared
    with the served graph's: a mismatch is said on GET /v1/policy and in the log; a policy
    trained on this graph carries no warning."""
    import logging

    from dueroute.planner.graph import load_graph

    fingerprint = load_graph(tiny_graph_path).fingerprint
    foreign = policy_bytes()  # trained on "test", fingerprint 000...
    with caplog.at_level(logging.WARNING, logger="dueroute.service.policy"):
        r = admin.put("/v1/policy", content=foreign, headers={**AUTH, **OCTET})
    assert r.status_code == 200, r.text
    warnings = admin.get("/v1/policy").json()["warnings"]
    assert len(warnings) == 1 and "trained on graph 'test'" in warnings[0]
    assert fingerprint[:12] in warnings[0] and r.json()["warnings"] == warnings
    assert any(rec.getMessage() == "policy trained on another graph" for rec in caplog.records)
    own = policy_bytes(meta=policy_meta(graph_fingerprint=fingerprint))
    r = admin.put("/v1/policy", content=own, headers={**AUTH, **OCTET})
    assert r.status_code == 200 and r.json()["warnings"] == []
    assert admin.get("/v1/policy").json()["warnings"] == []
    dry = admin.put("/v1/policy?dry_run=true", content=foreign, headers={**AUTH, **OCTET})
    assert dry.status_code == 200 and len(dry.json()["warnings"]) == 1
