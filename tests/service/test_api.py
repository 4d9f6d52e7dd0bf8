"""The plans API in-process (FastAPI TestClient): answers, geometry, errors, background plans."""

from __future__ import annotations

import contextlib
import json
import math
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.graph import load_graph

PLAN = "/v1/plans"


def body(o: int | dict, d: int | dict, deadline_ms: int = 200, **kw: object) -> dict:
    place = lambda p: {"node": p} if isinstance(p, int) else p  # noqa: E731
    return {"origin": place(o), "destination": place(d), "deadline_ms": deadline_ms, **kw}


def test_plan_is_optimal_and_geojson_follows_the_roads(make_client, tiny_graph_path: Path):
    """Route cost checked against scipy ``csgraph.dijkstra``; the Feature against RFC 7946
    (section 3.2 Feature, 3.1.4 LineString: >= 2 positions, [lon, lat] order), with geometry
    equal to the concatenated ``RoadGraph.edge_coords`` of the route's edges."""
    client = make_client(tiny_graph_path)
    graph = load_graph(tiny_graph_path)
    r = client.post(PLAN, json=body(0, 3, controller="decreasing"))
    assert r.status_code == 200, r.text
    plan = r.json()
    assert plan["status"] == "optimal"
    exact = dijkstra(graph.csr(), indices=0)[3]
    assert plan["cost_s"] == pytest.approx(exact, rel=1e-9)
    assert plan["lower_bound_s"] == pytest.approx(exact, rel=1e-9)
    assert plan["gap"] == 0.0
    feat = plan["route"]
    assert feat["type"] == "Feature" and feat["geometry"]["type"] == "LineString"
    props = feat["properties"]
    nodes = props["node_indices"]
    assert nodes[0] == 0 and nodes[-1] == 3
    assert props["node_ids"] == [int(graph.osm_id[n]) for n in nodes]
    # rebuild the geometry edge by edge with edge_coords (cheapest edge between each pair)
    coords: list[list[float]] = []
    edges = []
    for a, b in zip(nodes[:-1], nodes[1:], strict=True):
        cand = [e for e in range(graph.indptr[a], graph.indptr[a + 1]) if graph.head[e] == b]
        e = min(cand, key=lambda e: graph.travel_time_s[e])
        edges.append(e)
        pts = [list(p) for p in graph.edge_coords(e)]
        coords.extend(pts if not coords else pts[1:])
    # written to 7 decimals (about 1 cm; RFC 7946 section 11.2 finds 6 enough)
    got = np.asarray(feat["geometry"]["coordinates"])
    assert got.shape == np.asarray(coords).shape
    np.testing.assert_allclose(got, np.asarray(coords), rtol=0, atol=0.51e-7)
    assert len(coords) >= 2
    assert all(-180 <= x <= 180 and -90 <= y <= 90 for x, y in coords)
    assert props["travel_time_s"] == pytest.approx(plan["cost_s"])
    assert props["length_m"] == pytest.approx(float(np.sum(graph.length_m[edges])))
    t = plan["timings"]
    assert t["queue_ms"] >= 0 and t["search_ms"] >= 0 and t["total_ms"] >= t["search_ms"]
    assert plan["controller"] == "decreasing" and plan["policy_sha256"] is None


def test_points_snap_onto_roads_and_learned_falls_back_without_a_policy(
    make_client, tiny_graph_path
):
    """Places given as points start and end part-way along the nearest roads. The cost is
    checked against scipy ``csgraph.dijkstra`` between the snapped edges' ends plus the partial
    edge costs, over every legal direction of either road; the LineString (RFC 7946 section
    3.1.4) starts at the snapped origin and ends at the snapped destination."""
    from dueroute.planner.snap import snap_to_road

    client = make_client(tiny_graph_path)
    graph = load_graph(tiny_graph_path)
    o, d = (45.0002, 7.005), (45.0098, 7.015)  # beside the 0-1 road and the 3-4 road
    r = client.post(
        PLAN,
        json=body({"lat": o[0], "lon": o[1]}, {"lat": d[0], "lon": d[1]}, controller="learned"),
    )
    assert r.status_code == 200, r.text
    plan = r.json()
    assert plan["origin_node"] is None and plan["destination_node"] is None
    assert plan["status"] == "optimal"
    so, sd = snap_to_road(graph, *o), snap_to_road(graph, *d)
    dist = dijkstra(graph.csr(), directed=True)
    tail, head = np.asarray(graph.tail), np.asarray(graph.head)
    exact = min(
        a.cost_to_head_s + dist[head[a.edge], tail[b.edge]] + b.cost_from_tail_s
        for a in so.sides
        for b in sd.sides
    )
    assert plan["cost_s"] == pytest.approx(exact, rel=1e-9)
    for key, snap, query in (("origin_point", so, o), ("destination_point", sd, d)):
        point = plan[key]
        assert (point["lat"], point["lon"]) == pytest.approx((snap.lat, snap.lon))
        assert point["query"] == {"lat": query[0], "lon": query[1]}
        assert 0 < point["distance_m"] < 50
    coords = plan["route"]["geometry"]["coordinates"]
    assert coords[0] == pytest.approx([so.lon, so.lat])
    assert coords[-1] == pytest.approx([sd.lon, sd.lat])
    props = plan["route"]["properties"]
    start, end = props["start_partial"], props["end_partial"]
    assert start["edge"] in [s.edge for s in so.sides] and end["edge"] in [s.edge for s in sd.sides]
    assert start["to_fraction"] == 1.0 and end["from_fraction"] == 0.0
    assert props["travel_time_s"] == pytest.approx(plan["cost_s"], rel=1e-9)
    assert plan["controller"] == "learned (fallback: decreasing)"
    info = client.get("/v1/policy").json()
    assert info["sha256"] is None and info["fallback_controller"] == "decreasing"


def test_a_turn_profile_gives_the_legal_optimum(make_client, tiny_graph_path):
    """With turn costs and U-turns allowed (settings), the answer equals the legal optimum of
    the networkx line-graph reference (tests/planner/test_turns.py) with the same rules, and
    /readyz names the profile."""
    from dueroute.planner.turns import TurnCosts
    from tests.planner.test_turns import Reference

    client = make_client(tiny_graph_path, turn_costs="left=7,right=3,uturn=20", uturns="allow")
    graph = load_graph(tiny_graph_path)
    ref = Reference(graph, uturns="allow", turn_costs=TurnCosts(left_s=7, right_s=3, uturn_s=20))
    lg = ref.line_graph()
    for o, d in ((0, 3), (3, 0), (5, 2), (9, 9)):
        r = client.post(PLAN, json=body(o, d, controller="fixed:1"))
        assert r.status_code == 200, r.text
        best = ref.shortest_from(lg, o)[d] if o != d else 0.0
        assert r.json()["status"] == "optimal"
        assert r.json()["cost_s"] == pytest.approx(best, rel=1e-9)
    profile = client.get("/readyz").json()["detail"]["turn_profile"]
    assert profile == {
        "uturns": "allow",
        "turn_costs_s": {"left": 7.0, "right": 3.0, "uturn": 20.0},
    }


def test_no_route_and_same_node(make_client, tiny_graph_path):
    """Hand-checked facts of the tiny graph (tests/conftest.py): 7 is unreachable from 0."""
    client = make_client(tiny_graph_path)
    r = client.post(PLAN, json=body(0, 7))
    assert r.status_code == 200
    assert r.json()["status"] == "no_route" and r.json()["route"] is None
    r = client.post(PLAN, json=body(2, 2))
    assert r.json()["status"] == "optimal" and r.json()["cost_s"] == 0.0
    assert len(r.json()["route"]["geometry"]["coordinates"]) == 2  # RFC 7946: >= 2 positions


@pytest.mark.parametrize(
    ("payload", "status", "words"),
    [
        (body(0, 99), 404, "valid node indices are 0..9"),
        (body({"lat": 10.0, "lon": 10.0}, 3), 404, "the limit is 500 m"),
        (body(0, 3, deadline_ms=0), 422, "1..60000"),
        (body(0, 3, deadline_ms=-5), 422, "1..60000"),
        (body(0, 3, deadline_ms=60_001), 422, "1..60000"),
        (body(0, 3, deadline_ms=12.5), 422, "integer number of milliseconds"),
        (body(0, 3, deadline_ms="10"), 422, "integer number of milliseconds"),
        (body({"node": "x"}, 3), 422, "allowed for origin"),
        (body({"lat": 91.0, "lon": 0.0}, 3), 422, "less than or equal to 90"),
        (body(0, 3, controller="fixed:9"), 422, "fixed:W with W in 1..5"),
        (body(0, 3, controller="greedy"), 422, "one of learned, decreasing"),
        (body(0, 3, wait="yes"), 422, "true or false"),
        ({"origin": {"node": 0}, "deadline_ms": 5}, 422, "destination: field required"),
        ([1, 2, 3], 422, "the body must be a JSON object, not an array"),
    ],
)
def test_bad_input_says_what_is_allowed(make_client, tiny_graph_path, payload, status, words):
    client = make_client(tiny_graph_path)
    r = client.post(PLAN, json=payload)
    assert r.status_code == status, r.text
    detail = r.json()["detail"]
    assert isinstance(detail, str) and words in detail, detail


def test_malformed_json_and_huge_body(make_client, tiny_graph_path):
    """Status codes from RFC 9110 (400 Bad Request for a syntax error, 413 Content Too
    Large)."""
    client = make_client(tiny_graph_path, max_body_bytes=1024)
    r = client.post(
        PLAN, content=b'{"origin": {"node": 0', headers={"content-type": "application/json"}
    )
    assert r.status_code == 400 and "not valid JSON" in r.json()["detail"]
    r = client.post(PLAN, content=b"x" * 5000, headers={"content-type": "application/json"})
    assert r.status_code == 413 and "limit for this endpoint is 1024 bytes" in r.json()["detail"]

    def chunks():  # no Content-Length: the limit is enforced while reading
        for _ in range(10):
            yield b" " * 200

    r = client.post(PLAN, content=chunks(), headers={"content-type": "application/json"})
    assert r.status_code == 413, r.text


def test_deadline_above_configured_maximum(make_client, tiny_graph_path):
    client = make_client(tiny_graph_path, max_deadline_ms=1000)
    r = client.post(PLAN, json=body(0, 3, deadline_ms=5000))
    assert r.status_code == 422 and "1..1000" in r.json()["detail"]


def _events(text: str) -> list[tuple[str, dict]]:
    """Parse a text/event-stream body (WHATWG HTML, 'Server-sent events' section)."""
    out = []
    for block in text.strip().split("\n\n"):
        fields = dict(
            line.split(": ", 1) for line in block.splitlines() if line and not line.startswith(":")
        )
        if "event" in fields:
            out.append((fields["event"], json.loads(fields["data"])))
    return out


def _improvement_ids(text: str) -> list[int]:
    """The ``id`` field of every improvement event of a text/event-stream body."""
    ids = []
    for block in text.strip().split("\n\n"):
        fields = dict(
            line.split(": ", 1) for line in block.splitlines() if line and not line.startswith(":")
        )
        if fields.get("event") == "improvement":
            ids.append(int(fields["id"]))
    return ids


def test_background_plan_poll_stream_and_final(make_client, grid_graph_path):
    """SSE framing per the WHATWG HTML 'Server-sent events' section; improvements must arrive
    in the order found (costs strictly decreasing, elapsed non-decreasing), then ``final``."""
    client = make_client(grid_graph_path)
    r = client.post(
        PLAN, json=body(0, 89_999, deadline_ms=300, controller="decreasing", wait=False)
    )
    assert r.status_code == 202, r.text
    acc = r.json()
    url = r.headers["location"]
    assert url == f"/v1/plans/{acc['plan_id']}" and acc["links"]["events"] == url + "/events"
    current = client.get(url).json()
    assert current["status"] in ("running", "optimal", "improved", "instant")
    with client.stream("GET", url + "/events") as resp:
        assert resp.headers["content-type"].startswith("text/event-stream")
        text = resp.read().decode()
        events = _events(text)
    kinds = [k for k, _ in events]
    assert kinds[-1] == "final" and set(kinds[:-1]) <= {"improvement"}
    improvements = [d for k, d in events if k == "improvement"]
    final = events[-1][1]
    assert len(improvements) >= 1
    costs = [i["cost_s"] for i in improvements]
    assert all(a > b for a, b in zip(costs, costs[1:], strict=False))
    assert [i["elapsed_ms"] for i in improvements] == sorted(i["elapsed_ms"] for i in improvements)
    assert costs[-1] == pytest.approx(final["cost_s"])
    # the answer lists the last 20 and counts the rest; the stream sent what the plan still
    # held when it joined, each with its ordinal as the event id (0-based, consecutive)
    ids = _improvement_ids(text)
    assert ids == list(range(ids[0], ids[0] + len(ids)))
    assert [i["cost_s"] for i in final["improvements"]] == costs[-20:]
    assert final["improvements_dropped"] + len(final["improvements"]) == ids[-1] + 1
    assert [i for k, i in events if k == "improvement"][0].get("route") is not None
    assert final["status"] in ("optimal", "improved", "instant")
    assert client.get(url).json()["status"] == final["status"]
    # a finished plan: DELETE returns its final status
    assert client.delete(url).json()["status"] == final["status"]


def test_delete_cancels_a_running_plan(make_client, grid_graph_path):
    client = make_client(grid_graph_path, workers=1)
    r = client.post(
        PLAN, json=body(0, 89_999, deadline_ms=20_000, controller="fixed:1", wait=False)
    )
    url = r.headers["location"]
    time.sleep(0.05)
    t0 = time.perf_counter()
    r = client.delete(url)
    assert r.status_code == 200
    assert r.json()["status"] in ("cancelled", "optimal")
    assert time.perf_counter() - t0 < 5.0
    assert client.get(url).json()["status"] == r.json()["status"]


def test_unknown_plan_ids_are_404(make_client, tiny_graph_path):
    client = make_client(tiny_graph_path)
    for method in ("get", "delete"):
        r = getattr(client, method)(f"{PLAN}/nope")
        assert r.status_code == 404
        assert "no plan with id 'nope': this service did not issue it" in r.json()["detail"]
    assert client.get(f"{PLAN}/nope/events").status_code == 404


def test_a_full_store_refuses_new_background_plans_and_keeps_the_old(make_client, tiny_graph_path):
    """Nothing stored is evicted early: with room for 2, the third background plan is refused
    (503 + Retry-After, RFC 9110 section 10.2.3) while both stored plans stay readable; after
    their TTL they answer 404 'expired'."""
    client = make_client(tiny_graph_path, background_max=2, background_ttl_s=1.5)
    urls = []
    for _ in range(2):
        r = client.post(PLAN, json=body(0, 3, wait=False))
        assert r.status_code == 202
        urls.append(r.headers["location"])
        with client.stream("GET", urls[-1] + "/events") as resp:
            resp.read()  # wait until it is finished
    r = client.post(PLAN, json=body(0, 3, wait=False))
    assert r.status_code == 503 and "plan store is full" in r.json()["detail"]
    assert 1 <= int(r.headers["retry-after"]) <= 2
    # a waited plan is not stored, so it is still served; with keep=true it needs room
    assert client.post(PLAN, json=body(0, 3)).status_code == 200
    assert client.post(PLAN, json=body(0, 3, keep=True)).status_code == 503
    assert [client.get(u).json()["status"] for u in urls] == ["optimal", "optimal"]
    time.sleep(1.7)
    for url in urls:  # expired after the TTL, and the 404 says so
        r = client.get(url)
        assert r.status_code == 404 and "has expired" in r.json()["detail"]
    assert client.post(PLAN, json=body(0, 3, wait=False)).status_code == 202


def _job(plan_id: str, deadline_s: float):
    from dueroute.service.server.jobs import PlanJob

    return PlanJob(plan_id, 0, 1, 1000, "ana", False, 0.0, deadline_s, None)


def test_plan_store_full_of_running_plans_refuses_with_retry_after():
    from dueroute.service.server.jobs import PlanningEngine
    from dueroute.service.server.plan_store import MemoryPlanStore, StoreFull

    now = {"t": 10.0}
    store = MemoryPlanStore(max_plans=2, max_bytes=10**9, ttl_s=60.0, clock=lambda: now["t"])
    jobs = []
    for i in range(2):
        store.check_room(0)
        jobs.append(_job(store.new_id(kept=True), deadline_s=12.5 + i))
        store.put(jobs[-1])
    with pytest.raises(StoreFull, match="it holds 2 of 2 plans") as full:
        store.check_room(0)
    assert full.value.retry_after_s == 63  # the soonest deadline, 2.5 s away, + the 60 s TTL
    # a finished plan is held for its TTL, then forgotten; the 404 reason says which
    engine = PlanningEngine(graph=None, planner=None, steps=1)
    engine.fail(jobs[1], "test")
    assert store.stats()["running"] == 1 and len(store) == 2
    now["t"] += 59.0
    assert store.lookup(jobs[1].plan_id).job is jobs[1]
    now["t"] += 2.0
    gone = store.lookup(jobs[1].plan_id)
    assert gone.job is None and gone.reason == "expired" and store.expired_total == 1
    assert store.lookup("nope").reason == "unknown"
    assert store.lookup(store.new_id(kept=False)).reason == "not_kept"
    store.check_room(0)  # room again


def test_health_ready_metrics_and_openapi(make_client, tiny_graph_path):
    client = make_client(tiny_graph_path)
    assert client.get("/healthz").json()["status"] == "alive"
    ready = client.get("/readyz").json()
    assert ready["status"] == "ready" and ready["detail"]["warmup_searches"] >= 1
    # a load tester checks it is talking to the graph it computes reference costs on
    assert ready["detail"]["graph_fingerprint"] == load_graph(tiny_graph_path).fingerprint
    client.post(PLAN, json=body(0, 3))
    client.post(PLAN, json=body(0, 99))
    text = client.get("/metrics").text
    assert 'dueroute_plans_total{outcome="optimal"} 1.0' in text
    assert 'dueroute_plans_total{outcome="rejected"} 1.0' in text
    assert "dueroute_plan_latency_seconds_bucket" in text and "dueroute_plan_gap_bucket" in text
    assert 'dueroute_active_policy_info{fallback_controller="decreasing"' in text
    spec = client.get("/openapi.json").json()
    assert {"/v1/plans", "/v1/plans/{plan_id}", "/v1/plans/{plan_id}/events", "/v1/policy"} <= set(
        spec["paths"]
    )


def test_two_apps_side_by_side_keep_separate_metrics(make_client, tiny_graph_path):
    a = make_client(tiny_graph_path)
    b = make_client(tiny_graph_path)
    a.post(PLAN, json=body(0, 3))
    assert 'outcome="optimal"} 1.0' in a.get("/metrics").text
    assert 'outcome="optimal"}' not in b.get("/metrics").text


def test_settings_fail_loudly(tmp_path):
    from pydantic import ValidationError

    from dueroute.service.server.settings import Settings

    with pytest.raises(ValidationError, match="workers"):
        Settings(workers=0)
    with pytest.raises(ValidationError, match="log_level must be one of"):
        Settings(log_level="loud")
    with pytest.raises(ValidationError, match="admin_token must be at least 8"):
        Settings(admin_token="short")


def test_settings_from_environment(monkeypatch):
    from dueroute.service.server.settings import Settings, get_settings

    monkeypatch.setenv("DUEROUTE_WORKERS", "3")
    monkeypatch.setenv("DUEROUTE_DEADLINE_TOLERANCE_MS", "7.5")
    s = Settings()
    assert s.workers == 3 and s.deadline_tolerance_ms == 7.5
    get_settings.cache_clear()
    try:
        assert get_settings().workers == 3
        assert get_settings() is get_settings()
    finally:
        get_settings.cache_clear()
    monkeypatch.setenv("DUEROUTE_WORKERS", "many")
    with pytest.raises(Exception, match="workers"):
        Settings()


def test_route_feature_matches_edge_coords_on_the_grid(grid_graph_path):
    """Vectorised geometry equals the per-edge ``RoadGraph.edge_coords`` concatenation."""
    from dueroute.planner.session import Planner, plan
    from dueroute.service.server.jobs import route_feature

    graph = load_graph(grid_graph_path)
    result = plan(Planner(graph), 5, 40_000, budget_expansions=200_000, controller="fixed:2")
    feat = route_feature(graph, result.route, result.route_edges)
    assert feat is not None
    coords: list[list[float]] = []
    for e in result.route_edges:
        pts = [list(p) for p in graph.edge_coords(int(e))]
        coords.extend(pts if not coords else pts[1:])
    # written to 7 decimals (about 1 cm; RFC 7946 section 11.2 finds 6 enough)
    got = np.asarray(feat["geometry"]["coordinates"])
    assert got.shape == np.asarray(coords).shape
    np.testing.assert_allclose(got, np.asarray(coords), rtol=0, atol=0.51e-7)
    assert feat["properties"]["travel_time_s"] == pytest.approx(result.cost_s)
    assert math.isclose(
        feat["properties"]["length_m"], float(np.sum(graph.length_m[result.route_edges]))
    )


class _Stalling:
    """A weight controller that blocks between steps until released (a worker held busy);
    with ``at_start`` also before the first step, so a search that would be proven in one
    step cannot end early."""

    name, mode = "stalling", "weighted"

    def __init__(self, release: threading.Event, at_start: bool = False) -> None:
        self.release = release
        self.at_start = at_start

    def reset(self, seed):
        if self.at_start:
            self.release.wait(5.0)
        return 2.0

    def decide(self, features, stats):
        self.release.wait(5.0)
        return 2.0


@contextlib.contextmanager
def stalling_searches(client, at_start: bool = False):
    engine = client.app.state.dueroute.engine
    release = threading.Event()
    original = engine.make_controller
    engine.make_controller = lambda spec, policy: _Stalling(release, at_start)
    try:
        yield release
    finally:
        release.set()
        engine.make_controller = original


def test_watchdog_answers_on_time_when_a_search_overruns(make_client, grid_graph_path):
    """A controller that stalls between steps (a stand-in for a search that overruns its
    deadline) must not hold the answer: the handler answers at the deadline with the best
    route so far. The bound on the answer time is deliberately loose (1 s for a 50 ms deadline)
    so the test checks the mechanism, not the machine's speed."""
    client = make_client(grid_graph_path)
    with stalling_searches(client):
        t0 = time.perf_counter()
        r = client.post(PLAN, json=body(0, 89_999, deadline_ms=50, controller="ana"))
        waited_s = time.perf_counter() - t0
    assert r.status_code == 200 and waited_s < 1.0
    assert r.json()["status"] in ("instant", "improved") and r.json()["route"] is not None
    assert "dueroute_watchdog_answers_total 1.0" in client.get("/metrics").text


def test_queued_plan_cancels_at_once_and_a_late_one_still_gets_a_route(
    make_client, grid_graph_path
):
    """One worker held busy by a search that never yields: a second background plan queues;
    DELETE cancels it without waiting for the worker; a waited plan that cannot get the slot
    before its deadline leaves the queue and answers with a route anyway (the instant route,
    which needs the landmarks)."""
    client = make_client(grid_graph_path, workers=1, landmarks=True)
    admission = client.app.state.dueroute.admission
    with stalling_searches(client, at_start=True):
        busy = client.post(PLAN, json=body(0, 89_999, deadline_ms=25_000, wait=False))
        queued = client.post(PLAN, json=body(0, 89_998, deadline_ms=20_000, wait=False))
        assert busy.status_code == queued.status_code == 202
        assert admission.queued == 1
        r = client.post(PLAN, json=body(1, 2, deadline_ms=300, controller="decreasing"))
        assert r.status_code == 200 and r.json()["route"] is not None, r.json()
        assert admission.busy == 1  # it searched without the slot the stuck search holds
        r = client.delete(queued.headers["location"])
        assert r.status_code == 200 and r.json()["status"] == "cancelled"
        assert admission.queued == 0
    r = client.delete(busy.headers["location"])
    assert r.json()["status"] in ("cancelled", "optimal", "improved", "instant")


def test_not_ready_until_warmed_up_then_ready(tmp_path, tiny_graph_path, monkeypatch):
    """/readyz and POST /v1/plans say 503 (with Retry-After) until the warm-up has finished."""
    from fastapi.testclient import TestClient

    import dueroute.service.server.app as app_module
    from tests.service.conftest import settings_for, wait_ready

    gate = threading.Event()
    original = app_module.warm_up

    def gated(state):
        gate.wait(10)
        original(state)

    monkeypatch.setattr(app_module, "warm_up", gated)
    app = app_module.create_app(settings_for(tiny_graph_path, tmp_path))
    with TestClient(app) as client:
        assert client.get("/healthz").status_code == 200
        r = client.get("/readyz")
        assert r.status_code == 503 and r.json()["status"] == "warming_up"
        r = client.post(PLAN, json=body(0, 3))
        assert r.status_code == 503 and r.headers["retry-after"] == "1"
        assert "warming up" in r.json()["detail"]
        gate.set()
        wait_ready(client)
        assert client.post(PLAN, json=body(0, 3)).json()["status"] == "optimal"
        assert client.get("/readyz").json()["detail"]["warmup_searches"] >= 1


def test_a_corrupt_graph_fails_readiness_with_the_reason(tmp_path):
    from fastapi.testclient import TestClient

    from dueroute.service.server.app import create_app
    from tests.service.conftest import settings_for

    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"PK\x03\x04 not really a zip")
    with TestClient(create_app(settings_for(bad, tmp_path))) as client:
        for _ in range(100):
            r = client.get("/readyz")
            if r.json()["status"] == "failed":
                break
            time.sleep(0.05)
        assert r.status_code == 503 and "CorruptGraphFile" in r.json()["detail"]["error"]
        r = client.post(PLAN, json=body(0, 3))
        assert r.status_code == 503 and "not a readable compiled graph" in r.json()["detail"]


def test_the_shipped_policy_serves_learned(make_client, tiny_graph_path):
    """With no policy given, 'learned' runs the policy shipped in policies/default.onnx."""
    from dueroute.service.server.app import DEFAULT_POLICY

    if not DEFAULT_POLICY.is_file():
        pytest.skip("no shipped policy in this checkout")
    client = make_client(tiny_graph_path, shipped_policy=True)
    info = client.get("/v1/policy").json()
    assert info["source"] == "default:default.onnx" and info["fallback_controller"] is None
    plan = client.post(PLAN, json=body(0, 3, controller="learned")).json()
    assert plan["controller"] == "learned" and plan["policy_sha256"] == info["sha256"]
    assert plan["status"] == "optimal"
