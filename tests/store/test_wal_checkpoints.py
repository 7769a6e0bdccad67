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


def _log_frames(store: Store) -> int:
    """Frames in the WAL now (SQLite's ``wal_checkpoint`` result: busy, log frames, frames copied)."""
    with store.engine.connect() as conn:
        row = conn.exec_driver_sql("PRAGMA wal_checkpoint(PASSIVE)").fetchone()
        conn.commit()
    return int(row[1])


def _observe(reg: Registry, start: int, count: int) -> None:
    for i in range(start, start + count):
        reg.observe("m", {"x": [float(i)], "y": 2.0 * i + 1.0, "key": f"k{i}"})


def test_under_steady_writes_the_wal_starts_afresh_instead_of_growing(tmp_path: Path):
    # SQLite reuses the WAL from its start only when a write transaction begins on a fully
    # copied log; the background copy alone never gets there between two commits.
    url = f"sqlite:///{tmp_path / 'r.sqlite3'}"
    store = Store.open(url, background_checkpoints=True, checkpoint_interval=3600.0)  # passes run when the test says
    assert store.checkpointer is not None
    store.checkpointer.restart_frames = 50
    reg = Registry(store)
    reg.create("m", {"features": ["a"], "intercept": False})
    _observe(reg, 0, 200)
    store.checkpointer.background_pass()
    assert store.checkpointer.restart_due  # 200 commits wrote far more than 50 frames
    before = _log_frames(store)
    _observe(reg, 200, 1)  # the writer finishes the copy after this group is answered,
    _observe(reg, 201, 1)  # so by the time the next one is answered it has
    assert not store.checkpointer.restart_due
    assert store.checkpointer.restarts == 1
    _observe(reg, 202, 9)
    after = _log_frames(store)
    assert after < before  # the log holds only the writes since it started afresh
    reg.close()
    again = Registry(Store.open(url))
    assert again.live_state("m").n == 211
    again.close()


def test_a_reader_that_keeps_the_copy_from_finishing_costs_one_attempt_per_mark(tmp_path: Path):
    import sqlite3

    path = tmp_path / "h.sqlite3"
    store = Store.open(f"sqlite:///{path}", background_checkpoints=True, checkpoint_interval=3600.0)
    assert store.checkpointer is not None
    store.checkpointer.restart_frames = 50
    reg = Registry(store)
    reg.create("m", {"features": ["a"], "intercept": False})
    _observe(reg, 0, 5)
    reader = sqlite3.connect(path, isolation_level=None)
    reader.execute("BEGIN")
    assert reader.execute("SELECT count(*) FROM observations").fetchone()[0] == 5  # holds this snapshot
    _observe(reg, 5, 200)
    store.checkpointer.background_pass()
    assert store.checkpointer.restart_due
    _observe(reg, 205, 1)  # the writer tries once after this group; the reader's snapshot keeps frames uncopied
    _observe(reg, 206, 1)  # (done once the next group is answered)
    assert not store.checkpointer.restart_due
    assert store.checkpointer.restarts == 0
    runs = store.checkpointer.runs
    _observe(reg, 207, 4)  # and does not try again after every group
    assert store.checkpointer.runs == runs
    reader.execute("COMMIT")
    reader.close()
    assert reg.live_state("m").n == 211
    reg.close()
