"""The service's scheduled jobs, in process with the real store and scheduler: retention of
dead letters, and (below) what a step of the wall clock does to jobs, receipt times and
/health. Clocks are injected, so a two-hour step costs no waiting."""

from __future__ import annotations

import itertools
import json
import logging
import re
import sqlite3
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import time_machine

from limitwatch.config import load_config
from limitwatch.ingest.mqtt import Delivery
from limitwatch.ingest.timeparse import format_time
from limitwatch.service import Service
from tests.broker import free_port
from tests.service_harness import Publisher, count, query, wait_until

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


# --------------------------------------------------------------------------- clock steps


@contextmanager
def running(service: Service) -> Iterator[Service]:
    """Start, run and close the service on a worker thread of its own (the store's connection
    belongs to the thread that opened it), as `limitwatch serve` does on its main thread."""
    started = threading.Event()
    failed: list[BaseException] = []

    def work() -> None:
        try:
            service.start()
            started.set()
            service.run()
        except BaseException as exc:  # reported to the test below
            failed.append(exc)
        finally:
            started.set()
            service.close()

    worker = threading.Thread(target=work, name="test-worker", daemon=True)
    worker.start()
    started.wait(timeout=30)
    try:
        if failed:
            raise failed[0]
        yield service
    finally:
        service.request_stop()
        worker.join(timeout=30)
    assert not failed, failed


def get_health(port: int) -> tuple[int, dict]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5) as answer:
            return answer.status, json.loads(answer.read())
    except urllib.error.HTTPError as exc:
        return exc.code, json.loads(exc.read())


def mqtt_clock_config(folder: Path, broker_port: int, health_port: int) -> Path:
    path = folder / "service.toml"
    path.write_text(
        f"""
[store]
path = "service.db"

[service]
batch_wait = "50ms"
metrics_listen = "127.0.0.1:{health_port}"
stale_check_every = "1s"
alert_tick_every = "1s"
refit_check_every = "1s"

[[streams]]
match = "line-2/*"
cadence = "1s"
stale_after = 3

[[sources]]
type = "mqtt"
name = "gateway"
host = "127.0.0.1"
port = {broker_port}
client_id = "limitwatch-clock-test"
reconnect_min_s = 1
reconnect_max_s = 2

[[sources.topics]]
filter = "plant/+/+"
stream = "{{2}}/{{3}}"
payload = "number"

[[notifiers]]
name = "terminal"
type = "console"
"""
    )
    return path


def test_a_wall_clock_step_back_keeps_receipt_times_and_stale_checks_and_health_sees_late_jobs(
    broker, tmp_path: Path, caplog: pytest.LogCaptureFixture
):
    """The wall clock steps back two hours while readings timed at receipt arrive: they are
    all accepted, in order; a WARNING names the step; a stream that falls silent after the
    step still goes stale; and a job that really does not run shows as overdue in /health."""
    caplog.set_level(logging.INFO, logger="limitwatch")
    stepped = [0.0]  # what the wall clock has been stepped by
    passed = [0.0]  # time passed without waiting: both clocks move, no step
    wall = lambda: time.time() + stepped[0] + passed[0]  # noqa: E731
    mono = lambda: time.monotonic() + passed[0]  # noqa: E731
    health_port = free_port()
    config = load_config(mqtt_clock_config(tmp_path, broker.port, health_port))
    db = tmp_path / "service.db"
    publisher = Publisher(broker.port)
    try:
        with running(Service(config, clock=wall, monotonic=mono)) as service:
            wait_until(lambda: service.sources["gateway"].subscribed.is_set(), what="subscribed")
            wait_until(lambda: get_health(health_port)[0] == 200, what="healthy")
            # Readings before the step, through the real broker, timed at receipt.
            publisher.send_all([("plant/line-1/level", f"20.{i}") for i in range(5)])
            publisher.send_all([("plant/line-2/level", f"7.{i}") for i in range(3)])
            wait_until(lambda: count(db, "readings") == 8, what="readings before the step")

            stepped[0] = -7200.0
            wait_until(
                lambda: any("stepped back by 2h (7200" in r.getMessage() for r in caplog.records),
                what="a warning about the step",
            )
            (record,) = [r for r in caplog.records if "stepped back" in r.getMessage()]
            assert record.levelno == logging.WARNING
            # After the step: messages stamped by the stepped clock where they arrive (as the
            # connection process stamps them), put where its reader thread puts them.
            for i in range(5):
                stamp = wall()
                service.intake.put(
                    Delivery(
                        "gateway", "plant/line-1/level", f"21.{i}".encode(), stamp, 0, 0, False
                    )
                )
                time.sleep(0.01)
            wait_until(lambda: count(db, "readings") == 13, what="readings after the step")
            assert count(db, "dead_letters") == 0
            times = [
                t
                for (t,) in query(
                    db, "SELECT time FROM readings WHERE stream = 'line-1/level' ORDER BY time"
                )
            ]
            values = [
                v
                for (v,) in query(
                    db, "SELECT value FROM readings WHERE stream = 'line-1/level' ORDER BY time"
                )
            ]
            assert values == [20.0, 20.1, 20.2, 20.3, 20.4, 21.0, 21.1, 21.2, 21.3, 21.4]
            assert all(b > a for a, b in itertools.pairwise(times))

            # line-2 has been silent since before the step: stale all the same.
            wait_until(
                lambda: count(db, "alerts", "rule = 'stale' AND stream = 'line-2/level'") == 1,
                timeout=30,
                what="a stale alert after the step",
            )

            # Jobs go on: each one runs again after the step.
            ran_after = {job: service._job_ran.get(job) for job in ("stale-check", "alert-tick")}
            wait_until(
                lambda: all(service._job_ran.get(j) != r for j, r in ran_after.items()),
                what="jobs after the step",
            )

            # A job that really does not run: /health says which, and the status is degraded.
            assert service.scheduler is not None
            service.scheduler.pause_job("refits")
            passed[0] = 300.0

            def refits_late() -> dict | None:
                code, body = get_health(health_port)
                late = {name for name, job in body["jobs"].items() if job["overdue"]}
                return body if code == 503 and late == {"refits"} else None

            body = wait_until(refits_late, what="refits overdue")
            assert body["status"] == "degraded"
            iso = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z"
            assert re.fullmatch(iso, body["jobs"]["stale-check"]["last_run"])
            assert body["jobs"]["retention"]["last_run"] is None  # hourly: not yet
            service.scheduler.resume_job("refits")
            wait_until(lambda: get_health(health_port)[0] == 200, what="healthy again")
    finally:
        publisher.close()
    assert sum("stepped" in r.getMessage() for r in caplog.records) == 1


def test_after_a_real_step_of_the_process_clock_the_scheduler_keeps_running_jobs(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
):
    """The process's wall clock itself steps back two hours (time-machine moves time.time and
    datetime.now for every thread, not the monotonic clock), under the real APScheduler: the
    file source is still polled, so a line written after the step is read within seconds."""
    caplog.set_level(logging.INFO, logger="limitwatch")
    config = load_config(write_config(tmp_path))
    data = tmp_path / "data" / "export.csv"
    db = tmp_path / "service.db"
    start = datetime(2027, 1, 1, 8, tzinfo=UTC)
    with (
        time_machine.travel(start, tick=True) as traveller,
        running(Service(config)) as service,
    ):
        data.write_text(f"time,stream,value\n{format_time(time.time())},kiln-1/temp,5.0\n")
        wait_until(lambda: count(db, "readings") == 1, what="the first line")
        traveller.shift(timedelta(hours=-2))
        with data.open("a") as f:
            f.write(f"{format_time(time.time() + 7200 + 60)},kiln-1/temp,5.1\n")
        wait_until(lambda: count(db, "readings") == 2, timeout=15, what="a poll after the step")
        assert any("stepped back by 2h" in r.getMessage() for r in caplog.records)
        stale_ran = service._job_ran["stale-check"]
        wait_until(lambda: service._job_ran["stale-check"] != stale_ran, what="a stale check")


def test_a_restart_after_the_clock_stepped_back_goes_on_from_the_last_commit(
    broker, tmp_path: Path, caplog: pytest.LogCaptureFixture
):
    """The clock is stepped back two hours while the service is down: after the restart,
    readings timed at receipt are still later than the stored ones, so none is refused."""
    caplog.set_level(logging.INFO, logger="limitwatch")
    config = load_config(mqtt_clock_config(tmp_path, broker.port, free_port()))
    db = tmp_path / "service.db"

    def deliver(service: Service, wall, values: list[str]) -> None:
        for value in values:
            service.intake.put(
                Delivery("gateway", "plant/line-1/level", value.encode(), wall(), 0, 0, False)
            )
            time.sleep(0.01)

    with running(Service(config)) as service:
        deliver(service, time.time, ["20.0", "20.1", "20.2"])
        wait_until(lambda: count(db, "readings") == 3, what="readings of the first run")
    back = lambda: time.time() - 7200  # noqa: E731
    with running(Service(config, clock=back)) as service:
        deliver(service, back, ["20.3", "20.4"])
        wait_until(lambda: count(db, "readings") == 5, what="readings after the restart")
    assert count(db, "dead_letters") == 0
    times = [t for (t,) in query(db, "SELECT time FROM readings ORDER BY rowid")]
    assert all(b > a for a, b in itertools.pairwise(times))
    said = r"behind the store's last commit by (1h59m(\d+s)?|2h) \(7\d{3}\.\d s\)"
    assert any(re.search(said, r.getMessage()) for r in caplog.records)


# --------------------------------------------------------------------------- failing jobs


def test_a_failing_job_is_logged_and_the_worker_goes_on(tmp_path: Path, caplog) -> None:
    """A fault injected into the stale check (the store is real): the worker logs it, counts
    it, and keeps reading the export; only a failure of the store itself ends the service."""
    config = load_config(write_config(tmp_path))
    service = Service(config)
    caplog.set_level(logging.ERROR, logger="limitwatch.service")
    with running(service):
        assert service.pipeline is not None

        def broken(*_args: object) -> list:
            raise RuntimeError("a bug in the stale check")

        service.pipeline.stale_signals = broken  # type: ignore[method-assign]
        wait_until(lambda: "a bug in the stale check" in caplog.text, timeout=30)
        rows = "".join(f"{1_700_000_000 + i},oven/t,{i % 3}\n" for i in range(5))
        (tmp_path / "data" / "a.csv").write_text("time,stream,value\n" + rows)
        wait_until(lambda: count(tmp_path / "service.db", "readings") == 5, timeout=30)
        failures = service.metrics.registry.get_sample_value(
            "limitwatch_job_failures_total", {"job": "stale-check"}
        )
        assert failures is not None and failures >= 1


def test_a_store_failure_in_a_job_stops_the_worker_as_broken(tmp_path: Path) -> None:
    from limitwatch.pipeline import PipelineBroken

    config = load_config(write_config(tmp_path))
    service = Service(config)
    service.start()
    try:
        assert service.pipeline is not None

        def disk_gone(*_args: object) -> list:
            raise sqlite3.OperationalError("disk I/O error")

        service.pipeline.stale_signals = disk_gone  # type: ignore[method-assign]
        from limitwatch.service import Job

        with pytest.raises(PipelineBroken, match="disk I/O error"):
            service._run_job_guarded(Job("stale-check"))
    finally:
        service.close()
