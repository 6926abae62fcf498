"""SQLite's WAL checkpoints (copying the write-ahead log back into the database file) on a
thread of their own, off the worker's commits. Not to be confused with the monitors'
checkpoints (their saved state, in the ``checkpoints`` table).

Why: by default the connection whose commit takes the log past 1,000 pages runs the checkpoint
inside that commit, and a checkpoint writes and syncs the database file. For the service that
connection is the worker's, so every few seconds at a steady 2,000 readings/s one batch's
commit took hundreds of milliseconds longer than the rest -- the tail of the publish-to-commit
delay. Measured with 400-reading batches on a loaded 2-core machine: commit p99 236-285 ms with
the worker checkpointing, 89-100 ms with this thread doing it.

Nothing changes for durability: a commit is durable against a process crash once it is in the
log (WAL, ``synchronous = NORMAL``), whoever copies it on later. A PASSIVE checkpoint never
waits for the worker or blocks it; what it cannot copy for a reader's sake it copies next time.

References
----------
SQLite documentation, "Write-Ahead Logging", sections 3.4-3.5 (automatic and
application-initiated checkpoints), ``PRAGMA wal_autocheckpoint`` and ``PRAGMA
wal_checkpoint(PASSIVE)``.
"""

from __future__ import annotations

import logging
import sqlite3
import threading
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from limitwatch.store import Store

log = logging.getLogger("limitwatch.store")

__all__ = ["WalCheckpoints"]


class WalCheckpoints:
    """Copies ``store``'s write-ahead log into its database file every ``every_s`` seconds
    from a thread with its own connection, and turns the store connection's automatic
    checkpoints off while it runs (on again at :meth:`stop`)."""

    def __init__(self, store: Store, every_s: float = 1.0) -> None:
        self.store = store
        self.every_s = every_s
        self.runs = 0
        """Checkpoints run so far (for tests and curiosity)."""
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        """Start the thread; call from the thread that owns ``store`` (it sets a pragma)."""
        if self._thread is not None or self.store.path == ":memory:":
            return
        self.store.db.execute("PRAGMA wal_autocheckpoint = 0")
        self._thread = threading.Thread(
            target=self._run, name="limitwatch-wal-checkpoints", daemon=True
        )
        self._thread.start()

    def stop(self) -> None:
        """Stop the thread and give checkpoints back to the store's connection; call from the
        thread that owns ``store``, before closing it."""
        if self._thread is None:
            return
        self._stop.set()
        self._thread.join(timeout=30)
        self._thread = None
        try:
            self.store.db.execute("PRAGMA wal_autocheckpoint = 1000")
        except sqlite3.Error:  # the store is closing anyway
            log.debug("could not restore wal_autocheckpoint", exc_info=True)

    def _run(self) -> None:
        try:
            conn = sqlite3.connect(self.store.path, isolation_level=None, timeout=5.0)
        except sqlite3.Error:
            log.exception("WAL checkpoints: could not open %s", self.store.path)
            return
        try:
            conn.execute("PRAGMA synchronous = NORMAL")
            while not self._stop.wait(self.every_s):
                try:
                    conn.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()
                    self.runs += 1
                except sqlite3.Error as exc:  # a locked or busy file: try again next time
                    log.warning("WAL checkpoint of %s failed: %s", self.store.path, exc)
        finally:
            conn.close()
