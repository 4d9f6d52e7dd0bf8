"""``dueroute serve`` refuses bad settings before it starts, with one error line and exit 2."""

from __future__ import annotations

from pathlib import Path

import pytest

from dueroute.service.cli.main import main


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (["--workers", "0"], "workers: Input should be greater than or equal to 1"),
        (["--port", "70000"], "port: Input should be less than or equal to 65535"),
        (["--log-level", "loud"], "log_level must be one of"),
        (["--graph", "nowhere.npz"], "graph file not found"),
        (["--graph", "map.osm"], "is not a compiled graph"),
        (["--turn-costs", "left=8,left=2"], "turn costs: left given twice"),
    ],
)
def test_bad_settings_exit_2_with_one_line(args, words, capsys, tmp_path: Path):
    code = main(["serve", "--policy-dir", str(tmp_path / "p"), *args])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("dueroute: error: ") and words in err[0], err


def test_bad_policy_file_stops_the_start(capsys, tmp_path: Path, tiny_graph_path: Path):
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"")
    code = main(
        ["serve", "--graph", str(tiny_graph_path), "--policy", str(bad)]
        + ["--policy-dir", str(tmp_path / "p")]
    )
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and "policy refused" in err[-1], err


def test_environment_settings_are_read(monkeypatch, capsys, tmp_path: Path):
    monkeypatch.setenv("DUEROUTE_WORKERS", "-3")
    assert main(["serve", "--policy-dir", str(tmp_path / "p")]) == 2
    assert "workers" in capsys.readouterr().err


def test_admin_token_file(tmp_path: Path):
    import argparse

    from dueroute.service.cli.serve import build_settings

    token = tmp_path / "token"
    token.write_text("a-long-enough-token\n")
    ns = argparse.Namespace(admin_token_file=token, workers=None, graph=None)
    assert build_settings(ns).admin_token.get_secret_value() == "a-long-enough-token"


def test_check_prints_settings_as_json_without_the_token(
    capsys, monkeypatch, tiny_graph_path, tmp_path
):
    import json

    monkeypatch.setenv("DUEROUTE_ADMIN_TOKEN", "secret-token-value")
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path))
    monkeypatch.setenv("DUEROUTE_SHIPPED_POLICY", "false")
    code = main(["serve", "--check", "--json", "--graph", str(tiny_graph_path), "--workers", "3"])
    out = capsys.readouterr().out
    assert code == 0 and "secret-token-value" not in out
    report = json.loads(out)
    assert report["settings"]["workers"] == 3 and report["settings"]["admin_token"] == "**********"
    assert report["policy"]["fallback_controller"] == "decreasing"
    assert report["settings"]["policy_dir"] == str(tmp_path / "dueroute" / "policies")
