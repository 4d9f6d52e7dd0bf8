"""The deadline promise at the HTTP edge, against a real ``dueroute serve`` process.

What is checked (each against the standard it follows):

* a deadline below the service's floor is refused at once with 503 + ``Retry-After``
  (RFC 9110 section 15.6.4) and a message naming the floor in ms;
* a waited plan whose client hangs up stops its search and frees its slot;
* headers or a body that do not arrive in time get ``408 Request Timeout`` (RFC 9110 section
  15.5.9) and the connection is closed; connections above the bound get 503 and are closed;
* per-caller limits: 429 Too Many Requests (RFC 6585 section 4) with Retry-After for plans at
  once, 403 for the anonymous caps, 401 for an unknown API key; a known key lifts the caps.

No wall-clock time is asserted: the waits below are generous timeouts that only end a broken
test (timing targets live in ``dueroute loadtest``).
"""

from __future__ import annotations

import asyncio
import json
import socket
import time
from collections.abc import Iterator
from typing import Any

import httpx
import pytest

from dueroute.planner.graph import save_graph
from tests.service.conftest import LiveServer, make_grid_graph

WAIT_S = 20.0


def _plan(origin: int, destination: int, **extra: Any) -> dict[str, Any]:
    return {"origin": {"node": origin}, "destination": {"node": destination}, **extra}


def _admission(url: str) -> dict[str, Any]:
    return dict(httpx.get(url + "/readyz", timeout=5).json()["detail"]["admission"])


def _metric(url: str, name: str) -> float:
    for line in httpx.get(url + "/metrics", timeout=5).text.splitlines():
        if line.startswith(name + " ") or line.startswith(name + "{"):
            return float(line.rsplit(" ", 1)[1])
    return 0.0


def _read_answer(sock: socket.socket) -> tuple[int, bytes]:
    """Status and everything read until the server closes the connection."""
    sock.settimeout(WAIT_S)
    data = b""
    while True:
        chunk = sock.recv(65536)
        if not chunk:
            break
        data += chunk
    status = int(data.split(b" ", 2)[1]) if data else 0
    return status, data


@pytest.fixture(scope="module")
def edge_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    # a 1000 x 1000 grid: corner to corner, A* without landmarks runs long enough (hundreds
    # of ms) to be watched while it runs
    tmp = tmp_path_factory.mktemp("edge")
    graph = save_graph(make_grid_graph(side=1000), tmp / "grid1000.npz")
    keys = tmp / "keys.txt"
    keys.write_text("# name:key\nfleet:k-0123456789abcdef\n")
    env = {
        "DUEROUTE_HEADER_TIMEOUT_S": "0.5",
        "DUEROUTE_BODY_TIMEOUT_S": "0.5",
        "DUEROUTE_MAX_CONNECTIONS": "12",
        "DUEROUTE_CALLER_MAX_PLANS": "2",
        "DUEROUTE_API_KEYS_FILE": str(keys),
    }
    with LiveServer(graph, tmp, "--workers", "1", env=env) as srv:
        yield srv


def test_a_deadline_below_the_floor_is_refused_at_once_naming_it(edge_server):
    r = httpx.post(edge_server.url + "/v1/plans", json=_plan(0, 5, deadline_ms=1), timeout=5)
    assert r.status_code == 503
    assert int(r.headers["retry-after"]) >= 1
    detail = r.json()["detail"]
    assert "below this service's floor of" in detail and " ms" in detail, detail
    assert _metric(edge_server.url, 'dueroute_refusals_total{reason="floor"}') >= 1


def test_a_client_that_hangs_up_stops_its_search(edge_server):
    before = _metric(edge_server.url, "dueroute_client_disconnects_total")
    body = json.dumps(_plan(0, 999_999, deadline_ms=20_000, controller="fixed:1")).encode()
    sock = socket.create_connection(("127.0.0.1", edge_server.port))
    sock.sendall(
        b"POST /v1/plans HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
        + f"Content-Length: {len(body)}\r\n\r\n".encode()
        + body
    )
    end = time.monotonic() + WAIT_S
    while _admission(edge_server.url)["busy"] == 0 and time.monotonic() < end:
        time.sleep(0.01)
    assert _admission(edge_server.url)["busy"] == 1  # the search runs (a 20 s deadline)
    sock.close()
    while _admission(edge_server.url)["in_flight"] > 0 and time.monotonic() < end:
        time.sleep(0.01)
    assert _admission(edge_server.url)["in_flight"] == 0  # stopped long before its deadline
    assert _metric(edge_server.url, "dueroute_client_disconnects_total") == before + 1


def test_headers_that_do_not_arrive_get_408_and_a_closed_connection(edge_server):
    sock = socket.create_connection(("127.0.0.1", edge_server.port))
    sock.sendall(b"POST /v1/plans HTTP/1.1\r\nHost: x\r\n")  # and nothing more
    status, data = _read_answer(sock)
    sock.close()
    assert status == 408 and b"headers did not arrive within 0.5 s" in data


def test_a_connection_that_never_sends_is_closed(edge_server):
    sock = socket.create_connection(("127.0.0.1", edge_server.port))
    status, data = _read_answer(sock)
    sock.close()
    assert status == 408


def test_a_body_that_does_not_arrive_gets_408(edge_server):
    sock = socket.create_connection(("127.0.0.1", edge_server.port))
    sock.sendall(
        b"POST /v1/plans HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
        b'Content-Length: 200\r\n\r\n{"origin": '
    )
    status, data = _read_answer(sock)
    sock.close()
    assert status == 408 and b"body did not arrive within 0.5 s" in data


def test_connections_above_the_bound_are_refused(edge_server):
    held = [socket.create_connection(("127.0.0.1", edge_server.port)) for _ in range(12)]
    try:
        extra = socket.create_connection(("127.0.0.1", edge_server.port))
        status, data = _read_answer(extra)
        extra.close()
        assert status == 503 and b"too many open connections (limit 12)" in data
    finally:
        for s in held:
            s.close()
    time.sleep(0.2)  # the server notices the closed connections
    assert httpx.get(edge_server.url + "/healthz", timeout=5).status_code == 200


def test_caller_limits(edge_server):
    url = edge_server.url + "/v1/plans"
    # anonymous: a slow controller is capped at 1 s, any deadline at 30 s
    r = httpx.post(url, json=_plan(0, 5, deadline_ms=60_000, controller="fixed:5"), timeout=5)
    assert r.status_code == 403 and "anonymous callers" in r.json()["detail"]
    # an unknown key is refused, a known one lifts the anonymous caps
    r = httpx.post(url, json=_plan(0, 5, deadline_ms=50), headers={"X-API-Key": "nope"})
    assert r.status_code == 401 and "unknown API key" in r.json()["detail"]
    fleet = {"X-API-Key": "k-0123456789abcdef"}
    r = httpx.post(
        url, json=_plan(0, 5, deadline_ms=2_000, controller="fixed:5"), headers=fleet, timeout=10
    )
    assert r.status_code == 200 and r.json()["route"] is not None

    # at most 2 plans at once per caller: of many sent at once, the third and later get 429
    # with Retry-After while the first two search (corner to corner: hundreds of ms)
    async def burst() -> list[httpx.Response]:
        async with httpx.AsyncClient(headers=fleet, timeout=WAIT_S) as client:
            return await asyncio.gather(
                *(client.post(url, json=_plan(0, 999_999 - i, deadline_ms=3_000)) for i in range(8))
            )

    answers = asyncio.run(burst())
    limited = [r for r in answers if r.status_code == 429]
    assert len(limited) >= 1 and {r.status_code for r in answers} <= {200, 429}
    assert all(int(r.headers["retry-after"]) >= 1 for r in limited)
    assert "too many plans at once for this caller" in limited[0].json()["detail"]
    # other callers are not affected
    r = httpx.post(url, json=_plan(0, 7, deadline_ms=200), timeout=5)
    assert r.status_code == 200


def test_the_named_load_test_scenarios_run_against_a_real_server(edge_server):
    """``dueroute loadtest --scenario attack|slow-clients`` in small: the polite caller is
    measured alone and under the misbehaving clients; the anonymous abusers' 60 s fixed:5
    requests are refused by the cap (403), the stalled connections closed with 408."""
    from dueroute.service.loadtest.scenarios import ScenarioConfig, markdown, run_scenario

    queries = [(0, 5), (10, 2_000), (7, 30_000)]
    attack = ScenarioConfig(
        url=edge_server.url, scenario="attack", deadline_ms=50, duration_s=1.0, abusers=1
    )
    summary = asyncio.run(run_scenario(attack, queries))
    alone, under = summary["polite"]
    assert alone["requests"] > 0 and under["requests"] > 0
    assert set(summary["abuser_outcomes"][0]) == {"403"}
    assert "| under attack |" in markdown(summary)
    slow = ScenarioConfig(
        url=edge_server.url, scenario="slow-clients", duration_s=1.0, slow_connections=6
    )
    summary = asyncio.run(run_scenario(slow, queries))
    assert summary["slow_outcomes"].get("closed by the service with 408", 0) == 6
    assert summary["polite"][1]["requests"] > 0


def test_the_load_testers_lean_client_reads_what_the_service_sends(edge_server):
    """The load tester's own HTTP/1.1 client (RFC 9112 framing: Content-Length bodies on a
    kept-alive connection) gets the same answers as httpx."""
    from dueroute.service.loadtest.lean_http import LeanClient

    async def ask() -> list[Any]:
        client = LeanClient(edge_server.url)
        try:
            ok = await client.post("/v1/plans", json=_plan(0, 7, deadline_ms=200), timeout=10)
            bad = await client.post("/v1/plans", json={"origin": 1}, timeout=10)
            again = await client.post("/v1/plans", json=_plan(3, 9, deadline_ms=200), timeout=10)
            return [ok, bad, again, len(client._idle)]
        finally:
            await client.aclose()

    ok, bad, again, idle = asyncio.run(ask())
    reference = httpx.post(edge_server.url + "/v1/plans", json=_plan(0, 7, deadline_ms=200))
    assert ok.status_code == 200 and ok.json()["cost_s"] == reference.json()["cost_s"]
    assert ok.json()["route"]["type"] == "Feature"
    assert bad.status_code == 422 and "origin" in bad.json()["detail"]
    assert again.status_code == 200 and idle == 1  # one connection, kept alive throughout


def test_a_bad_api_keys_file_stops_the_start_with_a_message(tmp_path, tiny_graph_path):
    from dueroute.planner.errors import InvalidRequest
    from dueroute.service.server.app import create_app
    from tests.service.conftest import settings_for

    missing = settings_for(tiny_graph_path, tmp_path, api_keys_file=tmp_path / "none.txt")
    with pytest.raises(InvalidRequest, match="cannot read the API keys file .*none.txt"):
        create_app(missing)
    bad = tmp_path / "keys.txt"
    bad.write_text("fleet:short\n")
    with pytest.raises(InvalidRequest, match=r"keys.txt:1: expected 'name:key' with a key of"):
        create_app(settings_for(tiny_graph_path, tmp_path, api_keys_file=bad))
