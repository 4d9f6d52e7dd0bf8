"""The container image and compose file, tested without a Docker engine.

What can be checked on the host is checked here: the Dockerfile's instructions (parsed by the
rules of the Dockerfile reference: ``\\`` line continuations, ``#`` comments, exec-form JSON
arrays), that every file it copies and every path the compose file names exists in the
repository, that every ``dueroute ...`` command the image runs is a valid command line and the
build-time commands actually run on the host (with tiny sizes and temporary paths), the health
check script, the graph publisher, and the nginx configuration (``nginx -t`` when an nginx
binary is available).
"""

from __future__ import annotations

import http.server
import json
import mmap
import os
import re
import shlex
import shutil
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml

from dueroute.service.cli.main import build_parser

ROOT = Path(__file__).resolve().parents[1]
DOCKER = ROOT / "docker"
DOCKERFILE = DOCKER / "Dockerfile"
COMPOSE = DOCKER / "compose.yaml"
NGINX_CONF = DOCKER / "nginx.conf"


def parse_dockerfile(text: str) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) pairs: comments dropped, ``\\`` continuations joined."""
    out: list[tuple[str, str]] = []
    buf = ""
    for raw in text.splitlines():
        line = raw.strip()
        if not buf and (not line or line.startswith("#")):
            continue
        if buf and line.startswith("#"):
            continue  # comment lines inside a continued instruction are removed
        if line.endswith("\\"):
            buf += line[:-1] + " "
            continue
        buf += line
        word, _, rest = buf.strip().partition(" ")
        out.append((word.upper(), rest.strip()))
        buf = ""
    assert not buf, "Dockerfile ends inside a continued line"
    return out


@pytest.fixture(scope="module")
def instructions() -> list[tuple[str, str]]:
    return parse_dockerfile(DOCKERFILE.read_text())


def _args(instructions: list[tuple[str, str]], name: str) -> list[str]:
    return [rest for word, rest in instructions if word == name]


def _exec_form(rest: str) -> list[str]:
    value = json.loads(rest)
    assert isinstance(value, list) and all(isinstance(v, str) for v in value), rest
    return value


def _shell_commands(rest: str) -> list[list[str]]:
    """Split a shell-form RUN into simple commands (on &&, ; and |), each as argv."""
    tokens = shlex.split(rest, comments=False, posix=True)
    cmds: list[list[str]] = [[]]
    for tok in tokens:
        if tok in ("&&", ";", "||", "|"):
            cmds.append([])
        else:
            cmds[-1].append(tok)
    return [c for c in cmds if c]


def run_commands(instructions: list[tuple[str, str]]) -> list[list[str]]:
    """Every simple command of every RUN, as argv (output redirections dropped)."""
    found = []
    for word, rest in instructions:
        if word == "RUN":
            for cmd in _shell_commands(rest):
                cmd = [c for c in cmd if not re.fullmatch(r"\d?>+|>/dev/null|/dev/null", c)]
                if cmd:
                    found.append(cmd)
    return found


def dueroute_commands(instructions: list[tuple[str, str]]) -> list[tuple[str, list[str]]]:
    """Every ``dueroute ...`` command in RUN and CMD, as (instruction, argv without 'dueroute')."""
    found = [("RUN", cmd[1:]) for cmd in run_commands(instructions) if cmd[0] == "dueroute"]
    for rest in _args(instructions, "CMD"):
        argv = _exec_form(rest)
        if argv[0] == "dueroute":
            found.append(("CMD", argv[1:]))
    return found


def build_steps(instructions: list[tuple[str, str]]) -> list[list[str]]:
    """The RUN commands that prepare data: ``dueroute ...`` and ``python /app/docker/...``."""
    return [
        cmd
        for cmd in run_commands(instructions)
        if cmd[0] == "dueroute" or (cmd[0] == "python" and cmd[1].startswith("/app/docker/"))
    ]


# --------------------------------------------------------------------------------------------
# Dockerfile


def test_dockerfile_base_user_healthcheck_and_cmd(instructions: list[tuple[str, str]]) -> None:
    """Common practice for Python service images: slim base, non-root user, exec-form CMD."""
    froms = _args(instructions, "FROM")
    assert froms and froms[-1].startswith("python:3.11-slim")
    users = _args(instructions, "USER")
    assert users and users[-1].split(":")[0] not in ("root", "0")
    (health,) = _args(instructions, "HEALTHCHECK")
    _, _, cmd = health.partition("CMD ")
    argv = _exec_form(cmd.strip())
    assert argv[0] == "python" and argv[1].endswith("healthcheck.py")
    assert "curl" not in health and "wget" not in health  # not in the slim image
    (cmd_line,) = _args(instructions, "CMD")
    assert _exec_form(cmd_line) == ["dueroute", "serve", "--host", "0.0.0.0"]
    env = " ".join(_args(instructions, "ENV"))
    assert "NUMBA_CACHE_DIR=" in env  # the kernels compiled at build time are kept here


def test_dockerfile_copies_only_existing_paths(instructions: list[tuple[str, str]]) -> None:
    ignored = _dockerignore_patterns()
    for rest in _args(instructions, "COPY"):
        parts = [p for p in shlex.split(rest) if not p.startswith("--")]
        for src in parts[:-1]:
            path = ROOT / src
            assert path.exists(), f"COPY source {src!r} is not in the repository"
            assert src.rstrip("/") not in ignored, f"COPY source {src!r} is in .dockerignore"


def _dockerignore_patterns() -> set[str]:
    text = (ROOT / ".dockerignore").read_text()
    return {ln.strip().rstrip("/") for ln in text.splitlines() if ln.strip() and ln[0] != "#"}


def test_dockerignore_keeps_what_the_install_needs() -> None:
    """The package sources and the files pyproject.toml names must reach the build context."""
    ignored = _dockerignore_patterns()
    for needed in (
        "pyproject.toml",
        "README.md",
        "dueroute",
        "planner",
        "policies",
        "service",
        "demo_data",
    ):
        assert needed not in ignored
        assert (ROOT / needed).exists()
    assert ".venv" in ignored and ".git" in ignored


def test_every_dueroute_command_in_the_image_parses(instructions: list[tuple[str, str]]) -> None:
    """Each ``dueroute`` command line of the image is accepted by the real CLI parser."""
    cmds = dueroute_commands(instructions)
    assert any(kind == "CMD" for kind, _ in cmds)
    assert sum(kind == "RUN" for kind, _ in cmds) >= 2  # build the graph, warm the kernels
    parser = build_parser()
    for _, argv in cmds:
        args = parser.parse_args(argv)
        assert callable(args.func)


def _host_argv(argv: list[str], graph: str) -> list[str]:
    """An image build step as a host command: the repository's scripts, ``graph`` for 'demo'."""
    out = []
    for a in argv:
        if a == "dueroute":
            a = str(Path(sys.executable).with_name("dueroute"))
        elif a == "python":
            a = sys.executable
        elif a.startswith("/app/docker/"):
            a = str(DOCKER / a[len("/app/docker/") :])
        elif a == "demo":
            a = graph
        out.append(a)
    return out


def _run_build_steps(instructions: list[tuple[str, str]], graph: str, env: dict[str, str]) -> None:
    steps = build_steps(instructions)
    assert len(steps) >= 3  # graph, landmarks, kernels
    for argv in steps:
        host = _host_argv(argv, graph)
        proc = subprocess.run(host, env=env, capture_output=True, text=True, timeout=1800)
        assert proc.returncode == 0, f"{' '.join(argv)} failed on the host:\n{proc.stderr[-2000:]}"


def test_build_steps_run_on_the_host(instructions: list[tuple[str, str]], tmp_path: Path) -> None:
    """The image's build steps (graph, landmarks, kernel warm-up) run on the host, on the tiny
    region instead of the demo one; the landmarks land beside the graph."""
    from dueroute.planner.heuristics import landmarks_path

    env = dict(os.environ, DUEROUTE_DATA_DIR=str(tmp_path), MPLBACKEND="Agg")
    proc = subprocess.run(
        [sys.executable, "-c", "from dueroute.demo_data.build import demo_graph_path as p; "
         "print(p('tiny', progress=False))"],
        env=env, capture_output=True, text=True, timeout=600,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    graph = proc.stdout.strip()
    _run_build_steps(instructions, graph, env)
    assert landmarks_path(Path(graph)).is_file()


@pytest.mark.slow
def test_build_steps_build_the_demo_region(
    instructions: list[tuple[str, str]], tmp_path: Path
) -> None:
    """The exact build steps with the demo region (about two minutes): the graph and its
    landmarks end up in DUEROUTE_DATA_DIR, where graph-init publishes them from."""
    env = dict(os.environ, DUEROUTE_DATA_DIR=str(tmp_path), MPLBACKEND="Agg")
    _run_build_steps(instructions, "demo", env)
    names = sorted(p.name for p in tmp_path.glob("*.npz"))
    assert len(names) == 2 and names[0].endswith(".landmarks.npz"), names


# --------------------------------------------------------------------------------------------
# Health check and graph publisher


class _Readyz(http.server.BaseHTTPRequestHandler):
    status = 200

    def do_GET(self) -> None:  # noqa: N802 (http.server naming)
        code = self.status if self.path == "/readyz" else 404
        self.send_response(code)
        self.end_headers()
        self.wfile.write(b"{}")

    def log_message(self, *args: Any) -> None:
        pass


@pytest.fixture
def readyz_server() -> Iterator[tuple[int, type[_Readyz]]]:
    handler = type("Handler", (_Readyz,), {"status": 200})
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield server.server_address[1], handler
    finally:
        server.shutdown()
        server.server_close()


def _healthcheck(port: int) -> int:
    env = dict(os.environ, DUEROUTE_PORT=str(port))
    proc = subprocess.run(
        [sys.executable, str(DOCKER / "healthcheck.py")], env=env, capture_output=True, timeout=30
    )
    return proc.returncode


def test_healthcheck_follows_readyz(readyz_server: tuple[int, type[_Readyz]]) -> None:
    """Docker HEALTHCHECK semantics (Dockerfile reference): exit 0 healthy, 1 unhealthy."""
    port, handler = readyz_server
    assert _healthcheck(port) == 0
    handler.status = 503
    assert _healthcheck(port) == 1


def test_healthcheck_fails_when_nothing_listens() -> None:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    assert _healthcheck(port) == 1


def test_publish_graph_replaces_files_atomically(tmp_path: Path) -> None:
    """A reader that mapped the old file keeps its bytes after a publish (POSIX rename(2):
    the old inode lives on while mapped), and new readers see the new file."""
    src, dst = tmp_path / "src", tmp_path / "dst"
    src.mkdir()
    (src / "g.npz").write_bytes(b"new" * 1000)
    (src / "g.landmarks.npz").write_bytes(b"lm")
    (src / "notes.txt").write_text("not a graph")
    dst.mkdir()
    (dst / "g.npz").write_bytes(b"old" * 1000)
    with open(dst / "g.npz", "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as m:
        proc = subprocess.run(
            [sys.executable, str(DOCKER / "publish_graph.py"), str(src), str(dst)],
            capture_output=True,
            text=True,
            timeout=60,
        )
        assert proc.returncode == 0, proc.stderr
        assert m[:3] == b"old"
    assert (dst / "g.npz").read_bytes() == b"new" * 1000
    assert (dst / "g.landmarks.npz").read_bytes() == b"lm"
    assert sorted(p.name for p in dst.iterdir()) == ["g.landmarks.npz", "g.npz"]


def test_publish_graph_refuses_an_empty_source(tmp_path: Path) -> None:
    proc = subprocess.run(
        [sys.executable, str(DOCKER / "publish_graph.py"), str(tmp_path), str(tmp_path / "d")],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert proc.returncode != 0 and "no .npz graph files" in proc.stderr


class _PolicyDouble(http.server.BaseHTTPRequestHandler):
    """PUT /v1/policy as the HTTP contract describes it (bearer token, ?dry_run=true)."""

    token = "s3cret-token"
    received: list[tuple[str, bytes]] = []

    def do_PUT(self) -> None:  # noqa: N802 (http.server naming)
        body = self.rfile.read(int(self.headers["Content-Length"]))
        type(self).received.append((self.path, body))
        if self.headers.get("Authorization") != f"Bearer {self.token}":
            code, doc = 401, {"detail": "missing or wrong bearer token"}
        elif body != b"ONNX-BYTES":
            code, doc = 400, {"detail": ["not an ONNX model", "schema version missing"]}
        else:
            code, doc = 200, {"sha256": "ab" * 32}
        raw = json.dumps(doc).encode()
        self.send_response(code)
        self.send_header("Content-Length", str(len(raw)))
        self.end_headers()
        self.wfile.write(raw)

    def log_message(self, *args: Any) -> None:
        pass


def test_push_policy_puts_the_file_with_the_token(tmp_path: Path) -> None:
    """The rollout helper speaks the documented API: PUT /v1/policy with a bearer token, the
    file as the body, ?dry_run=true for a dry run; a refusal exits 1 listing the problems."""
    handler = type("Handler", (_PolicyDouble,), {"received": []})
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    good, bad = tmp_path / "good.onnx", tmp_path / "bad.onnx"
    good.write_bytes(b"ONNX-BYTES")
    bad.write_bytes(b"junk")

    def push(*args: str, token: str = "s3cret-token") -> subprocess.CompletedProcess[str]:
        env = dict(
            os.environ, DUEROUTE_PORT=str(server.server_address[1]), DUEROUTE_ADMIN_TOKEN=token
        )
        return subprocess.run(
            [sys.executable, str(DOCKER / "push_policy.py"), *args],
            env=env,
            capture_output=True,
            text=True,
            timeout=60,
        )

    try:
        ok = push(str(good))
        assert ok.returncode == 0 and "is active" in ok.stdout
        dry = push("--dry-run", str(good))
        assert dry.returncode == 0 and "dry run" in dry.stdout
        refused = push(str(bad))
        assert refused.returncode == 1 and "schema version missing" in refused.stderr
        wrong = push(str(good), token="wrong-token")
        assert wrong.returncode == 1 and "HTTP 401" in wrong.stderr
        assert push(str(good), token="").returncode == 2
        assert push(str(tmp_path / "missing.onnx")).returncode == 2
    finally:
        server.shutdown()
        server.server_close()
    paths = [p for p, _ in handler.received]
    assert paths == ["/v1/policy", "/v1/policy?dry_run=true", "/v1/policy", "/v1/policy"]
    assert handler.received[0][1] == b"ONNX-BYTES"


# --------------------------------------------------------------------------------------------
# Compose file and load balancer


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    doc = yaml.safe_load(COMPOSE.read_text())
    assert isinstance(doc, dict)
    return doc


def test_compose_services_and_replicas(compose: dict[str, Any]) -> None:
    services = compose["services"]
    assert {"graph-init", "router", "balancer"} <= set(services)
    router = services["router"]
    assert router["deploy"]["replicas"] >= 2
    assert router["depends_on"]["graph-init"]["condition"] == "service_completed_successfully"
    assert services["balancer"]["image"].startswith("nginx:")
    assert services["balancer"]["depends_on"]["router"]["condition"] == "service_healthy"
    # the balancer is published on loopback only
    assert all(str(p).startswith("127.0.0.1:") for p in services["balancer"]["ports"])


def test_compose_replicas_share_one_redis(compose: dict[str, Any]) -> None:
    """The replicas' DUEROUTE_REDIS_URL names the compose service "redis" on the port it
    exposes (Redis's default 6379, Redis docs), with persistence on (appendonly) on a volume of
    its own, and the replicas wait for its health check (``redis-cli ping``)."""
    from urllib.parse import urlsplit

    from dueroute.service.server.settings import Settings

    services = compose["services"]
    redis_svc, router = services["redis"], services["router"]
    url = router["environment"]["DUEROUTE_REDIS_URL"]
    assert Settings(redis_url=url).redis_url == url  # a URL the service accepts
    parts = urlsplit(url)
    assert parts.hostname == "redis" and str(parts.port) in [str(p) for p in redis_svc["expose"]]
    assert router["depends_on"]["redis"]["condition"] == "service_healthy"
    assert redis_svc["healthcheck"]["test"][1:] == ["redis-cli", "ping"]
    command = redis_svc["command"]
    assert command[command.index("--appendonly") + 1] == "yes"
    assert any(v.split(":")[0] in compose["volumes"] for v in redis_svc["volumes"])


def test_compose_graph_volume_is_shared_read_only(compose: dict[str, Any]) -> None:
    """The replicas find the demo graph ('demo' in DUEROUTE_DATA_DIR, as demo_data.build
    resolves it) on a read-only volume that graph-init filled."""
    from dueroute.demo_data.build import DATA_DIR_ENV

    router = compose["services"]["router"]
    env = router["environment"]
    assert env["DUEROUTE_GRAPH"] == "demo"
    mounts = {v.split(":")[1]: v for v in router["volumes"]}
    graph_mount = env[DATA_DIR_ENV]
    assert mounts[graph_mount].endswith(":ro")
    volume = mounts[graph_mount].split(":")[0]
    assert volume in compose["volumes"]
    init = compose["services"]["graph-init"]
    assert any(v.startswith(f"{volume}:") and not v.endswith(":ro") for v in init["volumes"])
    # graph-init publishes into the mount point, replicas read from it under the same name
    assert init["command"][-1] == graph_mount
    # the graph is the only shared volume: policy and live costs are shared through Redis,
    # and each replica keeps its copy of the policy in a directory of its own
    assert set(mounts) == {graph_mount}


def test_compose_environment_names_real_settings(compose: dict[str, Any]) -> None:
    """Every DUEROUTE_* variable the compose file sets is read by the code: a field of
    service.settings, or the demo data directory of demo_data.build."""
    from dueroute.demo_data.build import DATA_DIR_ENV
    from dueroute.service.server.settings import Settings

    fields = set(Settings.model_fields)
    for name in compose["services"]["router"]["environment"]:
        assert name.startswith("DUEROUTE_")
        known = name == DATA_DIR_ENV or name[len("DUEROUTE_") :].lower() in fields
        assert known, f"{name} is neither a service setting nor {DATA_DIR_ENV}"


def test_compose_paths_exist(compose: dict[str, Any]) -> None:
    """Every build context, Dockerfile and bind-mounted host path names a repository path."""
    base = COMPOSE.parent
    for name, svc in compose["services"].items():
        build = svc.get("build")
        if build:
            context = (base / build["context"]).resolve()
            assert context.is_dir(), name
            assert (context / build["dockerfile"]).is_file(), name
        for vol in svc.get("volumes", []):
            host = vol.split(":")[0]
            if host.startswith((".", "/")):
                assert (base / host).exists(), f"{name}: {host} does not exist"
    cmd = compose["services"]["graph-init"]["command"]
    assert cmd[1].startswith("/app/docker/") and (DOCKER / Path(cmd[1]).name).is_file()
    parser = build_parser()
    assert parser.parse_args(compose["services"]["router"]["command"][1:]).command == "serve"


def test_nginx_upstream_is_the_router_service(compose: dict[str, Any]) -> None:
    conf = NGINX_CONF.read_text()
    port = compose["services"]["router"]["environment"]["DUEROUTE_PORT"]
    assert re.search(rf"server\s+router:{port}\b", conf)
    assert re.search(r"listen\s+8080;", conf)
    # any replica answers any plan (shared through Redis): no 404 retry, no sticky routing
    assert "http_404" not in conf
    assert not re.search(r"^\s*(ip_hash|hash|sticky)\b", conf, re.MULTILINE)
    assert "proxy_buffering off;" in conf  # Server-Sent Events pass through
    assert "return 409" not in conf  # policy changes through the balancer reach every replica


def test_nginx_config_is_valid(tmp_path: Path) -> None:
    """``nginx -t`` (the nginx reference check), with the service name pointed at loopback."""
    nginx = os.environ.get("NGINX") or shutil.which("nginx")
    if nginx is None:
        pytest.skip("no nginx binary on this machine (set NGINX=/path/to/nginx to run)")
    (tmp_path / "logs").mkdir()
    (tmp_path / "tmp").mkdir()
    site = NGINX_CONF.read_text().replace("server router:", "server 127.0.0.1:")
    (tmp_path / "site.conf").write_text(site)
    temp = " ".join(
        f"{k}_temp_path {tmp_path}/tmp;"
        for k in ("client_body", "proxy", "fastcgi", "uwsgi", "scgi")
    )
    (tmp_path / "nginx.conf").write_text(
        f"pid {tmp_path}/nginx.pid; error_log {tmp_path}/logs/error.log;\n"
        f"events {{}}\nhttp {{ access_log off; {temp} include {tmp_path}/site.conf; }}\n"
    )
    proc = subprocess.run(
        [nginx, "-t", "-p", str(tmp_path), "-c", str(tmp_path / "nginx.conf")],
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert proc.returncode == 0, proc.stderr
