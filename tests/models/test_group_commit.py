"""Group commit: concurrent requests share transactions, answers wait for their own commit, memory never runs ahead."""

from __future__ import annotations

import threading

import numpy as np
import pytest
from sqlalchemy.exc import OperationalError

from leastwise.engine import State
from leastwise.models import Registry
from leastwise.models import registry as registry_module
from leastwise.store import Store

CONFIG = {"features": ["a", "b", "c"]}


def _obs(rng, i: int, prefix: str = "k") -> dict:
    x = rng.normal(size=3)
    return {"x": x.tolist(), "y": float(x @ [1.0, -2.0, 0.5] + 0.1 * rng.normal()), "key": f"{prefix}-{i}"}


def _hammer(reg: Registry, names: list[str], bodies: dict[str, list[dict]], threads: int = 8) -> list[dict]:
    answers: list[dict] = []
    lock = threading.Lock()
    barrier = threading.Barrier(threads)

    def run(k: int) -> None:
        barrier.wait()
        for name in names:
            for body in bodies[name][k::threads]:
                out = reg.observe(name, body)
                with lock:
                    answers.append(out)

    ts = [threading.Thread(target=run, args=(k,)) for k in range(threads)]
    for t in ts:
        t.start()
    for t in ts:
        t.join(60)
    return answers


def test_state_copy_is_bit_identical():
    rng = np.random.default_rng(3)
    # d = 9 too: from about 8 terms BLAS sums a strided column in another order than a contiguous
    # one, so a copy with another memory layout than the original gave other steps (same bytes).
    for cfg in ({"features": ["a", "b"], "forgetting": 0.9, "ridge": 0.5}, {"features": ["a"], "half_life": 5.0},
                {"features": [f"f{j}" for j in range(8)], "forgetting": 0.99}):
        from leastwise.models.config import ModelConfig

        s = State(ModelConfig.parse(cfg).spec())
        for i in range(75):  # crosses the 32-row fold of the Gram buffer
            s.update(rng.normal(size=s.dim), float(rng.normal()), float(i))
            s.solution()
            c = s.copy()
            assert c.to_bytes() == s.to_bytes() == State.from_bytes(s.to_bytes()).to_bytes()
            x, y = rng.normal(size=s.dim), float(rng.normal())
            a, b = s.copy(), State.from_bytes(s.to_bytes())
            assert a.update(x, y, i + 0.5) == b.update(x, y, i + 0.5)  # the steps, bit for bit
            assert a.to_bytes() == b.to_bytes()


def test_concurrent_posts_share_transactions_and_replay_bit_identical(sqlite_url):
    reg = Registry(Store.open(sqlite_url), checkpoint_every=17)
    names = ["m0", "m1", "m2"]
    for n in names:
        reg.create(n, CONFIG)
    rng = np.random.default_rng(5)
    bodies = {n: [_obs(rng, i, n) for i in range(120)] for n in names}
    answers = _hammer(reg, names, bodies)
    assert len(answers) == 360 and all(a["applied"] == 1 for a in answers)
    writer = reg._writer
    assert writer is not None and writer.jobs >= 360
    # versions per model are unique: each request advanced its model once
    for n in names:
        state = reg.live_state(n)
        assert state.n == 120
    # every key answered exactly once as applied; a retry is a duplicate
    for n in names:
        out = reg.observe(n, bodies[n][7])
        assert out["results"][0]["status"] == "duplicate"
    live = {n: reg.live_state(n).to_bytes() for n in names}
    coefs = {n: reg.get(n)[0]["coefficients"] for n in names}
    reg.close()
    fresh = Registry(Store.open(sqlite_url))
    for n in names:
        assert fresh.live_state(n).to_bytes() == live[n]
        assert fresh.get(n)[0]["coefficients"] == coefs[n]
    fresh.close()


def test_answers_report_the_model_as_their_group_committed_it(sqlite_url):
    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    rng = np.random.default_rng(9)
    bodies = {"m": [_obs(rng, i) for i in range(200)]}
    answers = _hammer(reg, ["m"], bodies, threads=16)
    seqs = sorted(a["results"][0]["seq"] for a in answers)
    assert seqs == list(range(1, 201))  # every observation applied once, in one order
    for a in answers:
        assert a["n"] >= a["results"][0]["seq"]  # its own observation is in the model it reports
        assert a["version"] == a["n"] + 1  # created at version 1, one version per applied request
    by_version: dict[int, list[dict]] = {}
    for a in answers:
        by_version.setdefault(a["version"], []).append(a)
    assert len(by_version) < len(answers)  # some requests really shared a transaction
    assert len(by_version) <= reg._writer.groups
    # Each reported model equals the observations up to its n, replayed one by one in seq order.
    ordered = [body for _seq, body in sorted((a["results"][0]["seq"], b) for a, b in _pairs(answers, bodies["m"]))]
    replay = State(reg.live_state("m").spec)
    for n, body in enumerate(ordered, start=1):
        replay.update([1.0, *body["x"]], body["y"])  # the intercept term comes first
        for a in by_version.get(n + 1, []):
            assert list(a["coefficients"].values()) == replay.coefficients().tolist()
            assert a["sigma"] == replay.solution().sigma
    reg.close()


def _pairs(answers: list[dict], bodies: list[dict]) -> list[tuple[dict, dict]]:
    """Each answer with the body it answered (matched by the idempotency key)."""
    by_key = {b["key"]: b for b in bodies}
    return [(a, by_key[a["results"][0]["key"]]) for a in answers]


def test_duplicate_keys_inside_one_group_apply_once(sqlite_url):
    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    rng = np.random.default_rng(2)
    body = _obs(rng, 0)
    answers = _hammer(reg, ["m"], {"m": [body] * 32}, threads=16)
    statuses = [a["results"][0]["status"] for a in answers]
    assert statuses.count("applied") == 1 and statuses.count("duplicate") == 31
    assert reg.live_state("m").n == 1
    reg.close()


def test_failed_group_commit_leaves_memory_as_the_database(sqlite_url, monkeypatch):
    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    rng = np.random.default_rng(4)
    for i in range(5):
        reg.observe("m", _obs(rng, i))
    before = reg.live_state("m").to_bytes()
    version = reg.get("m")[0]["version"]

    def broken(*_a, **_k):
        raise OperationalError("INSERT", {}, Exception("disk I/O error"))

    monkeypatch.setattr(registry_module, "commit_group", broken)
    with pytest.raises(OperationalError):
        reg.observe("m", _obs(rng, 99))
    assert reg.live_state("m").to_bytes() == before
    assert reg.get("m")[0]["version"] == version
    monkeypatch.undo()
    out = reg.observe("m", _obs(rng, 99))  # the retry applies (once)
    assert out["results"][0]["status"] == "applied" and out["n"] == 6
    reg.close()


def test_a_bad_request_in_a_group_does_not_affect_the_others(sqlite_url):
    reg = Registry(Store.open(sqlite_url))
    reg.create("t", {"features": ["a"]})
    reg.observe("t", {"x": [1.0], "y": 1.0, "time": 100.0})
    from leastwise.models import RegistryError

    errors = []
    ok = []

    def run(k: int) -> None:
        try:
            t = 50.0 if k % 2 else 200.0 + k  # odd: earlier than the model's last time
            ok.append(reg.observe("t", {"x": [float(k)], "y": 2.0 * k, "time": t, "key": f"k{k}"}))
        except RegistryError as exc:
            errors.append(exc)

    ts = [threading.Thread(target=run, args=(k,)) for k in range(16)]
    for t in ts:
        t.start()
    for t in ts:
        t.join(30)
    assert len(errors) >= 8  # every odd one, maybe some even ones that came after a later time
    assert reg.live_state("t").n == 1 + len(ok)
    reg.close()


def test_a_request_failing_half_way_drops_its_models_part_of_the_group(sqlite_url, monkeypatch):
    """A group applies its model's observations together on one working copy; when that fails half-way
    nothing of it is kept: the model's requests are retried one by one, and only the failing one fails."""
    import asyncio

    from leastwise.models.drift import ResidualMonitor

    reg = Registry(Store.open(sqlite_url))
    reg.create("m", CONFIG)
    reg.observe("m", {"x": [1.0, 0.0, 0.0], "y": 1.0, "key": "first"})
    original = ResidualMonitor.observe

    def observe(self, step, seq=None, state=None):  # noqa: ANN001
        out = original(self, step, seq, state)
        if abs(step.residual) > 100.0:  # the observation with y = 666, after the engine applied it
            raise RuntimeError("failed after the update")
        return out

    monkeypatch.setattr(ResidualMonitor, "observe", observe)
    retries = []
    plain_retry = Registry._observe_retry
    monkeypatch.setattr(Registry, "_observe_retry", lambda self, *a: retries.append(1) or plain_retry(self, *a))
    rng = np.random.default_rng(12)
    bodies = [_obs(rng, i) for i in range(10)]
    bodies[5] = {**bodies[5], "y": 666.0}

    async def main() -> list:
        return await asyncio.gather(*(reg.observe_async("m", b) for b in bodies), return_exceptions=True)

    out = asyncio.run(main())
    assert isinstance(out[5], RuntimeError)
    good = [a for i, a in enumerate(out) if i != 5]
    assert all(a["results"][0]["status"] == "applied" for a in good)
    assert retries  # the model's part of the group was dropped and retried
    # Memory and the database hold exactly the nine good observations (and the first), each once.
    ordered = sorted((a["results"][0]["seq"], b) for a, b in zip(good, bodies[:5] + bodies[6:]))
    assert [seq for seq, _ in ordered] == list(range(2, 11))
    replay = State(reg.live_state("m").spec)
    replay.update([1.0, 1.0, 0.0, 0.0], 1.0)
    for _seq, b in ordered:
        replay.update([1.0, *b["x"]], b["y"])
    assert reg.live_state("m").to_bytes() == replay.to_bytes()
    reg.close()
    fresh = Registry(Store.open(sqlite_url))
    assert fresh.live_state("m").to_bytes() == replay.to_bytes()
    fresh.close()


def test_without_group_commit(sqlite_url):
    reg = Registry(Store.open(sqlite_url), group_commit=False)
    reg.create("m", CONFIG)
    rng = np.random.default_rng(1)
    answers = _hammer(reg, ["m"], {"m": [_obs(rng, i) for i in range(40)]}, threads=4)
    assert sorted(a["n"] for a in answers) == list(range(1, 41))
    assert reg._writer is None
    reg.close()
