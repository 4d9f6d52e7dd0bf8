"""Deadline adherence against a real ``dueroute serve`` process, measured by the client.

One uvicorn process (2 worker threads, the grid graph, controller ``fixed:1`` = A*, which on
this graph usually runs into a 20 ms deadline) is loaded in a closed loop by a minimal asyncio
HTTP/1.1 client in this process:

* at concurrency 2 x workers no accepted answer may be later than deadline + tolerance;
* at 8 x overload the excess must be shed with 503 + ``Retry-After`` (RFC 9110 section 10.2.3)
  and still nothing accepted may be late.

The promise is ``DUEROUTE_DEADLINE_TOLERANCE_MS`` = 5 ms, measured at the server (arrival to
answer built). The client's clock also counts its own event loop and the loopback socket, and
this machine is shared (2 cores, other jobs running), so the assertion allows
``CI_MARGIN_MS`` on top (common practice for timing checks on shared CI machines); the real
numbers — late counts beyond the bare 5 ms, p50/p99 of the HTTP overhead (answer time minus
search time) — are printed with ``-s``.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import re
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from tests.service.conftest import LiveServer

_STATUS = re.compile(r'"status":"(\w+)"')  # the plan's status comes first in the body

WORKERS = 2
DEADLINE_MS = 20
TOLERANCE_MS = 5.0
#: Allowance for a shared, oversubscribed CI machine on top of the promised tolerance; set
#: DUEROUTE_TEST_LATE_MARGIN_MS=0 on a quiet machine to check the bare 5 ms promise.
CI_MARGIN_MS = float(os.environ.get("DUEROUTE_TEST_LATE_MARGIN_MS", "100"))
DURATION_S = 3.0


class _Connection:
    """A minimal keep-alive HTTP/1.1 client on asyncio streams (RFC 9112 message framing).

    The measuring client must cost as little CPU as possible on a 2-core machine that also
    runs the server, so it sends pre-encoded requests and reads ``Content-Length`` bodies.
    """

    def __init__(self, host: str, port: int) -> None:
        self.host, self.port = host, port
        self.reader: asyncio.StreamReader | None = None
        self.writer: asyncio.StreamWriter | None = None

    async def post(self, path: str, body: bytes) -> tuple[int, dict[str, str], bytes]:
        if self.writer is None:
            self.reader, self.writer = await asyncio.open_connection(self.host, self.port)
        assert self.reader is not None
        head = (
            f"POST {path} HTTP/1.1\r\nHost: {self.host}:{self.port}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n"
        )
        self.writer.write(head.encode() + body)
        raw = await self.reader.readuntil(b"\r\n\r\n")
        lines = raw.decode("latin-1").split("\r\n")
        status = int(lines[0].split(" ", 2)[1])
        headers = {}
        for line in lines[1:]:
            if ":" in line:
                k, v = line.split(":", 1)
                headers[k.strip().lower()] = v.strip()
        data = await self.reader.readexactly(int(headers.get("content-length", "0")))
        if headers.get("connection", "").lower() == "close":
            await self.close()
        return status, headers, data

    async def close(self) -> None:
        if self.writer is not None:
            self.writer.close()
            with contextlib.suppress(OSError):
                await self.writer.wait_closed()
        self.reader = self.writer = None


async def _closed_loop(url: str, concurrency: int, duration_s: float, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    pairs = rng.integers(0, 90_000, size=(5000, 2))
    records: list[dict[str, Any]] = []
    end = time.perf_counter() + duration_s
    host, port = url.removeprefix("http://").split(":")

    async def one(k: int) -> None:
        conn = _Connection(host, int(port))
        i = k
        try:
            while time.perf_counter() < end:
                o, d = (int(x) for x in pairs[i % len(pairs)])
                i += concurrency
                payload = json.dumps(
                    {
                        "origin": {"node": o},
                        "destination": {"node": d},
                        "deadline_ms": DEADLINE_MS,
                        "controller": "fixed:1",
                    }
                ).encode()
                t0 = time.perf_counter()
                status, headers, data = await conn.post("/v1/plans", payload)
                latency_ms = (time.perf_counter() - t0) * 1000.0
                rec: dict[str, Any] = {"status": status, "latency_ms": latency_ms}
                if status == 200:
                    # timings from the Server-Timing header: no need to parse the route
                    for part in headers["server-timing"].split(","):
                        name, dur = part.strip().split(";dur=")
                        rec[f"{name}_ms"] = float(dur)
                    found = _STATUS.search(data[:200].decode())
                    rec["plan_status"] = found.group(1) if found else None
                elif status == 503:
                    rec["retry_after"] = headers.get("retry-after")
                    rec["detail"] = json.loads(data)["detail"]
                records.append(rec)
                if status == 503:
                    await asyncio.sleep(0.01)  # a real client backs off; keep it brief
        finally:
            await conn.close()

    await asyncio.gather(*(one(k) for k in range(concurrency)))
    return records


def _wakeup_lag_ms(seconds: float = 0.5) -> tuple[float, float]:
    """(p99, max) lateness of a bare 1 ms sleep here and now: the machine's own noise floor."""
    lags = []
    end = time.perf_counter() + seconds
    while time.perf_counter() < end:
        t0 = time.perf_counter()
        time.sleep(0.001)
        lags.append((time.perf_counter() - t0 - 0.001) * 1000.0)
    return float(np.percentile(lags, 99)), float(max(lags))


def _report(name: str, records: list[dict]) -> dict[str, Any]:
    ok = [r for r in records if r["status"] == 200]
    shed = [r for r in records if r["status"] == 503]
    lat = np.array([r["latency_ms"] for r in ok])
    server = np.array([r["total_ms"] for r in ok])
    overhead = np.array([r["latency_ms"] - r["search_ms"] for r in ok])
    late_client = lat - DEADLINE_MS
    lag_p99, lag_max = _wakeup_lag_ms()
    out = {
        "load_avg_1min": os.getloadavg()[0],
        "sleep_1ms_lag_p99_ms": lag_p99,
        "sleep_1ms_lag_max_ms": lag_max,
        "requests": len(records),
        "accepted": len(ok),
        "shed": len(shed),
        "other": len(records) - len(ok) - len(shed),
        "ran_to_deadline": sum(1 for r in ok if r["plan_status"] in ("improved", "instant")),
        "late_client_gt_tol": int(np.sum(late_client > TOLERANCE_MS)),
        "late_client_gt_tol_plus_margin": int(np.sum(late_client > TOLERANCE_MS + CI_MARGIN_MS)),
        "late_server_gt_tol": int(np.sum(server - DEADLINE_MS > TOLERANCE_MS)),
        "late_server_gt_tol_plus_margin": int(
            np.sum(server - DEADLINE_MS > TOLERANCE_MS + CI_MARGIN_MS)
        ),
        "max_over_deadline_client_ms": float(late_client.max()) if ok else None,
        "max_over_deadline_server_ms": float((server - DEADLINE_MS).max()) if ok else None,
        "latency_p50_ms": float(np.percentile(lat, 50)) if ok else None,
        "latency_p99_ms": float(np.percentile(lat, 99)) if ok else None,
        "overhead_p50_ms": float(np.percentile(overhead, 50)) if ok else None,
        "overhead_p99_ms": float(np.percentile(overhead, 99)) if ok else None,
        "queue_p99_ms": float(np.percentile([r["queue_ms"] for r in ok], 99)) if ok else None,
    }
    print(
        f"\n[{name}] "
        + ", ".join(f"{k}={v:.2f}" if isinstance(v, float) else f"{k}={v}" for k, v in out.items())
    )
    return out


@pytest.fixture(scope="module")
def server(grid_graph_path: Path, tmp_path_factory: pytest.TempPathFactory):
    tmp = tmp_path_factory.mktemp("live")
    with LiveServer(grid_graph_path, tmp, "--workers", str(WORKERS)) as srv:
        yield srv


def _check_refusals(records: list[dict[str, Any]]) -> None:
    """Every 503 is sent with Retry-After (RFC 9110 section 10.2.3) and says why: shed by
    the admission predictor, or a deadline below the service's measured floor."""
    shed = [r for r in records if r["status"] == 503]
    assert all(r["retry_after"] is not None and int(r["retry_after"]) >= 1 for r in shed)
    assert all("overloaded" in r["detail"] or "floor" in r["detail"] for r in shed), {
        r["detail"][:60] for r in shed
    }


def test_concurrency_twice_the_workers_is_never_late(server: LiveServer):
    """How many are searched and how many shed depends on this machine's speed (printed);
    what must hold anywhere: no answer but 200 or 503, none late, every refusal explained."""
    records = asyncio.run(_closed_loop(server.url, 2 * WORKERS, DURATION_S, seed=1))
    rep = _report(f"concurrency {2 * WORKERS}", records)
    assert rep["other"] == 0, [r for r in records if r["status"] not in (200, 503)][:3]
    assert rep["accepted"] > 0
    _check_refusals(records)
    assert rep["late_server_gt_tol_plus_margin"] == 0
    assert rep["late_client_gt_tol_plus_margin"] == 0


def test_overload_is_shed_and_nothing_accepted_is_late(server: LiveServer):
    records = asyncio.run(_closed_loop(server.url, 8 * WORKERS, DURATION_S, seed=2))
    rep = _report(f"overload {8 * WORKERS}", records)
    assert rep["other"] == 0
    assert rep["accepted"] > 0
    _check_refusals(records)
    assert rep["late_server_gt_tol_plus_margin"] == 0
    assert rep["late_client_gt_tol_plus_margin"] == 0


def test_http_overhead_at_concurrency_one(server: LiveServer):
    """Answer time minus search time with no queue: what HTTP, JSON and the hand-over cost
    (printed with -s). After the overload above, the floor the service measured under load
    may still refuse a few requests: it expires within seconds."""
    time.sleep(2.5)  # the floor's window (ResponseFloor: 2 s)
    records = asyncio.run(_closed_loop(server.url, 1, DURATION_S / 2, seed=3))
    rep = _report("concurrency 1", records)
    assert rep["other"] == 0 and rep["accepted"] > 0
    _check_refusals(records)
    assert rep["late_server_gt_tol_plus_margin"] == 0
    assert rep["late_client_gt_tol_plus_margin"] == 0


def test_live_background_plan_streams_and_logs_are_json(server: LiveServer):
    with httpx.Client(base_url=server.url, timeout=10.0) as client:
        r = client.post(
            "/v1/plans",
            json={
                "origin": {"node": 0},
                "destination": {"node": 89_999},
                "deadline_ms": 200,
                "wait": False,
            },
        )
        assert r.status_code == 202
        with client.stream("GET", r.headers["location"] + "/events") as resp:
            text = resp.read().decode()
        assert "event: final" in text
        metrics = client.get("/metrics").text
        assert "dueroute_sheds_total" in metrics
        counts = {
            line.split()[0]: float(line.split()[1])
            for line in metrics.splitlines()
            if line.startswith(("dueroute_late_answers_total", "dueroute_sheds_total"))
        }
        print(f"\n[server metrics after all load] {counts}")
    lines = server.log_lines()
    assert any(line.get("msg") == "ready" for line in lines)
    plans = [x for x in lines if x.get("msg") == "request" and x.get("path") == "/v1/plans"]
    assert plans and all("outcome" in x and "duration_ms" in x for x in plans)
    assert any(x["outcome"] == "shed" for x in plans) and any("plan_id" in x for x in plans)
