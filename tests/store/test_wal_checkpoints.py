"""SQLite WAL checkpoints off the commit path: commits append to the WAL only, a thread copies it back."""

from __future__ import annotations

import os
import time
from pathlib import Path

from leastwise.models import Registry
from leastwise.store import Store



def test_commits_leave_the_wal_to_the_checkpointer_and_nothing_is_lost(tmp_path: Path):
    url = f"sqlite:///{tmp_path / 'w.sqlite3'}"
    store = Store.open(url, background_checkpoints=True)
    assert store.checkpointer is not None
    with store.engine.connect() as conn:  # SQLite's own setting: 0 = commits never checkpoint
        assert conn.exec_driver_sql("PRAGMA wal_autocheckpoint").scalar() == 0
    store.checkpointer.interval = 3600.0  # only the explicit runs below
    reg = Registry(store)
    reg.create("m", {"features": ["a"], "intercept": False})
    for i in range(1500):  # far beyond the 1000 pages after which a commit would checkpoint itself
        reg.observe("m", {"x": [float(i)], "y": 2.0 * i + 1.0, "key": f"k{i}"})
    wal = tmp_path / "w.sqlite3-wal"
    assert wal.stat().st_size > 1000 * 4096  # the WAL grew: no commit copied it back
    runs = store.checkpointer.runs
    store.checkpointer.checkpoint()
    assert store.checkpointer.runs == runs + 1
    reg.close()  # the last checkpoint truncates the WAL
    assert not wal.exists() or wal.stat().st_size < 1000 * 4096
    again = Registry(Store.open(url))
    assert again.live_state("m").n == 1500
    again.close()


def test_the_checkpointer_runs_by_itself(tmp_path: Path):
    store = Store.open(f"sqlite:///{tmp_path / 'c.sqlite3'}", background_checkpoints=True)
    assert store.checkpointer is not None
    store.checkpointer.interval = 0.05
    deadline = time.monotonic() + 10
    while store.checkpointer.runs == 0 and time.monotonic() < deadline:
        time.sleep(0.05)
    assert store.checkpointer.runs > 0
    store.close()


def test_other_processes_keep_sqlite_defaults(tmp_path: Path):
    store = Store.open(f"sqlite:///{tmp_path / 'd.sqlite3'}")
    assert store.checkpointer is None
    with store.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA wal_autocheckpoint").scalar() == 1000
    store.close()
    assert os.path.exists(tmp_path / "d.sqlite3")
