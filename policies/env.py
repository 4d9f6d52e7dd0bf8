"""The metalevel MDP of weight control as a gymnasium environment.

One episode is one route query searched under an expansion-budget contract cut into a fixed
number of decision steps. The agent does not plan routes; it watches the search (the feature
vector of :mod:`planner.features`) and picks the weight of Anytime Weighted A* for the next
step. It is rewarded for how close the best route found so far is to the optimum, which is
computed exactly ahead of time with ``scipy.sparse.csgraph.dijkstra``.

Registered as ``dueroute/WeightControl-v0``::

    env = gymnasium.make("dueroute/WeightControl-v0", graph=graph, budget_expansions=20_000)
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

import gymnasium as gym
import numpy as np

from dueroute.planner.features import FEATURE_HIGH, FEATURE_LOW, FEATURE_NAMES, compute_features
from dueroute.planner.graph import RoadGraph, great_circle_m
from dueroute.planner.heuristics import largest_component_nodes
from dueroute.planner.limits import DEFAULT_LANDMARKS, WEIGHTS
from dueroute.planner.session import Planner, Search
from dueroute.policies.calibrate import Calibration, load_calibration, measure_calibration
from dueroute.policies.export import ACTION_KINDS, action_meanings

ENV_ID = "dueroute/WeightControl-v0"

#: Contract kinds of :class:`EnvConfig` ``regime``.
REGIMES = ("budget", "deadline")

#: Spread of the simulated measurements under regime ``deadline``: the CPU share a search
#: reads is its share times U(0.9, 1.1) (the clock's noise), the expansion rate the calibrated
#: rate times U(0.8, 1.25) per episode (queries differ in memory locality).
SHARE_NOISE = (0.9, 1.1)
RATE_NOISE = (0.8, 1.25)

#: Resets redraw a query whose first (fixed-weight) step already ends the search, at most
#: this many times, so every episode has at least one decision to make.
MAX_REDRAWS = 50


@dataclass(frozen=True)
class EnvConfig:
    """Settings of the training environment (saved with the training config of a policy)."""

    budget_expansions: int = field(
        default=15_000,
        metadata={"help": "expansion budget per search: the contract (expansions)"},
    )
    steps: int = field(
        default=20, metadata={"help": "decision steps the contract is cut into (steps)"}
    )
    action_kind: str = field(
        default="step",
        metadata={
            "help": "actions: 'pick' chooses any weight of the set, 'step' moves one place "
            "down / stays / moves up"
        },
    )
    initial_weight: float = field(
        default=1.0, metadata={"help": "weight of the first step, before any feature exists (1)"}
    )
    n_queries: int = field(
        default=2000, metadata={"help": "size of the training query pool (queries)"}
    )
    query_seed: int = field(default=1, metadata={"help": "seed of the training query pool"})
    landmarks: int = field(
        default=DEFAULT_LANDMARKS,
        metadata={
            "help": "ALT landmarks for the heuristic, loaded or built beside the graph, as the "
            "service uses them (0 = great-circle bound only)"
        },
    )
    traffic: str = field(
        default="",
        metadata={
            "help": "live traffic applied to every episode: a JSON document (POST /v1/traffic "
            "format) or a shipped scenario name such as rush-hour ('' = free flow)"
        },
    )
    traffic_scenarios: int = field(
        default=0,
        metadata={
            "help": "random traffic scenarios (slowdowns, speed-ups, closures, congested "
            "areas; planner.traffic.sample_scenario) in the pool; each episode draws its "
            "costs uniformly from the free-flow (or --traffic) costs and these (scenarios)"
        },
    )
    traffic_seed: int = field(default=7, metadata={"help": "seed of the random scenarios"})
    regime: str = field(
        default="budget",
        metadata={
            "help": "contracts: 'budget' searches every episode under budget_expansions; "
            "'deadline' simulates the service: a deadline drawn log-uniformly from "
            "deadline_ms_min..deadline_ms_max and a load from searches_per_core, turned into "
            "expansions and decision steps by the calibration map"
        },
    )
    deadline_ms_min: float = field(
        default=1.0, metadata={"help": "shortest simulated deadline, regime 'deadline' (ms)"}
    )
    deadline_ms_max: float = field(
        default=50.0, metadata={"help": "longest simulated deadline, regime 'deadline' (ms)"}
    )
    searches_per_core: str = field(
        default="1,2,3,4",
        metadata={
            "help": "simulated loads, regime 'deadline': searches sharing a core, drawn "
            "uniformly; a search gets 1/L of a core (comma list of integers)"
        },
    )
    calibration: str = field(
        default="",
        metadata={
            "help": "deadline-to-expansions map (JSON from 'dueroute bench calibrate --out'), "
            "regime 'deadline'; '' = measure it on the training graph first"
        },
    )

    @property
    def loads(self) -> tuple[int, ...]:
        """``searches_per_core`` as integers (checked in ``__post_init__``)."""
        return tuple(int(x) for x in self.searches_per_core.split(",") if x.strip())

    def __post_init__(self) -> None:
        problems = []
        if self.regime not in REGIMES:
            problems.append(f"regime must be one of {REGIMES}, got {self.regime!r}")
        if not (0 < self.deadline_ms_min <= self.deadline_ms_max <= 60_000):
            problems.append(
                "deadline_ms_min and deadline_ms_max must satisfy 0 < min <= max <= 60000, got "
                f"{self.deadline_ms_min} and {self.deadline_ms_max}"
            )
        try:
            loads = self.loads
        except ValueError:
            loads = ()
        if not loads or any(not 1 <= x <= 64 for x in loads):
            problems.append(
                "searches_per_core must be a comma list of integers in 1..64, got "
                f"{self.searches_per_core!r}"
            )
        if self.budget_expansions < 1:
            problems.append(f"budget_expansions must be >= 1, got {self.budget_expansions}")
        if not 2 <= self.steps <= 1000:
            problems.append(f"steps must be in 2..1000, got {self.steps}")
        if self.action_kind not in ACTION_KINDS:
            problems.append(f"action_kind must be one of {ACTION_KINDS}, got {self.action_kind!r}")
        if self.initial_weight not in WEIGHTS:
            problems.append(f"initial_weight must be one of {WEIGHTS}, got {self.initial_weight}")
        if self.n_queries < 1:
            problems.append(f"n_queries must be >= 1, got {self.n_queries}")
        if self.landmarks < 0:
            problems.append(f"landmarks must be >= 0, got {self.landmarks}")
        if not 0 <= self.traffic_scenarios <= 1000:
            problems.append(f"traffic_scenarios must be in 0..1000, got {self.traffic_scenarios}")
        if problems:
            raise ValueError("invalid environment config: " + "; ".join(problems))


# --------------------------------------------------------------------------------------------
# Queries and their exact optimal costs


def sample_queries(graph: RoadGraph, n: int, seed: int) -> np.ndarray:
    """Draw ``n`` (origin, destination) pairs with the project's documented trip mix.

    Uses :func:`demo_data.queries.sample_queries` (short trips across a town, medium trips
    across the region, long town-to-town trips; distance bands on graphs without towns), so
    training, evaluation and the load tester mean the same thing by "a query set". Every pair
    lies in the largest strongly connected component, so a route exists.

    Returns
    -------
    queries : int64[n, 2]
    """
    try:
        from dueroute.demo_data.queries import sample_queries as project_sampler
    except ImportError:  # a stripped install without demo_data: same idea, distance bands
        return _sample_by_distance(graph, n, seed)
    return np.asarray(project_sampler(graph, n, seed), dtype=np.int64).reshape(-1, 2)


def _sample_by_distance(graph: RoadGraph, n: int, seed: int) -> np.ndarray:
    """Half short trips (within 12% of the bounding-box diagonal), half uniform pairs."""
    nodes = largest_component_nodes(graph)
    if nodes.shape[0] < 2:
        raise ValueError(
            f"graph {graph.name!r} has no strongly connected component with 2 or more nodes; "
            "there is no query to draw"
        )
    rng = np.random.default_rng(seed)
    lat, lon = np.asarray(graph.lat)[nodes], np.asarray(graph.lon)[nodes]
    radius_m = max(0.12 * float(great_circle_m(lat.min(), lon.min(), lat.max(), lon.max())), 1.0)
    out = np.empty((n, 2), dtype=np.int64)
    for i in range(n):
        a = int(rng.integers(nodes.shape[0]))
        b = a
        if rng.random() < 0.5:
            near = np.flatnonzero(great_circle_m(lat[a], lon[a], lat, lon) <= radius_m)
            near = near[near != a]
            if near.shape[0]:
                b = int(near[rng.integers(near.shape[0])])
        while b == a:
            b = int(rng.integers(nodes.shape[0]))
        out[i] = nodes[a], nodes[b]
    return out


class OptimalCosts:
    """Exact shortest travel times by ``scipy.sparse.csgraph.dijkstra``, cached per query.

    ``costs`` (float64[m], ``+inf`` = closed; a live traffic version's ``travel_time_s``)
    replaces the graph's free-flow travel times.
    """

    def __init__(self, graph: RoadGraph, costs: np.ndarray | None = None) -> None:
        self._csr = graph.csr(costs)
        self._cache: dict[tuple[int, int], float] = {}

    def __call__(self, origin: int, destination: int) -> float:
        key = (int(origin), int(destination))
        if key not in self._cache:
            self.precompute(np.array([key]))
        return self._cache[key]

    def precompute(self, queries: np.ndarray) -> np.ndarray:
        """float64[len(queries)]: optimal cost of each (origin, destination) row (inf: no path).

        One Dijkstra per distinct origin not yet cached.
        """
        from scipy.sparse.csgraph import dijkstra

        queries = np.asarray(queries, dtype=np.int64).reshape(-1, 2)
        todo = sorted({int(o) for o, d in queries if (int(o), int(d)) not in self._cache})
        for start in range(0, len(todo), 32):  # bounded memory: 32 rows of n distances
            origins = np.array(todo[start : start + 32], dtype=np.int64)
            dist = np.atleast_2d(dijkstra(self._csr, directed=True, indices=origins))
            row = {int(o): i for i, o in enumerate(origins)}
            for o, d in queries:
                if int(o) in row:
                    self._cache[(int(o), int(d))] = float(dist[row[int(o)], int(d)])
        return np.array([self._cache[(int(o), int(d))] for o, d in queries])


def build_cost_pool(
    graph: RoadGraph,
    config: EnvConfig,
    landmarks: Any = None,
    optimal: OptimalCosts | None = None,
) -> list[tuple[Any, OptimalCosts]]:
    """``[(cost version or None, its exact optima)]`` an environment draws episodes from.

    Entry 0 is the free-flow costs (``None``), or ``config.traffic`` applied to them; then
    ``config.traffic_scenarios`` random scenarios. Each version gets its SCC labels, and
    landmarks rebuilt on its costs when its speed-ups call for it (``planner.traffic``), as
    the service would serve it once its background work is done.
    """
    from dueroute.planner.traffic import CostLayer, load_document, parse_document, sample_scenario

    def version_of(updates: list[Any]) -> Any:
        layer = CostLayer(graph, landmarks, refine="sync")
        try:
            return layer.apply(updates)
        finally:
            layer.close()

    pool: list[tuple[Any, OptimalCosts]] = []
    if config.traffic:
        from dueroute.demo_data.traffic import resolve_traffic_path

        _, updates = load_document(resolve_traffic_path(config.traffic), graph)
        base = version_of(updates)
        pool.append((base, OptimalCosts(graph, base.travel_time_s)))
    else:
        pool.append((None, optimal if optimal is not None else OptimalCosts(graph)))
    rng = np.random.default_rng(config.traffic_seed)
    for _ in range(config.traffic_scenarios):
        doc = sample_scenario(graph, rng)
        version = version_of(parse_document(doc, graph, where="sampled traffic scenario"))
        pool.append((version, OptimalCosts(graph, version.travel_time_s)))
    return pool


def quality(optimal_cost_s: float, incumbent_cost_s: float | None) -> float:
    """Solution quality: optimal / incumbent in (0, 1], 0 before the first route.

    A zero-cost optimum (origin == destination) found at zero cost has quality 1.
    """
    if incumbent_cost_s is None or not math.isfinite(incumbent_cost_s):
        return 0.0
    if incumbent_cost_s <= 0.0:
        return 1.0
    return float(min(1.0, optimal_cost_s / incumbent_cost_s))


# --------------------------------------------------------------------------------------------
# The environment


class WeightControlEnv(gym.Env):
    """Pick the search weight of Anytime Weighted A* at each decision step of one route query.

    ``reset`` draws a query (origin, destination) from the query pool with ``self.np_random``,
    opens a search under the expansion budget ``budget_expansions`` cut into ``steps`` decision
    steps, and runs the first step at ``initial_weight`` (before that step no feature exists;
    the serving controller starts the same way). A query whose first step already ends the
    search is redrawn (up to :data:`MAX_REDRAWS` times), so each episode has a decision to make.
    Each ``step(action)`` sets the weight of the next decision step and runs it.

    Observation
    -----------
    ``Box(FEATURE_LOW, FEATURE_HIGH, (17,), float32)``: :func:`planner.features.compute_features`
    of the search after the step (schema in :mod:`planner.features`):

    ===  ==========================  =====================================================
    num  name                        meaning
    ===  ==========================  =====================================================
    0    has_incumbent               a route has been found
    1    quality_estimate            proven lower bound / incumbent cost (0 before a route)
    2    contract_fraction_left      share of the expansion budget left
    3    weight                      (weight of the step just run - 1) / 4
    4    h_start_log                 log10(1 + h(start) s) / 4
    5    open_size_log               log10(1 + open-list size) / 6
    6-8  open_mean_g/h, open_min_f   open-list statistics divided by h(start)
    9    bound_rel                   proven lower bound / h(start)
    10   incumbent_rel               incumbent cost / h(start) (0 before a route)
    11   improvements_log            log(1 + routes found) / 3
    12   stale_share                 steps since the last new route / steps done
    13   cpu_share_last_step         see below
    14   time_left_log               log10(1 + ms left) / 2 (regime ``deadline``; else 0)
    15   expansion_rate_log          log10(1 + expansions per CPU second) / 7 (idem)
    16   affordable_log              log10(1 + expansions the time left buys) / 6 (idem)
    ===  ==========================  =====================================================

    Under an expansion budget (regime ``budget``) the CPU share a step receives changes
    nothing about what the step does, so the environment replaces the measured value
    (wall-clock noise) with a draw from ``U(0.25, 1)``, and there is no clock (features 14-16
    read 0); episodes stay reproducible.

    Served regime
    -------------
    With ``regime="deadline"`` every reset draws the contract the service would run: a
    deadline ``d`` log-uniform in ``deadline_ms_min..deadline_ms_max`` and a load ``L`` from
    ``searches_per_core`` (CPU share ``s = 1 / L``). The measured calibration map
    (:mod:`policies.calibrate`) gives the decision steps the service would allow a policy
    (``steps_at``; a contract with no decision is redrawn) and the expansions the search
    makes by then (``expansions_at``, the decisions' cost taken out), so the episode is an
    expansion budget that stands for the deadline: reproducible, and the same search. The
    observation then carries what the service would measure: time left ``d x fraction left``,
    the calibrated expansion rate (x U(0.8, 1.25) per episode) and the share ``s``
    (x U(0.9, 1.1)). ``options`` of ``reset`` may fix ``deadline_ms`` and
    ``searches_per_core``.

    Actions
    -------
    ``action_kind="pick"``: ``Discrete(6)``, action ``i`` sets weight ``WEIGHTS[i]`` =
    1, 1.5, 2, 3, 4, 5. ``action_kind="step"``: ``Discrete(3)``, 0 moves one place down the
    weight set, 1 keeps the weight, 2 moves one place up (clipped at the ends).

    Reward
    ------
    The change in solution quality over the step, quality = optimal cost / incumbent cost
    (0 before the first route), counted from 0 at the start of the episode: the first
    reward includes what the fixed first step found, so the undiscounted return of an
    episode equals the quality of the final route, in [0, 1].

    Episode end
    -----------
    ``terminated`` when the search proves its route optimal (nothing left to gain);
    ``truncated`` when the contract is spent (after ``steps - 1`` actions). The fraction of
    the contract left is part of the observation, so the end of the contract is part of the
    state, not an outside time limit.

    Traffic
    -------
    ``traffic`` / ``traffic_scenarios`` (:class:`EnvConfig`) give a pool of cost versions
    (:func:`build_cost_pool`); each reset draws one with ``self.np_random`` (only when the
    pool holds more than one, so free-flow training draws exactly as before) and searches the
    episode on it, with the optimum computed on the same costs. A query a closure cuts off is
    redrawn.

    Info
    ----
    ``quality``, ``optimal_cost_s``, ``incumbent_cost_s``, ``query_index``, ``weight``,
    ``status`` (``running`` or a final status of ``dueroute.planner.results.STATUSES``),
    ``traffic_index`` (entry of the cost pool; 0 = free flow or ``traffic``), ``deadline_ms``
    (``None`` under regime ``budget``), ``searches_per_core``, ``budget_expansions`` and
    ``steps`` (the episode's contract).
    """

    metadata: dict[str, Any] = {"render_modes": []}

    def __init__(
        self,
        graph: RoadGraph,
        config: EnvConfig | None = None,
        *,
        queries: np.ndarray | None = None,
        planner: Planner | None = None,
        optimal: OptimalCosts | None = None,
        cost_pool: list[tuple[Any, OptimalCosts]] | None = None,
        calibration: Calibration | None = None,
        **overrides: Any,
    ) -> None:
        self.config = dataclasses.replace(config or EnvConfig(), **overrides)
        cfg = self.config
        self.graph = graph
        landmarks = None
        if planner is None:
            if cfg.landmarks > 0:
                from dueroute.planner.heuristics import load_or_build_landmarks

                landmarks = load_or_build_landmarks(graph, count=cfg.landmarks, progress=False)
            planner = Planner(graph, landmarks=landmarks)
        self.planner = planner
        if queries is None:
            queries = sample_queries(graph, cfg.n_queries, cfg.query_seed)
        self.queries = np.asarray(queries, dtype=np.int64).reshape(-1, 2)
        if self.queries.shape[0] == 0:
            raise ValueError("the environment needs at least one query")
        for o, d in self.queries:
            graph.check_node(int(o))
            graph.check_node(int(d))
        if cost_pool is None:
            cost_pool = build_cost_pool(graph, cfg, landmarks, optimal)
        self.cost_pool = cost_pool
        self.optimal = cost_pool[0][1]
        self._traffic_index = 0
        self.calibration: Calibration | None = None
        if cfg.regime == "deadline":
            if calibration is None:
                if cfg.calibration:
                    calibration = load_calibration(cfg.calibration)
                else:
                    calibration = measure_calibration(
                        self.planner, sample_queries(graph, 80, 77), seed=77
                    )
            self.calibration = calibration
        # the contract of the current episode (regime "deadline": simulated)
        self._deadline_ms = math.nan
        self._per_core = 1
        self._share = 1.0
        self._share_seen = 1.0
        self._rate_per_s = 0.0
        self._budget = cfg.budget_expansions
        self._steps = cfg.steps

        self.weights = WEIGHTS
        self.action_meanings = action_meanings(cfg.action_kind, WEIGHTS)
        self.action_space = gym.spaces.Discrete(len(self.action_meanings))
        self.observation_space = gym.spaces.Box(
            FEATURE_LOW.copy(), FEATURE_HIGH.copy(), (len(FEATURE_NAMES),), np.float32
        )
        self._search: Search | None = None
        self._query_index = -1
        self._optimal_s = math.inf
        self._quality = 0.0

    @property
    def search(self) -> Search | None:
        """The search of the current episode (``None`` before the first reset)."""
        return self._search

    # -- helpers --
    def _weight_after(self, action: int) -> float:
        if self.config.action_kind == "pick":
            return self.weights[action]
        assert self._search is not None
        here = int(np.argmin(np.abs(np.asarray(self.weights) - self._search.stats().weight)))
        return self.weights[min(max(here + action - 1, 0), len(self.weights) - 1)]

    def _observe(self) -> tuple[np.ndarray, dict[str, Any]]:
        assert self._search is not None
        stats = self._search.stats()
        if self.calibration is None:
            stats = stats.replace(cpu_share_last_step=float(self.np_random.uniform(0.25, 1.0)))
        else:  # what the service would measure under the simulated deadline and load
            stats = stats.replace(
                cpu_share_last_step=self._share_seen,
                time_left_ms=self._deadline_ms * stats.contract_fraction_left,
                expansion_rate_per_s=self._rate_per_s,
            )
        info = {
            "quality": self._quality,
            "optimal_cost_s": self._optimal_s,
            "incumbent_cost_s": stats.incumbent_cost_s,
            "query_index": self._query_index,
            "weight": stats.weight,
            "status": self._search.status or "running",
            "traffic_index": self._traffic_index,
            "deadline_ms": None if self.calibration is None else self._deadline_ms,
            "searches_per_core": self._per_core,
            "budget_expansions": self._budget,
            "steps": self._steps,
        }
        return compute_features(stats), info

    def _draw_contract(self, options: dict[str, Any] | None = None) -> None:
        """Set the episode's contract. Regime ``deadline``: a deadline (log-uniform) and a
        load, redrawn (up to :data:`MAX_REDRAWS` times) while the service would give the
        policy no decision at all (one step); ``options`` may fix ``deadline_ms`` and
        ``searches_per_core``."""
        cfg, cal = self.config, self.calibration
        if cal is None:
            return
        options = options or {}
        rng = self.np_random
        lo, hi = math.log(cfg.deadline_ms_min), math.log(cfg.deadline_ms_max)
        for _ in range(MAX_REDRAWS):
            d = options.get("deadline_ms")
            deadline_ms = float(d) if d is not None else math.exp(float(rng.uniform(lo, hi)))
            given = options.get("searches_per_core")
            per_core = int(given) if given is not None else int(rng.choice(cfg.loads))
            share = 1.0 / per_core
            steps = cal.steps_at(deadline_ms, share, cfg.steps)
            if steps >= 2 or {"deadline_ms", "searches_per_core"} <= set(options):
                break
        self._deadline_ms, self._per_core, self._share = deadline_ms, per_core, share
        self._steps = steps
        self._budget = cal.expansions_at(deadline_ms, share, steps - 1)
        self._share_seen = min(1.0, share * float(rng.uniform(*SHARE_NOISE)))
        self._rate_per_s = cal.expansion_rate_per_ms * 1000.0 * float(rng.uniform(*RATE_NOISE))

    def _draw_costs(self) -> int:
        if len(self.cost_pool) == 1:
            return 0  # no draw: free-flow training keeps its random stream unchanged
        return int(self.np_random.integers(len(self.cost_pool)))

    def _open(self, index: int, traffic_index: int = 0) -> bool:
        """Open query ``index`` on pool entry ``traffic_index``; False if it has no route."""
        origin, destination = (int(x) for x in self.queries[index])
        version, optimal = self.cost_pool[traffic_index]
        optimal_s = optimal(origin, destination)
        if not math.isfinite(optimal_s):
            return False
        self._query_index = index
        self._traffic_index = traffic_index
        self._optimal_s = optimal_s
        if self._search is not None:
            self._search.close()
        self._search = self.planner.start(
            origin,
            destination,
            budget_expansions=self._budget,
            steps=self._steps,
            costs=version,
        )
        self._search.run_step(self.config.initial_weight)
        return True

    # -- gymnasium API --
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[np.ndarray, dict[str, Any]]:
        """Draw a query (or take ``options["query_index"]``) and run the first step.

        With ``options["query_index"]`` the given query is used as is, even when its first
        step ends the search (evaluation must not skip easy queries).
        """
        super().reset(seed=seed)
        if options is not None and options.get("query_index") is not None:
            index = int(options["query_index"])
            if not 0 <= index < self.queries.shape[0]:
                raise ValueError(
                    f"query_index must be in 0..{self.queries.shape[0] - 1}, got {index}"
                )
            traffic = options.get("traffic_index")
            traffic = self._draw_costs() if traffic is None else int(traffic)
            if not 0 <= traffic < len(self.cost_pool):
                raise ValueError(
                    f"traffic_index must be in 0..{len(self.cost_pool) - 1}, got {traffic}"
                )
            self._draw_contract(options)
            if not self._open(index, traffic):
                raise ValueError(f"query {index} has no route under cost pool entry {traffic}")
        else:
            opened = False
            for _ in range(MAX_REDRAWS):
                query = int(self.np_random.integers(self.queries.shape[0]))
                self._draw_contract(options)
                if not self._open(query, self._draw_costs()):
                    continue  # a closure cut this query off: draw again
                opened = True
                assert self._search is not None
                if not self._search.done:
                    break
            if not opened:
                raise ValueError(
                    f"no query with a route found in {MAX_REDRAWS} draws under the traffic pool"
                )
        # Quality counts from 0 at the episode start, so the first reward includes the first
        # step's route (see the class docstring): return == final quality.
        self._quality = 0.0
        return self._observe()

    def step(self, action: Any) -> tuple[np.ndarray, float, bool, bool, dict[str, Any]]:
        if self._search is None:
            raise RuntimeError("call reset() before step()")
        action = int(action)
        n_actions = len(self.action_meanings)
        if not 0 <= action < n_actions:
            raise ValueError(f"action must be an integer in 0..{n_actions - 1}, got {action}")
        search = self._search
        search.run_step(self._weight_after(action))
        stats = search.stats()
        new_quality = quality(self._optimal_s, stats.incumbent_cost_s)
        reward = new_quality - self._quality
        self._quality = new_quality
        terminated = search.done and search.status == "optimal"
        truncated = search.done and not terminated
        obs, info = self._observe()
        return obs, float(reward), bool(terminated), bool(truncated), info

    def close(self) -> None:
        if self._search is not None:
            self._search.close()
            self._search = None


def register() -> None:
    """Register :data:`ENV_ID` with gymnasium (idempotent)."""
    if ENV_ID not in gym.registry:
        gym.register(id=ENV_ID, entry_point="dueroute.policies.env:WeightControlEnv")


register()
