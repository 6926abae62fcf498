"""What the store areas need from a database connection, whichever backend it is.

The areas (readings, incidents, outbox, ...) keep one copy of their logic and write their SQL
once, with ``?`` placeholders and the SQL both backends speak (``ON CONFLICT``, ``RETURNING``,
window functions). What differs between SQLite and PostgreSQL -- placeholders, how a transaction
starts, how another connection's commit is noticed, how incident ids are handed out safely, glob
matching, claiming outbox rows -- lives behind this small interface, one class per backend
(``store/sqlite_conn.py``, ``store/pg_conn.py``).
"""

from __future__ import annotations

import sqlite3
import sys
from abc import ABC, abstractmethod
from collections.abc import Iterable, Iterator, Sequence
from contextlib import AbstractContextManager
from typing import Any, Protocol

Params = Sequence[Any] | dict[str, Any]


class Cursor(Protocol):
    """The part of a DB-API cursor the areas use."""

    @property
    def rowcount(self) -> int: ...

    @property
    def description(self) -> Any: ...

    def fetchone(self) -> Any: ...

    def fetchall(self) -> list[Any]: ...

    def __iter__(self) -> Iterator[Any]: ...


class Connection(ABC):
    """One database connection in autocommit mode; writes are grouped by :meth:`transaction`."""

    dialect: str
    """``sqlite`` or ``postgresql``."""
    location: str
    """What to call the database in messages (a file path, or a URL without its password)."""

    @abstractmethod
    def execute(self, sql: str, params: Params = ()) -> Cursor:
        """Run one statement; rows come back as tuples."""

    @abstractmethod
    def executemany(self, sql: str, rows: Iterable[Sequence[Any]]) -> int:
        """Run one statement per row; return how many rows it changed in all."""

    @abstractmethod
    def query(self, sql: str, params: Params = ()) -> list[dict[str, Any]]:
        """Run one query; rows come back as dicts keyed by column name."""

    def insert_id(self, sql: str, params: Params = ()) -> int | None:
        """Run an INSERT and return the ``id`` of the row it made, or None when it made none
        (``ON CONFLICT DO NOTHING``). Both backends speak ``RETURNING``."""
        rows = self.execute(sql + " RETURNING id", params).fetchall()
        return int(rows[0][0]) if rows else None

    @abstractmethod
    def transaction(self) -> AbstractContextManager[None]:
        """All writes inside commit together or not at all; nested blocks are savepoints."""

    @property
    @abstractmethod
    def in_transaction(self) -> bool: ...

    @abstractmethod
    def data_version(self) -> int:
        """A number that moves when another connection has changed what this one may keep a
        copy of (an operator's acknowledgement or shelf)."""

    def announce_change(self) -> None:
        """Call first inside an operator's write (acknowledge, shelve, unshelve): the other
        connections' :meth:`data_version` moves when it commits. SQLite needs nothing: its
        write lock and ``PRAGMA data_version`` do this already."""
        return None

    def lock_numbering(self) -> None:
        """Call inside a transaction before reading the next incident or flood id: nobody else
        takes the same number until this transaction ends. SQLite's write lock does this."""
        return None

    @abstractmethod
    def next_alert_id(self) -> int:
        """The id the next incident gets (call inside the transaction that writes it)."""

    @abstractmethod
    def glob_filter(self, column: str, pattern: str) -> tuple[str, list[Any], bool]:
        """A WHERE fragment for ``fnmatch``-style matching of ``column`` against ``pattern``,
        its parameters, and whether the rows it lets through must still be checked with
        :func:`fnmatch.fnmatchcase` (a fragment may only narrow the rows down)."""

    def blob(self, value: bytes | str | None) -> bytes | str | None:
        """A value for a binary column."""
        return value

    def claim_outbox(self, now: float, *, by: str, lease_s: float, limit: int) -> list[int] | None:
        """Claim up to ``limit`` due outbox rows for ``by`` for ``lease_s`` seconds and return
        their ids, or None when this backend has one sender per database and no claims."""
        return None

    def release_outbox(self, notification_id: int) -> None:
        """Drop the claim on an outbox row once its attempt is recorded."""
        return None

    @abstractmethod
    def schema_version(self) -> int: ...

    @abstractmethod
    def close(self) -> None: ...

    refused_row: tuple[type[BaseException], ...] = ()
    """Errors that mean the database would not take a row (rather than failing itself)."""
    integrity: tuple[type[BaseException], ...] = ()
    """Errors a broken constraint (unique, foreign key) raises."""
    busy: tuple[type[BaseException], ...] = ()
    """Errors an operator's command may meet while the service is busy (retry later)."""


def literal_prefix(pattern: str) -> str:
    """The part of a glob before its first wildcard: every match starts with it.

    >>> literal_prefix("line-1/*"), literal_prefix("[ab]*"), literal_prefix("plain")
    ('line-1/', '', 'plain')
    """
    for i, c in enumerate(pattern):
        if c in "*?[":
            return pattern[:i]
    return pattern


_SQLITE_REFUSED = (
    sqlite3.IntegrityError,
    sqlite3.DataError,
    sqlite3.ProgrammingError,
    sqlite3.InterfaceError,
)


def database_failed(exc: BaseException) -> bool:
    """True when the database itself failed (I/O, disk full, locked, damaged, the server
    gone), False for a row it refused (a broken constraint, a value it cannot hold) and for
    anything else. psycopg is looked at only once something has imported it."""
    if isinstance(exc, _SQLITE_REFUSED):
        return False
    if isinstance(exc, sqlite3.Error | OSError | MemoryError):
        return True
    psycopg = sys.modules.get("psycopg")
    if psycopg is not None and isinstance(exc, psycopg.Error):
        return not isinstance(exc, psycopg.IntegrityError | psycopg.DataError)
    return False
