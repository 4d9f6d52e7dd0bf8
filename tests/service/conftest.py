"""Fixtures for the HTTP service tests: small graphs, in-process apps, a real uvicorn process.

``grid_graph_path``
    A 300 x 300 street grid (90 000 nodes) with random speeds, where an A* search without
    landmarks needs tens of milliseconds to prove the optimum: long enough that searches run
    into their deadlines, small enough to build in a fraction of a second.
``tiny_graph_path``
    The hand-made 10-node graph of ``tests/conftest.py`` saved to disk.
``make_client``
    Builds an app with given settings, runs its lifespan in a ``TestClient`` and waits for
    ``/readyz``.
``live_server``
    Starts ``python -m dueroute serve`` on 127.0.0.1 with a free port and stops it.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m, save_graph
from tests.conftest import make_tiny_graph

REPO = Path(__file__).resolve().parents[2]
ADMIN_TOKEN = "test-admin-token-0123"


def make_grid_graph(side: int = 300, seed: int = 0) -> RoadGraph:
    """A two-way street grid, ~111 m x ~110 m blocks, speeds uniform in 20..100 km/h."""
    rng = np.random.default_rng(seed)
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    lat = 45.0 + ii.ravel() * 0.001
    lon = 7.0 + jj.ravel() * 0.0014
    idx = ii * side + jj
    t = np.concatenate([idx[:, :-1].ravel(), idx[:-1, :].ravel()])
    h = np.concatenate([idx[:, 1:].ravel(), idx[1:, :].ravel()])
    tail, head = np.concatenate([t, h]), np.concatenate([h, t])
    m = tail.shape[0]
    # a bend in every tenth edge, so route geometry has interior points
    bent = np.arange(m) % 10 == 0
    geom_indptr = np.concatenate(([0], np.cumsum(bent.astype(np.int64))))
    geom_lat = (lat[tail[bent]] + lat[head[bent]]) / 2 + 0.0001
    geom_lon = (lon[tail[bent]] + lon[head[bent]]) / 2
    length = great_circle_m(lat[tail], lon[tail], lat[head], lon[head])
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(lat.shape[0], dtype=np.int64) + 10_000,
        tail=tail,
        head=head,
        length_m=length,
        speed_kph=rng.uniform(20.0, 100.0, m),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        geom_indptr=geom_indptr,
        geom_lat=geom_lat,
        geom_lon=geom_lon,
        meta={"name": "test-grid", "road_classes": ["residential"]},
    )


@pytest.fixture(scope="session")
def grid_graph_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return save_graph(make_grid_graph(), tmp_path_factory.mktemp("grid") / "grid.npz")


@pytest.fixture(scope="session")
def tiny_graph_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return save_graph(make_tiny_graph(), tmp_path_factory.mktemp("tiny") / "tiny.npz")


def settings_for(graph: Path, tmp_path: Path, **overrides: Any) -> Any:
    from dueroute.service.server.settings import Settings

    values: dict[str, Any] = {
        "graph": str(graph),
        "policy_dir": tmp_path / "policies",
        "shipped_policy": False,  # tests choose their policies; the shipped one may change
        "workers": 2,
        "landmarks": False,
        "warmup_searches": 1,
        "log_level": "warning",
    }
    values.update(overrides)
    return Settings(**values)


def wait_ready(client: Any, timeout_s: float = 60.0) -> None:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        r = client.get("/readyz")
        if r.status_code == 200:
            return
        if r.json().get("status") == "failed":
            raise AssertionError(f"warm-up failed: {r.json()}")
        time.sleep(0.05)
    raise AssertionError("service did not become ready")


@pytest.fixture()
def make_client(tmp_path: Path) -> Iterator[Callable[..., Any]]:
    """``make_client(graph_path, **settings)`` -> a ready TestClient (closed after the test)."""
    from fastapi.testclient import TestClient

    from dueroute.service.server.app import create_app

    stack = contextlib.ExitStack()

    def make(graph: Path, **overrides: Any) -> Any:
        app = create_app(settings_for(graph, tmp_path, **overrides))
        client = stack.enter_context(TestClient(app))
        wait_ready(client)
        return client

    with stack:
        yield make


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class LiveServer:
    """A ``dueroute serve`` subprocess on 127.0.0.1 (use as a context manager)."""

    def __init__(self, graph: Path, tmp_path: Path, *args: str, env: dict[str, str] | None = None):
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log_path = tmp_path / f"serve-{self.port}.log"
        cmd = [
            sys.executable,
            "-m",
            "dueroute",
            "serve",
            "--graph",
            str(graph),
            "--port",
            str(self.port),
            "--policy-dir",
            str(tmp_path / "policies"),
            *args,
        ]
        full_env = dict(os.environ)
        full_env.update({"DUEROUTE_LANDMARKS": "false", "DUEROUTE_WARMUP_SEARCHES": "2"})
        full_env.update(env or {})
        self._log = open(self.log_path, "wb")  # noqa: SIM115 - closed in stop()
        self.proc = subprocess.Popen(
            cmd, cwd=REPO, env=full_env, stdout=self._log, stderr=self._log
        )

    def wait_ready(self, timeout_s: float = 90.0) -> dict[str, Any]:
        import httpx

        end = time.monotonic() + timeout_s
        while time.monotonic() < end:
            if self.proc.poll() is not None:
                raise AssertionError(f"server exited early:\n{self.log()}")
            with contextlib.suppress(httpx.HTTPError):
                r = httpx.get(self.url + "/readyz", timeout=2.0)
                if r.status_code == 200:
                    return dict(r.json())
            time.sleep(0.1)
        raise AssertionError(f"server not ready in {timeout_s} s:\n{self.log()}")

    def log(self) -> str:
        self._log.flush()
        return self.log_path.read_text(errors="replace")[-4000:]

    def log_lines(self) -> list[dict[str, Any]]:
        self._log.flush()
        out = []
        for line in self.log_path.read_text(errors="replace").splitlines():
            with contextlib.suppress(ValueError):
                out.append(json.loads(line))
        return out

    def stop(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
            try:
                self.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=5)
        self._log.close()
        return int(self.proc.returncode)

    def __enter__(self) -> LiveServer:
        self.wait_ready()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


# ------------------------------------------------------------------------------------------
# Policy files


def policy_network(n_in: int | None = None, n_out: int = 6, seed: int = 0) -> Any:
    from dueroute.planner.features import N_FEATURES
    from dueroute.policies.dqn import QNetwork, init_params

    n_in = N_FEATURES if n_in is None else n_in
    rng = np.random.default_rng(seed)
    return QNetwork(
        init_params(rng, n_in, 8, n_out), rng.uniform(0.0, 1.0, n_in), rng.uniform(0.5, 2.0, n_in)
    )


def policy_meta(**overrides: str) -> dict[str, str]:
    from dueroute.policies.export import policy_metadata

    meta = policy_metadata(
        weights=(1.0, 1.5, 2.0, 3.0, 4.0, 5.0),
        action_kind="pick",
        initial_weight=2.0,
        contract_expansions=5000,
        decision_steps=10,
        training_config={"note": "service test"},
        graph_fingerprint="0" * 64,
        graph_name="test",
        created_utc="2026-01-01T00:00:00+00:00",  # fixed, so equal seeds give equal bytes
    )
    meta.update(overrides)
    return meta


def policy_bytes(network: Any = None, meta: dict[str, str] | None = None, seed: int = 0) -> bytes:
    from dueroute.policies.export import build_model

    net = network if network is not None else policy_network(seed=seed)
    return bytes(build_model(net, meta if meta is not None else policy_meta()).SerializeToString())
