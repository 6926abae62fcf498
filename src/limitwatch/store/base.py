"""The connection under every store area: opening (pragmas, migrations), transactions and
the two query helpers the areas share.

The areas speak to the database only through :attr:`StoreBase.sql`, a
:class:`~limitwatch.store.connection.Connection` for SQLite or PostgreSQL, so each area's logic
exists once; :meth:`StoreBase.open` opens an SQLite file and :meth:`StoreBase.open_postgresql` a
PostgreSQL database (``limitwatch.store.open_store`` picks one from a store URL)."""

from __future__ import annotations

import sqlite3
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from fnmatch import fnmatchcase
from pathlib import Path
from typing import Any, Self

import sqlite_utils

from limitwatch.store.connection import Connection
from limitwatch.store.errors import (
    NotADatabase,
    SchemaTooNew,
    SchemaTooOld,
    StoreError,
)
from limitwatch.store.schema import (
    MIGRATIONS,
    _create_private,
    migrate,
)
from limitwatch.store.sqlite_conn import SqliteConnection

_CHUNK = 500  # parameters per IN (...) list; far below SQLite's limit, keeps statements small


class StoreBase:
    """Opening, transactions and query helpers; the data areas are mixins over this."""

    def __init__(self, sql: Connection) -> None:
        self.sql = sql
        self.path = sql.location
        """The SQLite file, or the PostgreSQL URL without its password (for messages)."""
        self._rollback_listeners: list[Callable[[], None]] = []

    @property
    def backend(self) -> str:
        """``sqlite`` or ``postgresql``."""
        return self.sql.dialect

    @property
    def db(self) -> sqlite_utils.Database:
        """The SQLite database under an SQLite store (for tests and SQLite-only tools)."""
        if not isinstance(self.sql, SqliteConnection):
            raise StoreError(f"{self.path} is a {self.sql.dialect} store, not an SQLite file")
        return self.sql.db

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
        return cls(SqliteConnection(db, path))

    @classmethod
    def open_postgresql(
        cls, url: str, *, now: float | None = None, read_only: bool = False
    ) -> Self:
        """Connect to the PostgreSQL database at ``url``; upgrade its schema unless
        ``read_only`` (then a schema older or newer than this code is refused, as for a
        read-only look at an SQLite file)."""
        from limitwatch.store.pg_conn import PgConnection
        from limitwatch.store.pgschema import PG_MIGRATIONS, pg_migrate

        conn = PgConnection.connect(url, read_only=read_only)
        try:
            if read_only:
                conn.check_readable(PG_MIGRATIONS[-1].version)
            else:
                pg_migrate(conn, now=now, source=conn.location)
        except BaseException:
            conn.close()
            raise
        return cls(conn)

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
        return cls(SqliteConnection(db, str(path)))

    def close(self) -> None:
        self.sql.close()

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
            with self.sql.transaction():
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
        """A number that changes whenever another connection commits a change this one may
        keep a copy of: on SQLite any commit by another connection (an operator's command, the
        outbox worker), on PostgreSQL an operator's acknowledge, shelve or unshelve. What this
        connection remembers of the database is good while it stays the same."""
        return self.sql.data_version()

    @property
    def journal_mode(self) -> str:
        return self.db.journal_mode if self.sql.dialect == "sqlite" else self.sql.dialect

    def schema_version(self) -> int:
        return self.sql.schema_version()

    def _all(self, sql: str, params: Sequence[Any] | dict[str, Any] = ()) -> list[dict]:
        return self.sql.query(sql, params)

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


def inserted(row_id: int | None) -> int:
    """The id an INSERT ... RETURNING id made (it always makes one where this is used)."""
    if row_id is None:
        raise StoreError("the INSERT made no row; this is a bug in limitwatch, please report it")
    return row_id


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
