"""The connection under every store area: opening (pragmas, migrations), transactions and
the two query helpers the areas share."""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from fnmatch import fnmatchcase
from pathlib import Path
from typing import Any, Self

import sqlite_utils

from limitwatch.store.errors import (
    NotADatabase,
    SchemaTooNew,
    SchemaTooOld,
    StoreError,
)
from limitwatch.store.schema import (
    MIGRATIONS,
    _create_private,
    _immediate,
    _recorded_version,
    migrate,
)

_CHUNK = 500  # parameters per IN (...) list; far below SQLite's limit, keeps statements small


class StoreBase:
    """Opening, transactions and query helpers; the data areas are mixins over this."""

    def __init__(self, db: sqlite_utils.Database, path: str) -> None:
        self.db = db
        self.path = path
        self._rollback_listeners: list[Callable[[], None]] = []

    # ---- opening and transactions

    @classmethod
    def open(
        cls, path: str | Path, *, now: float | None = None, busy_timeout_s: float = 5.0
    ) -> Self:
        """Open (creating if needed) and upgrade the database at ``path``.

        Pragmas are set before any transaction: WAL and the busy timeout cannot take effect
        inside one. ``now`` is recorded as the time any migration was applied.
        """
        path = str(path)
        if path != ":memory:":
            Path(path).parent.mkdir(parents=True, exist_ok=True)
            _create_private(path)
        db = sqlite_utils.Database(path, execute_plugins=False)
        # Autocommit: Python's sqlite3 would otherwise open a transaction implicitly before any
        # write and keep it open until someone commits -- a bare UPDATE would then turn every
        # later transaction() into a savepoint that never commits. Transactions here are always
        # explicit (BEGIN IMMEDIATE ... COMMIT in transaction()).
        db.conn.isolation_level = None
        try:
            db.execute(f"PRAGMA busy_timeout = {int(busy_timeout_s * 1000)}")
            db.enable_wal()
            db.execute("PRAGMA synchronous = NORMAL")
            db.execute("PRAGMA foreign_keys = ON")
        except sqlite3.DatabaseError as exc:
            db.close()
            raise NotADatabase(
                f"{path} could not be opened as an SQLite database ({exc}). Check the database "
                "path: it should name a limitwatch database file or a new file to create."
            ) from exc
        db.register_function(fnmatchcase, deterministic=True, name="glob_match")
        try:
            migrate(db, now=now, source=path)
        except BaseException:
            db.close()
            raise
        return cls(db, path)

    @classmethod
    def open_read_only(cls, path: str | Path, *, described: str | None = None) -> Self:
        """Open an existing database to read only (SQLite ``mode=ro``): a look at it cannot
        change anything the service depends on, nor upgrade its schema behind its back.
        ``described`` names the file in messages (e.g. where the path came from).

        Raises :class:`NotADatabase`, :class:`SchemaTooNew` or :class:`SchemaTooOld`.
        """
        conn, version = connect_checked(path, described=described)
        known = MIGRATIONS[-1].version
        if version < known:
            conn.close()
            raise SchemaTooOld(
                f"{path} has schema version {version}, older than this limitwatch "
                f"reads ({known}); the service upgrades it when it starts, and so does any "
                "command that changes something (ack, shelve, unshelve, baseline refit)"
            )
        db = sqlite_utils.Database(conn, execute_plugins=False)
        db.register_function(fnmatchcase, deterministic=True, name="glob_match")
        return cls(db, str(path))

    def close(self) -> None:
        self.db.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[Self]:
        """All writes inside commit together or not at all.

        The outermost block starts with BEGIN IMMEDIATE, so the write lock is taken before the
        first read and the batch sees no concurrent writer; nested blocks become savepoints.
        """
        try:
            with _immediate(self.db.conn):
                yield self
        except BaseException:
            # Whatever the block wrote is gone (rolled back to its savepoint, or the whole
            # transaction); whoever keeps a copy of store contents must drop it.
            for forget in self._rollback_listeners:
                forget()
            raise

    def on_rollback(self, forget: Callable[[], None]) -> None:
        """Call ``forget`` whenever a ``transaction()`` block ends in an exception."""
        self._rollback_listeners.append(forget)

    def data_version(self) -> int:
        """A number that changes whenever another connection (an operator's command, the
        outbox worker) commits to the database; this connection's own commits leave it alone.
        What this connection remembers of the database is good while it stays the same."""
        return int(self.db.conn.execute("PRAGMA data_version").fetchone()[0])

    @property
    def journal_mode(self) -> str:
        return self.db.journal_mode

    def schema_version(self) -> int:
        return _recorded_version(self.db)

    def _all(self, sql: str, params: Sequence[Any] | dict[str, Any] = ()) -> list[dict]:
        return list(self.db.query(sql, params))

    def _one(self, sql: str, params: Sequence[Any] | dict[str, Any] = ()) -> dict | None:
        rows = self._all(sql, params)
        return rows[0] if rows else None

    # ---- readings, streams, checkpoints

    def _changed_here(self) -> None:
        """This connection changed incidents outside the lifecycle (an acknowledgement): whoever
        keeps a copy must drop it, as after a rollback. Other connections' commits are seen
        through :meth:`data_version`."""
        for forget in self._rollback_listeners:
            forget()


def inserted_id(cursor: sqlite3.Cursor) -> int:
    """The rowid the INSERT just run on ``cursor`` made. sqlite3 types it as optional because it
    is None before any INSERT; after one it is the new row's id."""
    rowid = cursor.lastrowid
    if rowid is None:
        raise StoreError("the INSERT made no row; this is a bug in limitwatch, please report it")
    return rowid


def connect_checked(
    path: str | Path, *, described: str | None = None
) -> tuple[sqlite3.Connection, int]:
    """A read-only connection to an existing file, and its schema version, once it is known to
    be a limitwatch database no newer than this code. The schema's owner checks this, so every
    reader refuses a wrong file with the same words."""
    path = Path(path)
    described = described or str(path)
    conn = sqlite3.connect(path.resolve().as_uri() + "?mode=ro", uri=True)
    try:
        conn.execute("PRAGMA busy_timeout = 5000")
        row = conn.execute("SELECT max(version) FROM schema_migrations").fetchone()
    except sqlite3.DatabaseError as exc:
        conn.close()
        what = "a limitwatch database" if "no such table" in str(exc) else "an SQLite database"
        raise NotADatabase(f"{described} is not {what} ({exc}); check the path") from None
    version = int(row[0] or 0)
    known = MIGRATIONS[-1].version
    if version > known:
        conn.close()
        raise SchemaTooNew(
            f"{path} has schema version {version}, newer than this limitwatch knows "
            f"({known}); upgrade limitwatch"
        )
    return conn, version
