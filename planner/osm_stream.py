"""Streaming import of OpenStreetMap PBF and XML with osmium, straight into compiled arrays.

No networkx graph is built: libosmium (through the ``osmium`` package) decodes the file and
filters it in C++, and writes what the import needs as OPL text (libosmium's one-object-per-
line format) to a scratch folder; numpy and pandas parse that text in bulk. Two passes:

1. **Ways and restrictions**: every way with a ``highway`` tag (other ways are skipped unread:
   they are not roads) and every ``type=restriction`` relation. Each way keeps its id, its
   node ids and the tags the rules read (:data:`planner.osm_rules.WAY_TAGS`); ways sharing
   those tags share one decision (drivable? one-way? speed?), so the rules run once per
   distinct tag combination, not once per way.
2. **Nodes**: the positions of the nodes the drivable ways use (and the restrictions' via
   nodes), selected in C++ by id.

Then :func:`planner.compile_ways.compile_ways` applies osmnx's rules (clipping at missing
nodes, one-way, endpoint rule, chain merging, speeds), restrictions are mapped onto the
edges (:mod:`planner.restrictions`), the ``components`` rule keeps the largest strongly
connected component (or all), and :func:`planner.graph.build_graph` numbers the nodes along
a Hilbert curve. The result equals the osmnx importer's (:func:`planner.osm_import.
import_map`) on the same file bit for bit (tests check it), with one exception: two parallel
edges (same two nodes) may come in the other order, where a way this importer drops (or never
reads, having no ``highway`` tag) touched those nodes first, since osmnx orders them by
networkx's adjacency, which remembers the dropped way.

Memory: the scratch OPL files are on disk (about 35 bytes per way node reference and per
node); the parse reads them in blocks of :data:`BLOCK_BYTES`.

Clipped extracts: a way that names nodes missing from the file is cut there and its usable
segments are kept; ``meta["clipped"]`` counts the missing nodes and the ways cut or lost.
"""

from __future__ import annotations

import contextlib
import io
import re
import tempfile
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.compile_ways import (
    CompiledWays,
    compile_ways,
    component_filter,
    unique_sorted,
)
from dueroute.planner.errors import GraphFileNotFound, InvalidRequest, NoDrivableRoads, NotAMapFile
from dueroute.planner.graph import RoadGraph
from dueroute.planner.map_files import (
    KIND_NAME,
    default_name,
    no_drivable_roads,
    sha256,
    sniff,
)
from dueroute.planner.osm_rules import (
    DEFAULT_ROAD_FILTER,
    DROP_REASONS,
    WAY_TAGS,
    RoadFilter,
    way_direction,
    way_drop_reason,
)
from dueroute.planner.restrictions import (
    MappedRestrictions,
    Restriction,
    junction_nodes,
    map_restrictions,
    parse_restriction,
)
from dueroute.planner.speeds import ROAD_CLASSES

#: Size of the blocks the scratch OPL files are parsed in.
BLOCK_BYTES = 1 << 25

#: The tags of :data:`WAY_TAGS` in an OPL tag list preceded by a comma.
_WAY_TAG_FIELDS = re.compile(rb",((?:" + b"|".join(k.encode() for k in WAY_TAGS) + rb")=[^,]*)")
_ESCAPE = re.compile(rb"%([0-9a-fA-F]+)%")
_NODE_TAGS = re.compile(rb" T\S* x")


def osmium_version() -> str:
    import osmium.version

    return str(osmium.version.pyosmium_release)


def _file(path: Path, kind: str, compression: str | None) -> Any:
    import osmium

    fmt = "pbf" if kind == "pbf" else "osm" + (f".{compression}" if compression else "")
    return osmium.io.File(str(path), fmt)


def _opl_writer(path: Path) -> Any:
    import osmium

    return osmium.SimpleWriter(osmium.io.File(str(path), "opl,add_metadata=false"))


def _apply(source: Path, kind: str, compression: str | None, entities: Any, *handlers: Any) -> None:
    """Run libosmium over ``source`` with ``handlers`` (the last one a writer), in C++."""
    import osmium

    writer = handlers[-1]
    try:
        osmium.apply(osmium.io.Reader(_file(source, kind, compression), entities), *handlers)
        writer.close()
    except (RuntimeError, ValueError, OSError) as exc:
        with contextlib.suppress(RuntimeError, OSError):
            writer.close()
        if isinstance(exc, OSError) or "write" in str(exc).lower():
            raise InvalidRequest(f"cannot write the importer's scratch files ({exc})") from exc
        raise NotAMapFile(f"{source}: cannot parse the {KIND_NAME[kind]} ({exc})") from exc


def _blocks(path: Path) -> Iterator[bytes]:
    """The file in blocks of about :data:`BLOCK_BYTES`, each ending at a line end."""
    rest = b""
    with open(path, "rb") as fh:
        while True:
            chunk = fh.read(BLOCK_BYTES)
            if not chunk:
                break
            chunk = rest + chunk
            cut = chunk.rfind(b"\n") + 1
            rest = chunk[cut:]
            if cut:
                yield chunk[:cut]
    if rest:
        yield rest


def _unescape(text: bytes) -> str:
    """An OPL-escaped string (``%20%`` is a space) as text."""
    if b"%" not in text:
        return text.decode("utf-8", errors="replace")
    return _ESCAPE.sub(lambda m: chr(int(m.group(1), 16)).encode(), text).decode(
        "utf-8", errors="replace"
    )


def _tag_dict(field: bytes) -> dict[str, str]:
    """``k=v,k=v`` (OPL tags without the leading ``T``) as a dict."""
    out = {}
    for kv in field.split(b",") if field else []:
        k, _, v = kv.partition(b"=")
        out[_unescape(k)] = _unescape(v)
    return out


def _contains(sorted_ids: np.ndarray, value: int) -> bool:
    i = int(np.searchsorted(sorted_ids, value))
    return i < sorted_ids.shape[0] and int(sorted_ids[i]) == value


def _ints(fields: list[bytes], drop: bytes, expected: int) -> np.ndarray:
    """Integers in ``fields`` (comma lists, ``drop`` characters removed) as int64."""
    if expected == 0:
        return np.zeros(0, dtype=np.int64)
    text = b",".join(fields).translate(None, drop)
    values = np.fromstring(text, dtype=np.int64, sep=",")  # text mode: not deprecated
    if values.shape[0] != expected:
        raise NotAMapFile(f"unexpected OPL output from osmium ({values.shape[0]} != {expected})")
    return values


@dataclass
class WaySource:
    """Pass 1: the file's ways with a ``highway`` tag and its restriction relations.

    ``way_id : int64[W]``, node ids ``way_ref[way_ptr[i]:way_ptr[i + 1]]`` of way ``i``, its
    tag combination ``way_combo : int32[W]`` (index into ``combos``, the distinct dicts of
    :data:`planner.osm_rules.WAY_TAGS`), ``restrictions`` as parsed and ``relations`` (count).
    """

    way_id: np.ndarray
    way_ptr: np.ndarray
    way_ref: np.ndarray
    way_combo: np.ndarray
    combos: list[dict[str, str]]
    restrictions: list[Restriction]
    relations: int

    def way_ends(self, ways: set[int]) -> dict[int, tuple[int, int]]:
        """``way id -> (first node id, last node id)`` for the ways in ``ways`` present."""
        if not ways:
            return {}
        wanted = np.isin(self.way_id, np.fromiter(ways, dtype=np.int64))
        out = {}
        for i in np.flatnonzero(wanted & (np.diff(self.way_ptr) > 0)).tolist():
            lo, hi = int(self.way_ptr[i]), int(self.way_ptr[i + 1])
            out[int(self.way_id[i])] = (int(self.way_ref[lo]), int(self.way_ref[hi - 1]))
        return out

    def member_ways(self) -> set[int]:
        out: set[int] = set()
        for r in self.restrictions:
            if r.problem is None:
                out.update((r.from_way, r.to_way, *r.via_ways))
        return out

    def way_status(self, ways: set[int], drop: np.ndarray) -> dict[int, str]:
        """``"ok"`` or ``"not_drivable"`` for the ways in ``ways`` read; absent = not read."""
        if not ways:
            return {}
        ids = np.fromiter(ways, dtype=np.int64)
        hit = np.flatnonzero(np.isin(self.way_id, ids))
        return {int(self.way_id[i]): ("not_drivable" if drop[i] else "ok") for i in hit.tolist()}


def read_ways(path: Path, kind: str, compression: str | None, scratch: Path) -> WaySource:
    """Pass 1 (see the module docstring): highway ways and restriction relations."""
    import osmium

    opl = scratch / "ways.opl"
    keys = osmium.filter.KeyFilter("highway")
    keys.enable_for(osmium.osm.WAY)
    restrictions = osmium.filter.TagFilter(("type", "restriction"))
    restrictions.enable_for(osmium.osm.RELATION)
    _apply(
        path,
        kind,
        compression,
        osmium.osm.WAY | osmium.osm.RELATION,
        keys,
        restrictions,
        _opl_writer(opl),
    )
    ids: list[bytes] = []
    refs: list[bytes] = []
    lengths: list[int] = []
    combo_of: list[int] = []
    combo_index: dict[tuple[bytes, ...], int] = {}
    relations: list[bytes] = []
    find_tags = _WAY_TAG_FIELDS.findall
    add_id, add_refs, add_len, add_combo = ids.append, refs.append, lengths.append, combo_of.append
    for block in _blocks(opl):
        for line in block.split(b"\n"):
            if line[:1] == b"w":
                # "w<id> T<k=v,...> N<n<id>,...>" (OPL with add_metadata=false)
                wid, tags, nodes = line.split(b" ")
                wanted = tuple(find_tags(b"," + tags[1:]))
                c = combo_index.get(wanted)
                if c is None:
                    c = combo_index[wanted] = len(combo_index)
                add_combo(c)
                add_id(wid)
                if len(nodes) > 1:
                    add_refs(nodes)
                    add_len(nodes.count(b",") + 1)
                else:
                    add_len(0)
            elif line[:1] == b"r":
                relations.append(line)
    way_ptr = np.zeros(len(ids) + 1, dtype=np.int64)
    np.cumsum(lengths, out=way_ptr[1:])
    combos = [_tag_dict(b",".join(key)) for key in combo_index]
    parsed: list[Restriction] = []
    for line in relations:
        rid, tags, members = line.split(b" ")
        member_list = []
        for m in members[1:].split(b",") if len(members) > 1 else []:
            ref, _, role = m[1:].partition(b"@")
            member_list.append((m[:1].decode(), int(ref), _unescape(role)))
        parsed += parse_restriction(int(rid[1:]), _tag_dict(tags[1:]), member_list)
    return WaySource(
        way_id=_ints(ids, b"w", len(ids)),
        way_ptr=way_ptr,
        way_ref=_ints(refs, b"Nn", int(way_ptr[-1])),
        way_combo=np.array(combo_of, dtype=np.int32),
        combos=combos,
        restrictions=parsed,
        relations=len(relations),
    )


def read_nodes(
    path: Path, kind: str, compression: str | None, ids: np.ndarray, scratch: Path
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pass 2: ``(node ids sorted, lat, lon)`` of the nodes in ``ids`` present in the file.

    Raises NotAMapFile for a node without a valid WGS84 position.
    """
    import osmium
    import pandas as pd

    opl = scratch / "nodes.opl"
    wanted = osmium.filter.IdFilter(ids.tolist())
    wanted.enable_for(osmium.osm.NODE)
    _apply(path, kind, compression, osmium.osm.NODE, wanted, _opl_writer(opl))
    parts = []
    for block in _blocks(opl):
        # "n<id> T<tags> x<lon> y<lat>": drop the tags (escaped, so without spaces), then the
        # letters, and read three numbers per line
        text = block.replace(b" T x", b" x")
        if b" T" in text:
            text = _NODE_TAGS.sub(b" x", text)
        table = pd.read_csv(
            io.BytesIO(text.translate(None, b"nxy")),
            sep=" ",
            header=None,
            names=["id", "lon", "lat"],
            dtype=np.float64,
            engine="c",
        )
        parts.append(table.to_numpy())
    values = np.concatenate(parts) if parts else np.zeros((0, 3))
    node_id = values[:, 0].astype(np.int64)
    lon, lat = values[:, 1], values[:, 2]
    bad = ~((np.abs(lat) <= 90.0) & (np.abs(lon) <= 180.0))  # NaN fails too
    if bad.any():
        raise NotAMapFile(
            f"{path}: {int(bad.sum())} road nodes have no valid position (e.g. node "
            f"{int(node_id[np.argmax(bad)])}); map nodes need WGS84 coordinates (OSM lat/lon)"
        )
    order = np.argsort(node_id, kind="stable")
    return node_id[order], lat[order], lon[order]


def count_objects(path: Path, kind: str, compression: str | None, scratch: Path) -> tuple[int, int]:
    """``(nodes, ways with at least two nodes)`` in the file (for the no-roads message)."""
    import osmium

    opl = scratch / "all.opl"
    _apply(path, kind, compression, osmium.osm.NODE | osmium.osm.WAY, _opl_writer(opl))
    nodes = ways = 0
    for block in _blocks(opl):
        for line in block.split(b"\n"):
            if line[:1] == b"n":
                nodes += 1
            elif line[:1] == b"w" and b"," in line[line.rfind(b" N") :]:
                ways += 1
    return nodes, ways


def _decide(src: WaySource, road_filter: RoadFilter) -> tuple[np.ndarray, dict[str, int]]:
    """Drop mask (bool[W]) of the ways read and the ways dropped per reason (the rules run
    once per distinct tag combination)."""
    reasons = [way_drop_reason(t, road_filter) for t in src.combos]
    combo_drop = np.array([r is not None for r in reasons] or [False], dtype=bool)
    drop = combo_drop[src.way_combo]
    with_segment = np.diff(src.way_ptr) >= 2
    counted = Counter(reasons[c] for c in src.way_combo[drop & with_segment].tolist())
    dropped = {f"ways_{r}": int(counted.get(r, 0)) for r in DROP_REASONS if r != "not_a_road"}
    return drop, dropped


class _DrivableWays:
    """The drivable ways of a :class:`WaySource`, as :func:`compile_ways` takes them."""

    def __init__(self, src: WaySource, drop: np.ndarray) -> None:
        keep = np.flatnonzero(~drop)
        n_refs = np.diff(src.way_ptr)
        self.refs = src.way_ref[np.repeat(~drop, n_refs)]
        self.way_ptr = np.zeros(keep.shape[0] + 1, dtype=np.int64)
        np.cumsum(n_refs[keep], out=self.way_ptr[1:])
        self.any_segment = bool(np.any(n_refs[keep] >= 2))
        self.way_id = src.way_id[keep]
        attr_index: dict[tuple[Any, Any], int] = {}
        combo_attr = np.zeros(len(src.combos), dtype=np.int32)
        combo_dir = np.zeros(len(src.combos), dtype=np.int8)
        for c, tags in enumerate(src.combos):
            key = (tags.get("highway"), tags.get("maxspeed"))
            combo_attr[c] = attr_index.setdefault(key, len(attr_index))
            combo_dir[c] = way_direction(tags)
        kept_combo = src.way_combo[keep]
        self.direction = combo_dir[kept_combo]
        self.attr = combo_attr[kept_combo]
        self.attrs = list(attr_index)

    def node_indices(self, node_id: np.ndarray) -> tuple[np.ndarray, int]:
        """Node lists as indices into ``node_id`` (sorted); a node missing from the file gets
        a negative number of its own (-1, -2, ...); and the number of distinct missing nodes."""
        pos = np.searchsorted(node_id, self.refs)
        found = np.zeros(self.refs.shape[0], dtype=bool)
        if node_id.shape[0]:
            found = node_id[np.minimum(pos, node_id.shape[0] - 1)] == self.refs
        missing = unique_sorted(self.refs[~found])
        code = -1 - np.searchsorted(missing, self.refs)
        return np.where(found, pos, code), int(missing.shape[0])


def keep_components(
    cw: CompiledWays, mapped: MappedRestrictions, components: str, path: Path
) -> tuple[CompiledWays, MappedRestrictions, dict[str, Any]]:
    """Apply the ``components`` rule to compiled edges and their restrictions.

    Raises NoDrivableRoads when the rule leaves no edge.
    """
    mask, report = component_filter(cw.n_nodes, cw.tail, cw.head, components)
    if not mask.all():
        cw, edge_map = cw.select(mask)
        mapped = mapped.remap(edge_map)
    if cw.n_edges == 0:
        raise NoDrivableRoads(
            f"{path}: the largest strongly connected component is a single node, so no route "
            f"stays inside it ({report['components']} components, none with a cycle, "
            "e.g. one-way roads only); import with --components all to keep every road"
        )
    return cw, mapped, report


def import_osm(
    path: str | Path,
    *,
    name: str | None = None,
    spatial_order: bool = True,
    components: str = "largest",
    road_filter: RoadFilter | None = None,
    work_dir: str | Path | None = None,
    on_step: Callable[[str], None] | None = None,
) -> RoadGraph:
    """Import an OSM PBF or XML file (see the module docstring) as a drivable graph.

    Parameters
    ----------
    path : str or Path
        ``.osm.pbf``, ``.osm`` / ``.xml`` (optionally ``.bz2`` / ``.gz``). The content decides
        the format.
    name : str, optional
        ``meta["name"]``; defaults to the file name without suffixes.
    spatial_order : bool
        Renumber nodes along a Hilbert curve (:func:`planner.graph.hilbert_order`).
    components : {"largest", "all"}
        Keep the largest strongly connected component (the others are reported in
        ``meta["components"]``), or every node.
    road_filter : RoadFilter, optional
        ``highway`` classes to keep (:func:`planner.osm_rules.parse_road_classes`).
    work_dir : str or Path, optional
        Where the scratch files go (default: the system's temporary folder).
    on_step : callable, optional
        Called with the name of each step as it starts (for a progress display).

    Raises
    ------
    GraphFileNotFound, NotAMapFile, NoDrivableRoads
        As :func:`planner.osm_import.import_map`; a GraphML file is refused (use the osmnx
        importer for it).
    """
    path = Path(path)
    if not path.is_file():
        raise GraphFileNotFound(
            f"map file not found: {path}" if not path.is_dir() else f"{path} is a directory"
        )
    if components not in ("largest", "all"):
        raise InvalidRequest(f"components must be 'largest' or 'all', got {components!r}")
    road_filter = road_filter or DEFAULT_ROAD_FILTER
    kind, compression = sniff(path)
    if kind == "graphml":
        raise NotAMapFile(
            f"{path}: GraphML is read by the osmnx importer, not the osmium one "
            "(dueroute graph import --importer osmnx)"
        )
    step = on_step or (lambda _: None)
    try:
        scratch_dir = tempfile.TemporaryDirectory(dir=work_dir, prefix="dueroute-import-")
    except OSError as exc:
        where = work_dir if work_dir is not None else tempfile.gettempdir()
        raise InvalidRequest(f"cannot create scratch files in {where}: {exc}") from exc
    with scratch_dir as tmp:
        scratch = Path(tmp)
        step("reading ways")
        src = read_ways(path, kind, compression, scratch)
        (scratch / "ways.opl").unlink()
        drop, dropped = _decide(src, road_filter)
        ways = _DrivableWays(src, drop)
        via_nodes = {r.via_node for r in src.restrictions if r.via_node is not None}
        wanted = unique_sorted(np.concatenate([ways.refs, np.fromiter(via_nodes, np.int64)]))
        step("reading nodes")
        node_id, lat, lon = read_nodes(path, kind, compression, wanted, scratch)
        del wanted
        if not ways.any_segment:
            nodes, n_ways = count_objects(path, kind, compression, scratch)
            raise no_drivable_roads(
                path,
                nodes,
                n_ways,
                dropped_ways={k.removeprefix("ways_"): v for k, v in dropped.items()},
                highways="|".join(sorted(road_filter.highways)),
            )
    step("compiling edges")
    member_ways = src.member_ways()
    way_ends = src.way_ends(member_ways)
    way_status = src.way_status(member_ways, drop)
    restrictions, relations = src.restrictions, src.relations
    read = {
        "highway_ways": int(src.way_id.shape[0]),
        "restriction_relations": relations,
        "nodes": int(node_id.shape[0]),
    }
    del src, drop
    must_stay = junction_nodes(restrictions, way_ends)
    way_node, missing = ways.node_indices(node_id)
    cw = compile_ways(
        node_lat=lat,
        node_lon=lon,
        node_osm_id=node_id,
        way_id=ways.way_id,
        way_ptr=ways.way_ptr,
        way_node=way_node,
        way_direction=ways.direction,
        way_attr=ways.attr,
        attrs=ways.attrs,
        keep_nodes=np.isin(node_id, np.fromiter(must_stay, dtype=np.int64)),
    )
    del ways, way_node, lat, lon
    counts = cw.counts
    for key in ("ways_single_node", "self_loops", "ring_segments"):
        dropped[key] = counts[key]
    if cw.n_edges == 0:
        why = (
            f"all {counts['self_loops']} drivable edges are self-loops"
            if counts["self_loops"]
            else "no drivable way keeps a segment between two nodes present in the file"
        )
        raise NoDrivableRoads(f"{path}: no edge connects two different places ({why})")

    step("mapping turn restrictions")
    mapped = map_restrictions(
        restrictions,
        relations=relations,
        node_osm_id=cw.osm_id,
        tail=cw.tail,
        head=cw.head,
        way_indptr=cw.way_indptr,
        way_id=cw.way_id,
        way_ends=way_ends,
        way_status=way_status,
        nodes_in_file={v for v in via_nodes if _contains(node_id, v)},
    )
    del node_id
    cw, mapped, comp_report = keep_components(cw, mapped, components, path)
    meta = {
        "name": name if name is not None else default_name(path),
        "source": str(path.resolve()),
        "source_sha256": sha256(path),
        "source_format": kind,
        "importer": f"osmium {osmium_version()} (dueroute streaming importer)",
        "file_ways": read["highway_ways"],
        "file_nodes": read["nodes"],
        "read": read,
        "dropped": dropped,
        "clipped": {
            "nodes_missing": missing,
            "ways_cut": counts["ways_cut"],
            "ways_clipped_away": counts["ways_clipped_away"],
            "segments_dropped": counts["segments_missing_nodes"],
        },
        "components": comp_report,
        "restrictions": mapped.report.to_meta(),
        "road_filter": road_filter.to_meta(),
        "road_classes": list(ROAD_CLASSES),
    }
    step("building graph")
    return cw.to_graph(meta=meta, spatial_order=spatial_order, turns=mapped.arrays())
