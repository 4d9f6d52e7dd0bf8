"""Generate the fictional demo region as OpenStreetMap data.

The region (names, positions, river, motorway, speed tagging) is described in
``demo_data/region.toml``; this module turns it into roads, deterministically from a seed:
the same scenario, size and seed always give byte-identical OSM XML.

How the road network is made
----------------------------
1. **Districts.** Seed points are scattered with a density that is high in the towns and low in
   the countryside (dart throwing: no two seeds closer than about their local spacing). Their
   Voronoi cells are the districts; the cell edges ("ridges") become the distributor roads in
   town and the winding country lanes outside. Cells whose seed lies west of the coast line are
   sea, so the coast is the outline of the sea cells.
2. **Streets.** Every town and village cell is filled with a street grid of its own
   orientation and block size, clipped to the cell; grid streets end on the cell edge, where
   a junction node is inserted into the ridge way. Random segments are removed (irregular
   blocks, dead ends), short cul-de-sacs branch into blocks, central grids get one-way streets.
3. **River.** A meandering line from the hills to the harbour. Every road segment that crosses
   it is cut (the road ends at the bank), except a few ridges kept as bridges (and the
   motorway), which get a short ``bridge=yes`` way over the water.
4. **Arterials.** Routes between places (scenario ``[[routes]]`` plus radials out of each town)
   follow the ridge network by shortest path, so they wind and use the bridges; their ridges
   are upgraded to primary / secondary / tertiary.
5. **Motorway.** A dual carriageway (two one-way ways) joining the towns without touching the
   local roads, with diamond interchanges (``motorway_link`` ramps) to the nearest ridge
   junction.

Everything is computed in a local plane in kilometres (x east, y north) and converted to
WGS84 degrees at the origin given in the scenario.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any
from xml.sax.saxutils import quoteattr

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import EARTH_RADIUS_M

#: Bump whenever the generator or ``region.toml`` changes what is generated: it keys the
#: build cache (``demo_data.build``), so stale cached graphs are rebuilt.
GENERATOR_VERSION = "3"

#: Sizes defined in the scenario file, smallest first.
SIZES = ("tiny", "demo", "large")

SCENARIO_PATH = Path(__file__).with_name("region.toml")

#: Kilometres per degree of latitude on the sphere osmnx measures lengths on.
KM_PER_DEG = EARTH_RADIUS_M * math.pi / 180.0 / 1000.0

_MIN_GAP_KM = 0.02  # two junctions on one road closer than this are merged into one
_MARGIN_KM = 0.015  # grid junctions keep this distance from the cell edge
_BRIDGE_HALF_KM = 0.03  # half length of a bridge way
_WIGGLE_STEP_KM = 0.12  # spacing of shape points on winding country lanes
_MOTORWAY_STEP_KM = 0.15  # spacing of shape points along the motorway
_CARRIAGEWAY_OFFSET_KM = 0.014  # each carriageway's distance from the motorway centre line

_NAME_HEADS = (
    "Ash", "Bram", "Cal", "Dun", "Elder", "Fen", "Gor", "Hal", "Ivy", "Kel", "Lark", "Mar",
    "Nor", "Oak", "Pel", "Quen", "Ros", "Sal", "Tam", "Ul", "Ver", "Wil", "Yar", "Brack",
    "Cor", "Dray", "Fal", "Hark", "Lin", "Mor", "Pen", "Sten", "Thorn", "Wex", "Brin", "Cass",
)  # fmt: skip
_NAME_TAILS = (
    "ford", "well", "by", "ton", "mere", "wick", "den", "field", "ley", "hurst", "stow",
    "gate", "croft", "holt", "side", "brook", "combe", "moor", "dale", "wood", "fold",
)  # fmt: skip
_STREET_KINDS = ("Street", "Road", "Lane", "Way", "Row", "Terrace", "Avenue", "Walk", "Place")
_CLOSE_KINDS = ("Close", "Court", "Mews", "End", "Gardens")
_LANE_KINDS = ("Lane", "Lane", "Road", "Drove", "Hollow")

# Road classes from least to most important (used when arterial routes overlap).
_RANK = {"unclassified": 0, "tertiary": 1, "secondary": 2, "primary": 3}

# Cell kinds.
_SEA, _RURAL, _VILLAGE, _TOWN = 0, 1, 2, 3


@dataclass
class Way:
    """One OSM way: node indices (into the region's node arrays) and its tags."""

    nodes: list[int]
    tags: dict[str, str]
    #: may cross the river (a bridge is made there); other ways are cut at the river
    can_bridge: bool = False


@dataclass
class Place:
    name: str
    kind: str  # OSM place=* value: "town" or "village"
    x_km: float
    y_km: float
    radius_km: float


@dataclass
class RegionMap:
    """A generated region, ready to be written as OSM XML or compiled directly.

    Attributes
    ----------
    x_km, y_km : float64[n]
        Node positions in the local plane (km east / north of the origin).
    lat, lon : float64[n]
        The same positions in WGS84 degrees (what the XML holds, rounded to 1e-7 degree).
    ways : list of Way
        Roads only; the river and coastline are written as extra ways by :func:`write_osm`.
    river_km : float64[k, 2]
        River centre line (x, y) in km, source to mouth.
    sea_km : list of float64[j, 2]
        Outlines of the sea (polygons, x, y in km).
    """

    name: str
    size: str
    seed: int
    scale: float
    origin_lat: float
    origin_lon: float
    x_km: np.ndarray
    y_km: np.ndarray
    ways: list[Way]
    places: list[Place]
    river_name: str
    river_km: np.ndarray
    sea_km: list[np.ndarray]
    width_km: float
    height_km: float
    stats: dict[str, Any] = field(default_factory=dict)

    @property
    def n_nodes(self) -> int:
        return int(self.x_km.shape[0])

    @property
    def lat(self) -> np.ndarray:
        return np.round(self.origin_lat + self.y_km / KM_PER_DEG, 7)

    @property
    def lon(self) -> np.ndarray:
        return np.round(self.origin_lon + self.x_km / self._km_per_deg_lon, 7)

    @property
    def _km_per_deg_lon(self) -> float:
        return KM_PER_DEG * math.cos(math.radians(self.origin_lat))

    def to_latlon(self, xy_km: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(lat, lon) degrees of local points ``xy_km : float[k, 2]``."""
        xy = np.asarray(xy_km, dtype=np.float64)
        return (
            np.round(self.origin_lat + xy[:, 1] / KM_PER_DEG, 7),
            np.round(self.origin_lon + xy[:, 0] / self._km_per_deg_lon, 7),
        )

    def place(self, name: str) -> Place:
        for p in self.places:
            if p.name == name:
                return p
        raise InvalidRequest(f"no place named {name!r}; places: {[p.name for p in self.places]}")


# --------------------------------------------------------------------------------------------
# Scenario


def load_scenario(path: str | Path | None = None) -> dict[str, Any]:
    """Read the scenario TOML (default: ``demo_data/region.toml``)."""
    p = Path(path) if path is not None else SCENARIO_PATH
    with open(p, "rb") as fh:
        return tomllib.load(fh)


def check_size(size: str, scenario: dict[str, Any] | None = None) -> str:
    sizes = (scenario or load_scenario())["sizes"]
    if size not in sizes:
        raise InvalidRequest(f"unknown demo size {size!r}; allowed: {', '.join(sizes)}")
    return size


def default_seed(scenario: dict[str, Any] | None = None) -> int:
    return int((scenario or load_scenario())["region"]["seed"])


# --------------------------------------------------------------------------------------------
# Small helpers


class _Net:
    """Growing node and way lists; ``alias`` merges nodes found to be the same junction."""

    def __init__(self) -> None:
        self.x: list[float] = []
        self.y: list[float] = []
        self.ways: list[Way] = []
        self.alias: dict[int, int] = {}

    def node(self, x: float, y: float) -> int:
        self.x.append(float(x))
        self.y.append(float(y))
        return len(self.x) - 1

    def nodes(self, xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
        start = len(self.x)
        self.x.extend(np.asarray(xs, dtype=np.float64).tolist())
        self.y.extend(np.asarray(ys, dtype=np.float64).tolist())
        return np.arange(start, len(self.x), dtype=np.int64)

    def way(self, nodes: list[int], tags: dict[str, str], can_bridge: bool = False) -> None:
        if len(nodes) >= 2:
            self.ways.append(Way(list(nodes), dict(tags), can_bridge))

    def xy(self, i: int) -> tuple[float, float]:
        return self.x[i], self.y[i]


class _Names:
    """Invented street names, deterministic from the generator's random stream."""

    def __init__(self, rng: np.random.Generator) -> None:
        self.rng = rng

    def stem(self) -> str:
        r = self.rng
        return str(_NAME_HEADS[r.integers(len(_NAME_HEADS))]) + str(
            _NAME_TAILS[r.integers(len(_NAME_TAILS))]
        )

    def street(self) -> str:
        return f"{self.stem()} {_STREET_KINDS[self.rng.integers(len(_STREET_KINDS))]}"

    def close(self) -> str:
        return f"{self.stem()} {_CLOSE_KINDS[self.rng.integers(len(_CLOSE_KINDS))]}"

    def lane(self) -> str:
        return f"{self.stem()} {_LANE_KINDS[self.rng.integers(len(_LANE_KINDS))]}"


def _maxspeed_picker(scenario: dict[str, Any], rng: np.random.Generator) -> Any:
    table = {
        cls: ([str(v) for v, _ in rows], np.array([float(w) for _, w in rows]))
        for cls, rows in scenario["maxspeed"].items()
    }

    def pick(cls: str, tags: dict[str, str]) -> dict[str, str]:
        if cls in table:
            values, weights = table[cls]
            v = values[int(rng.choice(len(values), p=weights / weights.sum()))]
            if v:
                tags["maxspeed"] = v
        return tags

    return pick


def _catmull_rom(points: np.ndarray, step_km: float) -> np.ndarray:
    """Smooth curve through ``points : float[k, 2]`` sampled about every ``step_km``."""
    p = np.vstack([2 * points[0] - points[1], points, 2 * points[-1] - points[-2]])
    out = [points[:1]]
    for i in range(1, len(p) - 2):
        p0, p1, p2, p3 = p[i - 1], p[i], p[i + 1], p[i + 2]
        n = max(2, int(math.ceil(np.linalg.norm(p2 - p1) / step_km)))
        t = np.linspace(0.0, 1.0, n + 1)[1:, None]
        seg = 0.5 * (
            2 * p1
            + (-p0 + p2) * t
            + (2 * p0 - 5 * p1 + 4 * p2 - p3) * t**2
            + (-p0 + 3 * p1 - 3 * p2 + p3) * t**3
        )
        out.append(seg)
    return np.vstack(out)


def _seg_cross(a: np.ndarray, b: np.ndarray, c: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Parameter along a->b where segments a-b and c-d properly cross, else nan (broadcast)."""
    r = b - a
    s = d - c
    den = r[..., 0] * s[..., 1] - r[..., 1] * s[..., 0]
    qp = c - a
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (qp[..., 0] * s[..., 1] - qp[..., 1] * s[..., 0]) / den
        u = (qp[..., 0] * r[..., 1] - qp[..., 1] * r[..., 0]) / den
    ok = (den != 0) & (t >= 0) & (t <= 1) & (u >= 0) & (u <= 1)
    return np.where(ok, t, np.nan)


class _River:
    """The river polyline with a bucket index for fast segment-crossing tests."""

    def __init__(self, line: np.ndarray, bucket_km: float = 0.5) -> None:
        self.line = line
        self.bucket = bucket_km
        self.index: dict[tuple[int, int], list[int]] = {}
        for k in range(len(line) - 1):
            lo = np.minimum(line[k], line[k + 1]) // bucket_km
            hi = np.maximum(line[k], line[k + 1]) // bucket_km
            for bx in range(int(lo[0]), int(hi[0]) + 1):
                for by in range(int(lo[1]), int(hi[1]) + 1):
                    self.index.setdefault((bx, by), []).append(k)

    def crossings(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """For segments ``a[i] -> b[i]`` (float[m, 2]): parameter of the first crossing or nan."""
        out = np.full(len(a), np.nan)
        if len(a) == 0:
            return out
        lo = np.minimum(a, b) // self.bucket
        hi = np.maximum(a, b) // self.bucket
        cand: dict[int, set[int]] = {}
        # Most segments are short (one bucket): look those up directly.
        for i in np.nonzero((lo[:, 0] == hi[:, 0]) & (lo[:, 1] == hi[:, 1]))[0]:
            hits = self.index.get((int(lo[i, 0]), int(lo[i, 1])))
            if hits:
                cand[int(i)] = set(hits)
        for i in np.nonzero((lo[:, 0] != hi[:, 0]) | (lo[:, 1] != hi[:, 1]))[0]:
            near: set[int] = set()
            for bx in range(int(lo[i, 0]), int(hi[i, 0]) + 1):
                for by in range(int(lo[i, 1]), int(hi[i, 1]) + 1):
                    near.update(self.index.get((bx, by), ()))
            if near:
                cand[int(i)] = near
        if not cand:
            return out
        seg_i = np.array([i for i, ks in cand.items() for _ in ks], dtype=np.int64)
        riv_k = np.array([k for ks in cand.values() for k in sorted(ks)], dtype=np.int64)
        t = _seg_cross(a[seg_i], b[seg_i], self.line[riv_k], self.line[riv_k + 1])
        hit = ~np.isnan(t)
        # first crossing per segment (smallest t)
        order = np.lexsort((t[hit], seg_i[hit]))
        si, ti = seg_i[hit][order], t[hit][order]
        first = np.ones(len(si), dtype=bool)
        first[1:] = si[1:] != si[:-1]
        out[si[first]] = ti[first]
        return out


# --------------------------------------------------------------------------------------------
# The generator


def generate(
    size: str = "demo",
    *,
    seed: int | None = None,
    scenario: dict[str, Any] | None = None,
) -> RegionMap:
    """Generate the demo region at ``size`` (see ``[sizes]`` in the scenario).

    Parameters
    ----------
    size : str
        ``tiny``, ``demo`` or ``large`` (or any size the scenario defines).
    seed : int, optional
        Random seed; defaults to the scenario's ``region.seed``. Same seed, same output.
    scenario : dict, optional
        A parsed scenario (default: ``demo_data/region.toml``).
    """
    sc = scenario if scenario is not None else load_scenario()
    check_size(size, sc)
    seed = default_seed(sc) if seed is None else int(seed)
    if seed < 0:
        raise InvalidRequest(f"seed must be a non-negative integer, got {seed}")
    return _Generator(sc, size, seed).run()


class _Generator:
    def __init__(self, sc: dict[str, Any], size: str, seed: int) -> None:
        self.sc = sc
        self.size = size
        self.seed = seed
        self.scale = float(sc["sizes"][size]["scale"])
        # Independent streams per stage, so a change in one stage leaves the others alone.
        streams = np.random.SeedSequence([seed, SIZES.index(size) if size in SIZES else 99])
        (
            self.rng_seeds,
            self.rng_cells,
            self.rng_roads,
            self.rng_names,
            self.rng_speed,
        ) = (np.random.default_rng(s) for s in streams.spawn(5))
        self.names = _Names(self.rng_names)
        self.pick_speed = _maxspeed_picker(sc, self.rng_speed)
        s = self.scale
        reg = sc["region"]
        self.W = float(reg["width_km"]) * s
        self.H = float(reg["height_km"]) * s
        # small sizes shrink the built-up areas a little more, to keep some countryside
        f = float(sc["sizes"][size].get("place_radius_factor", 1.0))
        min_village = float(sc["cells"].get("min_village_radius_km", 0.0))
        self.towns = [
            dict(t, x=t["x_km"] * s, y=t["y_km"] * s, r=t["radius_km"] * s * f) for t in sc["towns"]
        ]
        self.villages = [
            dict(v, x=v["x_km"] * s, y=v["y_km"] * s, r=max(v["radius_km"] * s * f, min_village))
            for v in sc["villages"]
        ]
        self.hills = [
            dict(h, x=h["x_km"] * s, y=h["y_km"] * s, r=h["radius_km"] * s) for h in sc["hills"]
        ]
        self.net = _Net()
        self.stats: dict[str, Any] = {}

    # -- geography ---------------------------------------------------------------------------

    def coast_x(self, y: np.ndarray) -> np.ndarray:
        c, s = self.sc["coast"], self.scale
        bay = (
            c["bay_depth_km"]
            * s
            * np.exp(-(((y - c["bay_y_km"] * s) / (c["bay_width_km"] * s)) ** 2))
        )
        return (
            c["base_km"] * s
            + c["amplitude_km"] * s * np.sin(2 * np.pi * y / (c["wavelength_km"] * s))
            + bay
        )

    def in_hills(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        out = np.zeros(np.shape(x), dtype=bool)
        for h in self.hills:
            out |= np.hypot(x - h["x"], y - h["y"]) < h["r"]
        return out

    def spacing(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Target distance between district seeds (km) at each point."""
        c = self.sc["cells"]
        sp = np.where(self.in_hills(x, y), c["hill_km"], c["rural_km"]).astype(np.float64)
        for v in self.villages:
            d = np.hypot(x - v["x"], y - v["y"]) / v["r"]
            sp = np.where(d < 1.0, np.minimum(sp, c["village_km"]), sp)
            sp = np.where((d >= 1.0) & (d < 2.0), np.minimum(sp, c["village_km"] * 1.8), sp)
        for t in self.towns:
            d = np.hypot(x - t["x"], y - t["y"]) / t["r"]
            town = c["town_centre_km"] + (c["town_edge_km"] - c["town_centre_km"]) * d
            sp = np.where(d < 1.0, np.minimum(sp, town), sp)
        return sp

    # -- pipeline ---------------------------------------------------------------------------

    def run(self) -> RegionMap:
        self.make_seeds()
        self.make_cells()
        self.make_river()
        self.make_ridges()
        self.pick_bridges()
        self.route_arterials()
        self.fill_cells()
        self.emit_ridges()
        self.add_farm_spurs()
        self.add_motorway()
        x, y, ways = self.finish()
        places = [Place(t["name"], "town", t["x"], t["y"], t["r"]) for t in self.towns] + [
            Place(v["name"], "village", v["x"], v["y"], v["r"]) for v in self.villages
        ]
        reg = self.sc["region"]
        return RegionMap(
            name=f"{reg['name']} ({self.size})",
            size=self.size,
            seed=self.seed,
            scale=self.scale,
            origin_lat=float(reg["origin_lat"]),
            origin_lon=float(reg["origin_lon"]),
            x_km=x,
            y_km=y,
            ways=ways,
            places=places,
            river_name=str(self.sc["river"]["name"]),
            river_km=self.river.line,
            sea_km=self.sea_outlines(),
            width_km=self.W,
            height_km=self.H,
            stats=self.stats,
        )

    def make_seeds(self) -> None:
        """District seeds by dart throwing with a position-dependent minimum distance."""
        rng = self.rng_seeds
        step = 0.2
        gx = np.arange(step / 2, self.W, step)
        gy = np.arange(step / 2, self.H, step)
        cx, cy = np.meshgrid(gx, gy)
        cx = (cx + rng.uniform(-0.45, 0.45, cx.shape) * step).ravel()
        cy = (cy + rng.uniform(-0.45, 0.45, cy.shape) * step).ravel()
        sp = self.spacing(cx, cy)
        # thin the candidates to about three per final seed before the (Python) dart loop
        keep = rng.random(cx.shape) < np.minimum(1.0, 3.0 * (step / sp) ** 2)
        cx, cy, sp = cx[keep], cy[keep], sp[keep]
        order = rng.permutation(len(cx))
        bucket = 0.4
        grid: dict[tuple[int, int], list[int]] = {}
        acc_x: list[float] = []
        acc_y: list[float] = []
        for i in order:
            x, y, r = cx[i], cy[i], 0.8 * sp[i]
            bx, by = int(x // bucket), int(y // bucket)
            reach = int(math.ceil(r / bucket))
            ok = True
            r2 = r * r
            for ix in range(bx - reach, bx + reach + 1):
                for iy in range(by - reach, by + reach + 1):
                    for j in grid.get((ix, iy), ()):
                        if (acc_x[j] - x) ** 2 + (acc_y[j] - y) ** 2 < r2:
                            ok = False
                            break
                    if not ok:
                        break
                if not ok:
                    break
            if ok:
                grid.setdefault((bx, by), []).append(len(acc_x))
                acc_x.append(float(x))
                acc_y.append(float(y))
        self.seeds = np.column_stack([acc_x, acc_y])

    def make_cells(self) -> None:
        """Voronoi cells bounded by the region box (mirror trick); classify each cell."""
        from scipy.spatial import Voronoi

        pts = self.seeds
        n = len(pts)
        mirrors = [
            np.column_stack([-pts[:, 0], pts[:, 1]]),
            np.column_stack([2 * self.W - pts[:, 0], pts[:, 1]]),
            np.column_stack([pts[:, 0], -pts[:, 1]]),
            np.column_stack([pts[:, 0], 2 * self.H - pts[:, 1]]),
        ]
        vor = Voronoi(np.vstack([pts, *mirrors]))
        self.vor_vertices = vor.vertices
        self.n_cells = n
        x, y = pts[:, 0], pts[:, 1]
        kind = np.full(n, _RURAL, dtype=np.int8)
        town_of = np.full(n, -1, dtype=np.int64)
        town_d = np.full(n, 9.0)
        for k, v in enumerate(self.villages):
            d = np.hypot(x - v["x"], y - v["y"]) / v["r"]
            sel = d < 1.0
            kind[sel] = _VILLAGE
            town_of[sel] = k
            town_d[sel] = d[sel]
        for k, t in enumerate(self.towns):
            d = np.hypot(x - t["x"], y - t["y"]) / t["r"]
            sel = d < 1.0
            kind[sel] = _TOWN
            town_of[sel] = k
            town_d[sel] = d[sel]
        kind[x < self.coast_x(y)] = _SEA
        self.cell_kind, self.cell_town, self.cell_d = kind, town_of, town_d
        self.cell_hill = self.in_hills(x, y)
        # cell polygons as vertex index lists, counter-clockwise
        self.cell_poly: list[np.ndarray] = []
        for i in range(n):
            region = [v for v in vor.regions[vor.point_region[i]] if v >= 0]
            verts = np.array(region, dtype=np.int64)
            ang = np.arctan2(vor.vertices[verts, 1] - pts[i, 1], vor.vertices[verts, 0] - pts[i, 0])
            self.cell_poly.append(verts[np.argsort(ang)])
        # ridges between two original cells, or an original cell and its mirror (region edge)
        rp = vor.ridge_points
        rv = np.array(vor.ridge_vertices, dtype=np.int64)
        keep = (rp.min(axis=1) < n) & (rv.min(axis=1) >= 0)
        self.ridge_pts = rp[keep]
        self.ridge_verts = rv[keep]
        self.ridge_of_edge = {
            (int(min(a, b)), int(max(a, b))): r for r, (a, b) in enumerate(self.ridge_verts)
        }

    def make_river(self) -> None:
        r = self.sc["river"]
        pts = np.array(r["points_km"], dtype=np.float64) * self.scale
        line = _catmull_rom(pts, 0.1)
        # meanders: a smooth sideways offset that vanishes at both ends
        seg = np.linalg.norm(np.diff(line, axis=0), axis=1)
        s = np.concatenate([[0.0], np.cumsum(seg)])
        tangent = np.gradient(line, axis=0)
        tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
        normal = np.column_stack([-tangent[:, 1], tangent[:, 0]])
        amp = float(r["meander_km"]) * min(1.0, self.scale * 3)
        phase = self.rng_roads.uniform(0, 2 * np.pi, 3)
        wl = np.array([2.1, 3.3, 5.9]) * max(self.scale, 0.25)
        off = sum(np.sin(2 * np.pi * s / w + p) for w, p in zip(wl, phase, strict=True))
        off = amp * off / 3.0 * np.clip(np.sin(np.pi * s / s[-1]), 0.0, 1.0) ** 0.3
        self.river = _River(line + normal * off[:, None])

    def make_ridges(self) -> None:
        """Geometry and class of every district edge that becomes a road."""
        rng = self.rng_roads
        n = self.n_cells
        V = self.vor_vertices
        kinds = self.cell_kind
        # vertices closer than _MIN_GAP_KM are one junction
        self.vertex_alias = np.arange(len(V))
        ridges = []
        for r, (p, q) in enumerate(self.ridge_pts):
            kp = kinds[p] if p < n else -1
            kq = kinds[q] if q < n else -1
            if kp == -1 or kq == -1:
                continue  # region edge: roads run off the map there, as in a cut extract
            if kp == _SEA and kq == _SEA:
                continue
            ridges.append(r)
        self.road_ridges = np.array(ridges, dtype=np.int64)
        self.ridge_geom: dict[int, np.ndarray] = {}
        self.ridge_class: dict[int, str] = {}
        self.ridge_name: dict[int, str | None] = {}
        self.ridge_wiggly: dict[int, bool] = {}
        for r in self.road_ridges:
            p, q = self.ridge_pts[r]
            a, b = self.ridge_verts[r]
            A, B = V[a], V[b]
            kp, kq = kinds[p], kinds[q]
            built = max(kp, kq) >= _VILLAGE
            length = float(np.hypot(*(B - A)))
            if length < _MIN_GAP_KM:
                lo, hi = min(a, b), max(a, b)
                self.vertex_alias[hi] = self.vertex_alias[lo]
            wiggly = not built and length > 2 * _WIGGLE_STEP_KM
            if wiggly:
                hilly = bool(self.cell_hill[p] or self.cell_hill[q])
                k = int(length / _WIGGLE_STEP_KM)
                t = np.linspace(0.0, 1.0, k + 1)
                amp = length * (0.07 if hilly else 0.035) * rng.uniform(0.5, 1.5)
                f = rng.choice([1.0, 1.5, 2.0, 2.5] if hilly else [1.0, 1.5])
                ph = rng.uniform(0, 2 * np.pi)
                off = amp * np.sin(np.pi * t) * np.sin(2 * np.pi * f * t + ph) * 1.3
                d = (B - A) / length
                nrm = np.array([-d[1], d[0]])
                geom = A + np.outer(t, B - A) + np.outer(off, nrm)
            else:
                geom = np.vstack([A, B])
            self.ridge_geom[int(r)] = geom
            self.ridge_wiggly[int(r)] = wiggly
            if kp == _SEA or kq == _SEA:
                self.ridge_class[int(r)] = "tertiary" if built else "unclassified"
                self.ridge_name[int(r)] = "Shore Road"
            elif built:
                self.ridge_class[int(r)] = "tertiary"
                self.ridge_name[int(r)] = None  # named after routing (street names)
            else:
                self.ridge_class[int(r)] = "unclassified"
                self.ridge_name[int(r)] = None
        # fix up chained aliases
        va = self.vertex_alias
        while True:
            nxt = va[va]
            if np.array_equal(nxt, va):
                break
            va = nxt
        self.vertex_alias = va
        # river crossings of the ridge polylines
        self.ridge_cross: dict[int, tuple[int, float]] = {}
        segs_a, segs_b, owner, segno = [], [], [], []
        for r, g in self.ridge_geom.items():
            segs_a.append(g[:-1])
            segs_b.append(g[1:])
            owner += [r] * (len(g) - 1)
            segno += list(range(len(g) - 1))
        t = self.river.crossings(np.vstack(segs_a), np.vstack(segs_b))
        for i in np.nonzero(~np.isnan(t))[0]:
            r = owner[i]
            if r not in self.ridge_cross:
                self.ridge_cross[r] = (segno[i], float(t[i]))

    def pick_bridges(self) -> None:
        """The ridge crossing nearest to each bridge site stays, as a straight bridge road."""
        self.bridge_ridges: dict[int, np.ndarray] = {}  # ridge -> crossing point (km)
        V = self.vor_vertices
        candidates = []
        for r in self.ridge_cross:
            a, b = self.ridge_verts[r]
            t = self.river.crossings(V[a][None], V[b][None])[0]
            if not np.isnan(t):
                candidates.append((r, V[a] + t * (V[b] - V[a])))
        if not candidates:
            return
        pts = np.array([c[1] for c in candidates])
        for site in np.array(self.sc["river"]["bridges_km"], dtype=np.float64) * self.scale:
            d = np.hypot(*(pts - site).T)
            for k in np.argsort(d):
                r = candidates[k][0]
                if r not in self.bridge_ridges:
                    self.bridge_ridges[r] = candidates[k][1]
                    a, b = self.ridge_verts[r]
                    self.ridge_geom[r] = np.vstack([V[a], V[b]])
                    self.ridge_wiggly[r] = False
                    break
        self.stats["bridges"] = len(self.bridge_ridges)

    def _vertex_graph(self) -> Any:
        """scipy CSR graph over Voronoi vertices of the ridges a car can drive along."""
        from scipy.sparse import coo_matrix

        va = self.vertex_alias
        rows, cols, w = [], [], []
        for r in self.road_ridges:
            r = int(r)
            if r in self.ridge_cross and r not in self.bridge_ridges:
                continue
            a, b = va[self.ridge_verts[r]]
            if a == b:
                continue
            g = self.ridge_geom[r]
            length = float(np.sum(np.linalg.norm(np.diff(g, axis=0), axis=1)))
            rows += [a, b]
            cols += [b, a]
            w += [length, length]
        nv = len(self.vor_vertices)
        return coo_matrix((w, (rows, cols)), shape=(nv, nv)).tocsr()

    def route_arterials(self) -> None:
        from scipy.sparse.csgraph import connected_components, dijkstra

        G = self._vertex_graph()
        self.vgraph = G
        used = np.asarray(G.getnnz(axis=1) > 0).ravel()
        _, labels = connected_components(G, directed=False)
        sizes = np.bincount(labels[used]) if used.any() else np.array([0])
        main = int(np.argmax(sizes))
        self.routable = used & (labels == main)
        V = self.vor_vertices
        vidx = np.nonzero(self.routable)[0]
        self.routable_idx = vidx

        def nearest_vertex(p: np.ndarray) -> int:
            d = np.hypot(V[vidx, 0] - p[0], V[vidx, 1] - p[1])
            return int(vidx[int(np.argmin(d))])

        edge_ridge: dict[tuple[int, int], int] = {}
        va = self.vertex_alias
        for r in self.road_ridges:
            a, b = (int(x) for x in va[self.ridge_verts[int(r)]])
            edge_ridge[(a, b)] = int(r)
            edge_ridge[(b, a)] = int(r)
        places = {p["name"]: p for p in self.towns + self.villages}
        routes = [
            (rt["from"], rt["to"], rt["class"], rt["name"]) for rt in self.sc.get("routes", [])
        ]
        jobs: list[tuple[np.ndarray, np.ndarray, str, str]] = []
        for a, b, cls, name in routes:
            pa, pb = places[a], places[b]
            jobs.append((np.array([pa["x"], pa["y"]]), np.array([pb["x"], pb["y"]]), cls, name))
        for t in self.towns:  # radial roads out of each town
            c = np.array([t["x"], t["y"]])
            for k in range(8):
                ang = 2 * np.pi * k / 8 + 0.3
                end = c + 0.95 * t["r"] * np.array([np.cos(ang), np.sin(ang)])
                if end[0] < float(self.coast_x(np.array([end[1]]))[0]) + 0.3:
                    continue
                jobs.append((c, end, "secondary", f"{t['name']} {self.names.stem()} Road"))
        self.place_vertex = {
            name: nearest_vertex(np.array([p["x"], p["y"]])) for name, p in places.items()
        }
        for start, end, cls, name in jobs:
            s, e = nearest_vertex(start), nearest_vertex(end)
            if s == e:
                continue
            _, pred = dijkstra(G, indices=s, return_predecessors=True)
            if pred[e] < 0:
                continue
            node = e
            while node != s:
                prev = int(pred[node])
                r = edge_ridge.get((prev, node))
                if r is not None and _RANK[cls] > _RANK.get(self.ridge_class[r], 0):
                    self.ridge_class[r] = cls
                    self.ridge_name[r] = name
                node = prev

    # -- streets ----------------------------------------------------------------------------

    def fill_cells(self) -> None:
        rng = self.rng_cells
        self.ridge_inserts: dict[int, list[tuple[float, int]]] = {}
        park_share = float(self.sc["cells"]["park_share"])
        V = self.vor_vertices
        for i in range(self.n_cells):
            kind = self.cell_kind[i]
            if kind not in (_TOWN, _VILLAGE):
                continue
            # draw all per-cell randomness first so the stream does not depend on geometry
            u = rng.random(8)
            if kind == _TOWN and u[0] < park_share:
                continue
            poly = V[self.cell_poly[i]]
            seed = self.seeds[i]
            d = float(self.cell_d[i])
            if kind == _TOWN:
                t = self.towns[self.cell_town[i]]
                radial = math.atan2(seed[1] - t["y"], seed[0] - t["x"])
                theta = radial + rng.normal(0, 0.15) if u[1] < 0.6 else u[2] * np.pi
                grow = 1.0 + float(t["block_growth"]) * d
                sx = t["block_m"][0] / 1000 * grow * (0.9 + 0.25 * u[3])
                sy = t["block_m"][1] / 1000 * grow * (0.9 + 0.25 * u[4])
                oneway = float(t["oneway_share"]) if d < 0.35 else 0.0
                p_remove = 0.04 + 0.07 * d
                p_cul = 0.02 + 0.10 * d
                p_living = 0.12 if d < 0.15 else 0.0
            else:
                theta = u[2] * np.pi
                sx = 0.085 * (0.9 + 0.3 * u[3])
                sy = 0.14 * (0.9 + 0.3 * u[4])
                oneway = 0.0
                p_remove = 0.10
                p_cul = 0.10
                p_living = 0.03
            self.fill_cell(i, poly, theta, sx, sy, u[5], u[6], oneway, p_remove, p_cul, p_living)

    def fill_cell(
        self,
        cell: int,
        poly: np.ndarray,
        theta: float,
        sx: float,
        sy: float,
        off_u: float,
        off_v: float,
        oneway_share: float,
        p_remove: float,
        p_cul: float,
        p_living: float,
    ) -> None:
        """Clip a rotated street grid to one convex cell and add its streets."""
        rng = self.rng_cells
        net = self.net
        c, s = math.cos(theta), math.sin(theta)
        pu = poly[:, 0] * c + poly[:, 1] * s
        pv = -poly[:, 0] * s + poly[:, 1] * c
        verts = self.cell_poly[cell]
        K = len(poly)
        u1, v1 = pu, pv
        u2, v2 = np.roll(pu, -1), np.roll(pv, -1)
        # lines of family A: u = const (streets running along v)
        ua = np.arange(math.floor(pu.min() / sx) + off_u, pu.max() / sx, 1.0) * sx
        vb = np.arange(math.floor(pv.min() / sy) + off_v, pv.max() / sy, 1.0) * sy
        ua = ua[(ua > pu.min()) & (ua < pu.max())]
        vb = vb[(vb > pv.min()) & (vb < pv.max())]
        if len(ua) == 0 and len(vb) == 0:
            return

        def clip(cv: np.ndarray, a1: np.ndarray, a2: np.ndarray, b1: np.ndarray, b2: np.ndarray):
            with np.errstate(divide="ignore", invalid="ignore"):
                t = (cv[:, None] - a1[None, :]) / (a2 - a1)[None, :]
            ok = (t >= 0) & (t < 1)
            val = np.where(ok, b1[None, :] + t * (b2 - b1)[None, :], np.nan)
            good = ok.sum(axis=1) >= 2
            lo = np.where(good, np.nanmin(np.where(ok, val, np.inf), axis=1), np.nan)
            hi = np.where(good, np.nanmax(np.where(ok, val, -np.inf), axis=1), np.nan)
            klo = np.argmin(np.where(ok, val, np.inf), axis=1)
            khi = np.argmax(np.where(ok, val, -np.inf), axis=1)
            return lo, hi, klo, khi

        alo, ahi, aklo, akhi = clip(ua, u1, u2, v1, v2)
        blo, bhi, bklo, bkhi = clip(vb, v1, v2, u1, u2)
        m = _MARGIN_KM
        with np.errstate(invalid="ignore"):
            exists = (
                (vb[None, :] >= alo[:, None] + m)
                & (vb[None, :] <= ahi[:, None] - m)
                & (ua[:, None] >= blo[None, :] + m)
                & (ua[:, None] <= bhi[None, :] - m)
            )
        ii, jj = np.nonzero(exists)
        jit = rng.normal(0.0, 0.005, (len(ii), 2))
        lu = ua[ii] + jit[:, 0]
        lv = vb[jj] + jit[:, 1]
        lattice = np.full(exists.shape, -1, dtype=np.int64)
        if len(ii):
            lattice[ii, jj] = net.nodes(lu * c - lv * s, lu * s + lv * c)

        def to_xy(uu: float, vv: float) -> tuple[float, float]:
            return uu * c - vv * s, uu * s + vv * c

        def endpoint(uu: float, vv: float, k: int) -> int:
            """A node on polygon edge k, registered as a junction on that edge's ridge."""
            x, y = to_xy(uu, vv)
            node = net.node(x, y)
            a, b = int(verts[k]), int(verts[(k + 1) % K])
            r = self.ridge_of_edge.get((min(a, b), max(a, b)))
            if r is not None:
                A, B = (
                    self.vor_vertices[self.ridge_verts[r][0]],
                    self.vor_vertices[self.ridge_verts[r][1]],
                )
                AB = B - A
                tt = float(np.dot(np.array([x, y]) - A, AB) / max(np.dot(AB, AB), 1e-12))
                self.ridge_inserts.setdefault(r, []).append((tt, node))
            return node

        def inside(x: float, y: float, margin: float) -> bool:
            ex = np.roll(poly[:, 0], -1) - poly[:, 0]
            ey = np.roll(poly[:, 1], -1) - poly[:, 1]
            cross = ex * (y - poly[:, 1]) - ey * (x - poly[:, 0])
            return bool(np.all(cross >= margin * np.hypot(ex, ey)))

        # family A then family B: (line coordinate, interval, lattice column/row, spacing)
        families = [
            (ua, alo, ahi, aklo, akhi, lattice, sx, False),
            (vb, blo, bhi, bklo, bkhi, lattice.T, sy, True),
        ]
        for cv, lo, hi, klo, khi, lat_nodes, across, is_b in families:
            for li in range(len(cv)):
                if np.isnan(lo[li]) or hi[li] - lo[li] < 0.04:
                    continue
                draws = rng.random(4)
                nodes_l = lat_nodes[li][lat_nodes[li] >= 0].tolist()
                pos = (
                    [vb[j] for j in np.nonzero(lat_nodes[li] >= 0)[0]]
                    if not is_b
                    else [ua[j] for j in np.nonzero(lat_nodes[li] >= 0)[0]]
                )
                seq: list[int] = []
                # start point on the cell edge
                if not pos or pos[0] - lo[li] > _MIN_GAP_KM:
                    uu, vv = (cv[li], lo[li]) if not is_b else (lo[li], cv[li])
                    seq.append(endpoint(uu, vv, int(klo[li])))
                seq += nodes_l
                if not pos or hi[li] - pos[-1] > _MIN_GAP_KM:
                    uu, vv = (cv[li], hi[li]) if not is_b else (hi[li], cv[li])
                    seq.append(endpoint(uu, vv, int(khi[li])))
                if len(seq) < 2:
                    continue
                living = draws[0] < p_living
                cls = "living_street" if living else "residential"
                tags = {"highway": cls, "name": self.names.street()}
                self.pick_speed(cls, tags)
                if draws[1] < oneway_share:
                    tags["oneway"] = "yes"
                    if li % 2 == 1:
                        seq.reverse()
                    if draws[2] < 0.15:  # same direction written the other way round
                        seq.reverse()
                        tags["oneway"] = "-1"
                # segments: remove some, branch cul-de-sacs off others
                keep = rng.random(len(seq) - 1) >= p_remove
                culs = rng.random(len(seq) - 1) < p_cul
                side = rng.choice([-1.0, 1.0], len(seq) - 1)
                frac = rng.uniform(0.3, 0.42, len(seq) - 1)
                run: list[int] = [seq[0]]
                for k in range(len(seq) - 1):
                    if not keep[k]:
                        net.way(run, tags)
                        run = [seq[k + 1]]
                        continue
                    if culs[k] and 0 < k < len(seq) - 2 and "oneway" not in tags:
                        (xa, ya), (xb, yb) = net.xy(seq[k]), net.xy(seq[k + 1])
                        mx, my = (xa + xb) / 2, (ya + yb) / 2
                        # perpendicular to the street, into the block
                        dx, dy = (c, s) if not is_b else (-s, c)
                        if not is_b:  # family A runs along v; its blocks lie along u
                            dx, dy = c, s
                        else:
                            dx, dy = -s, c
                        length = frac[k] * across
                        ex, ey = mx + side[k] * dx * length, my + side[k] * dy * length
                        if inside(ex, ey, _MARGIN_KM):
                            mid = net.node(mx, my)
                            end = net.node(ex, ey)
                            run.append(mid)
                            ctags = {"highway": "residential", "name": self.names.close()}
                            net.way([mid, end], self.pick_speed("residential", ctags))
                    run.append(seq[k + 1])
                net.way(run, tags)

    def emit_ridges(self) -> None:
        """Turn ridges into ways, with the grid junctions inserted along them."""
        net = self.net
        V = self.vor_vertices
        va = self.vertex_alias
        self.vertex_node: dict[int, int] = {}
        self.ridge_interior: dict[int, list[int]] = {}

        def vnode(v: int) -> int:
            v = int(va[v])
            if v not in self.vertex_node:
                self.vertex_node[v] = net.node(*V[v])
            return self.vertex_node[v]

        self.vnode = vnode
        for r in self.road_ridges:
            r = int(r)
            a, b = self.ridge_verts[r]
            geom = self.ridge_geom[r]
            na, nb = vnode(a), vnode(b)
            if na == nb:
                continue
            length = float(np.hypot(*(V[b] - V[a])))
            inserts = sorted(self.ridge_inserts.get(r, []))
            bridge_t = None
            if r in self.bridge_ridges:
                cp = self.bridge_ridges[r]
                bridge_t = float(np.hypot(*(cp - V[a]))) / max(length, 1e-9)
            seq = [na]
            last_t = 0.0
            interior: list[int] = []
            if self.ridge_wiggly[r]:
                interior = net.nodes(geom[1:-1, 0], geom[1:-1, 1]).tolist()
                seq += interior
            else:
                for t, node in inserts:
                    if t * length < _MIN_GAP_KM:
                        net.alias[node] = na
                        continue
                    if (1 - t) * length < _MIN_GAP_KM:
                        net.alias[node] = nb
                        continue
                    if bridge_t is not None and abs(t - bridge_t) * length < 2 * _BRIDGE_HALF_KM:
                        continue  # no junction on a bridge: that street ends at the bank
                    if (t - last_t) * length < _MIN_GAP_KM and len(seq) > 1:
                        net.alias[node] = seq[-1]
                        continue
                    seq.append(node)
                    last_t = t
            seq.append(nb)
            cls = self.ridge_class[r]
            name = self.ridge_name[r]
            tags: dict[str, str] = {"highway": cls}
            if name is None:
                if cls == "unclassified":
                    name = self.names.lane() if self.rng_roads.random() < 0.6 else None
                else:
                    name = self.names.street().replace(" Walk", " Road")
            if name:
                tags["name"] = name
            if cls == "unclassified" and self.cell_hill[min(self.ridge_pts[r])]:
                # hill lanes: slower limits where tagged
                if self.rng_speed.random() < 0.4:
                    tags["maxspeed"] = str(self.rng_speed.choice(["40", "50", "30 mph"]))
            else:
                self.pick_speed(cls, tags)
            net.way(seq, tags, can_bridge=r in self.bridge_ridges)
            self.ridge_interior[r] = interior

    def add_farm_spurs(self) -> None:
        """Dead-end farm lanes (and a few tracks) branching off the country lanes."""
        rng = self.rng_roads
        net = self.net
        by_cell: dict[int, list[int]] = {}
        for r, interior in self.ridge_interior.items():
            if interior:
                for p in self.ridge_pts[r]:
                    if p < self.n_cells and self.cell_kind[p] == _RURAL:
                        by_cell.setdefault(int(p), []).append(r)
        spurs = 0
        for cell in sorted(by_cell):
            ridges = by_cell[cell]
            for _ in range(int(rng.poisson(1.3))):
                r = ridges[int(rng.integers(len(ridges)))]
                interior = self.ridge_interior[r]
                node = interior[int(rng.integers(len(interior)))]
                x, y = net.xy(node)
                sx, sy = self.seeds[cell]
                dist = math.hypot(sx - x, sy - y)
                if dist < 0.1:
                    continue
                length = min(0.5, dist * rng.uniform(0.2, 0.5))
                dx, dy = (sx - x) / dist, (sy - y) / dist
                bend = rng.normal(0, 0.25)
                mx = x + dx * length * 0.5 - dy * length * bend * 0.3
                my = y + dy * length * 0.5 + dx * length * bend * 0.3
                ex = x + (dx * np.cos(bend) - dy * np.sin(bend)) * length
                ey = y + (dy * np.cos(bend) + dx * np.sin(bend)) * length
                u = rng.random()
                if u < 0.8:
                    tags = {"highway": "unclassified", "name": f"{self.names.stem()} Farm"}
                elif u < 0.95:
                    tags = {"highway": "track"}
                else:
                    tags = {"highway": "service", "service": "driveway"}
                net.way([node, net.node(mx, my), net.node(ex, ey)], tags)
                spurs += 1
        self.stats["farm_spurs"] = spurs

    def add_motorway(self) -> None:
        """Dual carriageway between the towns with diamond interchanges."""
        mw = self.sc.get("motorway")
        if not mw:
            return
        net = self.net
        rng = self.rng_roads
        pts = np.array(mw["points_km"], dtype=np.float64) * self.scale
        centre = _catmull_rom(pts, _MOTORWAY_STEP_KM)
        seg = np.linalg.norm(np.diff(centre, axis=0), axis=1)
        s = np.concatenate([[0.0], np.cumsum(seg)])
        total = float(s[-1])
        tangent = np.gradient(centre, axis=0)
        tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
        left = np.column_stack([-tangent[:, 1], tangent[:, 0]])
        fwd_xy = centre - left * _CARRIAGEWAY_OFFSET_KM  # drive on the right
        bwd_xy = centre + left * _CARRIAGEWAY_OFFSET_KM
        fwd = net.nodes(fwd_xy[:, 0], fwd_xy[:, 1]).tolist()
        bwd = net.nodes(bwd_xy[:, 0], bwd_xy[:, 1]).tolist()  # indexed like centre
        V = self.vor_vertices
        vidx = self.routable_idx

        def nearest_vertex(p: np.ndarray, min_km: float) -> int | None:
            d = np.hypot(V[vidx, 0] - p[0], V[vidx, 1] - p[1])
            d = np.where(d < min_km, np.inf, d)
            k = int(np.argmin(d))
            return int(vidx[k]) if np.isfinite(d[k]) else None

        def ramp(a: int, b: int) -> list[int]:
            (xa, ya), (xb, yb) = net.xy(a), net.xy(b)
            bend = rng.normal(0, 0.08)
            mx = (xa + xb) / 2 - (yb - ya) * bend
            my = (ya + yb) / 2 + (xb - xa) * bend
            return [a, net.node(mx, my), b]

        def ramp_crosses_river(path: list[int]) -> bool:
            xy = np.array([net.xy(k) for k in path])
            return bool(np.any(~np.isnan(self.river.crossings(xy[:-1], xy[1:]))))

        ramps: list[list[int]] = []
        cuts = {0, len(centre) - 1}
        # ends: the carriageways start from and end at a local junction
        for end_i, into in ((0, True), (len(centre) - 1, False)):
            v = nearest_vertex(centre[end_i], 0.05)
            if v is None:
                continue
            vn = self.vnode(v)
            # the backward carriageway runs from bwd[-1] (far end) to bwd[0] (start)
            if into:
                ramps += [ramp(vn, fwd[0]), ramp(bwd[0], vn)]
            else:
                ramps += [ramp(fwd[-1], vn), ramp(vn, bwd[-1])]
        half = min(0.35, 0.06 * total)
        junctions = 0
        for f in mw.get("junctions", []):
            sj = float(f) * total
            j = int(np.searchsorted(s, sj))
            jm = int(np.searchsorted(s, sj - half))
            jp = int(np.searchsorted(s, sj + half))
            if jm <= 0 or jp >= len(centre) - 1:
                continue
            v = nearest_vertex(centre[j], 0.15)
            if v is None:
                continue
            vn = self.vnode(v)
            these = [
                ramp(fwd[jm], vn),  # off, forward direction
                ramp(vn, fwd[jp]),  # on
                ramp(bwd[jp], vn),  # off, backward direction
                ramp(vn, bwd[jm]),  # on
            ]
            if any(ramp_crosses_river(p) for p in these):
                continue
            ramps += these
            cuts |= {jm, jp}
            junctions += 1
        self.stats["motorway_junctions"] = junctions
        self.stats["motorway_km"] = total
        base = {"highway": "motorway", "oneway": "yes", "ref": str(mw["ref"])}
        base["name"] = str(mw["name"])
        cut_list = sorted(cuts)
        for a, b in zip(cut_list[:-1], cut_list[1:], strict=True):
            tags = self.pick_speed("motorway", dict(base, lanes="2"))
            net.way(fwd[a : b + 1], tags, can_bridge=True)
            net.way(bwd[a : b + 1][::-1], dict(tags), can_bridge=True)
        for path in ramps:
            tags = {"highway": "motorway_link", "oneway": "yes"}
            net.way(path, self.pick_speed("motorway_link", tags))

    # -- final pass -------------------------------------------------------------------------

    def finish(self) -> tuple[np.ndarray, np.ndarray, list[Way]]:
        """Cut roads at the river (bridges excepted), merge aliases, drop unused nodes."""
        net = self.net
        alias = net.alias

        def resolve(n: int) -> int:
            while n in alias:
                n = alias[n]
            return n

        x = np.array(net.x)
        y = np.array(net.y)
        ways: list[Way] = []
        for w in net.ways:
            seq: list[int] = []
            for n in w.nodes:
                n = resolve(n)
                if not seq or seq[-1] != n:
                    seq.append(n)
            if len(seq) >= 2:
                ways.append(Way(seq, w.tags, w.can_bridge))
        # river crossings of every segment, all at once
        lens = np.array([len(w.nodes) - 1 for w in ways])
        flat = np.concatenate([np.array(w.nodes, dtype=np.int64) for w in ways])
        starts = np.concatenate([[0], np.cumsum(lens + 1)[:-1]])
        seg_a = np.concatenate([np.arange(s0, s0 + k) for s0, k in zip(starts, lens, strict=True)])
        pa = np.column_stack([x[flat[seg_a]], y[flat[seg_a]]])
        pb = np.column_stack([x[flat[seg_a + 1]], y[flat[seg_a + 1]]])
        t = self.river.crossings(pa, pb)
        way_of_seg = np.repeat(np.arange(len(ways)), lens)
        seg_in_way = seg_a - np.repeat(starts, lens)
        crossing: dict[int, list[tuple[int, float]]] = {}
        for i in np.nonzero(~np.isnan(t))[0]:
            crossing.setdefault(int(way_of_seg[i]), []).append((int(seg_in_way[i]), float(t[i])))
        xs, ys = list(x), list(y)
        out: list[Way] = []
        cut = bridged = 0
        for wi, w in enumerate(ways):
            if wi not in crossing:
                out.append(w)
                continue
            pieces: list[Way] = []
            run = [w.nodes[0]]
            for k in range(len(w.nodes) - 1):
                hit = next((tt for sk, tt in crossing[wi] if sk == k), None)
                a, b = w.nodes[k], w.nodes[k + 1]
                if hit is None:
                    run.append(b)
                    continue
                if not w.can_bridge:
                    pieces.append(Way(run, w.tags))
                    run = [b]
                    cut += 1
                    continue
                # a bridge: short way over the water between two new nodes
                ax, ay, bx, by = xs[a], ys[a], xs[b], ys[b]
                L = math.hypot(bx - ax, by - ay)
                h = min(_BRIDGE_HALF_KM / max(L, 1e-9), hit, 1 - hit, 0.45) * 0.999
                t0, t1 = hit - h, hit + h
                n0, n1 = len(xs), len(xs) + 1
                xs += [ax + t0 * (bx - ax), ax + t1 * (bx - ax)]
                ys += [ay + t0 * (by - ay), ay + t1 * (by - ay)]
                run.append(n0)
                pieces.append(Way(run, w.tags))
                pieces.append(Way([n0, n1], dict(w.tags, bridge="yes", layer="1")))
                run = [n1, b]
                bridged += 1
            pieces.append(Way(run, w.tags))
            out += [p for p in pieces if len(p.nodes) >= 2]
        self.stats["river_cuts"] = cut
        self.stats["bridge_ways"] = bridged
        # keep referenced nodes only, numbered in order of first use
        x, y = np.array(xs), np.array(ys)
        flat = np.concatenate([np.array(w.nodes, dtype=np.int64) for w in out])
        _, first = np.unique(flat, return_index=True)
        used = flat[np.sort(first)]
        new = np.full(len(x), -1, dtype=np.int64)
        new[used] = np.arange(len(used))
        for w in out:
            w.nodes = new[np.array(w.nodes, dtype=np.int64)].tolist()
        return x[used], y[used], out

    def sea_outlines(self) -> list[np.ndarray]:
        import shapely

        V = self.vor_vertices
        polys = [
            shapely.Polygon(V[self.cell_poly[i]])
            for i in range(self.n_cells)
            if self.cell_kind[i] == _SEA
        ]
        if not polys:
            return []
        sea = shapely.union_all(polys)
        geoms = list(sea.geoms) if hasattr(sea, "geoms") else [sea]
        return [np.asarray(g.exterior.coords) for g in geoms if g.area > 0]


# --------------------------------------------------------------------------------------------
# OSM XML


def write_osm(region: RegionMap, out: str | Path | IO[bytes]) -> int:
    """Write ``region`` as OSM XML (API 0.6 layout); returns the number of bytes written.

    Road nodes get ids 1..n in node order, then the place nodes, river and coastline nodes.
    Coordinates are written with 7 decimals (OSM's precision), so the output is byte-identical
    for the same region.
    """
    lat, lon = region.lat, region.lon
    n = region.n_nodes
    lines = [
        "<?xml version='1.0' encoding='UTF-8'?>",
        '<osm version="0.6" generator="dueroute-demo">',
        f'  <bounds minlat="{lat.min():.7f}" minlon="{lon.min():.7f}" '
        f'maxlat="{lat.max():.7f}" maxlon="{lon.max():.7f}"/>',
    ]
    lines += [
        f'  <node id="{i + 1}" lat="{la:.7f}" lon="{lo:.7f}"/>'
        for i, (la, lo) in enumerate(zip(lat.tolist(), lon.tolist(), strict=True))
    ]
    next_id = n + 1
    for p in region.places:
        pla, plo = region.to_latlon(np.array([[p.x_km, p.y_km]]))
        lines.append(f'  <node id="{next_id}" lat="{pla[0]:.7f}" lon="{plo[0]:.7f}">')
        lines.append(f'    <tag k="name" v={quoteattr(p.name)}/>')
        lines.append(f'    <tag k="place" v="{p.kind}"/>')
        lines.append("  </node>")
        next_id += 1
    extra_ways: list[tuple[list[int], dict[str, str]]] = []
    for line, tags in [(region.river_km, {"waterway": "river", "name": region.river_name})] + [
        (ring, {"natural": "coastline"}) for ring in region.sea_km
    ]:
        la, lo = region.to_latlon(line)
        ids = list(range(next_id, next_id + len(la)))
        lines += [
            f'  <node id="{k}" lat="{a:.7f}" lon="{b:.7f}"/>'
            for k, a, b in zip(ids, la.tolist(), lo.tolist(), strict=True)
        ]
        next_id += len(la)
        extra_ways.append((ids, tags))
    wid = 1
    for w in region.ways:
        lines.append(f'  <way id="{wid}">')
        lines += [f'    <nd ref="{k + 1}"/>' for k in w.nodes]
        lines += [f"    <tag k={quoteattr(k)} v={quoteattr(v)}/>" for k, v in w.tags.items()]
        lines.append("  </way>")
        wid += 1
    for ids, tags in extra_ways:
        lines.append(f'  <way id="{wid}">')
        lines += [f'    <nd ref="{k}"/>' for k in ids]
        lines += [f"    <tag k={quoteattr(k)} v={quoteattr(v)}/>" for k, v in tags.items()]
        lines.append("  </way>")
        wid += 1
    lines.append("</osm>")
    data = ("\n".join(lines) + "\n").encode("utf-8")
    if isinstance(out, (str, Path)):
        Path(out).parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(str(out) + ".tmp")
        tmp.write_bytes(data)
        tmp.replace(out)
    else:
        out.write(data)
    return len(data)


def write_pbf(region: RegionMap, out: str | Path) -> int:
    """Write ``region`` as OSM PBF; returns the number of bytes written.

    The objects, ids, tags and coordinates are exactly those of :func:`write_osm`: libosmium
    converts that XML (held in memory) to PBF, without object metadata (versions,
    timestamps), so the same region always gives the same bytes.
    """
    import osmium

    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    lat, lon = region.lat, region.lon
    header = osmium.io.Header()
    header.set("generator", "dueroute-demo")
    header.add_box(
        osmium.osm.Box(float(lon.min()), float(lat.min()), float(lon.max()), float(lat.max()))
    )
    tmp = out.with_name(out.name + ".tmp")
    tmp.unlink(missing_ok=True)
    writer = osmium.SimpleWriter(osmium.io.File(str(tmp), "pbf,add_metadata=false"), header=header)
    try:
        osmium.apply(osmium.io.Reader(osmium.io.FileBuffer(osm_bytes(region), "osm")), writer)
    finally:
        writer.close()
    tmp.replace(out)
    return out.stat().st_size


def osm_bytes(region: RegionMap) -> bytes:
    import io

    buf = io.BytesIO()
    write_osm(region, buf)
    return buf.getvalue()
