"""Property-based fuzzing of every operation in the service's own OpenAPI document
(schemathesis over hypothesis), with a valid key for each role in turn: no response is a
5xx, and every response with a documented schema matches it (schemathesis checks
not_a_server_error, response_schema_conformance, content_type_conformance).

Bounded: a few examples per operation and role, derandomized so a failure reproduces.
The app runs in-process (real SQLite file, tiny real ONNX model) with an asset, scores
and an open alert already stored, so some generated requests reach real rows.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

schemathesis = pytest.importorskip("schemathesis", reason="schemathesis is in the dev extra")
from hypothesis import HealthCheck, Phase, settings  # noqa: E402
from schemathesis.checks import not_a_server_error  # noqa: E402
from schemathesis.specs.openapi.checks import content_type_conformance, response_schema_conformance  # noqa: E402

import support  # noqa: E402
from inproc import App, start_app  # noqa: E402
from service.app import create_app  # noqa: E402
from service.settings import BUNDLED_MODELS, Settings  # noqa: E402

# The document only: building the app opens nothing (the lifespan does that).
schema = schemathesis.openapi.from_dict(create_app(Settings(_env_file=None, database_url="sqlite://", model_dir=BUNDLED_MODELS)).openapi())

EXAMPLES = 5  # generated per operation and role
CHECKS = [not_a_server_error, response_schema_conformance, content_type_conformance]


@pytest.fixture(scope="module")
def fuzz_app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[App]:
    folder: Path = tmp_path_factory.mktemp("fuzz")
    # No background sender: fuzzed routes may name any URL, and nothing here may leave the machine.
    for app in start_app(folder, notify_enabled=False):
        rows = support.readings(support.aligned_start(hours_back=2), 60, episodes=((10, 20),))
        r = app.client.post("/v1/assets/pump-01/readings", json={"readings": rows}, headers=app.auth("machine"))
        assert r.status_code == 200 and r.json()["alerts_opened"] == 1, r.text
        yield app


def _call(case: schemathesis.Case, app: App, role: str) -> None:
    kwargs = case.as_transport_kwargs(headers=app.auth(role))
    kwargs.pop("base_url", None)
    kwargs.pop("cookies", None)  # the API declares no cookies (and per-request cookies are deprecated in httpx)
    if isinstance(kwargs.get("data"), (bytes, str)):  # raw bodies go as content= for httpx
        kwargs["content"] = kwargs.pop("data")
    method, url = kwargs.pop("method"), kwargs.pop("url")
    response = app.client.request(method, url, **kwargs)
    case.validate_response(response, checks=CHECKS)


@schema.parametrize()
@settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
def test_every_operation_with_an_admin_key(case: schemathesis.Case, fuzz_app: App) -> None:
    """Generated cases plus schemathesis' coverage cases (boundaries, wrong types, missing
    fields) with the key that may call everything."""
    _call(case, fuzz_app, "admin")


@pytest.mark.parametrize("role", ["machine", "maintenance", "operator"])
@schema.parametrize()
@settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None, phases=[Phase.generate],
          suppress_health_check=list(HealthCheck))
def test_every_operation_with_each_other_role(case: schemathesis.Case, role: str, fuzz_app: App) -> None:
    """Generated cases only, with the keys of the other roles (most answers are 403)."""
    _call(case, fuzz_app, role)
