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
14     ``time_left_log``             log10(1 + wall-clock ms left before the deadline) / 2;
                                     0 under an expansion budget ([0, 2])
15     ``expansion_rate_log``        log10(1 + expansions per CPU second so far) / 7: how fast
                                     this machine searches this query ([0, 1.5])
16     ``affordable_log``            log10(1 + time left x rate x CPU share) / 6: the
                                     expansions the time left buys at the measured rate and
                                     CPU share ([0, 2])
=====  ============================  =========================================================

Schema 2 added 14-16 (schema 1 had 0-13 only): with them a policy sees the deadline in
absolute terms, the machine's speed and the CPU it gets, not only the contract's fraction, so
one policy can serve short and long deadlines on a busy or a quiet machine.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from dueroute.planner.results import STATS_INDEX, SearchStats

#: Bumped whenever a feature is added, removed, reordered or computed differently.
SCHEMA_VERSION = 2

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
    "time_left_log",
    "expansion_rate_log",
    "affordable_log",
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
    (0.0, 2.0),
    (0.0, 1.5),
    (0.0, 2.0),
)

FEATURE_LOW = np.array([lo for lo, _ in FEATURE_RANGES], dtype=np.float32)
FEATURE_HIGH = np.array([hi for _, hi in FEATURE_RANGES], dtype=np.float32)

#: Travel times are divided by ``max(h(start), H_FLOOR_S)`` so origin == destination is safe.
H_FLOOR_S = 1.0

# positions of the stats the features read (constants, so numba folds them)
_S_INCUMBENT = STATS_INDEX["incumbent_cost_s"]
_S_BOUND = STATS_INDEX["lower_bound_s"]
_S_OPEN_SIZE = STATS_INDEX["open_size"]
_S_MEAN_G = STATS_INDEX["open_mean_g_s"]
_S_MEAN_H = STATS_INDEX["open_mean_h_s"]
_S_MIN_F = STATS_INDEX["open_min_f_s"]
_S_H_START = STATS_INDEX["h_start_s"]
_S_FRAC_LEFT = STATS_INDEX["contract_fraction_left"]
_S_WEIGHT = STATS_INDEX["weight"]
_S_IMPROVEMENTS = STATS_INDEX["improvements"]
_S_STEPS_DONE = STATS_INDEX["steps_done"]
_S_STEPS_SINCE = STATS_INDEX["steps_since_improvement"]
_S_CPU_SHARE = STATS_INDEX["cpu_share_last_step"]
_S_TIME_LEFT = STATS_INDEX["time_left_ms"]
_S_RATE = STATS_INDEX["expansion_rate_per_s"]
_LOW = FEATURE_LOW.astype(np.float64)
_HIGH = FEATURE_HIGH.astype(np.float64)


@njit(cache=True, nogil=True)
def _fin(x, default):
    return x if math.isfinite(x) else default


@njit(cache=True, nogil=True)
def features_into(v, out):
    """The feature vector of a stats vector (``dueroute.planner.results.STATS_FIELDS`` order)
    written into ``out`` (float32[N_FEATURES]); the one implementation training and serving
    share (:func:`compute_features` calls it)."""
    inc = v[_S_INCUMBENT]
    h_start = v[_S_H_START]
    h0 = max(_fin(h_start, 0.0), H_FLOOR_S)
    has_incumbent = math.isfinite(inc) and inc > 0.0
    bound = _fin(v[_S_BOUND], 0.0)
    open_size = max(v[_S_OPEN_SIZE], 0.0)
    steps_done = max(v[_S_STEPS_DONE], 0.0)
    if has_incumbent:
        quality_estimate = min(max(bound / inc, 0.0), 1.0)
        incumbent_rel = inc / h0
        stale = v[_S_STEPS_SINCE] / steps_done if steps_done > 0 else 0.0
    else:
        quality_estimate = 0.0
        incumbent_rel = 0.0
        stale = 1.0
    out[0] = 1.0 if has_incumbent else 0.0
    out[1] = quality_estimate
    out[2] = _fin(v[_S_FRAC_LEFT], 1.0)
    out[3] = (_fin(v[_S_WEIGHT], 1.0) - 1.0) / 4.0
    out[4] = math.log10(1.0 + max(_fin(h_start, 0.0), 0.0)) / 4.0
    out[5] = math.log10(1.0 + open_size) / 6.0
    out[6] = _fin(v[_S_MEAN_G], 0.0) / h0 if open_size > 0 else 0.0
    out[7] = _fin(v[_S_MEAN_H], 0.0) / h0 if open_size > 0 else 0.0
    out[8] = _fin(v[_S_MIN_F], 0.0) / h0 if open_size > 0 else bound / h0
    out[9] = bound / h0
    out[10] = incumbent_rel
    out[11] = math.log1p(max(v[_S_IMPROVEMENTS], 0.0)) / 3.0
    out[12] = stale
    cpu_share = _fin(v[_S_CPU_SHARE], 1.0)
    out[13] = cpu_share
    time_left_ms = max(_fin(v[_S_TIME_LEFT], 0.0), 0.0)
    rate = max(_fin(v[_S_RATE], 0.0), 0.0)
    out[14] = math.log10(1.0 + time_left_ms) / 2.0
    out[15] = math.log10(1.0 + rate) / 7.0
    out[16] = math.log10(1.0 + time_left_ms * 1e-3 * rate * max(cpu_share, 0.0)) / 6.0
    for i in range(out.shape[0]):
        x = out[i]
        if x < _LOW[i]:
            x = _LOW[i]
        if x > _HIGH[i]:
            x = _HIGH[i]
        out[i] = x


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
    out = np.empty(N_FEATURES, dtype=np.float32)
    features_into(stats.vector, out)
    return out
