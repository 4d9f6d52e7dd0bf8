"""Fixtures for the policies tests: a small synthetic street grid with fast arterials."""

from __future__ import annotations

import numpy as np
import pytest

from dueroute.planner.graph import RoadGraph, build_graph, great_circle_m
from dueroute.planner.speeds import ROAD_CLASSES, SPEED_SOURCE_DEFAULT


def make_grid_graph(rows: int = 14, cols: int = 14, seed: int = 0) -> RoadGraph:
    """A jittered street grid, ~300 m blocks, with a fast arterial on every 4th row and column.

    Residential streets run at 30 km/h and arterials at 80 km/h, so the great-circle bound
    (divided by the top speed) is loose and the search weight matters; about 8% of the
    residential blocks are missing, so straight lines are not always drivable.
    """
    rng = np.random.default_rng(seed)
    r, c = np.meshgrid(np.arange(rows), np.arange(cols), indexing="ij")
    lat = 46.0 + r.ravel() * 0.0027 + rng.normal(0, 0.0003, rows * cols)
    lon = -20.0 + c.ravel() * 0.0039 + rng.normal(0, 0.0004, rows * cols)
    tail, head, speed, cls = [], [], [], []
    for i in range(rows):
        for j in range(cols):
            a = i * cols + j
            for di, dj in ((0, 1), (1, 0)):
                if i + di >= rows or j + dj >= cols:
                    continue
                b = (i + di) * cols + (j + dj)
                arterial = (di == 0 and i % 4 == 0) or (dj == 0 and j % 4 == 0)
                if not arterial and rng.random() < 0.08:
                    continue
                kph = 80.0 if arterial else 30.0
                name = "primary" if arterial else "residential"
                for t, h in ((a, b), (b, a)):
                    tail.append(t)
                    head.append(h)
                    speed.append(kph)
                    cls.append(ROAD_CLASSES.index(name))
    tail_a, head_a = np.array(tail), np.array(head)
    length = great_circle_m(lat[tail_a], lon[tail_a], lat[head_a], lon[head_a])
    return build_graph(
        lat=lat,
        lon=lon,
        osm_id=np.arange(rows * cols, dtype=np.int64),
        tail=tail_a,
        head=head_a,
        length_m=length,
        speed_kph=np.array(speed, dtype=np.float32),
        road_class=np.array(cls, dtype=np.int8),
        speed_source=np.full(len(tail), SPEED_SOURCE_DEFAULT, dtype=np.int8),
        meta={"name": f"grid{rows}x{cols}", "road_classes": list(ROAD_CLASSES)},
    )


@pytest.fixture(scope="session")
def grid_graph() -> RoadGraph:
    return make_grid_graph()
