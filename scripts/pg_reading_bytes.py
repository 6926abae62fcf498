"""What one stored reading costs on disk in PostgreSQL (table, primary key and time index),
and in an SQLite file for comparison: insert readings the way the service does, then measure.

    .venv/bin/python scripts/pg_reading_bytes.py [READINGS] [STREAMS]

Starts a throwaway cluster with Debian's binaries (tests/pg.py), so run it from the repository
root. Prints numbers; nothing is asserted.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np

from limitwatch.model import Outcome, Reading
from limitwatch.store import Store, open_store
from tests.pg import start_cluster

T0 = 1_767_225_600.0


def batches(total: int, streams: int, size: int = 500):
    rng = np.random.default_rng(1)
    per = total // streams
    names = [f"site-a/line-{i // 40:02d}/sensor-{i % 40:02d}/temp" for i in range(streams)]
    batch: list[Outcome] = []
    for k in range(per):
        values = rng.normal(60.0, 2.0, streams)
        for s, v in zip(names, values, strict=True):
            z = (float(v) - 60.0) / 2.0
            batch.append(
                Outcome(Reading(s, T0 + 60.0 * k, round(float(v), 3), k), True, index=k,
                        phase="monitoring", z=z, mr=abs(z) / 3)
            )
            if len(batch) == size:
                yield batch
                batch = []
    if batch:
        yield batch


def fill(store: Store, total: int, streams: int) -> float:
    started = time.perf_counter()
    for batch in batches(total, streams):
        with store.transaction():
            store.add_readings(batch, now=batch[-1].reading.time)
    return time.perf_counter() - started


def main() -> None:
    total = int(sys.argv[1]) if len(sys.argv) > 1 else 200_000
    streams = int(sys.argv[2]) if len(sys.argv) > 2 else 1_000
    cluster = start_cluster()
    try:
        url = cluster.new_database()
        with open_store(url, now=T0) as store:
            took = fill(store, total, streams)
            store.sql.execute("VACUUM ANALYZE readings")
            row = store.sql.execute(
                """SELECT count(*), pg_total_relation_size('readings'),
                    pg_relation_size('readings'), pg_indexes_size('readings') FROM readings"""
            ).fetchone()
        n, whole, heap, indexes = (int(x) for x in row)
        print(f"PostgreSQL {cluster.url().split('@')[1]}: {n} readings of {streams} streams "
              f"stored in {took:.1f} s wall")
        print(f"  table {heap / n:.0f} B + indexes {indexes / n:.0f} B "
              f"= {whole / n:.0f} B per reading (pg_total_relation_size)")
        per_day = whole / n * 16_700 * 86_400
        print(f"  at 16.7k readings/s: {per_day / 1e9:.0f} GB per day, "
              f"{per_day * 30 / 1e12:.2f} TB per 30 days")
    finally:
        cluster.stop()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "size.db"
        with Store.open(path, now=T0) as store:
            fill(store, total, streams)
            store.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            store.db.execute("VACUUM")
            pages = store.db.execute(
                "SELECT sum(pgsize) FROM dbstat WHERE name IN "
                "('readings', 'readings_by_time', 'sqlite_autoindex_readings_1')"
            ).fetchone()[0]
        print(f"SQLite for comparison: {pages / total:.0f} B per reading (readings and indexes)")


if __name__ == "__main__":
    main()
