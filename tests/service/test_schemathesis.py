"""Property-based contract test: schemathesis drives a real server from its own /openapi.json.

``st run`` (schemathesis's command line, as a user would run it) against ``dueroute serve`` on
the 10-node graph (every search proves its optimum in microseconds, so deadlines up to 60 s
cost nothing), with every check schemathesis has (``--checks all``: no server errors, status
codes, content types, headers and bodies as documented, negative data refused, schema-valid
data accepted, ``Allow`` on 405, unsupported methods, authentication really required, ...)
and every phase (examples, coverage, fuzzing, stateful via the published OpenAPI links).
Intended exceptions live in ``schemathesis.toml`` beside this file, each with its reason.
Bounded: a fixed seed and a few dozen examples per operation.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.service.conftest import ADMIN_TOKEN, REPO, LiveServer

CONFIG = Path(__file__).with_name("schemathesis.toml")


def _st() -> list[str]:
    exe = shutil.which("st", path=str(Path(sys.executable).parent))
    return [exe] if exe else [sys.executable, "-m", "schemathesis.cli"]


def test_schemathesis_all_checks_against_a_real_server(grid_graph_path: Path, tmp_path: Path):
    env = {"DUEROUTE_ADMIN_TOKEN": ADMIN_TOKEN, "DUEROUTE_SHIPPED_POLICY": "false"}
    with LiveServer(grid_graph_path, tmp_path, env=env) as srv:
        cmd = [
            *_st(),
            "--config-file",
            str(CONFIG),
            "run",
            srv.url + "/openapi.json",
            "--phases",
            "examples,coverage,fuzzing,stateful",
            "--max-examples",
            os.environ.get("DUEROUTE_TEST_SCHEMATHESIS_EXAMPLES", "40"),
            "--seed",
            os.environ.get("DUEROUTE_TEST_SCHEMATHESIS_SEED", "14"),
            "--workers",
            "1",
            "--header",
            f"Authorization: Bearer {ADMIN_TOKEN}",
            "--continue-on-failure",
            "--no-color",
        ]
        proc = subprocess.run(
            cmd,
            cwd=REPO,
            capture_output=True,
            text=True,
            timeout=600,
            env={**os.environ, "SCHEMATHESIS_TELEMETRY": "false"},
        )
    out = proc.stdout + proc.stderr
    summary = out[out.find("Stateful (") :] if "Stateful (" in out else out[-4000:]
    print("\n" + summary)
    if proc.returncode != 0:
        pytest.fail(f"schemathesis found problems (exit {proc.returncode}):\n{out[-12000:]}")
