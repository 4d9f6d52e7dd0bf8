"""Named load-test scenarios: what a polite caller gets while others misbehave.

Each scenario runs a *polite* caller (closed loop, one request in flight, the scenario's
deadline) twice: alone (the baseline) and while the misbehaving clients run, and reports both
with the same statistics as a load-test cell (:func:`runner.summarize_cell`), so the effect of
the attack is the difference between two rows measured in one run.

* ``attack``: ``abusers`` callers, each from its own loopback address (127.0.0.2, ...: the
  service tells anonymous callers apart by address), loop a long trip with
  ``{"deadline_ms": 60000, "controller": "fixed:5"}`` as fast as they are answered.
* ``slow-clients``: ``slow_connections`` connections (from 127.0.0.9) that send part of a
  request's headers, or the headers and part of a body, and then nothing: what a slow or
  hostile client does to take the service's descriptors. Reports how many the service closed
  (408) or refused (503 at its connection bound) and how long they were held.
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.service.loadtest.runner import (
    CellResult,
    LoadTestConfig,
    Reference,
    RequestRecord,
    _one_request,
    apply_reference,
    distribution,
    require_loopback,
    summarize_cell,
    wait_ready,
)

SCENARIOS = ("attack", "slow-clients")


@dataclass(frozen=True)
class ScenarioConfig:
    url: str
    scenario: str
    deadline_ms: int = 50
    controller: str = "decreasing"
    duration_s: float = 10.0
    abusers: int = 2
    abuser_deadline_ms: int = 60_000
    abuser_controller: str = "fixed:5"
    slow_connections: int = 300
    tolerance_ms: float = 5.0
    ready_timeout_s: float = 60.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "url", require_loopback(self.url))
        if self.scenario not in SCENARIOS:
            raise InvalidRequest(
                f"unknown scenario {self.scenario!r}; allowed: {', '.join(SCENARIOS)}"
            )
        if not 1 <= self.abusers <= 100:
            raise InvalidRequest(f"--abusers must be in 1..100, got {self.abusers}")
        if not 1 <= self.slow_connections <= 5000:
            raise InvalidRequest(
                f"--slow-connections must be in 1..5000, got {self.slow_connections}"
            )
        if not 0 < self.duration_s <= 3600:
            raise InvalidRequest(f"--duration must be in (0, 3600] s, got {self.duration_s}")


def _client(url: str, address: str, timeout_s: float) -> Any:
    import httpx

    transport = httpx.AsyncHTTPTransport(local_address=address)
    return httpx.AsyncClient(base_url=url, transport=transport, timeout=timeout_s)


async def _polite(
    config: ScenarioConfig,
    queries: Sequence[tuple[int, int]],
    reference: Reference | None,
    label: str,
) -> dict[str, Any]:
    """The polite caller for ``duration_s``: one request at a time, from 127.0.0.1."""
    cell = CellResult(controller=config.controller, concurrency=1, deadline_ms=config.deadline_ms)
    lt = LoadTestConfig(url=config.url, tolerance_ms=config.tolerance_ms)
    kept: list[tuple[RequestRecord, dict[str, Any]]] = []
    async with _client(config.url, "127.0.0.1", config.deadline_ms / 1000 + 10) as client:
        t0 = time.perf_counter()
        i = 0
        while time.perf_counter() - t0 < config.duration_s:
            pair = queries[i % len(queries)]
            i += 1
            rec, retry_after, plan = await _one_request(
                client, lt, config.controller, 1, config.deadline_ms, pair, reference is not None
            )
            cell.records.append(rec)
            if plan is not None:
                kept.append((rec, plan))
            if retry_after is not None:  # shed: back off a little, as a polite client does
                await asyncio.sleep(min(retry_after, 0.02))
        cell.wall_s = time.perf_counter() - t0
        cell.complete = True
    if reference is not None:
        for rec, plan in kept:
            apply_reference(rec, reference, plan)
    out = summarize_cell(cell, config.tolerance_ms)
    out["phase"] = label
    return out


def _abuser_process(
    config: ScenarioConfig, address: str, pair: tuple[int, int], stop: Any, results: Any
) -> None:
    """An abuser in a process of its own, so that its client work never delays the polite
    caller's clock (they would share one event loop and one core otherwise)."""
    import os

    with contextlib.suppress(OSError):
        # This machine stands for the abusers' own machines too: their client work runs at
        # the lowest priority, so what is measured is what the service does with their
        # requests, not how much CPU their Python client takes from it.
        os.nice(19)
    outcomes = asyncio.run(_abuser(config, address, pair, stop))
    results.put(dict(outcomes))


async def _abuser(
    config: ScenarioConfig, address: str, pair: tuple[int, int], stop: Any
) -> Counter:
    """Loop one long, slow request as fast as it is answered (no back-off)."""
    import httpx

    outcomes: Counter = Counter()
    body = {
        "origin": {"node": pair[0]},
        "destination": {"node": pair[1]},
        "deadline_ms": config.abuser_deadline_ms,
        "controller": config.abuser_controller,
    }
    async with _client(config.url, address, config.abuser_deadline_ms / 1000 + 10) as client:
        while not stop.is_set():
            try:
                r = await client.post("/v1/plans", json=body)
                outcomes[str(r.status_code)] += 1
            except httpx.HTTPError as exc:
                outcomes[type(exc).__name__] += 1
                await asyncio.sleep(0.01)
    return outcomes


async def _slow_connection(host: str, port: int, index: int, stop: Any) -> dict[str, Any]:
    """One connection that stalls (headers or body), and what the service did with it."""
    t0 = time.perf_counter()
    try:
        reader, writer = await asyncio.open_connection(host, port, local_addr=("127.0.0.9", 0))
    except OSError as exc:
        return {"outcome": f"connect failed: {exc.strerror or exc}", "held_s": 0.0}
    if index % 2 == 0:
        writer.write(b"POST /v1/plans HTTP/1.1\r\nHost: x\r\n")  # headers never finished
    else:
        writer.write(
            b"POST /v1/plans HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
            b'Content-Length: 400\r\n\r\n{"origin": '  # body never finished
        )
    with contextlib.suppress(OSError):
        await writer.drain()
    outcome = "still open"
    read = asyncio.ensure_future(reader.read(4096))
    waiter = asyncio.ensure_future(stop.wait())
    done, _ = await asyncio.wait({read, waiter}, return_when=asyncio.FIRST_COMPLETED)
    if read in done:
        try:
            data = read.result()
        except OSError:
            data = b""
        if data.startswith(b"HTTP/1.1 "):
            outcome = f"closed by the service with {data.split(b' ', 2)[1].decode()}"
        else:
            outcome = "closed by the service"
    else:
        read.cancel()
    waiter.cancel()
    held = time.perf_counter() - t0
    writer.close()
    with contextlib.suppress(Exception):
        await writer.wait_closed()
    return {"outcome": outcome, "held_s": held}


def _long_trip(queries: Sequence[tuple[int, int]], reference: Reference | None) -> tuple[int, int]:
    if reference is None:
        return queries[0]
    import math

    def optimum(p: tuple[int, int]) -> float:
        v = reference.optimal_s.get(p, 0.0)
        return v if math.isfinite(v) else 0.0

    return max(queries, key=optimum)


async def run_scenario(
    config: ScenarioConfig,
    queries: Sequence[tuple[int, int]],
    reference: Reference | None = None,
    on_phase: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Run the scenario: the polite caller alone, then under the misbehaving clients."""
    import httpx

    if not queries:
        raise InvalidRequest("the scenario needs at least one query pair")
    async with httpx.AsyncClient(base_url=config.url, timeout=5.0) as probe:
        ready = await wait_ready(probe, config.ready_timeout_s)
    say = on_phase or (lambda _text: None)
    say("polite caller alone")
    alone = await _polite(config, queries, reference, "alone")
    stop = asyncio.Event()
    extra: dict[str, Any] = {}
    if config.scenario == "attack":
        import multiprocessing

        pair = _long_trip(queries, reference)
        say(f"polite caller with {config.abusers} abusers")
        ctx = multiprocessing.get_context("spawn")
        halt, answers = ctx.Event(), ctx.Queue()
        procs = [
            ctx.Process(
                target=_abuser_process,
                args=(config, f"127.0.0.{2 + i}", pair, halt, answers),
                daemon=True,
            )
            for i in range(config.abusers)
        ]
        for proc in procs:
            proc.start()
        await asyncio.sleep(2.0)  # the abusers have started (spawn imports) and are sending
        under = await _polite(config, queries, reference, "under attack")
        halt.set()
        outcomes: list[dict[str, Any]] = []
        for _ in procs:
            with contextlib.suppress(Exception):
                outcomes.append(await asyncio.to_thread(answers.get, True, 30.0))
        for proc in procs:
            proc.join(timeout=10)
        extra = {
            "abusers": config.abusers,
            "abuser_request": {
                "deadline_ms": config.abuser_deadline_ms,
                "controller": config.abuser_controller,
                "pair": list(pair),
            },
            "abuser_outcomes": outcomes,
        }
    else:
        host, port = _host_port(config.url)
        say(f"polite caller with {config.slow_connections} slow connections")
        slow = [
            asyncio.ensure_future(_slow_connection(host, port, i, stop))
            for i in range(config.slow_connections)
        ]
        await asyncio.sleep(0.5)
        under = await _polite(config, queries, reference, "with slow clients")
        stop.set()
        results = [await t for t in slow]
        extra = {
            "slow_connections": config.slow_connections,
            "slow_outcomes": dict(Counter(r["outcome"] for r in results)),
            "slow_held_s": distribution(
                [r["held_s"] for r in results if r["outcome"] != "still open"]
            ),
        }
    return {
        "scenario": config.scenario,
        "deadline_ms": config.deadline_ms,
        "controller": config.controller,
        "duration_s": config.duration_s,
        "server": _server_facts(ready),
        "polite": [alone, under],
        **extra,
    }


def _host_port(url: str) -> tuple[str, int]:
    import httpx

    u = httpx.URL(url)
    return str(u.host), int(u.port or 80)


def _server_facts(ready: dict[str, Any]) -> dict[str, Any]:
    detail = ready.get("detail", {}) if isinstance(ready, dict) else {}
    return {
        "graph": detail.get("graph_name") or detail.get("graph"),
        "workers": (detail.get("admission") or {}).get("workers"),
    }


def markdown(summary: dict[str, Any]) -> str:
    """The scenario's table: the polite caller alone and under the misbehaving clients."""

    def pct(v: Any) -> str:
        return "–" if v is None else f"{100 * v:.1f}%"

    def ms(v: Any) -> str:
        return "–" if v is None else f"{v:.1f}"

    lines = [
        f"scenario {summary['scenario']}: polite caller, deadline {summary['deadline_ms']} ms, "
        f"{summary['controller']}, {summary['duration_s']:g} s per phase",
        "",
        "| phase | requests | shed | late | late (server) | p50 ms | p99 ms | with route | "
        "quality mean |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for row in summary["polite"]:
        lat = row["latency_ms"]
        lines.append(
            f"| {row['phase']} | {row['requests']} | {pct(row['shed_share'])} | "
            f"{pct(row['late_share'])} | {pct(row['late_by_server_clock_share'])} | "
            f"{ms(lat.get('p50'))} | {ms(lat.get('p99'))} | {pct(row['with_route_share'])} | "
            f"{'–' if row['quality']['mean'] is None else format(row['quality']['mean'], '.3f')} |"
        )
    if summary["scenario"] == "attack":
        lines += ["", f"abuser answers (by HTTP status): {summary['abuser_outcomes']}"]
    else:
        lines += [
            "",
            f"slow connections: {summary['slow_outcomes']}; held "
            f"p50 {ms(summary['slow_held_s'].get('p50'))} s, "
            f"max {ms(summary['slow_held_s'].get('max'))} s",
        ]
    return "\n".join(lines)
