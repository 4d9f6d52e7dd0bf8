"""Smoke runs of ``dueroute bench search`` on a tiny graph (no timing assertions)."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

from dueroute.planner.graph import build_graph, great_circle_m, save_graph
from dueroute.service.cli.main import main

RATIO_KEYS = (
    "kernel_vs_scipy_rate",
    "alt_expansion_reduction",
    "alt_time_reduction",
    "setup_us_large",
    "start_us_large",
    "speedup_vs_networkx",
    "speedup_vs_networkx_with_alt",
    "hilbert_vs_input_rate",
)


def grid_graph_file(path: Path, side: int = 9, seed: int = 0) -> Path:
    """A small two-way street grid with one one-way dead end, osm ids shuffled."""
    rng = np.random.default_rng(seed)
    n = side * side
    ii, jj = np.meshgrid(np.arange(side), np.arange(side), indexing="ij")
    lat = (45.0 + ii * 0.001 + rng.uniform(-2e-4, 2e-4, (side, side))).ravel()
    lon = (7.0 + jj * 0.0014 + rng.uniform(-2e-4, 2e-4, (side, side))).ravel()
    idx = np.arange(n).reshape(side, side)
    a = np.concatenate([idx[:-1, :].ravel(), idx[:, :-1].ravel()])
    b = np.concatenate([idx[1:, :].ravel(), idx[:, 1:].ravel()])
    tail = np.concatenate([a, b, [0]])
    head = np.concatenate([b, a, [n]])  # node n: reachable, but nothing leaves it
    lat = np.append(lat, 44.999)
    lon = np.append(lon, 6.999)
    m = tail.shape[0]
    length = great_circle_m(lat[tail], lon[tail], lat[head], lon[head]) * rng.uniform(1, 1.3, m)
    graph = build_graph(
        lat=lat,
        lon=lon,
        osm_id=rng.permutation(n + 1).astype(np.int64) + 1000,
        tail=tail,
        head=head,
        length_m=length,
        speed_kph=rng.choice([30.0, 50.0, 90.0], m).astype(np.float32),
        road_class=np.zeros(m, dtype=np.int8),
        speed_source=np.ones(m, dtype=np.int8),
        meta={"name": "bench-grid"},
    )
    return save_graph(graph, path)


def run_bench(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(["bench", "search", *argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_bench_search_json_smoke(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Every ratio key is a positive number; the optimal costs agree with networkx
    ``astar_path`` (reference library) and ALT agrees with the great-circle search."""
    pytest.importorskip("networkx")
    graph = grid_graph_file(tmp_path / "grid.npz")
    code, out, _ = run_bench(
        capsys,
        str(graph),
        "--count",
        "6",
        "--long-trips",
        "3",
        "--landmarks",
        "4",
        "--networkx-count",
        "2",
        "--large",
        str(graph),
        "--json",
    )
    assert code == 0
    report = json.loads(out)
    for key in RATIO_KEYS:
        value = report[key]
        assert isinstance(value, (int, float)) and math.isfinite(value) and value > 0, key
    assert report["kernel"]["queries"] == 6 and report["kernel"]["not_optimal"] == 0
    assert report["scipy"]["settled"] > 0
    assert report["networkx"]["costs_match"] is True
    assert report["alt"]["worst_relative_cost_difference"] <= 1e-9
    assert report["alt"]["landmarks"] == 4
    assert (tmp_path / "grid.landmarks.npz").is_file()  # stored beside the graph
    assert {t["key"] for t in report["targets"]} == {
        "kernel_vs_scipy_rate",
        "setup_us_large",
        "alt_expansion_reduction",
        "speedup_vs_networkx",
    }
    assert {t["status"] for t in report["targets"]} <= {"PASS", "MISS"}


def test_bench_search_table_and_skips(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    graph = grid_graph_file(tmp_path / "grid.npz", side=6)
    code, out, _ = run_bench(
        capsys,
        str(graph),
        "--count",
        "3",
        "--long-trips",
        "2",
        "--landmarks",
        "2",
        "--networkx-count",
        "0",
        "--skip-large",
        "--skip-order",
    )
    assert code == 0
    assert "kernel_vs_scipy_rate" in out and "targets:" in out
    assert "SKIPPED per-query setup" in out and "SKIPPED optimal query vs networkx" in out


def test_bench_says_when_networkx_is_missing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    graph = grid_graph_file(tmp_path / "grid.npz", side=5)
    monkeypatch.setitem(sys.modules, "networkx", None)  # import networkx -> ImportError
    code, out, _ = run_bench(
        capsys, str(graph), "--count", "2", "--long-trips", "1", "--landmarks", "2",
        "--skip-large", "--skip-order", "--json",
    )  # fmt: skip
    assert code == 0
    report = json.loads(out)
    assert report["speedup_vs_networkx"] is None
    assert "networkx is not installed" in report["networkx"]["skipped"]
    assert any("networkx is not installed" in n for n in report["notes"])


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--count", "0"], "--count must be between 1 and"),
        (["--landmarks", "0"], "--landmarks must be between 1 and 64"),
    ],
)
def test_bench_bad_arguments(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], message: str
) -> None:
    graph = grid_graph_file(tmp_path / "grid.npz", side=4)
    code, _, err = run_bench(capsys, str(graph), *argv)
    assert code == 2
    assert err.strip().splitlines()[-1].startswith("dueroute: error: ")
    assert message in err


def test_bench_refuses_a_non_graph_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = run_bench(capsys, str(tmp_path / "map.osm"))
    assert code == 2
    assert "is not a compiled graph" in err


def test_long_trips_run_between_the_two_towns(tmp_path: Path) -> None:
    """On a graph with demo places, long trips join the two towns' centres (distances by the
    haversine formula, as osmnx computes edge lengths)."""
    import dataclasses

    from dueroute.demo_data.queries import TOWN_CENTRE_RADIUS_M, long_trip_pairs
    from dueroute.planner.graph import load_graph

    graph = load_graph(grid_graph_file(tmp_path / "grid.npz", side=12))
    lat, lon = np.asarray(graph.lat), np.asarray(graph.lon)
    west, east = int(np.argmin(lon)), int(np.argmax(lon))
    places = [
        {"name": "Westby", "kind": "town", "lat": lat[west], "lon": lon[west], "radius_m": 900},
        {"name": "Eastwick", "kind": "town", "lat": lat[east], "lon": lon[east], "radius_m": 800},
        {"name": "Hamlet", "kind": "village", "lat": 45.0, "lon": 7.0, "radius_m": 5000},
    ]
    graph = dataclasses.replace(graph, meta={**graph.meta, "places": places})
    pairs, how = long_trip_pairs(graph, 6, np.random.default_rng(1))
    assert "Westby and Eastwick" in how
    for i, (o, d) in enumerate(pairs):
        a, b = (west, east) if i % 2 == 0 else (east, west)
        assert great_circle_m(lat[o], lon[o], lat[a], lon[a]) <= TOWN_CENTRE_RADIUS_M
        assert great_circle_m(lat[d], lon[d], lat[b], lon[b]) <= TOWN_CENTRE_RADIUS_M


def test_bench_deadline_json_smoke(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``bench deadline`` reports every cell with consistent numbers: qualities (against scipy
    ``csgraph.dijkstra``, computed by the command) in [0, 1], shares in [0, 1], and every target.

    No timing assertion: only that the report is complete and its numbers are consistent.
    """
    path = grid_graph_file(tmp_path / "grid.npz", side=30)
    code = main(
        [
            "bench",
            "deadline",
            str(path),
            "--count",
            "4",
            "--deadlines-ms",
            "0.05,5",
            "--controllers",
            "fixed:1,ana,learned",
            "--landmarks",
            "4",
            "--json",
        ]
    )
    out, _ = capsys.readouterr()
    assert code == 0
    report = json.loads(out)
    assert len(report["cells"]) == 6 and report["landmarks"] == 4
    for cell in report["cells"]:
        assert cell["searches"] == 4
        assert 0.0 <= cell["no_route"] <= 1.0 and 0.0 <= cell["quality"] <= 1.0 + 1e-9
        assert cell["quality_p10"] <= cell["quality"] + 1e-9
        assert cell["control"] >= 0.0 and cell["expansions"] >= 0
        if cell["ran_out_of_time"]:
            assert cell["late_p50_ms"] <= cell["late_p99_ms"]
    # with landmarks every pair of the strong component has its instant route at once
    assert all(c["no_route"] == 0.0 for c in report["cells"])
    assert report["optimal"]["median_ms"] > 0 and report["optimal"]["scipy_single_source_ms"] > 0
    assert {t["key"] for t in report["targets"]} >= {"best_quality_2ms", "optimal_median_ms"}
    assert {t["status"] for t in report["targets"]} <= {"PASS", "MISS", "n/a"}


def test_bench_deadline_under_turn_rules(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """On a graph with turn restrictions the optima are the legal ones (the networkx
    line-graph reference agrees with ``planner.endpoints.legal_distances``, tested in
    tests/service/test_loadtest.py): every answer reaches quality 1 once proven, and pairs
    without a legal drive are left out and counted, not reported as failures."""
    from dueroute.planner.graph import save_graph
    from tests.planner.test_turns import random_road_graph

    path = save_graph(random_road_graph(5, max_side=5, n_restrictions=10), tmp_path / "t.npz")
    argv = ["bench", "deadline", str(path), "--count", "12", "--deadlines-ms", "50"]
    assert main([*argv, "--controllers", "fixed:1", "--landmarks", "2", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["pairs"] + report["pairs_left_out_unreachable"] == 12 and report["pairs"] > 0
    (cell,) = report["cells"]
    assert cell["no_route"] == 0.0 and cell["quality"] == pytest.approx(1.0)


def test_bench_deadline_bad_arguments(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = grid_graph_file(tmp_path / "grid.npz")
    assert main(["bench", "deadline", str(path), "--deadlines-ms", "0"]) == 2
    assert "--deadlines-ms must be in (0, 60000]" in capsys.readouterr().err
    assert main(["bench", "deadline", str(path), "--controllers", "fast"]) == 2
    assert "fast" in capsys.readouterr().err


def test_bench_traffic_smoke(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``bench traffic`` on a tiny grid: every batch shape is timed against the reference, and
    the searches under traffic agree with scipy's optimum (no timing assertions)."""
    path = grid_graph_file(tmp_path / "grid.npz", side=14)
    code = main(["bench", "traffic", str(path), "--repeats", "2", "--queries", "6", "--json"])
    out = capsys.readouterr().out
    assert code == 0
    r = json.loads(out)
    assert r["reference"]["csr_build_ms"] > 0 and r["reference"]["dijkstra_one_to_all_ms"] > 0
    shapes = {(b["share"], b["shape"]) for b in r["batches"]}
    assert shapes == {(0.01, "node pairs"), (0.01, "areas"), (0.1, "node pairs"), (0.1, "areas")}
    for b in r["batches"]:
        assert b["edges_touched"] >= 1 and b["apply_ms_median"] > 0
        assert isinstance(b["within_target"], bool)
    assert r["search"]["mismatches_vs_scipy"] == 0
    code = main(["bench", "traffic", str(path), "--repeats", "0"])
    assert code == 2 and "--repeats must be in 1..1000" in capsys.readouterr().err
