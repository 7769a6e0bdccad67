"""The request log (api/middleware.py): one line per request, or only refusals and errors, or none.

Each line names method, path, status, duration, the model and the client; never
the body or a header (the token below must not appear). Whatever the setting,
the metrics count every answer.
"""

from __future__ import annotations

import logging
from pathlib import Path

import pytest

from leastwise.settings import Settings

from .conftest import make_client

TOKENISH = "Bearer do-not-log-me"


def _run(tmp_path: Path, caplog: pytest.LogCaptureFixture, request_log: str) -> tuple[list[logging.LogRecord], str]:
    client = make_client(f"sqlite:///{tmp_path / 'log.sqlite3'}", request_log=request_log)
    try:
        assert client.put("/v1/models/press-7", json={"features": ["bar"], "intercept": True}).status_code == 201
        caplog.clear()
        with caplog.at_level(logging.INFO, logger="leastwise.request"):
            ok = client.post("/v1/models/press-7/observations", json={"x": [1.5], "y": 2.0, "key": "secret-body"},
                             headers={"X-Trace": TOKENISH})
            missing = client.get("/v1/models/no-such-press")
        assert (ok.status_code, missing.status_code) == (200, 404)
        metrics = client.get("/v1/metrics").text
    finally:
        client.app.state.registry.store.close()
    return [r for r in caplog.records if r.name == "leastwise.request"], metrics


def _fields(record: logging.LogRecord) -> dict:
    return {k: getattr(record, k, None) for k in ("method", "path", "status", "model", "client")}


def test_every_request_is_logged_by_default(tmp_path, caplog):
    assert Settings().request_log == "all"
    records, _ = _run(tmp_path, caplog, "all")
    assert [_fields(r) for r in records] == [
        {"method": "POST", "path": "/v1/models/press-7/observations", "status": 200, "model": "press-7",
         "client": "testclient"},
        {"method": "GET", "path": "/v1/models/no-such-press", "status": 404, "model": "no-such-press",
         "client": "testclient"},
    ]
    assert all(r.duration_ms >= 0.0 for r in records)
    text = " ".join(str(vars(r)) for r in records)
    assert "secret-body" not in text and "do-not-log-me" not in text


def test_errors_only_logs_the_refused_request_and_off_logs_none(tmp_path, caplog):
    records, metrics = _run(tmp_path / "errors", caplog, "errors")
    assert [(r.method, r.status) for r in records] == [("GET", 404)]
    # the answers are counted all the same (api/metrics.py)
    assert 'leastwise_http_responses_total{code="200",method="POST"}' in metrics
    records, metrics = _run(tmp_path / "off", caplog, "off")
    assert records == []
    assert 'leastwise_http_responses_total{code="404",method="GET"}' in metrics


def test_an_unknown_choice_is_refused():
    with pytest.raises(ValueError, match="request_log"):
        Settings(request_log="some")
    assert Settings.from_env({"LEASTWISE_REQUEST_LOG": "errors"}).request_log == "errors"
