"""The service's scheduled jobs, in process with the real store and scheduler: retention of
dead letters, and (below) what a step of the wall clock does to jobs, receipt times and
/health. Clocks are injected, so a two-hour step costs no waiting."""

from __future__ import annotations

import sqlite3
from pathlib import Path

from limitwatch.config import load_config
from limitwatch.service import Service

T0 = 1_798_761_600.0


def write_config(folder: Path, extra: str = "", store: str = "") -> Path:
    (folder / "data").mkdir(exist_ok=True)
    path = folder / "service.toml"
    path.write_text(
        f"""
[store]
path = "service.db"
{store}

[service]
stale_check_every = "1s"
alert_tick_every = "1s"
refit_check_every = "1s"

[[sources]]
type = "file"
name = "export"
glob = "data/*.csv"
format = "csv"
poll_every = "1s"
value = "value"
time = "time"
stream = "stream"

[[notifiers]]
name = "terminal"
type = "console"
{extra}
"""
    )
    return path


def test_retention_runs_without_reading_limits_and_prunes_dead_letters_by_age_and_count(
    tmp_path: Path,
):
    """Readings are kept for ever here, yet the retention job is scheduled and bounds the
    dead letters: an export full of bad lines must not fill the disk."""
    config = load_config(
        write_config(tmp_path, store='keep_dead_letters_for = "1d"\nkeep_dead_letters = 5')
    )
    now = [T0]
    service = Service(config, clock=lambda: now[0])
    service.start()
    try:
        assert service.scheduler is not None and service.scheduler.get_job("retention")
        assert service.store is not None
        with service.store.transaction():
            for i in range(10):  # two days old
                service.store.add_dead_letter("export", f"old {i}", "bad-json", now=T0)
            for i in range(8):
                service.store.add_dead_letter("export", f"new {i}", "bad-json", now=T0 + 2 * 86400)
        now[0] = T0 + 2 * 86400 + 60
        assert service.prune(now[0]) == (0, 10 + 3)
    finally:
        service.close()
    kept = sqlite3.connect(tmp_path / "service.db").execute("SELECT payload FROM dead_letters")
    assert [p for (p,) in kept] == [f"new {i}" for i in range(3, 8)]
