"""The file source through the real `limitwatch serve`: resume at the right line after kill -9."""

from __future__ import annotations

import time

import numpy as np
import pytest

from limitwatch.config import load_config
from limitwatch.engine import StreamMonitor
from limitwatch.ingest.timeparse import format_time, parse_time
from limitwatch.model import Reading
from tests.service_harness import ServiceProcess, checkpoints, count, query, wait_until

pytestmark = pytest.mark.integration  # `limitwatch serve` processes

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z: in the past, as the service wants readings


def file_config(folder, batch_max: int = 50, poll: str = "1s", extra: str = ""):
    (folder / "data").mkdir(exist_ok=True)
    text = f"""
[store]
path = "service.db"

[service]
batch_max = {batch_max}
stale_check_every = "1s"

[defaults]
rules = "nelson"
learn_count = 25

[[sources]]
type = "file"
name = "export"
glob = "data/*.csv"
format = "csv"
poll_every = "{poll}"
value = "value"
time = "time"
time_format = "iso8601"
stream = "stream"

[[notifiers]]
name = "terminal"
type = "console"
{extra}
"""
    path = folder / "service.toml"
    path.write_text(text)
    return path


def write_rows(path, rows, header=True):
    with path.open("a") as f:
        if header:
            f.write("time,stream,value\n")
        for t, stream, value in rows:
            f.write(f"{format_time(t)},{stream},{value}\n")


def test_a_file_source_killed_mid_file_resumes_at_the_right_line(tmp_path):
    config = file_config(tmp_path, batch_max=40)
    rng = np.random.default_rng(2)
    rows = [
        (T0 + 60 * i, stream, round(float(v), 3))
        for i, v in enumerate(rng.normal(20, 2, 1500))
        for stream in ("press-1/cycle-time", "press-2/cycle-time")
    ]
    write_rows(tmp_path / "data" / "export.csv", rows)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    wait_until(lambda: count(db, "readings") > 200, timeout=60, what="part of the file read")
    svc.kill()
    part = count(db, "readings")
    assert 0 < part < len(rows), "the kill must land mid-file"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == len(rows), timeout=90, what="the whole file")
        # give the 1 s poll two more turns: it must find nothing new (the committed offset
        # is the end of the file), or every line would come back as a duplicate
        time.sleep(2.5)
    finally:
        assert svc.stop() == 0
    assert count(db, "dead_letters") == 0, query(db, "SELECT reason FROM dead_letters LIMIT 3")
    size = (tmp_path / "data" / "export.csv").stat().st_size
    assert [r[0] for r in query(db, "SELECT byte_offset FROM file_offsets")] == [size]
    cfg = load_config(config)
    for stream in ("press-1/cycle-time", "press-2/cycle-time"):
        monitor = StreamMonitor(stream, cfg.stream_settings(stream).monitor_settings())
        for t, s, v in rows:
            if s == stream:
                monitor.update(Reading(s, parse_time(format_time(t)), v))
        assert checkpoints(db)[stream]["count"] == monitor.count == 1500
        assert checkpoints(db)[stream] == monitor.state()


def test_lines_appended_later_are_read_and_a_silent_stream_goes_stale(tmp_path):
    """A stream with an expected cadence that stops reporting opens a `stale` alert, which
    clears when a recent reading arrives."""
    import time as clock

    now = clock.time()
    extra = """
[[streams]]
match = "pump-*"
cadence = "1s"
stale_after = 3
"""
    config = file_config(tmp_path, poll="1s", extra=extra)
    data = tmp_path / "data" / "export.csv"
    write_rows(data, [(now - 40 + i, "pump-7/pressure", 5.0 + (i % 3) * 0.1) for i in range(30)])
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == 30, what="first rows")
        write_rows(data, [(now - 9, "pump-7/pressure", 5.1)], header=False)
        wait_until(lambda: count(db, "readings") == 31, what="appended row")
        wait_until(lambda: count(db, "alerts", "rule = 'stale'") == 1, timeout=30, what="stale")
        # the stream speaks again: the stale alert clears with the first recent reading
        write_rows(data, [(clock.time(), "pump-7/pressure", 5.2)], header=False)
        wait_until(
            lambda: count(db, "alerts", "rule = 'stale' AND state = 'cleared'") == 1,
            timeout=30,
            what="stale cleared",
        )
    finally:
        assert svc.stop() == 0
    (stream,) = query(db, "SELECT stream FROM alerts WHERE rule = 'stale'")[0]
    assert stream == "pump-7/pressure"


def test_health_turns_503_while_the_worker_is_stuck_and_recovers_after(tmp_path):
    """Another program holds the database's write lock (an operator's sqlite3 shell left in a
    transaction, say): the worker waits for it inside its commit. /health says so once the wait
    passes `stall_after`, and says ok again once the lock is released and the batch commits."""
    import json
    import sqlite3
    import urllib.error
    import urllib.request

    from tests.broker import free_port

    port = free_port()
    extra_service = f'metrics_listen = "127.0.0.1:{port}"\nstall_after = "1s"\n'
    config = file_config(tmp_path, poll="200ms")
    config.write_text(config.read_text().replace("[service]\n", "[service]\n" + extra_service, 1))
    data = tmp_path / "data" / "export.csv"
    write_rows(data, [(T0 + 60 * i, "press-2/force", 40.0 + (i % 4) * 0.2) for i in range(10)])
    db = tmp_path / "service.db"

    def health() -> tuple[int, dict]:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5) as reply:
                return reply.status, json.loads(reply.read())
        except urllib.error.HTTPError as exc:
            return exc.code, json.loads(exc.read())
        except OSError:
            return 0, {}

    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == 10, what="first rows")
        assert wait_until(lambda: health()[0] == 200, what="healthy")
        assert health()[1]["worker"] == "running"
        lock = sqlite3.connect(db, isolation_level=None)
        lock.execute("BEGIN IMMEDIATE")  # the service's busy timeout is 5 s
        try:
            write_rows(data, [(T0 + 60 * (10 + i), "press-2/force", 40.1) for i in range(5)], False)
            stuck = wait_until(lambda: (h := health())[0] == 503 and h[1], timeout=4.5, what="503")
            assert stuck["worker"] == "stalled" and stuck["worker_last_round_s_ago"] > 1.0
        finally:
            lock.execute("ROLLBACK")
            lock.close()
        wait_until(lambda: count(db, "readings") == 15, what="the held batch committed")
        assert wait_until(lambda: health()[0] == 200, what="healthy again")
        assert svc.alive()
    finally:
        assert svc.stop() == 0


def test_poison_lines_are_dead_letters_and_the_file_is_read_on(tmp_path):
    """JSON lines that once ended the service, or stopped their file for good (issue 11):
    each becomes a dead letter with its reason, the offset moves past it, the good lines
    after it are stored, and the process stays up."""
    import json

    from limitwatch.ingest.files import MAX_READ

    config = file_config(tmp_path, poll="200ms")
    text = config.read_text().replace('glob = "data/*.csv"', 'glob = "data/*.jsonl"')
    text = text.replace('format = "csv"', 'format = "jsonl"').replace('"iso8601"', '"epoch_s"')
    config.write_text(text)

    def line(i: int, **change) -> bytes:
        record = {"time": T0 + 60 * i, "stream": "oven-2/zone-temp", "value": 180.0 + i % 4}
        return json.dumps({**record, **change}).encode() + b"\n"

    poison = [
        (b'{"value": ' + b"[" * 1000 + b"]" * 1000 + b"}\n", "unreadable-line"),  # nesting
        (b'{"value": ' + b"9" * 5000 + b"}\n", "unreadable-line"),  # 5,000 digits
        (line(26, stream="\ud800"), "bad-stream"),  # a lone surrogate failed the commit
        (line(27, time=253402300799), "in-the-future"),  # 9999-12-31 blinded the stream
        (line(28, value=1e308), "off-scale"),  # z overflowed inside the detectors
        (b'{"value": "' + b"x" * MAX_READ + b'"}\n', "line-too-long"),  # stopped the file
    ]
    data = tmp_path / "data" / "export.jsonl"
    data.write_bytes(
        b"".join(line(i) for i in range(25))
        + b"".join(p for p, _ in poison)
        + b"".join(line(i) for i in range(30, 40))
    )
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == 35, what="every good line stored")
        wait_until(lambda: count(db, "dead_letters") == len(poison), what="the dead letters")
        reasons = sorted(r[0].split(":")[0] for r in query(db, "SELECT reason FROM dead_letters"))
        assert reasons == sorted(w for _, w in poison)
        kept = query(db, "SELECT length(payload) FROM dead_letters WHERE reason LIKE 'line-too%'")
        assert kept == [(1024,)]
        (where,) = query(db, "SELECT reason FROM dead_letters WHERE reason LIKE 'line-too%'")
        assert f"export.jsonl, line {25 + len(poison)}:" in where[0]  # the last poison line
        assert [r[0] for r in query(db, "SELECT byte_offset FROM file_offsets")] == [
            data.stat().st_size
        ]
        assert svc.alive()
    finally:
        assert svc.stop() == 0
    assert "Traceback" not in svc.logs()


def test_a_store_failure_stops_the_service_with_an_error_line_not_a_traceback(tmp_path):
    """When the store itself fails (here: another program holds the write lock past the busy
    timeout of 5 s), the monitors are ahead of the database and only a restart is safe: the
    service exits 1 with a timestamped ERROR line, and the next start reads the line again."""
    import sqlite3

    config = file_config(tmp_path, poll="200ms")
    data = tmp_path / "data" / "export.csv"
    write_rows(data, [(T0 + 60 * i, "press-3/force", 40.0 + (i % 4) * 0.2) for i in range(5)])
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == 5, what="first rows")
        lock = sqlite3.connect(db, isolation_level=None)
        lock.execute("BEGIN IMMEDIATE")
        try:
            write_rows(data, [(T0 + 60 * 5, "press-3/force", 40.1)], header=False)
            assert svc.process is not None
            assert svc.process.wait(timeout=30) == 1
        finally:
            lock.execute("ROLLBACK")
            lock.close()
    finally:
        if svc.alive():
            svc.stop()
    logs = svc.logs()
    assert "Traceback" not in logs
    (line,) = [x for x in logs.splitlines() if " ERROR limitwatch.service: stopping:" in x]
    assert line[:4].isdigit() and "database is locked" in line  # starts with its time stamp
    again = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == 6, what="the line read again after restart")
    finally:
        assert again.stop() == 0
