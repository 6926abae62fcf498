"""The readings table's keys: each stored reading goes into the table and its primary key
(stream, time) only, and retention by age still finds old readings through that key rather than
scanning the table (limitwatch.store.schema migration 11, limitwatch.store.readings).

The plan is SQLite's own account of how it runs a statement (``EXPLAIN QUERY PLAN``, SQLite
documentation "The SQLite Query Optimizer Overview", section on IN operators and ranges)."""

from __future__ import annotations

from pathlib import Path

import sqlite_utils

from limitwatch.store import Store, migrate
from tests.test_store import T0, commit_batch, outcome, raw


def indexes_on_readings(store: Store) -> set[str]:
    rows = raw(store).execute(
        "SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = 'readings'"
    )
    return {name for (name,) in rows}


def test_a_reading_is_kept_in_the_table_and_its_primary_key_only(fresh_db: Store):
    assert indexes_on_readings(fresh_db) == {"sqlite_autoindex_readings_1"}


def test_retention_by_age_goes_through_the_primary_key_not_a_scan(fresh_db: Store):
    statements: list[str] = []
    fresh_db.db.conn.set_trace_callback(statements.append)
    try:
        fresh_db.prune_readings(T0, max_age_s=60)
    finally:
        fresh_db.db.conn.set_trace_callback(None)
    (delete,) = [s for s in statements if s.lstrip().startswith("DELETE FROM readings")]
    plan = " | ".join(row[-1] for row in fresh_db.db.execute(f"EXPLAIN QUERY PLAN {delete}"))
    assert "SEARCH readings USING INDEX sqlite_autoindex_readings_1" in plan, plan
    assert "SCAN readings" not in plan, plan


def test_an_older_file_loses_the_time_index_and_keeps_pruning_by_age(tmp_path: Path):
    path = tmp_path / "old.db"
    old = sqlite_utils.Database(path)
    migrate(old, now=T0, target=8)
    assert "readings_by_time" in {i.name for i in old["readings"].indexes}
    old.close()
    with Store.open(path, now=T0) as store:
        assert indexes_on_readings(store) == {"sqlite_autoindex_readings_1"}
        keys = [(s, T0 + 60 * i) for s in ("a", "b", "c") for i in range(10)]
        commit_batch(store, [outcome(s, t, 1.0) for s, t in keys], now=T0 + 600)
        deleted = store.prune_readings(T0 + 600, max_age_s=300)
        kept = set(raw(store).execute("SELECT stream, time FROM readings"))
    assert kept == {(s, t) for s, t in keys if t >= T0 + 300}
    assert deleted == len(keys) - len(kept)
