"""Smoke run of ``dueroute bench import`` on the tiny region (no timing assertions)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from dueroute.service.cli.bench_import import _format
from dueroute.service.cli.main import main


def test_bench_import_json_smoke(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Every run reports positive figures measured in its own child process, the osmium and
    osmnx imports of the same XML are the same graph (fingerprint), and so are the PBF and XML
    imports; the targets are judged on the measured run."""
    monkeypatch.setenv("DUEROUTE_DATA_DIR", str(tmp_path))
    argv = ["bench", "import", "--size", "tiny", "--reference-size", "tiny", "--repeat", "2"]
    assert main([*argv, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    runs = report["runs"]
    assert len(runs[0]["nodes_per_s_all"]) == 2 and runs[0]["same_graph_every_repeat"]
    assert runs[0]["nodes_per_s"] == max(runs[0]["nodes_per_s_all"])
    assert [(r["importer"], r["format"]) for r in runs] == [
        ("osmium", "pbf"),
        ("osmium", "pbf"),
        ("osmium", "osm"),
        ("osmnx", "osm"),
    ]
    for run in runs:
        assert run["nodes"] > 1000 and run["import_s"] > 0 and run["nodes_per_s"] > 0
        assert run["peak_rss_bytes"] >= run["baseline_rss_bytes"] > 0
    assert len({r["fingerprint"] for r in runs}) == 1
    assert report["ratios"]["same_graph_osmium_osmnx"] and report["ratios"]["same_graph_pbf_xml"]
    assert {t["key"] for t in report["targets"]} == {"bytes_per_node", "nodes_per_s"}
    assert report["targets_met"] == all(t["met"] for t in report["targets"])
    assert sorted(p.name for p in (tmp_path / "bench").iterdir())  # map files cached
    text = _format(report)
    assert "target peak memory per output node" in text and "ru_maxrss" in text
    assert "same graph (fingerprint): yes" in text
    assert main(["bench", "import", "--seed", "-1"]) == 2
    assert main(["bench", "import", "--repeat", "0"]) == 2
