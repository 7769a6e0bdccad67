"""``Prefer: return=minimal`` (RFC 7240) on observation posts: the same results, the model left out."""

from __future__ import annotations

import numpy as np
import pytest

from leastwise.api.routes import MODEL_FIELDS, prefers_minimal

MINIMAL = {"Prefer": "return=minimal"}


def _readings(n: int = 30):
    rng = np.random.default_rng(11)  # invented demo-style readings: load and condenser temperature
    load = rng.uniform(200.0, 500.0, n)
    cond = rng.uniform(22.0, 32.0, n)
    power = 12.0 + 0.21 * load + 1.7 * cond + rng.normal(0.0, 1.5, n)
    return [{"x": [float(a), float(b)], "y": float(p), "key": f"gw-2:{i:05d}"}
            for i, (a, b, p) in enumerate(zip(load, cond, power))]


def test_minimal_answers_carry_the_same_results_and_leave_the_model_out(client):
    for name in ("ch-full", "ch-minimal"):
        assert client.put(f"/v1/models/{name}", json={"features": ["load_kw", "condenser_c"]}).status_code == 201
    for obs in _readings():
        full = client.post("/v1/models/ch-full/observations", json=obs)
        lean = client.post("/v1/models/ch-minimal/observations", json=obs, headers=MINIMAL)
        assert full.status_code == lean.status_code == 200
        f, m = full.json(), lean.json()
        assert lean.headers["preference-applied"] == "return=minimal"
        assert "preference-applied" not in full.headers
        assert not MODEL_FIELDS & m.keys() and MODEL_FIELDS <= f.keys()
        assert {k: v for k, v in f.items() if k not in MODEL_FIELDS} == m  # results, version, n: identical
    # the model itself is the same either way: bit for bit, and it is the least-squares fit
    # of the readings (reference: numpy.linalg.lstsq on the same rows, intercept included)
    a = client.get("/v1/models/ch-full").json()
    b = client.get("/v1/models/ch-minimal").json()
    assert a["coefficients"] == b["coefficients"] and a["n"] == b["n"] == 30
    rows = _readings()
    X = np.array([[1.0, *r["x"]] for r in rows])
    y = np.array([r["y"] for r in rows])
    ref = np.linalg.lstsq(X, y, rcond=None)[0]
    got = np.array([b["coefficients"][k] for k in ("intercept", "load_kw", "condenser_c")])
    np.testing.assert_allclose(got, ref, rtol=1e-9)


def test_a_duplicate_posted_minimally_is_still_reported(client):
    client.put("/v1/models/ch-dup", json={"features": ["load_kw", "condenser_c"]})
    obs = _readings(1)[0]
    assert client.post("/v1/models/ch-dup/observations", json=obs, headers=MINIMAL).json()["applied"] == 1
    again = client.post("/v1/models/ch-dup/observations", json=obs, headers=MINIMAL)
    assert again.json()["duplicates"] == 1 and again.json()["results"][0]["status"] == "duplicate"
    assert "coefficients" not in again.json()


@pytest.mark.parametrize("values,expected", [
    (["return=minimal"], True),
    (['RETURN = "minimal"'], True),            # tokens are case-insensitive, values may be quoted (RFC 7240 s. 2)
    (["respond-async, return=minimal"], True),  # one header, several preferences
    (["wait=10", "return=minimal; foo=bar"], True),  # several headers; a parameter after the value
    (["return=representation"], False),
    (["return=representation, return=minimal"], False),  # the first return preference counts
    (["handling=lenient"], False),
    ([], False),
    (["return"], False),
])
def test_prefer_header_parsing(values, expected):
    assert prefers_minimal(values) is expected
