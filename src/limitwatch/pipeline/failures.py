"""When a failure is the store's own, and how an unexpected one is put into words.

A failure of the store itself means the monitors are ahead of the database and only a restart
from the checkpoints is safe; anything else (a refused row, a bug for one reading) concerns one
item, which applying the batch again one item at a time isolates.
"""

from __future__ import annotations

import sqlite3


class PipelineBroken(RuntimeError):
    """A commit failed after monitors moved on; only a restart from the checkpoints is safe."""


_ROW_REFUSED = (
    sqlite3.IntegrityError,
    sqlite3.DataError,
    sqlite3.ProgrammingError,
    sqlite3.InterfaceError,
)
"""What the database says about a row it will not take, as opposed to failing itself."""


def store_failed(exc: BaseException) -> bool:
    """True when the store itself failed (I/O, disk full, locked, damaged), so that applying
    the items again one at a time could not help; False for a refused row or any failure of
    our own code, which one item may cause."""
    if isinstance(exc, _ROW_REFUSED):
        return False
    return isinstance(exc, sqlite3.Error | OSError | MemoryError)


def failure_words(exc: BaseException) -> str:
    """An unexpected exception in words, bounded: the kind and the start of its message."""
    text = f"{type(exc).__name__}: {exc}"
    return text if len(text) <= 300 else text[:297] + "..."
