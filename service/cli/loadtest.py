"""``dueroute loadtest``: latency against route quality for a running service on this machine."""

from __future__ import annotations

import argparse
import asyncio
import signal
import sys
import threading
import time
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.limits import DEFAULT_CONTROLLER
from dueroute.planner.query_file import read_query_file
from dueroute.service.cli.common import (
    GRAPH_HELP,
    TRAFFIC_HELP,
    add_alias,
    add_json_flag,
    add_list_option,
    add_out_option,
    add_turn_options,
    emit,
    load_graph_arg,
    load_traffic_arg,
    progress,
    turn_profile_arg,
)


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def register(sub: Any) -> None:
    p = sub.add_parser(
        "loadtest",
        help="load a running dueroute service on this machine: latency vs route quality",
        description=(
            "Send plan requests to a dueroute service on this machine (loopback only) for every "
            "cell of controllers x concurrency x deadlines, each for --duration seconds, and "
            "write summary.json, summary.md, requests.csv and plots to --out."
        ),
    )
    p.add_argument("--url", default="http://127.0.0.1:8000", help="service base URL (loopback)")
    p.add_argument("--graph", default=None, help=GRAPH_HELP + "; needed for --count/--reference")
    src = p.add_mutually_exclusive_group()
    src.add_argument(
        "--queries", default=None, metavar="FILE.csv", help="query file (origin,destination CSV)"
    )
    src.add_argument(
        "--count",
        type=int,
        default=None,
        metavar="N",
        help="N random pairs connected both ways in --graph (default 200 when --graph is given)",
    )
    add_alias(src, "--random", "--count", dest="count", type=int)
    add_list_option(p, "--concurrency", int, [1, 2, 4, 8], "requests in flight, e.g. 1,2,4,8")
    add_list_option(p, "--deadlines-ms", int, [5, 10, 20, 50], "deadline_ms values, e.g. 5,10,20")
    add_alias(p, "--deadlines", "--deadlines-ms", dest="deadlines_ms", type=_int_list)
    p.add_argument("--duration", type=float, default=10.0, help="seconds per cell")
    add_list_option(
        p,
        "--controllers",
        str,
        [DEFAULT_CONTROLLER],
        "controllers, e.g. decreasing,ana,fixed:1.5,learned",
    )
    add_alias(p, "--controller", "--controllers", dest="controllers", type=_str_list)
    p.add_argument(
        "--reference",
        action="store_true",
        help="compute exact costs locally (scipy) for true quality; needs --graph (under turn "
        "rules the legal optimum, for the turn profile given by --turn-costs and --uturns, which "
        "must be the service's)",
    )
    add_turn_options(p)
    p.add_argument(
        "--traffic",
        default=None,
        metavar="FILE.json",
        help=TRAFFIC_HELP + "; --reference computes the optima on the changed costs, and "
        "with --admin-token-file the service is first set to exactly this traffic",
    )
    p.add_argument(
        "--admin-token-file",
        default=None,
        metavar="FILE",
        help="file holding the service's admin token: clear the service's live traffic and "
        "post --traffic before the run (answers on another cost version are then counted)",
    )
    p.add_argument(
        "--scenario",
        choices=("grid", "attack", "slow-clients"),
        default="grid",
        help="grid (default): every cell of controllers x concurrency x deadlines; attack: a "
        "polite caller (first deadline and controller) alone, then while --abusers callers "
        "loop 60 s fixed:5 requests on a long trip; slow-clients: the same while "
        "--slow-connections connections stall their headers or bodies",
    )
    p.add_argument("--abusers", type=int, default=2, help="abusive callers (scenario attack)")
    p.add_argument(
        "--slow-connections",
        type=int,
        default=300,
        help="stalling connections (scenario slow-clients)",
    )
    p.add_argument("--max-requests", type=int, default=20_000, help="most requests per cell")
    p.add_argument(
        "--tolerance-ms",
        type=float,
        default=5.0,
        help="an answer later than deadline + this counts as late (default 5)",
    )
    p.add_argument("--ready-timeout", type=float, default=60.0, help="seconds to wait for /readyz")
    p.add_argument("--warmup", type=int, default=3, help="unrecorded requests per controller")
    p.add_argument("--seed", type=int, default=0, help="seed of the random queries and order")
    add_out_option(p, required=True, metavar="DIR", help="directory for the summary and plots")
    add_json_flag(p)
    p.set_defaults(func=run)


def _run_scenario(args: argparse.Namespace, queries: Any, reference: Any) -> int:
    import json
    from pathlib import Path

    from dueroute.service.loadtest import scenarios

    given_deadline = "--deadlines-ms" in sys.argv or "--deadlines" in sys.argv
    config = scenarios.ScenarioConfig(
        url=args.url,
        scenario=args.scenario,
        deadline_ms=args.deadlines_ms[0] if given_deadline else 50,
        controller=args.controllers[0],
        duration_s=args.duration,
        abusers=args.abusers,
        slow_connections=args.slow_connections,
        tolerance_ms=args.tolerance_ms,
        ready_timeout_s=args.ready_timeout,
    )
    bar = progress(total=2, unit="phase", desc=f"scenario {args.scenario}")

    def on_phase(text: str) -> None:
        bar.set_postfix_str(text, refresh=False)
        if bar.n < bar.total and text != "polite caller alone":
            bar.update(1)

    try:
        summary = asyncio.run(scenarios.run_scenario(config, queries, reference, on_phase))
    finally:
        bar.update(bar.total - bar.n)
        bar.close()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "scenario.json").write_text(json.dumps(summary, indent=2, default=str) + "\n")
    table = scenarios.markdown(summary)
    (out / "scenario.md").write_text(table + "\n")
    if args.json:
        emit({"summary": summary, "files": {"scenario_json": str(out / "scenario.json")}}, True)
    else:
        print(table)
        print(f"\nscenario_json: {out / 'scenario.json'}")
    return 0


def _int_list(text: str) -> list[int]:
    return [int(v) for v in text.split(",") if v.strip()]


def _str_list(text: str) -> list[str]:
    return [v.strip() for v in text.split(",") if v.strip()]


def run(args: argparse.Namespace) -> int:
    from dueroute.service.loadtest import runner as lt

    controllers = tuple(dict.fromkeys(args.controllers))
    if args.warmup < 0:
        raise InvalidRequest(f"--warmup must be >= 0, got {args.warmup}")
    if args.ready_timeout <= 0 or args.ready_timeout > 600:
        raise InvalidRequest(
            f"--ready-timeout must be in (0, 600] seconds, got {args.ready_timeout}"
        )
    config = lt.LoadTestConfig(
        url=args.url,
        concurrency=tuple(dict.fromkeys(args.concurrency)),
        deadlines_ms=tuple(dict.fromkeys(args.deadlines_ms)),
        controllers=controllers,
        duration_s=args.duration,
        max_requests=args.max_requests,
        tolerance_ms=args.tolerance_ms,
        warmup_requests=args.warmup,
        ready_timeout_s=args.ready_timeout,
        seed=args.seed,
    )
    graph = load_graph_arg(args.graph) if args.graph is not None else None
    if args.reference and graph is None:
        raise InvalidRequest("--reference needs --graph (the graph the service searches)")
    if args.queries is not None:
        queries = read_query_file(args.queries, graph.n_nodes if graph is not None else None)
        source = f"file {args.queries}"
    elif graph is not None:
        queries, source = lt.random_reachable_pairs(
            graph, args.count if args.count is not None else 200, seed=args.seed
        )
    else:
        raise InvalidRequest(
            "no queries: pass --queries FILE.csv, or --graph GRAPH (with --count N) to draw them"
        )
    traffic_doc = None
    costs = None
    token = None
    if args.admin_token_file is not None and args.traffic is None:
        raise InvalidRequest("--admin-token-file is only used with --traffic")
    if args.traffic is not None:
        if not args.reference and args.admin_token_file is None:
            raise InvalidRequest(
                "--traffic needs --reference (optima on the changed costs) and/or "
                "--admin-token-file (to set the service's traffic to it)"
            )
        if graph is None:
            raise InvalidRequest("--traffic needs --graph (the graph the service searches)")
        import json
        from pathlib import Path

        from dueroute.demo_data.traffic import resolve_traffic_path

        path = resolve_traffic_path(args.traffic)
        costs = load_traffic_arg(args.traffic, graph)  # validates the document on the graph
        traffic_doc = json.loads(Path(path).read_text(encoding="utf-8"))
        if args.admin_token_file is not None:
            try:
                token = Path(args.admin_token_file).read_text(encoding="utf-8").strip()
            except OSError as exc:
                raise InvalidRequest(
                    f"cannot read --admin-token-file {args.admin_token_file}: {exc.strerror or exc}"
                ) from None
            if not token:
                raise InvalidRequest(f"--admin-token-file {args.admin_token_file} is empty")
    reference = (
        lt.Reference(graph, queries, costs=costs, turn_profile=turn_profile_arg(args))
        if args.reference
        else None
    )

    if args.scenario != "grid":
        return _run_scenario(args, queries, reference)
    result = lt.LoadTestResult(config=config, queries=list(queries), queries_source=source)
    bar = progress(total=config.n_cells, unit="cell", desc="loadtest")
    last_postfix = [0.0]

    def on_record(rec: lt.RequestRecord) -> None:
        now = time.monotonic()
        if now - last_postfix[0] >= 0.5:
            last_postfix[0] = now
            cell = result.cells[-1]
            bar.set_postfix_str(
                f"{cell.controller} c={cell.concurrency} d={cell.deadline_ms}ms "
                f"n={len(cell.records)}",
                refresh=False,
            )

    def on_cell(cell: lt.CellResult) -> None:
        bar.update(1)

    code = 0
    previous_term = None
    if threading.current_thread() is threading.main_thread():
        # SIGTERM (e.g. from a job runner) stops the run like Ctrl-C: write what was measured
        previous_term = signal.signal(signal.SIGTERM, _interrupt)
    try:
        asyncio.run(
            lt.run_loadtest(
                config,
                queries,
                graph=graph,
                reference=reference,
                result=result,
                on_record=on_record,
                on_cell=on_cell,
                traffic_doc=traffic_doc,
                admin_token=token,
            )
        )
    except KeyboardInterrupt:
        result.interrupted = True
        code = 130
        print("dueroute: interrupted; writing the cells measured so far", file=sys.stderr)
    finally:
        bar.close()
        if previous_term is not None:
            signal.signal(signal.SIGTERM, previous_term)
    if args.traffic is not None:
        result.server.setdefault("traffic", {})["source"] = args.traffic
    if not result.cells:
        if code:
            return code
        raise InvalidRequest("no cell ran; nothing to write")
    paths = lt.write_outputs(result, args.out)
    summary = lt.summarize(result)
    if args.json:
        emit({"summary": summary, "files": {k: str(v) for k, v in paths.items()}}, True)
    else:
        print(lt.markdown_table(summary))
        print()
        for name, path in paths.items():
            print(f"{name}: {path}")
    return code
