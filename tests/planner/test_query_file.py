"""Query files: the one reader of ``origin,destination`` CSV files (route, loadtest, ...).

Reference: Python's ``csv`` module writes the files the reader must accept (RFC 4180 quoting).
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.query_file import read_query_file, write_query_file


def test_header_comments_blank_lines_and_spaces(tmp_path: Path) -> None:
    good = tmp_path / "good.csv"
    good.write_text("# trips for the morning\norigin,destination\n0,3\n\n# comment\n4, 2\n")
    assert read_query_file(good, n_nodes=5) == [(0, 3), (4, 2)]


def test_header_is_optional_and_extra_columns_are_ignored(tmp_path: Path) -> None:
    path = tmp_path / "q.csv"
    with open(path, "w", newline="") as fh:  # written by the standard library's csv module
        csv.writer(fh).writerows([[1, 2, "note, with comma"], [3, 4]])
    assert read_query_file(path) == [(1, 2), (3, 4)]


def test_round_trip(tmp_path: Path) -> None:
    pairs = [(0, 1), (7, 3), (2, 2)]
    assert read_query_file(write_query_file(tmp_path / "rt.csv", pairs)) == pairs


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("0,3\n1,x\n", r"bad.csv:2: origin and destination must be integer node indices"),
        ("0,9\n", r"bad.csv:1: node 9 is not in the graph \(valid node indices: 0..4\)"),
        ("origin,destination\n5\n", r"bad.csv:2: expected two columns"),
        ("origin,destination\n", "holds no 'origin,destination' pairs"),
        ("0,-1\n", r"node -1 is not in the graph"),
    ],
)
def test_bad_files_name_the_line(tmp_path: Path, text: str, message: str) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text(text)
    with pytest.raises(InvalidRequest, match=message):
        read_query_file(bad, n_nodes=5)


def test_missing_and_binary_files(tmp_path: Path) -> None:
    with pytest.raises(InvalidRequest, match="query file not found"):
        read_query_file(tmp_path / "absent.csv")
    binary = tmp_path / "binary.csv"
    binary.write_bytes(b"\xff\xfe\x00\x81")
    with pytest.raises(InvalidRequest, match="not a UTF-8 text file"):
        read_query_file(binary)
