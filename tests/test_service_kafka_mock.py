"""The Kafka source and the partition fence, in process on librdkafka's built-in mock cluster
(``test.mock.num.brokers``: a broker inside the client library, on a loopback port) and a real
SQLite file. The multi-process failover test with a real broker is ``test_service_kafka.py``."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from confluent_kafka import Producer

from limitwatch.config import load_config
from limitwatch.ingest.kafka.partitioner import partition_of
from limitwatch.ingest.kafka.settings import RECEIVED_HEADER, TOPIC_HEADER, KafkaSourceConfig
from limitwatch.ingest.kafka.source import KafkaSource
from limitwatch.service import Service
from limitwatch.store import Fenced, Store
from tests.service_harness import count, query, wait_until

T0 = 1_767_225_600.0
TOPIC = "plant-readings"


@pytest.fixture
def mock_cluster() -> Iterator[tuple[Producer, str]]:
    """A producer that owns a one-broker mock cluster, and the cluster's bootstrap address."""
    producer = Producer(
        {"test.mock.num.brokers": 1, "partitioner": "murmur2_random", "log_level": 3}
    )
    brokers = producer.list_topics(timeout=10).brokers.values()
    yield producer, ",".join(f"{b.host}:{b.port}" for b in brokers)
    producer.flush(5)


def produce(producer: Producer, stream: str, t: float, value: float) -> None:
    """A record as the bridge writes it: key = stream id, the MQTT payload, headers."""
    producer.produce(
        TOPIC,
        key=stream,
        value=json.dumps({"value": value, "time": t}).encode(),
        headers=[(TOPIC_HEADER, f"plant/{stream}".encode()), (RECEIVED_HEADER, repr(t).encode())],
    )


def write_config(folder: Path, brokers: str, member: str) -> Path:
    path = folder / f"{member}.toml"
    path.write_text(
        f"""
[store]
path = "plant.db"

[service]
batch_wait = "50ms"
stale_check_every = "1s"

[[sources]]
type = "kafka"
name = "readings"
bootstrap_servers = "{brokers}"
topic = "{TOPIC}"
group_id = "limitwatch"
member = "{member}"
session_timeout = "6s"
max_poll_interval = "30s"
settle = "1s"
client_options = {{ "topic.metadata.refresh.interval.ms" = 1000 }}

[[sources.topics]]
filter = "plant/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
time = "time"

[[notifiers]]
name = "terminal"
type = "console"
"""
    )
    return path


@contextmanager
def running(service: Service) -> Iterator[Service]:
    """The service on a worker thread of its own (the store belongs to the thread that opened
    it), as `limitwatch serve` runs it on its main thread."""
    started = threading.Event()
    failed: list[BaseException] = []

    def work() -> None:
        try:
            service.start()
            started.set()
            service.run()
        except BaseException as exc:  # reported below
            failed.append(exc)
        finally:
            started.set()
            service.close()

    worker = threading.Thread(target=work, daemon=True)
    worker.start()
    started.wait(30)
    try:
        if failed:
            raise failed[0]
        yield service
    finally:
        service.request_stop()
        worker.join(60)
    if failed:
        raise failed[0]


def kafka_source(service: Service) -> KafkaSource:
    source = service.sources["readings"]
    assert isinstance(source, KafkaSource)
    return source


def test_partitioner_matches_librdkafkas_murmur2(mock_cluster: tuple[Producer, str]) -> None:
    """Independent check: librdkafka's own ``murmur2_random`` partitioner (the Java client's
    default for keyed records) puts every key where :func:`partition_of` says."""
    producer, _ = mock_cluster
    landed: dict[str, int] = {}
    keys = [f"line-{i % 7}/sensor-{i}" for i in range(120)] + ["a", "21", "kiln-2/temp" * 9]
    for key in keys:
        producer.produce(
            "partitioner-check",
            key=key,
            value=b"1",
            on_delivery=lambda err, msg: landed.__setitem__(msg.key().decode(), msg.partition()),
        )
    assert producer.flush(10) == 0
    partitions = len(producer.list_topics("partitioner-check", timeout=5).topics[
        "partitioner-check"].partitions)
    assert partitions > 1 and len(landed) == len(keys)
    assert {k: partition_of(k, partitions) for k in keys} == landed


def test_fence_refuses_a_late_owner_and_rolls_its_batch_back(tmp_path: Path) -> None:
    with Store.open(tmp_path / "plant.db", now=T0) as store:
        first = store.take_partition(TOPIC, 3, "worker-a", now=T0)
        with store.transaction():
            store.add_dead_letter("readings", b"x", "unreadable", now=T0)
            store.advance_partition(TOPIC, 3, "worker-a", first.generation, 10, now=T0)
        second = store.take_partition(TOPIC, 3, "worker-b", now=T0 + 1)
        assert second.generation == first.generation + 1 and second.next_offset == 10
        with pytest.raises(Fenced, match="no longer owned by 'worker-a'"), store.transaction():
            store.add_dead_letter("readings", b"y", "unreadable", now=T0 + 2)
            store.advance_partition(TOPIC, 3, "worker-a", first.generation, 20, now=T0 + 2)
        assert len(store.dead_letters()) == 1  # the late batch left nothing behind
        assert store.partition(TOPIC, 3).next_offset == 10
        with pytest.raises(Fenced):
            store.check_partition(TOPIC, 3, "worker-a", first.generation)
        assert not store.release_partition(TOPIC, 3, "worker-a", first.generation)
        assert store.release_partition(TOPIC, 3, "worker-b", second.generation)
        row = store.partition(TOPIC, 3)
        assert row.owner is None and row.next_offset == 10 and row.generation == 2


def test_settings_refuse_what_kafka_would_and_choose_eager_manual_commits() -> None:
    base = {
        "type": "kafka", "name": "r", "bootstrap_servers": "127.0.0.1:9092", "topic": TOPIC,
        "group_id": "g", "topics": [{"filter": "#", "stream": "{#}", "payload": "number"}],
    }
    config = KafkaSourceConfig.model_validate(base).client_config("w-1")
    assert config["enable.auto.commit"] is False
    assert config["partition.assignment.strategy"] == "range"
    for bad, words in (
        ({"topic": "plant readings"}, "letters, digits"),
        ({"security_protocol": "sasl_ssl"}, "needs sasl_mechanism"),
        ({"session_timeout": "60s", "max_poll_interval": "10s"}, "at least session_timeout"),
    ):
        with pytest.raises(ValueError, match=words):
            KafkaSourceConfig.model_validate({**base, **bad})


def test_worker_commits_readings_with_partition_offsets_and_a_second_worker_goes_on(
    tmp_path: Path, mock_cluster: tuple[Producer, str]
) -> None:
    producer, brokers = mock_cluster
    streams = [f"oven-{i}/temp" for i in range(6)]
    for n in range(30):
        for s in streams:
            produce(producer, s, T0 + 60 * n, 20.0 + (n * 7 % 5))
    assert producer.flush(10) == 0
    db = tmp_path / "plant.db"
    config = load_config(write_config(tmp_path, brokers, "worker-a"))
    with running(Service(config)) as service:
        wait_until(lambda: count(db, "readings") == 180, 60, "the first 180 readings")
        source = kafka_source(service)
        owned = source.owned
        assert set(owned) == {0, 1, 2, 3} and set(owned.values()) == {1}
    rows = {p: (owner, nxt) for p, owner, nxt in query(
        db, "SELECT partition, owner, next_offset FROM partitions")}
    per_partition: dict[int, int] = {}
    for s in streams:
        per_partition[partition_of(s, 4)] = per_partition.get(partition_of(s, 4), 0) + 30
    # Released at the clean stop, each offset just past what was applied.
    assert {p: nxt for p, (_, nxt) in rows.items() if nxt is not None} == per_partition
    assert all(owner is None for owner, _ in rows.values())
    before = query(db, "SELECT stream, state_json FROM checkpoints ORDER BY stream")

    for s in streams:  # more while no worker runs, and the first readings again (a repeat)
        produce(producer, s, T0 + 60 * 30, 22.0)
    assert producer.flush(10) == 0
    config_b = load_config(write_config(tmp_path, brokers, "worker-b"))
    with running(Service(config_b)) as service:
        wait_until(lambda: count(db, "readings") == 186, 60, "the next 6 readings")
        time.sleep(0.5)
        assert set(kafka_source(service).owned.values()) == {2}
        assert set(service.pipeline.monitors) == set(streams)
    assert count(db, "readings") == 186 and count(db, "dead_letters") == 0
    assert before and len(before) == len(streams)
    for stream, index in query(db, "SELECT stream, max(idx) FROM readings GROUP BY stream"):
        assert index == 30, stream  # in order, each applied once, numbered on from 0


def test_a_batch_for_a_partition_taken_over_is_refused_and_the_rest_goes_on(
    tmp_path: Path, mock_cluster: tuple[Producer, str]
) -> None:
    producer, brokers = mock_cluster
    streams = [f"press-{i}/force" for i in range(8)]
    assert len({partition_of(s, 4) for s in streams}) >= 2
    for s in streams:
        produce(producer, s, T0, 5.0)
    assert producer.flush(10) == 0
    db = tmp_path / "plant.db"
    config = load_config(write_config(tmp_path, brokers, "worker-a"))
    with running(Service(config)) as service:
        wait_until(lambda: count(db, "readings") == 8, 60, "the first readings")
        source = kafka_source(service)
        taken = partition_of(streams[0], 4)
        # Another worker takes the partition over while this one still thinks it owns it
        # (as after a stall past max.poll.interval.ms).
        with Store.open(db) as other:
            other.take_partition(TOPIC, taken, "worker-b", now=T0)
        for s in streams:
            produce(producer, s, T0 + 60, 6.0)
        assert producer.flush(10) == 0
        lost = [s for s in streams if partition_of(s, 4) == taken]
        wait_until(lambda: count(db, "readings") == 16 - len(lost), 60, "the other partitions")
        wait_until(lambda: source.fenced_batches >= 1, 10, "the fenced batch")
        assert taken not in source.owned
        assert not set(lost) & set(service.pipeline.monitors)
        health = service.health()
        assert health["source_state"]["readings"]["fenced_batches"] >= 1
    for s in lost:  # nothing of the late batch landed
        assert count(db, "readings", "stream = ?", (s,)) == 1
    assert query(db, "SELECT owner FROM partitions WHERE partition = ?", (taken,)) == [
        ("worker-b",)
    ]


def test_stale_checks_wait_for_settle_and_catching_up_and_only_on_the_owner() -> None:
    """A rebalance pause must not look like a silent sensor: a stream's stale check waits
    ``settle`` after its partition's assignment and until the worker caught up (the consumer
    came back empty, or read a record the bridge received recently); a stream of a partition
    owned elsewhere is never checked here."""
    from limitwatch.ingest.kafka.source import Owned
    from limitwatch.ingest.payload import SourceParser

    settings = KafkaSourceConfig.model_validate(
        {
            "type": "kafka", "name": "readings", "bootstrap_servers": "127.0.0.1:9",
            "topic": TOPIC, "group_id": "g", "settle": "10s",
            "topics": [{"filter": "plant/+/+", "stream": "{2}/{3}", "payload": "number"}],
        }
    )
    source = KafkaSource(settings, SourceParser(settings), "w-1", {}, None)
    source.partitions = 4
    mine, elsewhere = "oven-1/temp", next(
        s for s in (f"oven-{i}/temp" for i in range(2, 50))
        if partition_of(s, 4) != partition_of("oven-1/temp", 4)
    )
    now = T0 + 1000.0
    source._owned[partition_of(mine, 4)] = Owned(generation=3, assigned_at=now - 5, assigned_mono=0)
    assert not source.stale_allowed(mine, now)  # within settle
    assert not source.stale_allowed(mine, now + 20)  # settled, but not known to be caught up
    source._owned[partition_of(mine, 4)].last_received = now + 15  # read a fresh record
    assert source.stale_allowed(mine, now + 20)
    assert not source.stale_allowed(elsewhere, now + 20)  # not ours: its owner checks it


def test_group_workers_share_the_lock_and_keep_a_lone_service_out(tmp_path: Path) -> None:
    from limitwatch.service.lock import AlreadyRunning, InstanceLock

    first, second = InstanceLock(tmp_path / "plant.db"), InstanceLock(tmp_path / "plant.db")
    first.acquire(shared=True)
    second.acquire(shared=True)  # two workers of one group on one file
    with pytest.raises(AlreadyRunning):
        InstanceLock(tmp_path / "plant.db").acquire()
    first.release()
    second.release()
    lone = InstanceLock(tmp_path / "plant.db")
    lone.acquire()
    with pytest.raises(AlreadyRunning):
        InstanceLock(tmp_path / "plant.db").acquire(shared=True)
    lone.release()


def test_a_kafka_source_beside_another_source_is_refused_before_anything_is_read(
    tmp_path: Path,
) -> None:
    from limitwatch.service.lock import CannotShare

    path = write_config(tmp_path, "127.0.0.1:9", "worker-a")
    path.write_text(
        path.read_text()
        + '\n[[sources]]\ntype = "file"\nname = "export"\nglob = "data/*.csv"\nformat = "csv"\n'
        'value = "value"\ntime = "time"\nstream = "stream"\n'
    )
    service = Service(load_config(path))
    try:
        with pytest.raises(CannotShare, match="must be the service's only source"):
            service.start()
    finally:
        service.close()
    assert not (tmp_path / "plant.db").exists()


def test_looks_after_only_settled_streams_of_owned_partitions_by_default_all() -> None:
    """Reminders follow the same owner as stale checks, and wait as they do; a source that
    shares nothing (the base class) looks after every stream."""
    from limitwatch.ingest.base import Source
    from limitwatch.ingest.kafka.source import Owned
    from limitwatch.ingest.payload import SourceParser

    settings = KafkaSourceConfig.model_validate(
        {
            "type": "kafka", "name": "readings", "bootstrap_servers": "127.0.0.1:9",
            "topic": TOPIC, "group_id": "g", "settle": "10s",
            "topics": [{"filter": "plant/+/+", "stream": "{2}/{3}", "payload": "number"}],
        }
    )
    source = KafkaSource(settings, SourceParser(settings), "w-1", {}, None)
    assert Source.looks_after(source, "any/stream", T0)  # the base class's answer
    mine = "oven-1/temp"
    assert not source.looks_after(mine, T0)  # no assignment yet: nobody's here
    source.partitions = 4
    now = T0 + 1000.0
    source._owned[partition_of(mine, 4)] = Owned(generation=1, assigned_at=now, assigned_mono=0)
    elsewhere = next(
        s for s in (f"oven-{i}/temp" for i in range(2, 50))
        if partition_of(s, 4) != partition_of(mine, 4)
    )
    assert not source.looks_after(mine, now + 5)  # just assigned
    source._owned[partition_of(mine, 4)].last_received = now + 12
    assert source.looks_after(mine, now + 15)
    assert not source.looks_after(elsewhere, now + 15)
    # A stream read from another partition than the hash says (a producer keyed otherwise)
    # belongs to the partition it came from.
    source._where[elsewhere] = partition_of(mine, 4)
    assert source.looks_after(elsewhere, now + 15)


def reminders(db: Path) -> dict[str, list[int]]:
    """Stream -> the numbers of the reminders its incident queued, in order (from its
    ``reminded`` events: a delivered outbox row does not stay)."""
    out: dict[str, list[int]] = {}
    for stream, data in query(
        db,
        "SELECT a.stream, e.data_json FROM alert_events e JOIN alerts a ON a.id = e.alert_id "
        "WHERE e.kind = 'reminded' ORDER BY e.id",
    ):
        _, kind, number = json.loads(data)["event_id"].split(":")
        assert kind == "reminder"
        out.setdefault(stream, []).append(int(number))
    return out


def test_each_worker_reminds_the_incidents_of_its_own_partitions_and_takes_over_once(
    tmp_path: Path, mock_cluster: tuple[Producer, str]
) -> None:
    """Two workers of one group on one SQLite file, each owning two partitions: an alert tick
    on one reminds only its own partitions' incidents; once the other has left, the remaining
    worker reminds them all, each once."""
    from limitwatch.service.jobs import Job

    producer, brokers = mock_cluster
    streams = [f"kiln-{i}/temp" for i in range(12)]
    assert {partition_of(s, 4) for s in streams} == {0, 1, 2, 3}
    for s in streams:
        produce(producer, s, T0, 20.0)
        produce(producer, s, T0 + 60, 35.0)  # beyond the typed-in limits: an incident each
    assert producer.flush(10) == 0
    db = tmp_path / "plant.db"
    clock = [time.time()]
    extra = (
        '\n[alerts]\nrepeat_every = "10m"\nescalate_after = "off"\nflood_after = "off"\n'
        '\n[defaults]\nbaseline = { center = 20.0, sigma = 1.0 }\n'
    )

    def configured(member: str) -> Service:
        path = write_config(tmp_path, brokers, member)
        text = path.read_text().replace('stale_check_every = "1s"', 'stale_check_every = "1d"')
        path.write_text(text.replace("[[notifiers]]", extra + "\n[[notifiers]]", 1))
        return Service(load_config(path), clock=lambda: clock[0])

    def settled(service: Service) -> bool:
        source = kafka_source(service)
        consumer = source.consumer
        owned = list(source._owned.values())
        return bool(owned) and consumer is not None and all(
            consumer.drained_at > o.assigned_mono for o in owned
        )

    def tick(service: Service) -> None:
        service.intake.put(Job("alert-tick"))
        wait_until(
            lambda: service._job_ran.get("alert-tick", (0, 0))[1] == clock[0], 30, "the tick"
        )

    with running(configured("worker-a")) as a:
        wait_until(lambda: count(db, "alerts") == len(streams), 60, "an incident per stream")
        with running(configured("worker-b")) as b:
            wait_until(
                lambda: kafka_source(a).owned and kafka_source(b).owned
                and set(kafka_source(a).owned) | set(kafka_source(b).owned) == {0, 1, 2, 3},
                60,
                "the partitions shared out",
            )
            wait_until(lambda: settled(a) and settled(b), 30, "both caught up")
            owned_a = set(kafka_source(a).owned)
            assert not owned_a & set(kafka_source(b).owned)
            clock[0] += 700  # the first reminder is due everywhere
            tick(a)
            mine = {s for s in streams if partition_of(s, 4) in owned_a}
            assert mine and mine != set(streams)
            assert reminders(db) == {s: [1] for s in mine}
            tick(b)
            assert reminders(db) == {s: [1] for s in streams}
        # worker-b has left: worker-a owns every partition, and reminds every incident.
        wait_until(lambda: set(kafka_source(a).owned) == {0, 1, 2, 3}, 60, "the takeover")
        wait_until(lambda: settled(a), 30, "worker-a caught up")
        clock[0] += 700
        tick(a)
        tick(a)
        assert reminders(db) == {s: [1, 2] for s in streams}
