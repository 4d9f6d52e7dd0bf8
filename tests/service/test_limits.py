"""One set of limits for every layer: the HTTP schema publishes what the planner accepts.

Reference: the planner's own parser (``dueroute.planner.controllers.make_controller``) and
``dueroute.planner.limits``; the published rule is the OpenAPI document's regular expression.
"""

from __future__ import annotations

import re

import pytest

from dueroute.planner import limits
from dueroute.planner.controllers import make_controller
from dueroute.planner.errors import InvalidRequest
from dueroute.service.server import schemas
from dueroute.service.server.settings import Settings

SPECS = [
    "learned",
    "decreasing",
    "ana",
    "random",
    "fixed:1",
    "fixed:1.0",
    "fixed:1.5",
    "fixed:2.25",
    "fixed:4.999",
    "fixed:5",
    "fixed:5.0",
    "fixed:5.01",
    "fixed:0.5",
    "fixed:6",
    "fixed:10",
    "fixed:",
    "fixed:abc",
    "greedy",
]


@pytest.mark.parametrize("spec", SPECS)
def test_the_published_controller_pattern_accepts_what_the_planner_builds(spec: str) -> None:
    published = re.fullmatch(schemas.CONTROLLER_PATTERN, spec) is not None
    if spec == "learned":  # built by dueroute.policies, not by make_controller
        assert published
        return
    try:
        make_controller(spec)
        planner_ok = True
    except InvalidRequest:
        planner_ok = False
    assert published == planner_ok, spec


def test_deadline_and_default_controller_are_the_planners() -> None:
    assert schemas.MAX_DEADLINE_MS == limits.MAX_DEADLINE_MS
    field = schemas.PlanRequest.model_fields["controller"]
    assert field.default == limits.DEFAULT_CONTROLLER
    assert Settings().max_deadline_ms <= limits.MAX_DEADLINE_MS
