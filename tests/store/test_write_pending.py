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
from leastwise.store.drift import log_rows_after


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
