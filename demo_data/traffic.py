"""Traffic scenarios for the demo region, and names for them on the command line.

``rush_hour.json`` (shipped beside this module) is an evening rush hour on the Veyrand Coast,
made by :func:`rush_hour` from the ``demo`` graph and the scenario file (``region.toml``):

* **slow arterials into the towns**: the last 6 km of the roads into Harwenna and Oldmarrow
  from eight directions each (the fastest paths into the centre from points 7 km out, which
  follow the primary and secondary roads), inbound only (``direction: forward``), at 2.2x
  their free-flow time;
* **a closed bridge**: the road bridge over the River Veyr nearest to the bridge site at
  (24.5 km, 25.5 km) of ``region.toml``, both directions;
* **a faster new bypass**: an arc of roads 3 to 4 km north of Oldmarrow's centre, opened at
  90 km/h (faster than free flow: this is the speed-up that weakens the landmark bound until
  the landmarks are rebuilt).

Every selection is an ``along`` LineString over the roads' own geometry with a 6 m buffer, so
the file does not depend on node numbering. ``python -m dueroute.demo_data.traffic -o FILE``
writes it again (the test suite checks the shipped file equals a fresh one on the ``demo``
graph).
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import RoadGraph, great_circle_m

HERE = Path(__file__).resolve().parent

#: Named scenarios: ``--traffic rush-hour`` means this file.
SCENARIOS = {"rush-hour": HERE / "rush_hour.json"}

ARTERIAL_FACTOR = 2.2
ARTERIAL_KM = 6.0
APPROACH_KM = 7.0
BYPASS_SPEED_KPH = 90.0
BUFFER_M = 6.0
CLOSED_BRIDGE_KM = (24.5, 25.5)


def resolve_traffic_path(arg: str) -> Path:
    """A traffic document file, or the path of a named scenario (:data:`SCENARIOS`)."""
    if arg in SCENARIOS:
        return SCENARIOS[arg]
    path = Path(arg)
    if not path.is_file():
        names = ", ".join(SCENARIOS)
        raise InvalidRequest(
            f"traffic file not found: {arg} (give a JSON traffic document or a named "
            f"scenario: {names})"
        )
    return path


def _line(graph: RoadGraph, edges: np.ndarray) -> list[list[float]]:
    """[lon, lat] positions along consecutive edges (shared points written once)."""
    pts: list[list[float]] = []
    for e in edges:
        coords = graph.edge_coords(int(e))
        if pts:
            coords = coords[1:]
        pts += [[round(x, 7), round(y, 7)] for x, y in coords]
    return pts


def _path_edges(planner: Any, origin: int, destination: int) -> np.ndarray:
    from dueroute.planner.session import plan

    res = plan(planner, origin, destination, controller="fixed:1")
    if res.route_edges is None:
        raise InvalidRequest(f"no route from {origin} to {destination} in the demo graph")
    return np.asarray(res.route_edges, dtype=np.int64)


def _nearest(graph: RoadGraph, lat: float, lon: float, nodes: np.ndarray) -> int:
    d = great_circle_m(lat, lon, np.asarray(graph.lat)[nodes], np.asarray(graph.lon)[nodes])
    return int(nodes[int(np.argmin(d))])


def rush_hour(graph: RoadGraph) -> dict[str, Any]:
    """The rush-hour document for the ``demo`` graph (see the module docstring)."""
    from dueroute.demo_data.build import place_nodes
    from dueroute.demo_data.generate import KM_PER_DEG, load_scenario
    from dueroute.planner.heuristics import largest_component_nodes
    from dueroute.planner.session import Planner

    scenario = load_scenario()
    lat0 = float(scenario["region"]["origin_lat"])
    lon0 = float(scenario["region"]["origin_lon"])
    km_lon = KM_PER_DEG * math.cos(math.radians(lat0))
    places = place_nodes(graph)
    planner = Planner(graph)
    scc = largest_component_nodes(graph)
    lat, lon = np.asarray(graph.lat), np.asarray(graph.lon)
    updates: list[dict[str, Any]] = []

    for town in ("Harwenna", "Oldmarrow"):
        centre = places[town]
        clat, clon = float(lat[centre]), float(lon[centre])
        for k in range(8):
            angle = 2 * math.pi * k / 8
            plat = clat + APPROACH_KM * math.sin(angle) / KM_PER_DEG
            plon = clon + APPROACH_KM * math.cos(angle) / km_lon
            start = _nearest(graph, plat, plon, scc)
            if great_circle_m(plat, plon, lat[start], lon[start]) > 1500:
                continue  # that direction is the sea
            edges = _path_edges(planner, start, centre)
            heads = np.asarray(graph.head)[edges]
            near = great_circle_m(clat, clon, lat[heads], lon[heads]) <= ARTERIAL_KM * 1000
            first = int(np.argmax(near)) if near.any() else len(edges)
            edges = edges[first:]
            if len(edges) < 2:
                continue
            updates.append(
                {
                    "along": {"type": "LineString", "coordinates": _line(graph, edges)},
                    "buffer_m": BUFFER_M,
                    "direction": "forward",
                    "factor": ARTERIAL_FACTOR,
                    "label": f"rush hour into {town} from the {_compass(k)}",
                }
            )

    # the closed bridge: the two-way local road edge crossing the river nearest to the site
    bridge = _bridge_edge(graph, lat0, lon0, km_lon, KM_PER_DEG)
    updates.append(
        {
            "along": {"type": "LineString", "coordinates": _line(graph, np.array([bridge]))},
            "buffer_m": BUFFER_M,
            "closed": True,
            "label": "Veyr bridge closed for repairs (both directions)",
        }
    )

    # the new bypass: short fastest paths between points on an arc north of Oldmarrow
    centre = places["Oldmarrow"]
    clat, clon = float(lat[centre]), float(lon[centre])
    arc = []
    for deg in range(150, 20, -20):
        a = math.radians(deg)
        plat = clat + 3.5 * math.sin(a) / KM_PER_DEG
        plon = clon + 3.5 * math.cos(a) / km_lon
        arc.append(_nearest(graph, plat, plon, scc))
    edges = np.concatenate(
        [_path_edges(planner, a, b) for a, b in zip(arc[:-1], arc[1:], strict=True)]
    )
    updates.append(
        {
            "along": {"type": "LineString", "coordinates": _line(graph, edges)},
            "buffer_m": BUFFER_M,
            "speed_kph": BYPASS_SPEED_KPH,
            "label": "new Oldmarrow northern bypass, open at 90 km/h",
        }
    )
    return {
        "description": "Evening rush hour on the Veyrand Coast (demo region): slow arterials "
        "into Harwenna and Oldmarrow, a closed Veyr bridge, a new fast bypass north of "
        "Oldmarrow. Made by demo_data/traffic.py.",
        "updates": updates,
    }


def _bridge_edge(graph: RoadGraph, lat0: float, lon0: float, km_lon: float, km_lat: float) -> int:
    """The two-way, non-motorway edge that crosses the River Veyr (the generated river line,
    ``demo_data.generate``) nearest to :data:`CLOSED_BRIDGE_KM`."""
    from shapely.geometry import LineString

    from dueroute.demo_data.generate import generate

    river = LineString(generate("demo").river_km)
    bx, by = CLOSED_BRIDGE_KM
    blat, blon = lat0 + by / km_lat, lon0 + bx / km_lon
    tail, head = np.asarray(graph.tail), np.asarray(graph.head)
    lat, lon = np.asarray(graph.lat), np.asarray(graph.lon)
    classes = graph.meta.get("road_classes", [])
    local = np.array([c not in ("motorway", "motorway_link") for c in classes])[
        np.asarray(graph.road_class)
    ]
    d = great_circle_m(blat, blon, (lat[tail] + lat[head]) / 2, (lon[tail] + lon[head]) / 2)
    # stable: the two directions of one road tie, and the first by edge index is taken
    for e in np.argsort(np.where(local, d, np.inf), kind="stable")[:2000]:
        if d[e] > 3000:
            break
        t, h = int(tail[e]), int(head[e])
        lo, hi = int(graph.indptr[h]), int(graph.indptr[h + 1])
        if not np.any(np.asarray(graph.head[lo:hi]) == t):
            continue  # one-way: not a road bridge we can close both ways with one line
        pts = [((x - lon0) * km_lon, (y - lat0) * km_lat) for x, y in graph.edge_coords(int(e))]
        if LineString(pts).intersects(river):
            return int(e)
    raise InvalidRequest(f"no two-way road crosses the river near {CLOSED_BRIDGE_KM} km")


def _compass(k: int) -> str:
    return (
        "east",
        "north-east",
        "north",
        "north-west",
        "west",
        "south-west",
        "south",
        "south-east",
    )[k]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="write the demo region's rush-hour document")
    parser.add_argument("-o", "--out", default=str(SCENARIOS["rush-hour"]), help="output file")
    args = parser.parse_args(argv)
    from dueroute.demo_data.build import demo_graph_path
    from dueroute.planner.graph import load_graph

    doc = rush_hour(load_graph(demo_graph_path("demo")))
    Path(args.out).write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
    print(f"wrote {args.out}: {len(doc['updates'])} updates")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
