"""``/v1/traffic``: admin writes, public reads, answers on the changed costs, durability.

References: scipy ``csgraph.dijkstra`` on the changed costs for the optimal plan costs; the
hand-checked facts of ``tests/conftest.py`` (the fastest 0 -> 3 runs along the primary road
0 -> 1 -> 2 -> 3; node 9 is entered only by the one-way 6 -> 9); RFC 6750 for the bearer
challenge; the journal layout documented in ``service/server/traffic_store.py``.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import httpx
import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.graph import load_graph
from tests.service.conftest import ADMIN_TOKEN, LiveServer

AUTH = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
CLOSE_PRIMARY = {"updates": [{"from_node": 1, "to_node": 2, "closed": True, "label": "works"}]}


def _plan(client, origin: int, destination: int, **extra):
    body = {"origin": {"node": origin}, "destination": {"node": destination}, "deadline_ms": 2000}
    body.update(extra)
    r = client.post("/v1/plans", json=body)
    assert r.status_code == 200, r.text
    return r.json()


def _optimum(graph_path: Path, costs: np.ndarray, s: int, t: int) -> float:
    g = load_graph(graph_path)
    return float(dijkstra(g.csr(costs), directed=True, indices=[s])[0, t])


def _version_costs(client) -> np.ndarray:
    state = client.app.state.dueroute
    return np.asarray(state.traffic.current.travel_time_s)


def test_admin_only_writes_and_public_reads(make_client, tiny_graph_path) -> None:
    """No token configured: writes are 404 naming traffic; wrong token: 401 with a Bearer
    challenge (RFC 6750 section 3); GET is public."""
    client = make_client(tiny_graph_path)
    assert client.get("/v1/traffic").json()["version"] == 0
    r = client.post("/v1/traffic", json=CLOSE_PRIMARY)
    assert r.status_code == 404 and "traffic administration is disabled" in r.json()["detail"]
    assert client.delete("/v1/traffic").status_code == 404
    admin = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    r = admin.post(
        "/v1/traffic", json=CLOSE_PRIMARY, headers={"Authorization": "Bearer wrong-token"}
    )
    assert r.status_code == 401 and r.headers["www-authenticate"] == "Bearer"
    assert admin.post("/v1/traffic", json=CLOSE_PRIMARY).status_code == 401


def test_bad_batches_are_refused_with_every_problem(make_client, tiny_graph_path) -> None:
    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN, max_traffic_bytes=100_000)
    r = client.post("/v1/traffic", content=b"{not json", headers=AUTH)
    assert r.status_code == 422 and "not valid JSON" in r.json()["detail"]
    bad = {
        "updates": [
            {"from_node": 0, "to_node": 1, "factor": 2},
            {"from_node": 0, "to_node": 3, "factor": 2},
            {"from_node": 0, "to_node": 1, "speed_kph": 900},
        ]
    }
    r = client.post("/v1/traffic", json=bad, headers=AUTH)
    assert r.status_code == 422
    problems = r.json()["problems"]
    assert problems[0].startswith("updates[1]: there is no edge from node 0 to node 3")
    assert problems[1].startswith("updates[2].speed_kph: must be a number > 0 and <= 300")
    assert client.get("/v1/traffic").json()["version"] == 0  # nothing was applied
    big = {"updates": [{"from_node": 0, "to_node": 1, "factor": 2, "label": "x" * 150}] * 1000}
    r = client.post("/v1/traffic", content=json.dumps(big).encode(), headers=AUTH)
    assert r.status_code == 413 and "limit" in r.json()["detail"]


def test_plans_search_the_new_version_and_name_it(make_client, tiny_graph_path) -> None:
    """Closing 1 -> 2 reroutes 0 -> 3 over the residential streets; the plan's cost equals
    scipy's optimum on the changed costs and its route avoids the closed edge."""
    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    before = _plan(client, 0, 3)
    assert before["traffic_version"] == 0 and before["bound_quality"] == "full"
    assert before["route"]["properties"]["node_indices"] == [0, 1, 2, 3]

    r = client.post("/v1/traffic?dry_run=true", json=CLOSE_PRIMARY, headers=AUTH)
    assert r.status_code == 200 and r.json()["dry_run"] and r.json()["traffic"]["version"] == 0
    r = client.post("/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["batch_version"] == 1 and body["traffic"]["version"] == 1
    assert body["traffic"]["updates_by_kind"]["closed"] == 1
    assert body["traffic"]["updates"][0]["label"] == "works"

    after = _plan(client, 0, 3)
    assert after["traffic_version"] == 1
    nodes = after["route"]["properties"]["node_indices"]
    assert (1, 2) not in set(zip(nodes[:-1], nodes[1:], strict=True))
    opt = _optimum(tiny_graph_path, _version_costs(client), 0, 3)
    assert after["status"] == "optimal" and after["cost_s"] == pytest.approx(opt, rel=1e-9)
    assert after["cost_s"] > before["cost_s"]
    assert after["route"]["properties"]["travel_time_s"] == pytest.approx(after["cost_s"])

    r = client.delete("/v1/traffic", headers=AUTH)
    assert r.status_code == 200 and r.json()["version"] == 2 and r.json()["active_updates"] == 0
    again = _plan(client, 0, 3)
    assert again["traffic_version"] == 2 and again["cost_s"] == pytest.approx(before["cost_s"])


def test_a_closure_that_disconnects_answers_no_route(make_client, tiny_graph_path) -> None:
    """conftest: 9 is entered only by 6 -> 9; closed, 0 -> 9 has no route (scipy agrees)."""
    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    r = client.post(
        "/v1/traffic",
        json={"updates": [{"from_node": 6, "to_node": 9, "closed": True}]},
        headers=AUTH,
    )
    assert r.status_code == 200
    client.app.state.dueroute.traffic.layer.wait_refined(timeout=30)
    assert math.isinf(_optimum(tiny_graph_path, _version_costs(client), 0, 9))
    plan = _plan(client, 0, 9)
    assert plan["status"] == "no_route" and plan["route"] is None and plan["expansions"] == 0


def test_event_stream_names_the_version(make_client, tiny_graph_path) -> None:
    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    client.post("/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH)
    r = client.post(
        "/v1/plans",
        json={"origin": {"node": 0}, "destination": {"node": 3}, "deadline_ms": 500, "wait": False},
    )
    assert r.status_code == 202
    events = []
    with client.stream("GET", r.json()["links"]["events"]) as stream:
        kind = None
        for line in stream.iter_lines():
            if line.startswith("event: "):
                kind = line[7:]
            elif line.startswith("data: "):
                events.append((kind, json.loads(line[6:])))
    assert events and events[-1][0] == "final"
    assert all(data["traffic_version"] == 1 for _, data in events)


def test_a_running_search_keeps_its_version(make_client, grid_graph_path) -> None:
    """A background plan started on version 0 finishes on version 0 although version 1 is
    published while it runs (a version is a snapshot; publishing swaps a reference)."""
    client = make_client(grid_graph_path, admin_token=ADMIN_TOKEN)
    r = client.post(
        "/v1/plans",
        json={
            "origin": {"node": 0},
            "destination": {"node": 300 * 300 - 1},
            "deadline_ms": 1500,
            "controller": "fixed:1",
            "wait": False,
        },
    )
    plan_id = r.json()["plan_id"]
    time.sleep(0.2)
    up = client.post(
        "/v1/traffic",
        json={"updates": [{"from_node": 1, "to_node": 2, "factor": 3}]},
        headers=AUTH,
    )
    assert up.json()["traffic"]["version"] == 1
    fresh = _plan(client, 5, 6)
    assert fresh["traffic_version"] == 1
    while True:
        body = client.get(f"/v1/plans/{plan_id}").json()
        if body["status"] != "running":
            break
        time.sleep(0.05)
    assert body["traffic_version"] == 0


def test_restart_restores_the_same_version_and_costs(
    make_client, tiny_graph_path, tmp_path
) -> None:
    """Journaled batches survive: a new app on the same state directory answers on the same
    version number with the same costs; an update whose expiry passed meanwhile is gone."""
    first = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    first.post(
        "/v1/traffic",
        json={"updates": [{"from_node": 0, "to_node": 1, "factor": 1.7}]},
        headers=AUTH,
    )
    first.post("/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH)
    costs = _version_costs(first).copy()
    plan = _plan(first, 0, 3)
    journal = list((tmp_path / "traffic").glob("*/journal.jsonl"))
    assert len(journal) == 1
    lines = [json.loads(x) for x in journal[0].read_text().splitlines()]
    assert [x["seq"] for x in lines] == [1, 2] and {x["kind"] for x in lines} == {"batch"}

    second = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    info = second.get("/v1/traffic").json()
    assert info["version"] == 2 and info["active_updates"] == 2
    assert np.array_equal(_version_costs(second), costs)
    again = _plan(second, 0, 3)
    assert again["traffic_version"] == 2 and again["cost_s"] == plan["cost_s"]


def test_expiry_makes_a_new_version_everywhere(make_client, tiny_graph_path) -> None:
    """An update with expires_in_s stops applying: the watcher journals an 'expire' entry and
    both apps sharing the directory publish the same new version with base costs."""
    a = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN, traffic_poll_s=0.05)
    b = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN, traffic_poll_s=0.05)
    doc = {"updates": [{"from_node": 1, "to_node": 2, "closed": True, "expires_in_s": 0.6}]}
    assert a.post("/v1/traffic", json=doc, headers=AUTH).json()["traffic"]["version"] == 1
    end = time.monotonic() + 15
    while time.monotonic() < end:
        va, vb = a.get("/v1/traffic").json(), b.get("/v1/traffic").json()
        if va["version"] == vb["version"] == 2:
            break
        time.sleep(0.05)
    assert va["version"] == vb["version"] == 2
    assert va["active_updates"] == vb["active_updates"] == 0
    base = np.asarray(load_graph(tiny_graph_path).travel_time_s)
    assert np.array_equal(_version_costs(a), base) and np.array_equal(_version_costs(b), base)


def test_two_apps_sharing_a_directory_converge(make_client, tiny_graph_path) -> None:
    """A batch posted to one app appears in the other at the same version number (the
    convergence time is printed; the design polls every traffic_poll_s = 0.2 s)."""
    a = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    b = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    waits = []
    for i, doc in enumerate(
        (
            CLOSE_PRIMARY,
            {"updates": [{"from_node": 0, "to_node": 5, "factor": 2}]},
            {"updates": [{"from_node": 5, "to_node": 4, "speed_kph": 10}]},
        )
    ):
        writer, reader = (a, b) if i % 2 == 0 else (b, a)
        v = writer.post("/v1/traffic", json=doc, headers=AUTH).json()["batch_version"]
        t0 = time.monotonic()
        while reader.get("/v1/traffic").json()["version"] < v and time.monotonic() - t0 < 10:
            time.sleep(0.01)
        waits.append(time.monotonic() - t0)
        assert reader.get("/v1/traffic").json()["version"] == v
    print(f"convergence after a POST: {', '.join(f'{w * 1000:.0f} ms' for w in waits)}")
    assert np.array_equal(_version_costs(a), _version_costs(b))
    assert _plan(a, 0, 3)["cost_s"] == _plan(b, 0, 3)["cost_s"]


def test_a_torn_journal_line_is_dropped_and_a_corrupt_one_stops_the_start(
    make_client, tiny_graph_path, tmp_path
) -> None:
    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    client.post("/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH)
    (journal,) = (tmp_path / "traffic").glob("*/journal.jsonl")
    with open(journal, "ab") as fh:
        fh.write(b'{"seq": 2, "kind": "bat')  # a writer died mid-line
    r = client.post(
        "/v1/traffic", json={"updates": [{"from_node": 0, "to_node": 5, "factor": 2}]}, headers=AUTH
    )
    assert r.json()["batch_version"] == 2
    assert [json.loads(x)["seq"] for x in journal.read_text().splitlines()] == [1, 2]

    journal.write_text(journal.read_text() + "this is not json\n")
    from fastapi.testclient import TestClient

    from dueroute.service.server.app import create_app
    from tests.service.conftest import settings_for

    app = create_app(settings_for(tiny_graph_path, tmp_path, admin_token=ADMIN_TOKEN))
    with TestClient(app) as broken:
        end = time.monotonic() + 30
        while time.monotonic() < end:
            r = broken.get("/readyz")
            if r.json()["status"] == "failed":
                break
            time.sleep(0.05)
        assert r.status_code == 503 and r.json()["status"] == "failed"
        assert "journal.jsonl: line 3: not JSON" in r.json()["detail"]["error"]


def test_clear_compacts_the_journal(make_client, tiny_graph_path, tmp_path) -> None:
    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    for _ in range(3):
        client.post("/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH)
    client.delete("/v1/traffic", headers=AUTH)
    (journal,) = (tmp_path / "traffic").glob("*/journal.jsonl")
    assert [json.loads(x)["kind"] for x in journal.read_text().splitlines()] == ["clear"]
    client.post("/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH)
    other = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    assert other.get("/v1/traffic").json()["version"] == 5


def test_real_server_post_plan_restart_plan(tiny_graph_path, tmp_path) -> None:
    """The issue's end-to-end check on a real ``dueroute serve`` process: POST a batch, plan,
    restart the process, plan again: same version, same cost."""
    env = {"DUEROUTE_ADMIN_TOKEN": ADMIN_TOKEN}
    with LiveServer(tiny_graph_path, tmp_path, env=env) as server:
        r = httpx.post(server.url + "/v1/traffic", json=CLOSE_PRIMARY, headers=AUTH, timeout=10)
        assert r.status_code == 200, r.text
        body = {"origin": {"node": 0}, "destination": {"node": 3}, "deadline_ms": 2000}
        first = httpx.post(server.url + "/v1/plans", json=body, timeout=10).json()
    assert first["traffic_version"] == 1
    with LiveServer(tiny_graph_path, tmp_path, env=env) as server:
        info = httpx.get(server.url + "/v1/traffic", timeout=10).json()
        second = httpx.post(server.url + "/v1/plans", json=body, timeout=10).json()
    assert info["version"] == 1 and second["traffic_version"] == 1
    assert second["cost_s"] == first["cost_s"] and second["status"] == "optimal"


def test_loadtest_sets_the_traffic_and_checks_against_the_changed_optimum(
    make_client, tiny_graph_path
) -> None:
    """``run_loadtest`` with a traffic document and the admin token: the service is set to
    exactly that document, every answer names its version, and the reference (scipy
    ``csgraph.dijkstra`` on the same changed costs) finds every route optimal and valid."""
    import asyncio

    from dueroute.planner.traffic import costs_from_document
    from dueroute.service.loadtest import runner as lt

    client = make_client(tiny_graph_path, admin_token=ADMIN_TOKEN)
    client.post(
        "/v1/traffic", json={"updates": [{"from_node": 0, "to_node": 5, "factor": 9}]}, headers=AUTH
    )
    graph = load_graph(tiny_graph_path)
    version = costs_from_document(graph, CLOSE_PRIMARY)
    queries = [(0, 3), (3, 0), (0, 6), (4, 2)]
    reference = lt.Reference(graph, queries, costs=version)
    config = lt.LoadTestConfig(
        url="http://127.0.0.1:9",
        concurrency=(1,),
        deadlines_ms=(200,),
        controllers=("fixed:1",),
        duration_s=30,
        max_requests=8,
        warmup_requests=1,
    )
    result = asyncio.run(
        lt.run_loadtest(
            config,
            queries,
            reference=reference,
            transport=httpx.ASGITransport(app=client.app),
            traffic_doc=CLOSE_PRIMARY,
            admin_token=ADMIN_TOKEN,
        )
    )
    assert result.server["traffic"]["version"] == 3  # 1 = the earlier batch, 2 = the clear
    assert result.server["traffic"]["active_updates"] == 1
    (cell,) = lt.summarize(result)["cells"]
    assert cell["answers"] == 8 and cell["traffic_version_mismatches"] == 0
    assert cell["route_mismatches"] == 0 and cell["bound_above_optimal"] == 0
    assert cell["quality"]["mean"] == pytest.approx(1.0)
    base = float(dijkstra(graph.csr(), directed=True, indices=[0])[0, 3])
    assert reference.optimal_s[(0, 3)] > base  # the reference did use the changed costs
