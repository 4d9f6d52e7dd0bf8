"""The demo region's rush-hour scenario (``demo_data/traffic.py``, ``rush_hour.json``).

References: scipy ``csgraph.dijkstra`` for the optimum before and after; the great-circle
distance (osmnx's haversine) for "inbound"; shapely for the river crossing of the bridge.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.sparse.csgraph import dijkstra

from dueroute.demo_data.traffic import SCENARIOS, resolve_traffic_path
from dueroute.planner.errors import InvalidRequest
from dueroute.planner.graph import great_circle_m


def test_named_scenarios_resolve_and_unknown_names_say_what_exists(tmp_path) -> None:
    assert resolve_traffic_path("rush-hour") == SCENARIOS["rush-hour"]
    assert SCENARIOS["rush-hour"].is_file()
    f = tmp_path / "mine.json"
    f.write_text("{}")
    assert resolve_traffic_path(str(f)) == f
    with pytest.raises(InvalidRequest, match="named scenario: rush-hour"):
        resolve_traffic_path("evening")


@pytest.fixture(scope="module")
def demo():
    from dueroute.demo_data.build import demo_graph_path
    from dueroute.planner.graph import load_graph

    return load_graph(demo_graph_path("demo", progress=False))


@pytest.mark.slow
def test_shipped_rush_hour_is_current_and_does_what_it_says(demo) -> None:
    from dueroute.demo_data.build import place_nodes
    from dueroute.demo_data.traffic import rush_hour
    from dueroute.planner.session import Planner, plan
    from dueroute.planner.traffic import costs_from_document, parse_document

    shipped = json.loads(SCENARIOS["rush-hour"].read_text())
    assert shipped == json.loads(json.dumps(rush_hour(demo)))  # regenerate: same document
    updates = parse_document(shipped, demo)
    kinds = [u.change for u in updates]
    assert kinds.count("closed") == 1 and kinds.count("speed_kph") == 1
    assert kinds.count("factor") >= 10
    places = place_nodes(demo)
    lat, lon = np.asarray(demo.lat), np.asarray(demo.lon)
    tail, head = np.asarray(demo.tail), np.asarray(demo.head)
    for u, spec in zip(updates, shipped["updates"], strict=True):
        if u.change != "factor":
            continue
        town = "Harwenna" if "Harwenna" in spec["label"] else "Oldmarrow"
        c = places[town]
        d_tail = great_circle_m(lat[c], lon[c], lat[tail[u.edges]], lon[tail[u.edges]])
        d_head = great_circle_m(lat[c], lon[c], lat[head[u.edges]], lon[head[u.edges]])
        assert np.mean(d_head < d_tail) > 0.8, spec["label"]  # inbound: towards the centre
    (bridge,) = [u for u in updates if u.change == "closed"]
    assert len(bridge.edges) == 2
    assert set(tail[bridge.edges]) == set(head[bridge.edges])  # both directions of one road

    version = costs_from_document(demo, shipped, refine="off")
    assert version.edges_faster > 0 and version.bound_quality == "weakened"
    o, t = places["Harwenna"], places["Oldmarrow"]
    before = float(dijkstra(demo.csr(), indices=[o])[0, t])
    after = float(dijkstra(demo.csr(version.travel_time_s), indices=[o])[0, t])
    assert after > before
    res = plan(Planner(demo), o, t, controller="fixed:1", costs=version)
    assert res.status == "optimal" and res.cost_s == pytest.approx(after, rel=1e-9)
