"""Road classes, ``maxspeed`` parsing and per-class default speeds.

Every compiled graph stores, per edge, a road class (an index into :data:`ROAD_CLASSES`), the
free-flow speed used for its travel time, and where that speed came from
(:data:`SPEED_SOURCE_TAGGED` or :data:`SPEED_SOURCE_DEFAULT`). Both the OSM importer and the
demo-region generator go through :func:`edge_speed`, so the two agree on every rule here.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable
from typing import Any

#: Drivable OSM ``highway`` values, most important first, then the catch-all ``"other"``.
#: The index of a value in this list is the ``road_class`` stored in a compiled graph
#: (int8), so only append to it; reordering changes the meaning of saved graphs.
ROAD_CLASSES: list[str] = [
    "motorway",
    "motorway_link",
    "trunk",
    "trunk_link",
    "primary",
    "primary_link",
    "secondary",
    "secondary_link",
    "tertiary",
    "tertiary_link",
    "unclassified",
    "residential",
    "living_street",
    "service",
    "other",
]

#: Index of the catch-all class (a road of unknown type, OSM ``highway=road``).
OTHER_CLASS: int = ROAD_CLASSES.index("other")

#: ``speed_source`` values stored per edge.
SPEED_SOURCE_TAGGED: int = 0
SPEED_SOURCE_DEFAULT: int = 1

#: Default free-flow speed per road class in km/h, used when a way has no usable ``maxspeed``.
#: These are common practice: typical posted limits for each class across many countries
#: (urban values for the lower classes, rural/expressway values for the upper ones). They are
#: our own round numbers, not taken from any product's speed table.
DEFAULT_SPEED_KPH: dict[str, float] = {
    "motorway": 110.0,
    "motorway_link": 60.0,
    "trunk": 90.0,
    "trunk_link": 50.0,
    "primary": 60.0,
    "primary_link": 40.0,
    "secondary": 50.0,
    "secondary_link": 40.0,
    "tertiary": 40.0,
    "tertiary_link": 30.0,
    "unclassified": 40.0,
    "residential": 30.0,
    "living_street": 10.0,
    "service": 20.0,
    "other": 30.0,
}

#: Plausible range of a posted limit in km/h; values outside are treated as tagging errors.
MIN_TAGGED_KPH = 1.0
MAX_TAGGED_KPH = 250.0

MPH_TO_KPH = 1.609344  # exact, international mile
KNOT_TO_KPH = 1.852  # exact, international nautical mile

#: Words that ``maxspeed`` may hold instead of a number.
#: ``walk`` is walking pace; 6 km/h is common practice for it. ``none`` (no limit, e.g. some
#: motorways), ``signals`` / ``variable`` (shown on electronic signs) carry no number we can
#: use, so they fall back to the class default.
WORD_SPEEDS_KPH: dict[str, float | None] = {
    "walk": 6.0,
    "none": None,
    "signals": None,
    "variable": None,
}

#: Implicit limits written as ``CC:context`` (country code, road context), in km/h.
#: Recalled from memory for a few common codes; any code not listed parses to None (class
#: default). ``CC:zoneNN`` / ``CC:zone:NN`` (a zone with limit NN) is handled generically.
ZONE_SPEEDS_KPH: dict[str, float | None] = {
    "DE:urban": 50.0,
    "DE:rural": 100.0,
    "DE:living_street": 7.0,
    "DE:motorway": None,  # no general limit
    "AT:urban": 50.0,
    "AT:rural": 100.0,
    "AT:motorway": 130.0,
    "FR:urban": 50.0,
    "FR:rural": 80.0,
    "FR:motorway": 130.0,
    "IT:urban": 50.0,
    "IT:rural": 90.0,
    "IT:motorway": 130.0,
    "RU:urban": 60.0,
    "RU:rural": 90.0,
    "RU:living_street": 20.0,
    "RU:motorway": 110.0,
    "GB:nsl_single": 60.0 * MPH_TO_KPH,
    "GB:nsl_dual": 70.0 * MPH_TO_KPH,
    "GB:motorway": 70.0 * MPH_TO_KPH,
}

_NUMBER_UNIT = re.compile(
    r"^(?P<num>\d+(?:\.\d+)?)\s*(?P<unit>km/h|kmh|kph|km|mph|knots|knot|kn)?$", re.IGNORECASE
)
_ZONE = re.compile(r"^[A-Z]{2}:zone:?(?P<num>\d+)$", re.IGNORECASE)


def _parse_one(text: str) -> float | None:
    """Parse a single ``maxspeed`` value (no list separators) to km/h, or None."""
    text = text.strip()
    if not text:
        return None
    lowered = text.lower()
    if lowered in WORD_SPEEDS_KPH:
        return WORD_SPEEDS_KPH[lowered]
    match = _NUMBER_UNIT.match(text)
    if match is not None:
        value = float(match.group("num"))
        unit = (match.group("unit") or "").lower()
        if unit == "mph":
            value *= MPH_TO_KPH
        elif unit in ("knots", "knot", "kn"):
            value *= KNOT_TO_KPH
        return value if MIN_TAGGED_KPH <= value <= MAX_TAGGED_KPH else None
    zone = _ZONE.match(text)
    if zone is not None:
        value = float(zone.group("num"))
        return value if MIN_TAGGED_KPH <= value <= MAX_TAGGED_KPH else None
    for code, speed in ZONE_SPEEDS_KPH.items():
        if code.lower() == lowered:
            return speed
    return None


def parse_maxspeed(value: Any) -> float | None:
    """Parse an OSM ``maxspeed`` value to km/h; None when it carries no usable number.

    Accepts plain numbers (km/h, the OSM default unit), numbers with a unit (``"50 km/h"``,
    ``"30 mph"``, ``"10 knots"``), the words in :data:`WORD_SPEEDS_KPH`, zone codes
    (``"RU:urban"``, ``"DE:zone30"``; see :data:`ZONE_SPEEDS_KPH`) and lists.

    Lists -- ``"50;70"`` (several limits on one way, e.g. per lane or per time of day) or a
    Python list (osmnx merges the tags of the ways a simplified edge runs along) -- give the
    **minimum** of the parsable entries: the lower limit applies somewhere on the edge, and a
    free-flow speed must not overstate what is allowed. Junk (``"fast"``, ``"-5"``, ``"0"``,
    numbers above :data:`MAX_TAGGED_KPH`) gives None, so the caller falls back to the class
    default.

    Parameters
    ----------
    value : str, number, list of those, or None

    Returns
    -------
    float or None
        Speed in km/h.
    """
    if value is None:
        return None
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        v = float(value)
        return v if math.isfinite(v) and MIN_TAGGED_KPH <= v <= MAX_TAGGED_KPH else None
    if isinstance(value, (list, tuple, set)):
        parts: Iterable[Any] = value
    elif isinstance(value, str):
        parts = re.split(r"[;|]", value)
    else:
        return None
    speeds: list[float] = []
    for part in parts:
        parsed = parse_maxspeed(part) if not isinstance(part, str) else _parse_one(part)
        if parsed is not None:
            speeds.append(parsed)
    return min(speeds) if speeds else None


def road_class_index(highway: Any) -> int:
    """Index into :data:`ROAD_CLASSES` for an OSM ``highway`` value (str or list of str).

    A list (a simplified edge running along ways of several classes) maps to its most
    important class, the one earliest in :data:`ROAD_CLASSES`. Unknown values map to ``other``.
    """
    values = highway if isinstance(highway, (list, tuple, set)) else [highway]
    best = OTHER_CLASS
    for v in values:
        if isinstance(v, str) and v in ROAD_CLASSES:
            best = min(best, ROAD_CLASSES.index(v))
    return best


def default_speed_kph(highway: Any) -> float:
    """Class default speed in km/h; for a list of classes the slowest one (see parse_maxspeed)."""
    values = highway if isinstance(highway, (list, tuple, set)) else [highway]
    speeds = [DEFAULT_SPEED_KPH[v] for v in values if isinstance(v, str) and v in DEFAULT_SPEED_KPH]
    return min(speeds) if speeds else DEFAULT_SPEED_KPH["other"]


def edge_speed(highway: Any, maxspeed: Any = None) -> tuple[float, int]:
    """Free-flow speed of one edge and where it came from.

    Parameters
    ----------
    highway : str or list of str
        OSM ``highway`` value(s) of the way(s) the edge runs along.
    maxspeed : str, number, list or None
        OSM ``maxspeed`` value(s), parsed with :func:`parse_maxspeed`.

    Returns
    -------
    speed_kph : float
        Tagged limit when parsable, else the class default (:func:`default_speed_kph`).
    speed_source : int
        :data:`SPEED_SOURCE_TAGGED` or :data:`SPEED_SOURCE_DEFAULT`.
    """
    tagged = parse_maxspeed(maxspeed)
    if tagged is not None:
        return tagged, SPEED_SOURCE_TAGGED
    return default_speed_kph(highway), SPEED_SOURCE_DEFAULT
