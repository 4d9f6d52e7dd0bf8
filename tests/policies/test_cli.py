"""Smoke runs of 'dueroute train', 'dueroute evaluate' and 'dueroute policy check' with tiny
sizes (common practice: every entry point runs end to end in the test suite)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from dueroute.planner.graph import save_graph
from dueroute.service.cli.main import main

from .conftest import make_grid_graph


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("cli")
    graph_path = save_graph(make_grid_graph(10, 10, seed=3), folder / "grid.npz")
    out = folder / "p.onnx"
    rc = main(
        [
            "train",
            str(graph_path),
            "--out",
            str(out),
            "--episodes",
            "12",
            "--budget",
            "60",
            "--steps",
            "4",
            "--count",
            "10",
            "--learning-starts",
            "10",
            "--batch-size",
            "8",
            "--eval-every-episodes",
            "6",
            "--validation-count",
            "3",
            "--landmarks",
            "0",
            "--no-progress",
            "--json",
        ]
    )
    assert rc == 0
    return graph_path, out


def test_train_writes_policy_config_and_curve(trained, capsys):
    _, out = trained
    assert out.is_file()
    config = json.loads(out.with_suffix(".config.json").read_text())
    assert config["dqn"]["episodes"] == 12 and config["env"]["budget_expansions"] == 60
    assert len(out.with_suffix(".curve.csv").read_text().splitlines()) == 13
    assert main(["policy", "check", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert report["ok"] and report["policy"]["contract_expansions"] == 60


def test_evaluate_writes_report(trained, tmp_path, capsys):
    graph_path, policy = trained
    out = tmp_path / "report"
    rc = main(
        [
            "evaluate",
            str(graph_path),
            "--policy",
            str(policy),
            "--count",
            "6",
            "--deadlines-ms",
            "20",
            "--importance-count",
            "2",
            "--out",
            str(out),
            "--no-progress",
            "--json",
        ]
    )
    assert rc == 0
    summary = json.loads(capsys.readouterr().out)
    assert set(summary["contracts"]) == {"budget_30", "budget_60", "budget_120", "deadline_20"}
    assert summary["contracts"]["budget_60"]["trained"]
    assert len(summary["contracts"]["budget_60"]["controllers"]) == 10
    assert "p_value" in summary["paired_tests"]["best_fixed"]
    for name in (
        "summary.json",
        "results.md",
        "per_query.csv",
        "quality_boxplot.png",
        "anytime_profile.png",
        "learned_weights.png",
        "training_curve.png",
        "feature_importance.png",
    ):
        assert (out / name).is_file(), name


def test_policy_check_explains_problems(tmp_path, capsys):
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"")
    assert main(["policy", "check", str(bad)]) == 2
    out = capsys.readouterr().out
    assert "file is empty" in out and "not usable" in out


def test_bad_arguments_give_one_line_errors(trained, tmp_path, capsys):
    graph_path, policy = trained
    assert main(["train", str(graph_path), "--gamma", "2", "--out", str(tmp_path / "x.onnx")]) == 2
    assert "gamma must be in [0, 1]" in capsys.readouterr().err
    assert main(["train", str(graph_path), "--out", str(tmp_path / "x.txt")]) == 2
    assert "--out must name a .onnx file" in capsys.readouterr().err
    rc = main(
        [
            "evaluate",
            str(graph_path),
            "--policy",
            str(policy),
            "--seed",
            "1",
            "--out",
            str(tmp_path / "r"),
        ]
    )
    assert rc == 2
    assert "training queries were drawn with" in capsys.readouterr().err
    rc = main(
        [
            "evaluate",
            str(graph_path),
            "--policy",
            str(tmp_path / "missing.onnx"),
            "--out",
            str(tmp_path / "r"),
        ]
    )
    assert rc == 2
    assert "file not found" in capsys.readouterr().err


def _traffic_file(graph_path: Path, folder: Path) -> Path:
    from dueroute.planner.graph import load_graph

    g = load_graph(graph_path)
    updates = [
        {"from_node": int(g.tail[e]), "to_node": int(g.head[e]), "factor": 2.5}
        for e in range(0, g.n_edges, 7)
    ] + [{"from_node": int(g.tail[3]), "to_node": int(g.head[3]), "closed": True}]
    path = folder / "traffic.json"
    path.write_text(json.dumps({"updates": updates}))
    return path


def test_evaluate_and_train_under_traffic(trained, tmp_path, capsys):
    """``evaluate --traffic``: the optima are scipy's on the changed costs (checked in
    tests/policies/test_env.py) and the report says which traffic; ``train --traffic`` and
    ``--traffic-scenarios`` record it in the saved config."""
    graph_path, policy = trained
    traffic = _traffic_file(graph_path, tmp_path)
    out = tmp_path / "report"
    rc = main(
        ["evaluate", str(graph_path), "--policy", str(policy), "--queries", "6",
         "--budgets", "60", "--importance-queries", "0", "--traffic", str(traffic),
         "--out", str(out), "--no-progress", "--json"]
    )  # fmt: skip
    assert rc == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["traffic"]["version"] == 1 and summary["traffic"]["source"] == str(traffic)
    assert summary["traffic"]["edges_closed"] >= 1
    assert "Under live traffic" in (out / "results.md").read_text()
    trained_out = tmp_path / "t.onnx"
    rc = main(
        ["train", str(graph_path), "--out", str(trained_out), "--episodes", "4", "--budget",
         "60", "--steps", "4", "--n-queries", "10", "--learning-starts", "4", "--batch-size",
         "4", "--eval-every-episodes", "2", "--validation-queries", "3", "--landmarks", "0",
         "--traffic", str(traffic), "--traffic-scenarios", "2", "--no-progress", "--json"]
    )  # fmt: skip
    assert rc == 0
    config = json.loads(trained_out.with_suffix(".config.json").read_text())
    assert config["env"]["traffic"] == str(traffic) and config["env"]["traffic_scenarios"] == 2
    capsys.readouterr()
    rc = main(
        ["evaluate", str(graph_path), "--policy", str(policy), "--out", str(tmp_path / "x"),
         "--traffic", str(tmp_path / "missing.json")]
    )  # fmt: skip
    err = capsys.readouterr().err.strip()
    assert rc == 2 and err.startswith("dueroute: error: traffic file not found")


def test_train_deadline_regime_and_served_evaluation(trained, tmp_path, capsys):
    """``bench calibrate`` writes a map; ``train --regime deadline`` records it and the regime
    in the policy; ``policy check FILE GRAPH`` says the graph matches, and warns for another
    graph; ``evaluate --served`` writes the per-cell report (tiny sizes, no timing judged)."""
    graph_path, _ = trained
    cal = tmp_path / "cal.json"
    rc = main(
        ["bench", "calibrate", str(graph_path), "--count", "6", "--deadlines-ms", "0.05,0.2"]
        + ["--landmarks", "0", "--out", str(cal), "--json"]
    )
    assert rc == 0 and json.loads(cal.read_text())["deadlines_ms"] == [0.05, 0.2]
    capsys.readouterr()
    out = tmp_path / "served.onnx"
    rc = main(
        ["train", str(graph_path), "--out", str(out), "--regime", "deadline"]
        + ["--calibration", str(cal), "--deadline-ms-min", "1", "--deadline-ms-max", "20"]
        + ["--searches-per-core", "1,2", "--episodes", "8", "--count", "10"]
        + ["--learning-starts", "4", "--batch-size", "4", "--eval-every-episodes", "4"]
        + ["--validation-count", "3", "--landmarks", "0", "--no-progress", "--json"]
    )
    assert rc == 0
    capsys.readouterr()
    # seeded and expansion-counted: the same command and calibration give the same network
    again = tmp_path / "again.onnx"
    argv = ["train", str(graph_path), "--out", str(again), "--regime", "deadline"]
    argv += ["--calibration", str(cal), "--deadline-ms-min", "1", "--deadline-ms-max", "20"]
    argv += ["--searches-per-core", "1,2", "--episodes", "8", "--count", "10"]
    argv += ["--learning-starts", "4", "--batch-size", "4", "--eval-every-episodes", "4"]
    argv += ["--validation-count", "3", "--landmarks", "0", "--no-progress", "--json"]
    assert main(argv) == 0
    capsys.readouterr()
    import numpy as np

    from dueroute.planner.features import FEATURE_HIGH, FEATURE_LOW
    from dueroute.policies.runtime import load_policy

    probe = np.random.default_rng(0).uniform(FEATURE_LOW, FEATURE_HIGH, (16, len(FEATURE_LOW)))
    probe = probe.astype(np.float32)
    np.testing.assert_array_equal(
        load_policy(out).q_values(probe), load_policy(again).q_values(probe)
    )
    assert main(["policy", "check", str(out), str(graph_path), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    regime = report["policy"]["training_regime"]
    assert regime["contract"] == "deadline" and regime["deadline_ms"] == [1.0, 20.0]
    assert regime["searches_per_core"] == [1, 2] and regime["calibration"]["queries"] == 6
    assert report["graph"]["trained_on_it"] and report["warnings"] == []
    other = save_graph(make_grid_graph(6, 6, seed=9), tmp_path / "other.npz")
    assert main(["policy", "check", str(out), str(other)]) == 0
    text = capsys.readouterr().out
    assert "warning: the policy was trained on graph" in text and "deadlines 1-20 ms" in text

    report_dir = tmp_path / "served"
    rc = main(
        ["evaluate", str(graph_path), "--policy", str(out), "--served", "--count", "4"]
        + ["--deadlines-ms", "1,3", "--loads", "1,2", "--controllers", "fixed:1,ana,learned"]
        + ["--out", str(report_dir), "--no-progress", "--json"]
    )
    assert rc == 0
    summary = json.loads(capsys.readouterr().out)
    assert len(summary["cells"]) == 4 and summary["targets"]["judged_cells"] == 0
    cell = summary["cells"][0]
    assert set(cell["controllers"]) == {"fixed:1", "ana", "learned"}
    assert "p_value" in cell["learned_vs_best_baseline"]
    for name in ("served_summary.json", "served_results.md", "served_per_query.csv"):
        assert (report_dir / name).is_file(), name
    assert (report_dir / "served_quality.png").stat().st_size > 1000
    assert main(["evaluate", str(graph_path), "--served", "--loads", "0", "--out", "x"]) == 2
    assert "--loads must all be in 1..64" in capsys.readouterr().err
