"""``dueroute bench``: speed and lateness as ratios against references measured in the same run.

One subcommand per measurement, each in its own module (``bench_<name>.py``).
"""

from __future__ import annotations

import argparse
from typing import Any

from dueroute.service.cli import (
    bench_calibrate,
    bench_deadline,
    bench_import,
    bench_search,
    bench_traffic,
)


def register(sub: Any) -> argparse.ArgumentParser:
    """Add the ``bench`` command group and its subcommands; returns the group's parser."""
    parser = sub.add_parser(
        "bench", help="measure speed (and import memory) against references in the same run"
    )
    bench_sub = parser.add_subparsers(dest="bench_command", required=True, metavar="BENCH")
    for module in (bench_search, bench_deadline, bench_traffic, bench_import, bench_calibrate):
        module.register(bench_sub)
    return parser
