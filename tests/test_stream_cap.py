"""The ceiling on streams per source: counting, refusal, the rate-limited warning, and the cap
through the real `limitwatch serve` with a real Mosquitto broker."""

from __future__ import annotations

import json
import logging
import time
import urllib.request

import pytest

from limitwatch.streamcap import StreamCap
from tests.broker import free_port
from tests.service_harness import (
    Publisher,
    ServiceProcess,
    count,
    mqtt_config,
    query,
    wait_until,
)


def test_new_streams_past_the_limit_are_refused_and_known_ones_never_are():
    cap = StreamCap({"gateway": 3, "export": 1}, monotonic=lambda: 0.0)
    assert [cap.admit("gateway", f"s{i}", exists=False) for i in range(5)] == [
        True,
        True,
        True,
        False,
        False,
    ]
    assert cap.admit("gateway", "s1", exists=False)  # one it feeds already
    assert cap.admit("gateway", "restored", exists=True)  # a monitor exists: never refused
    assert (cap.count("gateway"), cap.refused["gateway"]) == (4, 2)
    # each source has its own count
    assert cap.admit("export", "s9", exists=False) and not cap.admit("export", "s8", exists=False)
    assert cap.refused == {"gateway": 2, "export": 1}


def test_the_warning_comes_at_most_once_a_minute_per_source_and_counts_what_it_left_out(
    caplog: pytest.LogCaptureFixture,
):
    now = [0.0]
    cap = StreamCap({"gateway": 1}, monotonic=lambda: now[0])
    caplog.set_level(logging.WARNING, logger="limitwatch.streams")
    cap.admit("gateway", "kept", exists=False)
    for i in range(1000):
        now[0] = i * 0.01  # 1000 refusals in ten seconds
        cap.admit("gateway", f"flood-{i}", exists=False)
    assert len(caplog.records) == 1
    now[0] = 61.0
    cap.admit("gateway", "one-more", exists=False)
    assert len(caplog.records) == 2
    assert "1000 readings for new streams refused" in caplog.records[1].getMessage()
    assert "max_streams of 1" in caplog.records[1].getMessage()


def test_a_flood_of_topics_stops_at_max_streams_through_the_real_service(broker, tmp_path):
    """A gateway publishes on 40 topics to a source allowed 5 streams: 5 streams are made, the
    rest are dead letters `too-many-streams`; the 5 go on taking readings, one WARNING line is
    logged, and /metrics shows the count and the refusals."""
    port = free_port()
    config = mqtt_config(tmp_path, broker.port)
    text = config.read_text()
    text = text.replace("reconnect_max_s = 2\n", "reconnect_max_s = 2\nmax_streams = 5\n", 1)
    text = text.replace(
        'batch_wait = "50ms"', f'batch_wait = "50ms"\nmetrics_listen = "127.0.0.1:{port}"'
    )
    config.write_text(text)
    db = tmp_path / "service.db"
    now = time.time()

    def message(line: int, seq: int) -> tuple[str, str]:
        return f"plant/line-{line}/temp/reading", json.dumps(
            {"v": 20 + seq, "t": now + seq, "seq": seq}
        )

    svc = ServiceProcess(config).start()
    pub = Publisher(broker.port)
    try:
        wait_until(lambda: "connected to" in svc.logs(), what="connected")
        pub.send_all([message(line, 0) for line in range(1, 41)])
        wait_until(lambda: count(db, "readings") + count(db, "dead_letters") == 40, what="flood")
        pub.send_all([message(line, 1) for line in range(1, 6)])  # the streams it has go on
        wait_until(lambda: count(db, "readings") == 10, what="second readings")
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as reply:
            metrics = reply.read().decode()
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5) as reply:
            assert reply.status == 200
    finally:
        pub.close()
        assert svc.stop() == 0
    streams = sorted(s for (s,) in query(db, "SELECT DISTINCT stream FROM readings"))
    assert streams == sorted(f"line-{i}/temp" for i in range(1, 6))
    reasons = [r for (r,) in query(db, "SELECT reason FROM dead_letters")]
    assert len(reasons) == 35 and all(r.startswith("too-many-streams: ") for r in reasons)
    assert 'limitwatch_source_streams{source="gateway"} 5.0' in metrics
    assert 'limitwatch_streams_refused_total{source="gateway"} 35.0' in metrics
    assert 'limitwatch_dead_letters_total{reason="too-many-streams"} 35.0' in metrics
    warnings = [line for line in svc.logs().splitlines() if "max_streams of 5" in line]
    assert len(warnings) == 1 and "WARNING" in warnings[0]
