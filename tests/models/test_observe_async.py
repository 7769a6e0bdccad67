"""Observations submitted from an event loop: grouped commits, one answer per request, equal to a plain replay."""

from __future__ import annotations

import asyncio

import numpy as np
from sqlalchemy import text

from leastwise.engine import State
from leastwise.models import Registry
from leastwise.models.config import ModelConfig
from leastwise.store import Store

CONFIG = {"features": ["a", "b", "c"], "intercept": False}


def _obs(rng: np.random.Generator, i: int) -> dict:
    x = rng.normal(size=3)
    return {"x": x.tolist(), "y": float(x @ [1.0, -2.0, 0.5] + 0.1 * rng.normal()), "key": f"k-{i}"}


def test_concurrent_coroutines_share_commits_and_answer_the_committed_model(sqlite_url):
    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    reg.observe("m", {"x": [1.0, 0.0, 0.0], "y": 1.0})  # loaded into memory: the event-loop path applies
    rng = np.random.default_rng(11)
    bodies = [_obs(rng, i) for i in range(200)]

    async def main() -> list[dict]:
        return await asyncio.gather(*(reg.observe_async("m", b) for b in bodies))

    answers = asyncio.run(main())
    writer = reg._writer
    assert writer is not None and writer.groups < writer.jobs  # requests really shared transactions
    assert all(a["results"][0]["status"] == "applied" for a in answers)
    assert all(a["version"] == a["n"] + 1 and a["n"] >= a["results"][0]["seq"] for a in answers)
    assert len({a["version"] for a in answers}) < len(answers)  # answers of one group: one committed model
    # The committed state equals the observations replayed one by one in commit (seq) order, to
    # rounding (a group's observations go through the engine's blocked update together), and every
    # answer's coefficients are those of the replay at its reported n. A restart, which replays the
    # logged blocks, reaches the committed state bit for bit.
    by_seq = sorted(zip((a["results"][0]["seq"] for a in answers), range(len(bodies))))
    replay = State(ModelConfig.parse(CONFIG).spec())
    replay.update([1.0, 0.0, 0.0], 1.0)
    at_n = {}
    for _seq, i in by_seq:
        replay.update(bodies[i]["x"], bodies[i]["y"])
        at_n[replay.n] = replay.copy().coefficients().tolist()  # on a copy: a read leaves no trace in replay
    live = reg.live_state("m")
    assert live.n == replay.n
    gram, reference = live.factor.T @ live.factor, replay.factor.T @ replay.factor
    np.testing.assert_allclose(gram, reference, rtol=1e-12, atol=1e-12 * np.abs(reference).max())
    for a in answers:
        np.testing.assert_allclose(list(a["coefficients"].values()), at_n[a["n"]], rtol=1e-12, atol=1e-14)
    committed = live.to_bytes()
    with reg.store.read() as conn:
        marks = [b for (b,) in conn.execute(text("SELECT block FROM observations WHERE block IS NOT NULL"))]
    assert max(marks.count(b) for b in set(marks)) > 1  # one block held several requests' observations
    reg.close()
    fresh = Registry(Store.open(sqlite_url))
    assert fresh.live_state("m").to_bytes() == committed
    fresh.close()


def test_duplicates_inside_one_group_are_applied_once(sqlite_url):
    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    reg.observe("m", {"x": [1.0, 0.0, 0.0], "y": 1.0})
    body = {"x": [0.5, 0.25, 2.0], "y": 3.0, "key": "same"}

    async def main() -> list[dict]:
        return await asyncio.gather(*(reg.observe_async("m", body) for _ in range(40)))

    statuses = [a["results"][0]["status"] for a in asyncio.run(main())]
    assert statuses.count("applied") == 1 and statuses.count("duplicate") == 39
    assert reg.live_state("m").n == 2
    reg.close()


def test_a_cancelled_request_does_not_stall_the_writer(sqlite_url):
    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    reg.observe("m", {"x": [1.0, 0.0, 0.0], "y": 1.0})
    rng = np.random.default_rng(5)

    async def main() -> dict:
        doomed = asyncio.ensure_future(reg.observe_async("m", _obs(rng, 1)))
        await asyncio.sleep(0)
        doomed.cancel()  # the client went away; its observation may still commit (it was submitted)
        return await reg.observe_async("m", _obs(rng, 2))

    out = asyncio.run(main())
    assert out["results"][0]["status"] == "applied"
    assert reg.live_state("m").n == out["n"]
    reg.close()


def test_an_answer_built_during_the_commit_is_dropped_when_the_commit_fails(sqlite_url, monkeypatch):
    import pytest
    from sqlalchemy.exc import OperationalError

    from leastwise.models import writer as writer_module

    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    reg.observe("m", {"x": [1.0, 0.0, 0.0], "y": 1.0})
    before = reg.live_state("m").to_bytes()
    built: list = []
    real_build = reg._build_answers

    def spy(jobs):  # noqa: ANN001
        real_build(jobs)
        built.extend(j.answer for j in jobs)

    def disk_error(_seconds: float) -> None:  # runs after the rows are written, before the commit
        raise OperationalError("COMMIT", {}, Exception("disk I/O error"))

    monkeypatch.setattr(reg, "_build_answers", spy)
    monkeypatch.setattr(reg, "_commit_delay", 0.001)
    monkeypatch.setattr(writer_module.time, "sleep", disk_error)

    async def main() -> dict:
        task = asyncio.ensure_future(reg.observe_async("m", {"x": [0.5, 0.5, 0.5], "y": 2.0}))
        for _ in range(200):  # let the early answer be built before the error arrives
            await asyncio.sleep(0.005)
            if task.done():
                break
        return await task

    with pytest.raises(OperationalError):
        asyncio.run(main())
    assert built and built[0] is not None  # the answer had been built early ...
    assert reg.live_state("m").to_bytes() == before  # ... and nothing of it took effect
    monkeypatch.undo()
    out = asyncio.run(reg.observe_async("m", {"x": [0.5, 0.5, 0.5], "y": 2.0}))
    assert out["results"][0]["status"] == "applied" and out["n"] == 2
    reg.close()


def test_full_answers_are_solved_by_the_writer_before_the_commit(sqlite_url, monkeypatch):
    """The solution a full answer reports is computed in the writer thread before the commit
    (registry ``_answer_early``): when the event loop assembles the answers it is already cached on
    the state, and the loop solves nothing itself."""
    import threading

    from leastwise.engine import state as state_module

    reg = Registry(Store.open(sqlite_url))
    for name in ("full", "lean"):
        reg.create(name, CONFIG)
        reg.observe(name, {"x": [1.0, 0.0, 0.0], "y": 1.0})
    solved_in: set[str] = set()  # threads that solved a state
    real_solve = state_module.solve

    def recording_solve(*args, **kwargs):  # noqa: ANN002, ANN003
        solved_in.add(threading.current_thread().name)
        return real_solve(*args, **kwargs)

    cached_at_answer: list[bool] = []  # per full job: its state's solution was there when the loop got it
    real_build = reg._build_answers

    def spy(jobs):  # noqa: ANN001
        cached_at_answer.extend(j.state._solution is not None for j in jobs if not j.minimal)
        real_build(jobs)

    monkeypatch.setattr(state_module, "solve", recording_solve)
    monkeypatch.setattr(reg, "_build_answers", spy)
    rng = np.random.default_rng(5)
    full_bodies = [_obs(rng, i) for i in range(40)]
    lean_bodies = [_obs(rng, 100 + i) for i in range(40)]

    async def main() -> list[dict]:
        full = [reg.observe_async("full", b) for b in full_bodies]
        lean = [reg.observe_async("lean", b, minimal=True) for b in lean_bodies]
        return await asyncio.gather(*full, *lean)

    answers = asyncio.run(main())
    monkeypatch.undo()
    full_answers, lean_answers = answers[:40], answers[40:]
    assert all("coefficients" in a for a in full_answers) and not any("coefficients" in a for a in lean_answers)
    assert len(cached_at_answer) == 40 and all(cached_at_answer)
    assert solved_in == {"leastwise-writer"}
    # the reported coefficients are those of the committed state, solved afresh on a copy
    last = max(full_answers, key=lambda a: a["version"])
    assert last["n"] == reg.live_state("full").n == 41
    fresh = reg.live_state("full").copy().coefficients().tolist()
    assert list(last["coefficients"].values()) == fresh
    reg.close()
