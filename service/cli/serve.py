"""``dueroute serve``: run the HTTP service (FastAPI on uvicorn, one process, worker threads)."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.service.cli.common import GRAPH_HELP, add_json_flag, emit

# flag name -> Settings field (every flag defaults to None: the environment / default applies)
_FLAGS = {
    "graph": "graph",
    "policy": "policy",
    "policy_dir": "policy_dir",
    "traffic_dir": "traffic_dir",
    "host": "host",
    "port": "port",
    "workers": "workers",
    "deadline_tolerance_ms": "deadline_tolerance_ms",
    "response_headroom_ms": "response_headroom_ms",
    "max_body_bytes": "max_body_bytes",
    "background_max": "background_max",
    "background_ttl_s": "background_ttl_s",
    "on_damaged_policy": "on_damaged_policy",
    "log_level": "log_level",
    "turn_costs": "turn_costs",
    "uturns": "uturns",
    "api_keys_file": "api_keys_file",
    "max_connections": "max_connections",
}


def register(sub: Any) -> None:
    p = sub.add_parser(
        "serve",
        help="run the HTTP routing service",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=_settings_epilog(),
        description=(
            "Serve POST /v1/plans and friends (OpenAPI at /docs). Every flag can also be set "
            "with the environment variable DUEROUTE_<FLAG> (e.g. DUEROUTE_WORKERS=4); flags win. "
            "With no arguments: the demo region and the default policy on 127.0.0.1:8000."
        ),
    )
    p.add_argument("--graph", default=None, help=GRAPH_HELP + " (default demo)")
    p.add_argument("--policy", type=Path, default=None, help="ONNX policy file to activate")
    p.add_argument(
        "--policy-dir",
        type=Path,
        default=None,
        help="where uploaded policies and the active one persist "
        "(default $XDG_STATE_HOME/dueroute/policies, i.e. ~/.local/state/dueroute/policies)",
    )
    p.add_argument(
        "--traffic-dir",
        type=Path,
        default=None,
        help="where accepted live-traffic batches are journaled; replicas sharing it converge "
        "(default: 'traffic' beside the policy directory)",
    )
    p.add_argument("--host", default=None, help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=None, help="TCP port (default 8000)")
    p.add_argument(
        "--workers", type=int, default=None, help="searches at once (default: CPU count)"
    )
    p.add_argument(
        "--admin-token-file",
        type=Path,
        default=None,
        help="file holding the bearer token that enables PUT /v1/policy, rollback and "
        "POST/DELETE /v1/traffic "
        "(or set DUEROUTE_ADMIN_TOKEN; a token on the command line would show in 'ps')",
    )
    p.add_argument(
        "--deadline-tolerance-ms",
        type=float,
        default=None,
        help="promised lateness bound beyond deadline_ms (default 5)",
    )
    p.add_argument(
        "--response-headroom-ms",
        type=float,
        default=None,
        help="the search stops this long before the deadline to build the answer (default 2)",
    )
    p.add_argument("--max-body-bytes", type=int, default=None, help="request body limit (16384)")
    p.add_argument(
        "--background-max",
        type=int,
        default=None,
        help="plans the plan store holds at once (default 10000)",
    )
    p.add_argument(
        "--background-ttl-s",
        type=float,
        default=None,
        help="seconds a stored plan is kept after it finished (default 300)",
    )
    p.add_argument(
        "--on-damaged-policy",
        choices=("previous", "refuse"),
        default=None,
        help="a damaged stored active policy: start with the newest good one from the "
        "history and report it (previous, the default), or refuse to start",
    )
    p.add_argument(
        "--turn-costs",
        default=None,
        metavar="left=S,right=S,uturn=S",
        help="seconds added for each left turn, right turn and U-turn (default none)",
    )
    p.add_argument(
        "--uturns",
        choices=("forbid_at_junctions", "allow"),
        default=None,
        help="U-turns at junctions (default forbid_at_junctions; dead ends always allow them)",
    )
    p.add_argument(
        "--api-keys-file",
        default=None,
        metavar="FILE",
        help="API keys, one 'name:key' per line: callers sending X-API-Key are told apart by "
        "it (without one, by client address, with the anonymous caps)",
    )
    p.add_argument(
        "--max-connections",
        type=int,
        default=None,
        help="open connections kept at most (default 1000); keep it below the descriptor limit",
    )
    p.add_argument("--log-level", default=None, help="debug, info, warning, error")
    p.add_argument("--plain-logs", action="store_true", help="human-readable instead of JSON logs")
    p.add_argument(
        "--check",
        action="store_true",
        help="validate the settings, graph path and policy, print them and exit (no server)",
    )
    add_json_flag(p)
    p.set_defaults(func=run)


def _settings_epilog() -> str:
    """Every setting as its environment variable, default and one-line meaning."""
    from dueroute.service.server.settings import Settings

    lines = ["settings (environment variables; the flags above override them):"]
    for name, field in Settings.model_fields.items():
        default = {"workers": "cpu count", "policy_dir": "~/.local/state/dueroute/policies"}.get(
            name, field.default
        )
        lines.append(f"  DUEROUTE_{name.upper():<24} {field.description} (default: {default})")
    return "\n".join(lines)


def build_settings(args: argparse.Namespace) -> Any:
    """Settings from the environment with the given flags on top (raises on a bad value)."""
    from pydantic import ValidationError

    from dueroute.service.server.settings import Settings

    overrides: dict[str, Any] = {
        field: getattr(args, flag)
        for flag, field in _FLAGS.items()
        if getattr(args, flag, None) is not None
    }
    if getattr(args, "plain_logs", False):
        overrides["log_json"] = False
    token_file = getattr(args, "admin_token_file", None)
    if token_file is not None:
        try:
            overrides["admin_token"] = Path(token_file).read_text().strip()
        except OSError as exc:
            raise InvalidRequest(f"cannot read --admin-token-file {token_file}: {exc}") from exc
    try:
        return Settings(**overrides)
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or 'settings'}: {e['msg']}" for e in exc.errors()
        )
        raise InvalidRequest(f"invalid service settings ({problems})") from None


def run(args: argparse.Namespace) -> int:
    import uvicorn

    from dueroute.demo_data.build import resolve_graph_path
    from dueroute.service.server.app import configure_logging, create_app
    from dueroute.service.server.http_edge import server_config
    from dueroute.service.server.policy_store import PolicyDamaged, PolicyRejected

    settings = build_settings(args)
    configure_logging(settings.log_level, settings.log_json)
    if settings.graph != "demo":
        path = resolve_graph_path(settings.graph)  # fail now, not in the warm-up thread
        if not path.is_file():
            raise InvalidRequest(f"graph file not found: {path}")
    try:
        app = create_app(settings)
    except PolicyRejected as exc:
        raise InvalidRequest(f"policy refused: {'; '.join(exc.problems)}") from None
    except PolicyDamaged as exc:
        raise InvalidRequest(str(exc)) from None
    if getattr(args, "check", False):
        report = {
            "settings": settings.model_dump(mode="json"),
            "policy": app.state.dueroute.policies.active.info(),
        }
        emit(report, getattr(args, "json", False), _human_check)
        return 0
    uvicorn.Server(server_config(app, settings)).run()
    return 0


def _human_check(report: dict[str, Any]) -> str:
    lines = ["settings ok:"]
    lines += [f"  {k} = {v}" for k, v in report["settings"].items()]
    pol = report["policy"]
    lines.append(
        f"policy: {pol['sha256'] or 'none'} ({pol['source']})"
        + (
            f", 'learned' served by {pol['fallback_controller']}"
            if pol["fallback_controller"]
            else ""
        )
    )
    return "\n".join(lines)
