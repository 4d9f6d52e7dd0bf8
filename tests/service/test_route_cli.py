"""Smoke runs of ``dueroute route`` on a tiny graph (CLI smoke tests, common practice), with
costs checked against scipy ``csgraph.dijkstra``."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.planner.graph import save_graph
from dueroute.service.cli.main import main
from tests.planner.test_kernel import grid_graph


@pytest.fixture(scope="module")
def graph_file(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, object]:
    g = grid_graph(12, seed=1)
    path = save_graph(g, tmp_path_factory.mktemp("route") / "grid.npz")
    return path, g


def test_route_single_query_json(graph_file, capsys) -> None:
    """One query with --json prints one object with the documented keys and the scipy
    ``csgraph.dijkstra`` optimum."""
    path, g = graph_file
    assert (
        main(
            ["route", str(path), "--from", "0", "--to", "143", "--controller", "fixed:1", "--json"]
        )
        == 0
    )
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 1
    d = json.loads(lines[0])
    for key in (
        "origin_node",
        "destination_node",
        "status",
        "cost_s",
        "lower_bound_s",
        "gap",
        "node_indices",
        "node_ids",
        "expansions",
        "improvements",
    ):
        assert key in d
    assert d["status"] == "optimal"
    assert d["cost_s"] == pytest.approx(dijkstra(g.csr(), indices=0)[143], rel=1e-9)
    assert d["node_indices"][0] == 0 and d["node_indices"][-1] == 143
    assert d["node_ids"] == np.asarray(g.osm_id)[d["node_indices"]].tolist()


def test_route_queries_csv_and_coordinates(graph_file, tmp_path, capsys) -> None:
    """A queries CSV gives one JSON line per query; a LAT,LON endpoint snaps onto the nearest
    road (here exactly onto node 7: a route of cost 0 to it)."""
    path, g = graph_file
    q = tmp_path / "q.csv"
    q.write_text("origin,destination\n0,143\n5,5\n\n17,100\n")
    assert main(["route", str(path), "--queries", str(q), "--budget", "50", "--json"]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.strip().splitlines()]
    assert [(r["origin_node"], r["destination_node"]) for r in rows] == [
        (0, 143),
        (5, 5),
        (17, 100),
    ]
    assert all(r["expansions"] <= 50 for r in rows)
    lat, lon = float(g.lat[7]), float(g.lon[7])
    assert (
        main(["route", str(path), "--from", f"{lat},{lon}", "--to", "7", "--deadline-ms", "50"])
        == 0
    )
    out = capsys.readouterr().out
    assert "0 m off) -> 7: optimal; cost 0" in out


@pytest.mark.parametrize(
    ("csv_text", "message"),
    [
        ("from,to\n0,1\n", "bad.csv:1: origin and destination must be integer"),
        ("origin,destination\n0,1\n2,x\n", "bad.csv:3: origin and destination must be integer"),
        ("origin,destination\n0,999\n", "bad.csv:2: node 999 is not in the graph"),
        ("origin,destination\n", "holds no 'origin,destination' pairs"),
    ],
)
def test_route_bad_csv_names_the_line(graph_file, tmp_path, capsys, csv_text, message) -> None:
    path, _ = graph_file
    q = tmp_path / "bad.csv"
    q.write_text(csv_text)
    assert main(["route", str(path), "--queries", str(q)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("dueroute: error:") and message in err


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--from", "0"], "--from and --to go together"),
        ([], "give --from NODE --to NODE"),
        (["--from", "0", "--to", "500"], "valid node indices are 0..143"),
        (["--from", "0", "--to", "1", "--controller", "zigzag"], "unknown controller 'zigzag'"),
        (["--from", "0", "--to", "1", "--steps", "0"], "steps must be between 1"),
        (["--from", "0", "--to", "1", "--deadline-ms", "0"], "deadline_ms must be > 0"),
        (["--from", "a,b", "--to", "1"], "expected a node index or LAT,LON"),
        (["--from", "0", "--to", "1", "--turn-costs", "left=x"], "left='x' is not a number"),
        (["--from", "0", "--to", "1", "--turn-costs", "sharp=3"], "KEY one of left, right"),
        (["--from", "0", "--to", "1", "--turn-costs", "left=-1"], "must be a finite number"),
    ],
)
def test_route_bad_arguments(graph_file, capsys, argv, message) -> None:
    path, _ = graph_file
    assert main(["route", str(path), *argv]) == 2
    assert message in capsys.readouterr().err


def test_route_under_traffic_matches_scipy_on_the_changed_costs(graph_file, tmp_path, capsys):
    """``--traffic FILE``: the cost is scipy ``csgraph.dijkstra``'s on the changed costs, the
    answer names the version, and a bad document is one ``dueroute: error:`` line (exit 2)."""
    from dueroute.planner.traffic import costs_from_document

    path, g = graph_file
    doc = {
        "updates": [
            {"from_node": int(g.tail[e]), "to_node": int(g.head[e]), "factor": 3}
            for e in range(0, g.n_edges, 3)
        ]
        + [{"from_node": 0, "to_node": int(g.head[g.indptr[0]]), "closed": True}]
    }
    tfile = tmp_path / "t.json"
    tfile.write_text(json.dumps(doc))
    assert main(["route", str(path), "--from", "0", "--to", "143", "--controller", "fixed:1",
                 "--traffic", str(tfile), "--json"]) == 0  # fmt: skip
    d = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    costs = costs_from_document(g, doc).travel_time_s
    assert d["traffic_version"] == 1 and d["bound_quality"] in ("full", "weakened")
    assert d["cost_s"] == pytest.approx(dijkstra(g.csr(costs), indices=0)[143], rel=1e-9)
    assert d["cost_s"] > dijkstra(g.csr(), indices=0)[143]
    assert main(["route", str(path), "--from", "0", "--to", "143", "--traffic", str(tfile)]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"traffic {tfile}: version 1, {len(doc['updates'])} updates")
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"updates": [{"from_node": 0, "to_node": 1, "factor": -2}]}))
    assert main(["route", str(path), "--from", "0", "--to", "143", "--traffic", str(bad)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "updates[0].factor: must be a number > 0" in err[0]
    bad.write_text("{oops")
    assert main(["route", str(path), "--from", "0", "--to", "143", "--traffic", str(bad)]) == 2
    assert "not valid JSON (line 1" in capsys.readouterr().err
    assert main(["route", str(path), "--from", "0", "--to", "1", "--traffic", "nowhere"]) == 2
    assert "named scenario: rush-hour" in capsys.readouterr().err


def test_loadtest_traffic_flags_are_checked(graph_file, tmp_path, capsys):
    path, _ = graph_file
    base = ["loadtest", "--graph", str(path), "--out", str(tmp_path / "o")]
    assert main([*base, "--traffic", "rush-hour"]) == 2
    assert "--traffic needs --reference" in capsys.readouterr().err
    assert main([*base, "--admin-token-file", str(tmp_path / "tok")]) == 2
    assert "--admin-token-file is only used with --traffic" in capsys.readouterr().err


def test_route_with_turn_costs_matches_the_line_graph_reference(graph_file, capsys) -> None:
    """--turn-costs and --uturns give the legal optimum of the networkx line-graph reference
    (tests/planner/test_turns.py) with the same penalties, which is never cheaper than the
    scipy ``csgraph.dijkstra`` optimum without them."""
    from dueroute.planner.turns import TurnCosts
    from tests.planner.test_turns import Reference

    path, g = graph_file
    argv = ["route", str(path), "--from", "0", "--to", "143", "--controller", "fixed:1"]
    argv += ["--turn-costs", "left=9,right=4,uturn=30", "--uturns", "allow", "--json"]
    assert main(argv) == 0
    d = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    ref = Reference(g, uturns="allow", turn_costs=TurnCosts(left_s=9.0, right_s=4.0, uturn_s=30.0))
    best = ref.shortest_from(ref.line_graph(), 0)[143]
    assert d["status"] == "optimal" and d["cost_s"] == pytest.approx(best, rel=1e-9)
    assert best >= dijkstra(g.csr(), indices=0)[143]
