"""Versioned metalevel features: what a weight controller sees at each decision step.

One function, :func:`compute_features`, turns a :class:`~dueroute.planner.results.SearchStats` snapshot
into a fixed-length ``float32`` vector. Training (``policies.env``) and serving
(``policies.runtime``) both call it, and a policy file records :data:`SCHEMA_VERSION` and
:data:`FEATURE_NAMES`, so a policy trained on one schema is refused by a service running another.

Every feature is scale-free, so a policy trained on one graph reads the same numbers on another:
travel times are divided by the admissible estimate ``h(start)`` of the query, counts are taken
on a log scale, and time is a fraction of the contract (expansion budget or wall-clock deadline,
the same number either way). Each value is clipped to the range in :data:`FEATURE_RANGES`.

=====  ============================  =========================================================
index  name                          meaning (range)
=====  ============================  =========================================================
0      ``has_incumbent``             1 once a route has been found, else 0  ([0, 1])
1      ``quality_estimate``          lower bound / incumbent cost, 0 before the first route
                                     (a proven lower bound on optimal / incumbent; [0, 1])
2      ``contract_fraction_left``    share of the contract not yet spent  ([0, 1])
3      ``weight``                    current weight mapped to (w - 1) / 4, so 1 -> 0, 5 -> 1
                                     ([0, 2])
4      ``h_start_log``               log10(1 + h(start) in seconds) / 4: how long the trip
                                     looks before searching ([0, 2])
5      ``open_size_log``             log10(1 + open-list size) / 6  ([0, 2])
6      ``open_mean_g_rel``           mean g over the open list / h(start)  ([0, 10])
7      ``open_mean_h_rel``           mean h over the open list / h(start); falls from about 1
                                     towards 0 as the frontier nears the goal  ([0, 10])
8      ``open_min_f_rel``            min over open of g + h, / h(start); at least 1 for a
                                     consistent heuristic  ([0, 10])
9      ``bound_rel``                 proven lower bound / h(start)  ([0, 10])
10     ``incumbent_rel``             incumbent cost / h(start), 0 before the first route
                                     ([0, 10])
11     ``improvements_log``          log(1 + improvements) / 3  ([0, 2])
12     ``stale_share``               steps since the last improvement / steps done
                                     (1 before the first route; [0, 1])
13     ``cpu_share_last_step``       CPU time the search received / wall time of the last
                                     step (1 under expansion budgets; [0, 1])
=====  ============================  =========================================================
"""

from __future__ import annotations

import math

import numpy as np

from dueroute.planner.results import SearchStats

#: Bumped whenever a feature is added, removed, reordered or computed differently.
SCHEMA_VERSION = 1

#: Feature names in vector order (recorded in every policy file).
FEATURE_NAMES: tuple[str, ...] = (
    "has_incumbent",
    "quality_estimate",
    "contract_fraction_left",
    "weight",
    "h_start_log",
    "open_size_log",
    "open_mean_g_rel",
    "open_mean_h_rel",
    "open_min_f_rel",
    "bound_rel",
    "incumbent_rel",
    "improvements_log",
    "stale_share",
    "cpu_share_last_step",
)

N_FEATURES = len(FEATURE_NAMES)

#: (low, high) clip range of each feature, in :data:`FEATURE_NAMES` order.
FEATURE_RANGES: tuple[tuple[float, float], ...] = (
    (0.0, 1.0),
    (0.0, 1.0),
    (0.0, 1.0),
    (0.0, 2.0),
    (0.0, 2.0),
    (0.0, 2.0),
    (0.0, 10.0),
    (0.0, 10.0),
    (0.0, 10.0),
    (0.0, 10.0),
    (0.0, 10.0),
    (0.0, 2.0),
    (0.0, 1.0),
    (0.0, 1.0),
)

FEATURE_LOW = np.array([lo for lo, _ in FEATURE_RANGES], dtype=np.float32)
FEATURE_HIGH = np.array([hi for _, hi in FEATURE_RANGES], dtype=np.float32)

#: Travel times are divided by ``max(h(start), H_FLOOR_S)`` so origin == destination is safe.
H_FLOOR_S = 1.0


def _finite(x: float | None, default: float = 0.0) -> float:
    if x is None or not math.isfinite(x):
        return default
    return float(x)


def compute_features(stats: SearchStats) -> np.ndarray:
    """Feature vector of one search snapshot (see the module docstring for each entry).

    Parameters
    ----------
    stats : SearchStats
        Snapshot from ``Search.stats()``.

    Returns
    -------
    features : float32[N_FEATURES]
        Clipped to :data:`FEATURE_LOW` .. :data:`FEATURE_HIGH`; never NaN or infinite.
    """
    h0 = max(_finite(stats.h_start_s), H_FLOOR_S)
    incumbent = stats.incumbent_cost_s
    has_incumbent = incumbent is not None and math.isfinite(incumbent) and incumbent > 0
    bound = _finite(stats.lower_bound_s)
    # An empty open list reports no statistics: the frontier is gone, so g/h/f carry no signal.
    open_size = max(int(stats.open_size), 0)
    steps_done = max(int(stats.steps_done), 0)
    if has_incumbent:
        assert incumbent is not None
        quality_estimate = min(max(bound / incumbent, 0.0), 1.0)
        incumbent_rel = incumbent / h0
        stale = int(stats.steps_since_improvement) / steps_done if steps_done else 0.0
    else:
        quality_estimate = 0.0
        incumbent_rel = 0.0
        stale = 1.0
    values = (
        1.0 if has_incumbent else 0.0,
        quality_estimate,
        _finite(stats.contract_fraction_left, 1.0),
        (_finite(stats.weight, 1.0) - 1.0) / 4.0,
        math.log10(1.0 + max(_finite(stats.h_start_s), 0.0)) / 4.0,
        math.log10(1.0 + open_size) / 6.0,
        _finite(stats.open_mean_g_s) / h0 if open_size else 0.0,
        _finite(stats.open_mean_h_s) / h0 if open_size else 0.0,
        _finite(stats.open_min_f_s) / h0 if open_size else bound / h0,
        bound / h0,
        incumbent_rel,
        math.log1p(max(int(stats.improvements), 0)) / 3.0,
        stale,
        _finite(stats.cpu_share_last_step, 1.0),
    )
    out = np.asarray(values, dtype=np.float32)
    np.clip(out, FEATURE_LOW, FEATURE_HIGH, out=out)
    return out
