"""The real `limitwatch serve` on a PostgreSQL store: killed mid-file it resumes without losing
or doubling a reading and ends with the incidents an SQLite run of the same file has; two
services share one database (no single-instance lock there)."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pytest

from limitwatch.store import StoreError, open_store_read_only
from tests.service_harness import ServiceProcess, wait_until
from tests.test_service_files import write_rows

pytestmark = pytest.mark.integration  # `limitwatch serve` processes and a PostgreSQL server

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z


def _config(folder: Path, store: str, glob: str = "data/*.csv", name: str = "export") -> Path:
    (folder / "data").mkdir(exist_ok=True)
    path = folder / f"{name}.toml"
    path.write_text(
        f"""
[store]
path = "{store}"

[service]
batch_max = 40
stale_check_every = "1h"

[defaults]
rules = "nelson"
learn_count = 25

[[sources]]
type = "file"
name = "{name}"
glob = "{glob}"
format = "csv"
poll_every = "1s"
value = "value"
time = "time"
time_format = "iso8601"
stream = "stream"

[[notifiers]]
name = "terminal"
type = "console"
"""
    )
    return path


def _rows(streams: tuple[str, ...], n: int, seed: int) -> list[tuple[float, str, float]]:
    rng = np.random.default_rng(seed)
    values = rng.normal(20, 2, n)
    values[n // 2 :] += 9.0  # a shift: a special cause on every stream
    return [(T0 + 60 * i, s, round(float(v), 3)) for i, v in enumerate(values) for s in streams]


def _count(location: str | Path) -> int:
    """Readings stored so far (0 while the service has not created its database yet)."""
    try:
        with open_store_read_only(location) as store:
            return int(store.sql.execute("SELECT count(*) FROM readings").fetchone()[0])
    except (StoreError, sqlite3.Error):  # no file yet
        return 0


def _undelivered(location: str | Path) -> list[str]:
    with open_store_read_only(location) as store:
        return [n.idempotency_key for n in store.notifications() if n.delivered_at is None]


def _incidents(location: str | Path) -> list[tuple]:
    with open_store_read_only(location) as store:
        return sorted(
            (a.stream, a.state, a.first_time, a.last_time, tuple(sorted(a.rules)))
            for a in store.alerts()
        )


def _readings(location: str | Path) -> list[tuple]:
    with open_store_read_only(location) as store:
        return [
            tuple(r)
            for r in store.sql.execute(
                "SELECT stream, time, value, idx FROM readings ORDER BY stream, time"
            )
        ]


def test_serve_on_postgresql_killed_mid_file_ends_as_an_sqlite_run(
    tmp_path: Path, pg_url: str
) -> None:
    rows = _rows(("press-1/cycle-time", "press-2/cycle-time"), 700, seed=5)
    pg_dir, lite_dir = tmp_path / "pg", tmp_path / "lite"
    for folder in (pg_dir, lite_dir):
        folder.mkdir()
    pg_config = _config(pg_dir, pg_url)
    lite_config = _config(lite_dir, "service.db")
    for folder in (pg_dir, lite_dir):
        write_rows(folder / "data" / "export.csv", rows)

    svc = ServiceProcess(pg_config).start()
    try:
        wait_until(lambda: _count(pg_url) > 200, timeout=90, what="part of the file read")
    finally:
        svc.kill()
    part = _count(pg_url)
    assert 0 < part < len(rows), "the kill must land mid-file"
    for config in (pg_config, lite_config):
        svc = ServiceProcess(config).start()
        where: str | Path = pg_url if config is pg_config else lite_dir / "service.db"
        try:
            wait_until(lambda w=where: _count(w) == len(rows), timeout=120, what="every row")
            wait_until(lambda w=where: not _undelivered(w), timeout=60, what="notifications")
        finally:
            assert svc.stop() == 0, svc.logs()[-3000:]
    assert "no single-instance lock" in ServiceProcess(pg_config).logs()
    lite = lite_dir / "service.db"
    assert _readings(pg_url) == _readings(lite)
    assert _incidents(pg_url) == _incidents(lite)
    assert _incidents(pg_url), "the shift must open incidents"
    with open_store_read_only(pg_url) as store:
        rows_out = store.notifications()
        assert rows_out and not _undelivered(pg_url)
        assert store.sql.execute("SELECT count(*) FROM outbox_claims").fetchone()[0] == 0


def test_two_services_share_one_postgresql_database(tmp_path: Path, pg_url: str) -> None:
    configs = []
    for name, streams, seed in (("east", ("east/temp",), 7), ("west", ("west/temp",), 8)):
        folder = tmp_path / name
        folder.mkdir()
        configs.append(_config(folder, pg_url, name=name))
        write_rows(folder / "data" / f"{name}.csv", _rows(streams, 300, seed))
    services = [ServiceProcess(c).start() for c in configs]
    try:
        wait_until(lambda: _count(pg_url) == 600, timeout=120, what="both files stored")
        wait_until(lambda: not _undelivered(pg_url), timeout=60, what="notifications sent")
        assert all(s.alive() for s in services)
    finally:
        codes = [s.stop() for s in services]
    assert codes == [0, 0], [s.logs()[-2000:] for s in services]
    with open_store_read_only(pg_url) as store:
        assert {s.id for s in store.streams()} == {"east/temp", "west/temp"}
        assert {a.stream for a in store.alerts()} == {"east/temp", "west/temp"}
        keys = [n.idempotency_key for n in store.notifications()]
        assert len(keys) == len(set(keys)) and all(
            n.delivered_at is not None for n in store.notifications()
        )
