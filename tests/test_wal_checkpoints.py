"""WAL checkpoints on a thread of their own (limitwatch.store.wal): the store's connection no
longer copies the log into the database file inside its commits, and the log still stays
bounded because the thread copies it (SQLite documentation, "Write-Ahead Logging", 3.4-3.5:
after a complete checkpoint the next writer starts the log from its beginning again)."""

from __future__ import annotations

import os
import time
from pathlib import Path

from limitwatch.store import Store
from limitwatch.store.wal import WalCheckpoints
from tests.test_store import T0, commit_batch, outcome


def autocheckpoint(store: Store) -> int:
    return int(store.db.execute("PRAGMA wal_autocheckpoint").fetchone()[0])


def write(store: Store, batches: int, wal: WalCheckpoints | None) -> None:
    """Batches of 2,000 readings (a few hundred log pages each), each followed by a
    checkpoint of the thread when it runs."""
    for b in range(batches):
        outcomes = [outcome(f"s{i % 500}", T0 + b * 10 + i / 1000, float(i)) for i in range(2000)]
        commit_batch(store, outcomes, now=T0)
        if wal is not None:
            runs = wal.runs
            deadline = time.monotonic() + 20
            while wal.runs <= runs + 1 and time.monotonic() < deadline:
                time.sleep(0.01)


def wal_size(path: Path) -> int:
    return os.path.getsize(f"{path}-wal")


def test_the_thread_keeps_the_log_bounded_where_the_store_no_longer_copies_it(tmp_path):
    ours = Store.open(tmp_path / "ours.db", now=T0)
    wal = WalCheckpoints(ours, every_s=0.02)
    wal.start()
    assert autocheckpoint(ours) == 0
    write(ours, 12, wal)
    assert wal.runs > 0
    bounded = wal_size(tmp_path / "ours.db")
    wal.stop()
    assert autocheckpoint(ours) == 1000  # SQLite's default, back for whoever goes on
    ours.close()

    # The same writes with automatic checkpoints off and no thread: the log only grows.
    alone = Store.open(tmp_path / "alone.db", now=T0)
    alone.db.execute("PRAGMA wal_autocheckpoint = 0")
    write(alone, 12, None)
    grown = wal_size(tmp_path / "alone.db")
    alone.close()
    assert bounded * 3 < grown, (bounded, grown)


def test_stop_ends_the_thread_and_an_unstarted_one_stops_quietly(tmp_path):
    store = Store.open(tmp_path / "s.db", now=T0)
    WalCheckpoints(store).stop()  # never started: nothing to do
    wal = WalCheckpoints(store, every_s=0.01)
    wal.start()
    thread = wal._thread
    assert thread is not None and thread.is_alive()
    wal.stop()
    assert not thread.is_alive()
    store.close()
