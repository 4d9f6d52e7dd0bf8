"""OSM turn restrictions (``type=restriction`` relations) as sequences of compiled road edges.

Reading (:func:`parse_restriction`)
-----------------------------------
The restriction for cars is ``restriction:motorcar``, else ``restriction:motor_vehicle``, else
``restriction``. A relation that has only restrictions for other vehicles (``restriction:hgv``,
``restriction:conditional``, ...), or whose ``except`` lists ``motorcar`` (or the classes a
car belongs to, ``motor_vehicle`` and ``vehicle``), does not bind cars and is dropped as
``not_for_cars``. Kinds kept (OSM wiki *Relation:restriction*): :data:`KINDS`; ``no_*``
forbids the sequence ``from, via..., to``, ``only_*`` makes ``to`` the only way on after
``from, via...``. Members: ``from`` and ``to`` are ways; ``via`` is one node or one or more
ways. A ``no_*`` relation with several ``from`` (``no_entry``) or several ``to`` ways
(``no_exit``) counts as one restriction per (from, to) pair; an ``only_*`` one per ``from``.
Time-of-day tags (``day_on``, ``hour_on``...) are not read.

Mapping (:func:`map_restrictions`)
----------------------------------
Every restriction becomes a sequence of compiled edges, using each edge's OSM way ids in
travel order (``way_indptr``/``way_id`` of :mod:`planner.graph`):

* via node ``V``: the from-edge is the one edge entering ``V`` whose last way is ``from``;
  the to-edge the one edge leaving ``V`` whose first way is ``to``;
* via ways ``W1..Wk``: they must chain end to end (in the member order or reversed); the
  junction ``J1`` is the end of ``W1`` where an edge along ``from`` arrives, ``Jk`` the end of
  ``Wk`` where an edge along ``to`` leaves; the via edges follow ``W1..Wk`` from ``J1`` to
  ``Jk`` (edges along one way only, never turning back).

The importers keep ``V`` and the via ways' ends as graph nodes (:func:`junction_nodes`), so a
from-edge always ends, and a to-edge always starts, at the junction. A restriction that cannot
be mapped is dropped and counted by reason (:data:`DROP_REASONS`); nothing is guessed.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from itertools import product
from typing import Any

import numpy as np

from dueroute.planner.graph import TURN_NO, TURN_ONLY
from dueroute.planner.osm_rules import tokens

#: Restriction kinds read (``no_*`` bans the sequence, ``only_*`` makes it the only way on).
KINDS: tuple[str, ...] = (
    "no_left_turn",
    "no_right_turn",
    "no_straight_on",
    "no_u_turn",
    "no_entry",
    "no_exit",
    "only_left_turn",
    "only_right_turn",
    "only_straight_on",
    "only_u_turn",
)

#: ``except=*`` values that exempt a private car.
CAR_CLASSES: frozenset[str] = frozenset({"motorcar", "motor_vehicle", "vehicle"})

#: Why a restriction is not in the graph, in report order.
DROP_REASONS: dict[str, str] = {
    "not_for_cars": "for other vehicles only, or except lists motorcar",
    "unknown_kind": "restriction value not one of the kinds read",
    "malformed": "missing or wrong members/roles",
    "member_missing": "a member is not in the file (clipped extract) or is not a highway",
    "not_drivable": "a member is not a drivable road",
    "not_connected": "the members do not meet as the relation says",
    "ambiguous": "more than one edge fits a member",
    "outside_kept_component": "an edge is outside the kept component",
}


@dataclass(frozen=True)
class Restriction:
    """One car restriction: ``from`` way, via node or via ways, ``to`` way (OSM ids)."""

    relation_id: int
    kind: str
    from_way: int
    to_way: int
    via_node: int | None = None
    via_ways: tuple[int, ...] = ()
    problem: str | None = None  # a key of DROP_REASONS when it cannot be used at all


def parse_restriction(
    relation_id: int, tags: dict[str, str], members: Sequence[tuple[str, int, str]]
) -> list[Restriction]:
    """Car restrictions of one ``type=restriction`` relation.

    Parameters
    ----------
    tags : dict
        The relation's tags.
    members : sequence of (type, ref, role)
        ``type`` is ``"n"``, ``"w"`` or ``"r"``.

    Returns
    -------
    list of Restriction
        One per (from, to) pair (see the module docstring); a relation that cannot be used
        gives one entry whose ``problem`` says why.
    """
    value = tags.get("restriction:motorcar") or tags.get("restriction:motor_vehicle")
    value = value or tags.get("restriction")
    kind = (value or "").strip()

    def failed(problem: str, label: str | None = None) -> list[Restriction]:
        return [Restriction(relation_id, label or kind or "(none)", -1, -1, problem=problem)]

    if not kind:
        others = [k for k in tags if k.startswith("restriction:")]
        return failed("not_for_cars" if others else "malformed", "(none)")
    if CAR_CLASSES & set(tokens(tags.get("except"))):
        return failed("not_for_cars")
    if kind not in KINDS:
        return failed("unknown_kind")
    froms = [ref for t, ref, role in members if role == "from"]
    tos = [ref for t, ref, role in members if role == "to"]
    vias = [(t, ref) for t, ref, role in members if role == "via"]
    roles_ok = all(t == "w" for t, _, role in members if role in ("from", "to"))
    via_nodes = [ref for t, ref in vias if t == "n"]
    via_ways = tuple(ref for t, ref in vias if t == "w")
    if (
        not froms
        or not tos
        or not roles_ok
        or not vias
        or (via_nodes and via_ways)
        or len(via_nodes) > 1
        or any(t not in ("n", "w") for t, _ in vias)
        or (kind.startswith("only_") and len(tos) > 1)
    ):
        return failed("malformed")
    via_node = via_nodes[0] if via_nodes else None
    return [
        Restriction(relation_id, kind, f, t, via_node=via_node, via_ways=via_ways)
        for f, t in product(froms, tos)
    ]


def junction_nodes(
    restrictions: Iterable[Restriction], way_ends: dict[int, tuple[int, int]]
) -> set[int]:
    """OSM node ids that must stay graph nodes: via nodes and the ends of via ways."""
    out: set[int] = set()
    for r in restrictions:
        if r.problem is not None:
            continue
        if r.via_node is not None:
            out.add(r.via_node)
        for w in r.via_ways:
            if w in way_ends:
                out.update(way_ends[w])
    return out


@dataclass
class RestrictionReport:
    """Counts for ``meta["restrictions"]``: read, applied, dropped by reason and by kind."""

    relations: int = 0
    read: int = 0
    applied: int = 0
    dropped: Counter[str] = field(default_factory=Counter)
    by_kind: dict[str, Counter[str]] = field(default_factory=dict)

    def count(self, kind: str, outcome: str) -> None:
        self.by_kind.setdefault(kind, Counter())[outcome] += 1

    def to_meta(self) -> dict[str, Any]:
        return {
            "relations": self.relations,
            "read": self.read,
            "applied": self.applied,
            "dropped": {k: self.dropped[k] for k in DROP_REASONS if self.dropped[k]},
            "by_kind": {
                kind: {
                    "read": c["applied"] + c["dropped"],
                    "applied": c["applied"],
                    "dropped": c["dropped"],
                }
                for kind, c in sorted(self.by_kind.items())
            },
        }


@dataclass
class MappedRestrictions:
    """Restrictions as edge sequences in the compiled edge order, and the report."""

    kinds: list[str]  # restriction kind of each sequence
    sequences: list[list[int]]
    report: RestrictionReport

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(turn_indptr, turn_edges, turn_kind)`` for :func:`planner.graph.build_graph`."""
        indptr = np.zeros(len(self.sequences) + 1, dtype=np.int64)
        np.cumsum([len(s) for s in self.sequences], out=indptr[1:])
        edges = np.array([e for s in self.sequences for e in s], dtype=np.int64)
        kind = np.array(
            [TURN_ONLY if k.startswith("only_") else TURN_NO for k in self.kinds], dtype=np.int8
        )
        return indptr, edges, kind

    def remap(self, edge_map: np.ndarray) -> MappedRestrictions:
        """After dropping edges (``edge_map``: new index or -1): keep the sequences whose
        edges all survive; the others count as ``outside_kept_component``."""
        kinds: list[str] = []
        seqs: list[list[int]] = []
        report = self.report
        for kind, seq in zip(self.kinds, self.sequences, strict=True):
            new = [int(edge_map[e]) for e in seq]
            if min(new) < 0:
                report.applied -= 1
                report.dropped["outside_kept_component"] += 1
                c = report.by_kind[kind]
                c["applied"] -= 1
                c["dropped"] += 1
                continue
            kinds.append(kind)
            seqs.append(new)
        return MappedRestrictions(kinds, seqs, report)


def map_restrictions(
    restrictions: Sequence[Restriction],
    *,
    relations: int,
    node_osm_id: np.ndarray,
    tail: np.ndarray,
    head: np.ndarray,
    way_indptr: np.ndarray,
    way_id: np.ndarray,
    way_ends: dict[int, tuple[int, int]],
    way_status: dict[int, str],
    nodes_in_file: set[int],
) -> MappedRestrictions:
    """Map parsed restrictions onto compiled edges (see the module docstring).

    Parameters
    ----------
    restrictions : sequence of Restriction
        From :func:`parse_restriction` (entries with a ``problem`` are counted as dropped).
    relations : int
        Number of restriction relations read (for the report).
    node_osm_id : int64[n]
        OSM id of every compiled node.
    tail, head : int[m]
        Compiled edges (node indices).
    way_indptr, way_id : int64[m + 1], int64[w]
        OSM ways along each edge, in travel order.
    way_ends : dict
        ``way id -> (first node id, last node id)`` of (at least) every via way.
    way_status : dict
        ``way id -> "ok" | "not_drivable"`` for the member ways read from the file (with a
        ``highway`` tag); a member way not in it is missing.
    nodes_in_file : set of int
        Via node ids found in the file.
    """
    report = RestrictionReport(relations=relations)
    if not restrictions:
        return MappedRestrictions([], [], report)
    graph = _EdgeIndex(node_osm_id, tail, head, way_indptr, way_id)
    kinds: list[str] = []
    seqs: list[list[int]] = []
    for r in restrictions:
        report.read += 1
        if r.problem is not None:
            outcome: str | list[int] = r.problem
        else:
            outcome = _map_one(r, graph, way_ends, way_status, nodes_in_file)
        if isinstance(outcome, str):
            report.dropped[outcome] += 1
            report.count(r.kind, "dropped")
            continue
        report.applied += 1
        report.count(r.kind, "applied")
        kinds.append(r.kind)
        seqs.append(outcome)
    return MappedRestrictions(kinds, seqs, report)


class _EdgeIndex:
    """Edges entering / leaving each node, and each edge's first and last way."""

    def __init__(
        self,
        node_osm_id: np.ndarray,
        tail: np.ndarray,
        head: np.ndarray,
        way_indptr: np.ndarray,
        way_id: np.ndarray,
    ) -> None:
        n = int(node_osm_id.shape[0])
        self.tail = np.asarray(tail, dtype=np.int64)
        self.head = np.asarray(head, dtype=np.int64)
        self.by_id = np.argsort(node_osm_id, kind="stable")
        self.sorted_ids = np.asarray(node_osm_id, dtype=np.int64)[self.by_id]
        self.out_order = np.argsort(self.tail, kind="stable")
        self.out_ptr = np.concatenate([[0], np.cumsum(np.bincount(self.tail, minlength=n))])
        self.in_order = np.argsort(self.head, kind="stable")
        self.in_ptr = np.concatenate([[0], np.cumsum(np.bincount(self.head, minlength=n))])
        self.way_indptr = np.asarray(way_indptr, dtype=np.int64)
        self.way_id = np.asarray(way_id, dtype=np.int64)
        has = np.diff(self.way_indptr) > 0
        m = self.tail.shape[0]
        self.first_way = np.full(m, -1, dtype=np.int64)
        self.last_way = np.full(m, -1, dtype=np.int64)
        self.first_way[has] = self.way_id[self.way_indptr[:-1][has]]
        self.last_way[has] = self.way_id[self.way_indptr[1:][has] - 1]

    def node(self, osm_id: int) -> int:
        """Compiled index of an OSM node, or -1."""
        i = int(np.searchsorted(self.sorted_ids, osm_id))
        if i < self.sorted_ids.shape[0] and int(self.sorted_ids[i]) == osm_id:
            return int(self.by_id[i])
        return -1

    def entering(self, v: int, last_way: int) -> list[int]:
        edges = self.in_order[self.in_ptr[v] : self.in_ptr[v + 1]]
        return [int(e) for e in edges if self.last_way[e] == last_way]

    def leaving(self, v: int, first_way: int) -> list[int]:
        edges = self.out_order[self.out_ptr[v] : self.out_ptr[v + 1]]
        return [int(e) for e in edges if self.first_way[e] == first_way]

    def along(self, v: int, way: int, not_to: int) -> list[int]:
        """Edges leaving ``v`` that run along ``way`` only and do not lead to ``not_to``."""
        edges = self.out_order[self.out_ptr[v] : self.out_ptr[v + 1]]
        out = []
        for e in edges:
            lo, hi = int(self.way_indptr[e]), int(self.way_indptr[e + 1])
            if hi - lo == 1 and int(self.way_id[lo]) == way and int(self.head[e]) != not_to:
                out.append(int(e))
        return out


def _map_one(
    r: Restriction,
    g: _EdgeIndex,
    way_ends: dict[int, tuple[int, int]],
    way_status: dict[int, str],
    nodes_in_file: set[int],
) -> str | list[int]:
    """Edge sequence of one restriction, or the reason it cannot be mapped."""
    ways = (r.from_way, *r.via_ways, r.to_way)
    if any(w not in way_status for w in ways) or (
        r.via_node is not None and r.via_node not in nodes_in_file
    ):
        return "member_missing"
    if any(way_status[w] != "ok" for w in ways):
        return "not_drivable"
    if r.via_node is not None:
        v = g.node(r.via_node)
        if v < 0:
            return "not_drivable"
        return _pick([g.entering(v, r.from_way)], [g.leaving(v, r.to_way)])
    # via ways: find the junction chain J1 .. Jk through the ends of the via ways
    if any(w not in way_ends for w in r.via_ways):
        return "member_missing"
    chains = []
    for via in {r.via_ways, r.via_ways[::-1]}:
        for j1 in set(way_ends[via[0]]):
            chain = [j1]
            for w in via:
                a, b = way_ends[w]
                if chain[-1] == a:
                    chain.append(b)
                elif chain[-1] == b:
                    chain.append(a)
                else:
                    break
            else:
                nodes = [g.node(j) for j in chain]
                if (
                    min(nodes) >= 0
                    and g.entering(nodes[0], r.from_way)
                    and g.leaving(nodes[-1], r.to_way)
                ):
                    chains.append((via, nodes))
    if not chains:
        return "not_connected"
    if len(chains) > 1:
        return "ambiguous"
    via, nodes = chains[0]
    middle: list[int] = []
    for w, start, end in zip(via, nodes[:-1], nodes[1:], strict=True):
        x, prev, steps = start, -1, 0
        while x != end:
            step = g.along(x, w, prev)
            if len(step) != 1 or steps > g.tail.shape[0]:
                return "not_connected" if not step else "ambiguous"
            middle.append(step[0])
            prev, x = x, int(g.head[step[0]])
            steps += 1
    picked = _pick([g.entering(nodes[0], r.from_way)], [g.leaving(nodes[-1], r.to_way)])
    if isinstance(picked, str):
        return picked
    return [picked[0], *middle, picked[1]]


def _pick(froms: list[list[int]], tos: list[list[int]]) -> str | list[int]:
    """The one from-edge and the one to-edge, or why there is not exactly one of each."""
    f, t = froms[0], tos[0]
    if not f or not t:
        return "not_connected"
    if len(f) > 1 or len(t) > 1:
        return "ambiguous"
    return [f[0], t[0]]
