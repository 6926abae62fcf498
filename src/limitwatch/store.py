"""The one SQLite file that holds everything limitwatch must not forget.

Why one file and one writer: a batch of readings, the alert changes it causes and the
notifications those changes owe must land together or not at all, so a crash between them can
neither lose a reading nor send a notification twice. SQLite gives that with one transaction per
batch. Write-ahead logging (WAL) lets the operator's CLI read while the service writes, and
``synchronous=NORMAL`` keeps every committed batch across a process crash (``FULL`` would be needed
to survive power loss as well).

Times are epoch seconds supplied by the caller (``now``); nothing here reads a clock, so replay and
tests behave exactly like the live service.

Example:

>>> import pathlib, tempfile
>>> with tempfile.TemporaryDirectory() as tmp:
...     with Store.open(pathlib.Path(tmp) / "plant.db", now=0.0) as store:
...         with store.transaction():
...             letter = store.add_dead_letter("demo-file", b"7,,x", "no value column", now=5.0)
...         (store.journal_mode, store.schema_version() == len(MIGRATIONS), letter)
('wal', True, 1)

References
----------
SQLite documentation, "Write-Ahead Logging" (https://www.sqlite.org/wal.html) and "PRAGMA
synchronous" (https://www.sqlite.org/pragma.html#pragma_synchronous): in WAL mode NORMAL is
durable across application crashes; BEGIN IMMEDIATE (https://www.sqlite.org/lang_transaction.html)
takes the write lock at the start, so reads made inside a batch see no concurrent writer.
"""

from __future__ import annotations

import contextlib
import copy
import hashlib
import itertools
import json
import math
import os
import sqlite3
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from fnmatch import fnmatchcase
from pathlib import Path
from typing import Any, Literal

import orjson
import sqlite_utils

from limitwatch.model import Outcome, Reading, StreamSignal

SEVERITIES: tuple[str, ...] = ("info", "warning", "critical")
"""Severities, lowest first: an incident's severity is the highest of its rules'."""

AlertState = Literal["open", "acknowledged", "cleared"]
ALERT_STATES: tuple[str, ...] = ("open", "acknowledged", "cleared")
EVENT_KINDS: tuple[str, ...] = (
    "opened",
    "notified",
    "reminded",
    "escalated",
    "acknowledged",
    "shelved",
    "unshelved",
    "suppressed",
    "cleared",
    "joined",
    "raised",
    "resumed",
    "merged",
)
"""Kinds of incident event. ``suppressed`` records a notification held back by a shelf,
``joined`` a further rule signalling on a live incident, ``raised`` its severity going up,
``resumed`` readings arriving again after a stale check, ``merged`` the upgrade that folded a
stream's live per-rule alerts into one incident."""

SYSTEM_ACTOR = "limitwatch"
"""The actor recorded for transitions the service makes on its own (opening, clearing)."""

_CHUNK = 500  # parameters per IN (...) list; far below SQLite's limit, keeps statements small
_savepoint_names = itertools.count(1)


# --------------------------------------------------------------------------- errors


class StoreError(Exception):
    """Base of every error this module raises on purpose."""


class NotADatabase(StoreError):
    """The path exists but is not an SQLite file."""


class SchemaTooNew(StoreError):
    """The file was written by a newer limitwatch than this one."""


class AlertNotFound(StoreError, LookupError):
    """No alert has the given id."""


class AlertAlreadyCleared(StoreError):
    """The alert has cleared; acknowledging it would mean nothing."""


class AlertAlreadyAcknowledged(StoreError):
    """Someone acknowledged the alert already."""


class AlertAlreadyOpen(StoreError):
    """The stream already has a live (open or acknowledged) incident."""


class ShelfRejected(StoreError, ValueError):
    """A shelf request that cannot be honoured as given (no reason, end time not in the future)."""


class NotShelved(StoreError, LookupError):
    """Unshelve asked for, but nothing is shelved for that stream (and rule)."""


class NotificationNotFound(StoreError, LookupError):
    """No outbox row has the given id."""


CONFIG_AUTHOR = "config"
"""``created_by`` of a baseline typed into the config file."""


def same_numbers(a: Mapping[str, Any], b: Mapping[str, Any]) -> bool:
    """Whether two baselines' numbers are the same, as stored (NaN equal to NaN)."""
    return json.dumps(dict(a), sort_keys=True) == json.dumps(dict(b), sort_keys=True)


class BaselineVersionConflict(StoreError):
    """A baseline version was given that is not newer than the stream's current one."""


# --------------------------------------------------------------------------- migrations

DEAD_LETTER_KEEP_BYTES = 4096
"""How much of a refused payload a dead letter keeps. Enough to read what went wrong with a
JSON document or a CSV line; a 10 MB message sent by mistake (or on purpose) must not become
10 MB of database per copy. The whole payload's size and SHA-256 are kept beside the prefix,
so a copy kept elsewhere can still be matched to its dead letter."""


def _payload_bytes(payload: bytes | str) -> bytes:
    return payload.encode("utf-8", "surrogatepass") if isinstance(payload, str) else payload


def _sha256_hex(payload: bytes | str | None) -> str | None:
    return None if payload is None else hashlib.sha256(_payload_bytes(payload)).hexdigest()


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


def read_json(text: str) -> Any:
    """Parse JSON the standard library wrote. orjson first: a restart parses one checkpoint per
    stream, and it does so about four times as fast (1.4 s against 0.37 s for 100,000 streams).
    orjson refuses the ``NaN`` and ``Infinity`` that ``json.dumps`` writes for such floats; that
    rare text goes to the standard library, so both read every document to the same value."""
    try:
        return orjson.loads(text)
    except orjson.JSONDecodeError:
        return json.loads(text)


# --------------------------------------------------------------------------- values


def _iso(t: float | None) -> str:
    if t is None:
        return "an unknown time"
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


def _loads(text: str | None, default: Any) -> Any:
    return default if text is None else json.loads(text)


def _finite(x: float | None) -> float | None:
    """SQLite stores NaN as NULL anyway; say so explicitly rather than rely on it."""
    return None if x is None or not math.isfinite(x) else float(x)


@dataclass(frozen=True, slots=True)
class StreamRow:
    """What the store knows about a stream: when it was first and last heard from, and its last
    accepted reading."""

    id: str
    first_seen: float
    last_seen: float
    last_time: float | None
    last_value: float | None
    last_index: int | None
    phase: str | None


@dataclass(frozen=True, slots=True)
class StoredReading:
    """An accepted reading as kept for refits and charts: the value and what the engine said."""

    stream: str
    time: float
    value: float
    seq: int | None
    index: int | None
    phase: str | None
    z: float | None
    mr: float | None
    signals: tuple[str, ...] | None = None
    """The rules that signalled on this reading (empty: none); None for a reading stored before
    limitwatch recorded them."""


@dataclass(frozen=True, slots=True)
class Baseline:
    """A fitted set of limits for a stream, with the provenance needed to trust or redo it."""

    stream: str
    version: int
    created_at: float
    created_by: str
    reason: str
    method: str
    numbers: dict[str, Any]
    excluded: tuple[int, ...]
    first_index: int | None
    last_index: int | None
    first_time: float | None
    last_time: float | None

    @classmethod
    def _from_row(cls, row: Mapping[str, Any]) -> Baseline:
        return cls(
            stream=row["stream"],
            version=row["version"],
            created_at=row["created_at"],
            created_by=row["created_by"],
            reason=row["reason"],
            method=row["method"],
            numbers=json.loads(row["numbers_json"]),
            excluded=tuple(json.loads(row["excluded_json"])),
            first_index=row["first_index"],
            last_index=row["last_index"],
            first_time=row["first_time"],
            last_time=row["last_time"],
        )


@dataclass(slots=True)
class RuleTally:
    """What one rule contributed to an incident: how often it signalled, its first and last
    signalling reading, its severity and its last signal's context."""

    rule: str
    severity: str
    signal_count: int
    first_time: float
    first_index: int | None
    first_value: float | None
    last_time: float
    last_index: int | None
    last_value: float | None
    signal: dict[str, Any]


@dataclass(slots=True)
class Alert:
    """One incident: everything that went wrong on one stream from its first signal until it
    had been quiet for ``clear_after`` readings. ``rule`` is the rule that opened it; ``rules``
    holds every rule that joined, with its own counts. ``signal`` is the last signal's context
    (limits, center, chart, side ...), so a reminder can be written without looking anything up.

    Mutable on purpose: the lifecycle works on copies of the live incidents and changes their
    counters in place for each reading (a new frozen value per reading per incident was most of
    its cost), and the store writes only the incidents whose state changed.

    Bookkeeping fields: ``quiet_count`` counts consecutive monitoring readings without any
    signal (hysteresis), ``seen_time`` is the time of the last reading that touched the
    incident (a replayed reading at or before it is ignored), ``notified_at``/``last_notice_at``
    are when a notification was first/last queued, ``reminders`` how many reminders were queued,
    ``escalated_at`` when the escalation was queued, ``suppressed_until`` the end of the shelf
    already recorded as holding its notifications, ``worst_z`` the largest distance from the
    center line in sigmas of a reading while it was live, ``silent_since`` the time of the
    stream's last reading while a stale check finds it silent.
    """

    id: int
    stream: str
    rule: str
    state: AlertState
    severity: str
    opened_at: float
    first_time: float
    first_index: int | None
    first_value: float | None
    last_time: float
    last_index: int | None
    last_value: float | None
    signal_count: int
    quiet_count: int
    seen_time: float
    signal: dict[str, Any]
    acknowledged_at: float | None = None
    acknowledged_by: str | None = None
    ack_note: str | None = None
    cleared_at: float | None = None
    notified_at: float | None = None
    last_notice_at: float | None = None
    reminders: int = 0
    escalated_at: float | None = None
    suppressed_until: float | None = None
    worst_z: float | None = None
    silent_since: float | None = None
    ack_announced_at: float | None = None
    cleared_announced_at: float | None = None
    merged_into: int | None = None
    announced_severity: str | None = None
    rules: dict[str, RuleTally] = field(default_factory=dict)

    @classmethod
    def _from_row(cls, row: Mapping[str, Any]) -> Alert:
        fields = {k: v for k, v in row.items() if k != "signal_json"}
        return cls(signal=json.loads(row["signal_json"]), **fields)

    def copy(self) -> Alert:
        """A working copy whose counters (its own and its rules') can change independently."""
        twin = copy.copy(self)
        twin.rules = {rule: copy.copy(tally) for rule, tally in self.rules.items()}
        return twin

    @property
    def worst_zone(self) -> str | None:
        """The worst zone a reading reached while live: ``beyond`` the limits, ``A``, ``B`` or
        ``C``; None when no reading with a known distance came."""
        return zone_of(self.worst_z)


Incident = Alert
"""The plain name for what an alert row now holds."""


def zone_of(z: float | None) -> str | None:
    """The zone of a distance from the center line in sigmas.

    >>> [zone_of(z) for z in (0.5, -1.5, 2.5, 3.2, None)]
    ['C', 'B', 'A', 'beyond', None]
    """
    if z is None or not math.isfinite(z):
        return None
    a = abs(z)
    return "beyond" if a > 3 else "A" if a > 2 else "B" if a > 1 else "C"


ALERT_BOOKKEEPING = (
    "state",
    "severity",
    "first_time",
    "last_time",
    "last_index",
    "last_value",
    "signal_count",
    "quiet_count",
    "seen_time",
    "signal",
    "cleared_at",
    "notified_at",
    "last_notice_at",
    "reminders",
    "escalated_at",
    "suppressed_until",
    "worst_z",
    "silent_since",
    "ack_announced_at",
    "cleared_announced_at",
    "announced_severity",
)
"""Incident fields the lifecycle changes (acknowledging goes through :meth:`Store.acknowledge`)."""

_ALERT_MUTABLE = frozenset(ALERT_BOOKKEEPING) - {"state", "cleared_at"}
"""Columns ``update_alert`` may change; state changes go through the named methods (or a
lifecycle change set), which also write the event log."""


def signal_context(signal: StreamSignal) -> dict[str, Any]:
    """The parts of a signal a notification needs, as plain JSON-safe values.

    >>> from limitwatch.model import StreamSignal
    >>> s = StreamSignal("kiln-3/temp", "beyond-limits", "x", "upper", 40, 100.0, 131.0,
    ...                  (40,), 120.0, 3.0, 129.0, 111.0, 2.0, 11.06, 1)
    >>> signal_context(s)["ucl"], signal_context(s)["involved"]
    (129.0, [40])
    """
    return {
        "chart": signal.chart,
        "side": signal.side,
        "index": signal.index,
        "involved": list(signal.involved),
        "center": _finite(signal.center),
        "sigma": _finite(signal.sigma),
        "ucl": _finite(signal.ucl),
        "lcl": _finite(signal.lcl),
        "mr": _finite(signal.mr),
        "mr_ucl": _finite(signal.mr_ucl),
        "baseline_version": signal.baseline_version,
        "statistic": _finite(signal.statistic),
        "limit": _finite(signal.limit),
    }


@dataclass(frozen=True, slots=True)
class AlertEvent:
    """One line of an alert's audit trail."""

    id: int
    alert_id: int
    kind: str
    time: float
    actor: str
    note: str | None
    data: dict[str, Any] | None


@dataclass(frozen=True, slots=True)
class Shelf:
    """Notifications for ``stream`` (all rules when ``rule`` is None) are held until ``until``."""

    id: int
    stream: str
    rule: str | None
    created_at: float
    until: float
    reason: str
    shelved_by: str
    ended_at: float | None = None
    ended_by: str | None = None
    pattern: str | None = None
    """The glob the operator gave when one command shelved several streams (one row each)."""

    def covers(self, stream: str, rule: str) -> bool:
        """True when this shelf applies to alerts of ``stream`` for ``rule``."""
        return self.stream == stream and (self.rule is None or self.rule == rule)


@dataclass(frozen=True, slots=True)
class Notification:
    """One outbox row: a payload owed to one route, with its delivery bookkeeping."""

    id: int
    idempotency_key: str
    alert_id: int | None
    route: str
    payload: dict[str, Any]
    created_at: float
    next_attempt_at: float
    attempts: int
    last_error: str | None
    delivered_at: float | None
    expires_at: float | None


@dataclass(frozen=True, slots=True)
class DeadLetter:
    """Input that could not be used, with the reason: the payload verbatim up to
    :data:`DEAD_LETTER_KEEP_BYTES`, and the whole payload's size and SHA-256."""

    id: int
    source: str
    received_at: float
    reason: str
    payload: bytes | str | None
    """The payload, or its first :data:`DEAD_LETTER_KEEP_BYTES` bytes when it was longer."""
    payload_size: int | None = None
    """Bytes in the whole payload as received (UTF-8 for text)."""
    payload_sha256: str | None = None
    """Hex SHA-256 of the whole payload."""

    @property
    def truncated(self) -> bool:
        """True when :attr:`payload` is only the start of what was received."""
        if self.payload is None or self.payload_size is None:
            return False
        return len(_payload_bytes(self.payload)) < self.payload_size


@dataclass(slots=True)
class Flood:
    """Many incidents opening or clearing at once: from ``started_at`` until ``ended_at`` the
    per-incident notifications are folded into one flood notice. ``changes`` counts the
    incidents opened or cleared since it started, ``streams`` names them."""

    id: int
    started_at: float
    ended_at: float | None = None
    changes: int = 0
    streams: list[str] = field(default_factory=list)

    def copy(self) -> Flood:
        return Flood(self.id, self.started_at, self.ended_at, self.changes, list(self.streams))


@dataclass(frozen=True, slots=True)
class EventRow:
    """One line for an incident's audit trail, as decided (see :meth:`Store.write_changes`)."""

    alert_id: int
    kind: str
    time: float
    actor: str = SYSTEM_ACTOR
    note: str | None = None
    data: Mapping[str, Any] | None = None


@dataclass(frozen=True, slots=True)
class OutboxRow:
    """One notification owed to one notifier (or route), keyed so a repeat changes nothing."""

    key: str
    alert_id: int | None
    route: str
    payload: Mapping[str, Any]
    created_at: float
    expires_at: float | None = None


@dataclass(slots=True)
class ChangeSet:
    """Everything one lifecycle decision changes, written by :meth:`Store.write_changes` in one
    call: incidents opened (ids already chosen, see :meth:`Store.next_alert_id`) and incidents
    changed (only those whose fields moved), the rule tallies that moved, events and outbox
    rows."""

    opened: list[Alert] = field(default_factory=list)
    changed: list[Alert] = field(default_factory=list)
    rules: list[tuple[int, RuleTally]] = field(default_factory=list)
    events: list[EventRow] = field(default_factory=list)
    outbox: list[OutboxRow] = field(default_factory=list)
    floods: list[Flood] = field(default_factory=list)

    def __bool__(self) -> bool:
        return bool(
            self.opened or self.changed or self.rules or self.events or self.outbox or self.floods
        )


_INCIDENT_COLUMNS = (
    "id",
    "stream",
    "rule",
    "state",
    "severity",
    "opened_at",
    "first_time",
    "first_index",
    "first_value",
    "last_time",
    "last_index",
    "last_value",
    "signal_count",
    "quiet_count",
    "seen_time",
    "signal_json",
    "acknowledged_at",
    "acknowledged_by",
    "ack_note",
    "cleared_at",
    "notified_at",
    "last_notice_at",
    "reminders",
    "escalated_at",
    "suppressed_until",
    "worst_z",
    "silent_since",
    "ack_announced_at",
    "cleared_announced_at",
    "announced_severity",
)
_UPDATED_COLUMNS = tuple("signal_json" if name == "signal" else name for name in ALERT_BOOKKEEPING)


def _column_value(alert: Alert, column: str) -> Any:
    if column == "signal_json":
        return json.dumps(alert.signal)
    value = getattr(alert, column)
    return _finite(value) if isinstance(value, float) else value


def _tally_row(alert_id: int, t: RuleTally) -> tuple:
    return (
        alert_id,
        t.rule,
        t.severity,
        t.signal_count,
        t.first_time,
        t.first_index,
        _finite(t.first_value),
        t.last_time,
        t.last_index,
        _finite(t.last_value),
        json.dumps(t.signal),
    )


def _tally(row: Mapping[str, Any]) -> RuleTally:
    return RuleTally(
        rule=row["rule"],
        severity=row["severity"],
        signal_count=row["signal_count"],
        first_time=row["first_time"],
        first_index=row["first_index"],
        first_value=row["first_value"],
        last_time=row["last_time"],
        last_index=row["last_index"],
        last_value=row["last_value"],
        signal=json.loads(row["signal_json"]),
    )


# --------------------------------------------------------------------------- the store


class Store:
    """limitwatch's persistent state over one :class:`sqlite_utils.Database`.

    Open with :meth:`open`; group writes with :meth:`transaction`. Every write method may be called
    on its own (it then commits by itself) or inside a transaction (it then joins it).

    >>> import pathlib, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     with Store.open(pathlib.Path(tmp) / "plant.db", now=0.0) as store:
    ...         store.save_checkpoint("line-1/scrap", {"n": 3}, now=60.0)
    ...         store.load_checkpoints()
    {'line-1/scrap': {'n': 3}}
    """

    def __init__(self, db: sqlite_utils.Database, path: str) -> None:
        self.db = db
        self.path = path
        self._rollback_listeners: list[Callable[[], None]] = []

    # ---- opening and transactions

    @classmethod
    def open(
        cls, path: str | Path, *, now: float | None = None, busy_timeout_s: float = 5.0
    ) -> Store:
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

    def close(self) -> None:
        self.db.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[Store]:
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

    def _all(self, sql: str, params: Sequence[Any] | Mapping[str, Any] = ()) -> list[dict]:
        return list(self.db.query(sql, params))

    def _one(self, sql: str, params: Sequence[Any] | Mapping[str, Any] = ()) -> dict | None:
        rows = self._all(sql, params)
        return rows[0] if rows else None

    # ---- readings, streams, checkpoints

    def record_batch(
        self,
        outcomes: Iterable[Outcome],
        *,
        now: float,
        checkpoints: Mapping[str, Mapping[str, Any]] | None = None,
    ) -> int:
        """Store a batch's accepted readings, stream summaries and checkpoints in one transaction;
        return how many readings were new. Call the alert book inside the same ``transaction()``
        so alerts and notifications commit with the readings that caused them."""
        with self.transaction():
            stored = self.add_readings(outcomes, now=now)
            if checkpoints:
                self.save_checkpoints(checkpoints, now=now)
        return stored

    def add_readings(self, outcomes: Iterable[Outcome], *, now: float) -> int:
        """Keep accepted readings (refused ones changed nothing and are not kept here) and update
        each stream's summary. A redelivered reading (same stream and time) is ignored."""
        rows = []
        latest: dict[str, Outcome] = {}
        for o in outcomes:
            if not o.accepted:
                continue
            r = o.reading
            fired = " ".join(dict.fromkeys(s.rule for s in o.signals)) if o.signals else ""
            rows.append((r.stream, r.time, r.value, r.seq, o.index, o.phase, o.z, o.mr, fired))
            if r.stream not in latest or r.time > latest[r.stream].reading.time:
                latest[r.stream] = o
        if not rows:
            return 0
        with self.transaction():
            cur = self.db.conn.executemany(
                """INSERT INTO readings (stream, time, value, seq, idx, phase, z, mr, signals)
                VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)
                ON CONFLICT (stream, time) DO NOTHING""",
                rows,
            )
            stored = cur.rowcount
            self.db.conn.executemany(
                """INSERT INTO streams
                    (id, first_seen, last_seen, last_time, last_value, last_index, phase)
                VALUES (?, ?, ?, ?, ?, ?, ?)
                ON CONFLICT (id) DO UPDATE SET
                    last_seen = excluded.last_seen,
                    last_time = excluded.last_time,
                    last_value = excluded.last_value,
                    last_index = excluded.last_index,
                    phase = excluded.phase
                WHERE streams.last_time IS NULL OR excluded.last_time > streams.last_time""",
                [
                    (s, now, now, o.reading.time, o.reading.value, o.index, o.phase)
                    for s, o in latest.items()
                ],
            )
        return stored

    def recent_readings(self, stream: str, *, last: int | None = None) -> list[StoredReading]:
        """The stream's kept readings, oldest first; only the newest ``last`` when given."""
        sql = "SELECT * FROM readings WHERE stream = ? ORDER BY time DESC"
        params: list[Any] = [stream]
        if last is not None:
            sql += " LIMIT ?"
            params.append(last)
        rows = self._all(sql, params)
        rows.reverse()
        return [
            StoredReading(
                stream=r["stream"],
                time=r["time"],
                value=r["value"],
                seq=r["seq"],
                index=r["idx"],
                phase=r["phase"],
                z=r["z"],
                mr=r["mr"],
                signals=None if r["signals"] is None else tuple(r["signals"].split()),
            )
            for r in rows
        ]

    def prune_readings(
        self,
        now: float,
        *,
        max_age_s: float | None = None,
        max_per_stream: int | None = None,
    ) -> int:
        """Apply the retention policy; return the number of readings deleted.

        ``max_age_s`` drops readings older than ``now - max_age_s``; ``max_per_stream`` keeps only
        each stream's newest readings. Both may be given; neither means nothing is deleted.
        """
        if max_per_stream is not None and max_per_stream < 0:
            raise ValueError(f"max_per_stream must be 0 or more, not {max_per_stream}")
        deleted = 0
        with self.transaction():
            if max_age_s is not None:
                cur = self.db.execute("DELETE FROM readings WHERE time < ?", (now - max_age_s,))
                deleted += cur.rowcount
            if max_per_stream is not None:
                cur = self.db.execute(
                    """DELETE FROM readings WHERE rowid IN (
                        SELECT rowid FROM (
                            SELECT rowid, row_number() OVER (
                                PARTITION BY stream ORDER BY time DESC
                            ) AS newest_first
                            FROM readings
                        ) WHERE newest_first > ?
                    )""",
                    (max_per_stream,),
                )
                deleted += cur.rowcount
        return deleted

    def readings_after(self, stream: str, time: float | None) -> list[Reading]:
        """The stream's kept readings later than ``time`` (all when None), oldest first, as
        the engine first saw them: what a monitor restored from an older checkpoint needs
        again to stand where the last commit left it."""
        rows = self.db.conn.execute(
            "SELECT time, value, seq FROM readings WHERE stream = ? AND time > ? ORDER BY time",
            (stream, -math.inf if time is None else time),
        )
        return [Reading(stream, t, v, seq) for t, v, seq in rows]

    def last_service_time(self) -> float | None:
        """The latest service time at which a batch with accepted readings committed (the
        newest ``last_seen``), or None for an empty store: a restart goes on from it if the
        wall clock was stepped back meanwhile."""
        row = self.db.conn.execute("SELECT max(last_seen) FROM streams").fetchone()
        return None if row[0] is None else float(row[0])

    def has_reading(self, reading: Reading, *, seq_horizon_s: float = 86400.0) -> bool:
        """Whether this reading is stored already: same stream, time and value, or (with a
        sequence number) the same sequence number within ``seq_horizon_s`` before its time
        (a redelivery without a time of its own carries a later receive time). Both lookups
        use the primary key's range, never a scan of the stream."""
        found = self.db.conn.execute(
            "SELECT 1 FROM readings WHERE stream = ? AND time = ? AND value = ?",
            (reading.stream, reading.time, reading.value),
        ).fetchone()
        if found is not None or reading.seq is None:
            return found is not None
        return (
            self.db.conn.execute(
                """SELECT 1 FROM readings WHERE stream = ? AND time BETWEEN ? AND ?
                AND seq = ? LIMIT 1""",
                (reading.stream, reading.time - seq_horizon_s, reading.time, reading.seq),
            ).fetchone()
            is not None
        )

    def stream_last_times(self) -> dict[str, float | None]:
        """Each stream's latest committed reading time."""
        return dict(self.db.conn.execute("SELECT id, last_time FROM streams"))

    def streams(self, *, glob: str | None = None) -> list[StreamRow]:
        """Every stream heard from (matching ``glob`` on the id when given), by id."""
        if glob is None:
            rows = self._all("SELECT * FROM streams ORDER BY id")
        else:
            rows = self._all("SELECT * FROM streams WHERE glob_match(id, ?) ORDER BY id", (glob,))
        return [StreamRow(**r) for r in rows]

    def save_checkpoint(self, stream: str, state: Mapping[str, Any], *, now: float) -> None:
        """Keep one snapshot per stream; writing again replaces it."""
        self.save_checkpoints({stream: state}, now=now)

    def save_checkpoints(self, states: Mapping[str, Mapping[str, Any]], *, now: float) -> None:
        rows = [(stream, now, json.dumps(dict(state))) for stream, state in states.items()]
        with self.transaction():
            self.db.conn.executemany(
                """INSERT INTO checkpoints (stream, saved_at, state_json) VALUES (?, ?, ?)
                ON CONFLICT (stream) DO UPDATE SET
                    saved_at = excluded.saved_at, state_json = excluded.state_json""",
                rows,
            )

    def load_checkpoints(self) -> dict[str, dict[str, Any]]:
        return dict(self.iter_checkpoints())

    def iter_checkpoints(self) -> Iterator[tuple[str, dict[str, Any]]]:
        """``(stream, state)`` by stream, one row at a time: a restart of a large site then
        never holds every parsed checkpoint at once."""
        rows = self.db.conn.execute("SELECT stream, state_json FROM checkpoints ORDER BY stream")
        for stream, state_json in rows:
            yield stream, read_json(state_json)

    def load_checkpoint(self, stream: str) -> dict[str, Any] | None:
        row = self._one("SELECT state_json FROM checkpoints WHERE stream = ?", (stream,))
        return None if row is None else read_json(row["state_json"])

    # ---- baselines

    def add_baseline(
        self,
        stream: str,
        numbers: Mapping[str, Any],
        *,
        now: float,
        by: str,
        reason: str,
        method: str,
        version: int | None = None,
        first_index: int | None = None,
        last_index: int | None = None,
        first_time: float | None = None,
        last_time: float | None = None,
        excluded: Iterable[int] = (),
    ) -> Baseline:
        """Record a new baseline version for ``stream``; return it.

        Without ``version`` the next number is taken. With one (the engine numbers its own
        baselines), it must be newer than the current version.
        """
        with self.transaction():
            row = self.db.execute(
                "SELECT max(version) FROM baselines WHERE stream = ?", (stream,)
            ).fetchone()
            current = int(row[0] or 0)
            if version is None:
                version = current + 1
            elif version <= current:
                raise BaselineVersionConflict(
                    f"stream {stream!r} already has baseline version {current}; a new baseline "
                    f"needs a higher version than {version}, or leave the version out to take "
                    "the next one."
                )
            self.db.execute(
                """INSERT INTO baselines (stream, version, created_at, created_by, reason,
                    method, first_index, last_index, first_time, last_time, excluded_json,
                    numbers_json)
                VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
                (
                    stream,
                    version,
                    now,
                    by,
                    reason,
                    method,
                    first_index,
                    last_index,
                    first_time,
                    last_time,
                    json.dumps(sorted(set(excluded))),
                    json.dumps(dict(numbers)),
                ),
            )
        found = self.current_baseline(stream)
        assert found is not None
        return found

    def current_baseline(self, stream: str) -> Baseline | None:
        row = self._one(
            "SELECT * FROM baselines WHERE stream = ? ORDER BY version DESC LIMIT 1", (stream,)
        )
        return None if row is None else Baseline._from_row(row)

    def latest_baseline_by(self, stream: str, by: str) -> Baseline | None:
        """The newest baseline of ``stream`` recorded by ``by`` (e.g. the config's)."""
        row = self._one(
            "SELECT * FROM baselines WHERE stream = ? AND created_by = ? "
            "ORDER BY version DESC LIMIT 1",
            (stream, by),
        )
        return None if row is None else Baseline._from_row(row)

    def baseline_history(self, stream: str) -> list[Baseline]:
        """Every baseline of the stream, oldest version first."""
        rows = self._all("SELECT * FROM baselines WHERE stream = ? ORDER BY version", (stream,))
        return [Baseline._from_row(r) for r in rows]

    # ---- file offsets

    def file_offsets(self, source: str) -> dict[str, int]:
        """Committed byte offsets of a file source, by file identity."""
        rows = self._all(
            "SELECT file_id, byte_offset FROM file_offsets WHERE source = ?", (source,)
        )
        return {r["file_id"]: int(r["byte_offset"]) for r in rows}

    def save_file_offsets(self, source: str, offsets: Mapping[str, int], *, now: float) -> None:
        """Upsert offsets; call inside the batch transaction that used the lines before them."""
        with self.transaction():
            self.db.conn.executemany(
                """INSERT INTO file_offsets (source, file_id, byte_offset, updated_at)
                VALUES (?, ?, ?, ?)
                ON CONFLICT (source, file_id) DO UPDATE SET
                    byte_offset = excluded.byte_offset, updated_at = excluded.updated_at""",
                [(source, fid, int(off), now) for fid, off in offsets.items()],
            )

    def baseline_versions(self) -> dict[str, int]:
        """The newest baseline version of every stream, in one query (for noticing refits)."""
        rows = self._all("SELECT stream, max(version) AS v FROM baselines GROUP BY stream")
        return {r["stream"]: int(r["v"]) for r in rows}

    # ---- dead letters

    def add_dead_letter(
        self, source: str, payload: bytes | str | None, reason: str, *, now: float
    ) -> int:
        """Keep input that could not be used, with the reason; return its id.

        The payload is kept verbatim when it fits in :data:`DEAD_LETTER_KEEP_BYTES`; a longer
        one keeps that many leading bytes (as bytes: a cut may split a UTF-8 character), and
        every dead letter records the whole payload's size and SHA-256."""
        size = digest = None
        if payload is not None:
            whole = _payload_bytes(payload)
            size = len(whole)
            digest = hashlib.sha256(whole).hexdigest()
            if size > DEAD_LETTER_KEEP_BYTES:
                payload = whole[:DEAD_LETTER_KEEP_BYTES]
        cur = self.db.execute(
            """INSERT INTO dead_letters
                (source, received_at, reason, payload, payload_size, payload_sha256)
            VALUES (?, ?, ?, ?, ?, ?)""",
            (source, now, reason, payload, size, digest),
        )
        return int(cur.lastrowid)

    def prune_dead_letters(
        self, now: float, *, max_age_s: float | None = None, max_count: int | None = None
    ) -> int:
        """Drop dead letters received before ``now - max_age_s``, then all but the newest
        ``max_count``; return how many went. Dead letters are for finding out what a gateway
        or an export sends wrong, not an archive: without a bound, a gateway sending bad
        messages for months fills the disk."""
        if max_count is not None and max_count < 0:
            raise ValueError(f"max_count must be 0 or more, not {max_count}")
        deleted = 0
        with self.transaction():
            if max_age_s is not None:
                cur = self.db.execute(
                    "DELETE FROM dead_letters WHERE received_at < ?", (now - max_age_s,)
                )
                deleted += cur.rowcount
            if max_count is not None:
                # ids grow with arrival (AUTOINCREMENT), so the newest are the highest ids
                cur = self.db.execute(
                    """DELETE FROM dead_letters WHERE id <= (
                        SELECT id FROM dead_letters ORDER BY id DESC LIMIT 1 OFFSET ?
                    )""",
                    (max_count,),
                )
                deleted += cur.rowcount
        return deleted

    def dead_letters(self, *, limit: int = 100) -> list[DeadLetter]:
        """The newest dead letters, newest first."""
        rows = self._all("SELECT * FROM dead_letters ORDER BY id DESC LIMIT ?", (limit,))
        return [DeadLetter(**r) for r in rows]

    # ---- alerts

    def open_alert(
        self,
        signal: StreamSignal,
        *,
        severity: str,
        now: float,
        actor: str = SYSTEM_ACTOR,
    ) -> Alert:
        """Open a new alert from its first signal and log the ``opened`` event."""
        with self.transaction():
            live = self._one(
                "SELECT id FROM alerts WHERE stream = ? AND state != 'cleared'", (signal.stream,)
            )
            if live is not None:
                raise AlertAlreadyOpen(
                    f"stream {signal.stream!r} already has live incident {live['id']}; a "
                    f"further signal ({signal.rule}) should join that incident, not open another."
                )
            value = _finite(signal.value)
            cur = self.db.execute(
                """INSERT INTO alerts (stream, rule, state, severity, opened_at, first_time,
                    first_index, first_value, last_time, last_index, last_value, signal_count,
                    quiet_count, seen_time, signal_json)
                VALUES (?, ?, 'open', ?, ?, ?, ?, ?, ?, ?, ?, 1, 0, ?, ?)""",
                (
                    signal.stream,
                    signal.rule,
                    severity,
                    now,
                    signal.time,
                    signal.index,
                    value,
                    signal.time,
                    signal.index,
                    value,
                    signal.time,
                    json.dumps(signal_context(signal)),
                ),
            )
            alert_id = int(cur.lastrowid)
            self.db.execute(
                """INSERT INTO incident_rules (alert_id, rule, severity, signal_count, first_time,
                    first_index, first_value, last_time, last_index, last_value, signal_json)
                VALUES (?, ?, ?, 1, ?, ?, ?, ?, ?, ?, ?)""",
                (
                    alert_id,
                    signal.rule,
                    severity,
                    signal.time,
                    signal.index,
                    value,
                    signal.time,
                    signal.index,
                    value,
                    json.dumps(signal_context(signal)),
                ),
            )
            self.add_alert_event(
                alert_id,
                "opened",
                now=now,
                actor=actor,
                note=f"{signal.rule} on {signal.chart} chart, severity {severity}",
                data={"value": value, "time": signal.time, "index": signal.index},
            )
        return self.alert(alert_id)

    def update_alert(self, alert_id: int, **changes: Any) -> None:
        """Change bookkeeping fields of an alert (counts, last reading, notification times)."""
        unknown = set(changes) - _ALERT_MUTABLE
        if unknown:
            raise ValueError(
                f"update_alert cannot change {sorted(unknown)}; it may change "
                f"{sorted(_ALERT_MUTABLE)}. Use acknowledge() or clear_alert() to change state."
            )
        if not changes:
            return
        if "signal" in changes:
            changes["signal_json"] = json.dumps(changes.pop("signal"))
        sets = ", ".join(f"{column} = ?" for column in changes)
        cur = self.db.execute(
            f"UPDATE alerts SET {sets} WHERE id = ?", (*changes.values(), alert_id)
        )
        if cur.rowcount == 0:
            raise AlertNotFound(_no_alert(alert_id))

    def clear_alert(
        self, alert_id: int, *, now: float, actor: str = SYSTEM_ACTOR, note: str | None = None
    ) -> Alert:
        """Mark the alert cleared and log it. A later signal opens a new alert."""
        with self.transaction():
            alert = self.alert(alert_id)
            if alert.state == "cleared":
                raise AlertAlreadyCleared(
                    f"alert {alert_id} already cleared at {_iso(alert.cleared_at)}."
                )
            self.db.execute(
                "UPDATE alerts SET state = 'cleared', cleared_at = ? WHERE id = ?",
                (now, alert_id),
            )
            self.add_alert_event(alert_id, "cleared", now=now, actor=actor, note=note)
        return self.alert(alert_id)

    def acknowledge(self, alert_id: int, *, by: str, note: str | None = None, now: float) -> Alert:
        """Record that ``by`` has seen the alert and is acting on it; reminders and escalation
        stop. Raises :class:`AlertNotFound`, :class:`AlertAlreadyCleared` or
        :class:`AlertAlreadyAcknowledged` with a message fit to show the operator."""
        with self.transaction():
            alert = self.alert(alert_id)
            if alert.state == "cleared":
                raise AlertAlreadyCleared(
                    f"alert {alert_id} ({alert.stream}, {alert.rule}) already cleared at "
                    f"{_iso(alert.cleared_at)}, so there is nothing to acknowledge. If the "
                    "problem is back, a new alert has been opened: list the stream's alerts to "
                    "find it."
                )
            if alert.state == "acknowledged":
                raise AlertAlreadyAcknowledged(
                    f"alert {alert_id} was already acknowledged by {alert.acknowledged_by} at "
                    f"{_iso(alert.acknowledged_at)}; its event log shows who did what."
                )
            self.db.execute(
                """UPDATE alerts SET state = 'acknowledged', acknowledged_at = ?,
                    acknowledged_by = ?, ack_note = ? WHERE id = ?""",
                (now, by, note, alert_id),
            )
            self.add_alert_event(alert_id, "acknowledged", now=now, actor=by, note=note)
        self._changed_here()
        return self.alert(alert_id)

    def _changed_here(self) -> None:
        """This connection changed incidents outside the lifecycle (an acknowledgement): whoever
        keeps a copy must drop it, as after a rollback. Other connections' commits are seen
        through :meth:`data_version`."""
        for forget in self._rollback_listeners:
            forget()

    def alert(self, alert_id: int) -> Alert:
        row = self._one("SELECT * FROM alerts WHERE id = ?", (alert_id,))
        if row is None:
            raise AlertNotFound(_no_alert(alert_id))
        return self._with_rules([Alert._from_row(row)])[0]

    def _with_rules(self, alerts: list[Alert]) -> list[Alert]:
        """Fill each incident's ``rules`` from ``incident_rules`` (one query per chunk)."""
        by_id = {a.id: a for a in alerts}
        ids = list(by_id)
        for i in range(0, len(ids), _CHUNK):
            chunk = ids[i : i + _CHUNK]
            rows = self._all(
                f"""SELECT * FROM incident_rules WHERE alert_id IN ({", ".join("?" * len(chunk))})
                ORDER BY alert_id, first_time, rule""",
                chunk,
            )
            for row in rows:
                by_id[row["alert_id"]].rules[row["rule"]] = _tally(row)
        return alerts

    def next_alert_id(self) -> int:
        """The id the next incident gets. Call inside the batch's transaction, which holds the
        write lock, so the lifecycle can name new incidents (and their event ids) before the
        store writes them."""
        row = self.db.execute(
            """SELECT max(coalesce((SELECT seq FROM sqlite_sequence WHERE name = 'alerts'), 0),
                coalesce((SELECT max(id) FROM alerts), 0))"""
        ).fetchone()
        return int(row[0]) + 1

    def write_changes(self, changes: ChangeSet) -> int:
        """Write one lifecycle decision: changed incidents, new incidents, rule tallies, events
        and outbox rows, each with one ``executemany``; return how many outbox rows are new
        (a row whose key exists already is a replay and changes nothing)."""
        conn = self.db.conn
        with self.transaction():
            if changes.changed:
                sets = ", ".join(f"{c} = ?" for c in _UPDATED_COLUMNS)
                conn.executemany(
                    f"UPDATE alerts SET {sets} WHERE id = ?",
                    [
                        (*(_column_value(a, c) for c in _UPDATED_COLUMNS), a.id)
                        for a in changes.changed
                    ],
                )
            if changes.opened:
                conn.executemany(
                    f"""INSERT INTO alerts ({", ".join(_INCIDENT_COLUMNS)})
                    VALUES ({", ".join("?" * len(_INCIDENT_COLUMNS))})""",
                    [tuple(_column_value(a, c) for c in _INCIDENT_COLUMNS) for a in changes.opened],
                )
            if changes.rules:
                conn.executemany(
                    """INSERT INTO incident_rules (alert_id, rule, severity, signal_count,
                        first_time, first_index, first_value, last_time, last_index, last_value,
                        signal_json) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)
                    ON CONFLICT (alert_id, rule) DO UPDATE SET severity = excluded.severity,
                        signal_count = excluded.signal_count, last_time = excluded.last_time,
                        last_index = excluded.last_index, last_value = excluded.last_value,
                        signal_json = excluded.signal_json""",
                    [_tally_row(alert_id, t) for alert_id, t in changes.rules],
                )
            if changes.events:
                bad = {e.kind for e in changes.events} - set(EVENT_KINDS)
                if bad:
                    raise ValueError(f"unknown event kind(s) {sorted(bad)}; kinds: {EVENT_KINDS}")
                conn.executemany(
                    """INSERT INTO alert_events (alert_id, kind, time, actor, note, data_json)
                    VALUES (?, ?, ?, ?, ?, ?)""",
                    [
                        (
                            e.alert_id,
                            e.kind,
                            e.time,
                            e.actor,
                            e.note,
                            None if e.data is None else json.dumps(dict(e.data)),
                        )
                        for e in changes.events
                    ],
                )
            if changes.floods:
                conn.executemany(
                    """INSERT INTO floods (id, started_at, ended_at, changes, streams_json)
                    VALUES (?, ?, ?, ?, ?) ON CONFLICT (id) DO UPDATE SET
                        ended_at = excluded.ended_at, changes = excluded.changes,
                        streams_json = excluded.streams_json""",
                    [
                        (f.id, f.started_at, f.ended_at, f.changes, json.dumps(f.streams))
                        for f in changes.floods
                    ],
                )
            queued = 0
            if changes.outbox:
                before = conn.total_changes
                conn.executemany(
                    """INSERT INTO outbox (idempotency_key, alert_id, route, payload_json,
                        created_at, next_attempt_at, expires_at)
                    VALUES (?, ?, ?, ?, ?, ?, ?)
                    ON CONFLICT (idempotency_key) DO NOTHING""",
                    [
                        (
                            r.key,
                            r.alert_id,
                            r.route,
                            json.dumps(dict(r.payload)),
                            r.created_at,
                            r.created_at,
                            r.expires_at,
                        )
                        for r in changes.outbox
                    ],
                )
                queued = conn.total_changes - before
        return queued

    def alerts(
        self,
        *,
        state: str | Iterable[str] | None = None,
        stream_glob: str | None = None,
        limit: int | None = None,
    ) -> list[Alert]:
        """Alerts, newest first, filtered by state(s) and a glob on the stream id."""
        where, params = [], []
        if state is not None:
            states = [state] if isinstance(state, str) else list(state)
            bad = set(states) - set(ALERT_STATES)
            if bad:
                raise ValueError(
                    f"unknown alert state(s) {sorted(bad)}; states are {', '.join(ALERT_STATES)}"
                )
            where.append(f"state IN ({', '.join('?' * len(states))})")
            params.extend(states)
        if stream_glob is not None:
            where.append("glob_match(stream, ?)")
            params.append(stream_glob)
        sql = "SELECT * FROM alerts"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY id DESC"
        if limit is not None:
            sql += " LIMIT ?"
            params.append(limit)
        return self._with_rules([Alert._from_row(r) for r in self._all(sql, params)])

    def live_alerts(self, streams: Iterable[str] | None = None) -> list[Alert]:
        """Open and acknowledged alerts, for the given streams only when given."""
        if streams is None:
            return self._with_rules(
                [
                    Alert._from_row(r)
                    for r in self._all("SELECT * FROM alerts WHERE state != 'cleared' ORDER BY id")
                ]
            )
        wanted = sorted(set(streams))
        found: list[Alert] = []
        for i in range(0, len(wanted), _CHUNK):
            chunk = wanted[i : i + _CHUNK]
            rows = self._all(
                f"""SELECT * FROM alerts WHERE state != 'cleared'
                AND stream IN ({", ".join("?" * len(chunk))}) ORDER BY id""",
                chunk,
            )
            found.extend(Alert._from_row(r) for r in rows)
        return self._with_rules(found)

    def changes_since(self, since: float) -> list[str]:
        """The stream of every incident opened, and of every one cleared, after ``since`` (a
        flood's measure), oldest first."""
        rows = self.db.execute(
            """SELECT stream, opened_at AS t, id FROM alerts WHERE opened_at > ?
            UNION ALL
            SELECT stream, cleared_at AS t, id FROM alerts WHERE cleared_at > ?
            ORDER BY t, id""",
            (since, since),
        ).fetchall()
        return [r[0] for r in rows]

    def live_flood(self) -> Flood | None:
        """The flood still going on, if any."""
        row = self._one("SELECT * FROM floods WHERE ended_at IS NULL ORDER BY id DESC LIMIT 1")
        return None if row is None else _flood(row)

    def floods(self) -> list[Flood]:
        """Every flood, oldest first."""
        return [_flood(r) for r in self._all("SELECT * FROM floods ORDER BY id")]

    def next_flood_id(self) -> int:
        row = self.db.execute("SELECT coalesce(max(id), 0) + 1 FROM floods").fetchone()
        return int(row[0])

    def last_seen_times(self, streams: Iterable[str]) -> dict[str, float]:
        """For each stream, the time of the last reading any of its incidents saw."""
        wanted = sorted(set(streams))
        found: dict[str, float] = {}
        for i in range(0, len(wanted), _CHUNK):
            chunk = wanted[i : i + _CHUNK]
            rows = self.db.execute(
                f"""SELECT stream, max(seen_time) FROM alerts
                WHERE stream IN ({", ".join("?" * len(chunk))}) GROUP BY stream""",
                chunk,
            ).fetchall()
            found.update((stream, seen) for stream, seen in rows if seen is not None)
        return found

    def latest_alert(self, stream: str, rule: str) -> Alert | None:
        """The newest alert of any state for the stream and rule."""
        row = self._one(
            "SELECT * FROM alerts WHERE stream = ? AND rule = ? ORDER BY id DESC LIMIT 1",
            (stream, rule),
        )
        return None if row is None else Alert._from_row(row)

    def add_alert_event(
        self,
        alert_id: int,
        kind: str,
        *,
        now: float,
        actor: str = SYSTEM_ACTOR,
        note: str | None = None,
        data: Mapping[str, Any] | None = None,
    ) -> int:
        if kind not in EVENT_KINDS:
            raise ValueError(f"unknown alert event kind {kind!r}; kinds are {EVENT_KINDS}")
        try:
            cur = self.db.execute(
                """INSERT INTO alert_events (alert_id, kind, time, actor, note, data_json)
                VALUES (?, ?, ?, ?, ?, ?)""",
                (alert_id, kind, now, actor, note, None if data is None else json.dumps(data)),
            )
        except sqlite3.IntegrityError as exc:
            raise AlertNotFound(_no_alert(alert_id)) from exc
        return int(cur.lastrowid)

    def alert_events(self, alert_id: int) -> list[AlertEvent]:
        """The alert's audit trail, oldest first."""
        self.alert(alert_id)  # a clear error for an unknown id rather than an empty list
        rows = self._all("SELECT * FROM alert_events WHERE alert_id = ? ORDER BY id", (alert_id,))
        return [
            AlertEvent(
                id=r["id"],
                alert_id=r["alert_id"],
                kind=r["kind"],
                time=r["time"],
                actor=r["actor"],
                note=r["note"],
                data=_loads(r["data_json"], None),
            )
            for r in rows
        ]

    # ---- shelves

    def shelve(
        self,
        stream: str,
        rule: str | None = None,
        *,
        until: float,
        reason: str,
        by: str,
        now: float,
    ) -> Shelf:
        """Hold notifications for ``stream`` (or one rule of it) until ``until``. Alerts are still
        opened, counted and cleared; live alerts it covers get a ``shelved`` event."""
        if not reason or not reason.strip():
            raise ShelfRejected(
                "a shelf needs a reason, e.g. 'planned maintenance on line 2'; give one so the "
                "audit trail says why notifications were held."
            )
        if until <= now:
            raise ShelfRejected(
                f"a shelf must end in the future, but {_iso(until)} is not after {_iso(now)}; "
                "give a positive duration."
            )
        with self.transaction():
            cur = self.db.execute(
                """INSERT INTO shelves (stream, rule, created_at, until, reason, shelved_by)
                VALUES (?, ?, ?, ?, ?, ?)""",
                (stream, rule, now, until, reason, by),
            )
            shelf = self._shelf(int(cur.lastrowid))
            for alert in self._live_covered(stream, rule):
                self.add_alert_event(
                    alert.id,
                    "shelved",
                    now=now,
                    actor=by,
                    note=f"notifications held until {_iso(until)}: {reason}",
                    data={"shelf_id": shelf.id, "until": until},
                )
        return shelf

    def shelve_streams(
        self,
        streams: Sequence[str],
        rule: str | None = None,
        *,
        until: float,
        reason: str,
        by: str,
        now: float,
        pattern: str | None = None,
    ) -> list[tuple[Shelf, list[Shelf]]]:
        """Shelve several streams in one transaction (one row each, all naming ``pattern``).
        A live shelf for the same stream and rule is ended and replaced by the new one; each
        new shelf comes back with the shelves it replaced, so the caller can say whether it
        extends or shortens them."""
        done: list[tuple[Shelf, list[Shelf]]] = []
        with self.transaction():
            live = self.active_shelves(now)
            for stream in streams:
                old = [s for s in live if s.stream == stream and s.rule == rule]
                if old:
                    self.db.conn.executemany(
                        "UPDATE shelves SET ended_at = ?, ended_by = ? WHERE id = ?",
                        [(now, by, s.id) for s in old],
                    )
                shelf = self.shelve(stream, rule, until=until, reason=reason, by=by, now=now)
                if pattern is not None:
                    self.db.execute(
                        "UPDATE shelves SET pattern = ? WHERE id = ?", (pattern, shelf.id)
                    )
                    shelf = self._shelf(shelf.id)
                done.append((shelf, old))
        return done

    def unshelve(self, stream: str, rule: str | None = None, *, by: str, now: float) -> list[Shelf]:
        """End the stream's live shelves now: all of them when ``rule`` is None, else only that
        rule's. Raises :class:`NotShelved` when there is nothing to end."""
        with self.transaction():
            live = [
                s
                for s in self.active_shelves(now)
                if s.stream == stream and (rule is None or s.rule == rule)
            ]
            if not live:
                what = f"stream {stream!r}" + ("" if rule is None else f" rule {rule!r}")
                raise NotShelved(
                    f"nothing is shelved for {what} at {_iso(now)}; list the active shelves "
                    "to see what is."
                )
            self.db.conn.executemany(
                "UPDATE shelves SET ended_at = ?, ended_by = ? WHERE id = ?",
                [(now, by, s.id) for s in live],
            )
            for alert in self._live_covered(stream, rule):
                self.add_alert_event(
                    alert.id,
                    "unshelved",
                    now=now,
                    actor=by,
                    data={"shelf_ids": [s.id for s in live]},
                )
            return [self._shelf(s.id) for s in live]

    def active_shelves(self, now: float) -> list[Shelf]:
        """Shelves in force at ``now`` (not ended, not yet expired), oldest first."""
        rows = self._all(
            "SELECT * FROM shelves WHERE ended_at IS NULL AND until > ? ORDER BY id", (now,)
        )
        return [Shelf(**r) for r in rows]

    def _shelf(self, shelf_id: int) -> Shelf:
        row = self._one("SELECT * FROM shelves WHERE id = ?", (shelf_id,))
        assert row is not None
        return Shelf(**row)

    def _live_covered(self, stream: str, rule: str | None) -> list[Alert]:
        return [a for a in self.live_alerts([stream]) if rule is None or rule in a.rules]

    # ---- notification outbox

    def enqueue_notification(
        self,
        key: str,
        *,
        alert_id: int | None,
        route: str,
        payload: Mapping[str, Any],
        now: float,
        expires_at: float | None = None,
    ) -> int | None:
        """Queue a payload for ``route``; return the new row id, or None when a row with this
        idempotency key exists already (a replay), in which case nothing changes."""
        cur = self.db.execute(
            """INSERT INTO outbox (idempotency_key, alert_id, route, payload_json, created_at,
                next_attempt_at, expires_at)
            VALUES (?, ?, ?, ?, ?, ?, ?)
            ON CONFLICT (idempotency_key) DO NOTHING""",
            (key, alert_id, route, json.dumps(dict(payload)), now, now, expires_at),
        )
        return int(cur.lastrowid) if cur.rowcount == 1 else None

    def due_notifications(self, now: float, *, limit: int = 100) -> list[Notification]:
        """Undelivered, unexpired rows whose next attempt is due, oldest due first."""
        rows = self._all(
            """SELECT * FROM outbox
            WHERE delivered_at IS NULL AND next_attempt_at <= ?
                AND (expires_at IS NULL OR expires_at > ?)
            ORDER BY next_attempt_at, id LIMIT ?""",
            (now, now, limit),
        )
        return [_notification(r) for r in rows]

    def notifications(self, *, alert_id: int | None = None) -> list[Notification]:
        """Every outbox row (of one alert when given), oldest first."""
        if alert_id is None:
            rows = self._all("SELECT * FROM outbox ORDER BY id")
        else:
            rows = self._all("SELECT * FROM outbox WHERE alert_id = ? ORDER BY id", (alert_id,))
        return [_notification(r) for r in rows]

    def mark_delivered(self, notification_id: int, *, now: float) -> None:
        """Record success; the row is never offered again. Marking twice keeps the first time."""
        cur = self.db.execute(
            "UPDATE outbox SET delivered_at = coalesce(delivered_at, ?) WHERE id = ?",
            (now, notification_id),
        )
        if cur.rowcount == 0:
            raise NotificationNotFound(_no_notification(notification_id))

    def mark_failed(self, notification_id: int, error: str, next_attempt_at: float) -> None:
        """Record a failed attempt and when to try again (the caller chooses the backoff)."""
        cur = self.db.execute(
            """UPDATE outbox SET attempts = attempts + 1, last_error = ?, next_attempt_at = ?
            WHERE id = ? AND delivered_at IS NULL""",
            (error, next_attempt_at, notification_id),
        )
        if cur.rowcount == 0:
            row = self._one("SELECT delivered_at FROM outbox WHERE id = ?", (notification_id,))
            if row is None:
                raise NotificationNotFound(_no_notification(notification_id))
            # Already delivered (e.g. a late failure report after a retry succeeded): keep it so.


def _flood(row: Mapping[str, Any]) -> Flood:
    return Flood(
        row["id"],
        row["started_at"],
        row["ended_at"],
        row["changes"],
        json.loads(row["streams_json"]),
    )


def _notification(row: Mapping[str, Any]) -> Notification:
    fields = {k: v for k, v in row.items() if k != "payload_json"}
    return Notification(payload=json.loads(row["payload_json"]), **fields)


def _no_alert(alert_id: int) -> str:
    return f"no alert has id {alert_id}; list the alerts to find the right id."


def _no_notification(notification_id: int) -> str:
    return f"no outbox row has id {notification_id}; it may have been pruned or never existed."
