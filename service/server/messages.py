"""Validation messages: one per real cause, naming the field and what it allows."""

from __future__ import annotations

import json
from typing import Any

from dueroute.service.server.json_body import EXAMPLE
from dueroute.service.server.schemas import PLACE_ERROR
from dueroute.service.server.settings import Settings

# Hints appended to validation messages: what each field allows.
ALLOWED = {
    "origin": 'an object {"node": <index 0..n_nodes-1>} or {"lat": -90..90, "lon": -180..180}',
    "destination": 'an object {"node": <index 0..n_nodes-1>} or {"lat": -90..90, "lon": -180..180}',
    "deadline_ms": "an integer number of milliseconds, 1..{max_deadline_ms}",
    "controller": "one of learned, decreasing, ana, random, fixed:W with W in 1..5",
    "wait": "true or false",
    "keep": "true or false",
    "full_trace": "true or false",
}


def _json_type(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f"the string {json.dumps(value[:40])}"
    if value is None:
        return "null"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "an object"
    return f"the number {value!r}"


def _place_problem(value: Any) -> str:
    if not isinstance(value, dict):
        return f"must be an object, not {_json_type(value)}"
    if "node" in value:
        return "gives both node and lat/lon; give either node, or lat and lon"
    keys = ", ".join(sorted(value)) or "none"
    return f"has neither node nor lat and lon (keys given: {keys})"


def validation_message(errors: list[Any], settings: Settings) -> str:
    """One message per real cause, naming the field and what it allows.

    ``errors`` are pydantic error dicts (``loc``, ``type``, ``msg``, ``input``); a place's
    kind tag (``node``/``point``, see ``schemas.Place``) is left out of the location.
    """
    parts: list[str] = []
    for err in errors:
        loc = [str(p) for p in err.get("loc", ()) if p != "body"]
        if len(loc) >= 2 and loc[0] in ("origin", "destination") and loc[1] in ("node", "point"):
            loc = [loc[0], *loc[2:]] if len(loc) > 2 else [loc[0]]
        kind = str(err.get("type", ""))
        value = err.get("input")
        where = ".".join(loc) or "body"
        if kind == "missing":
            msg = "field required"
        elif kind == "extra_forbidden":
            msg = "unexpected key"
        elif kind == PLACE_ERROR:
            msg = _place_problem(value)
        elif kind in ("float_type", "int_type", "bool_type", "string_type") or kind.endswith(
            "_type"
        ):
            wanted = {
                "float_type": "a JSON number",
                "int_type": "a JSON integer",
                "bool_type": "true or false",
                "string_type": "a string",
            }.get(kind)
            if wanted is None and where == "body":
                msg = f"the body must be a JSON object, not {_json_type(value)}; {EXAMPLE}"
                where = ""
            else:
                msg = f"must be {wanted or 'of another type'}, not {_json_type(value)}"
        else:
            msg = str(err.get("msg", "invalid value"))
        field = loc[0] if loc and loc[0] in ALLOWED else None
        text = f"{where}: {msg}" if where else msg
        if field:
            hint = ALLOWED[field].replace("{max_deadline_ms}", str(settings.max_deadline_ms))
            text += f" (allowed for {field}: {hint})"
        if text not in parts:
            parts.append(text)
    return "; ".join(parts) or "invalid request"
