"""One running service per database file (SQLite; a PostgreSQL store is shared and takes none).

Two services on one file would each evaluate the same streams from their own memory, and their
outbox workers would deliver the same notifications twice. ``limitwatch serve`` therefore holds
an exclusive lock on ``<database>.lock`` for as long as it runs. The lock is the kernel's
(``flock``): it goes with the process however the process ends, ``kill -9`` included, so a
crash never leaves a stale lock behind to clear by hand. Operator commands do not take it; they
are brief readers and writers that SQLite itself keeps in order.

The lock file is created 0600, like the database: it holds only a process id, but nothing
another account could learn from the database folder needs to be readable by it.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path


class LockError(RuntimeError):
    """The service cannot take its database's lock; the message says why and what to do."""


class AlreadyRunning(LockError):
    """Another service holds the database's lock."""


class CannotShare(LockError):
    """A source that shares its store with other workers (Kafka) was configured beside
    other sources, which assume the service is the store's only writer."""


class InstanceLock:
    """The lock for one database file; ``acquire`` once, ``release`` at the end."""

    def __init__(self, database: str | Path) -> None:
        self.database = Path(database)
        self.path = self.database.with_name(self.database.name + ".lock")
        self._fd: int | None = None

    def acquire(self, *, shared: bool = False) -> None:
        """Take the lock and write our process id into the file, or raise
        :class:`AlreadyRunning` naming the process that has it.

        ``shared``: for the workers of one Kafka consumer group, which share the file (each
        owns its partitions' streams, and the store fences every batch by owner and
        generation). Shared holders exclude a lone service, and a lone service them."""
        folder = self.path.parent
        if not folder.is_dir():
            raise LockError(
                f"the database folder {folder} does not exist; create it (owned by the "
                "service's user) or change [store] path"
            )
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        except OSError as exc:
            raise LockError(
                f"cannot create or open the lock file {self.path} ({exc.strerror}); the "
                f"service's user needs to be able to write in {folder}"
            ) from None
        try:
            fcntl.flock(fd, (fcntl.LOCK_SH if shared else fcntl.LOCK_EX) | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.read(fd, 32).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise AlreadyRunning(
                f"another limitwatch service (process {holder}) is already running on "
                f"{self.database}; stop it first, or give this one its own [store] path"
            ) from None
        if not shared:  # shared holders would overwrite each other's process id
            os.ftruncate(fd, 0)
            os.write(fd, f"{os.getpid()}\n".encode())
        self._fd = fd

    def release(self) -> None:
        if self._fd is not None:
            fcntl.flock(self._fd, fcntl.LOCK_UN)
            os.close(self._fd)
            self._fd = None
