"""How OpenStreetMap way tags become road edges: the drivable filter and the one-way rules.

Every importer (the streaming osmium importer :mod:`planner.osm_stream`, the osmnx importer
:mod:`planner.osm_import` and the demo compiler ``demo_data.build.compile_region``) decides
through this module, so they agree on which ways are roads and in which direction they run.

Drivable filter
---------------
:func:`way_drop_reason` keeps what a private car may use. It follows the rules of osmnx's
``"drive"`` network type (recalled from osmnx 2.1 ``_overpass.py``) as a whitelist of
``highway`` values instead of a blacklist, and additionally drops ``access=no`` (osmnx only
drops ``access=private``) with the usual OSM precedence ``motorcar`` > ``motor_vehicle`` >
``vehicle`` > ``access``. By default service roads (``highway=service`` and any way tagged
``service=alley|driveway|parking|parking_aisle|...``) are dropped, as in osmnx ``"drive"``:
they are mostly parking aisles, driveways and yards whose access is rarely tagged, and routing
between public streets does not need them. A :class:`RoadFilter` (``--road-classes``) changes
the set of ``highway`` values kept; keeping ``service`` also keeps the service sub-types
(alleys, driveways, parking aisles: depots and loading docks are often reached only through
them), except ``service=emergency_access`` and ``service=private``.

One-way rules (osmnx 2.x ``graph._is_path_one_way`` / ``_is_path_reversed``)
-------------------------------------------------------------------------
A way is one-way when ``oneway`` is one of ``yes true 1 -1 reverse T F`` or when it is tagged
``junction=roundabout``; it runs against its node order when ``oneway`` is ``-1``, ``reverse``
or ``T``. Every other way is two-way. Values are compared as written (``oneway=Yes`` is
two-way), exactly as osmnx does.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.speeds import ROAD_CLASSES

#: ``highway`` values a car may drive on by default. ``road`` (type unknown) maps to class
#: ``other``. ``service`` is deliberately absent (see the module docstring).
DRIVABLE_HIGHWAYS: frozenset[str] = frozenset(
    [c for c in ROAD_CLASSES if c not in ("service", "other")] + ["road"]
)

#: ``highway`` values ``--road-classes`` may name: every road class except the catch-all
#: ``other``, plus ``road``.
SELECTABLE_HIGHWAYS: tuple[str, ...] = tuple(c for c in ROAD_CLASSES if c != "other") + ("road",)

#: ``service=*`` values that mark a way as a service road whatever its ``highway`` class
#: (the osmnx ``"drive"`` rule), when ``service`` roads are not kept.
SERVICE_VALUES_DROPPED: frozenset[str] = frozenset(
    ["alley", "driveway", "emergency_access", "parking", "parking_aisle", "private"]
)

#: ``service=*`` values dropped even when ``service`` roads are kept.
SERVICE_VALUES_ALWAYS_DROPPED: frozenset[str] = frozenset(["emergency_access", "private"])

#: Access values that forbid a private car (``destination``, ``customers``, ``permissive``,
#: ``delivery`` and ``yes`` allow it).
ACCESS_FORBIDDING_CARS: frozenset[str] = frozenset(
    ["no", "private", "agricultural", "forestry", "emergency", "military"]
)

#: The way tags the filter, the one-way rules and the speeds read (nothing else is needed).
WAY_TAGS: tuple[str, ...] = (
    "highway",
    "maxspeed",
    "oneway",
    "junction",
    "access",
    "vehicle",
    "motor_vehicle",
    "motorcar",
    "service",
    "area",
)

#: Reasons :func:`way_drop_reason` returns, in report order.
DROP_REASONS: tuple[str, ...] = (
    "not_a_road",
    "not_for_cars",
    "service_road",
    "no_car_access",
    "area",
)

#: ``oneway`` values meaning one-way, and the subset meaning "against the node order"
#: (osmnx 2.x ``graph._add_paths``).
ONEWAY_VALUES: frozenset[str] = frozenset({"yes", "true", "1", "-1", "reverse", "T", "F"})
REVERSED_VALUES: frozenset[str] = frozenset({"-1", "reverse", "T"})

#: :func:`way_direction` values.
BOTH_WAYS = 0
FORWARD_ONLY = 1
BACKWARD_ONLY = -1


@dataclass(frozen=True)
class RoadFilter:
    """Which ``highway`` values are kept (``--road-classes``); the default is today's set."""

    highways: frozenset[str] = DRIVABLE_HIGHWAYS

    @property
    def service_values_dropped(self) -> frozenset[str]:
        """``service=*`` values that drop a way under this filter."""
        if "service" in self.highways:
            return SERVICE_VALUES_ALWAYS_DROPPED
        return SERVICE_VALUES_DROPPED

    def to_meta(self) -> dict[str, Any]:
        """The filter as recorded in a graph's ``meta["road_filter"]``."""
        return {
            "highway": sorted(self.highways),
            "service_values_dropped": sorted(self.service_values_dropped),
            "default": self.highways == DRIVABLE_HIGHWAYS,
        }


DEFAULT_ROAD_FILTER = RoadFilter()


def parse_road_classes(spec: str | None) -> RoadFilter:
    """A :class:`RoadFilter` from a ``--road-classes`` value.

    ``spec`` is a comma-separated list: ``default`` stands for today's drivable set, a
    ``highway`` value adds it, ``-value`` removes it. Without ``default`` the list is the
    exact set. Examples: ``default,service``; ``default,-living_street``;
    ``motorway,motorway_link,trunk,trunk_link,primary``. None or empty means the default.
    """
    if spec is None or not spec.strip():
        return DEFAULT_ROAD_FILTER
    allowed = "allowed: default, " + ", ".join(SELECTABLE_HIGHWAYS) + " (prefix - to remove)"
    items = [s.strip() for s in spec.split(",")]
    if any(not s for s in items):
        raise InvalidRequest(f"road classes {spec!r} hold an empty item; {allowed}")
    chosen: set[str] = set(DRIVABLE_HIGHWAYS) if "default" in items else set()
    for item in items:
        if item == "default":
            continue
        remove = item.startswith("-")
        value = item[1:] if remove else item.removeprefix("+")
        if value not in SELECTABLE_HIGHWAYS:
            raise InvalidRequest(f"unknown road class {value!r} in {spec!r}; {allowed}")
        if remove:
            chosen.discard(value)
        else:
            chosen.add(value)
    if not chosen:
        raise InvalidRequest(f"road classes {spec!r} keep no road class; {allowed}")
    return RoadFilter(frozenset(chosen))


def tokens(value: Any) -> list[str]:
    """A tag value as lower-case tokens (``"no;private"`` and lists are split)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return []
    values = value if isinstance(value, list) else [value]
    out: list[str] = []
    for v in values:
        out += [t.strip().lower() for t in str(v).split(";") if t.strip()]
    return out


def way_drop_reason(tags: dict[str, Any], road_filter: RoadFilter | None = None) -> str | None:
    """Why a way (or an edge carrying its tags) is not drivable, or None to keep it.

    Returns one of ``not_a_road`` (no ``highway`` tag: buildings, land use, rail...),
    ``area`` (``area=yes``), ``not_for_cars`` (footway, cycleway, path, steps, construction,
    proposed, and classes ``road_filter`` leaves out), ``service_road``, ``no_car_access``.
    """
    keep = (road_filter or DEFAULT_ROAD_FILTER).highways
    highway = tokens(tags.get("highway"))
    if not highway:
        return "not_a_road"
    if "yes" in tokens(tags.get("area")):
        return "area"
    if not any(h in keep for h in highway):
        return "service_road" if "service" in highway else "not_for_cars"
    dropped_services = (road_filter or DEFAULT_ROAD_FILTER).service_values_dropped
    if any(s in dropped_services for s in tokens(tags.get("service"))):
        return "service_road"
    # The most specific access tag present decides (OSM access precedence).
    for key in ("motorcar", "motor_vehicle", "vehicle", "access"):
        values = tokens(tags.get(key))
        if values:
            if any(v in ACCESS_FORBIDDING_CARS for v in values):
                return "no_car_access"
            break
    return None


def way_direction(tags: dict[str, Any]) -> int:
    """:data:`BOTH_WAYS`, :data:`FORWARD_ONLY` or :data:`BACKWARD_ONLY` (osmnx's rules)."""
    oneway = tags.get("oneway")
    if oneway in ONEWAY_VALUES or tags.get("junction") == "roundabout":
        return BACKWARD_ONLY if oneway in REVERSED_VALUES else FORWARD_ONLY
    return BOTH_WAYS
