"""The schema as numbered migrations, and the upgrade that applies them; each step runs in
one transaction and is recorded in the database, so a half-upgraded file cannot exist."""

from __future__ import annotations

import contextlib
import itertools
import json
import os
import sqlite3
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import sqlite_utils

from limitwatch.store.errors import (
    SchemaTooNew,
)
from limitwatch.store.records import (
    DEAD_LETTER_KEEP_BYTES,
    SEVERITIES,
    SYSTEM_ACTOR,
    _sha256_hex,
)

_savepoint_names = itertools.count(1)


@dataclass(frozen=True, slots=True)
class Migration:
    """One numbered step of the schema. Steps are only ever appended, never edited."""

    version: int
    name: str
    statements: tuple[str, ...]
    then: Callable[[sqlite_utils.Database, float | None], None] | None = None
    """Python run after the statements, in the same transaction, for data changes SQL alone
    would make hard to read (e.g. merging rows)."""


MIGRATIONS: tuple[Migration, ...] = (
    Migration(
        1,
        "streams, baselines, readings, checkpoints, dead letters",
        (
            """CREATE TABLE streams (
                id TEXT PRIMARY KEY,
                first_seen REAL NOT NULL,
                last_seen REAL NOT NULL,
                last_time REAL,
                last_value REAL,
                last_index INTEGER,
                phase TEXT
            )""",
            """CREATE TABLE baselines (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                stream TEXT NOT NULL,
                version INTEGER NOT NULL CHECK (version >= 1),
                created_at REAL NOT NULL,
                created_by TEXT NOT NULL,
                reason TEXT NOT NULL,
                method TEXT NOT NULL,
                first_index INTEGER,
                last_index INTEGER,
                first_time REAL,
                last_time REAL,
                excluded_json TEXT NOT NULL DEFAULT '[]',
                numbers_json TEXT NOT NULL,
                UNIQUE (stream, version)
            )""",
            """CREATE TABLE readings (
                stream TEXT NOT NULL,
                time REAL NOT NULL,
                value REAL NOT NULL,
                seq INTEGER,
                idx INTEGER,
                phase TEXT,
                z REAL,
                mr REAL,
                PRIMARY KEY (stream, time)
            )""",
            "CREATE INDEX readings_by_time ON readings (time)",
            """CREATE TABLE checkpoints (
                stream TEXT PRIMARY KEY,
                saved_at REAL NOT NULL,
                state_json TEXT NOT NULL
            )""",
            """CREATE TABLE dead_letters (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                source TEXT NOT NULL,
                received_at REAL NOT NULL,
                reason TEXT NOT NULL,
                payload BLOB
            )""",
            "CREATE INDEX dead_letters_by_time ON dead_letters (received_at)",
        ),
    ),
    Migration(
        2,
        "alerts, alert events, shelves, notification outbox",
        (
            """CREATE TABLE alerts (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                stream TEXT NOT NULL,
                rule TEXT NOT NULL,
                state TEXT NOT NULL CHECK (state IN ('open', 'acknowledged', 'cleared')),
                severity TEXT NOT NULL,
                opened_at REAL NOT NULL,
                first_time REAL NOT NULL,
                first_index INTEGER,
                first_value REAL,
                last_time REAL NOT NULL,
                last_index INTEGER,
                last_value REAL,
                signal_count INTEGER NOT NULL DEFAULT 1,
                quiet_count INTEGER NOT NULL DEFAULT 0,
                seen_time REAL NOT NULL,
                signal_json TEXT NOT NULL DEFAULT '{}',
                acknowledged_at REAL,
                acknowledged_by TEXT,
                ack_note TEXT,
                cleared_at REAL,
                notified_at REAL,
                last_notice_at REAL,
                reminders INTEGER NOT NULL DEFAULT 0,
                escalated_at REAL,
                suppressed_until REAL
            )""",
            # At most one live alert per stream and rule: a further signal updates it.
            """CREATE UNIQUE INDEX alerts_one_live ON alerts (stream, rule)
                WHERE state != 'cleared'""",
            "CREATE INDEX alerts_by_state ON alerts (state, stream)",
            "CREATE INDEX alerts_by_stream_rule ON alerts (stream, rule, id)",
            """CREATE TABLE alert_events (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                alert_id INTEGER NOT NULL REFERENCES alerts (id),
                kind TEXT NOT NULL,
                time REAL NOT NULL,
                actor TEXT NOT NULL,
                note TEXT,
                data_json TEXT
            )""",
            "CREATE INDEX alert_events_by_alert ON alert_events (alert_id, id)",
            """CREATE TRIGGER alert_events_append_only_update BEFORE UPDATE ON alert_events
            BEGIN
                SELECT RAISE(ABORT, 'alert_events is append-only: add a new event instead');
            END""",
            """CREATE TRIGGER alert_events_append_only_delete BEFORE DELETE ON alert_events
            BEGIN
                SELECT RAISE(ABORT, 'alert_events is append-only: events are never deleted');
            END""",
            """CREATE TABLE shelves (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                stream TEXT NOT NULL,
                rule TEXT,
                created_at REAL NOT NULL,
                until REAL NOT NULL,
                reason TEXT NOT NULL,
                shelved_by TEXT NOT NULL,
                ended_at REAL,
                ended_by TEXT
            )""",
            "CREATE INDEX shelves_live ON shelves (stream, until) WHERE ended_at IS NULL",
            """CREATE TABLE outbox (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                idempotency_key TEXT NOT NULL UNIQUE,
                alert_id INTEGER REFERENCES alerts (id),
                route TEXT NOT NULL,
                payload_json TEXT NOT NULL,
                created_at REAL NOT NULL,
                next_attempt_at REAL NOT NULL,
                attempts INTEGER NOT NULL DEFAULT 0,
                last_error TEXT,
                delivered_at REAL,
                expires_at REAL
            )""",
            "CREATE INDEX outbox_due ON outbox (next_attempt_at) WHERE delivered_at IS NULL",
        ),
    ),
    Migration(
        3,
        "file offsets",
        (
            """CREATE TABLE file_offsets (
                source TEXT NOT NULL,
                file_id TEXT NOT NULL,
                byte_offset INTEGER NOT NULL CHECK (byte_offset >= 0),
                updated_at REAL NOT NULL,
                PRIMARY KEY (source, file_id)
            )""",
        ),
    ),
    Migration(
        4,
        "the rules that signalled on each reading",
        (
            # Space-separated rule ids; '' when none did. NULL marks readings stored before this
            # column existed, for which only the alerts tell (their first and last signal).
            "ALTER TABLE readings ADD COLUMN signals TEXT",
        ),
    ),
    Migration(
        5,
        "dead letters keep a bounded prefix with the payload's size and SHA-256",
        (
            "ALTER TABLE dead_letters ADD COLUMN payload_size INTEGER",
            "ALTER TABLE dead_letters ADD COLUMN payload_sha256 TEXT",
            # Rows written before: measure and hash them whole, then cut the long ones down.
            """UPDATE dead_letters SET
                payload_size = length(CAST(payload AS BLOB)),
                payload_sha256 = lw_sha256(payload)
            WHERE payload IS NOT NULL""",
            f"""UPDATE dead_letters
            SET payload = substr(CAST(payload AS BLOB), 1, {DEAD_LETTER_KEEP_BYTES})
            WHERE length(CAST(payload AS BLOB)) > {DEAD_LETTER_KEEP_BYTES}""",
        ),
    ),
    Migration(
        6,
        "incidents: one live alert per stream, with the rules that joined it",
        (
            # Each alert row is now an incident: every rule that signals while it is live joins
            # it. incident_rules keeps the rule-level detail (how often, first and last reading).
            """CREATE TABLE incident_rules (
                alert_id INTEGER NOT NULL REFERENCES alerts (id),
                rule TEXT NOT NULL,
                severity TEXT NOT NULL,
                signal_count INTEGER NOT NULL,
                first_time REAL NOT NULL,
                first_index INTEGER,
                first_value REAL,
                last_time REAL NOT NULL,
                last_index INTEGER,
                last_value REAL,
                signal_json TEXT NOT NULL DEFAULT '{}',
                PRIMARY KEY (alert_id, rule)
            )""",
            """INSERT INTO incident_rules (alert_id, rule, severity, signal_count, first_time,
                first_index, first_value, last_time, last_index, last_value, signal_json)
            SELECT id, rule, severity, signal_count, first_time, first_index, first_value,
                last_time, last_index, last_value, signal_json FROM alerts""",
            # The largest |z| of a reading while the incident was live (the worst zone reached).
            "ALTER TABLE alerts ADD COLUMN worst_z REAL",
            # Time of the stream's last reading while a stale check finds it silent, else NULL.
            "ALTER TABLE alerts ADD COLUMN silent_since REAL",
            "ALTER TABLE alerts ADD COLUMN ack_announced_at REAL",
            # The severity the last opened/raised notification told; a higher one owes another.
            "ALTER TABLE alerts ADD COLUMN announced_severity TEXT",
            "UPDATE alerts SET announced_severity = severity WHERE notified_at IS NOT NULL",
            # Acknowledged before the upgrade: nothing left to announce about it.
            """UPDATE alerts SET ack_announced_at = acknowledged_at
            WHERE acknowledged_at IS NOT NULL""",
            "ALTER TABLE alerts ADD COLUMN cleared_announced_at REAL",
            "ALTER TABLE alerts ADD COLUMN merged_into INTEGER REFERENCES alerts (id)",
            "ALTER TABLE shelves ADD COLUMN pattern TEXT",
            "DROP INDEX alerts_one_live",
        ),
        then=lambda db, now: _merge_live_alerts(db, now),
    ),
    Migration(
        7,
        "at most one live incident per stream",
        ("CREATE UNIQUE INDEX incidents_one_live ON alerts (stream) WHERE state != 'cleared'",),
    ),
    Migration(
        8,
        "floods: many incidents at once, told in one notice",
        (
            """CREATE TABLE floods (
                id INTEGER PRIMARY KEY,
                started_at REAL NOT NULL,
                ended_at REAL,
                changes INTEGER NOT NULL,
                streams_json TEXT NOT NULL DEFAULT '[]'
            )""",
            "CREATE INDEX alerts_by_opened_at ON alerts (opened_at)",
            "CREATE INDEX alerts_by_cleared_at ON alerts (cleared_at) WHERE cleared_at IS NOT NULL",
        ),
    ),
    Migration(
        9,
        "Kafka partitions: owner, generation and the next offset, fenced per batch",
        (
            """CREATE TABLE partitions (
                topic TEXT NOT NULL,
                partition INTEGER NOT NULL,
                owner TEXT,
                generation INTEGER NOT NULL DEFAULT 0,
                next_offset INTEGER,
                taken_at REAL,
                committed_at REAL,
                PRIMARY KEY (topic, partition)
            )""",
        ),
    ),
    Migration(
        10,
        "the baseline version each reading was judged against",
        (
            # The version in baselines (stream, version) that judged the reading. NULL for a
            # learning reading (no baseline judged it) and for readings stored before this
            # column existed, whose limits a chart recovers from their z-scores instead.
            "ALTER TABLE readings ADD COLUMN baseline_version INTEGER",
        ),
    ),
    Migration(
        11,
        "readings: no index by time alone; retention by age goes through the primary key",
        (
            # Every stored reading was written to three B-trees: the table, its primary key
            # (stream, time) and this index. Its one reader was retention by age, which now
            # deletes stream by stream through the primary key (store/readings.py). Measured
            # with 1,000 interleaved streams: about 4% less insert CPU and 9% less file. A
            # table WITHOUT ROWID (one B-tree fewer still) measured about 40% more insert CPU,
            # whole rows being spread over the key's pages instead of appended.
            "DROP INDEX IF EXISTS readings_by_time",
        ),
    ),
)


def _create_private(path: str) -> None:
    """Create a new database file readable by its owner only (0600, whatever the umask).

    The readings, alerts and notes are the plant's business. SQLite gives its ``-wal`` and
    ``-shm`` files the mode of the database file, so creating this one 0600 covers all three.
    An existing file keeps the mode its owner gave it.
    """
    with contextlib.suppress(FileExistsError):
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, 0o600))


def _merge_live_alerts(db: sqlite_utils.Database, now: float | None) -> None:
    """Fold the live per-rule alerts of each stream into its oldest one, which becomes the
    stream's incident: counts add up, the first and last readings span them all, the severity
    is the highest, and it stays open unless every part was acknowledged. The others are marked
    cleared, ``merged_into`` the incident, with an event on both sides, so nothing is lost from
    the audit trail and their outbox rows keep pointing at a row that exists."""
    when = now if now is not None else 0.0
    rows = db.execute(
        """SELECT id, stream, state, severity, first_time, last_time, signal_count, quiet_count,
            seen_time FROM alerts WHERE state != 'cleared' ORDER BY stream, id"""
    ).fetchall()
    by_stream: dict[str, list[tuple]] = {}
    for row in rows:
        by_stream.setdefault(row[1], []).append(row)
    for parts in by_stream.values():
        if len(parts) < 2:
            continue
        keep, others = parts[0], parts[1:]
        severity = max((p[3] for p in parts), key=_severity_rank)
        state = "acknowledged" if all(p[2] == "acknowledged" for p in parts) else "open"
        db.execute(
            """UPDATE alerts SET state = ?, severity = ?, first_time = ?, last_time = ?,
                signal_count = ?, quiet_count = ?, seen_time = ? WHERE id = ?""",
            (
                state,
                severity,
                min(p[4] for p in parts),
                max(p[5] for p in parts),
                sum(p[6] for p in parts),
                min(p[7] for p in parts),
                max(p[8] for p in parts),
                keep[0],
            ),
        )
        if state == "open":  # a part nobody acknowledged: the incident waits for someone
            db.execute(
                """UPDATE alerts SET acknowledged_at = NULL, acknowledged_by = NULL,
                    ack_note = NULL, ack_announced_at = NULL WHERE id = ?""",
                (keep[0],),
            )
        for other in others:
            db.execute(
                "UPDATE incident_rules SET alert_id = ? WHERE alert_id = ?", (keep[0], other[0])
            )
            db.execute(
                """UPDATE alerts SET state = 'cleared', cleared_at = ?, merged_into = ?
                WHERE id = ?""",
                (when, keep[0], other[0]),
            )
            for alert_id, note in (
                (other[0], f"merged into incident {keep[0]}, the stream's one live incident"),
                (keep[0], f"alert {other[0]} merged into this incident"),
            ):
                db.execute(
                    """INSERT INTO alert_events (alert_id, kind, time, actor, note, data_json)
                    VALUES (?, 'merged', ?, ?, ?, ?)""",
                    (alert_id, when, SYSTEM_ACTOR, note, json.dumps({"into": keep[0]})),
                )


def _severity_rank(severity: str) -> int:
    return SEVERITIES.index(severity) if severity in SEVERITIES else -1


def _recorded_version(db: sqlite_utils.Database) -> int:
    row = db.execute("SELECT max(version) FROM schema_migrations").fetchone()
    return int(row[0] or 0)


def migrate(
    db: sqlite_utils.Database,
    *,
    now: float | None = None,
    target: int | None = None,
    source: str = "the database",
) -> list[int]:
    """Bring ``db`` up to ``target`` (default: the newest known version); return versions applied.

    Each step runs in its own ``BEGIN IMMEDIATE`` transaction and re-reads the recorded version
    inside it, so two processes opening the same old file at once apply every step exactly once.
    A file newer than this code is refused before anything is touched.
    """
    known = MIGRATIONS[-1].version
    target = known if target is None else target
    if not 0 <= target <= known:
        raise ValueError(f"target schema version must be between 0 and {known}, not {target}")
    db.execute(
        """CREATE TABLE IF NOT EXISTS schema_migrations (
            version INTEGER PRIMARY KEY,
            name TEXT NOT NULL,
            applied_at REAL
        )"""
    )
    found = _recorded_version(db)
    if found > known:
        raise SchemaTooNew(
            f"{source} has schema version {found}, but this limitwatch knows versions up to "
            f"{known}. It was written by a newer limitwatch: upgrade limitwatch, or open a "
            "different database file."
        )
    # Used by migration 5 to hash dead letters stored before it.
    db.conn.create_function("lw_sha256", 1, _sha256_hex, deterministic=True)
    applied: list[int] = []
    for step in MIGRATIONS:
        if step.version > target:
            break
        with _immediate(db.conn):
            if _recorded_version(db) >= step.version:
                continue
            for statement in step.statements:
                db.execute(statement)
            if step.then is not None:
                step.then(db, now)
            db.execute(
                "INSERT INTO schema_migrations (version, name, applied_at) VALUES (?, ?, ?)",
                (step.version, step.name, now),
            )
        applied.append(step.version)
    return applied


@contextmanager
def _immediate(conn: sqlite3.Connection) -> Iterator[None]:
    """BEGIN IMMEDIATE ... COMMIT, or a savepoint when a transaction is already open."""
    if conn.in_transaction:
        name = f"lw_{next(_savepoint_names)}"
        conn.execute(f"SAVEPOINT {name}")
        try:
            yield
        except BaseException:
            if conn.in_transaction:
                conn.execute(f"ROLLBACK TO SAVEPOINT {name}")
                conn.execute(f"RELEASE SAVEPOINT {name}")
            raise
        conn.execute(f"RELEASE SAVEPOINT {name}")
        return
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield
    except BaseException:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")
