"""Fixtures shared by every test package.

``osm_dir``
    Folder of the real OpenStreetMap test extracts (``shared/data/osm`` beside the repository
    or beside one of its parent folders, as for a git worktree under ``../wt/``; or
    ``$DUEROUTE_TEST_OSM_DIR``); tests that take it are skipped when the folder is absent. The
    extracts are never copied into the repo.
``tiny_graph``
    A hand-made 10-node road graph (see :func:`make_tiny_graph`) with one-way streets, a
    parallel edge, interior geometry and three strongly connected components.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m
from dueroute.planner.speeds import ROAD_CLASSES, SPEED_SOURCE_DEFAULT

REPO_ROOT = Path(__file__).resolve().parents[1]


def _find_osm_dir() -> Path:
    if os.environ.get("DUEROUTE_TEST_OSM_DIR"):
        return Path(os.environ["DUEROUTE_TEST_OSM_DIR"])
    for parent in REPO_ROOT.parents:
        candidate = parent / "shared" / "data" / "osm"
        if candidate.is_dir():
            return candidate
    return REPO_ROOT.parent / "shared" / "data" / "osm"


OSM_DIR = _find_osm_dir()
OSM_EXTRACTS = ("west-oakland.osm.bz2", "aguascalientes.osm.bz2")


@pytest.fixture(scope="session")
def osm_dir() -> Path:
    """Folder holding the real OSM extracts; skips the test when it (or a file) is absent."""
    if not OSM_DIR.is_dir():
        pytest.skip(f"real OSM extracts not available (no folder {OSM_DIR})")
    missing = [name for name in OSM_EXTRACTS if not (OSM_DIR / name).is_file()]
    if missing:
        pytest.skip(f"real OSM extracts missing in {OSM_DIR}: {missing}")
    return OSM_DIR


#: Node positions of the tiny graph (lat, lon), a fictional spot; node index = row.
#: 0.01 degrees is about 1112 m north-south and 786 m east-west at latitude 45.
TINY_NODES = np.array(
    [
        (45.00, 7.00),  # 0
        (45.00, 7.01),  # 1
        (45.00, 7.02),  # 2
        (45.01, 7.02),  # 3
        (45.01, 7.01),  # 4
        (45.01, 7.00),  # 5
        (45.02, 7.00),  # 6
        (45.03, 7.03),  # 7
        (45.03, 7.04),  # 8
        (45.02, 7.01),  # 9
    ]
)

#: Roads of the tiny graph: (tail, head, class, two_way, interior points [(lat, lon), ...]).
TINY_ROADS: list[tuple[int, int, str, bool, list[tuple[float, float]]]] = [
    (0, 1, "primary", True, []),
    (1, 2, "primary", True, []),
    (2, 3, "primary", True, []),
    (0, 5, "residential", True, []),
    (5, 4, "residential", True, []),
    (4, 3, "residential", True, []),
    (1, 4, "residential", True, [(45.003, 7.012), (45.007, 7.012)]),  # a bent street
    (5, 6, "residential", False, []),  # one-way north
    (6, 0, "living_street", False, [(45.01, 6.995)]),  # one-way back south, bent
    (0, 1, "service", False, [(44.998, 7.005)]),  # parallel to the primary 0 -> 1, slower
    (6, 9, "residential", False, []),  # one-way into a dead end: 9 is its own component
    (7, 8, "tertiary", True, []),  # an island road: {7, 8} is its own component
]


def make_tiny_graph(spatial_order: bool = False) -> RoadGraph:
    """The hand-made graph; with ``spatial_order=False`` node indices are as in TINY_NODES.

    Hand-checked facts (tests may rely on them):

    * strongly connected components: {0, 1, 2, 3, 4, 5, 6}, {7, 8}, {9};
    * fastest 0 -> 3 is 0 -> 1 -> 2 -> 3 along the primary road: the residential route
      0 -> 5 -> 4 -> 3 has about the same length (one north-south and two east-west steps)
      at half the speed (30 vs 60 km/h);
    * 9 is reachable (from 0..6) but nothing leaves it; 7 and 8 are unreachable from 0;
    * the direct 0 -> 1 has two parallel edges (primary and a slower bent service road).

    Lengths are great-circle lengths along each edge's geometry, speeds the class default
    (``DEFAULT_SPEED_KPH``), so a great-circle heuristic is admissible on it.
    """
    from dueroute.planner.speeds import DEFAULT_SPEED_KPH

    tail: list[int] = []
    head: list[int] = []
    cls: list[str] = []
    interior: list[list[tuple[float, float]]] = []
    for t, h, c, two_way, pts in TINY_ROADS:
        directions = [(t, h, pts), (h, t, pts[::-1])] if two_way else [(t, h, pts)]
        for a, b, geometry in directions:
            tail.append(a)
            head.append(b)
            cls.append(c)
            interior.append(geometry)
    lat, lon = TINY_NODES[:, 0], TINY_NODES[:, 1]
    geom_ptr = [0]
    glat: list[float] = []
    glon: list[float] = []
    length = []
    for t, h, pts in zip(tail, head, interior, strict=True):
        glat += [p[0] for p in pts]
        glon += [p[1] for p in pts]
        geom_ptr.append(len(glat))
        ys = np.array([lat[t], *[p[0] for p in pts], lat[h]])
        xs = np.array([lon[t], *[p[1] for p in pts], lon[h]])
        length.append(float(np.sum(great_circle_m(ys[:-1], xs[:-1], ys[1:], xs[1:]))))
    m = len(tail)
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(100, 100 + len(lat), dtype=np.int64),
        tail=np.array(tail),
        head=np.array(head),
        length_m=np.array(length),
        speed_kph=np.array([DEFAULT_SPEED_KPH[c] for c in cls], dtype=np.float32),
        road_class=np.array([ROAD_CLASSES.index(c) for c in cls], dtype=np.int8),
        speed_source=np.full(m, SPEED_SOURCE_DEFAULT, dtype=np.int8),
        geom_indptr=np.array(geom_ptr, dtype=np.int64),
        geom_lat=np.array(glat),
        geom_lon=np.array(glon),
        meta={"name": "tiny", "road_classes": list(ROAD_CLASSES)},
        spatial_order=spatial_order,
    )


@pytest.fixture(scope="session")
def tiny_graph() -> RoadGraph:
    """:func:`make_tiny_graph` in input node order (node i is ``TINY_NODES[i]``)."""
    return make_tiny_graph(spatial_order=False)
