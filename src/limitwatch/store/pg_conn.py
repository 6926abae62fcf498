"""The PostgreSQL side of :class:`~limitwatch.store.connection.Connection` (psycopg 3).

Several services may share one PostgreSQL database (the Kafka workers must), so three things
that one SQLite writer got for free are explicit here:

* Noticing an operator's change. An acknowledge, shelve or unshelve first moves the counter in
  ``store_changes`` and sends ``NOTIFY limitwatch_changes`` in its own transaction.
  :meth:`PgConnection.data_version` reads that counter -- inside a batch transaction with
  ``FOR SHARE``, so an acknowledgement waits for batches in flight and a batch that starts after
  it sees the new number. (Notifications alone would not do: PostgreSQL delivers them to a
  session only between its transactions, and the lifecycle checks inside the batch's.) Each
  read-write connection LISTENs; :attr:`PgConnection.heard` counts notifications from others,
  for whoever wants to wake on them.
* Incident and flood numbers: the lifecycle names new incidents before they are written, so
  :meth:`lock_numbering` holds a transaction-level advisory lock from reading the next id until
  the batch commits; two services never hand out the same number.
* Outbox delivery by any service: :meth:`claim_outbox` takes due rows with ``FOR UPDATE SKIP
  LOCKED`` and writes a claim in ``outbox_claims`` with the claimer's database session and a
  lease; a row is nobody else's while both live. A service that died (kill -9 included) loses
  its session at once, so its rows are claimed again on the next pass; the lease bounds what a
  hung service, or one on a machine that vanished, can hold.

References
----------
PostgreSQL 15 documentation: "NOTIFY" (notifications are delivered between transactions),
"SELECT ... The Locking Clause" (SKIP LOCKED, FOR SHARE), "Advisory Locks", "INSERT ... ON
CONFLICT" (the conflicting row's newest version is what ``DO UPDATE ... WHERE`` sees).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from functools import lru_cache
from typing import Any

import psycopg
from psycopg.conninfo import conninfo_to_dict
from psycopg.pq import TransactionStatus
from psycopg.rows import dict_row

from limitwatch.store.connection import Connection, Cursor, Params, literal_prefix
from limitwatch.store.errors import NotADatabase, SchemaTooNew, SchemaTooOld, StoreUnavailable
from limitwatch.store.location import redacted

CHANNEL = "limitwatch_changes"
_NUMBERING_LOCK = 0x6C77_6964  # advisory lock key for incident and flood numbers


@lru_cache(maxsize=2048)
def pg_sql(sql: str) -> str:
    """The areas' ``?`` placeholders as psycopg's ``%s`` (a literal ``%`` doubled), leaving
    quoted text alone.

    >>> pg_sql("SELECT '?', x FROM t WHERE a = ? AND b LIKE 'a%'")
    "SELECT '?', x FROM t WHERE a = %s AND b LIKE 'a%%'"
    """
    out: list[str] = []
    quoted = False
    for ch in sql:
        if ch == "'":
            quoted = not quoted
            out.append(ch)
        elif ch == "?" and not quoted:
            out.append("%s")
        elif ch == "%":
            out.append("%%")
        else:
            out.append(ch)
    return "".join(out)


class PgConnection(Connection):
    """One psycopg connection in autocommit mode; :meth:`transaction` begins and commits."""

    dialect = "postgresql"
    refused_row = (psycopg.IntegrityError, psycopg.DataError)
    integrity = (psycopg.IntegrityError,)
    busy = (psycopg.OperationalError,)

    def __init__(self, conn: psycopg.Connection[Any], location: str, *, read_only: bool) -> None:
        self.conn = conn
        self.location = location
        self.read_only = read_only
        self.heard = 0
        """Notifications of an operator's change from other connections, so far."""
        if not read_only:
            pid = conn.info.backend_pid

            def count(notice: psycopg.Notify) -> None:
                if notice.pid != pid:
                    self.heard += 1

            conn.add_notify_handler(count)
            conn.execute(f"LISTEN {CHANNEL}")

    @classmethod
    def connect(cls, url: str, *, read_only: bool = False) -> PgConnection:
        """Connect to ``url``; a read-only connection cannot change anything."""
        location = redacted(url)
        try:
            # Keep the URL's own options (a search_path, say): a keyword would replace them.
            given = conninfo_to_dict(url).get("options")
            extra = "-c default_transaction_read_only=on" if read_only else None
            options = " ".join(str(o) for o in (given, extra) if o) or None
            conn = psycopg.connect(
                url,
                autocommit=True,
                options=options,
                connect_timeout=10,
                application_name=("limitwatch (read-only)" if read_only else "limitwatch"),
            )
        except psycopg.OperationalError as exc:
            words = " ".join(str(exc).split())
            raise StoreUnavailable(
                f"cannot connect to the PostgreSQL database {location} ({words}). Check the "
                "URL, that the server runs and accepts this user; a password goes in "
                "PGPASSWORD or ~/.pgpass rather than the URL."
            ) from None
        except psycopg.ProgrammingError as exc:  # a malformed URL or option
            raise NotADatabase(f"{location} is not a usable PostgreSQL URL ({exc})") from None
        return cls(conn, location, read_only=read_only)

    def execute(self, sql: str, params: Params = ()) -> Cursor:
        if not params:
            return self.conn.execute(sql)
        return self.conn.execute(pg_sql(sql), params)

    def executemany(self, sql: str, rows: Iterable[Sequence[Any]]) -> int:
        rows = list(rows)
        if not rows:
            return 0
        with self.conn.cursor() as cur:
            cur.executemany(pg_sql(sql), rows)
            return max(cur.rowcount, 0)

    def query(self, sql: str, params: Params = ()) -> list[dict[str, Any]]:
        with self.conn.cursor(row_factory=dict_row) as cur:
            if params:
                cur.execute(pg_sql(sql), params)
            else:
                cur.execute(sql)
            return cur.fetchall()

    @contextmanager
    def transaction(self) -> Iterator[None]:
        with self.conn.transaction():
            yield

    @property
    def in_transaction(self) -> bool:
        return self.conn.info.transaction_status != TransactionStatus.IDLE

    def data_version(self) -> int:
        lock = " FOR SHARE" if self.in_transaction and not self.read_only else ""
        row = self.execute(f"SELECT version FROM store_changes WHERE id = 1{lock}").fetchone()
        return int(row[0])

    def announce_change(self) -> None:
        row = self.execute(
            "UPDATE store_changes SET version = version + 1 WHERE id = 1 RETURNING version"
        ).fetchone()
        self.execute("SELECT pg_notify(?, ?)", (CHANNEL, str(row[0])))

    def lock_numbering(self) -> None:
        # The change counter first, as every batch takes it: locks always in the same order,
        # so an acknowledgement waiting for one batch cannot deadlock with another.
        self.data_version()
        self.execute("SELECT pg_advisory_xact_lock(?)", (_NUMBERING_LOCK,))

    def next_alert_id(self) -> int:
        self.lock_numbering()
        return int(self.execute("SELECT coalesce(max(id), 0) + 1 FROM alerts").fetchone()[0])

    def glob_filter(self, column: str, pattern: str) -> tuple[str, list[Any], bool]:
        prefix = literal_prefix(pattern)
        if prefix == pattern:
            return f"{column} = ?", [pattern], False
        if prefix:
            return f"starts_with({column}, ?)", [prefix], True
        return "TRUE", [], True

    def blob(self, value: bytes | str | None) -> bytes | str | None:
        return value.encode() if isinstance(value, str) else value

    def claim_outbox(self, now: float, *, by: str, lease_s: float, limit: int) -> list[int] | None:
        with self.transaction():
            rows = self.execute(
                """WITH due AS (
                    SELECT o.id FROM outbox o
                    WHERE o.delivered_at IS NULL AND o.next_attempt_at <= ?
                        AND (o.expires_at IS NULL OR o.expires_at > ?)
                        AND NOT EXISTS (SELECT 1 FROM outbox_claims c
                            WHERE c.outbox_id = o.id AND c.lease_until > ?
                                AND c.backend_pid IN (SELECT pid FROM pg_stat_activity))
                    ORDER BY o.next_attempt_at, o.id LIMIT ?
                    FOR UPDATE OF o SKIP LOCKED
                )
                INSERT INTO outbox_claims (outbox_id, claimed_by, backend_pid, lease_until)
                SELECT id, ?, pg_backend_pid(), ? FROM due
                ON CONFLICT (outbox_id) DO UPDATE SET claimed_by = excluded.claimed_by,
                    backend_pid = excluded.backend_pid, lease_until = excluded.lease_until
                WHERE outbox_claims.lease_until <= ?
                    OR outbox_claims.backend_pid NOT IN (SELECT pid FROM pg_stat_activity)
                RETURNING outbox_id""",
                (now, now, now, limit, by, now + lease_s, now),
            ).fetchall()
        return [int(r[0]) for r in rows]

    def release_outbox(self, notification_id: int) -> None:
        self.execute("DELETE FROM outbox_claims WHERE outbox_id = ?", (notification_id,))

    def check_readable(self, known: int) -> None:
        """A read-only look needs a limitwatch database of exactly the schema this code reads."""
        try:
            version = self.schema_version()
        except psycopg.errors.UndefinedTable:
            raise NotADatabase(
                f"{self.location} is not a limitwatch database (it has no schema_migrations "
                "table); check the URL, or start the service once to create the schema"
            ) from None
        if version > known:
            raise SchemaTooNew(
                f"{self.location} has schema version {version}, newer than this limitwatch "
                f"knows ({known}); upgrade limitwatch"
            )
        if version < known:
            raise SchemaTooOld(
                f"{self.location} has schema version {version}, older than this limitwatch "
                f"reads ({known}); the service upgrades it when it starts, and so does any "
                "command that changes something (ack, shelve, unshelve, baseline refit)"
            )

    def schema_version(self) -> int:
        row = self.execute("SELECT max(version) FROM schema_migrations").fetchone()
        return int(row[0] or 0)

    def close(self) -> None:
        self.conn.close()
