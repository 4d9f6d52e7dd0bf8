"""Nothing accepted is lost: the plan store under a burst, exact 404 reasons, failing jobs.

Against a real server (``dueroute serve`` in a subprocess, as a user meets it) where the test
needs nothing injected; in-process (the same app through FastAPI's TestClient) where a failure
has to be injected into a job. Status codes and ``Retry-After`` follow RFC 9110 (sections 15.6.4
and 10.2.3); event streams are parsed per the WHATWG HTML "Server-sent events" section.
"""

from __future__ import annotations

import asyncio
import dataclasses
import json
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from dueroute.planner.graph import load_graph, save_graph
from tests.conftest import make_tiny_graph
from tests.service.conftest import LiveServer

PLAN = "/v1/plans"


def body(o: int, d: int, **kw: Any) -> dict[str, Any]:
    return {"origin": {"node": o}, "destination": {"node": d}, "deadline_ms": 1000, **kw}


async def _burst(url: str, bodies: list[dict[str, Any]], concurrency: int = 32) -> list[Any]:
    """POST every body, ``concurrency`` in flight; returns (status, json, headers) in order."""
    limits = httpx.Limits(max_connections=concurrency, max_keepalive_connections=concurrency)
    out: list[Any] = [None] * len(bodies)
    queue = list(enumerate(bodies))
    async with httpx.AsyncClient(base_url=url, timeout=30.0, limits=limits) as client:

        async def worker() -> None:
            while queue:
                i, b = queue.pop()
                r = await client.post(PLAN, json=b)
                out[i] = (r.status_code, r.json(), r.headers)

        await asyncio.gather(*(worker() for _ in range(concurrency)))
    return out


async def _get_all(url: str, paths: list[str], concurrency: int = 32) -> list[tuple[int, Any]]:
    limits = httpx.Limits(max_connections=concurrency, max_keepalive_connections=concurrency)
    async with httpx.AsyncClient(base_url=url, timeout=30.0, limits=limits) as client:
        sem = asyncio.Semaphore(concurrency)

        async def one(path: str) -> tuple[int, Any]:
            async with sem:
                r = await client.get(path)
                return r.status_code, r.json()

        return await asyncio.gather(*(one(p) for p in paths))


def test_a_burst_of_2000_loses_no_plan_inside_its_ttl(tiny_graph_path: Path, tmp_path: Path):
    """2,000 requests in one burst, half of them background plans, half waited (which used to
    fill the store and push the background plans out after 64): every accepted background plan
    is readable afterwards, finished, with the route its 202 promised; the store holds exactly
    what it accepted; a store smaller than the burst refuses the rest with 503 + Retry-After
    instead of dropping what it holds."""
    env = {
        "DUEROUTE_BACKGROUND_MAX": "700",
        "DUEROUTE_BACKGROUND_TTL_S": "300",
        # one caller (this test) with 64 requests in flight and hundreds of stored plans
        "DUEROUTE_CALLER_MAX_PLANS": "100000",
    }
    pairs = [(0, 3), (1, 6), (2, 9), (4, 0), (6, 1)]
    bodies = [
        body(*pairs[i % len(pairs)], wait=bool(i % 2)) for i in range(2000)
    ]  # odd: waited, even: background
    with LiveServer(tiny_graph_path, tmp_path, "--workers", "2", env=env) as srv:
        t0 = time.monotonic()
        answers = asyncio.run(_burst(srv.url, bodies))
        burst_s = time.monotonic() - t0
        background = [a for b, a in zip(bodies, answers, strict=True) if not b["wait"]]
        waited = [a for b, a in zip(bodies, answers, strict=True) if b["wait"]]
        accepted = [a for a in background if a[0] == 202]
        full = [a for a in background if a[0] == 503 and "plan store is full" in a[1]["detail"]]
        # admission control may shed a few in a burst (its worst-case schedule): not accepted,
        # and said so; everything else is accepted or refused by the store
        shed = [a for a in answers if a[0] == 503 and a[1]["detail"].startswith("overloaded")]
        assert len(accepted) + len(full) + sum(1 for a in background if a in shed) == 1000
        # the store holds exactly its limit: 700 accepted, the rest refused, none evicted
        assert len(accepted) == 700
        assert all(250 <= int(a[2]["retry-after"]) <= 300 for a in full)  # first expiry
        assert all(a[0] == 200 or a in shed for a in waited), {a[0] for a in waited}
        # every accepted plan is still there, finished (the graph is tiny), and whole
        got = asyncio.run(_get_all(srv.url, [a[2]["location"] for a in accepted]))
        assert [code for code, _ in got] == [200] * 700
        assert {plan["status"] for _, plan in got} == {"optimal"}
        assert all(plan["route"] is not None for _, plan in got)
        ready = httpx.get(srv.url + "/readyz").json()["detail"]["plan_store"]
        assert ready["plans"] == 700 and ready["running"] == 0
        assert ready["refused_total"] == len(full) and ready["expired_total"] == 0
        # a waited plan was answered in place and not kept: the 404 says exactly that
        r = httpx.get(srv.url + f"{PLAN}/{waited[0][1]['plan_id']}")
        assert r.status_code == 404 and "answered in place (wait=true) and not kept" in r.text
        metrics = httpx.get(srv.url + "/metrics").text
        assert f'dueroute_plan_store_refusals_total{{limit="plans"}} {len(full)}.0' in metrics
    print(
        f"\nburst of 2000 requests in {burst_s:.1f} s: 700 stored, {len(full)} refused by the "
        f"full store, {len(shed)} shed by admission control, none lost"
    )


def test_kept_waited_plans_and_the_exact_404_reasons(make_client, tiny_graph_path: Path):
    client = make_client(tiny_graph_path, background_ttl_s=0.6)
    kept = client.post(PLAN, json=body(0, 3, keep=True)).json()
    assert kept["status"] == "optimal"
    assert client.get(f"{PLAN}/{kept['plan_id']}").json()["cost_s"] == kept["cost_s"]
    unkept = client.post(PLAN, json=body(0, 3)).json()
    r = client.get(f"{PLAN}/{unkept['plan_id']}")
    assert r.status_code == 404 and "not kept; ask with keep=true" in r.json()["detail"]
    time.sleep(0.8)
    r = client.get(f"{PLAN}/{kept['plan_id']}")
    assert r.status_code == 404 and "has expired" in r.json()["detail"]
    # an id of the right shape signed by another store is unknown, not expired
    from dueroute.service.server.plan_store import PlanIds

    foreign = PlanIds().new(kept=True)
    r = client.get(f"{PLAN}/{foreign}")
    assert r.status_code == 404 and "did not issue it" in r.json()["detail"]


def test_a_stored_plan_counts_what_it_holds(make_client, grid_graph_path: Path):
    """The byte estimate of a finished plan is its JSON plus the held trace (so a plan with a
    long route counts more than one with a short route), and running plans count a reserve."""
    client = make_client(grid_graph_path)
    store = client.app.state.dueroute.plans
    r = client.post(PLAN, json=body(0, 89_999, wait=False, controller="fixed:2"))
    with client.stream("GET", r.headers["location"] + "/events") as resp:
        resp.read()
    long_plan = client.get(r.headers["location"])
    r2 = client.post(PLAN, json=body(0, 1, wait=False))
    with client.stream("GET", r2.headers["location"] + "/events") as resp:
        resp.read()
    stats = store.stats()
    assert stats["plans"] == 2 and stats["running"] == 0
    assert stats["bytes"] > len(long_plan.content)  # the JSON is held, and a bit more
    job = store.lookup(long_plan.json()["plan_id"]).job
    assert job.final is None  # no request waits for the dict: only the JSON is held
    assert job.estimated_bytes() >= len(long_plan.content)


# ------------------------------------------------------------------------------------------
# Failures inside a job


class _Failing:
    """A controller that raises when the search asks it for its first weight, after the
    instant route (a stand-in for any fault in a search; a search this short may be proven in
    its first step, before any later decision)."""

    name, mode = "failing", "weighted"

    def reset(self, seed: Any) -> float:
        raise IndexError("index 123456 is out of bounds for axis 0 with size 20")

    def decide(self, features: Any, stats: Any) -> float:
        return 2.0


def _events(text: str) -> list[tuple[str, dict[str, Any]]]:
    out = []
    for block in text.strip().split("\n\n"):
        fields = dict(
            line.split(": ", 1) for line in block.splitlines() if line and not line.startswith(":")
        )
        if "event" in fields:
            out.append((fields["event"], json.loads(fields["data"])))
    return out


@pytest.mark.parametrize("where", ["search", "geometry"])
def test_a_failing_job_ends_in_error_and_frees_its_worker(
    make_client, grid_graph_path: Path, monkeypatch, where: str
):
    """Whatever fails (the search itself, or building the route geometry after it), a waited
    plan answers 500 saying what failed, a background plan ends with status 'error', its event
    stream ends with a final event, no worker stays busy and the next plans are served."""
    import dueroute.service.server.jobs as jobs

    client = make_client(grid_graph_path, workers=1)
    state = client.app.state.dueroute
    if where == "search":
        monkeypatch.setattr(state.engine, "make_controller", lambda spec, policy: _Failing())
        words = "the search failed: IndexError: index 123456 is out of bounds"
    else:

        def broken(graph: Any, nodes: Any, edges: Any, *args: Any) -> Any:
            return graph.geom_lat[np.asarray([10**9])]  # an index past the geometry

        monkeypatch.setattr(jobs, "route_feature", broken)
        words = "building the answer failed: IndexError"
    far = body(0, 89_999, controller="fixed:2")
    r = client.post(PLAN, json=far)
    assert r.status_code == 500, r.text
    assert words in r.json()["detail"] and "goes on serving" in r.json()["detail"]
    for _ in range(3):  # more than the one worker: none is left wedged
        r = client.post(PLAN, json={**far, "wait": False})
        assert r.status_code == 202
        url = r.headers["location"]
        with client.stream("GET", url + "/events") as resp:
            events = _events(resp.read().decode())
        assert events[-1][0] == "final" and events[-1][1]["status"] == "error"
        plan = client.get(url).json()
        assert plan["status"] == "error" and words in plan["error"] and plan["route"] is None
    # the worker hands its slot back just after it published the final plan
    end = time.monotonic() + 5.0
    while state.admission.busy and time.monotonic() < end:
        time.sleep(0.01)
    assert state.admission.busy == 0 and state.admission.queued == 0
    assert state.plans.stats()["running"] == 0
    monkeypatch.undo()
    ok = client.post(PLAN, json=body(0, 3))
    assert ok.status_code == 200 and ok.json()["status"] == "optimal"
    assert 'dueroute_plans_total{outcome="error"} 1.0' in client.get("/metrics").text


def test_a_graph_with_geometry_out_of_range_is_refused_at_start(tmp_path: Path):
    """The loader checks every index array against the range it indexes; a graph whose
    geometry pointer runs past its geometry points never becomes ready: /readyz says why,
    naming the array (and the file by its name only), and POST /v1/plans says the failure is
    permanent (no Retry-After, no 'retry shortly')."""
    graph = make_tiny_graph()
    gi = np.asarray(graph.geom_indptr).copy()
    gi[-1] += 5  # points 5 past the last interior point
    bad = save_graph(dataclasses.replace(graph, geom_indptr=gi), tmp_path / "bad-geom.npz")
    with pytest.raises(Exception, match="geom_indptr"):
        load_graph(bad)
    srv = LiveServer(bad, tmp_path)
    try:
        end = time.monotonic() + 60
        while time.monotonic() < end:
            try:
                r = httpx.get(srv.url + "/readyz", timeout=2)
                if r.json().get("status") == "failed":
                    break
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        assert r.status_code == 503 and r.json()["status"] == "failed"
        error = r.json()["detail"]["error"]
        assert "CorruptGraphFile" in error and "geom_indptr" in error and "bad-geom.npz" in error
        assert str(tmp_path) not in r.text  # names, not server paths
        p = httpx.post(srv.url + PLAN, json=body(0, 3))
        assert p.status_code == 503 and "retry-after" not in p.headers
        assert "geom_indptr" in p.json()["detail"] and "retry shortly" not in p.json()["detail"]
        assert "retrying will not help" in p.json()["detail"]
    finally:
        srv.stop()
