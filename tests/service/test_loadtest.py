"""Tests of the load tester (``service/loadtest/runner.py`` and ``dueroute loadtest``).

The client is tested against a small in-test HTTP double of the plan API (the contract is
``dueroute.service.server.schemas`` and the OpenAPI document it publishes) that answers with routes computed by scipy, so that every number
the load tester reports can be checked against an independent source.
"""

from __future__ import annotations

import asyncio
import json
import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import build_graph, save_graph
from dueroute.service.cli.main import main
from dueroute.service.loadtest import runner as lt

# --------------------------------------------------------------------------------------------
# Fixtures: a tiny grid graph and an HTTP double of the plan API


def _grid_graph(side: int = 5, one_way_node: int | None = None) -> Any:
    """side x side grid, roads both ways; a node may get only incoming roads (unreachable)."""
    n = side * side
    lat = np.repeat(np.arange(side) * 0.001, side) + 47.0
    lon = np.tile(np.arange(side) * 0.0013, side) + 8.0
    tail, head, length = [], [], []
    rng = np.random.default_rng(3)
    for r in range(side):
        for c in range(side):
            i = r * side + c
            for dr, dc in ((0, 1), (1, 0)):
                rr, cc = r + dr, c + dc
                if rr < side and cc < side:
                    j = rr * side + cc
                    d = float(rng.uniform(80, 160))
                    for a, b in ((i, j), (j, i)):
                        if one_way_node is not None and a == one_way_node:
                            continue
                        tail.append(a)
                        head.append(b)
                        length.append(d)
    m = len(tail)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(1000, 1000 + n, dtype=np.int64),
        tail=np.array(tail),
        head=np.array(head),
        length_m=np.array(length),
        speed_kph=np.full(m, 50.0),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        meta={"name": "test-grid", "road_classes": ["residential"]},
        spatial_order=False,
    )


@pytest.fixture(scope="module")
def graph() -> Any:
    return _grid_graph()


class PlanDouble:
    """Implements the parts of the plan API the load tester uses, with scipy routes.

    ``detour_every``: every k-th answer goes through a detour node (a real path, not optimal);
    ``shed_every`` / ``fail_every``: every k-th request is shed (503) / fails (500);
    ``sleep_ms``: extra delay before answering (to make answers late on purpose).
    """

    def __init__(
        self,
        graph: Any,
        *,
        detour_every: int = 0,
        shed_every: int = 0,
        fail_every: int = 0,
        sleep_ms: float = 0.0,
        fingerprint: str | None = None,
    ) -> None:
        self.graph = graph
        self.csr = graph.csr()
        self.dist, self.pred = dijkstra(self.csr, directed=True, return_predecessors=True)
        self.detour_every = detour_every
        self.shed_every = shed_every
        self.fail_every = fail_every
        self.sleep_ms = sleep_ms
        self.fingerprint = graph.fingerprint if fingerprint is None else fingerprint
        self.count = 0
        self.shed = 0
        self.failed = 0
        self.answers: list[dict[str, Any]] = []
        self.lock = threading.Lock()

    def _path(self, o: int, d: int) -> list[int]:
        out = [d]
        while out[-1] != o:
            out.append(int(self.pred[o, out[-1]]))
        return out[::-1]

    def plan(self, body: dict[str, Any]) -> tuple[int, dict[str, Any], dict[str, str]]:
        with self.lock:
            self.count += 1
            k = self.count
        if self.shed_every and k % self.shed_every == 0:
            with self.lock:
                self.shed += 1
            return 503, {"detail": "busy"}, {"Retry-After": "0"}
        if self.fail_every and k % self.fail_every == 0:
            with self.lock:
                self.failed += 1
            return 500, {"detail": "boom"}, {}
        o, d = body["origin"]["node"], body["destination"]["node"]
        if not (0 <= o < self.graph.n_nodes and 0 <= d < self.graph.n_nodes):
            return 404, {"detail": "unknown node"}, {}
        if self.sleep_ms:
            time.sleep(self.sleep_ms / 1000.0)
        opt = float(self.dist[o, d])
        status, nodes, cost = "optimal", None, None
        if not np.isfinite(opt):
            status = "no_route"
        else:
            nodes = self._path(o, d)
            cost = opt
            if self.detour_every and k % self.detour_every == 0:
                # a detour through the node farthest from the origin that can reach d
                via = int(np.argmax(np.where(np.isfinite(self.dist[:, d]), self.dist[o], -1)))
                if via not in (o, d):
                    nodes = self._path(o, via)[:-1] + self._path(via, d)
                    cost = float(self.dist[o, via] + self.dist[via, d])
                    status = "improved"
        route = None
        if nodes is not None:
            route = {
                "type": "Feature",
                "geometry": {
                    "type": "LineString",
                    "coordinates": [
                        [float(self.graph.lon[i]), float(self.graph.lat[i])] for i in nodes
                    ],
                },
                "properties": {
                    "travel_time_s": cost,
                    "length_m": 0.0,
                    "node_ids": [int(self.graph.osm_id[i]) for i in nodes],
                    "node_indices": nodes,
                },
            }
        lower = opt if status == "optimal" else (0.9 * opt if cost is not None else 0.0)
        plan = {
            "plan_id": f"p{k}",
            "status": status,
            "origin_node": o,
            "destination_node": d,
            "route": route,
            "cost_s": cost,
            "lower_bound_s": lower,
            "gap": None if cost is None else (cost - lower) / cost,
            "improvements": [],
            "expansions": 10,
            "controller": body.get("controller", "learned"),
            "policy_sha256": None,
            "deadline_ms": body["deadline_ms"],
            "timings": {"queue_ms": 0.1, "search_ms": 1.0, "total_ms": 1.2},
        }
        with self.lock:
            self.answers.append(plan)
        return 200, plan, {}

    async def asgi(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        """A bare ASGI app (no framework): /readyz, /v1/policy, POST /v1/plans."""
        if scope["type"] == "lifespan":
            while True:
                msg = await receive()
                if msg["type"] == "lifespan.startup":
                    await send({"type": "lifespan.startup.complete"})
                elif msg["type"] == "lifespan.shutdown":
                    await send({"type": "lifespan.shutdown.complete"})
                    return
        body = b""
        while True:
            msg = await receive()
            body += msg.get("body", b"")
            if not msg.get("more_body"):
                break
        path, method = scope["path"], scope["method"]
        headers: dict[str, str] = {}
        if path == "/readyz":
            code, doc = (
                200,
                {"status": "ready", "detail": {"graph": {"fingerprint": self.fingerprint}}},
            )
        elif path == "/v1/policy":
            code, doc = 200, {"sha256": None, "source": "none"}
        elif path == "/v1/plans" and method == "POST":
            code, doc, headers = await asyncio.to_thread(self.plan, json.loads(body))
        else:
            code, doc = 404, {"detail": "not found"}
        raw = json.dumps(doc).encode()
        hdrs = [(b"content-type", b"application/json"), (b"content-length", str(len(raw)).encode())]
        hdrs += [(k.lower().encode(), v.encode()) for k, v in headers.items()]
        await send({"type": "http.response.start", "status": code, "headers": hdrs})
        await send({"type": "http.response.body", "body": raw})


@pytest.fixture
def served(graph: Any) -> Iterator[tuple[str, PlanDouble]]:
    """The double behind a real uvicorn server on a free loopback port (in this process)."""
    import uvicorn

    double = PlanDouble(graph, detour_every=3)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = uvicorn.Server(
        uvicorn.Config(
            double.asgi,
            host="127.0.0.1",
            port=port,
            log_level="warning",
            lifespan="off",
            interface="asgi3",
        )
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    for _ in range(200):  # bounded wait for the socket
        if server.started:
            break
        time.sleep(0.05)
    assert server.started, "test server did not start"
    try:
        yield f"http://127.0.0.1:{port}", double
    finally:
        server.should_exit = True
        thread.join(timeout=10)


def _run(coro: Any) -> Any:
    return asyncio.run(coro)


def _config(**kw: Any) -> lt.LoadTestConfig:
    base: dict[str, Any] = dict(
        url="http://127.0.0.1:8000",
        concurrency=(1, 2),
        deadlines_ms=(5, 20),
        duration_s=30.0,
        max_requests=12,
        warmup_requests=1,
        ready_timeout_s=5.0,
    )
    base.update(kw)
    return lt.LoadTestConfig(**base)


# --------------------------------------------------------------------------------------------
# Statistics against numpy


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=1, max_size=60),
    st.floats(0.0, 100.0),
)
def test_percentile_matches_numpy(values: list[float], q: float) -> None:
    """Reference: numpy.percentile with its default linear interpolation."""
    got = lt.percentile(sorted(values), q)
    assert got == pytest.approx(float(np.percentile(values, q)), rel=1e-9, abs=1e-6)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(0.0, 1e4, allow_nan=False), min_size=1, max_size=60))
def test_distribution_matches_numpy(values: list[float]) -> None:
    """Reference: numpy mean / percentile / min / max, and the CDF against numpy counts."""
    d = lt.distribution(values)
    assert d["n"] == len(values)
    assert d["mean"] == pytest.approx(float(np.mean(values)), rel=1e-9, abs=1e-9)
    for key, q in (("p50", 50), ("p95", 95), ("p99", 99)):
        assert d[key] == pytest.approx(float(np.percentile(values, q)), rel=1e-9, abs=1e-9)
    assert d["max"] == max(values) and d["min"] == min(values)
    xs, shares = lt.empirical_cdf(values)
    arr = np.asarray(values)
    for x, share in zip(xs, shares, strict=True):
        # the step CDF at x is at most the share of values <= x, at least the share < x
        assert np.mean(arr < x) < share <= np.mean(arr <= x) + 1e-12


def test_empty_statistics_are_none() -> None:
    assert lt.percentile([], 50) is None
    assert lt.distribution([])["p95"] is None
    with pytest.raises(ValueError, match=r"\[0, 100\]"):
        lt.percentile([1.0], 101)


# --------------------------------------------------------------------------------------------
# Safety: loopback only


@pytest.mark.parametrize(
    "url",
    [
        "http://127.0.0.1:8000",
        "http://127.9.8.7:1/",
        "http://localhost:8000",
        "https://LOCALHOST",
        "http://[::1]:8000",
    ],
)
def test_loopback_targets_are_accepted(url: str) -> None:
    """Reference: RFC 5735 / RFC 4291 loopback ranges (127.0.0.0/8, ::1), via ``ipaddress``."""
    assert lt.require_loopback(url) == url.rstrip("/")


@pytest.mark.parametrize(
    "url",
    [
        "http://example.com",
        "http://10.0.0.1:8000",
        "http://192.168.1.2",
        "http://0.0.0.0:8000",
        "http://[2001:db8::1]:80",
        "http://128.0.0.1",
        "http://localhost.example.com",
        "ftp://127.0.0.1",
        "127.0.0.1:8000",
        "http://user:pw@127.0.0.1",
    ],
)
def test_other_targets_are_refused(url: str) -> None:
    """Reference: RFC 5735 / RFC 4291 — only 127.0.0.0/8 and ::1 are loopback."""
    with pytest.raises(InvalidRequest):
        lt.require_loopback(url)


def test_cli_refuses_remote_target_with_one_line(tmp_path: Path, capsys: Any) -> None:
    q = tmp_path / "q.csv"
    q.write_text("origin,destination\n0,1\n")
    code = main(
        [
            "loadtest",
            "--url",
            "http://203.0.113.5:8000",
            "--queries",
            str(q),
            "--out",
            str(tmp_path / "o"),
        ]
    )
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("dueroute: error: refusing to load 203.0.113.5")
    assert not (tmp_path / "o").exists()


def test_bad_grid_values_are_refused() -> None:
    with pytest.raises(InvalidRequest, match="concurrency"):
        _config(concurrency=(0,))
    with pytest.raises(InvalidRequest, match="deadline_ms"):
        _config(deadlines_ms=(70_000,))
    with pytest.raises(InvalidRequest, match="duration"):
        _config(duration_s=float("inf"))


def test_cli_lists_are_comma_separated_and_checked(capsys: pytest.CaptureFixture[str]) -> None:
    """One list syntax: ``--concurrency 1,2``; a bad item exits 2 naming the option; the old
    spellings (``--deadlines``, ``--controller``, ``--random``) still parse, with a warning."""
    from dueroute.service.cli.main import build_parser

    parser = build_parser()
    args = parser.parse_args(
        ["loadtest", "--concurrency", "1,2", "--deadlines-ms", "5,10", "--out", "x"]
    )
    assert (args.concurrency, args.deadlines_ms, args.out) == ([1, 2], [5, 10], "x")
    with pytest.raises(SystemExit) as exc:
        parser.parse_args(["loadtest", "--concurrency", "1,two", "--out", "x"])
    assert (
        exc.value.code == 2
        and "--concurrency: 'two' is not a valid value" in capsys.readouterr().err
    )
    old = parser.parse_args(
        [
            "loadtest",
            "--deadlines",
            "5,20",
            "--controller",
            "ana,fixed:2",
            "--random",
            "7",
            "--out",
            "x",
        ]
    )
    assert (old.deadlines_ms, old.controllers, old.count) == ([5, 20], ["ana", "fixed:2"], 7)
    err = capsys.readouterr().err
    assert "--deadlines is deprecated; use --deadlines-ms" in err
    assert "--controller is deprecated; use --controllers" in err


# --------------------------------------------------------------------------------------------
# Queries


def test_random_pairs_are_reachable() -> None:
    """Reference: scipy.sparse.csgraph.dijkstra — every drawn pair has a finite distance.
    A 4x4 grid is too small for the trip mix, so the uniform fallback draws (and says so)."""
    g = _grid_graph(side=4, one_way_node=5)  # node 5 has no outgoing road: its own component
    pairs, source = lt.random_reachable_pairs(g, 200, seed=1)
    assert source.startswith("uniform in the largest component")
    assert len(pairs) == 200
    dist = dijkstra(g.csr(), directed=True)
    for o, d in pairs:
        assert o != d
        assert np.isfinite(dist[o, d]) and np.isfinite(dist[d, o])
        assert 5 not in (o, d)
    assert pairs == lt.random_reachable_pairs(g, 200, seed=1)[0]
    # every other node of the big component can be drawn (uniform, not a fixed subset)
    assert {n for p in pairs for n in p} == set(range(16)) - {5}


def test_random_pairs_use_the_project_query_sets(tmp_path: Path, monkeypatch: Any) -> None:
    """On the tiny demo region the pairs are demo_data.queries.sample_queries' pairs."""
    from dueroute.demo_data.build import demo_graph_path
    from dueroute.demo_data.queries import sample_queries
    from dueroute.planner.graph import load_graph

    monkeypatch.setenv("DUEROUTE_DATA_DIR", str(tmp_path))
    g = load_graph(demo_graph_path("tiny", progress=False))
    pairs, source = lt.random_reachable_pairs(g, 30, seed=2)
    assert source.startswith("dueroute.demo_data.queries.sample_queries")
    assert pairs == [tuple(map(int, p)) for p in sample_queries(g, 30, 2)]


# --------------------------------------------------------------------------------------------
# Runs against the double


def test_reference_quality_against_scipy(graph: Any) -> None:
    """Reference: scipy.sparse.csgraph.dijkstra. Quality = optimal / returned cost is <= 1,
    exactly 1 for answers proven optimal, and equals the scipy ratio for the detours."""
    double = PlanDouble(graph, detour_every=2)
    queries, _ = lt.random_reachable_pairs(graph, 30, seed=4)
    config = _config(concurrency=(2,), deadlines_ms=(10,), max_requests=40)
    reference = lt.Reference(graph, queries)
    result = _run(
        lt.run_loadtest(
            config,
            queries,
            graph=graph,
            reference=reference,
            transport=httpx.ASGITransport(app=double.asgi),
        )
    )
    dist = dijkstra(graph.csr(), directed=True)
    recs = result.cells[0].records
    assert len(recs) == 40 and all(r.answered for r in recs)
    statuses = {r.plan_status for r in recs}
    assert statuses == {"optimal", "improved"}  # both kinds were exercised
    for r in recs:
        expected = dist[r.origin, r.destination] / r.cost_s
        assert r.quality == pytest.approx(expected, rel=1e-12)
        assert r.quality <= 1.0 + 1e-12
        if r.plan_status == "optimal":
            assert r.quality == pytest.approx(1.0, abs=1e-12)
        else:
            assert r.quality < 1.0
        assert not r.route_mismatch and not r.cost_below_optimal and not r.bound_above_optimal
    s = lt.summarize_cell(result.cells[0], config.tolerance_ms)
    qs = [r.quality for r in recs]
    assert s["quality"]["mean"] == pytest.approx(float(np.mean(qs)))
    assert s["quality"]["p5"] == pytest.approx(float(np.percentile(qs, 5)))
    assert s["optimal_share"] == pytest.approx(np.mean([r.plan_status == "optimal" for r in recs]))


def test_reference_flags_a_route_from_another_graph(graph: Any) -> None:
    """A server on a different graph (costs scaled) is caught by the route check: the claimed
    cost is not the local path cost (reference: scipy dijkstra costs of the local graph)."""
    other = _grid_graph()
    double = PlanDouble(other, fingerprint=graph.fingerprint)
    double.dist = double.dist * 0.5  # the server believes every road is twice as fast
    queries, _ = lt.random_reachable_pairs(graph, 10, seed=2)
    result = _run(
        lt.run_loadtest(
            _config(concurrency=(1,), deadlines_ms=(10,), max_requests=10),
            queries,
            graph=graph,
            reference=lt.Reference(graph, queries),
            transport=httpx.ASGITransport(app=double.asgi),
        )
    )
    s = lt.summarize_cell(result.cells[0], 5.0)
    assert s["route_mismatches"] == 10
    assert s["cost_below_optimal"] == 10


def test_fingerprint_mismatch_stops_the_run(graph: Any) -> None:
    double = PlanDouble(graph, fingerprint="0" * 64)
    with pytest.raises(lt.TargetError, match="different graph"):
        _run(
            lt.run_loadtest(
                _config(),
                [(0, 1)],
                graph=graph,
                transport=httpx.ASGITransport(app=double.asgi),
            )
        )


def test_shed_and_errors_are_counted_exactly(graph: Any) -> None:
    """The double counts what it shed and failed; the client must report the same numbers."""
    double = PlanDouble(graph, shed_every=4, fail_every=7)
    config = _config(concurrency=(1, 3), deadlines_ms=(5,), max_requests=25, warmup_requests=0)
    result = _run(
        lt.run_loadtest(config, [(0, 24), (3, 7)], transport=httpx.ASGITransport(app=double.asgi))
    )
    cells = [lt.summarize_cell(c, config.tolerance_ms) for c in result.cells]
    assert [c["requests"] for c in cells] == [25, 25]
    assert sum(c["shed"] for c in cells) == double.shed > 0
    assert sum(c["errors"] for c in cells) == double.failed > 0
    assert (
        sum(c["answers"] for c in cells) == len(double.answers) == 50 - double.shed - double.failed
    )
    assert "HTTP 500: boom" in cells[0]["error_kinds"]


def test_late_answers_are_counted(graph: Any) -> None:
    """Answers that take longer than deadline + tolerance are late (client-measured)."""
    double = PlanDouble(graph, sleep_ms=40.0)
    config = _config(concurrency=(1,), deadlines_ms=(5,), max_requests=4, tolerance_ms=5.0)
    result = _run(
        lt.run_loadtest(config, [(0, 24)], transport=httpx.ASGITransport(app=double.asgi))
    )
    s = lt.summarize_cell(result.cells[0], config.tolerance_ms)
    # every answer slept 40 ms > 5 + 5 ms, so all are late whatever the machine's speed
    assert s["answers"] == 4 and s["late"] == 4 and s["late_share"] == 1.0
    # the double's own clock claims 1.2 ms: the server-side view is kept apart
    assert s["late_by_server_clock"] == 0 and s["server_latency_ms"]["p95"] == pytest.approx(1.2)


def test_a_refused_controller_stops_with_the_reason(graph: Any) -> None:
    double = PlanDouble(graph)
    with pytest.raises(lt.TargetError, match="controller 'learned'.*HTTP 404: unknown node"):
        _run(lt.run_loadtest(_config(), [(0, 999)], transport=httpx.ASGITransport(app=double.asgi)))


def test_cancelled_run_keeps_and_writes_what_it_measured(graph: Any, tmp_path: Path) -> None:
    """An interrupt (task cancelled, as asyncio.run does on Ctrl-C) leaves usable results."""
    double = PlanDouble(graph)
    config = _config(concurrency=(1,), deadlines_ms=(5, 10), max_requests=1000)
    result = lt.LoadTestResult(config=config, queries=[(0, 24)])

    async def go() -> None:
        task = asyncio.ensure_future(
            lt.run_loadtest(
                config,
                [(0, 24)],
                result=result,
                transport=httpx.ASGITransport(app=double.asgi),
                on_record=lambda rec: task.cancel() if len(result.cells[-1].records) >= 5 else None,
            )
        )
        with pytest.raises(asyncio.CancelledError):
            await task

    _run(go())
    assert len(result.cells) == 1 and not result.cells[0].complete
    assert len(result.cells[0].records) >= 5
    result.interrupted = True
    paths = lt.write_outputs(result, tmp_path)
    summary = json.loads(paths["summary_json"].read_text())
    assert summary["interrupted"] is True and summary["cells"][0]["answers"] >= 5
    assert "Interrupted" in paths["summary_md"].read_text()


def test_cli_run_against_a_local_server(
    served: tuple[str, PlanDouble], graph: Any, tmp_path: Path, capsys: Any
) -> None:
    """End to end over real HTTP: the run stops by itself (request cap) and writes every file."""
    url, double = served
    gpath = save_graph(graph, tmp_path / "g.npz")
    out = tmp_path / "out"
    code = main(
        [
            "loadtest",
            "--url", url,
            "--graph", str(gpath),
            "--count", "20",
            "--concurrency", "1,2",
            "--deadlines-ms", "5,20",
            "--controllers", "decreasing,fixed:1.5",
            "--duration", "60",
            "--max-requests", "6",
            "--warmup", "1",
            "--ready-timeout", "10",
            "--reference",
            "--out", str(out),
            "--json",
        ]
    )  # fmt: skip
    assert code == 0
    printed = json.loads(capsys.readouterr().out)
    summary = json.loads((out / "summary.json").read_text())
    assert printed["summary"]["cells"] == summary["cells"]
    assert len(summary["cells"]) == 2 * 2 * 2
    assert {c["controller"] for c in summary["cells"]} == {"decreasing", "fixed:1.5"}
    for c in summary["cells"]:
        assert c["requests"] == 6 and c["answers"] == 6 and c["complete"]
        assert c["quality"]["mean"] <= 1.0 + 1e-12
        assert c["route_mismatches"] == 0
    assert summary["graph_check"] == {
        "method": "fingerprint",
        "ok": True,
        "server": graph.fingerprint,
        "local": graph.fingerprint,
    }
    assert double.count == 2 * 1 + 8 * 6  # warm-up per controller + the cells, nothing more
    md = (out / "summary.md").read_text()
    assert md.count("\n| decreasing |") == 4 and "quality mean" in md
    for name in (
        "latency_vs_quality.png",
        "latency_cdf.png",
        "quality_vs_deadline.png",
        "overview.png",
    ):
        data = (out / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, ISO/IEC 15948)
    lines = (out / "requests.csv").read_text().strip().splitlines()
    assert len(lines) == 1 + 8 * 6


def test_cli_needs_queries_or_graph(tmp_path: Path, capsys: Any) -> None:
    code = main(["loadtest", "--out", str(tmp_path)])
    assert code == 2
    assert "no queries" in capsys.readouterr().err


@pytest.mark.parametrize("signame", ["SIGINT", "SIGTERM"])
def test_interrupted_cli_writes_what_it_measured(
    served: tuple[str, PlanDouble], tmp_path: Path, signame: str
) -> None:
    """Ctrl-C (SIGINT) or SIGTERM during a cell: exit 130, summary written, marked interrupted."""
    import signal
    import subprocess
    import sys

    url, double = served
    q = tmp_path / "q.csv"
    q.write_text("origin,destination\n0,24\n3,7\n")
    out = tmp_path / "out"
    exe = Path(sys.executable).with_name("dueroute")
    argv = [str(exe), "loadtest", "--url", url, "--queries", str(q), "--concurrency", "1",
            "--deadlines-ms", "5", "--duration", "120", "--warmup", "0", "--out", str(out)]  # fmt: skip
    proc = subprocess.Popen(
        argv,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        # a background process may inherit "ignore SIGINT"; a terminal's Ctrl-C does not
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )
    try:
        for _ in range(600):  # bounded wait until the cell is under way
            if double.count >= 20 or proc.poll() is not None:
                break
            time.sleep(0.05)
        assert proc.poll() is None, proc.stderr.read() if proc.stderr else ""
        proc.send_signal(getattr(signal, signame))
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, err
    assert "interrupted; writing the cells measured so far" in err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["interrupted"] is True
    (cell,) = summary["cells"]
    assert cell["complete"] is False and cell["requests"] >= 10
    assert (out / "summary.md").read_text().count("Interrupted") == 1


@pytest.mark.parametrize("costed", [False, True])
@pytest.mark.parametrize("seed", range(3))
def test_reference_optimum_under_turn_rules_is_the_legal_one(seed: int, costed: bool) -> None:
    """On a graph with turn restrictions (and turn costs), the load tester's optimum is the
    legal one: the networkx line-graph reference of tests/planner/test_turns.py, never below
    scipy's unrestricted ``csgraph.dijkstra``; the route-cost check is off when turns cost."""
    from dueroute.planner.turns import TurnCosts, TurnProfile
    from tests.planner.test_turns import Reference, random_road_graph

    g = random_road_graph(seed, max_side=4, n_restrictions=6)
    costs = TurnCosts(left_s=7.0, right_s=3.0, uturn_s=20.0) if costed else None
    pairs = [(s, t) for s in range(g.n_nodes) for t in range(g.n_nodes)]
    ref = lt.Reference(g, pairs, turn_profile=TurnProfile(costs=costs))
    assert ref.checks_path_cost == (not costed)
    legal = Reference(g, turn_costs=costs)
    lg = legal.line_graph()
    free = dijkstra(g.csr(), directed=True)
    for s in range(g.n_nodes):
        best = legal.shortest_from(lg, s)
        for t in range(g.n_nodes):
            want = 0.0 if s == t else float(best[t])
            assert ref.optimal_s[(s, t)] == pytest.approx(want, rel=1e-12)
            assert ref.optimal_s[(s, t)] >= free[s, t] * (1 - 1e-12)
