"""Evaluate a learned weight policy against every baseline controller on held-out queries.

For each contract (expansion budgets at 0.5x, 1x and 2x the one the policy was trained on, and
optional wall-clock deadlines) every controller searches every query through
:func:`planner.session.plan`; the final route's quality is ``optimal / cost`` (0 when no route
was found in time), with the optimum from ``scipy.sparse.csgraph.dijkstra``.

Outputs in the report folder:

=========================  ======================================================================
file                       content
=========================  ======================================================================
``summary.json``           everything below as numbers, plus the settings of the run
``results.md``             markdown tables: mean quality per controller and contract; details
                           and paired tests at the trained contract
``per_query.csv``          one row per (contract, controller, query)
``quality_boxplot.png``    quality per controller at each budget contract, mean marked
``anytime_profile.png``    mean quality against the share of the contract spent
``learned_weights.png``    the learned policy's weight per decision step: median, faded runs
``training_curve.png``     episode return while training (when the policy's curve CSV exists)
``feature_importance.png`` permutation importance of each feature
=========================  ======================================================================

The paired test is the Wilcoxon signed-rank test (``scipy.stats.wilcoxon``, two-sided) on the
per-query quality differences, learned minus the other controller; queries where both reach the
same quality carry no information and are dropped (its default ``zero_method="wilcox"``).
"""

from __future__ import annotations

import csv
import json
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.features import FEATURE_NAMES
from dueroute.planner.graph import RoadGraph
from dueroute.planner.limits import WEIGHTS
from dueroute.planner.session import Planner, PlanResult, SearchStats, plan
from dueroute.policies.env import OptimalCosts, quality, sample_queries
from dueroute.policies.runtime import LEARNED, LearnedController, Policy, resolve_controller

BASELINES: tuple[str, ...] = (
    *(f"fixed:{w:g}" for w in WEIGHTS),
    "random",
    "decreasing",
    "ana",
)
CONTROLLERS: tuple[str, ...] = (*BASELINES, LEARNED)
BUDGET_FACTORS = (0.5, 1.0, 2.0)
PROFILE_POINTS = 41


@dataclass
class Run:
    """One search of the evaluation, reduced to what the report needs."""

    quality: float
    status: str
    expansions: int
    elapsed_ms: float
    #: (share of the contract spent, quality) at each improvement
    profile: list[tuple[float, float]]
    #: weight of each decision step
    weights: list[float]
    #: time spent deciding weights between steps (stats, features, controller), ms
    control_ms: float = 0.0


@dataclass
class Contract:
    kind: str  # "budget" or "deadline"
    value: float  # expansions or milliseconds
    trained: bool = False

    @property
    def label(self) -> str:
        if self.kind == "budget":
            return f"budget {int(self.value):,} exp" + (" (trained)" if self.trained else "")
        return f"deadline {self.value:g} ms"

    @property
    def key(self) -> str:
        value = str(int(self.value)) if self.kind == "budget" else f"{self.value:g}"
        return f"{self.kind}_{value}"


@dataclass
class EvalSettings:
    """What :func:`evaluate` runs (defaults follow the policy's training contract)."""

    n_queries: int = 500
    seed: int = 1000
    budgets: list[int] | None = None
    deadlines_ms: list[float] = field(default_factory=list)
    controllers: Sequence[str] = CONTROLLERS
    steps: int | None = None
    importance_queries: int = 100
    #: live cost version (``planner.traffic.CostVersion``) every search and optimum uses
    costs: Any = None
    #: where ``costs`` came from (a file or scenario name), for the report
    traffic_source: str | None = None


def run_one(
    planner: Planner,
    origin: int,
    destination: int,
    optimal_s: float,
    controller: Any,
    contract: Contract,
    steps: int,
    seed: int,
    costs: Any = None,
) -> Run:
    """Search one query with one controller under one contract (on live ``costs`` if given)."""
    kwargs: dict[str, Any] = (
        {"budget_expansions": int(contract.value)}
        if contract.kind == "budget"
        else {"deadline_ms": float(contract.value)}
    )
    res: PlanResult = plan(
        planner,
        origin,
        destination,
        controller=controller,
        steps=steps,
        seed=seed,
        costs=costs,
        **kwargs,
    )
    profile = []
    for imp in res.improvements:
        spent = (
            imp.expansions / contract.value
            if contract.kind == "budget"
            else imp.elapsed_ms / contract.value
        )
        profile.append((min(spent, 1.0), quality(optimal_s, imp.cost_s)))
    return Run(
        quality=quality(optimal_s, res.cost_s),
        status=res.status,
        expansions=res.expansions,
        elapsed_ms=res.elapsed_ms,
        profile=profile,
        weights=[w.weight for w in res.weights],
        control_ms=res.control_ms,
    )


def anytime_curve(runs: list[Run], points: np.ndarray) -> np.ndarray:
    """Mean quality of ``runs`` after each share of the contract in ``points`` (float64[p])."""
    out = np.zeros((len(runs), points.shape[0]))
    for i, r in enumerate(runs):
        if r.status == "optimal" and not r.profile:
            out[i] = r.quality  # solved before any step (origin == destination)
        for spent, q in r.profile:
            out[i, points >= spent - 1e-12] = q
    return out.mean(axis=0) if runs else out.sum(axis=0)


def paired_test(learned: np.ndarray, other: np.ndarray, seed: int = 0) -> dict[str, Any]:
    """Wilcoxon signed-rank test (scipy.stats.wilcoxon, two-sided) and a bootstrap 95% CI of
    the mean per-query difference learned - other."""
    from scipy.stats import wilcoxon

    diff = np.asarray(learned) - np.asarray(other)
    rng = np.random.default_rng(seed)
    boot = rng.choice(diff, size=(2000, diff.shape[0]), replace=True).mean(axis=1)
    out: dict[str, Any] = {
        "test": "Wilcoxon signed-rank (scipy.stats.wilcoxon, two-sided, zero_method='wilcox')",
        "mean_difference": float(diff.mean()),
        "ci95_mean_difference": [float(np.quantile(boot, 0.025)), float(np.quantile(boot, 0.975))],
        "learned_better": int(np.sum(diff > 0)),
        "learned_worse": int(np.sum(diff < 0)),
        "ties": int(np.sum(diff == 0)),
    }
    if np.any(diff != 0):
        res = wilcoxon(learned, other, alternative="two-sided")
        out["p_value"] = float(res.pvalue)
        out["statistic"] = float(res.statistic)
    else:
        out["p_value"] = 1.0
        out["statistic"] = None
    return out


class _PermutedFeature:
    """Wraps a learned controller; replaces one feature with a draw from its observed values."""

    def __init__(self, inner: LearnedController, index: int, pool: np.ndarray, seed: int) -> None:
        self.inner, self.index, self.pool = inner, index, pool
        self.rng = np.random.default_rng(seed)
        self.name, self.mode = inner.name, inner.mode

    def reset(self, seed: int | None) -> float:
        return self.inner.reset(seed)

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        x = np.array(features, dtype=np.float32, copy=True)
        x[self.index] = self.pool[self.rng.integers(self.pool.shape[0])]
        return self.inner.decide(x, stats)


class _Recording:
    """Wraps a controller and keeps every feature vector it was shown."""

    def __init__(self, inner: Any, sink: list[np.ndarray]) -> None:
        self.inner, self.sink = inner, sink
        self.name, self.mode = inner.name, inner.mode

    def reset(self, seed: int | None) -> float:
        return float(self.inner.reset(seed))

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        self.sink.append(np.asarray(features, dtype=np.float32).copy())
        return float(self.inner.decide(features, stats))


def evaluate(
    graph: RoadGraph,
    policy: Policy,
    out_dir: str | Path,
    settings: EvalSettings | None = None,
    *,
    planner: Planner | None = None,
    curve_csv: str | Path | None = None,
    progress: bool = True,
) -> dict[str, Any]:
    """Run the comparison, write the report folder, return the summary (``summary.json``)."""
    from tqdm import tqdm

    started = time.perf_counter()
    settings = settings or EvalSettings()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    planner = planner or Planner(graph)
    steps = settings.steps if settings.steps is not None else policy.decision_steps
    trained_budget = policy.contract_expansions
    budgets = settings.budgets or [max(1, int(round(f * trained_budget))) for f in BUDGET_FACTORS]
    contracts = [Contract("budget", b, trained=(b == trained_budget)) for b in budgets]
    contracts += [Contract("deadline", d) for d in settings.deadlines_ms]
    main = next((c for c in contracts if c.trained), contracts[0])

    queries = sample_queries(graph, settings.n_queries, settings.seed)
    costs = settings.costs
    optimal = OptimalCosts(graph, None if costs is None else costs.travel_time_s).precompute(
        queries
    )
    # Closures can cut a query off: nothing to find, nothing to compare; keep the others.
    reachable = np.isfinite(optimal)
    unreachable = int(np.count_nonzero(~reachable))
    queries, optimal = queries[reachable], optimal[reachable]
    if queries.shape[0] == 0:
        raise ValueError("no held-out query has a route under these traffic costs")

    results: dict[str, dict[str, list[Run]]] = {c.key: {} for c in contracts}
    learned_features: list[np.ndarray] = []
    total = len(contracts) * len(settings.controllers) * len(queries)
    bar = tqdm(total=total, desc="evaluating", disable=not progress, mininterval=0.5)
    for contract in contracts:
        for spec in settings.controllers:
            runs = []
            for i, (o, d) in enumerate(queries):
                ctrl = resolve_controller(spec, policy=policy, seed=settings.seed + i)
                if spec == LEARNED and contract is main:
                    ctrl = _Recording(ctrl, learned_features)
                runs.append(
                    run_one(
                        planner,
                        int(o),
                        int(d),
                        float(optimal[i]),
                        ctrl,
                        contract,
                        steps,
                        settings.seed + i,
                        costs,
                    )
                )
                bar.update(1)
            results[contract.key][spec] = runs
            bar.set_postfix({"contract": contract.label, "controller": spec}, refresh=False)
    bar.close()

    summary = _summarise(results, contracts, main, settings, steps)
    summary["queries"] = {
        "n": int(len(queries)),
        "seed": settings.seed,
        "mean_optimal_s": float(np.mean(optimal)),
        "unreachable_under_traffic": unreachable,
    }
    if costs is not None:
        summary["traffic"] = {
            k: v for k, v in costs.info(max_listed=0).items() if k not in ("updates",)
        }
        summary["traffic"]["source"] = settings.traffic_source
    summary["policy"] = policy.info()
    summary["graph"] = {
        "name": graph.name,
        "nodes": graph.n_nodes,
        "fingerprint": graph.fingerprint,
    }
    summary["decision_steps"] = steps

    if LEARNED in settings.controllers and learned_features and settings.importance_queries > 0:
        summary["feature_importance"] = _importance(
            planner,
            policy,
            queries,
            optimal,
            main,
            steps,
            settings,
            learned_features,
            results[main.key][LEARNED],
            progress,
        )
    summary["seconds"] = time.perf_counter() - started
    _write_outputs(out_dir, summary, results, contracts, main, curve_csv)
    return summary


def _describe(runs: list[Run]) -> dict[str, Any]:
    q = np.array([r.quality for r in runs])
    return {
        "mean_quality": float(q.mean()),
        "median_quality": float(np.median(q)),
        "p10_quality": float(np.quantile(q, 0.1)),
        "route_found_share": float(np.mean(q > 0)),
        "optimal_proven_share": float(np.mean([r.status == "optimal" for r in runs])),
        "optimal_found_share": float(np.mean(q >= 1.0 - 1e-12)),
        "mean_expansions": float(np.mean([r.expansions for r in runs])),
        "mean_elapsed_ms": float(np.mean([r.elapsed_ms for r in runs])),
    }


def _summarise(
    results: dict[str, dict[str, list[Run]]],
    contracts: list[Contract],
    main: Contract,
    settings: EvalSettings,
    steps: int,
) -> dict[str, Any]:
    by_contract: dict[str, Any] = {}
    for c in contracts:
        by_contract[c.key] = {
            "label": c.label,
            "kind": c.kind,
            "value": c.value,
            "trained": c.trained,
            "controllers": {s: _describe(r) for s, r in results[c.key].items()},
        }
    out: dict[str, Any] = {"contracts": by_contract, "trained_contract": main.key}
    main_runs = results[main.key]
    if LEARNED in main_runs:
        learned_q = np.array([r.quality for r in main_runs[LEARNED]])
        fixed = [s for s in main_runs if s.startswith("fixed:")]
        tests: dict[str, Any] = {}
        if fixed:
            best_fixed = max(fixed, key=lambda s: np.mean([r.quality for r in main_runs[s]]))
            tests["best_fixed"] = {"controller": best_fixed} | paired_test(
                learned_q, np.array([r.quality for r in main_runs[best_fixed]])
            )
        best_base = max(
            (s for s in main_runs if s != LEARNED),
            key=lambda s: np.mean([r.quality for r in main_runs[s]]),
            default=None,
        )
        if best_base is not None:
            tests["best_baseline"] = {"controller": best_base} | paired_test(
                learned_q, np.array([r.quality for r in main_runs[best_base]])
            )
        if "random" in main_runs:
            tests["random"] = {"controller": "random"} | paired_test(
                learned_q, np.array([r.quality for r in main_runs["random"]])
            )
        out["paired_tests"] = tests
        for c in contracts:
            runs = results[c.key]
            if LEARNED in runs:
                lq = np.array([r.quality for r in runs[LEARNED]])
                others = {
                    s: np.mean([r.quality for r in v]) for s, v in runs.items() if s != LEARNED
                }
                best = max(others, key=lambda s: others[s]) if others else None
                if best is not None:
                    by_contract[c.key]["learned_vs_best_baseline"] = {
                        "controller": best
                    } | paired_test(lq, np.array([r.quality for r in runs[best]]))
    return out


def _importance(
    planner: Planner,
    policy: Policy,
    queries: np.ndarray,
    optimal: np.ndarray,
    contract: Contract,
    steps: int,
    settings: EvalSettings,
    features: list[np.ndarray],
    base_runs: list[Run],
    progress: bool,
) -> dict[str, Any]:
    """Permutation importance of each feature for the learned policy.

    ``quality_drop``: mean quality on the first ``importance_queries`` queries minus the mean
    when the feature is replaced at every decision by a random value it took during the
    evaluation (its marginal distribution), i.e. the loss from losing that feature's
    information. ``decision_change``: share of the recorded decisions whose greedy action
    changes when the feature column is shuffled (no search needed; a finer signal).
    """
    from tqdm import tqdm

    obs = np.asarray(features, dtype=np.float32)
    rng = np.random.default_rng(settings.seed)
    base_actions = np.argmax(policy.q_values(obs), axis=1)
    n = min(settings.importance_queries, queries.shape[0])
    base_quality = float(np.mean([r.quality for r in base_runs[:n]]))
    rows = []
    bar = tqdm(
        total=len(FEATURE_NAMES) * n,
        desc="feature importance",
        disable=not progress,
        mininterval=0.5,
    )
    for j, name in enumerate(FEATURE_NAMES):
        shuffled = obs.copy()
        shuffled[:, j] = rng.permutation(shuffled[:, j])
        changed = float(np.mean(np.argmax(policy.q_values(shuffled), axis=1) != base_actions))
        qs = []
        for i in range(n):
            o, d = (int(x) for x in queries[i])
            ctrl = _PermutedFeature(
                LearnedController(policy), j, obs[:, j], seed=settings.seed + 7919 * j + i
            )
            qs.append(
                run_one(
                    planner,
                    o,
                    d,
                    float(optimal[i]),
                    ctrl,
                    contract,
                    steps,
                    settings.seed + i,
                    settings.costs,
                ).quality
            )
            bar.update(1)
        rows.append(
            {
                "feature": name,
                "quality_drop": base_quality - float(np.mean(qs)),
                "decision_change": changed,
            }
        )
    bar.close()
    rows.sort(key=lambda r: (r["quality_drop"], r["decision_change"]), reverse=True)
    return {"queries": n, "base_quality": base_quality, "ranking": rows}


# --------------------------------------------------------------------------------------------
# Report files


def _fmt_p(p: float | None) -> str:
    if p is None or not math.isfinite(p):
        return "n/a"
    return f"{p:.2g}" if p >= 1e-4 else f"{p:.1e}"


def markdown_report(summary: dict[str, Any]) -> str:
    """The markdown tables of ``results.md`` (also used in the model card)."""
    contracts = summary["contracts"]
    keys = list(contracts)
    controllers = list(next(iter(contracts.values()))["controllers"])
    traffic = summary.get("traffic")
    lines = []
    if traffic:
        lines += [
            f"Under live traffic {traffic.get('source', '')}: cost version {traffic['version']}, "
            f"{traffic['active_updates']} updates, {traffic['edges_changed']:,} edges changed "
            f"({traffic['edges_closed']:,} closed, {traffic['edges_faster']:,} faster), bound "
            f"{traffic['bound_quality']}; "
            f"{summary['queries'].get('unreachable_under_traffic', 0)} queries cut off by "
            "closures were left out.",
            "",
        ]
    lines += [
        f"Held-out queries: {summary['queries']['n']} (seed {summary['queries']['seed']}), "
        f"{summary['decision_steps']} decision steps per contract. Quality = optimal travel "
        "time / found travel time (0 if no route found), optimum by scipy Dijkstra.",
        "",
        "Mean quality per controller and contract (best baseline in bold):",
        "",
        "| controller | " + " | ".join(contracts[k]["label"] for k in keys) + " |",
        "|---|" + "---:|" * len(keys),
    ]
    best = {}
    for k in keys:
        ctl = contracts[k]["controllers"]
        base = [s for s in ctl if s != LEARNED]
        best[k] = max(base, key=lambda s: ctl[s]["mean_quality"]) if base else None
    for s in controllers:
        cells = []
        for k in keys:
            v = contracts[k]["controllers"][s]["mean_quality"]
            cell = f"{v:.4f}"
            cells.append(f"**{cell}**" if s == best[k] else cell)
        lines.append(f"| {s} | " + " | ".join(cells) + " |")
    main = contracts[summary["trained_contract"]]
    lines += [
        "",
        f"At the trained contract ({main['label']}):",
        "",
        "| controller | mean | median | p10 | route found | optimal found | proven optimal "
        "| mean expansions | mean ms |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for s, d in main["controllers"].items():
        lines.append(
            f"| {s} | {d['mean_quality']:.4f} | {d['median_quality']:.4f} | "
            f"{d['p10_quality']:.4f} | {d['route_found_share']:.1%} | "
            f"{d['optimal_found_share']:.1%} | {d['optimal_proven_share']:.1%} | "
            f"{d['mean_expansions']:,.0f} | {d['mean_elapsed_ms']:.2f} |"
        )
    tests = summary.get("paired_tests")
    if tests:
        lines += [
            "",
            "Paired comparison at the trained contract, learned minus other, per query "
            "(Wilcoxon signed-rank test, scipy.stats.wilcoxon, two-sided; bootstrap 95% CI of "
            "the mean difference):",
            "",
            "| versus | mean difference | 95% CI | learned better / worse / tied | p-value |",
            "|---|---:|---|---|---:|",
        ]
        for label, t in tests.items():
            lo, hi = t["ci95_mean_difference"]
            lines.append(
                f"| {t['controller']} ({label.replace('_', ' ')}) | {t['mean_difference']:+.4f} "
                f"| [{lo:+.4f}, {hi:+.4f}] | {t['learned_better']} / {t['learned_worse']} / "
                f"{t['ties']} | {_fmt_p(t['p_value'])} |"
            )
        others = [
            (contracts[k]["label"], contracts[k]["learned_vs_best_baseline"])
            for k in keys
            if "learned_vs_best_baseline" in contracts[k] and k != summary["trained_contract"]
        ]
        if others:
            lines += [
                "",
                "Learned versus the best baseline at the other contracts:",
                "",
                "| contract | best baseline | mean difference | p-value |",
                "|---|---|---:|---:|",
            ]
            for label, t in others:
                lines.append(
                    f"| {label} | {t['controller']} | {t['mean_difference']:+.4f} | "
                    f"{_fmt_p(t['p_value'])} |"
                )
    imp = summary.get("feature_importance")
    if imp:
        lines += [
            "",
            f"Permutation feature importance of the learned policy ({imp['queries']} queries at "
            "the trained contract):",
            "",
            "| feature | quality drop when permuted | decisions changed |",
            "|---|---:|---:|",
        ]
        for r in imp["ranking"]:
            lines.append(
                f"| {r['feature']} | {r['quality_drop']:+.4f} | {r['decision_change']:.1%} |"
            )
    return "\n".join(lines) + "\n"


def _write_outputs(
    out_dir: Path,
    summary: dict[str, Any],
    results: dict[str, dict[str, list[Run]]],
    contracts: list[Contract],
    main: Contract,
    curve_csv: str | Path | None,
) -> None:
    (out_dir / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    (out_dir / "results.md").write_text(markdown_report(summary))
    with open(out_dir / "per_query.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["contract", "controller", "query", "quality", "status", "expansions", "ms"])
        for c in contracts:
            for spec, runs in results[c.key].items():
                for i, r in enumerate(runs):
                    w.writerow(
                        [
                            c.key,
                            spec,
                            i,
                            f"{r.quality:.6f}",
                            r.status,
                            r.expansions,
                            f"{r.elapsed_ms:.3f}",
                        ]
                    )
    _plots(out_dir, summary, results, contracts, main, curve_csv)


def _plots(
    out_dir: Path,
    summary: dict[str, Any],
    results: dict[str, dict[str, list[Run]]],
    contracts: list[Contract],
    main: Contract,
    curve_csv: str | Path | None,
) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    budget_contracts = [c for c in contracts if c.kind == "budget"] or contracts
    fig, axes = plt.subplots(
        len(budget_contracts), 1, figsize=(10, 3.2 * len(budget_contracts)), squeeze=False
    )
    for ax, c in zip(axes[:, 0], budget_contracts, strict=True):
        specs = list(results[c.key])
        data = [[r.quality for r in results[c.key][s]] for s in specs]
        ax.boxplot(data, showmeans=True, meanprops={"marker": "D", "markerfacecolor": "red"})
        ax.set_xticks(range(1, len(specs) + 1), specs, rotation=0, fontsize=8)
        ax.set_ylabel("quality")
        ax.set_title(f"{c.label}: quality per controller (red diamond = mean)", fontsize=9)
    fig.tight_layout()
    fig.savefig(out_dir / "quality_boxplot.png", dpi=110)
    plt.close(fig)

    points = np.linspace(0.0, 1.0, PROFILE_POINTS)
    shown = [c for c in (main, *(c for c in contracts if c.kind == "deadline")) if c.key in results]
    fig, axes = plt.subplots(1, len(shown), figsize=(6 * len(shown), 4), squeeze=False)
    for ax, c in zip(axes[0], shown, strict=True):
        for spec, runs in results[c.key].items():
            style = {"lw": 2.5, "color": "black"} if spec == LEARNED else {"lw": 1.2}
            ax.plot(points, anytime_curve(runs, points), label=spec, **style)
        ax.set_xlabel("share of the contract spent" + (" (time)" if c.kind == "deadline" else ""))
        ax.set_ylabel("mean quality")
        ax.set_title(f"anytime profile, {c.label}", fontsize=9)
        ax.grid(alpha=0.3)
    axes[0, 0].legend(fontsize=7, loc="lower right")
    fig.tight_layout()
    fig.savefig(out_dir / "anytime_profile.png", dpi=110)
    plt.close(fig)

    if LEARNED in results[main.key]:
        runs = results[main.key][LEARNED]
        n_steps = max((len(r.weights) for r in runs), default=0)
        if n_steps:
            mat = np.full((len(runs), n_steps), np.nan)
            for i, r in enumerate(runs):
                mat[i, : len(r.weights)] = r.weights
            fig, ax = plt.subplots(figsize=(7, 4))
            x = np.arange(n_steps)
            rng = np.random.default_rng(0)
            for i in rng.choice(len(runs), size=min(80, len(runs)), replace=False):
                jitter = rng.normal(0, 0.03, n_steps)
                ax.plot(x, mat[i] + jitter, color="tab:blue", alpha=0.08, lw=1)
            # a search that ended early has no weight for later steps: hold its last one
            for i, r in enumerate(runs):
                if r.weights:
                    mat[i, len(r.weights) :] = r.weights[-1]
            med = np.nanmedian(mat, axis=0)
            ax.plot(x, med, color="black", lw=2.5, label="median over queries")
            ax.set_yticks(WEIGHTS)
            ax.set_xlabel("decision step")
            ax.set_ylabel("weight")
            ax.set_title(
                f"learned weight per step, {main.label} (faded: single queries)", fontsize=9
            )
            ax.legend(fontsize=8)
            fig.tight_layout()
            fig.savefig(out_dir / "learned_weights.png", dpi=110)
            plt.close(fig)

    if curve_csv is not None and Path(curve_csv).is_file():
        from dueroute.policies.dqn import read_curve_csv

        curve = read_curve_csv(curve_csv)
        if curve:
            ep = np.array([r["episode"] for r in curve])
            ret = np.array([r["episode_return"] for r in curve])
            k = max(1, min(200, len(ret) // 10))
            smooth = np.convolve(ret, np.ones(k) / k, mode="valid")
            fig, ax = plt.subplots(figsize=(7, 4))
            ax.plot(
                ep[k - 1 :],
                smooth,
                color="tab:blue",
                lw=1.5,
                label=f"episode return, mean of {k} (with exploration)",
            )
            ev = np.array([r.get("eval_return", float("nan")) for r in curve])
            ok = np.isfinite(ev)
            if ok.any():
                ax.plot(ep[ok], ev[ok], "o-", color="black", label="greedy, validation queries")
            eps = np.array([r.get("epsilon", float("nan")) for r in curve])
            if np.isfinite(eps).any():
                ax2 = ax.twinx()
                ax2.plot(ep, eps, "--", color="gray", lw=1)
                ax2.set_ylabel("exploration rate epsilon (dashed)", color="gray")
                ax2.set_ylim(0, 1.05)
            ax.set_xlabel("episode")
            ax.set_ylabel("return = final quality")
            ax.set_title("training curve", fontsize=9)
            ax.legend(fontsize=8)
            ax.grid(alpha=0.3)
            fig.tight_layout()
            fig.savefig(out_dir / "training_curve.png", dpi=110)
            plt.close(fig)

    imp = summary.get("feature_importance")
    if imp:
        rows = imp["ranking"][::-1]
        fig, axes2 = plt.subplots(1, 2, figsize=(10, 0.35 * len(rows) + 1.5), sharey=True)
        names = [r["feature"] for r in rows]
        axes2[0].barh(names, [r["quality_drop"] for r in rows], color="tab:red")
        axes2[0].set_xlabel("mean quality drop when permuted")
        axes2[1].barh(names, [r["decision_change"] for r in rows], color="tab:gray")
        axes2[1].set_xlabel("share of decisions changed")
        fig.suptitle("permutation feature importance (learned policy)", fontsize=9)
        fig.tight_layout()
        fig.savefig(out_dir / "feature_importance.png", dpi=110)
        plt.close(fig)


# --------------------------------------------------------------------------------------------
# The served regime: wall-clock deadlines x loads, as the service runs the controllers

#: Deadlines (ms) and loads (searches per core) the served-regime judgement covers by default.
SERVED_DEADLINES_MS: tuple[float, ...] = (2.0, 5.0, 10.0, 20.0, 50.0)
SERVED_LOADS: tuple[int, ...] = (1, 2, 4)

#: The cells the issue's targets are judged on: deadlines {2, 5, 10, 20} ms x loads {1, 2}.
TARGET_DEADLINES_MS: tuple[float, ...] = (2.0, 5.0, 10.0, 20.0)
TARGET_LOADS: tuple[int, ...] = (1, 2)


@dataclass
class ServedSettings:
    """What :func:`evaluate_served` runs."""

    n_queries: int = 300
    seed: int = 1000
    deadlines_ms: Sequence[float] = SERVED_DEADLINES_MS
    loads: Sequence[int] = SERVED_LOADS
    controllers: Sequence[str] = CONTROLLERS
    #: cores the loads are counted on (default: ``os.cpu_count()``)
    cores: int | None = None
    steps: int = 20
    #: (origin, destination) pairs to leave out (the policy's training queries)
    exclude: np.ndarray | None = None
    costs: Any = None
    traffic_source: str | None = None


def paired_stats(a: np.ndarray, b: np.ndarray, seed: int = 0) -> dict[str, Any]:
    """Paired comparison of per-query values ``a`` and ``b`` (float64[n] each, same queries).

    ``mean_difference`` (a - b) with its 95% confidence interval from the t distribution
    (``ci95``: mean +- t(0.975, n - 1) * sd / sqrt(n)) and the paired t-test's two-sided
    ``t_p_value`` (the textbook formulas, written out so the tests can check them against
    ``scipy.stats.ttest_rel``), a bootstrap 95% CI of the mean difference (``ci95_bootstrap``,
    2000 resamples) and the Wilcoxon signed-rank test (``scipy.stats.wilcoxon``, two-sided,
    zeros dropped; ``p_value``), plus the counts of queries where ``a`` is better / worse / tied.
    With no difference at all both p-values are 1.
    """
    from scipy.stats import t as student_t

    base = paired_test(a, b, seed=seed)
    diff = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    n = diff.shape[0]
    mean = float(diff.mean()) if n else 0.0
    sd = float(diff.std(ddof=1)) if n > 1 else 0.0
    if n > 1 and sd > 0:
        se = sd / math.sqrt(n)
        half = float(student_t.ppf(0.975, n - 1)) * se
        t_stat = mean / se
        t_p = float(2.0 * student_t.sf(abs(t_stat), n - 1))
    else:
        half, t_stat, t_p = 0.0, 0.0, 1.0
    return {
        "n": int(n),
        "mean_difference": mean,
        "ci95": [mean - half, mean + half],
        "t_statistic": t_stat,
        "t_p_value": t_p,
        "ci95_bootstrap": base["ci95_mean_difference"],
        "p_value": base["p_value"],
        "test": base["test"],
        "better": base["learned_better"],
        "worse": base["learned_worse"],
        "ties": base["ties"],
    }


def mean_ci95(x: np.ndarray) -> list[float]:
    """95% t confidence interval of the mean of ``x`` (float64[n]); [mean, mean] for n < 2."""
    from scipy.stats import t as student_t

    x = np.asarray(x, dtype=np.float64)
    m = float(x.mean())
    if x.shape[0] < 2:
        return [m, m]
    half = (
        float(student_t.ppf(0.975, x.shape[0] - 1)) * float(x.std(ddof=1)) / math.sqrt(x.shape[0])
    )
    return [m - half, m + half]


def served_schedule(
    n_queries: int,
    deadlines: Sequence[float],
    loads: Sequence[int],
    specs: Sequence[str],
    seed: int,
) -> list[tuple[int, list[tuple[int, float, str]]]]:
    """The interleaved run order: ``[(load, [(query, deadline, controller), ...]), ...]``.

    The queries are split in two halves; the first runs the loads in the given order, the
    second in reverse (an A-B-C-C-B-A design, so a drift of the machine over the run weighs on
    every load alike); inside a pass every (query, deadline, controller) job is shuffled, so
    drift spreads over every cell of that load.
    """
    rng = np.random.default_rng(seed)
    half = (n_queries + 1) // 2
    parts = [list(range(half)), list(range(half, n_queries))]
    out = []
    for part, order in zip(parts, (list(loads), list(loads)[::-1]), strict=True):
        if not part:
            continue
        for load in order:
            jobs = [(q, float(d), s) for q in part for d in deadlines for s in specs]
            perm = rng.permutation(len(jobs))
            out.append((int(load), [jobs[i] for i in perm]))
    return out


def _run_pass(
    planner: Planner,
    policy: Policy,
    queries: np.ndarray,
    optimal: np.ndarray,
    jobs: list[tuple[int, float, str]],
    threads: int,
    settings: ServedSettings,
    sink: dict[tuple[float, str, int], Run],
    bar: Any,
) -> None:
    """Run ``jobs`` on ``threads`` threads at once; a thread without a job left keeps the load
    up with a filler search (discarded) until every job is done."""
    import threading

    lock = threading.Lock()
    state = {"next": 0, "done": 0}
    rng_fill = np.random.default_rng(settings.seed + 17)
    fillers = [tuple(int(x) for x in queries[i]) for i in rng_fill.integers(len(queries), size=64)]

    def worker(k: int) -> None:
        f = 0
        while True:
            with lock:
                if state["done"] >= len(jobs):
                    return
                i = state["next"]
                state["next"] += 1
            if i < len(jobs):
                q, d, spec = jobs[i]
                ctrl = resolve_controller(spec, policy=policy, seed=settings.seed + q)
                o, dest = (int(x) for x in queries[q])
                run = run_one(
                    planner,
                    o,
                    dest,
                    float(optimal[q]),
                    ctrl,
                    Contract("deadline", d),
                    settings.steps,
                    settings.seed + q,
                    settings.costs,
                )
                with lock:
                    sink[(d, spec, q)] = run
                    state["done"] += 1
                    bar.update(1)
            else:
                o, dest = fillers[(k * 7 + f) % len(fillers)]
                f += 1
                plan(planner, o, dest, deadline_ms=5.0, controller="fixed:1", costs=settings.costs)

    pool = [threading.Thread(target=worker, args=(k,), daemon=True) for k in range(threads)]
    for t in pool:
        t.start()
    for t in pool:
        t.join()


def evaluate_served(
    graph: RoadGraph,
    policy: Policy,
    out_dir: str | Path,
    settings: ServedSettings | None = None,
    *,
    planner: Planner | None = None,
    progress: bool = True,
) -> dict[str, Any]:
    """Judge every controller the way the service runs it: wall-clock deadlines x loads.

    Load ``L`` runs ``L * cores`` searches at once in threads of this process (as the service's
    search threads do), every one through :func:`planner.session.plan` under a wall-clock
    deadline, with the decision steps the service gives it (``steps_for_deadline``). Queries
    are held out (a seed apart from training, training pairs removed); the run order is
    :func:`served_schedule`. Per cell (deadline, load): mean quality with its 95% CI per
    controller, the learned policy's paired comparison with the best baseline of the cell
    (:func:`paired_stats`) and its control overhead (control time / deadline). Writes
    ``served_summary.json``, ``served_results.md``, ``served_per_query.csv`` and
    ``served_quality.png`` (quality vs deadline per controller, one panel per load).
    """
    import os

    from tqdm import tqdm

    started = time.perf_counter()
    settings = settings or ServedSettings()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    planner = planner or Planner(graph)
    planner.warm_up()
    cores = settings.cores or os.cpu_count() or 1
    queries = sample_queries(graph, settings.n_queries, settings.seed)
    if settings.exclude is not None and len(settings.exclude):
        seen = {(int(o), int(d)) for o, d in np.asarray(settings.exclude).reshape(-1, 2)}
        keep = np.array([(int(o), int(d)) not in seen for o, d in queries], dtype=bool)
        queries = queries[keep]
    costs = settings.costs
    optimal = OptimalCosts(graph, None if costs is None else costs.travel_time_s).precompute(
        queries
    )
    reachable = np.isfinite(optimal)
    queries, optimal = queries[reachable], optimal[reachable]
    if queries.shape[0] < 2:
        raise ValueError("fewer than 2 held-out queries with a route: nothing to compare")
    specs = list(dict.fromkeys(settings.controllers))
    deadlines = [float(d) for d in settings.deadlines_ms]
    loads = [int(x) for x in settings.loads]
    # one untimed search per controller and deadline: compiled code, policy session, caches
    o, d = (int(x) for x in queries[0])
    for spec in specs:
        for dl in deadlines:
            plan(planner, o, d, deadline_ms=dl, controller=resolve_controller(spec, policy))
    schedule = served_schedule(queries.shape[0], deadlines, loads, specs, settings.seed)
    results: dict[int, dict[tuple[float, str, int], Run]] = {x: {} for x in loads}
    total = sum(len(jobs) for _, jobs in schedule)
    bar = tqdm(total=total, desc="served regime", disable=not progress, mininterval=0.5)
    for load, jobs in schedule:
        bar.set_postfix({"searches_per_core": load}, refresh=False)
        _run_pass(
            planner, policy, queries, optimal, jobs, load * cores, settings, results[load], bar
        )
    bar.close()

    n = queries.shape[0]
    cells: list[dict[str, Any]] = []
    for load in loads:
        for dl in deadlines:
            q = {s: np.array([results[load][(dl, s, i)].quality for i in range(n)]) for s in specs}
            ctl: dict[str, Any] = {}
            for s in specs:
                runs = [results[load][(dl, s, i)] for i in range(n)]
                ctl[s] = {
                    "mean_quality": float(q[s].mean()),
                    "ci95": mean_ci95(q[s]),
                    "p10_quality": float(np.quantile(q[s], 0.1)),
                    "optimal_found_share": float(np.mean(q[s] >= 1.0 - 1e-12)),
                    "control_share": float(np.mean([r.control_ms for r in runs]) / dl),
                    "mean_steps": float(np.mean([len(r.weights) for r in runs])),
                    # searches in which the controller chose a weight at least once
                    "decided_share": float(np.mean([len(r.weights) > 1 for r in runs])),
                    "mean_expansions": float(np.mean([r.expansions for r in runs])),
                }
            cell: dict[str, Any] = {
                "deadline_ms": dl,
                "searches_per_core": load,
                "controllers": ctl,
            }
            base = [s for s in specs if s != LEARNED]
            if base:
                best = max(base, key=lambda s: ctl[s]["mean_quality"])
                cell["best_baseline"] = best
                if LEARNED in q:
                    cell["learned_vs_best_baseline"] = paired_stats(
                        q[LEARNED], q[best], seed=settings.seed
                    )
            cells.append(cell)
    summary: dict[str, Any] = {
        "regime": "served",
        "cells": cells,
        "deadlines_ms": deadlines,
        "loads": loads,
        "cores": cores,
        "controllers": specs,
        "queries": {"n": int(n), "seed": settings.seed},
        "policy": policy.info(),
        "graph": {"name": graph.name, "nodes": graph.n_nodes, "fingerprint": graph.fingerprint},
        "ranking": served_ranking(
            cells,
            specs,
            {
                s: np.array(
                    [
                        results[x][(d, s, i)].quality
                        for x in loads
                        for d in deadlines
                        for i in range(n)
                    ]
                )
                for s in specs
            },
            seed=settings.seed,
        ),
        "targets": served_targets(cells),
    }
    if costs is not None:
        summary["traffic"] = {"version": costs.version, "source": settings.traffic_source}
    summary["seconds"] = time.perf_counter() - started
    (out_dir / "served_summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    (out_dir / "served_results.md").write_text(served_markdown(summary))
    with open(out_dir / "served_per_query.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(
            ["searches_per_core", "deadline_ms", "controller", "query", "quality", "status",
             "expansions", "steps", "control_ms", "ms"]
        )  # fmt: skip
        for load in loads:
            for (dl, s, i), r in sorted(results[load].items()):
                w.writerow(
                    [load, dl, s, i, f"{r.quality:.6f}", r.status, r.expansions,
                     len(r.weights), f"{r.control_ms:.4f}", f"{r.elapsed_ms:.3f}"]
                )  # fmt: skip
    _served_plot(out_dir / "served_quality.png", summary)
    return summary


def served_ranking(
    cells: list[dict[str, Any]],
    specs: Sequence[str],
    pooled: dict[str, np.ndarray] | None = None,
    seed: int = 0,
) -> list[dict[str, Any]]:
    """Controllers by mean quality over every cell (each cell weighs the same), best first,
    with the number of cells each is best in (ties count for all) and, given ``pooled``
    (per-query qualities of every cell in one order per controller), the paired comparison
    of each with the first (:func:`paired_stats`, the first minus it: ``vs_first``)."""
    rows: list[dict[str, Any]] = []
    for s in specs:
        means = [c["controllers"][s]["mean_quality"] for c in cells]
        wins = sum(
            1
            for c in cells
            if c["controllers"][s]["mean_quality"]
            >= max(v["mean_quality"] for v in c["controllers"].values()) - 1e-12
        )
        rows.append({"controller": s, "mean_quality": float(np.mean(means)), "best_cells": wins})
    rows.sort(key=lambda r: r["mean_quality"], reverse=True)
    if pooled is not None and rows:
        first = pooled[rows[0]["controller"]]
        for r in rows[1:]:
            r["vs_first"] = paired_stats(first, pooled[r["controller"]], seed=seed)
    return rows


def served_targets(cells: list[dict[str, Any]]) -> dict[str, Any]:
    """The issue's targets on the cells {2, 5, 10, 20} ms x {1, 2} per core: learned mean
    quality at or above the best baseline in every cell, better with p < 0.05 (Wilcoxon) in at
    least half, never worse by more than 0.01; control overhead at most 2% of the deadline in
    every cell."""
    judged = [
        c
        for c in cells
        if c["deadline_ms"] in TARGET_DEADLINES_MS
        and c["searches_per_core"] in TARGET_LOADS
        and "learned_vs_best_baseline" in c
    ]
    if not judged:
        return {"judged_cells": 0}
    diffs = [c["learned_vs_best_baseline"]["mean_difference"] for c in judged]
    better = [
        c
        for c in judged
        if c["learned_vs_best_baseline"]["mean_difference"] > 0
        and c["learned_vs_best_baseline"]["p_value"] < 0.05
    ]
    overhead = max(
        c["controllers"][LEARNED]["control_share"] for c in cells if LEARNED in c["controllers"]
    )
    return {
        "judged_cells": len(judged),
        "at_or_above_best_every_cell": bool(all(d >= 0 for d in diffs)),
        "cells_at_or_above_best": int(sum(d >= 0 for d in diffs)),
        "cells_better_p05": len(better),
        "better_p05_in_half": len(better) * 2 >= len(judged),
        "worst_difference": float(min(diffs)),
        "never_worse_by_more_than_0_01": bool(min(diffs) >= -0.01),
        "control_share_max": float(overhead),
        "control_share_at_most_2pct": bool(overhead <= 0.02),
    }


def served_markdown(summary: dict[str, Any]) -> str:
    """The tables of ``served_results.md`` (also pasted into the model card)."""
    cells = summary["cells"]
    specs = summary["controllers"]
    deadlines = summary["deadlines_ms"]
    lines = [
        f"Held-out queries: {summary['queries']['n']} (seed {summary['queries']['seed']}), "
        f"wall-clock deadlines {', '.join(f'{d:g}' for d in deadlines)} ms, loads "
        f"{', '.join(str(x) for x in summary['loads'])} searches per core on "
        f"{summary['cores']} cores (threads of one process, as the service runs them), run "
        "order interleaved (served_schedule). Quality = optimal / found travel time (0 without "
        "a route), optimum by scipy Dijkstra. Best baseline of each cell in bold; the learned "
        "row is marked + (better, Wilcoxon p < 0.05), - (worse, p < 0.05) or = (no "
        "significant difference) against it.",
        "",
    ]
    by = {(c["searches_per_core"], c["deadline_ms"]): c for c in cells}
    for load in summary["loads"]:
        lines += [
            f"**{load} search(es) per core** (mean quality):",
            "",
            "| controller | " + " | ".join(f"{d:g} ms" for d in deadlines) + " |",
            "|---|" + "---:|" * len(deadlines),
        ]
        for s in specs:
            row = []
            for d in deadlines:
                c = by[(load, d)]
                v = c["controllers"][s]["mean_quality"]
                text = f"{v:.4f}"
                if s == c.get("best_baseline"):
                    text = f"**{text}**"
                if s == LEARNED and "learned_vs_best_baseline" in c:
                    t = c["learned_vs_best_baseline"]
                    mark = "="
                    if t["p_value"] < 0.05:
                        mark = "+" if t["mean_difference"] > 0 else "-"
                    text += f" {mark}"
                row.append(text)
            lines.append(f"| {s} | " + " | ".join(row) + " |")
        lines.append("")
    if any("learned_vs_best_baseline" in c for c in cells):
        lines += [
            "Learned minus the best baseline of each cell, per query (95% CI from the t "
            "distribution; Wilcoxon signed-rank p, scipy.stats.wilcoxon; paired t-test p), "
            "and the learned policy's decision steps and control overhead:",
            "",
            "| per core | deadline | best baseline | difference | 95% CI | better / worse / tied "
            "| Wilcoxon p | t-test p | steps | searches with a decision | control / deadline |",
            "|---:|---:|---|---:|---|---|---:|---:|---:|---:|---:|",
        ]
        for c in cells:
            t = c.get("learned_vs_best_baseline")
            if t is None:
                continue
            lo, hi = t["ci95"]
            lc = c["controllers"][LEARNED]
            lines.append(
                f"| {c['searches_per_core']} | {c['deadline_ms']:g} ms | {c['best_baseline']} | "
                f"{t['mean_difference']:+.4f} | [{lo:+.4f}, {hi:+.4f}] | {t['better']} / "
                f"{t['worse']} / {t['ties']} | {_fmt_p(t['p_value'])} | "
                f"{_fmt_p(t['t_p_value'])} | {lc['mean_steps']:.1f} | "
                f"{lc.get('decided_share', 0.0):.0%} | {lc['control_share']:.2%} |"
            )
        lines.append("")
    lines += [
        "Over the whole served range (mean of the cell means; cells where the controller is "
        "best, ties included):",
        "",
        "| rank | controller | mean quality | best in cells | first minus it, all cells pooled "
        "(95% CI; Wilcoxon p) |",
        "|---:|---|---:|---:|---|",
    ]
    for i, r in enumerate(summary["ranking"], 1):
        vs = r.get("vs_first")
        versus = (
            f"{vs['mean_difference']:+.4f} [{vs['ci95'][0]:+.4f}, {vs['ci95'][1]:+.4f}]; "
            f"p {_fmt_p(vs['p_value'])}"
            if vs
            else ""
        )
        lines.append(
            f"| {i} | {r['controller']} | {r['mean_quality']:.4f} | {r['best_cells']} / "
            f"{len(cells)} | {versus} |"
        )
    tg = summary.get("targets", {})
    if tg.get("judged_cells"):
        lines += [
            "",
            f"Targets on {{2, 5, 10, 20}} ms x {{1, 2}} per core ({tg['judged_cells']} cells): "
            f"learned >= best baseline in {tg['cells_at_or_above_best']} cells "
            f"({'met' if tg['at_or_above_best_every_cell'] else 'not met'}); better with "
            f"p < 0.05 in {tg['cells_better_p05']} ({'met' if tg['better_p05_in_half'] else 'not met'}"
            f"); worst difference {tg['worst_difference']:+.4f} "
            f"({'met' if tg['never_worse_by_more_than_0_01'] else 'not met'}); control overhead "
            f"at most {tg['control_share_max']:.2%} of the deadline "
            f"({'met' if tg['control_share_at_most_2pct'] else 'not met'}).",
        ]
    return "\n".join(lines) + "\n"


def _served_plot(path: Path, summary: dict[str, Any]) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    loads = summary["loads"]
    fig, axes = plt.subplots(1, len(loads), figsize=(5.5 * len(loads), 4.2), squeeze=False)
    by = {(c["searches_per_core"], c["deadline_ms"]): c for c in summary["cells"]}
    deadlines = summary["deadlines_ms"]
    for ax, load in zip(axes[0], loads, strict=True):
        for s in summary["controllers"]:
            means = [by[(load, d)]["controllers"][s]["mean_quality"] for d in deadlines]
            style = {"lw": 2.6, "color": "black", "marker": "o"} if s == LEARNED else {"lw": 1.1}
            ax.plot(deadlines, means, label=s, **style)
        ax.set_xscale("log")
        ax.minorticks_off()
        ax.set_xticks(deadlines, [f"{d:g}" for d in deadlines])
        ax.set_xlabel("deadline (ms)")
        ax.set_ylabel("mean quality")
        ax.set_title(f"{load} search(es) per core", fontsize=9)
        ax.grid(alpha=0.3)
    axes[0, 0].legend(fontsize=7, loc="lower right")
    fig.suptitle("quality by deadline per controller, served regime", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
