"""A reading that arrives after a newer one is called what it is: ``duplicate`` only when it was
applied before, ``late`` when it never was. And with ``reorder_within`` a reordering on the way
(a paho gateway that sends n+1 before n while reconnecting) loses nothing, while no held reading
is acknowledged before it is committed (checked with kill -9 and a real Mosquitto)."""

from __future__ import annotations

import json

from hypothesis import given
from hypothesis import strategies as st

from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.reorder import ReorderBuffer
from limitwatch.model import Reading
from limitwatch.pipeline import Parsed, Pipeline
from limitwatch.store import Store
from tests.service_harness import Publisher, ServiceProcess, count, mqtt_config, query, wait_until

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z: in the past, as the service wants readings
S = "line-1/temp"


def pipeline(store: Store) -> Pipeline:
    book = AlertBook(store, AlertPolicy())
    return Pipeline(store, lambda s: MonitorSettings(learn_count=10), book)


def feed(pipe: Pipeline, seqs: list[int], now: float = T0, *, time_of=lambda n: T0 + n) -> None:
    items = [Parsed("gw", b"", reading=Reading(S, time_of(n), 20.0 + n % 3, n)) for n in seqs]
    pipe.process(items, now)


def reasons(store: Store) -> list[str]:
    return [d.reason.split(":")[0] for d in reversed(store.dead_letters())]


def test_a_reading_overtaken_by_a_newer_one_is_late_not_a_duplicate(fresh_db: Store):
    pipe = pipeline(fresh_db)
    feed(pipe, list(range(12)))
    feed(pipe, [13])
    feed(pipe, [12])  # never seen: the monitor only knows it is not newer than 13
    assert reasons(fresh_db) == ["late"]
    feed(pipe, [5])  # stored: a real redelivery
    feed(pipe, [14, 14])  # a repeat inside one batch, before anything is committed
    assert reasons(fresh_db) == ["late", "duplicate", "duplicate"]


def test_without_sequence_numbers_an_older_time_never_stored_is_late(fresh_db: Store):
    pipe = pipeline(fresh_db)
    items = [Parsed("gw", b"", reading=Reading(S, T0 + t, 5.0 + t % 2)) for t in (0, 1, 3)]
    pipe.process(items, T0)
    pipe.process([Parsed("gw", b"", reading=Reading(S, T0 + 2, 7.0))], T0)
    pipe.process([Parsed("gw", b"", reading=Reading(S, T0 + 1, 6.0))], T0)  # stored
    assert reasons(fresh_db) == ["late", "duplicate"]


def test_a_redelivery_stamped_with_a_later_receive_time_is_still_a_duplicate(fresh_db: Store):
    pipe = pipeline(fresh_db)
    feed(pipe, list(range(12)))
    feed(pipe, [4], time_of=lambda n: T0 + 100 + n)  # same seq, new receive time
    assert reasons(fresh_db) == ["duplicate"]


# -- the reorder buffer -------------------------------------------------------------------------


def test_reorder_releases_each_stream_in_order_and_holds_the_rest():
    buffer = ReorderBuffer(within=1.0)
    buffer.hold(Reading("a", 2.0, 1.0, 2), "a2", now=0.0)
    buffer.hold(Reading("b", 9.0, 1.0, 9), "b9", now=0.5)
    buffer.hold(Reading("a", 1.0, 1.0, 1), "a1", now=0.6)
    buffer.hold(Reading("a", 3.0, 1.0, 3), "a3", now=0.9)
    assert [t for _, t in buffer.release(now=0.99)] == []
    # a2's time is up: a1 sorts before it and goes too; a3 and b9 wait
    assert [t for _, t in buffer.release(now=1.0)] == ["a1", "a2"]
    assert len(buffer) == 2
    assert sorted(t for _, t in buffer.release(now=0.0, everything=True)) == ["a3", "b9"]


@given(
    st.lists(st.floats(0.0, 0.9), min_size=1, max_size=60),
    st.lists(st.integers(0, 5), min_size=1, max_size=60),
)
def test_readings_overtaken_by_less_than_the_window_come_out_in_order(delays, ticks):
    # Reading n is sent at time n * 1.0 and arrives after a delay below the 1 s window, so it
    # can be overtaken by later ones; released at arbitrary moments, the stream is in order.
    arrivals = sorted((n + delays[n % len(delays)], n) for n in range(len(delays)))
    buffer = ReorderBuffer(within=1.0)
    out: list[int] = []
    for i, (arrived, n) in enumerate(arrivals):
        out += [t for _, t in buffer.release(now=arrived)]
        buffer.hold(Reading("s", float(n), 0.0, n), n, now=arrived)
        if ticks[i % len(ticks)] == 0:
            out += [t for _, t in buffer.release(now=arrived + 0.05)]
    out += [t for _, t in buffer.release(now=1e9)]
    assert out == sorted(out) == list(range(len(delays)))


# -- over a real broker --------------------------------------------------------------------------


def message(seq: int) -> str:
    return json.dumps({"v": 20.0 + seq % 3, "t": T0 + 60 * seq, "seq": seq})


TOPIC = "plant/line-1/temp/reading"
ORDER = [*range(12), 13, 12, *range(14, 20)]


def test_over_mqtt_without_a_window_the_overtaken_reading_is_late(broker, tmp_path):
    config = mqtt_config(tmp_path, broker.port)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: "connected to" in svc.logs(), what="connected")
        pub = Publisher(broker.port)
        pub.send_all([(TOPIC, message(n)) for n in ORDER])
        pub.close()
        wait_until(lambda: count(db, "readings") + count(db, "dead_letters") == 20, what="all")
    finally:
        assert svc.stop() == 0
    assert [r[0].split(":")[0] for r in query(db, "SELECT reason FROM dead_letters")] == ["late"]


def test_over_mqtt_a_reorder_window_loses_nothing_even_when_killed_while_holding(
    broker, tmp_path
):
    config = mqtt_config(tmp_path, broker.port)
    text = config.read_text().replace(
        "reconnect_max_s = 2\n", 'reconnect_max_s = 2\nreorder_within = "3s"\n'
    )
    config.write_text(text)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: "connected to" in svc.logs(), what="connected")
        pub = Publisher(broker.port)
        pub.send_all([(TOPIC, message(n)) for n in ORDER[:14]])
        wait_until(lambda: count(db, "readings") == 14, timeout=30, what="the first 14")
        pub.send_all([(TOPIC, message(n)) for n in ORDER[14:]])
        svc.kill()  # within the hold: nothing of these six was committed, nor acknowledged
        assert count(db, "readings") == 14
        svc = ServiceProcess(config).start()
        wait_until(lambda: count(db, "readings") == 20, timeout=60, what="the held six again")
        pub.close()
    finally:
        assert svc.stop() == 0
    assert count(db, "dead_letters") == 0, query(db, "SELECT reason FROM dead_letters")
    seqs = [r[0] for r in query(db, "SELECT seq FROM readings ORDER BY idx")]
    assert seqs == list(range(20))
