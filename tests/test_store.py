"""The SQLite store, on real files: pragmas, migrations, one-transaction batches, retention,
alerts and their audit trail, shelves, the outbox.

Where a check reads the database it often does so through a second, independent ``sqlite3``
connection, so it sees only what was committed to the file.
"""

from __future__ import annotations

import hashlib
import json
import math
import sqlite3
import struct
from pathlib import Path
from typing import Any

import pytest
import sqlite_utils
from hypothesis import given, settings
from hypothesis import strategies as st

from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.store import (
    DEAD_LETTER_KEEP_BYTES,
    MIGRATIONS,
    Alert,
    AlertAlreadyAcknowledged,
    AlertAlreadyCleared,
    AlertAlreadyOpen,
    AlertNotFound,
    BaselineVersionConflict,
    NotADatabase,
    NotificationNotFound,
    NotShelved,
    SchemaTooNew,
    ShelfRejected,
    Store,
    migrate,
    read_json,
)

T0 = 1_700_000_000.0

BOTH_BACKENDS = True
"""Every test here that takes ``fresh_db`` runs on SQLite and on PostgreSQL, except those
marked ``sqlite_only`` (about the file, its pragmas and its migrations)."""


def commit_batch(
    store: Store, outcomes: list[Outcome], *, now: float, checkpoints: dict | None = None
) -> int:
    """A batch as the pipeline commits it: its readings and due checkpoints in one transaction."""
    with store.transaction():
        stored = store.add_readings(outcomes, now=now)
        if checkpoints:
            store.save_checkpoints(checkpoints, now=now)
    return stored


def outcome(
    stream: str,
    time: float,
    value: float,
    *,
    index: int | None = None,
    phase: str = "monitoring",
    accepted: bool = True,
) -> Outcome:
    return Outcome(
        reading=Reading(stream, time, value),
        accepted=accepted,
        reason=None if accepted else "duplicate",
        index=index,
        phase=phase,  # type: ignore[arg-type]
    )


def signal(
    stream: str = "line-1/temp", rule: str = "beyond-limits", time: float = T0, value: float = 91.0
) -> StreamSignal:
    return StreamSignal(
        stream=stream,
        rule=rule,
        chart="x",
        side="upper",
        index=12,
        time=time,
        value=value,
        involved=(12,),
        center=80.0,
        sigma=3.0,
        ucl=89.0,
        lcl=71.0,
        mr=9.0,
        mr_ucl=11.06,
        baseline_version=1,
    )


def raw(store: Store) -> Any:
    """A second connection to the same database: it sees committed data only."""
    if store.backend == "postgresql":
        import psycopg

        return psycopg.connect(store.path, autocommit=True)
    return sqlite3.connect(store.path)


def as_text(payload: bytes | str | None) -> str | None:
    """A dead letter's payload as text: SQLite gives back text stored as text, PostgreSQL
    keeps every payload as bytes (``bytea``)."""
    return payload.decode() if isinstance(payload, bytes) else payload


def count(conn: Any, table: str) -> int:
    return conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


# --------------------------------------------------------------------------- opening


@pytest.mark.sqlite_only
def test_open_sets_wal_synchronous_normal_busy_timeout_and_foreign_keys(fresh_db: Store):
    conn = fresh_db.db.conn
    assert fresh_db.journal_mode == "wal"
    # SQLite "PRAGMA synchronous" documentation: 0 OFF, 1 NORMAL, 2 FULL, 3 EXTRA.
    assert conn.execute("PRAGMA synchronous").fetchone()[0] == 1
    assert conn.execute("PRAGMA busy_timeout").fetchone()[0] == 5000
    assert conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    # WAL is a property of the file, so a fresh connection sees it too.
    assert raw(fresh_db).execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_busy_timeout_is_configurable(tmp_path: Path):
    with Store.open(tmp_path / "a.db", busy_timeout_s=0.25) as store:
        assert store.db.conn.execute("PRAGMA busy_timeout").fetchone()[0] == 250


def test_open_creates_missing_parent_directories(tmp_path: Path):
    with Store.open(tmp_path / "var" / "lib" / "limitwatch.db") as store:
        assert store.schema_version() == MIGRATIONS[-1].version


@pytest.mark.sqlite_only
def test_every_table_and_the_outbox_columns_exist(fresh_db: Store):
    tables = set(fresh_db.db.table_names())
    assert {
        "schema_migrations",
        "streams",
        "baselines",
        "readings",
        "checkpoints",
        "alerts",
        "alert_events",
        "shelves",
        "outbox",
        "dead_letters",
        "file_offsets",
    } <= tables
    assert set(fresh_db.db["outbox"].columns_dict) == {
        "id",
        "idempotency_key",
        "alert_id",
        "route",
        "payload_json",
        "created_at",
        "next_attempt_at",
        "attempts",
        "last_error",
        "delivered_at",
        "expires_at",
    }
    assert {
        "created_at",
        "created_by",
        "reason",
        "method",
        "first_index",
        "last_index",
        "first_time",
        "last_time",
        "excluded_json",
        "numbers_json",
    } <= set(fresh_db.db["baselines"].columns_dict)


def test_migrations_are_recorded_once_and_reopening_changes_nothing(tmp_path: Path):
    path = tmp_path / "lw.db"
    Store.open(path, now=T0).close()
    Store.open(path, now=T0 + 99).close()
    rows = sqlite3.connect(path).execute(
        "SELECT version, applied_at FROM schema_migrations ORDER BY version"
    )
    assert list(rows) == [(m.version, T0) for m in MIGRATIONS]


def test_an_older_file_is_upgraded_in_place_keeping_its_data(tmp_path: Path):
    path = tmp_path / "old.db"
    # Build a version-1 file: only the first migration, with data written by plain SQL.
    old = sqlite_utils.Database(path)
    assert migrate(old, now=T0, target=1) == [1]
    old.execute(
        """INSERT INTO baselines (stream, version, created_at, created_by, reason, method,
            numbers_json)
        VALUES ('kiln-1/temp', 1, ?, 'ops', 'first fit', 'xmr', '{"center": 5}')""",
        (T0,),
    )
    old.execute("INSERT INTO readings (stream, time, value) VALUES ('kiln-1/temp', ?, 4.5)", (T0,))
    assert "alerts" not in old.table_names()
    old.close()

    with Store.open(path, now=T0 + 3600) as store:
        assert store.schema_version() == MIGRATIONS[-1].version
        applied = store.db.execute(
            "SELECT version, applied_at FROM schema_migrations ORDER BY version"
        ).fetchall()
        assert applied == [(1, T0)] + [(m.version, T0 + 3600) for m in MIGRATIONS[1:]]
        baseline = store.current_baseline("kiln-1/temp")
        assert baseline is not None and baseline.numbers == {"center": 5}
        assert [r.value for r in store.recent_readings("kiln-1/temp")] == [4.5]
        # The tables added by later migrations work.
        alert = store.open_alert(signal("kiln-1/temp"), severity="warning", now=T0 + 3601)
        assert store.alert(alert.id).state == "open"
        assert "file_offsets" in store.db.table_names()


def test_each_reading_keeps_the_rules_that_signalled_on_it_and_old_ones_say_unknown(
    tmp_path: Path,
):
    path = tmp_path / "v3.db"
    old = sqlite_utils.Database(path)
    migrate(old, now=T0, target=3)
    old.execute("INSERT INTO readings (stream, time, value) VALUES ('kiln-1/temp', ?, 4.5)", (T0,))
    old.close()
    with Store.open(path, now=T0) as store:
        quiet = Outcome(Reading("kiln-1/temp", T0 + 60, 4.6), True, index=1, phase="monitoring")
        loud = Outcome(
            Reading("kiln-1/temp", T0 + 120, 9.9),
            True,
            index=2,
            phase="monitoring",
            signals=(signal("kiln-1/temp"), signal("kiln-1/temp", rule="trend")),
        )
        store.add_readings([quiet, loud], now=T0 + 120)
        got = [r.signals for r in store.recent_readings("kiln-1/temp")]
    assert got == [None, (), ("beyond-limits", "trend")]


def test_a_file_from_a_newer_limitwatch_is_refused_untouched(tmp_path: Path):
    path = tmp_path / "new.db"
    Store.open(path).close()
    conn = sqlite3.connect(path)
    conn.execute("INSERT INTO schema_migrations VALUES (99, 'from the future', NULL)")
    conn.commit()
    conn.close()
    with pytest.raises(SchemaTooNew, match=r"schema version 99.*upgrade limitwatch"):
        Store.open(path)
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT max(version) FROM schema_migrations").fetchone()[0] == 99


def test_a_file_that_is_not_a_database_is_refused_with_a_clear_error(tmp_path: Path):
    path = tmp_path / "notes.txt"
    path.write_bytes(b"this is a shift log, not a database\n" * 200)
    with pytest.raises(NotADatabase, match="Check the database path"):
        Store.open(path)


# --------------------------------------------------------------------------- transactions


def test_one_transaction_commits_readings_streams_and_checkpoints_together(fresh_db: Store):
    batch = [
        outcome("line-1/temp", T0, 80.5, index=0),
        outcome("line-1/temp", T0 + 60, 81.0, index=1),
        outcome("line-1/temp", T0 + 60, 81.0, accepted=False),  # refused: not kept
        outcome("line-2/temp", T0 + 30, 70.0, index=0, phase="learning"),
    ]
    stored = commit_batch(fresh_db, batch, now=T0 + 61, checkpoints={"line-1/temp": {"n": 2}})
    assert stored == 3
    other = raw(fresh_db)
    assert count(other, "readings") == 3
    assert other.execute("SELECT state_json FROM checkpoints").fetchall() == [('{"n": 2}',)]
    streams = {s.id: s for s in fresh_db.streams()}
    assert streams["line-1/temp"].last_value == 81.0
    assert streams["line-1/temp"].last_index == 1
    assert streams["line-2/temp"].phase == "learning"


def test_a_failure_mid_batch_leaves_nothing_written(fresh_db: Store):
    batch = [outcome("line-1/temp", T0 + i, 80.0 + i, index=i) for i in range(5)]
    # The readings are inserted first; the checkpoint cannot be serialised, so the batch fails
    # after them.
    with pytest.raises(TypeError):
        commit_batch(fresh_db, batch, now=T0 + 5, checkpoints={"line-1/temp": {"bad": object()}})
    other = raw(fresh_db)
    for table in ("readings", "streams", "checkpoints"):
        assert count(other, table) == 0, table
    assert not fresh_db.sql.in_transaction


def test_an_outer_transaction_rolls_back_the_batch_and_the_alerts_together(fresh_db: Store):
    with pytest.raises(RuntimeError), fresh_db.transaction():
        commit_batch(fresh_db, [outcome("line-1/temp", T0, 95.0, index=0)], now=T0)
        fresh_db.open_alert(signal(), severity="warning", now=T0)
        raise RuntimeError("crash before commit")
    other = raw(fresh_db)
    for table in ("readings", "streams", "alerts", "alert_events"):
        assert count(other, table) == 0, table


@pytest.mark.sqlite_only
def test_a_transaction_takes_the_write_lock_at_begin_and_readers_still_read(fresh_db: Store):
    fresh_db.add_dead_letter("test", "x", "seed", now=T0)
    other = sqlite3.connect(fresh_db.path, timeout=0, isolation_level=None)
    with fresh_db.transaction():
        # BEGIN IMMEDIATE: even before this transaction writes, no one else may start writing.
        with pytest.raises(sqlite3.OperationalError, match="locked"):
            other.execute("BEGIN IMMEDIATE")
        # WAL: readers are not blocked by the writer.
        assert count(other, "dead_letters") == 1
        fresh_db.add_dead_letter("test", "y", "inside", now=T0)
        assert count(other, "dead_letters") == 1  # not committed yet
    assert count(other, "dead_letters") == 2
    other.execute("BEGIN IMMEDIATE")
    other.execute("ROLLBACK")


def test_a_nested_block_that_fails_rolls_back_only_itself(fresh_db: Store):
    with fresh_db.transaction():
        fresh_db.add_dead_letter("test", "kept", "outer", now=T0)
        with pytest.raises(ValueError), fresh_db.transaction():
            fresh_db.add_dead_letter("test", "dropped", "inner", now=T0)
            raise ValueError("inner step failed")
    assert [as_text(d.payload) for d in fresh_db.dead_letters()] == ["kept"]


# --------------------------------------------------------------------------- readings


def test_a_redelivered_reading_is_stored_once(fresh_db: Store):
    batch = [outcome("s", T0 + i, float(i), index=i) for i in range(3)]
    assert commit_batch(fresh_db, batch, now=T0) == 3
    assert commit_batch(fresh_db, batch, now=T0 + 10) == 0
    assert [r.value for r in fresh_db.recent_readings("s")] == [0.0, 1.0, 2.0]


def test_an_older_reading_does_not_overwrite_the_stream_summary(fresh_db: Store):
    commit_batch(fresh_db, [outcome("s", T0 + 100, 5.0, index=7)], now=T0 + 100)
    commit_batch(fresh_db, [outcome("s", T0 + 50, 4.0, index=6)], now=T0 + 101)
    (row,) = fresh_db.streams()
    assert (row.last_time, row.last_value, row.last_index) == (T0 + 100, 5.0, 7)
    assert row.first_seen == T0 + 100


def test_recent_readings_returns_the_newest_n_oldest_first(fresh_db: Store):
    commit_batch(fresh_db,
        [outcome("s", T0 + i, float(i), index=i) for i in range(10)]
        + [outcome("other", T0, 99.0, index=0)],
        now=T0 + 10,
    )
    recent = fresh_db.recent_readings("s", last=3)
    assert [(r.time, r.value, r.index) for r in recent] == [
        (T0 + 7, 7.0, 7),
        (T0 + 8, 8.0, 8),
        (T0 + 9, 9.0, 9),
    ]
    assert len(fresh_db.recent_readings("s")) == 10


def _fill(store: Store) -> list[tuple[str, float]]:
    keys = [("a", T0 + 60 * i) for i in range(10)] + [("b", T0 + 60 * i) for i in range(3)]
    commit_batch(store, [outcome(s, t, 1.0) for s, t in keys], now=T0 + 600)
    return keys


def _kept(store: Store) -> set[tuple[str, float]]:
    return set(raw(store).execute("SELECT stream, time FROM readings"))


def test_retention_by_age(fresh_db: Store):
    keys = _fill(fresh_db)
    now, max_age = T0 + 600, 300
    deleted = fresh_db.prune_readings(now, max_age_s=max_age)
    expected = {(s, t) for s, t in keys if t >= now - max_age}
    assert _kept(fresh_db) == expected
    assert deleted == len(keys) - len(expected)


def test_retention_by_count_per_stream(fresh_db: Store):
    keys = _fill(fresh_db)
    deleted = fresh_db.prune_readings(T0 + 600, max_per_stream=4)
    newest_a = sorted(t for s, t in keys if s == "a")[-4:]
    expected = {("a", t) for t in newest_a} | {k for k in keys if k[0] == "b"}
    assert _kept(fresh_db) == expected
    assert deleted == len(keys) - len(expected)


def test_retention_by_age_and_count_together_and_neither(fresh_db: Store):
    keys = _fill(fresh_db)
    assert fresh_db.prune_readings(T0 + 600) == 0
    assert len(_kept(fresh_db)) == len(keys)
    fresh_db.prune_readings(T0 + 600, max_age_s=500, max_per_stream=2)
    # Age keeps a at 120..540 s and b at 120 s; count then keeps a's newest two and b's one.
    assert _kept(fresh_db) == {("a", T0 + 480), ("a", T0 + 540), ("b", T0 + 120)}


# --------------------------------------------------------------------------- checkpoints, baselines


def test_checkpoints_are_upserted_per_stream(fresh_db: Store):
    fresh_db.save_checkpoint("s1", {"n": 1, "ring": [1.0, 2.0]}, now=T0)
    fresh_db.save_checkpoint("s2", {"n": 5}, now=T0)
    fresh_db.save_checkpoint("s1", {"n": 2, "ring": [2.0, 3.0]}, now=T0 + 60)
    assert fresh_db.load_checkpoints() == {"s1": {"n": 2, "ring": [2.0, 3.0]}, "s2": {"n": 5}}
    assert fresh_db.load_checkpoint("missing") is None
    assert count(raw(fresh_db), "checkpoints") == 2


def test_baselines_are_versioned_with_provenance(fresh_db: Store):
    first = fresh_db.add_baseline(
        "kiln-1/temp",
        {"center": 120.0, "mr_bar": 2.1},
        now=T0,
        by="limitwatch",
        reason="learning phase complete",
        method="xmr-mean-mrbar",
        first_index=0,
        last_index=19,
        first_time=T0 - 1200,
        last_time=T0,
        excluded=[7, 3, 7],
    )
    second = fresh_db.add_baseline(
        "kiln-1/temp",
        {"center": 118.5, "mr_bar": 1.9},
        now=T0 + 86400,
        by="j.ortiz",
        reason="new burner fitted",
        method="xmr-mean-mrbar",
    )
    assert (first.version, second.version) == (1, 2)
    assert first.excluded == (3, 7)
    assert fresh_db.current_baseline("kiln-1/temp") == second
    history = fresh_db.baseline_history("kiln-1/temp")
    assert [(b.version, b.created_by, b.reason) for b in history] == [
        (1, "limitwatch", "learning phase complete"),
        (2, "j.ortiz", "new burner fitted"),
    ]
    assert history[0].first_time == T0 - 1200 and history[0].last_index == 19
    assert fresh_db.current_baseline("unknown") is None


def test_an_explicit_baseline_version_must_be_newer(fresh_db: Store):
    fresh_db.add_baseline("s", {"center": 1.0}, now=T0, by="x", reason="r", method="m", version=3)
    with pytest.raises(BaselineVersionConflict, match="already has baseline version 3"):
        fresh_db.add_baseline(
            "s", {"center": 2.0}, now=T0, by="x", reason="r", method="m", version=3
        )
    assert fresh_db.add_baseline("s", {}, now=T0, by="x", reason="r", method="m").version == 4


def test_dead_letters_keep_the_raw_payload(fresh_db: Store):
    fresh_db.add_dead_letter("mqtt:plant/line-1", b"\xff\x00temp", "not UTF-8", now=T0)
    fresh_db.add_dead_letter("file:/exports/a.csv", "12;;", "no value column", now=T0 + 1)
    newest, oldest = fresh_db.dead_letters()
    assert (as_text(newest.payload), newest.reason) == ("12;;", "no value column")
    assert (oldest.payload, oldest.source) == (b"\xff\x00temp", "mqtt:plant/line-1")


def test_a_10_mb_dead_letter_keeps_a_bounded_prefix_with_its_size_and_hash(fresh_db: Store):
    huge = b"{" + b"7" * (10 * 1024 * 1024) + b"}"
    text = "\u00e9" * 3000  # 6000 bytes of UTF-8: over the bound although under it in characters
    with fresh_db.transaction():
        fresh_db.add_dead_letter("mqtt:plant", huge, "oversize", now=T0)
        fresh_db.add_dead_letter("file:a.csv", text, "bad-json", now=T0 + 1)
        fresh_db.add_dead_letter("file:a.csv", "12;;", "missing-field", now=T0 + 2)
    short, cut_text, cut = fresh_db.dead_letters()
    assert cut.payload == huge[:DEAD_LETTER_KEEP_BYTES] and cut.truncated
    assert cut.payload_size == len(huge) == 10 * 1024 * 1024 + 2
    assert cut.payload_sha256 == hashlib.sha256(huge).hexdigest()
    assert cut_text.payload == text.encode()[:DEAD_LETTER_KEEP_BYTES]
    assert cut_text.payload_size == 6000 and cut_text.truncated
    assert cut_text.payload_sha256 == hashlib.sha256(text.encode()).hexdigest()
    assert (as_text(short.payload), short.payload_size, short.truncated) == ("12;;", 4, False)
    # what the file holds, read by another connection
    stored = raw(fresh_db).execute("SELECT max(length(payload)) FROM dead_letters").fetchone()[0]
    assert stored <= DEAD_LETTER_KEEP_BYTES


def test_dead_letters_are_pruned_by_age_then_by_count(tmp_path: Path):
    path = tmp_path / "letters.db"
    with Store.open(path, now=T0) as store:
        with store.transaction():
            for i in range(50):  # one an hour
                store.add_dead_letter("src", f"bad {i}", "bad-json", now=T0 + 3600 * i)
        now = T0 + 3600 * 49
        # older than 24 h: letters 0..24 (letter 25 is exactly 24 h old and stays)
        assert store.prune_dead_letters(now, max_age_s=24 * 3600) == 25
        assert store.prune_dead_letters(now, max_count=10) == 15
        assert store.prune_dead_letters(now, max_age_s=24 * 3600, max_count=10) == 0
    left = [r[0] for r in sqlite3.connect(path).execute("SELECT payload FROM dead_letters")]
    assert left == [f"bad {i}" for i in range(40, 50)]


def test_upgrading_cuts_dead_letters_stored_whole_and_keeps_their_size_and_hash(tmp_path: Path):
    path = tmp_path / "v4.db"
    old = sqlite_utils.Database(path)
    migrate(old, now=T0, target=4)
    big = bytes(range(256)) * 4000  # 1,024,000 bytes
    old.execute(
        "INSERT INTO dead_letters (source, received_at, reason, payload) VALUES (?, ?, ?, ?)",
        ("mqtt:plant", T0, "oversize", big),
    )
    old.execute(
        "INSERT INTO dead_letters (source, received_at, reason, payload) VALUES (?, ?, ?, ?)",
        ("file:a.csv", T0 + 1, "bad-json", "{oops"),
    )
    old.execute(
        "INSERT INTO dead_letters (source, received_at, reason, payload) VALUES (?, ?, ?, NULL)",
        ("file:a.csv", T0 + 2, "unreadable-line"),
    )
    old.close()
    with Store.open(path, now=T0 + 60) as store:
        assert store.schema_version() == MIGRATIONS[-1].version
        empty, small, cut = store.dead_letters()
    assert cut.payload == big[:DEAD_LETTER_KEEP_BYTES] and cut.truncated
    assert (cut.payload_size, cut.payload_sha256) == (len(big), hashlib.sha256(big).hexdigest())
    assert (small.payload, small.payload_size) == ("{oops", 5)
    assert small.payload_sha256 == hashlib.sha256(b"{oops").hexdigest()
    assert (empty.payload, empty.payload_size, empty.payload_sha256) == (None, None, None)


# --------------------------------------------------------------------------- alerts


def test_open_alert_writes_the_row_and_an_opened_event(fresh_db: Store):
    alert = fresh_db.open_alert(signal(value=93.5), severity="critical", now=T0 + 2)
    assert (alert.state, alert.severity, alert.signal_count) == ("open", "critical", 1)
    assert (alert.first_value, alert.last_value, alert.first_time) == (93.5, 93.5, T0)
    assert alert.signal["ucl"] == 89.0 and alert.opened_at == T0 + 2
    (event,) = fresh_db.alert_events(alert.id)
    assert (event.kind, event.actor, event.time) == ("opened", "limitwatch", T0 + 2)


def test_only_one_live_incident_per_stream(fresh_db: Store):
    alert = fresh_db.open_alert(signal(), severity="warning", now=T0)
    with pytest.raises(AlertAlreadyOpen, match=f"already has live incident {alert.id}"):
        fresh_db.open_alert(signal(time=T0 + 1), severity="warning", now=T0 + 1)
    # Another rule joins the incident rather than opening a second one.
    with pytest.raises(AlertAlreadyOpen, match=f"already has live incident {alert.id}"):
        fresh_db.open_alert(signal(rule="trend"), severity="warning", now=T0)
    # The database enforces it too, whoever writes.
    with pytest.raises(fresh_db.sql.integrity, match=r"(?i)unique"):
        fresh_db.sql.execute(
            """INSERT INTO alerts (id, stream, rule, state, severity, opened_at, first_time,
                last_time, seen_time) VALUES (999, 'line-1/temp', 'trend', 'acknowledged',
                'warning', 0, 0, 0, 0)"""
        )
    fresh_db.open_alert(signal("line-2/temp"), severity="warning", now=T0)


def test_acknowledging_an_unknown_alert_raises_alert_not_found(fresh_db: Store):
    with pytest.raises(AlertNotFound, match="no alert has id 404"):
        fresh_db.acknowledge(404, by="m.chen", note="looking", now=T0)


def test_acknowledge_then_again_then_after_clearing(fresh_db: Store):
    alert = fresh_db.open_alert(signal(), severity="warning", now=T0)
    acked = fresh_db.acknowledge(alert.id, by="m.chen", note="checking coolant", now=T0 + 60)
    assert (acked.state, acked.acknowledged_by, acked.ack_note) == (
        "acknowledged",
        "m.chen",
        "checking coolant",
    )
    with pytest.raises(AlertAlreadyAcknowledged, match=r"already acknowledged by m\.chen"):
        fresh_db.acknowledge(alert.id, by="r.diaz", now=T0 + 61)
    fresh_db.clear_alert(alert.id, now=T0 + 120, note="quiet again")
    with pytest.raises(AlertAlreadyCleared, match="already cleared"):
        fresh_db.acknowledge(alert.id, by="r.diaz", now=T0 + 121)
    kinds = [(e.kind, e.actor) for e in fresh_db.alert_events(alert.id)]
    assert kinds == [
        ("opened", "limitwatch"),
        ("acknowledged", "m.chen"),
        ("cleared", "limitwatch"),
    ]
    # The failed attempts changed nothing.
    assert fresh_db.alert(alert.id).acknowledged_by == "m.chen"


def test_alert_events_are_append_only(fresh_db: Store):
    alert = fresh_db.open_alert(signal(), severity="warning", now=T0)
    with pytest.raises(Exception, match="append-only"):
        fresh_db.sql.execute("UPDATE alert_events SET actor = 'someone else'")
    with pytest.raises(Exception, match="append-only"):
        fresh_db.sql.execute("DELETE FROM alert_events")
    assert len(fresh_db.alert_events(alert.id)) == 1
    with pytest.raises(AlertNotFound):
        fresh_db.add_alert_event(999, "notified", now=T0)
    with pytest.raises(AlertNotFound):
        fresh_db.alert_events(999)
    with pytest.raises(ValueError, match="unknown alert event kind"):
        fresh_db.add_alert_event(alert.id, "deleted", now=T0)


def test_alerts_filter_by_state_and_stream_glob(fresh_db: Store):
    a = fresh_db.open_alert(signal("line-1/temp"), severity="warning", now=T0)
    b = fresh_db.open_alert(signal("line-2/temp"), severity="warning", now=T0)
    c = fresh_db.open_alert(signal("kiln-1/temp"), severity="warning", now=T0)
    fresh_db.acknowledge(b.id, by="x", now=T0 + 1)
    fresh_db.clear_alert(c.id, now=T0 + 2)
    assert [x.id for x in fresh_db.alerts()] == [c.id, b.id, a.id]
    assert [x.id for x in fresh_db.alerts(state="open")] == [a.id]
    assert [x.id for x in fresh_db.alerts(state=["open", "acknowledged"])] == [b.id, a.id]
    assert [x.id for x in fresh_db.alerts(stream_glob="line-*")] == [b.id, a.id]
    assert [x.id for x in fresh_db.alerts(stream_glob="*/temp", state="cleared")] == [c.id]
    assert [x.id for x in fresh_db.alerts(limit=1)] == [c.id]
    assert [x.id for x in fresh_db.live_alerts(["line-1/temp", "kiln-1/temp"])] == [a.id]
    with pytest.raises(ValueError, match="states are open, acknowledged, cleared"):
        fresh_db.alerts(state="closed")


def test_update_alert_changes_bookkeeping_only(fresh_db: Store):
    alert = fresh_db.open_alert(signal(), severity="warning", now=T0)
    fresh_db.update_alert(alert.id, signal_count=4, quiet_count=2, signal={"ucl": 1.0})
    again = fresh_db.alert(alert.id)
    assert (again.signal_count, again.quiet_count, again.signal) == (4, 2, {"ucl": 1.0})
    with pytest.raises(ValueError, match="cannot change \\['state'\\]"):
        fresh_db.update_alert(alert.id, state="cleared")
    with pytest.raises(AlertNotFound):
        fresh_db.update_alert(999, quiet_count=1)


# --------------------------------------------------------------------------- shelves


def test_shelve_needs_a_reason_and_a_future_end(fresh_db: Store):
    with pytest.raises(ShelfRejected, match="needs a reason"):
        fresh_db.shelve("s", until=T0 + 60, reason="  ", by="x", now=T0)
    with pytest.raises(ShelfRejected, match="must end in the future"):
        fresh_db.shelve("s", until=T0, reason="maintenance", by="x", now=T0)
    assert count(raw(fresh_db), "shelves") == 0


def test_active_shelves_exclude_expired_and_ended_ones(fresh_db: Store):
    short = fresh_db.shelve("s", until=T0 + 60, reason="valve swap", by="x", now=T0)
    long = fresh_db.shelve("s", "trend", until=T0 + 600, reason="recalibration", by="x", now=T0)
    other = fresh_db.shelve("t", until=T0 + 600, reason="line stop", by="x", now=T0)
    assert [s.id for s in fresh_db.active_shelves(T0 + 59)] == [short.id, long.id, other.id]
    assert [s.id for s in fresh_db.active_shelves(T0 + 60)] == [long.id, other.id]
    ended = fresh_db.unshelve("s", "trend", by="y", now=T0 + 100)
    assert [(s.id, s.ended_by, s.ended_at) for s in ended] == [(long.id, "y", T0 + 100)]
    assert [s.id for s in fresh_db.active_shelves(T0 + 100)] == [other.id]
    with pytest.raises(NotShelved, match="nothing is shelved for stream 's'"):
        fresh_db.unshelve("s", by="y", now=T0 + 101)


def test_unshelving_a_stream_ends_its_rule_shelves_too(fresh_db: Store):
    fresh_db.shelve("s", until=T0 + 600, reason="a", by="x", now=T0)
    fresh_db.shelve("s", "trend", until=T0 + 600, reason="b", by="x", now=T0)
    assert len(fresh_db.unshelve("s", by="y", now=T0 + 1)) == 2
    assert fresh_db.active_shelves(T0 + 1) == []


def test_shelving_and_unshelving_are_logged_on_the_live_alerts_covered(fresh_db: Store):
    hit = fresh_db.open_alert(signal("s", "trend"), severity="warning", now=T0)
    miss = fresh_db.open_alert(signal("t", "trend"), severity="warning", now=T0)
    fresh_db.shelve("s", "trend", until=T0 + 600, reason="recalibration", by="x", now=T0 + 1)
    fresh_db.unshelve("s", "trend", by="y", now=T0 + 2)
    assert [(e.kind, e.actor) for e in fresh_db.alert_events(hit.id)] == [
        ("opened", "limitwatch"),
        ("shelved", "x"),
        ("unshelved", "y"),
    ]
    assert [e.kind for e in fresh_db.alert_events(miss.id)] == ["opened"]


# --------------------------------------------------------------------------- outbox


def test_enqueue_is_idempotent_on_the_key(fresh_db: Store):
    first = fresh_db.enqueue_notification(
        "7:opened:0:default", alert_id=None, route="default", payload={"n": 1}, now=T0
    )
    again = fresh_db.enqueue_notification(
        "7:opened:0:default", alert_id=None, route="default", payload={"n": 2}, now=T0 + 5
    )
    assert isinstance(first, int) and again is None
    (row,) = fresh_db.notifications()
    assert (row.id, row.payload, row.created_at) == (first, {"n": 1}, T0)


def test_due_notifications_respect_time_limit_delivery_and_expiry(fresh_db: Store):
    def put(key: str, now: float, expires_at: float | None = None) -> int:
        made = fresh_db.enqueue_notification(
            key, alert_id=None, route="r", payload={}, now=now, expires_at=expires_at
        )
        assert made is not None
        return made

    a = put("a", T0)
    b = put("b", T0 + 10)
    c = put("c", T0 + 20, expires_at=T0 + 30)
    assert [n.id for n in fresh_db.due_notifications(T0 + 5)] == [a]
    assert [n.id for n in fresh_db.due_notifications(T0 + 25)] == [a, b, c]
    assert [n.id for n in fresh_db.due_notifications(T0 + 25, limit=2)] == [a, b]
    assert [n.id for n in fresh_db.due_notifications(T0 + 30)] == [a, b]  # c expired

    fresh_db.mark_failed(a, "HTTP 503", next_attempt_at=T0 + 100)
    failed = fresh_db.notifications()[0]
    assert (failed.attempts, failed.last_error, failed.next_attempt_at) == (1, "HTTP 503", T0 + 100)
    fresh_db.mark_delivered(b, now=T0 + 31)
    assert [n.id for n in fresh_db.due_notifications(T0 + 99)] == []
    assert [n.id for n in fresh_db.due_notifications(T0 + 100)] == [a]

    fresh_db.mark_delivered(a, now=T0 + 101)
    fresh_db.mark_delivered(a, now=T0 + 200)  # a repeated report keeps the first time
    fresh_db.mark_failed(a, "late timeout report", next_attempt_at=T0 + 300)
    delivered = fresh_db.notifications()[0]
    assert (delivered.delivered_at, delivered.attempts) == (T0 + 101, 1)
    assert fresh_db.due_notifications(T0 + 1000) == []


def test_marking_an_unknown_notification_raises(fresh_db: Store):
    with pytest.raises(NotificationNotFound):
        fresh_db.mark_delivered(12, now=T0)
    with pytest.raises(NotificationNotFound):
        fresh_db.mark_failed(12, "boom", T0)


def test_file_offsets_upsert_per_source(fresh_db):
    fresh_db.save_file_offsets("exports", {"1:10": 120, "1:11": 0}, now=1.0)
    fresh_db.save_file_offsets("exports", {"1:10": 480}, now=2.0)
    fresh_db.save_file_offsets("other", {"1:10": 5}, now=2.0)
    assert fresh_db.file_offsets("exports") == {"1:10": 480, "1:11": 0}
    assert fresh_db.file_offsets("other") == {"1:10": 5}
    assert fresh_db.file_offsets("none") == {}


def test_baseline_versions_reports_the_newest_per_stream(fresh_db):
    for stream, versions in {"a": 3, "b": 1}.items():
        for _ in range(versions):
            fresh_db.add_baseline(
                stream, {"center": 1.0}, now=0.0, by="t", reason="r", method="mean"
            )
    assert fresh_db.baseline_versions() == {"a": 3, "b": 1}


def test_a_single_write_outside_a_transaction_is_committed_at_once(tmp_path):
    """Regression: a bare write (mark_delivered) used to leave an implicit transaction open, so
    it -- and every later transaction, reduced to a savepoint -- never reached the file."""
    import sqlite3

    from limitwatch.store import Store

    path = tmp_path / "limitwatch.db"
    store = Store.open(path, now=0.0)
    row = store.enqueue_notification("k:1", alert_id=None, route="r", payload={"a": 1}, now=1.0)
    store.mark_delivered(row, now=2.0)
    store.save_checkpoint("s", {"n": 1}, now=3.0)
    other = sqlite3.connect(path)  # a second process's view, before the first one closes
    try:
        assert other.execute("SELECT delivered_at FROM outbox").fetchall() == [(2.0,)]
        assert other.execute("SELECT count(*) FROM checkpoints").fetchone() == (1,)
    finally:
        other.close()
        store.close()


# --------------------------------------------------------------------------- reading JSON back

_JSON_VALUES = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(-(2**63), 2**63 - 1)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(), inner, max_size=4),
    max_leaves=20,
)


@settings(max_examples=300, deadline=None)
@given(_JSON_VALUES)
def test_read_json_reads_what_the_standard_library_wrote_exactly_as_it_would(value):
    # Checkpoints are written by json.dumps and read back by orjson, falling back to the
    # standard library for NaN and Infinity, which orjson refuses. Every value must come back
    # exactly as json.loads returns it, float bits included.
    text = json.dumps(value)
    assert _same(read_json(text), json.loads(text))


def _same(a: object, b: object) -> bool:
    if isinstance(a, float) and isinstance(b, float):
        return struct.pack("<d", a) == struct.pack("<d", b) or (math.isnan(a) and math.isnan(b))
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    return type(a) is type(b) and a == b


def test_a_checkpoint_with_a_nan_in_it_still_restores(fresh_db: Store):
    # json.dumps writes NaN as a bare word; the fast reader refuses it, the fallback reads it.
    fresh_db.save_checkpoints({"line-1/a": {"format": 2, "x": float("nan"), "y": 1.5}}, now=1.0)
    ((stream, state),) = fresh_db.iter_checkpoints()
    assert stream == "line-1/a" and math.isnan(state["x"]) and state["y"] == 1.5


# --------------------------------------------------------------------------- incidents


def test_an_old_file_with_several_live_alerts_per_stream_gets_one_incident_each(tmp_path):
    path = tmp_path / "v4.db"
    old = sqlite_utils.Database(path)
    assert migrate(old, now=T0, target=4) == [1, 2, 3, 4]

    def alert(stream, rule, state, severity, first, last, count, notified=None):
        cur = old.execute(
            """INSERT INTO alerts (stream, rule, state, severity, opened_at, first_time,
                first_value, last_time, last_value, signal_count, quiet_count, seen_time,
                signal_json, notified_at)
            VALUES (?, ?, ?, ?, ?, ?, 1.0, ?, 2.0, ?, 0, ?, '{}', ?)""",
            (stream, rule, state, severity, first, first, last, count, last, notified),
        )
        old.execute(
            "INSERT INTO alert_events (alert_id, kind, time, actor) VALUES (?, 'opened', ?, 'x')",
            (cur.lastrowid, first),
        )
        return cur.lastrowid

    a = alert(
        "pack-2/downtime", "beyond-limits", "acknowledged", "warning", T0 + 10, T0 + 40, 3, T0
    )
    old.execute(
        "UPDATE alerts SET acknowledged_at = ?, acknowledged_by = 'kim' WHERE id = ?", (T0, a)
    )
    b = alert("pack-2/downtime", "run-one-side", "acknowledged", "critical", T0 + 5, T0 + 50, 2)
    c = alert("pack-2/downtime", "mr-beyond-limit", "open", "info", T0 + 20, T0 + 20, 1)
    gone = alert("pack-2/downtime", "trend", "cleared", "warning", T0 - 99, T0 - 90, 4)
    alone = alert("oven-1/energy", "trend", "acknowledged", "warning", T0, T0 + 1, 1, T0)
    old.execute("UPDATE alerts SET acknowledged_at = ? WHERE id = ?", (T0 + 1, alone))
    old.execute(
        """INSERT INTO outbox (idempotency_key, alert_id, route, payload_json, created_at,
            next_attempt_at) VALUES ('k', ?, 'r', '{}', 0, 0)""",
        (c,),
    )
    old.close()

    with Store.open(path, now=T0 + 3600) as store:
        live = {x.stream: x for x in store.live_alerts()}
        assert set(live) == {"pack-2/downtime", "oven-1/energy"}
        incident = live["pack-2/downtime"]
        # The oldest live alert carries the incident; the others fold into it.
        assert incident.id == a
        assert set(incident.rules) == {"beyond-limits", "run-one-side", "mr-beyond-limit"}
        assert incident.rules["run-one-side"].signal_count == 2
        assert incident.signal_count == 6
        assert (incident.first_time, incident.last_time) == (T0 + 5, T0 + 50)
        assert incident.severity == "critical"  # the highest of its parts
        assert incident.state == "open"  # not every part was acknowledged ...
        assert incident.acknowledged_by is None  # ... so it waits for someone again
        assert incident.announced_severity == "warning"  # so a "raised" notice is owed
        for merged in (b, c):
            row = store.alert(merged)
            assert (row.state, row.merged_into, row.cleared_at) == ("cleared", a, T0 + 3600)
            assert [e.kind for e in store.alert_events(merged)] == ["opened", "merged"]
            assert store.alert(merged).rules == {}
        assert [e.kind for e in store.alert_events(a)] == ["opened", "merged", "merged"]
        # What was cleared already, and a stream with one live alert, stay as they were.
        assert store.alert(gone).state == "cleared" and store.alert(gone).merged_into is None
        assert live["oven-1/energy"].id == alone and live["oven-1/energy"].state == "acknowledged"
        assert set(live["oven-1/energy"].rules) == {"trend"}
        # Acknowledged before the upgrade: receivers are not told of it again.
        assert live["oven-1/energy"].ack_announced_at == T0 + 1
        # The outbox row of a merged alert still points at a row that exists.
        (row,) = store.notifications()
        assert row.alert_id == c
        # And from now on the database refuses a second live incident on a stream.
        with pytest.raises(sqlite3.IntegrityError):
            store.db.execute(
                """INSERT INTO alerts (stream, rule, state, severity, opened_at, first_time,
                    last_time, seen_time) VALUES ('pack-2/downtime', 'x', 'open', 'info',
                    0, 0, 0, 0)"""
            )


def test_write_changes_writes_a_decision_in_one_call_and_a_repeat_queues_nothing(fresh_db):
    from limitwatch.store import ChangeSet, EventRow, OutboxRow, RuleTally

    with fresh_db.transaction():
        first_id = fresh_db.next_alert_id()
    incident = Alert(
        first_id, "s", "trend", "open", "warning", T0, T0, 1, 5.0, T0, 1, 5.0, 1, 0, T0, {}
    )
    incident.rules["trend"] = RuleTally("trend", "warning", 1, T0, 1, 5.0, T0, 1, 5.0, {})
    changes = ChangeSet(
        opened=[incident],
        rules=[(first_id, incident.rules["trend"])],
        events=[EventRow(first_id, "opened", T0)],
        outbox=[OutboxRow(f"{first_id}:opened:0:r", first_id, "r", {"a": 1}, T0, T0 + 9)],
    )
    assert fresh_db.write_changes(changes) == 1
    stored = fresh_db.alert(first_id)
    assert stored == incident
    incident.quiet_count = 2
    incident.rules["trend"].signal_count = 3
    again = ChangeSet(
        changed=[incident],
        rules=[(first_id, incident.rules["trend"])],
        outbox=changes.outbox,
    )
    assert fresh_db.write_changes(again) == 0  # the outbox row is there already
    assert fresh_db.alert(first_id).rules["trend"].signal_count == 3
    assert fresh_db.alert(first_id).quiet_count == 2
    with fresh_db.transaction():
        assert fresh_db.next_alert_id() == first_id + 1


def test_a_read_only_look_refuses_what_it_cannot_read_and_changes_nothing(tmp_path: Path):
    from limitwatch.store import SchemaTooOld

    path = tmp_path / "plant.db"
    with Store.open(path, now=T0) as store:
        store.add_dead_letter("gw", b"x", "bad-json", now=T0)
    with Store.open_read_only(path, described="plant.db (from --db)") as look:
        assert [d.reason for d in look.dead_letters()] == ["bad-json"]
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            look.add_dead_letter("gw", b"y", "bad-json", now=T0)
    old = tmp_path / "old.db"
    db = sqlite_utils.Database(old)
    migrate(db, now=T0, target=1)
    db.close()
    with pytest.raises(SchemaTooOld, match=r"schema version 1, older .*upgrades it"):
        Store.open_read_only(old)
    assert sqlite_utils.Database(old).execute(
        "SELECT max(version) FROM schema_migrations"
    ).fetchone() == (1,)  # the look upgraded nothing
    (tmp_path / "notes.txt").write_text("not a database\n" * 100)
    with pytest.raises(NotADatabase, match=r"notes.txt \(from here\) is not an SQLite database"):
        Store.open_read_only(
            tmp_path / "notes.txt", described=f"{tmp_path / 'notes.txt'} (from here)"
        )
    empty = sqlite_utils.Database(tmp_path / "other.db")
    empty["t"].insert({"a": 1})
    empty.close()
    with pytest.raises(NotADatabase, match="is not a limitwatch database"):
        Store.open_read_only(tmp_path / "other.db")
