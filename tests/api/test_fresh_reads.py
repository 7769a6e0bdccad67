"""GETs answered on the event loop from the per-version body stay correct across writers."""

from __future__ import annotations

from pathlib import Path

from .conftest import make_client


def test_fresh_get_sees_another_process_write(tmp_path: Path):
    url = f"sqlite:///{tmp_path / 'shared.sqlite3'}"
    dashboard, gateway = make_client(url), make_client(url)  # two service processes, one database
    try:
        assert dashboard.app.state.inline_reads is True
        assert gateway.put("/v1/models/ch-2", json={"features": ["load_kw"]}).status_code == 201
        first = dashboard.get("/v1/models/ch-2")
        again = dashboard.get("/v1/models/ch-2")  # second read: from the cached body
        assert again.json() == first.json() and again.headers["etag"] == first.headers["etag"]
        assert dashboard.get("/v1/models/ch-2", headers={"If-None-Match": first.headers["etag"]}).status_code == 304

        r = gateway.post("/v1/models/ch-2/observations", json={"x": [410.0], "y": 97.5})
        assert r.status_code == 200, r.text
        after = dashboard.get("/v1/models/ch-2")
        assert after.json()["version"] == first.json()["version"] + 1
        assert after.json()["n"] == 1
        assert after.headers["etag"] != first.headers["etag"]
        # the old tag no longer matches
        assert dashboard.get("/v1/models/ch-2", headers={"If-None-Match": first.headers["etag"]}).status_code == 200
    finally:
        dashboard.app.state.registry.store.close()
        gateway.app.state.registry.store.close()
