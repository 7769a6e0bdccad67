"""Fuzz the OpenAPI description with schemathesis: no 5xx, every answer matches the schema.

Bounded: a few examples per operation and a wall-clock budget; run twice, with
no tokens configured (open, loopback) and with an admin token (a second pass
with a read token exercises the 403 answers). A share of the generated cases
is pointed at a model that exists, so success paths are fuzzed too, not only 404s.
"""

from __future__ import annotations

import time
import warnings
from pathlib import Path

import pytest

schemathesis = pytest.importorskip("schemathesis")

from hypothesis import HealthCheck, Phase, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from schemathesis import checks  # noqa: E402

from leastwise.api import create_app  # noqa: E402
from leastwise.settings import Settings  # noqa: E402

MODEL = "fuzz-1"
EXAMPLES = 12
BUDGET_SECONDS = 25.0  # per pass; the whole file stays well under a minute

CHECKS = [checks.not_a_server_error, checks.status_code_conformance, checks.content_type_conformance,
          checks.response_schema_conformance, checks.response_headers_conformance]


def _app(tmp_path: Path, with_token: bool):
    app = create_app(Settings(database=f"sqlite:///{tmp_path / 'fuzz.sqlite3'}", max_batch=20,
                              max_body_bytes=16 * 1024))
    headers: dict[str, dict[str, str]] = {"none": {}}
    if with_token:
        _, admin = app.state.access.create_token("admin", "fuzz-admin")
        _, read = app.state.access.create_token("read", "fuzz-read", "fuzz-*")
        headers = {"admin": {"Authorization": f"Bearer {admin}"}, "read": {"Authorization": f"Bearer {read}"}}
    return app, headers


def _ensure_model(app) -> None:
    registry = app.state.registry
    registry.create(MODEL, {"features": ["a", "b"], "intercept": True})
    if registry.get(MODEL)[0]["n"] < 3:
        registry.observe(MODEL, {"observations": [{"x": [1.0, 2.0], "y": 1.0}, {"x": [2.0, 1.0], "y": 2.0},
                                                  {"x": [3.0, 5.0], "y": 4.0}]})


@pytest.mark.parametrize("with_token", [False, True], ids=["no-tokens", "tokens"])
def test_openapi_fuzz(tmp_path: Path, with_token: bool):
    app, headers = _app(tmp_path, with_token)
    _ensure_model(app)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        schema = schemathesis.openapi.from_asgi("/openapi.json", app)
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 17
    deadline = time.monotonic() + BUDGET_SECONDS
    seen: dict[int, int] = {}

    for operation in operations:
        if time.monotonic() > deadline:
            break

        @given(case=operation.as_strategy(), real=st.booleans(), who=st.sampled_from(sorted(headers)))
        @settings(max_examples=EXAMPLES, deadline=None, database=None, derandomize=True,
                  phases=[Phase.explicit, Phase.generate], suppress_health_check=list(HealthCheck))
        def run(case, real, who):
            if real and case.path_parameters and "name" in case.path_parameters:
                case.path_parameters["name"] = MODEL
            if case.query and "access_token" in case.query:  # refused by design (400), not described
                del case.query["access_token"]
            response = case.call(headers=headers[who])
            seen[response.status_code] = seen.get(response.status_code, 0) + 1
            assert response.status_code < 500, (case.method, case.formatted_path, response.status_code, response.text)
            case.validate_response(response, checks=CHECKS, headers=headers[who])
            if case.method in ("DELETE", "POST", "PUT"):
                _ensure_model(app)  # deleted, reset or restored: keep something to fuzz

        run()
    assert any(200 <= s < 300 for s in seen), seen
    if with_token:
        assert 403 in seen, seen
    getattr(app.state.registry, "close", app.state.registry.store.close)()
