"""The built wheel: one top-level name (``dueroute``), and it works from outside the repository.

Builds the wheel with pip (PEP 517, the project's own ``pyproject.toml``), reads its file list
with the standard library's ``zipfile``, installs it into a fresh virtual environment (``venv``)
whose only other packages are this environment's dependencies, and runs the installed
``dueroute`` command from a temporary directory far from the source tree.
"""

from __future__ import annotations

import json
import os
import shutil
import site
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

from dueroute.planner.graph import save_graph
from tests.conftest import make_tiny_graph

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    # build from a copy: setuptools writes build/ and *.egg-info beside the sources
    src = out / "src"
    shutil.copytree(
        ROOT,
        src,
        ignore=shutil.ignore_patterns(
            ".venv", ".git", "build", "dist", "*.egg-info", "__pycache__"
        ),
    )
    proc = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(out), str(src)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    (path,) = out.glob("dueroute-*.whl")
    return path


def test_the_wheel_holds_one_top_level_name(wheel: Path) -> None:
    with zipfile.ZipFile(wheel) as zf:
        names = zf.namelist()
    top = {n.split("/")[0] for n in names if not n.split("/")[0].endswith(".dist-info")}
    assert top == {"dueroute"}
    for needed in (
        "dueroute/__main__.py",
        "dueroute/planner/_kernel.py",
        "dueroute/service/server/app.py",
        "dueroute/service/cli/main.py",
        "dueroute/service/loadtest/runner.py",
        "dueroute/policies/default.onnx",
        "dueroute/demo_data/region.toml",
    ):
        assert needed in names, needed


def test_the_installed_wheel_runs_outside_the_repository(wheel: Path, tmp_path: Path) -> None:
    env_dir = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(env_dir)], check=True, timeout=300)
    py = env_dir / "bin" / "python"
    purelib = subprocess.run(
        [str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    # The dependencies (numpy, numba, ...) come from this environment's site-packages as a
    # plain path entry: its .pth files are not run, so this environment's editable install of
    # dueroute stays invisible to the new one.
    deps = [sysconfig.get_paths()["purelib"], *site.getsitepackages()]
    Path(purelib, "dueroute_test_deps.pth").write_text("\n".join(dict.fromkeys(deps)) + "\n")
    proc = subprocess.run(
        [str(py), "-m", "pip", "install", "--no-deps", "--quiet", str(wheel)],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]

    work = tmp_path / "elsewhere"
    work.mkdir()
    graph = save_graph(make_tiny_graph(), work / "tiny.npz")
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env["DUEROUTE_DATA_DIR"] = str(tmp_path / "data")

    def run(*argv: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            list(argv), cwd=work, env=env, capture_output=True, text=True, timeout=600
        )

    where = run(str(py), "-c", "import dueroute, sys; print(dueroute.__file__)")
    assert where.returncode == 0 and str(env_dir) in where.stdout, where.stderr
    for name in ("service", "planner", "policies", "demo_data"):
        bare = run(str(py), "-c", f"import {name}")
        assert bare.returncode != 0 and "ModuleNotFoundError" in bare.stderr, name
    helped = run(str(env_dir / "bin" / "dueroute"), "--help")
    assert helped.returncode == 0 and "route" in helped.stdout, helped.stderr
    as_module = run(str(py), "-m", "dueroute", "--help")
    assert as_module.returncode == 0 and as_module.stdout == helped.stdout
    routed = run(
        str(env_dir / "bin" / "dueroute"),
        "route",
        str(graph),
        "--from",
        "0",
        "--to",
        "3",
        "--landmarks",
        "0",
        "--json",
    )
    assert routed.returncode == 0, routed.stderr[-3000:]
    answer = json.loads(routed.stdout.strip().splitlines()[-1])
    assert answer["status"] == "optimal" and answer["node_indices"][0] == 0
