"""The token cache's reload (api/auth.py: AccessMiddleware._tokens): one reload at a time, however many
requests find the cache expired. Common practice for a shared cache (stale-while-revalidate); no outside source."""

from __future__ import annotations

import asyncio
import threading
import time

import pytest

from leastwise.api.auth import AccessMiddleware
from leastwise.models.access import AccessControl, hash_token
from leastwise.store import Store


class CountingAccess(AccessControl):
    """Counts reloads and holds each one, after its read, until ``release`` is set (the test controls the overlap)."""

    def __init__(self, store: Store) -> None:
        super().__init__(store)
        self.reloads = 0
        self.release = threading.Event()

    def _read_active(self):
        self.reloads += 1
        read = super()._read_active()
        assert self.release.wait(10)
        return read


@pytest.fixture
def access(tmp_path):
    store = Store.open(f"sqlite:///{tmp_path / 'tokens.sqlite3'}")
    a = CountingAccess(store)
    yield a
    store.close()


async def _app(scope, receive, send):
    await send({"type": "http.response.start", "status": 200, "headers": []})
    await send({"type": "http.response.body", "body": b"ok"})


async def _call(mw: AccessMiddleware, token: str) -> int:
    scope = {"type": "http", "method": "GET", "path": "/v1/models", "query_string": b"",
             "headers": [(b"authorization", f"Bearer {token}".encode())]}
    sent: list[dict] = []

    async def receive():
        return {"type": "http.request", "body": b"", "more_body": False}

    async def send(message):
        sent.append(message)

    await mw(scope, receive, send)
    return sent[0]["status"]


def _two_tokens(access: CountingAccess) -> tuple:
    """A read token to revoke, and an admin token that stays active (so tokens stay required)."""
    record, token = access.create_token("read", "dashboard", None)
    access.create_token("admin", "operator", None)
    return record, token, AccessMiddleware(_app, access)


def _expire(access: AccessControl, age: float) -> None:
    with access._lock:
        access._loaded = time.monotonic() - age


async def _first_load(access: CountingAccess, mw: AccessMiddleware, token: str) -> None:
    """One request that loads the tokens (its reload not held): the token is accepted."""
    access.release.set()
    assert await _call(mw, token) == 200


def _hold_reloads_and_expire(access: CountingAccess, age: float) -> None:
    """From now on reloads are held after their read; the cache is ``age`` seconds old."""
    access.release.clear()
    _expire(access, age)


async def _reloads_reach(access: CountingAccess, count: int) -> None:
    """Wait (at most 2 s) until ``count`` reloads have started in worker threads."""
    for _ in range(200):
        if access.reloads >= count:
            return
        await asyncio.sleep(0.01)


def test_requests_that_find_the_cache_expired_share_one_reload(access: CountingAccess):
    _, token = access.create_token("read", "dashboard", None)
    mw = AccessMiddleware(_app, access)

    async def scenario():
        await _first_load(access, mw, token)
        assert access.reloads == 1
        _hold_reloads_and_expire(access, access.cache_seconds + 0.1)  # expired, but within twice the cache time
        statuses = await asyncio.wait_for(asyncio.gather(*(_call(mw, token) for _ in range(16))), 10)
        assert statuses == [200] * 16  # answered from the list of a moment ago while the reload runs
        await _reloads_reach(access, 2)  # the reload has started in a worker thread (and is held there)
        assert not mw._refreshing.done()
        assert access.reloads == 2  # one reload for all sixteen, not sixteen
        access.release.set()
        await asyncio.wait_for(mw._refreshing, 10)
        assert await _call(mw, token) == 200
        assert access.reloads == 2  # fresh again: no reload

    asyncio.run(scenario())


def test_a_list_older_than_twice_the_cache_time_is_waited_for(access: CountingAccess):
    record, token, mw = _two_tokens(access)

    async def scenario():
        await _first_load(access, mw, token)
        # revoked by another process (written straight to the database: this object's cache keeps the token)
        other = AccessControl(access.store)
        other.revoke_token(record.id)
        assert access.cached() is not None and any(d == hash_token(token) for d, _ in access.cached())
        _hold_reloads_and_expire(access, 2 * access.cache_seconds + 0.1)
        waiting = [asyncio.ensure_future(_call(mw, token)) for _ in range(8)]
        await asyncio.sleep(0.05)
        assert not any(w.done() for w in waiting)  # nobody answered from the too-old list
        access.release.set()
        statuses = await asyncio.wait_for(asyncio.gather(*waiting), 10)
        assert statuses == [401] * 8  # the reload's list: the revoked token is refused
        assert access.reloads == 2

    asyncio.run(scenario())


def test_after_a_local_change_the_next_request_waits_for_the_reload(access: CountingAccess):
    _, token = access.create_token("read", "dashboard", None)
    mw = AccessMiddleware(_app, access)

    async def scenario():
        await _first_load(access, mw, token)
        before = access.reloads
        access.invalidate()  # what a change made through this object does
        assert access.cached(1e9) is None  # no stale list to fall back on
        assert await _call(mw, token) == 200
        assert access.reloads == before + 1

    asyncio.run(scenario())


def test_a_failed_reload_reaches_the_requests_that_waited_for_it(access: CountingAccess, monkeypatch):
    _, token = access.create_token("read", "dashboard", None)
    mw = AccessMiddleware(_app, access)

    def broken():
        raise RuntimeError("database unavailable")

    async def scenario():
        access.invalidate()
        monkeypatch.setattr(access, "_read_active", broken)
        results = await asyncio.gather(*(_call(mw, token) for _ in range(4)), return_exceptions=True)
        assert all(isinstance(r, RuntimeError) for r in results)

    asyncio.run(scenario())


def test_a_revocation_here_during_a_reload_is_not_missed(access: CountingAccess):
    """A reload that began before a token was revoked through this object is neither cached nor shared."""
    record, token, mw = _two_tokens(access)

    async def scenario():
        await _first_load(access, mw, token)
        _hold_reloads_and_expire(access, 2 * access.cache_seconds + 0.1)
        before = asyncio.ensure_future(_call(mw, token))  # starts a reload, held in its worker thread
        await _reloads_reach(access, 2)
        assert access.reloads == 2
        # the reload has read the tokens (the one about to be revoked among them) and is held
        access.revoke_token(record.id)  # invalidates: generation moves on
        after = asyncio.ensure_future(_call(mw, token))
        await asyncio.sleep(0.05)
        access.release.set()
        assert await asyncio.wait_for(after, 10) == 401  # its own reload, begun after the change
        await asyncio.wait_for(before, 10)
        assert access.reloads == 3
        assert await _call(mw, token) == 401  # and nothing older was cached

    asyncio.run(scenario())
