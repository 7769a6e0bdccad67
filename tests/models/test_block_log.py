"""Batches go through the engine's blocked update; the log records the blocks and replay repeats them.

DESIGN.md's durability model: a restart (checkpoint plus log replay) reaches the same
state bit for bit. A batch's rows are absorbed by ``State.update_block``, whose
rounding differs from single updates, so the log marks which rows went together
(``observations.block``) and every reader of the log (restart, a second process
catching up, the drift history) repeats the same blocks.
"""

from __future__ import annotations

from unittest import mock

import numpy as np
import pytest
from sqlalchemy import text

from leastwise.engine import State
from leastwise.models import Registry
from leastwise.store import Store

CONFIGS = {
    "plain": {"features": ["a", "b", "c"]},
    "forgetting": {"features": ["a", "b", "c"], "forgetting": 0.98},
    "half-life": {"features": ["a", "b", "c"], "half_life": 40.0, "intercept": False},
}
BETA = np.array([1.0, -2.0, 0.5])


def _registry(url: str, **kw) -> Registry:
    return Registry(Store.open(url), **kw)


def _data(seed: int, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    y = X @ BETA + rng.normal(scale=0.1, size=n)
    t = 1000.0 + np.cumsum(rng.uniform(0.5, 2.0, size=n))
    return X, y, t


def _post(reg: Registry, name: str, X, y, t, batch: int, tag: str = "k") -> list[dict]:
    answers = []
    for start in range(0, len(y), batch):
        obs = [{"x": X[i].tolist(), "y": float(y[i]), "time": float(t[i]), "key": f"{tag}-{float(t[i])!r}"}
               for i in range(start, min(len(y), start + batch))]
        answers.append(reg.observe(name, {"observations": obs} if len(obs) > 1 else obs[0]))
    return answers


def _blocks(reg: Registry) -> list[tuple[int, int | None]]:
    with reg.store.read() as conn:
        return [(int(s), None if b is None else int(b))
                for s, b in conn.execute(text("SELECT seq, block FROM observations ORDER BY seq"))]


@pytest.mark.parametrize("kind", list(CONFIGS))
def test_restart_after_batches_is_bit_identical(sqlite_url, kind):
    X, y, t = _data(3, 700)
    reg = _registry(sqlite_url, checkpoint_every=250)
    reg.create("m", CONFIGS[kind])
    _post(reg, "m", X[:20], y[:20], t[:20], 1)  # single readings: no block
    _post(reg, "m", X[20:], y[20:], t[20:], 64)
    live = reg.live_state("m").to_bytes()
    drift = reg._entries["m"].live.monitor.to_bytes()
    marks = _blocks(reg)
    reg.store.close()

    assert all(b is None for _, b in marks[:20])
    assert all(b is not None and b <= s for s, b in marks[20:])
    again = _registry(sqlite_url)
    assert again.live_state("m").to_bytes() == live
    assert again._entries["m"].live.monitor.to_bytes() == drift
    # replaying the whole log from creation reaches the same bytes too
    with again.store.write() as conn:
        conn.execute(text("DELETE FROM checkpoints WHERE version > 1"))
    again.store.close()
    assert _registry(sqlite_url).live_state("m").to_bytes() == live


def test_a_batch_is_one_block_and_its_results_match_single_updates(sqlite_url):
    """Reference: the engine's row-by-row update of the same rows (DESIGN.md: a batch is k single updates)."""
    X, y, t = _data(5, 500)
    reg = _registry(sqlite_url)
    reg.create("m", CONFIGS["plain"])
    _post(reg, "m", X[:436], y[:436], t[:436], 109)
    before = reg.live_state("m").copy()
    with mock.patch.object(State, "_absorb_one", autospec=True, side_effect=State._absorb_one) as single:
        answer = _post(reg, "m", X[436:], y[436:], t[436:], 64)[0]
    assert single.call_count == 0  # the whole batch took the blocked update
    marks = _blocks(reg)[436:]
    assert {b for _, b in marks} == {437}  # one block, named by its first seq
    design = np.column_stack([np.ones(64), X[436:]])  # the intercept is the first engine column
    steps = before.update_many(design, y[436:], t[436:])
    for result, step in zip(answer["results"], steps, strict=True):
        assert result["recursive_residual"] == pytest.approx(step.recursive_residual, abs=1e-12)
        assert result["prediction"] == pytest.approx(step.prediction, rel=1e-12, abs=1e-12)
        assert result["leverage"] == pytest.approx(step.leverage, rel=1e-12)
        assert result["standardized_residual"] == pytest.approx(step.standardized_residual, abs=1e-10)
    assert list(answer["coefficients"].values()) == pytest.approx(before.coefficients().tolist(), rel=1e-13)


def test_forgetting_batches_split_where_the_excitation_window_rolls(sqlite_url):
    # At forgetting 0.98 the window rolls every 35 rows (0.98^35 < 0.5): each roll ends a block,
    # so the excitation check reads the state at that row, as with single readings.
    X, y, t = _data(6, 300)
    reg = _registry(sqlite_url)
    reg.create("m", CONFIGS["forgetting"])
    _post(reg, "m", X, y, t, 100)
    starts = sorted({b for _, b in _blocks(reg)})
    assert len(starts) > 3  # more blocks than the 3 batches
    single = _registry(f"{sqlite_url}-single")
    single.create("m", CONFIGS["forgetting"])
    _post(single, "m", X, y, t, 1)
    ours, ref = (r._entries["m"].live.monitor.excitation_view(
        r._entries["m"].live.config, r.live_state("m")) for r in (reg, single))
    assert ours["erosion"]["evaluated_at"] == ref["erosion"]["evaluated_at"]
    assert ours["erosion"]["renewal"] == pytest.approx(ref["erosion"]["renewal"], rel=1e-9)


def test_a_second_registry_catches_up_through_blocks(database_url):
    """Like a second process: it replays the other's batches from the log and reaches the same bytes
    (on SQLite and on PostgreSQL, where several processes share one database)."""
    X, y, t = _data(8, 600)
    a, b = _registry(database_url), _registry(database_url)
    a.create("m", CONFIGS["half-life"])
    _post(a, "m", X[:200], y[:200], t[:200], 50)
    assert b.live_state("m").to_bytes() == a.live_state("m").to_bytes()
    _post(a, "m", X[200:400], y[200:400], t[200:400], 64)
    _post(b, "m", X[400:], y[400:], t[400:], 40)  # b catches up first, then writes its own blocks
    assert a.get("m")[0]["version"] == b.get("m")[0]["version"]
    assert a.live_state("m").to_bytes() == b.live_state("m").to_bytes()


def test_drift_history_replays_the_blocks(sqlite_url):
    """The recomputed history's recursive residuals are the ones the answers reported, bit for bit."""
    X, y, t = _data(9, 400)
    reg = _registry(sqlite_url)
    reg.create("m", CONFIGS["plain"])
    answers = _post(reg, "m", X, y, t, 64)
    reported = {r["seq"]: r["recursive_residual"] for a in answers for r in a["results"]
                if r["recursive_residual"] is not None}
    history = reg.drift("m", history=True)["bde_cusum"]["history"]
    assert history["available"] is True
    assert dict(zip(history["seq"], history["recursive_residuals"])) == reported
