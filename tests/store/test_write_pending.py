"""write_pending: log rows and keys go in as multi-row statements; every value comes back as written.

The rows are inserted several hundred at a time in chunks of at most 999 values (the
smallest SQLite limit); these checks read them back through the store's own queries on
both databases, including a chunk boundary and a key seen twice.
"""

from __future__ import annotations

import numpy as np
import pytest
from sqlalchemy.exc import IntegrityError

from leastwise.store import CheckpointRow, LogRow, PendingWrite, Store
from leastwise.store import queries as q
from leastwise.store.drift import list_events, log_rows_after


def _rows(start: int, count: int, block: int | None) -> list[LogRow]:
    rng = np.random.default_rng(start)
    return [LogRow(start + i, rng.normal(size=3).astype("<f8").tobytes(), float(rng.normal()),
                   None if i % 3 else 1000.0 + i, f"k-{start + i}" if i % 2 else None, "applied", 5.0, block)
            for i in range(count)]


def _model(store: Store) -> int:
    with store.write() as conn:
        return q.insert_model(conn, "m", "{}", 0.0, CheckpointRow(1, 0, b"", b"")).id


def test_hundreds_of_rows_come_back_as_written(database_url):
    store = Store.open(database_url)
    mid = _model(store)
    rows = _rows(1, 250, 1)  # 250 rows of 9 values: three statements (111 + 111 + 28 rows)
    with store.write() as conn:
        w = PendingWrite(mid, 1, 2, 250, rows)
        q.write_pending(conn, [w], 5.0)
    assert w.accepted
    with store.read() as conn:
        back = list(log_rows_after(conn, mid, 0))
        keys = q.find_keys(conn, mid, [r.key for r in rows if r.key is not None])
    assert back == [r._replace(received=0.0) for r in rows]  # log_rows_after leaves out the receive time
    assert keys == {r.key: r.seq for r in rows if r.key is not None}
    store.close()


def test_a_key_recorded_twice_rolls_the_write_back(database_url):
    store = Store.open(database_url)
    mid = _model(store)
    first = _rows(1, 5, None)
    with store.write() as conn:
        q.write_pending(conn, [PendingWrite(mid, 1, 2, 5, first)], 5.0)
    again = [r._replace(seq=r.seq + 200) for r in _rows(1, 120, None)]  # reuses keys k-2 and k-4
    with pytest.raises(IntegrityError):
        with store.write() as conn:
            q.write_pending(conn, [PendingWrite(mid, 2, 3, 320, again)], 5.0)
    with store.read() as conn:
        back = list(log_rows_after(conn, mid, 0))
    assert back == [r._replace(received=0.0) for r in first]  # nothing of the refused write remains
    store.close()


def test_drift_events_of_several_models_come_back_in_order_as_written(database_url):
    """The group writer's events go in as one multi-row statement; list_events reads each model's back."""
    store = Store.open(database_url)
    with store.write() as conn:
        ids = [q.insert_model(conn, name, "{}", 0.0, CheckpointRow(1, 0, b"", b"")).id for name in ("m1", "m2")]
    events = {
        ids[0]: [{"seq": 1, "status": "warning", "statistic": "mean_cusum_up", "value": 4.5, "threshold": 4.0,
                  "since": 1, "previous": "ok"},
                 {"seq": 2, "status": "alarm", "statistic": "bde_cusum", "value": None, "threshold": 1.2,
                  "since": None, "previous": "warning", "at": 7.5}],
        ids[1]: [{"seq": 1, "status": "ok", "statistic": "warmup", "value": True, "threshold": None, "since": 3}],
    }
    writes = [PendingWrite(mid, 1, 2, 1, _rows(1, 1, None), drift_events=events[mid]) for mid in ids]
    with store.write() as conn:
        q.write_pending(conn, writes, 5.0)
    with store.read() as conn:
        back = {mid: list_events(conn, mid) for mid in ids}
    first, second = back[ids[0]]
    assert (first["seq"], first["status"], first["statistic"], first["value"], first["threshold"], first["since"],
            first["at"], first["detail"]) == (1, "warning", "mean_cusum_up", 4.5, 4.0, 1, 5.0, {"previous": "ok"})
    assert (second["at"], second["value"], second["since"], second["detail"]) == (7.5, None, None, {"previous": "warning", "at": 7.5})
    assert first["id"] < second["id"]
    (only,) = back[ids[1]]
    assert (only["statistic"], only["value"], only["threshold"], only["since"]) == ("warmup", None, None, 3)  # a bool is no value
    store.close()


def test_keys_of_many_models_are_found_in_one_lookup(database_url):
    """find_keys_many over several models (one statement per 400 pairs) finds exactly the recorded pairs,
    including a key recorded for another model only, across a chunk boundary."""
    store = Store.open(database_url)
    with store.write() as conn:
        ids = [q.insert_model(conn, f"m{i}", "{}", 0.0, CheckpointRow(1, 0, b"", b"")).id for i in range(3)]
    recorded = {}
    with store.write() as conn:
        for n, mid in enumerate(ids):
            rows = [r._replace(key=f"k-{n}-{i}") for i, r in enumerate(_rows(1, 300, None))]
            q.write_pending(conn, [PendingWrite(mid, 1, 2, 300, rows)], 5.0)
            recorded.update({(mid, r.key): r.seq for r in rows})
    wanted = [(mid, f"k-{n}-{i}") for n, mid in enumerate(ids) for i in range(0, 300, 2)]  # 450 recorded pairs
    wanted += [(ids[0], "k-1-0"), (ids[2], "never")]  # another model's key, an unknown one
    with store.read() as conn:
        found = q.find_keys_many(conn, wanted)
    assert found == {pair: recorded[pair] for pair in wanted if pair in recorded}
    assert len(found) == 450
    store.close()
