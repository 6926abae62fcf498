"""The SQLite side of :class:`~limitwatch.store.connection.Connection`: one file, one writer
at a time (``BEGIN IMMEDIATE``), other connections' commits seen through ``PRAGMA
data_version``."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

import sqlite_utils

from limitwatch.store.connection import _SQLITE_REFUSED, Connection, Cursor, Params
from limitwatch.store.schema import _immediate, _recorded_version


class SqliteConnection(Connection):
    """A :class:`sqlite_utils.Database` in autocommit mode, as the store opens it."""

    dialect = "sqlite"
    refused_row = _SQLITE_REFUSED
    integrity = (sqlite3.IntegrityError,)
    busy = (sqlite3.OperationalError,)

    def __init__(self, db: sqlite_utils.Database, location: str) -> None:
        self.db = db
        self.location = location

    def execute(self, sql: str, params: Params = ()) -> Cursor:
        return self.db.conn.execute(sql, params)

    def executemany(self, sql: str, rows: Iterable[Sequence[Any]]) -> int:
        return int(self.db.conn.executemany(sql, rows).rowcount)

    def query(self, sql: str, params: Params = ()) -> list[dict[str, Any]]:
        return list(self.db.query(sql, params))

    @contextmanager
    def transaction(self) -> Iterator[None]:
        with _immediate(self.db.conn):
            yield

    @property
    def in_transaction(self) -> bool:
        return self.db.conn.in_transaction

    def data_version(self) -> int:
        return int(self.db.conn.execute("PRAGMA data_version").fetchone()[0])

    def next_alert_id(self) -> int:
        # AUTOINCREMENT's own counter too: an id is never handed out twice, even after a delete.
        row = self.db.execute(
            """SELECT max(coalesce((SELECT seq FROM sqlite_sequence WHERE name = 'alerts'), 0),
                coalesce((SELECT max(id) FROM alerts), 0))"""
        ).fetchone()
        return int(row[0]) + 1

    def glob_filter(self, column: str, pattern: str) -> tuple[str, list[Any], bool]:
        return f"glob_match({column}, ?)", [pattern], False

    def schema_version(self) -> int:
        return _recorded_version(self.db)

    def close(self) -> None:
        self.db.close()
