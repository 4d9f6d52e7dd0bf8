"""Live travel times: update documents, the cost layer and its immutable cost versions.

The compiled graph holds free-flow (base) travel times. Live traffic is a layer of *updates*
over them: each update selects edges and changes their travel time until it expires. The
:class:`CostLayer` holds the active updates and produces :class:`CostVersion` snapshots; a
search reads one snapshot from start to end (``Planner.start(..., costs=version)``), so a new
batch never changes a search that is already running, and publishing one is a reference swap.

Update documents
----------------
One JSON object ``{"updates": [update, ...]}`` (optionally with a ``"description"`` string) is
one batch. Each update has exactly one *selection*, exactly one *change*, and optionally one
expiry:

===================  =========================================================================
key                  meaning
===================  =========================================================================
``from_node``,       node indices: every (parallel) edge leading from ``from_node`` to
``to_node``          ``to_node`` (one direction; give the reverse pair for the other)
``osm_way``          every edge that runs along this OpenStreetMap way id (graph format 2
                     ``way_id``); ``direction`` may only be ``"both"`` (see below)
``area``             a GeoJSON Polygon (RFC 7946, ``[lon, lat]`` positions, holes allowed):
                     every edge whose two end nodes both lie inside
``along``            a GeoJSON LineString plus ``buffer_m`` (0 < b <= 2000): every edge whose
                     end nodes and interior geometry all lie within ``buffer_m`` of the line;
                     ``direction`` ``"forward"`` keeps the edges that run the way the line is
                     drawn, ``"backward"`` the others, ``"both"`` (default) all
``factor``           new time = base time x factor, 0 < factor <= 1000 (below 1: faster)
``speed_kph``        new time = length / speed, 0 < speed <= 300
``travel_time_s``    new time of each selected edge, 0 < t <= 86400
``closed``           ``true``: the edges cannot be used (``+inf``)
``expires_at``       RFC 3339 date-time with a time zone, in the future
``expires_in_s``     seconds from now, 0 < s <= 2 592 000 (30 days)
``label``            free text kept with the update (at most 200 characters)
===================  =========================================================================

No change may make an edge faster than :data:`MAX_SPEED_KPH`. Later updates win where they
overlap: within a batch the later position, across batches the later batch; an update replaces
the time of its edges (a ``factor`` always multiplies the *base* time, it does not compound).
An update that selects no edge is an error (it would silently do nothing). Every problem of a
document is reported at once, each naming the update and the field (``updates[3].speed_kph:
...``), in one :class:`TrafficDocumentError`.

``osm_way`` with ``direction`` ``forward`` or ``backward`` is refused: graph format 2 records
which ways an edge runs along, not in which sense, so the way's node order is not known.

Expiry (how it is decided)
--------------------------
Every operation on the layer carries a time stamp ``at`` (unix seconds, never decreasing). The
active updates after an operation are those applied and not cleared whose ``expires_at`` is
later than its stamp. So an expired update stops applying when the *next* operation happens;
to make that prompt, whoever holds the layer calls :meth:`CostLayer.expire` at
``version.next_expiry`` (the service writes that call to its journal, so every replica and a
restart produce the same version at the same step, see ``service/server/traffic_store.py``).
A version is a pure function of its sequence of operations: replaying them gives the same
version numbers and the same costs.

Bounds (why every bound stays proven)
-------------------------------------
The kernel's heuristic is ``h = max(chord / v_max, ALT - slack, 0)`` (``planner/heuristics.py``).

*Chord term.* :attr:`CostVersion.max_speed_mps` is ``max_e length_e / c_e`` over every edge under
the version's costs ``c`` (closed edges excluded). Every edge is at least as long as the chord
between its ends, so for any path ``P`` from ``v`` to ``t``:
``chord(v, t) <= sum_P length_e <= v_max * sum_P c_e``, i.e. ``chord / v_max <= c(P)``.

*Landmark term.* ALT distances ``d_b`` were computed on costs ``b`` (the base costs, or a rebuilt
basis). Let ``R = sum over all edges of max(0, b_e - c_e)`` (:attr:`CostVersion.landmark_slack_extra_s`).
Take a shortest ``v -> t`` path ``P`` under ``c`` (it exists when ``d_c(v, t)`` is finite); with
non-negative costs it can be chosen simple, so it uses each edge at most once, and

    c(P) = sum_P c_e >= sum_P (b_e - max(0, b_e - c_e)) >= b(P) - R >= d_b(v, t) - R.

ALT is a lower bound on ``d_b(v, t)`` (triangle inequality, Goldberg & Harrelson 2005), so
``ALT - slack - R <= d_c(v, t)``: admissible under ``c``. The ``+inf`` cases of ALT (a landmark
reaches ``v`` but not ``t`` under ``b``) stay valid because every edge closed under ``b`` is also
closed under ``c`` (base costs close nothing; a rebuilt basis is used only when that holds), so
``c`` reaches no more than ``b`` does. The kernel reopens nodes, so the search stays exact although
``h`` is no longer consistent under ``c``; with an admissible ``h``, ``min(incumbent, min f over open)``
is still a lower bound on the optimum (some node of an optimal path is open with its optimal g).

*When the landmarks are rebuilt.* Landmarks built on costs ``b`` are admissible for any costs
``c >= b`` (``R = 0``), and with the slack above for any ``c`` that closes at least what ``b``
closes. When ``R`` exceeds :attr:`CostLayer.rebuild_threshold_s` (by default the larger of 1 s and
0.1 % of the landmarks' largest distance, :data:`REBUILD_FRACTION`: about the error float32
storage already allows for trips across the region) and the layer was given landmarks, the
layer rebuilds the same landmark nodes' distances on the version's costs, in the background
(or at once with ``refine="sync"``), and attaches them to that version and to every later
version for which they give a smaller ``R`` than the base landmarks. Until then the version says
``bound_quality == "weakened"`` and :attr:`CostVersion.bound_note` says by how much.

Reachability
------------
Closures can disconnect pairs. The graph's own SCC labels stay valid (closures only remove
edges) but no longer prove "no route" for a pair a closure cut. The layer computes the SCC
labels of the version's open edges (and their condensation DAG) and attaches them as
:attr:`CostVersion.component`; until they are computed the search uses the graph's labels
(valid, only weaker). Labels computed for a set of closed edges are valid for every version
that closes at least those edges.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import os
import re
import threading
import time
import weakref
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import EARTH_RADIUS_M, RoadGraph

#: Fastest speed an update may give an edge (km/h); keeps the chord bound meaningful.
MAX_SPEED_KPH = 300.0
MAX_FACTOR = 1000.0
MAX_TRAVEL_TIME_S = 86_400.0
MAX_EXPIRES_IN_S = 30 * 86_400.0
MAX_BUFFER_M = 2000.0
MAX_UPDATES = 100_000
MAX_POSITIONS = 10_000
MAX_LABEL_CHARS = 200
#: Problems listed in one error message before the rest are counted.
MAX_PROBLEMS_SHOWN = 20

#: Change kinds, in the order counts are reported.
CHANGE_KINDS = ("factor", "speed_kph", "travel_time_s", "closed")
#: Selection kinds (``nodes`` is the from_node/to_node pair).
SELECTION_KINDS = ("nodes", "osm_way", "area", "along")
DIRECTIONS = ("both", "forward", "backward")

#: Landmarks are rebuilt when R exceeds this share of their largest distance (or 1 s).
REBUILD_FRACTION = 1e-3
REBUILD_MIN_S = 1.0

_UPDATE_KEYS = {
    "from_node",
    "to_node",
    "osm_way",
    "direction",
    "area",
    "along",
    "buffer_m",
    *CHANGE_KINDS,
    "expires_at",
    "expires_in_s",
    "label",
}
_RFC3339 = re.compile(r"^\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(\.\d+)?([Zz]|[+-]\d{2}:\d{2})$")


class TrafficDocumentError(InvalidRequest):
    """A traffic document was refused; ``problems`` lists every reason (update and field)."""

    def __init__(self, problems: list[str], where: str = "traffic document") -> None:
        shown = problems[:MAX_PROBLEMS_SHOWN]
        more = len(problems) - len(shown)
        text = f"{where} refused: " + "; ".join(shown)
        if more > 0:
            text += f"; and {more} more problem(s)"
        super().__init__(text)
        self.problems = problems


def rfc3339(t: float | None) -> str | None:
    """Unix seconds as an RFC 3339 UTC date-time with milliseconds (``None`` stays ``None``)."""
    if t is None or not math.isfinite(t):
        return None
    text = datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds")
    return text.replace("+00:00", "Z")


def parse_rfc3339(text: str) -> float:
    """RFC 3339 date-time (time zone required) to unix seconds; ``ValueError`` otherwise."""
    if not isinstance(text, str) or not _RFC3339.match(text):
        raise ValueError("not an RFC 3339 date-time with a time zone")
    norm = text[:-1] + "+00:00" if text[-1] in "Zz" else text
    return datetime.fromisoformat(norm.replace("t", "T")).timestamp()


# --------------------------------------------------------------------------------------------
# Updates


@dataclass(frozen=True, eq=False)
class Update:
    """One validated update, resolved to the edges of one graph.

    Attributes
    ----------
    position : int
        Index in its document's ``updates`` list.
    selection : str
        One of :data:`SELECTION_KINDS`.
    change : str
        One of :data:`CHANGE_KINDS`.
    value : float
        The factor, km/h or seconds of the change; ``inf`` for ``closed``.
    expires_at : float or None
        Unix seconds after which the update no longer applies.
    edges : int64[k]
        Selected edges, sorted, distinct, ``k >= 1``.
    costs : float64[k]
        New travel time of each selected edge (``+inf`` when closed).
    spec : dict
        The update as JSON, with ``expires_in_s`` turned into ``expires_at`` (what journals
        store, so a replay resolves the same edges and expires at the same moment).
    """

    position: int
    selection: str
    change: str
    value: float
    expires_at: float | None
    edges: np.ndarray
    costs: np.ndarray
    spec: dict[str, Any]

    def info(self, batch: int) -> dict[str, Any]:
        """JSON summary (``GET /v1/traffic``); ``batch`` is the version it came in with."""
        return {
            "batch_version": batch,
            "position": self.position,
            "selection": self.selection,
            "change": self.change,
            "value": None if self.change == "closed" else self.value,
            "edges": int(self.edges.shape[0]),
            "expires_at": rfc3339(self.expires_at),
            "label": self.spec.get("label"),
        }


class Batch:
    """A validated batch prepared for the layer: its updates plus, computed once, their edges
    and new costs merged in apply order (later wins), the earliest expiry and counts by kind.

    :meth:`CostLayer.apply` accepts a plain sequence of updates too and prepares it itself;
    preparing it beforehand (``Batch(parse_document(...))``) keeps that work out of the
    moment a version is published.
    """

    def __init__(self, updates: Iterable[Update]) -> None:
        self.updates: tuple[Update, ...] = tuple(updates)
        ups = self.updates
        if not ups:
            self.edges = np.zeros(0, dtype=np.int64)
            self.costs = np.zeros(0)
        elif len(ups) == 1:
            self.edges, self.costs = ups[0].edges, ups[0].costs
        else:
            edges = np.concatenate([u.edges for u in ups])
            values = np.concatenate([u.costs for u in ups])
            # numpy leaves the winner of a repeated index in one assignment undefined: keep
            # the last occurrence explicitly (first in the reversed order)
            self.edges, first = np.unique(edges[::-1], return_index=True)
            self.costs = values[::-1][first]
        times = [u.expires_at for u in ups if u.expires_at is not None]
        self.min_expiry: float | None = min(times) if times else None
        self.counts = dict.fromkeys(CHANGE_KINDS, 0)
        for u in ups:
            self.counts[u.change] += 1

    def __len__(self) -> int:
        return len(self.updates)


def _number(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    f = float(v)
    return f if math.isfinite(f) else None


def _integer(v: Any) -> int | None:
    if isinstance(v, bool):
        return None
    if isinstance(v, int):
        return v
    if isinstance(v, float) and v.is_integer():
        return int(v)
    return None


def parse_document(
    doc: Any,
    graph: RoadGraph,
    *,
    now: float | None = None,
    check_expiry: bool = True,
    where: str = "traffic document",
) -> list[Update]:
    """Validate a traffic document and resolve every update to ``graph``'s edges.

    Parameters
    ----------
    doc : object
        The decoded JSON document ``{"updates": [...]}``.
    graph : RoadGraph
    now : float, optional
        Unix seconds that ``expires_in_s`` counts from and ``expires_at`` must be after
        (default: the current time).
    check_expiry : bool
        Refuse updates that have already expired (``False`` when replaying a journal, where
        the layer drops them instead).
    where : str
        Names the document in the error message (a file name, "request body").

    Raises
    ------
    TrafficDocumentError
        Listing every problem (update index, field, what is allowed).
    """
    now = time.time() if now is None else float(now)
    if not isinstance(doc, dict):
        raise TrafficDocumentError(
            [f'the document must be a JSON object {{"updates": [...]}}, got {type(doc).__name__}'],
            where,
        )
    problems = []
    extra = sorted(set(doc) - {"updates", "description"})
    if extra:
        problems.append(
            f"unknown top-level key(s) {extra}; allowed: 'updates' (a list) and 'description'"
        )
    if "description" in doc and not isinstance(doc["description"], str):
        problems.append("description must be a string")
    updates = doc.get("updates")
    if not isinstance(updates, list):
        problems.append("'updates' must be a list of update objects")
        raise TrafficDocumentError(problems, where)
    if not updates:
        problems.append("'updates' is empty; a batch needs at least one update")
    if len(updates) > MAX_UPDATES:
        problems.append(f"'updates' holds {len(updates)} updates; at most {MAX_UPDATES} per batch")
        raise TrafficDocumentError(problems, where)
    out: list[Update] = []
    ctx = _Resolver(graph)
    for i, raw in enumerate(updates):
        found = len(problems)
        upd = _parse_update(i, raw, ctx, now, check_expiry, problems)
        if upd is not None and len(problems) == found:
            out.append(upd)
    if problems:
        raise TrafficDocumentError(problems, where)
    return out


def load_document(
    path: str | Path, graph: RoadGraph, *, now: float | None = None
) -> tuple[dict[str, Any], list[Update]]:
    """Read a traffic document file; returns ``(document, updates)``.

    Raises :class:`InvalidRequest` naming the file when it is missing or not JSON, and
    :class:`TrafficDocumentError` for an invalid document.
    """
    p = Path(path)
    if not p.is_file():
        raise InvalidRequest(f"traffic file not found: {path}")
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InvalidRequest(f"{path}: not a UTF-8 text file") from None
    except json.JSONDecodeError as exc:
        raise InvalidRequest(
            f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})"
        ) from None
    return doc, parse_document(doc, graph, now=now, where=str(path))


def _parse_update(
    i: int,
    raw: Any,
    ctx: _Resolver,
    now: float,
    check_expiry: bool,
    problems: list[str],
) -> Update | None:
    at = f"updates[{i}]"
    if not isinstance(raw, dict):
        problems.append(f"{at}: must be an object, got {type(raw).__name__}")
        return None
    unknown = sorted(set(raw) - _UPDATE_KEYS)
    if unknown:
        problems.append(f"{at}: unknown key(s) {unknown}; allowed: {sorted(_UPDATE_KEYS)}")
    spec = {k: v for k, v in raw.items() if k in _UPDATE_KEYS}

    # -- selection --
    forms = [
        name
        for name, keys in (
            ("nodes", ("from_node", "to_node")),
            ("osm_way", ("osm_way",)),
            ("area", ("area",)),
            ("along", ("along",)),
        )
        if any(k in raw for k in keys)
    ]
    selection: str | None = None
    if len(forms) != 1:
        got = f"got {', '.join(forms)}" if forms else "got none"
        problems.append(
            f"{at}: needs exactly one selection ({got}): from_node + to_node, osm_way "
            "(+ direction), area (a GeoJSON Polygon) or along (a GeoJSON LineString + buffer_m)"
        )
    else:
        selection = forms[0]
    if "buffer_m" in raw and selection != "along":
        problems.append(f"{at}.buffer_m: only used with 'along'")
    if "direction" in raw and selection not in ("osm_way", "along"):
        problems.append(f"{at}.direction: only used with 'osm_way' or 'along'")

    # -- change --
    changes = [k for k in CHANGE_KINDS if k in raw]
    change: str | None = None
    value = math.nan
    if len(changes) != 1:
        got = f"got {', '.join(changes)}" if changes else "got none"
        problems.append(
            f"{at}: needs exactly one change ({got}): factor, speed_kph, travel_time_s or "
            "closed: true"
        )
    else:
        change = changes[0]
        v = raw[change]
        if change == "closed":
            if v is not True:
                problems.append(
                    f"{at}.closed: only true is allowed, got {json.dumps(v)} (to restore the "
                    "base travel time use factor: 1, or let the closure expire)"
                )
            value = math.inf
        else:
            num = _number(v)
            limits = {
                "factor": (MAX_FACTOR, "a number > 0 and <= 1000 (below 1 is faster than base)"),
                "speed_kph": (MAX_SPEED_KPH, "a number > 0 and <= 300"),
                "travel_time_s": (MAX_TRAVEL_TIME_S, "a number of seconds > 0 and <= 86400"),
            }
            hi, allowed = limits[change]
            if num is None or not 0.0 < num <= hi:
                problems.append(f"{at}.{change}: must be {allowed}, got {json.dumps(v)}")
            else:
                value = num

    # -- expiry --
    expires_at: float | None = None
    if "expires_at" in raw and "expires_in_s" in raw:
        problems.append(f"{at}: give expires_at or expires_in_s, not both")
    elif "expires_at" in raw:
        try:
            expires_at = parse_rfc3339(raw["expires_at"])
        except (ValueError, OverflowError, OSError):
            problems.append(
                f"{at}.expires_at: must be an RFC 3339 date-time with a time zone "
                f"(e.g. 2030-01-31T17:30:00Z), got {json.dumps(raw['expires_at'])}"
            )
        else:
            if check_expiry and expires_at <= now:
                problems.append(
                    f"{at}.expires_at: {raw['expires_at']} is not in the future "
                    f"(now is {rfc3339(now)})"
                )
    elif "expires_in_s" in raw:
        num = _number(raw["expires_in_s"])
        if num is None or not 0.0 < num <= MAX_EXPIRES_IN_S:
            problems.append(
                f"{at}.expires_in_s: must be a number of seconds > 0 and <= "
                f"{MAX_EXPIRES_IN_S:.0f} (30 days), got {json.dumps(raw['expires_in_s'])}"
            )
        else:
            expires_at = now + num
            spec.pop("expires_in_s", None)
            spec["expires_at"] = rfc3339(expires_at)
            # the RFC 3339 text has millisecond resolution: expire at exactly what it says
            expires_at = parse_rfc3339(spec["expires_at"])
    if "label" in raw and (
        not isinstance(raw["label"], str) or len(raw["label"]) > MAX_LABEL_CHARS
    ):
        problems.append(f"{at}.label: must be a string of at most {MAX_LABEL_CHARS} characters")

    if selection is None:
        return None
    edges = ctx.select(at, selection, raw, problems)
    if edges is None or change is None or not math.isfinite(value) and change != "closed":
        return None
    costs = ctx.new_costs(at, change, value, edges, problems)
    if costs is None:
        return None
    return Update(
        position=i,
        selection=selection,
        change=change,
        value=value,
        expires_at=expires_at,
        edges=edges,
        costs=costs,
        spec=spec,
    )


# --------------------------------------------------------------------------------------------
# Selections


_WAY_INDEX: weakref.WeakKeyDictionary[RoadGraph, tuple[np.ndarray, np.ndarray]] = (
    weakref.WeakKeyDictionary()
)
_WAY_LOCK = threading.Lock()


def _way_index(graph: RoadGraph) -> tuple[np.ndarray, np.ndarray]:
    """(sorted way ids, edge of each) over every (edge, way) entry; built once per graph."""
    with _WAY_LOCK:
        found = _WAY_INDEX.get(graph)
        if found is None:
            ptr = np.asarray(graph.way_indptr, dtype=np.int64)
            ways = np.asarray(graph.way_id, dtype=np.int64)
            edge = np.repeat(np.arange(graph.n_edges, dtype=np.int64), np.diff(ptr))
            order = np.argsort(ways, kind="stable")
            found = (ways[order], edge[order])
            _WAY_INDEX[graph] = found
        return found


class _Resolver:
    """Turns selections into edge sets for one graph (arrays read once per document)."""

    def __init__(self, graph: RoadGraph) -> None:
        self.graph = graph
        self.n = graph.n_nodes
        # plain ndarray views of memory-mapped arrays: indexing a memmap object per update
        # costs microseconds of Python each time
        self.indptr = np.asarray(graph.indptr)
        self.head = np.asarray(graph.head)
        self.base = np.asarray(graph.travel_time_s)
        self.length = np.asarray(graph.length_m)
        self._lat: np.ndarray | None = None
        self._lon: np.ndarray | None = None

    @property
    def lat(self) -> np.ndarray:
        if self._lat is None:
            self._lat = np.asarray(self.graph.lat)
        return self._lat

    @property
    def lon(self) -> np.ndarray:
        if self._lon is None:
            self._lon = np.asarray(self.graph.lon)
        return self._lon

    def select(
        self, at: str, selection: str, raw: dict[str, Any], problems: list[str]
    ) -> np.ndarray | None:
        if selection == "nodes":
            return self._nodes(at, raw, problems)
        if selection == "osm_way":
            return self._osm_way(at, raw, problems)
        if selection == "area":
            return self._area(at, raw.get("area"), problems)
        return self._along(at, raw, problems)

    # -- from_node / to_node --
    def _nodes(self, at: str, raw: dict[str, Any], problems: list[str]) -> np.ndarray | None:
        ends = []
        for key in ("from_node", "to_node"):
            if key not in raw:
                problems.append(f"{at}: from_node and to_node go together; {key} is missing")
                return None
            v = _integer(raw[key])
            if v is None or not 0 <= v < self.n:
                problems.append(
                    f"{at}.{key}: must be a node index in 0..{self.n - 1}, got "
                    f"{json.dumps(raw[key])}"
                )
                return None
            ends.append(v)
        a, b = ends
        lo, hi = int(self.indptr[a]), int(self.indptr[a + 1])
        heads = self.head[lo:hi]
        edges = lo + np.flatnonzero(heads == b)
        if edges.size == 0:
            near = ", ".join(str(int(x)) for x in heads[:8]) or "none"
            problems.append(
                f"{at}: there is no edge from node {a} to node {b} (edges from node {a} lead to "
                f"{near})"
            )
            return None
        return edges.astype(np.int64)

    # -- osm_way --
    def _osm_way(self, at: str, raw: dict[str, Any], problems: list[str]) -> np.ndarray | None:
        way = _integer(raw["osm_way"])
        if way is None or way <= 0:
            problems.append(
                f"{at}.osm_way: must be a positive OpenStreetMap way id, got "
                f"{json.dumps(raw['osm_way'])}"
            )
            return None
        direction = _direction(at, raw, problems)
        if direction is None:
            return None
        if direction != "both":
            problems.append(
                f"{at}.direction: only 'both' is possible with osm_way: the graph records which "
                "ways an edge runs along but not in which sense (graph format 2); select one "
                "direction with from_node/to_node or with along + direction"
            )
            return None
        if self.graph.way_id.shape[0] == 0:
            problems.append(
                f"{at}.osm_way: graph {self.graph.name!r} carries no OSM way ids (its importer "
                "did not record them); select edges with from_node/to_node, area or along"
            )
            return None
        ways, edge = _way_index(self.graph)
        lo, hi = np.searchsorted(ways, [way, way + 1])
        if lo == hi:
            problems.append(f"{at}.osm_way: no edge of the graph runs along OSM way {way}")
            return None
        return np.unique(edge[lo:hi])

    # -- geometry --
    def _positions(
        self, at: str, geom: Any, kind: str, min_count: int, problems: list[str]
    ) -> list[np.ndarray] | None:
        """Validated coordinate arrays (float64[k, 2] of lon, lat): rings or one line."""
        example = (
            '{"type": "Polygon", "coordinates": [[[lon, lat], ..., [lon, lat]]]}'
            if kind == "Polygon"
            else '{"type": "LineString", "coordinates": [[lon, lat], [lon, lat], ...]}'
        )
        if not isinstance(geom, dict) or geom.get("type") != kind or "coordinates" not in geom:
            problems.append(f"{at}: must be a GeoJSON {kind} (RFC 7946) such as {example}")
            return None
        coords = geom["coordinates"]
        parts = coords if kind == "Polygon" else [coords]
        if not isinstance(parts, list) or not parts:
            problems.append(f"{at}.coordinates: must be a non-empty list ({example})")
            return None
        out = []
        total = 0
        for j, part in enumerate(parts):
            where = f"{at}.coordinates[{j}]" if kind == "Polygon" else f"{at}.coordinates"
            if not isinstance(part, list) or len(part) < min_count:
                what = "a linear ring" if kind == "Polygon" else "a LineString"
                problems.append(f"{where}: {what} needs at least {min_count} positions")
                return None
            total += len(part)
            if total > MAX_POSITIONS:
                problems.append(f"{at}: at most {MAX_POSITIONS} positions in one geometry")
                return None
            arr = np.empty((len(part), 2))
            for k, pos in enumerate(part):
                ok = isinstance(pos, list) and len(pos) in (2, 3)
                lon = _number(pos[0]) if ok else None
                lat = _number(pos[1]) if ok else None
                if lon is None or lat is None or not (-180 <= lon <= 180 and -90 <= lat <= 90):
                    problems.append(
                        f"{where}[{k}]: a position is [lon, lat] with lon in -180..180 and lat in "
                        f"-90..90, got {json.dumps(pos)}"
                    )
                    return None
                arr[k] = lon, lat
            if kind == "Polygon" and not np.array_equal(arr[0], arr[-1]):
                problems.append(f"{where}: a linear ring must end where it starts (RFC 7946 3.1.6)")
                return None
            out.append(arr)
        return out

    def _area(self, at: str, geom: Any, problems: list[str]) -> np.ndarray | None:
        rings = self._positions(f"{at}.area", geom, "Polygon", 4, problems)
        if rings is None:
            return None
        outer = rings[0]
        lon_lo, lat_lo = outer.min(axis=0)
        lon_hi, lat_hi = outer.max(axis=0)
        lat, lon = self.lat, self.lon
        cand = np.flatnonzero((lat >= lat_lo) & (lat <= lat_hi) & (lon >= lon_lo) & (lon <= lon_hi))
        inside_c = points_in_polygon(lon[cand], lat[cand], rings)
        inside = np.zeros(self.n, dtype=bool)
        inside[cand[inside_c]] = True
        edges = self._edges_between(cand[inside_c], inside)
        if edges.size == 0:
            problems.append(f"{at}.area: no edge has both ends inside this polygon")
            return None
        return edges

    def _edges_between(self, nodes: np.ndarray, inside: np.ndarray) -> np.ndarray:
        """Sorted edges leaving ``nodes`` whose head is marked in ``inside``."""
        g = self.graph
        starts = np.asarray(g.indptr[nodes], dtype=np.int64)
        counts = np.asarray(g.indptr[nodes + 1], dtype=np.int64) - starts
        total = int(counts.sum())
        if total == 0:
            return np.zeros(0, dtype=np.int64)
        offsets = np.repeat(starts - np.concatenate(([0], np.cumsum(counts)[:-1])), counts)
        edges = np.arange(total, dtype=np.int64) + offsets
        edges = edges[inside[np.asarray(g.head[edges], dtype=np.int64)]]
        return np.sort(edges)

    def _along(self, at: str, raw: dict[str, Any], problems: list[str]) -> np.ndarray | None:
        line_parts = self._positions(f"{at}.along", raw.get("along"), "LineString", 2, problems)
        buf = _number(raw.get("buffer_m"))
        if "buffer_m" not in raw or buf is None or not 0.0 < buf <= MAX_BUFFER_M:
            got = json.dumps(raw.get("buffer_m")) if "buffer_m" in raw else "nothing"
            problems.append(
                f"{at}.buffer_m: 'along' needs a buffer in metres > 0 and <= {MAX_BUFFER_M:.0f}, "
                f"got {got}"
            )
            return None
        direction = _direction(at, raw, problems)
        if direction is None:
            return None
        if line_parts is None:
            return None
        line = line_parts[0]
        plane = _Plane(float(line[:, 1].mean()), float(line[:, 0].mean()))
        lx, ly = plane.xy(line[:, 1], line[:, 0])
        pad_lat = buf / plane.k * 1.01
        pad_lon = buf / (plane.k * plane.cos0) * 1.01
        lat, lon = self.lat, self.lon
        cand = np.flatnonzero(
            (lat >= line[:, 1].min() - pad_lat)
            & (lat <= line[:, 1].max() + pad_lat)
            & (lon >= line[:, 0].min() - pad_lon)
            & (lon <= line[:, 0].max() + pad_lon)
        )
        cx, cy = plane.xy(lat[cand], lon[cand])
        near_c = distance_to_polyline(cx, cy, lx, ly) <= buf
        near = np.zeros(self.n, dtype=bool)
        near[cand[near_c]] = True
        edges = self._edges_between(cand[near_c], near)
        g = self.graph
        if edges.size:
            # interior geometry must be near the line too
            gptr = np.asarray(g.geom_indptr, dtype=np.int64)
            lo, hi = gptr[edges], gptr[edges + 1]
            counts = hi - lo
            if int(counts.sum()):
                owner = np.repeat(np.arange(edges.size), counts)
                idx = np.arange(int(counts.sum())) + np.repeat(
                    lo - np.concatenate(([0], np.cumsum(counts)[:-1])), counts
                )
                px, py = plane.xy(np.asarray(g.geom_lat)[idx], np.asarray(g.geom_lon)[idx])
                far = distance_to_polyline(px, py, lx, ly) > buf
                bad = np.bincount(owner[far], minlength=edges.size) > 0
                edges = edges[~bad]
        if edges.size and direction != "both":
            tails = np.asarray(g.tail[edges], dtype=np.int64)
            heads = np.asarray(g.head[edges], dtype=np.int64)
            tx, ty = plane.xy(lat[tails], lon[tails])
            hx, hy = plane.xy(lat[heads], lon[heads])
            seg = nearest_segment((tx + hx) / 2, (ty + hy) / 2, lx, ly)
            dot = (hx - tx) * (lx[seg + 1] - lx[seg]) + (hy - ty) * (ly[seg + 1] - ly[seg])
            edges = edges[dot > 0] if direction == "forward" else edges[dot < 0]
        if edges.size == 0:
            problems.append(
                f"{at}.along: no edge lies within {buf:g} m of this line"
                + (f" in direction {direction}" if direction != "both" else "")
            )
            return None
        return edges

    # -- change --
    def new_costs(
        self, at: str, change: str, value: float, edges: np.ndarray, problems: list[str]
    ) -> np.ndarray | None:
        g = self.graph
        if change == "closed":
            return np.full(edges.shape[0], np.inf)
        length = self.length[edges]
        if change == "factor":
            costs = self.base[edges] * value
        elif change == "speed_kph":
            costs = length / (value / 3.6)
        else:
            costs = np.full(edges.shape[0], value)
        with np.errstate(divide="ignore", invalid="ignore"):
            speed_kph = np.where(length > 0, length / costs * 3.6, 0.0)
        worst = int(np.argmax(speed_kph))
        if speed_kph[worst] > MAX_SPEED_KPH * (1 + 1e-9):
            e = int(edges[worst])
            problems.append(
                f"{at}.{change}: {value:g} makes edge {e} (node {int(g.tail[e])} -> "
                f"{int(g.head[e])}, {length[worst]:.0f} m) {speed_kph[worst]:.0f} km/h; no edge "
                f"may be faster than {MAX_SPEED_KPH:.0f} km/h"
            )
            return None
        return costs


class _Plane:
    """Local equirectangular plane in metres around (lat0, lon0): fine for a city's extent."""

    def __init__(self, lat0: float, lon0: float) -> None:
        self.lat0, self.lon0 = lat0, lon0
        self.k = math.pi * EARTH_RADIUS_M / 180.0
        self.cos0 = max(math.cos(math.radians(lat0)), 1e-6)

    def xy(self, lat: Any, lon: Any) -> tuple[np.ndarray, np.ndarray]:
        x = (np.asarray(lon, dtype=np.float64) - self.lon0) * self.k * self.cos0
        y = (np.asarray(lat, dtype=np.float64) - self.lat0) * self.k
        return x, y


def points_in_polygon(x: np.ndarray, y: np.ndarray, rings: Sequence[np.ndarray]) -> np.ndarray:
    """bool[k]: which points lie inside the polygon (outer ring, then holes; even-odd rule).

    Rings are float64[r, 2] (x, y) closed rings; straight lines between positions in the
    coordinate plane, as RFC 7946 defines them. Points on the boundary may fall either way.
    """
    inside = np.zeros(x.shape[0], dtype=bool)
    for ring in rings:
        x1, y1 = ring[:-1, 0], ring[:-1, 1]
        x2, y2 = ring[1:, 0], ring[1:, 1]
        for a, b, c, d in zip(x1, y1, x2, y2, strict=True):
            if b == d:
                continue
            crosses = (b > y) != (d > y)
            x_at = a + (y - b) * (c - a) / (d - b)
            inside ^= crosses & (x < x_at)
    return inside


def _segment_terms(
    px: np.ndarray, py: np.ndarray, lx: np.ndarray, ly: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Squared distance of each point to each segment (float64[k, s]), blocked by caller."""
    ax, ay = lx[:-1], ly[:-1]
    dx, dy = lx[1:] - ax, ly[1:] - ay
    seg2 = dx * dx + dy * dy
    with np.errstate(divide="ignore", invalid="ignore"):
        t = ((px[:, None] - ax) * dx + (py[:, None] - ay) * dy) / seg2
    t = np.clip(np.nan_to_num(t, nan=0.0), 0.0, 1.0)
    qx = ax + t * dx - px[:, None]
    qy = ay + t * dy - py[:, None]
    return qx * qx + qy * qy, t


def distance_to_polyline(
    px: np.ndarray, py: np.ndarray, lx: np.ndarray, ly: np.ndarray
) -> np.ndarray:
    """float64[k]: planar distance from each point to the polyline (lx, ly), in its units."""
    out = np.full(px.shape[0], np.inf)
    block = max(1, 2_000_000 // max(1, lx.shape[0]))
    for i in range(0, px.shape[0], block):
        d2, _ = _segment_terms(px[i : i + block], py[i : i + block], lx, ly)
        out[i : i + block] = np.sqrt(d2.min(axis=1))
    return out


def nearest_segment(px: np.ndarray, py: np.ndarray, lx: np.ndarray, ly: np.ndarray) -> np.ndarray:
    """int64[k]: index of the polyline segment nearest to each point."""
    out = np.zeros(px.shape[0], dtype=np.int64)
    block = max(1, 2_000_000 // max(1, lx.shape[0]))
    for i in range(0, px.shape[0], block):
        d2, _ = _segment_terms(px[i : i + block], py[i : i + block], lx, ly)
        out[i : i + block] = np.argmin(d2, axis=1)
    return out


# --------------------------------------------------------------------------------------------
# Cost versions


@dataclass(frozen=True, eq=False)
class CostVersion:
    """An immutable snapshot of the edge costs a search runs on.

    Attributes
    ----------
    version : int
        0 = base (free-flow) costs, then 1, 2, ... (never reused for other costs).
    travel_time_s : float64[m], read-only
        Edge travel times; ``+inf`` marks a closed edge.
    max_speed_mps : float
        Fastest edge speed under these costs, ``max length / time`` (the chord bound's speed).
    landmark_slack_extra_s : float
        ``R = sum over edges max(0, basis - travel_time_s)`` for the landmarks the search
        uses (``landmarks`` if set, else the planner's own, built on base costs); subtracted
        from the ALT term (module docstring). 0 when no cost is below its basis.
    component : int32[n] or None
        SCC labels of the open edges under these costs (with ``component_dag``), or ``None``:
        use the graph's labels (valid, but they cannot see closures).
    component_dag : (int64[c + 1], int64[k]) or None
        CSR of the condensation DAG of ``component``.
    landmarks : object or None
        Landmarks (``planner.heuristics.Landmarks``: rows, trees, unit, slack) rebuilt on
        the costs of version ``landmark_basis``, used instead of the planner's; ``None``: the
        planner's own.
    landmark_basis : int
        Version whose costs the landmarks in use were built on (0 = base costs).
    at : float
        Unix time stamp of the operation that made this version.
    active : tuple of Update
        The updates in force, in the order they apply (later wins).
    active_batches : tuple of int
        The version each of ``active`` came in with (same length).
    next_expiry : float or None
        Earliest ``expires_at`` among the active updates (unix seconds).
    updates_by_kind : dict
        Active updates per change kind (:data:`CHANGE_KINDS`).
    edges_changed, edges_closed, edges_faster : int
        Edges whose cost differs from base / is closed / is below base.
    base_max_speed_mps : float
        The graph's top free-flow speed (for the bound note).
    """

    version: int
    travel_time_s: np.ndarray
    max_speed_mps: float
    landmark_slack_extra_s: float
    component: np.ndarray | None = None
    component_dag: tuple[np.ndarray, np.ndarray] | None = None
    landmarks: Any = None
    landmark_basis: int = 0
    at: float = 0.0
    active: tuple[Update, ...] = ()
    active_batches: tuple[int, ...] = ()
    next_expiry: float | None = None
    updates_by_kind: dict[str, int] = dataclasses.field(
        default_factory=lambda: dict.fromkeys(CHANGE_KINDS, 0)
    )
    edges_changed: int = 0
    edges_closed: int = 0
    edges_faster: int = 0
    base_max_speed_mps: float = 0.0
    refining: bool = False  #: labels or landmarks for this version are being computed

    @property
    def bound_quality(self) -> str:
        """``"full"``: bounds as strong as on the landmarks' own costs; ``"weakened"``: some
        edge is faster than that basis, so the ALT term is lowered (see :attr:`bound_note`)."""
        faster_chord = self.max_speed_mps > self.base_max_speed_mps * (1 + 1e-9)
        return "weakened" if self.landmark_slack_extra_s > 0 or faster_chord else "full"

    @property
    def bound_note(self) -> str | None:
        """Why and by how much the bound is weaker, or ``None`` when it is not."""
        notes = []
        if self.landmark_slack_extra_s > 0:
            basis = (
                "free-flow costs"
                if self.landmark_basis == 0
                else (f"the costs of version {self.landmark_basis}")
            )
            notes.append(
                f"{self.edges_faster} edge(s) are faster than free flow; the landmark bound "
                f"(built on {basis}) is lowered by {self.landmark_slack_extra_s:.1f} s to stay "
                "proven"
                + ("; landmarks are being rebuilt on the new costs" if self.refining else "")
            )
        if self.max_speed_mps > self.base_max_speed_mps * (1 + 1e-9):
            notes.append(
                f"the top speed rose from {self.base_max_speed_mps * 3.6:.0f} to "
                f"{self.max_speed_mps * 3.6:.0f} km/h, which lowers the straight-line bound"
            )
        return "; ".join(notes) if notes else None

    def may_reach(self, origin: int, destination: int) -> bool:
        """Whether a path may exist under these costs (``False`` proves there is none).

        Uses :attr:`component` and its DAG; ``True`` when no labels are attached.
        """
        if self.component is None or self.component_dag is None:
            return True
        from dueroute.planner._kernel import dag_reachable

        a, b = int(self.component[origin]), int(self.component[destination])
        if a == b:
            return True
        dindptr, dhead = self.component_dag
        return bool(dag_reachable(dindptr, dhead, a, b))

    def answer_fields(self) -> dict[str, Any]:
        """What every answer searched on this version carries."""
        return {
            "traffic_version": self.version,
            "bound_quality": self.bound_quality,
            "bound_note": self.bound_note,
        }

    def info(self, max_listed: int = 200) -> dict[str, Any]:
        """JSON summary (``GET /v1/traffic``, ``dueroute route --traffic --json``)."""
        return {
            "version": self.version,
            "at": rfc3339(self.at),
            "active_updates": len(self.active),
            "updates_by_kind": self.updates_by_kind,
            "next_expiry": rfc3339(self.next_expiry),
            "edges_changed": self.edges_changed,
            "edges_closed": self.edges_closed,
            "edges_faster": self.edges_faster,
            "max_speed_kph": self.max_speed_mps * 3.6,
            "landmark_slack_extra_s": self.landmark_slack_extra_s,
            "landmark_basis_version": self.landmark_basis,
            "component_labels": self.component is not None,
            "refining": self.refining,
            "bound_quality": self.bound_quality,
            "bound_note": self.bound_note,
            "updates": [
                u.info(b)
                for u, b in zip(
                    self.active[:max_listed], self.active_batches[:max_listed], strict=True
                )
            ],
            "updates_listed": min(len(self.active), max_listed),
        }


def _readonly(a: np.ndarray) -> np.ndarray:
    arr = np.ascontiguousarray(a)
    arr.flags.writeable = False
    return arr


@dataclass(eq=False)
class _Basis:
    """Landmarks rebuilt on the costs of one version."""

    version: int
    costs: np.ndarray
    changed: np.ndarray  # bool[m]
    landmarks: Any


@dataclass(eq=False)
class _Labels:
    """SCC labels computed for one set of closed edges."""

    closed: np.ndarray  # int64[k] sorted
    component: np.ndarray
    dag: tuple[np.ndarray, np.ndarray]


@dataclass(eq=False)
class _State:
    """The layer's working state behind its current version."""

    costs: np.ndarray  # float64[m], the current version's (read-only) array
    changed: np.ndarray  # bool[m]: edges some active update sets
    closed: np.ndarray  # int64[k] sorted closed edges


class CostLayer:
    """Active updates over one graph's base costs; produces :class:`CostVersion` snapshots.

    Parameters
    ----------
    graph : RoadGraph
    landmarks : planner.heuristics.Landmarks, optional
        The base-cost landmarks searches use; given, the layer rebuilds their distances on
        new costs when speed-ups weaken them (module docstring). ``None``: never rebuilds.
    refine : {"background", "sync", "off"}
        When SCC labels and rebuilt landmarks are computed: in a background thread after a
        version is published (the service), before the operation returns (offline tools,
        tests), or never.
    rebuild_threshold_s : float, optional
        ``R`` above which landmarks are rebuilt (default: module docstring).
    background_nice : int
        Niceness of the background thread (Linux), so it yields to searches.
    turn_profile : planner.turns.TurnProfile, optional
        The turn profile searches use. A graph with turn restrictions (or turn costs) is
        searched as its search graph of legal drives, so its landmarks belong to that graph and
        are rebuilt there, on the arc costs the new road costs give (default: the default
        profile).

    Every operation takes a time stamp ``at`` (default: now; never below the last one) and an
    optional ``version`` (default: the current one + 1; must be larger than the current).
    Operations are serialised under a lock; :attr:`current` is read without locking.
    """

    def __init__(
        self,
        graph: RoadGraph,
        landmarks: Any = None,
        *,
        refine: str = "background",
        rebuild_threshold_s: float | None = None,
        background_nice: int = 0,
        clock: Callable[[], float] = time.time,
        turn_profile: Any = None,
    ) -> None:
        if refine not in ("background", "sync", "off"):
            raise InvalidRequest(f"refine must be background, sync or off, got {refine!r}")
        self.graph = graph
        self.landmarks = landmarks
        self.turn_profile = turn_profile
        # Under turn rules a road edge is driven as one or more arcs of the search graph, and a
        # shortest drive uses each arc at most once, so a saving on edge e counts once per arc
        # of e in R (None: the road graph itself, each edge once).
        from dueroute.planner.endpoints import search_graph_for

        sg, _ = search_graph_for(graph, turn_profile)
        self._arcs_per_edge: np.ndarray | None = (
            None
            if sg.identity
            else np.bincount(np.asarray(sg.road_edge), minlength=graph.n_edges).astype(np.float64)
        )
        self.refine = refine
        self.clock = clock
        self.background_nice = background_nice
        if rebuild_threshold_s is None:
            top = float(getattr(landmarks, "max_distance_s", 0.0) or 0.0)
            rebuild_threshold_s = max(REBUILD_MIN_S, REBUILD_FRACTION * top)
        self.rebuild_threshold_s = float(rebuild_threshold_s)
        self._base = _readonly(np.asarray(graph.travel_time_s, dtype=np.float64))
        self._length = np.asarray(graph.length_m, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            speed = np.where(self._length > 0, self._length / self._base, 0.0)
        self._base_speed = np.nan_to_num(speed, nan=0.0, posinf=0.0)
        self._speed_order = np.argsort(-self._base_speed, kind="stable")
        top_speed = float(self._base_speed.max()) if graph.n_edges else 0.0
        self._base_top_speed = max(top_speed, float(graph.max_speed_mps))
        self._lock = threading.RLock()
        self._state = _State(
            costs=self._base,
            changed=np.zeros(graph.n_edges, dtype=bool),
            closed=np.zeros(0, dtype=np.int64),
        )
        self._basis: _Basis | None = None
        self._labels: _Labels | None = None
        self._current = CostVersion(
            version=0,
            travel_time_s=self._base,
            max_speed_mps=self._base_top_speed,
            landmark_slack_extra_s=0.0,
            base_max_speed_mps=self._base_top_speed,
            at=0.0,
        )
        self._work = threading.Condition(self._lock)
        self._thread: threading.Thread | None = None
        self._closed = False
        self._busy = False
        self.refinements = 0  #: background/sync refinements completed (labels or landmarks)
        self.last_refine_s: dict[str, float] = {}

    # -- reading --
    @property
    def current(self) -> CostVersion:
        """The newest version (a plain attribute read: never blocks)."""
        return self._current

    @property
    def base_costs(self) -> np.ndarray:
        return self._base

    # -- operations --
    def apply(
        self,
        updates: Batch | Sequence[Update],
        *,
        version: int | None = None,
        at: float | None = None,
    ) -> CostVersion:
        """Add a batch (later updates win); drops updates expired by ``at``.

        Costs O(edges touched) plus one copy of the cost array when nothing expires (the
        common case); otherwise the version is rebuilt from the active updates.
        """
        batch = updates if isinstance(updates, Batch) else Batch(updates)
        with self._lock:
            v, at = self._next(version, at)
            cur = self._current
            fresh = batch.min_expiry is None or batch.min_expiry > at
            if fresh and (cur.next_expiry is None or cur.next_expiry > at):
                return self._publish_incremental(v, at, batch)
            new = _Active.of(batch.updates, v).alive_at(at)
            alive = _Active.from_version(cur).alive_at(at)
            return self._publish_full(v, at, alive.plus(new))

    def expire(self, at: float | None = None, *, version: int | None = None) -> CostVersion | None:
        """Drop the updates expired by ``at``; a new version when any was, else ``None``."""
        with self._lock:
            at_now = self._stamp(at)
            cur = self._current
            if cur.next_expiry is None or cur.next_expiry > at_now:
                return None
            v, at_now = self._next(version, at_now)
            return self._publish_full(v, at_now, _Active.from_version(cur).alive_at(at_now))

    def clear(self, *, version: int | None = None, at: float | None = None) -> CostVersion:
        """Drop every update: a new version with the base costs."""
        with self._lock:
            v, at = self._next(version, at)
            return self._publish_full(v, at, _Active.of((), v))

    def replace(
        self,
        active: Sequence[Update],
        batches: Sequence[int],
        *,
        version: int,
        at: float | None = None,
    ) -> CostVersion:
        """Publish ``version`` with exactly ``active`` in force, ``batches[i]`` being the
        version update ``i`` came in with (journal replay, catch-up)."""
        with self._lock:
            v, at = self._next(version, at)
            if len(active) != len(batches):
                raise InvalidRequest("replace needs one batch version per update")
            alive = _Active(tuple(active), tuple(int(b) for b in batches)).alive_at(at)
            return self._publish_full(v, at, alive)

    def wait_refined(self, timeout: float | None = None) -> bool:
        """Block until no refinement is pending or running (tests, offline tools)."""
        deadline = None if timeout is None else time.monotonic() + timeout
        with self._work:
            while self._busy or self._needs_work(self._current):
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    return False
                self._work.wait(timeout=left if left is not None else 0.5)
        return True

    def close(self) -> None:
        """Stop the background thread (pending refinements are dropped)."""
        with self._work:
            self._closed = True
            self._work.notify_all()
        thread = self._thread
        if thread is not None and thread is not threading.current_thread():
            thread.join(timeout=5.0)

    # -- internals --
    def _stamp(self, at: float | None) -> float:
        t = self.clock() if at is None else float(at)
        return max(t, self._current.at)

    def _next(self, version: int | None, at: float | None) -> tuple[int, float]:
        cur = self._current.version
        v = cur + 1 if version is None else int(version)
        if v <= cur:
            raise InvalidRequest(f"cost version {v} is not after the current version {cur}")
        return v, self._stamp(at)

    def _publish_incremental(self, v: int, at: float, batch: Batch) -> CostVersion:
        st = self._state
        cur = self._current
        costs = st.costs.copy()
        changed = st.changed.copy()
        costs[batch.edges] = batch.costs
        changed[batch.edges] = True
        earliest = _earliest(cur.next_expiry, batch.min_expiry)
        counts = {k: cur.updates_by_kind[k] + batch.counts[k] for k in CHANGE_KINDS}
        active = _Active.from_version(cur).plus(_Active.of(batch.updates, v))
        return self._publish(v, at, active, costs, changed, earliest, counts)

    def _publish_full(self, v: int, at: float, active: _Active) -> CostVersion:
        whole = Batch(active.updates)
        costs = self._base.copy()
        changed = np.zeros(self.graph.n_edges, dtype=bool)
        costs[whole.edges] = whole.costs
        changed[whole.edges] = True
        return self._publish(v, at, active, costs, changed, whole.min_expiry, whole.counts)

    def _publish(
        self,
        v: int,
        at: float,
        active: _Active,
        costs: np.ndarray,
        changed: np.ndarray,
        earliest: float | None,
        counts: dict[str, int],
    ) -> CostVersion:
        """Publish a version with these costs (``earliest`` expiry and ``counts`` by kind of
        ``active``, computed by the caller in O(what changed))."""
        costs = _readonly(costs)
        idx = np.flatnonzero(changed)
        c = costs[idx]
        b = self._base[idx]
        closed = idx[np.isinf(c)]
        open_c = ~np.isinf(c)
        faster = int(np.count_nonzero(c < b))
        with np.errstate(divide="ignore", invalid="ignore"):
            sp = np.where(open_c & (self._length[idx] > 0), self._length[idx] / c, 0.0)
        top_changed = float(np.nan_to_num(sp, nan=0.0).max()) if idx.size else 0.0
        top = max(top_changed, self._top_unchanged(changed))
        if top <= 0.0:  # everything closed: the chord term is irrelevant, keep it finite
            top = self._base_top_speed
        self._state = _State(costs=costs, changed=changed, closed=closed)
        landmarks, basis, slack = self._choose_basis(costs, changed, idx)
        component, dag = self._labels_for(closed)
        version = CostVersion(
            version=v,
            travel_time_s=costs,
            max_speed_mps=top,
            landmark_slack_extra_s=slack,
            component=component,
            component_dag=dag,
            landmarks=landmarks,
            landmark_basis=basis,
            at=at,
            active=active.updates,
            active_batches=active.batches,
            next_expiry=earliest,
            updates_by_kind=counts,
            edges_changed=int(idx.size),
            edges_closed=int(closed.size),
            edges_faster=faster,
            base_max_speed_mps=self._base_top_speed,
        )
        needs = self._needs_work(version)
        if needs and self.refine != "off":
            version = dataclasses.replace(version, refining=True)
        self._current = version
        if needs and self.refine == "sync":
            self._refine_now(version)
        elif needs and self.refine == "background":
            self._start_thread()
            self._work.notify_all()
        return self._current

    def _top_unchanged(self, changed: np.ndarray) -> float:
        """Fastest base speed among edges no update changes (walks edges fastest first)."""
        order = self._speed_order
        step = 1024
        for i in range(0, order.shape[0], step):
            chunk = order[i : i + step]
            free = np.flatnonzero(~changed[chunk])
            if free.size:
                return float(self._base_speed[chunk[free[0]]])
        return 0.0

    def _slack_against(self, costs: np.ndarray, changed: np.ndarray, basis: _Basis) -> float | None:
        """``R`` of ``costs`` against a rebuilt basis, or ``None`` when the basis is not valid
        (it closes an edge these costs open)."""
        idx = np.flatnonzero(changed | basis.changed)
        bc, c = basis.costs[idx], costs[idx]
        b_closed = np.isinf(bc)
        if bool(np.any(b_closed & ~np.isinf(c))):
            return None
        with np.errstate(invalid="ignore"):  # inf - inf where both close: masked to 0
            diff = np.where(b_closed, 0.0, bc - np.where(np.isinf(c), bc, c))
        return self._total_saving(np.maximum(diff, 0.0), idx)

    def _total_saving(self, saving: np.ndarray, idx: np.ndarray) -> float:
        """R: the savings of edges ``idx``, each once per arc it is driven as."""
        if self._arcs_per_edge is None:
            return float(saving.sum())
        return float(np.dot(saving, self._arcs_per_edge[idx]))

    def _choose_basis(
        self, costs: np.ndarray, changed: np.ndarray, idx: np.ndarray
    ) -> tuple[Any, int, float]:
        """(landmarks or None, basis version, R): the valid basis with the smallest R."""
        b, c = self._base[idx], costs[idx]
        # inf costs (closures) contribute 0; sum in float64 over at most m terms
        base_r = self._total_saving(np.maximum(b - np.where(np.isinf(c), b, c), 0.0), idx)
        best: tuple[Any, int, float] = (None, 0, base_r)
        basis = self._basis
        if basis is not None and base_r > 0.0:
            r = self._slack_against(costs, changed, basis)
            if r is not None and r < base_r:
                best = (basis.landmarks, basis.version, r)
        return best

    def _labels_for(
        self, closed: np.ndarray
    ) -> tuple[np.ndarray | None, tuple[np.ndarray, np.ndarray] | None]:
        if closed.size == 0:
            return None, None  # the graph's own labels are exact
        known = self._labels
        if known is not None and (
            known.closed.size == 0 or bool(np.all(np.isin(known.closed, closed)))
        ):
            return known.component, known.dag  # valid (exact when the sets are equal)
        return None, None

    def _needs_work(self, version: CostVersion) -> bool:
        if self.refine == "off" or self._closed:
            return False
        return self._needs_labels(version) or self._needs_landmarks(version)

    def _needs_labels(self, version: CostVersion) -> bool:
        # the working state always belongs to the newest version
        closed = self._state.closed
        if closed.size == 0:
            return False
        known = self._labels
        return known is None or not np.array_equal(known.closed, closed)

    def _needs_landmarks(self, version: CostVersion) -> bool:
        if self.landmarks is None or getattr(self.landmarks, "count", 1) == 0:
            return False
        if self._basis is not None and self._basis.version == version.version:
            return False  # rebuilt on exactly these costs already
        return version.landmark_slack_extra_s > self.rebuild_threshold_s

    def _start_thread(self) -> None:
        if self._thread is None or not self._thread.is_alive():
            self._thread = threading.Thread(target=self._worker, name="dueroute-costs", daemon=True)
            self._thread.start()

    def _worker(self) -> None:
        if self.background_nice > 0 and hasattr(os, "setpriority"):
            with contextlib.suppress(OSError):
                os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), self.background_nice)
        while True:
            with self._work:
                while not self._closed and not self._needs_work(self._current):
                    self._work.wait()
                if self._closed:
                    return
                target = self._current
                self._busy = True
            try:
                self._refine_now(target)
            finally:
                with self._work:
                    self._busy = False
                    self._work.notify_all()

    def _refine_now(self, target: CostVersion) -> None:
        """Compute labels / landmarks for ``target`` (outside the lock when in the background)
        and attach them to the current version if they are valid for it."""
        with self._lock:
            if target.version != self._current.version:
                return  # superseded before we started: the worker looks again
            closed = self._state.closed.copy()
            changed = self._state.changed.copy()
            want_labels = self._needs_labels(target)
            want_landmarks = self._needs_landmarks(target)
        labels = None
        basis = None
        if want_labels:
            t0 = time.perf_counter()
            labels = _compute_labels(self.graph, target.travel_time_s, closed)
            self.last_refine_s["labels"] = time.perf_counter() - t0
        if want_landmarks:
            t0 = time.perf_counter()
            lm = self._landmarks_on(target.travel_time_s)
            self.last_refine_s["landmarks"] = time.perf_counter() - t0
            basis = _Basis(target.version, target.travel_time_s, changed, lm)
        with self._lock:
            if labels is not None:
                self._labels = labels
            if basis is not None:
                self._basis = basis
            self.refinements += 1
            self._reattach()

    def _landmarks_on(self, road_costs: np.ndarray) -> Any:
        """The landmarks rebuilt on new road costs, on the graph searches run on."""
        from dueroute.planner.endpoints import search_graph_for
        from dueroute.planner.heuristics import landmarks_on_costs

        sg, kg = search_graph_for(self.graph, self.turn_profile)
        if sg.identity:
            return landmarks_on_costs(self.graph, self.landmarks, road_costs)
        return landmarks_on_costs(kg, self.landmarks, sg.arc_costs(road_costs))

    def _reattach(self) -> None:
        """Republish the current version (same number, same costs) with the best labels and
        landmarks known now."""
        cur = self._current
        st = self._state
        idx = np.flatnonzero(st.changed)
        landmarks, basis, slack = self._choose_basis(st.costs, st.changed, idx)
        component, dag = self._labels_for(st.closed)
        fresh = dataclasses.replace(
            cur,
            landmarks=landmarks,
            landmark_basis=basis,
            landmark_slack_extra_s=slack,
            component=component,
            component_dag=dag,
            refining=False,
        )
        needs = self._needs_work(fresh)
        if needs and self.refine != "off":
            fresh = dataclasses.replace(fresh, refining=True)
        self._current = fresh


@dataclass(frozen=True)
class _Active:
    """The updates in force and the version each came in with (parallel tuples)."""

    updates: tuple[Update, ...]
    batches: tuple[int, ...]

    @staticmethod
    def of(updates: Iterable[Update], batch: int) -> _Active:
        ups = tuple(updates)
        return _Active(ups, (batch,) * len(ups))

    @staticmethod
    def from_version(version: CostVersion) -> _Active:
        return _Active(version.active, version.active_batches)

    def alive_at(self, at: float) -> _Active:
        """Without the updates whose ``expires_at`` is not later than ``at``."""
        keep = [i for i, u in enumerate(self.updates) if u.expires_at is None or u.expires_at > at]
        if len(keep) == len(self.updates):
            return self
        return _Active(tuple(self.updates[i] for i in keep), tuple(self.batches[i] for i in keep))

    def plus(self, other: _Active) -> _Active:
        return _Active(self.updates + other.updates, self.batches + other.batches)


def _earliest(a: float | None, b: float | None) -> float | None:
    if a is None:
        return b
    return a if b is None else min(a, b)


def _compute_labels(graph: RoadGraph, costs: np.ndarray, closed: np.ndarray) -> _Labels:
    """SCC labels of the graph without its closed edges, and their condensation DAG."""
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import connected_components

    n, m = graph.n_nodes, graph.n_edges
    keep = np.ones(m, dtype=bool)
    keep[closed] = False
    tail = np.asarray(graph.tail, dtype=np.int64)[keep]
    head = np.asarray(graph.head, dtype=np.int64)[keep]
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(tail, minlength=n), out=indptr[1:])
    csr = csr_matrix((np.ones(head.shape[0], dtype=np.int8), head, indptr), shape=(n, n))
    _, labels = connected_components(csr, directed=True, connection="strong")
    comp = labels.astype(np.int64)
    tc, hc = comp[tail], comp[head]
    cross = tc != hc
    pairs = np.unique(np.stack((tc[cross], hc[cross]), axis=1), axis=0)
    n_comp = int(comp.max()) + 1 if n else 1
    dindptr = np.zeros(n_comp + 1, dtype=np.int64)
    np.add.at(dindptr, pairs[:, 0] + 1, 1)
    dag = (np.cumsum(dindptr), np.ascontiguousarray(pairs[:, 1], dtype=np.int64))
    return _Labels(closed=closed.copy(), component=_readonly(labels.astype(np.int32)), dag=dag)


# --------------------------------------------------------------------------------------------
# Offline use and scenarios


def costs_from_document(
    graph: RoadGraph,
    doc: Any,
    landmarks: Any = None,
    *,
    now: float | None = None,
    refine: str = "sync",
    where: str = "traffic document",
) -> CostVersion:
    """One version with one document applied to the base costs (``dueroute ... --traffic``).

    With ``refine="sync"`` the labels (and, when speed-ups call for them, landmarks rebuilt
    on the new costs) are attached before it returns.
    """
    now = time.time() if now is None else now
    updates = parse_document(doc, graph, now=now, where=where)
    layer = CostLayer(graph, landmarks, refine=refine)
    try:
        return layer.apply(updates, at=now)
    finally:
        layer.close()


def sample_scenario(
    graph: RoadGraph,
    rng: np.random.Generator,
    *,
    slowdowns: int = 40,
    speedups: int = 4,
    closures: int = 6,
    areas: int = 2,
) -> dict[str, Any]:
    """A random traffic document for training and tests (``{"updates": [...]}``).

    Slowdowns (factor 1.2..3) and speed-ups (factor 0.6..0.95, capped so no edge exceeds
    :data:`MAX_SPEED_KPH`) on random node pairs, closures of random edges, and ``areas``
    congested squares (factor 1.3..2) around random nodes. Only ``from_node``/``to_node`` and
    ``area`` selections, so it works on any graph.
    """
    m = graph.n_edges
    if m == 0:
        raise InvalidRequest("a graph without edges has no traffic to sample")
    tail = np.asarray(graph.tail)
    head = np.asarray(graph.head)
    base = np.asarray(graph.travel_time_s)
    length = np.asarray(graph.length_m)
    updates: list[dict[str, Any]] = []
    for _ in range(areas):
        v = int(rng.integers(graph.n_nodes))
        lat, lon = float(graph.lat[v]), float(graph.lon[v])
        half = float(rng.uniform(0.002, 0.01))
        ring = [
            [lon - half, lat - half],
            [lon + half, lat - half],
            [lon + half, lat + half],
            [lon - half, lat + half],
            [lon - half, lat - half],
        ]
        inside = (np.abs(np.asarray(graph.lat) - lat) < half) & (
            np.abs(np.asarray(graph.lon) - lon) < half
        )
        if int(np.count_nonzero(inside[tail] & inside[head])):
            updates.append(
                {
                    "area": {"type": "Polygon", "coordinates": [ring]},
                    "factor": round(float(rng.uniform(1.3, 2.0)), 3),
                }
            )
    picks = rng.integers(0, m, slowdowns + speedups + closures)
    for k, e in enumerate(picks):
        e = int(e)
        upd: dict[str, Any] = {"from_node": int(tail[e]), "to_node": int(head[e])}
        if k < slowdowns:
            upd["factor"] = round(float(rng.uniform(1.2, 3.0)), 3)
        elif k < slowdowns + speedups:
            lo, hi = graph.indptr[tail[e]], graph.indptr[tail[e] + 1]
            par = lo + np.flatnonzero(np.asarray(graph.head[lo:hi]) == head[e])
            with np.errstate(divide="ignore", invalid="ignore"):
                fast = np.where(base[par] > 0, length[par] / base[par] * 3.6, 0.0)
            floor = float(fast.max()) / MAX_SPEED_KPH if fast.size else 0.0
            upd["factor"] = round(max(float(rng.uniform(0.6, 0.95)), floor * 1.01 + 1e-3), 3)
        else:
            upd["closed"] = True
        updates.append(upd)
    return {"updates": updates}


def describe_updates(updates: Iterable[Update]) -> dict[str, int]:
    """Counts by change kind (for reports)."""
    counts = dict.fromkeys(CHANGE_KINDS, 0)
    for u in updates:
        counts[u.change] += 1
    return counts


__all__ = [
    "Batch",
    "CHANGE_KINDS",
    "CostLayer",
    "CostVersion",
    "MAX_SPEED_KPH",
    "TrafficDocumentError",
    "Update",
    "costs_from_document",
    "load_document",
    "parse_document",
    "parse_rfc3339",
    "rfc3339",
    "sample_scenario",
]


def _direction(at: str, raw: dict[str, Any], problems: list[str]) -> str | None:
    """A selection's ``direction`` (default ``both``), or None with the problem recorded."""
    direction = raw.get("direction", "both")
    if direction not in DIRECTIONS:
        problems.append(
            f"{at}.direction: must be one of {', '.join(DIRECTIONS)}, got {json.dumps(direction)}"
        )
        return None
    return str(direction)
