"""Property-based API test: schemathesis generates requests from the app's own /openapi.json.

Checks (schemathesis's own, driven by the OpenAPI document the app publishes): no 5xx answer,
responses conform to the documented schemas and status codes. Runs in-process on the 10-node
graph (every search proves its optimum in microseconds, so deadlines up to 60 s cost nothing)
and is bounded to a few dozen examples per operation.
"""

from __future__ import annotations

import atexit
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from hypothesis import HealthCheck, settings

from dueroute.planner.graph import save_graph
from dueroute.service.server.app import create_app
from tests.conftest import make_tiny_graph
from tests.service.conftest import ADMIN_TOKEN, settings_for, wait_ready

# schemathesis loads the schema when the module is collected, so the app is built here.
_TMP = Path(tempfile.mkdtemp(prefix="dueroute-schemathesis-"))
atexit.register(shutil.rmtree, _TMP, True)
APP = create_app(
    settings_for(
        save_graph(make_tiny_graph(), _TMP / "tiny.npz"),
        _TMP,
        admin_token=ADMIN_TOKEN,
        background_max=1000,
    )
)
schema = schemathesis.openapi.from_asgi("/openapi.json", APP)


@pytest.fixture(scope="module", autouse=True)
def _running_app() -> Iterator[None]:
    from fastapi.testclient import TestClient

    with TestClient(APP) as client:  # runs the lifespan: warm-up, sweeper
        wait_ready(client)
        yield


@schema.parametrize()
@settings(
    max_examples=40,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
def test_no_server_errors_and_documented_responses(case: Any) -> None:
    response = case.call()
    assert response.status_code < 500, (case.method, case.path, response.text[:300])
    case.validate_response(response)
