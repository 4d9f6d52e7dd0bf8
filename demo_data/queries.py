"""Query sets: reproducible (origin, destination) pairs with a documented mix of trip lengths.

Policy training, evaluation and the load tester draw their trips from here, so "a query set"
means the same thing everywhere.

Trip kinds
----------
On a demo graph (one whose ``meta["places"]`` lists the towns, see :mod:`demo_data.build`),
with ``D`` the great-circle distance between the centres of the two largest towns:

=========  ===================================================================================
kind       rule
=========  ===================================================================================
short      both ends inside the same town (within the town's radius of its centre) and at
           most half that radius apart: a trip across town
medium     anywhere in the region, ``0.15 D <= distance <= 0.45 D`` apart
long       one end in each of the two largest towns (direction random), at least ``0.5 D``
           apart: the town-to-town trip
=========  ===================================================================================

On any other graph (no place list) the kinds are distance bands relative to the diagonal
``L`` of the graph's bounding box: short ``<= 0.1 L``, medium ``0.1 L .. 0.3 L``, long
``>= 0.3 L``.

Every pair has origin != destination and both ends in the largest strongly connected
component (``graph.component``), so a directed route always exists.
The default mix is :data:`DEFAULT_MIX`; counts per kind are ``n x share`` rounded by largest
remainder, and the pairs come out shuffled.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import RoadGraph, great_circle_m
from dueroute.planner.heuristics import largest_component_nodes

KINDS = ("short", "medium", "long")

#: Share of each trip kind in a query set.
DEFAULT_MIX: dict[str, float] = {"short": 0.4, "medium": 0.35, "long": 0.25}

_MAX_ROUNDS = 200  # rejection-sampling rounds before giving up on a kind


def _check_mix(mix: Mapping[str, float] | None) -> dict[str, float]:
    mix = dict(DEFAULT_MIX if mix is None else mix)
    unknown = sorted(set(mix) - set(KINDS))
    if unknown:
        raise InvalidRequest(f"unknown trip kinds {unknown}; allowed: {', '.join(KINDS)}")
    if any(not np.isfinite(v) or v < 0 for v in mix.values()) or sum(mix.values()) <= 0:
        raise InvalidRequest(f"mix shares must be non-negative numbers with a positive sum: {mix}")
    total = float(sum(mix.values()))
    return {k: float(mix.get(k, 0.0)) / total for k in KINDS}


def kind_counts(n: int, mix: Mapping[str, float] | None = None) -> dict[str, int]:
    """How many pairs of each kind a set of ``n`` gets (largest-remainder rounding)."""
    shares = _check_mix(mix)
    raw = {k: n * s for k, s in shares.items()}
    counts = {k: int(np.floor(v)) for k, v in raw.items()}
    left = n - sum(counts.values())
    for k in sorted(KINDS, key=lambda k: (-(raw[k] - counts[k]), KINDS.index(k)))[:left]:
        counts[k] += 1
    return counts


def sample_queries(
    graph: RoadGraph,
    n: int,
    seed: int = 0,
    mix: Mapping[str, float] | None = None,
) -> np.ndarray:
    """``n`` reproducible (origin, destination) node pairs; see the module docstring.

    Returns
    -------
    int64[n, 2]
        Column 0 origins, column 1 destinations (node indices of ``graph``).
    """
    pairs, _ = sample_queries_with_kinds(graph, n, seed, mix)
    return pairs


def sample_queries_with_kinds(
    graph: RoadGraph,
    n: int,
    seed: int = 0,
    mix: Mapping[str, float] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Like :func:`sample_queries`, also returning each pair's kind.

    Returns
    -------
    pairs : int64[n, 2]
    kinds : str array [n]
        ``"short"``, ``"medium"`` or ``"long"`` per pair.
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 0:
        raise InvalidRequest(f"the number of queries must be a non-negative integer, got {n!r}")
    counts = kind_counts(int(n), mix)
    rng = np.random.default_rng(seed)
    comp = np.asarray(graph.component)
    if graph.n_nodes < 2:
        raise InvalidRequest("the graph needs at least two nodes to sample queries")
    main = int(np.argmax(np.bincount(comp)))
    nodes = np.nonzero(comp == main)[0]
    if len(nodes) < 2:
        raise InvalidRequest("the largest strongly connected component has a single node")
    lat = np.asarray(graph.lat)[nodes]
    lon = np.asarray(graph.lon)[nodes]
    rules = _rules(graph, lat, lon)
    out_pairs: list[np.ndarray] = []
    out_kinds: list[np.ndarray] = []
    for kind in KINDS:
        k = counts[kind]
        if k == 0:
            continue
        pick = _sample_kind(rng, rules[kind], lat, lon, k)
        if len(pick) < k:
            raise InvalidRequest(
                f"could not find {k} {kind} trips in graph {graph.name!r} "
                f"(found {len(pick)}); use a mix without {kind!r} trips for this graph"
            )
        out_pairs.append(nodes[pick])
        out_kinds.append(np.full(k, kind))
    if not out_pairs:
        return np.zeros((0, 2), dtype=np.int64), np.zeros(0, dtype="<U6")
    pairs = np.concatenate(out_pairs).astype(np.int64)
    kinds = np.concatenate(out_kinds)
    order = rng.permutation(len(pairs))
    return pairs[order], kinds[order]


def _rules(graph: RoadGraph, lat: np.ndarray, lon: np.ndarray) -> dict[str, dict[str, Any]]:
    """Per kind: candidate origin / destination masks over ``nodes`` and a distance band (m)."""
    everywhere = np.ones(len(lat), dtype=bool)
    towns = [p for p in graph.meta.get("places", []) if p.get("kind") == "town"]
    if len(towns) >= 2:
        towns = sorted(towns, key=lambda p: -float(p["radius_m"]))[:2]
        inside = [
            great_circle_m(lat, lon, p["lat"], p["lon"]) <= float(p["radius_m"]) for p in towns
        ]
        d_towns = float(
            great_circle_m(towns[0]["lat"], towns[0]["lon"], towns[1]["lat"], towns[1]["lon"])
        )
        return {
            "short": {
                "groups": [
                    (m, m, 0.0, 0.5 * float(p["radius_m"]))
                    for m, p in zip(inside, towns, strict=True)
                ]
            },
            "medium": {"groups": [(everywhere, everywhere, 0.15 * d_towns, 0.45 * d_towns)]},
            "long": {
                "groups": [
                    (inside[0], inside[1], 0.5 * d_towns, np.inf),
                    (inside[1], inside[0], 0.5 * d_towns, np.inf),
                ]
            },
        }
    diag = float(great_circle_m(lat.min(), lon.min(), lat.max(), lon.max()))
    return {
        "short": {"groups": [(everywhere, everywhere, 0.0, 0.1 * diag)]},
        "medium": {"groups": [(everywhere, everywhere, 0.1 * diag, 0.3 * diag)]},
        "long": {"groups": [(everywhere, everywhere, 0.3 * diag, np.inf)]},
    }


def _sample_kind(
    rng: np.random.Generator, rule: dict[str, Any], lat: np.ndarray, lon: np.ndarray, k: int
) -> np.ndarray:
    """Rejection-sample ``k`` (origin, destination) index pairs for one kind."""
    groups = [
        (np.nonzero(o)[0], np.nonzero(d)[0], lo, hi)
        for o, d, lo, hi in rule["groups"]
        if o.any() and d.any()
    ]
    if not groups:
        return np.zeros((0, 2), dtype=np.int64)
    found: list[np.ndarray] = []
    have = 0
    for _ in range(_MAX_ROUNDS):
        if have >= k:
            break
        batch = max(64, 4 * (k - have))
        g = rng.integers(len(groups), size=batch)
        cand = np.empty((batch, 2), dtype=np.int64)
        ok = np.zeros(batch, dtype=bool)
        for gi, (origins, dests, lo, hi) in enumerate(groups):
            sel = g == gi
            m = int(sel.sum())
            o = origins[rng.integers(len(origins), size=m)]
            d = dests[rng.integers(len(dests), size=m)]
            dist = great_circle_m(lat[o], lon[o], lat[d], lon[d])
            cand[sel, 0], cand[sel, 1] = o, d
            ok[sel] = (o != d) & (dist >= lo) & (dist <= hi)
        good = cand[ok][: k - have]
        found.append(good)
        have += len(good)
    return np.concatenate(found) if found else np.zeros((0, 2), dtype=np.int64)


#: Long trips on the demo region start and end this close to the two town centres.
TOWN_CENTRE_RADIUS_M = 1000.0


def long_trip_pairs(graph: Any, count: int, rng: np.random.Generator) -> tuple[list, str]:
    """Long trips for the ALT comparison, and a note on how they were chosen.

    On the demo region: nodes near the two town centres (from the graph's ``places``).
    Elsewhere: for random origins, the node of the largest strong
    component farthest away by great-circle distance.
    """
    towns = _demo_town_trips(graph, count, rng)
    if towns is not None:
        return towns
    nodes = largest_component_nodes(graph)
    if nodes.shape[0] < 2:
        raise InvalidRequest(f"graph {graph.name} has no two connected nodes for long trips")
    lat, lon = np.asarray(graph.lat)[nodes], np.asarray(graph.lon)[nodes]
    pairs: list[tuple[int, int]] = []
    for _ in range(count):
        i = int(rng.integers(nodes.shape[0]))
        far = int(np.argmax(great_circle_m(lat[i], lon[i], lat, lon)))
        if far == i:
            far = (i + 1) % nodes.shape[0]
        pairs.append((int(nodes[i]), int(nodes[far])))
    return pairs, "origin random, destination the farthest node by great-circle distance"


def _demo_town_trips(graph: Any, count: int, rng: np.random.Generator) -> tuple[list, str] | None:
    """Trips between the two demo towns (``meta["places"]`` of a demo graph), else ``None``.

    Origins and destinations are nodes of the largest strong component within
    :data:`TOWN_CENTRE_RADIUS_M` of the two largest towns' centres; directions alternate.
    """
    places = graph.meta.get("places") or []
    towns = sorted(
        (p for p in places if isinstance(p, dict) and p.get("kind") == "town"),
        key=lambda p: -float(p.get("radius_m", 0.0)),
    )[:2]
    if len(towns) < 2:
        return None
    nodes = largest_component_nodes(graph)
    lat, lon = np.asarray(graph.lat)[nodes], np.asarray(graph.lon)[nodes]
    near = []
    for town in towns:
        d = great_circle_m(lat, lon, float(town["lat"]), float(town["lon"]))
        pick = nodes[d <= TOWN_CENTRE_RADIUS_M]
        near.append(pick if pick.shape[0] else nodes[[int(np.argmin(d))]])
    pairs = []
    for i in range(count):
        a, b = (near[0], near[1]) if i % 2 == 0 else (near[1], near[0])
        pairs.append((int(rng.choice(a)), int(rng.choice(b))))
    names = f"{towns[0]['name']} and {towns[1]['name']}"
    return pairs, f"between the centres of {names} (within {TOWN_CENTRE_RADIUS_M:.0f} m)"
