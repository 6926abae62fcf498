"""Failover on real parts: Mosquitto -> `limitwatch bridge` -> Tansu (a Kafka-protocol broker)
-> two `limitwatch serve` workers of one consumer group on one shared store (an SQLite file, and
a throwaway PostgreSQL cluster), with a real local webhook receiver.

While a publisher sends readings, a worker joins, one leaves (SIGTERM), one is killed
(SIGKILL), and one stalls (SIGSTOP) until the group has given its partitions to the other, then
goes on (SIGCONT): its batch in hand must be refused by the store's fence. Afterwards every
published reading is stored exactly once and in order per stream, every stream's signals are
those of a single-process `limitwatch replay` of the same readings and its final state that of
an uninterrupted monitor, and every notification arrived, repeats only with the same event id.
"""

from __future__ import annotations

import contextlib
import csv
import json
import os
import signal
import socket
import subprocess
import threading
from pathlib import Path

import numpy as np
import pytest

from limitwatch.config import load_config
from limitwatch.engine import StreamMonitor
from limitwatch.model import Reading
from tests.broker import Broker
from tests.helpers import cli
from tests.kafka_broker import KafkaBroker
from tests.receivers import WebhookReceiver
from tests.service_harness import CLI, Publisher, ServiceProcess, query, wait_until

pytestmark = pytest.mark.integration

T0 = 1_767_225_600.0
TOPIC = "plant-readings"
STREAMS = [f"hall-{h}/dryer-{d}" for h in (1, 2) for d in (1, 2, 3, 4)]
PER_STREAM = 240


def messages() -> tuple[list[tuple[str, str]], dict[str, list[tuple[float, float]]]]:
    """Per stream: readings one minute apart, in control, with a shift now and then so that
    incidents open and clear during the rebalances; interleaved as a gateway sends them."""
    rng = np.random.default_rng(16)
    per_stream: dict[str, list[tuple[float, float]]] = {}
    for k, stream in enumerate(STREAMS):
        values = rng.normal(50.0, 1.0, PER_STREAM)
        start = 40 + 20 * k
        values[start : start + 12] += 3.5  # a shift: beyond-limits and run rules
        per_stream[stream] = [(T0 + 60 * i, round(float(v), 3)) for i, v in enumerate(values)]
    sent = [
        (f"plant/{stream}", json.dumps({"value": v, "time": t}))
        for i in range(PER_STREAM)
        for stream in STREAMS
        for t, v in [per_stream[stream][i]]
    ]
    return sent, per_stream


class StoreLook:
    """Read-only queries on the workers' store, SQLite file or PostgreSQL URL alike."""

    def __init__(self, where: Path | str) -> None:
        self.where = where

    def rows(self, sql: str, params: tuple = ()) -> list[tuple]:
        if isinstance(self.where, Path):
            return query(self.where, sql, params)
        import psycopg

        try:
            with psycopg.connect(self.where, autocommit=True) as conn:
                return list(conn.execute(sql.replace("?", "%s"), params).fetchall())
        except psycopg.errors.UndefinedTable:
            return []

    def count(self, table: str, where: str = "1=1", params: tuple = ()) -> int:
        found = self.rows(f"SELECT count(*) FROM {table} WHERE {where}", params)
        return int(found[0][0]) if found else 0

    def checkpoints(self) -> dict[str, dict]:
        found = self.rows("SELECT stream, state_json FROM checkpoints")
        return {s: json.loads(j) for s, j in found}


def write_configs(
    folder: Path, store: Path | str, mqtt_port: int, kafka: str, hook: str
) -> tuple[Path, Path]:
    common = f"""
[store]
path = "{store}"

[service]
# Long batches, cut by no job, so that a worker stopped at a random moment holds one.
batch_wait = "4s"
batch_max = 5000
alert_tick_every = "30s"
stale_check_every = "30s"
refit_check_every = "30s"

[defaults]
rules = "western-electric"
learn_count = 20

[alerts]
clear_after = 10
repeat_every = "off"

[[notifiers]]
name = "ops-hook"
type = "webhook"
url = "{hook}"
connect_timeout_s = 2
read_timeout_s = 5
"""
    topics = """
payload = "json"
value = "value"
time = "time"
"""
    worker = (
        common
        + f"""
[[sources]]
type = "kafka"
name = "readings"
bootstrap_servers = "{kafka}"
topic = "{TOPIC}"
group_id = "limitwatch-test"
session_timeout = "6s"
max_poll_interval = "7s"
settle = "2s"

[[sources.topics]]
filter = "plant/+/+"
stream = "{{2}}/{{3}}"
{topics}"""
    )
    bridge = f"""
[bridge.mqtt]
host = "127.0.0.1"
port = {mqtt_port}
client_id = "lw-bridge-failover"
session_expiry = "1h"
reconnect_min_s = 1
reconnect_max_s = 2

[[bridge.mqtt.topics]]
filter = "plant/+/+"
stream = "{{2}}/{{3}}"
{topics}
[bridge.kafka]
bootstrap_servers = "{kafka}"
topic = "{TOPIC}"
linger = "2ms"
"""
    (folder / "worker.toml").write_text(worker)
    (folder / "bridge.toml").write_text(bridge)
    return folder / "worker.toml", folder / "bridge.toml"


class Worker(ServiceProcess):
    """A worker with a log of its own (each one's config file is a copy)."""

    count = 0

    def __init__(self, config: Path) -> None:
        Worker.count += 1
        own = config.with_name(f"worker-{Worker.count}.toml")
        own.write_text(config.read_text())
        super().__init__(own)

    @property
    def member(self) -> str:
        assert self.process is not None
        return f"{socket.gethostname()}-{self.process.pid}"


def owners(db: StoreLook) -> list[str | None]:
    return [r[0] for r in db.rows("SELECT owner FROM partitions ORDER BY partition")]


def owned_by(db: StoreLook, *workers: Worker) -> bool:
    """Every partition owned, each by one of ``workers``, and each of them owning some."""
    found = owners(db)
    members = {w.member for w in workers}
    return len(found) == 4 and set(found) == members


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_workers_join_leave_die_and_stall_and_every_reading_lands_once(
    tmp_path: Path,
    broker: Broker,
    kafka_broker: KafkaBroker,
    backend: str,
    request: pytest.FixtureRequest,
) -> None:
    sent, per_stream = messages()
    kafka_broker.create_topic(TOPIC, 4)
    store: Path | str = (
        tmp_path / "plant.db" if backend == "sqlite" else request.getfixturevalue("pg_url")
    )
    db = StoreLook(store)
    count = db.count
    with WebhookReceiver() as hook:
        worker_config, bridge_config = write_configs(
            tmp_path, store, broker.port, kafka_broker.bootstrap, hook.url
        )
        with (tmp_path / "bridge.log").open("ab") as log:
            bridge = subprocess.Popen(
                [str(CLI), "bridge", "--config", str(bridge_config)], stderr=log
            )
        running: list[Worker] = []
        try:
            a = Worker(worker_config).start()
            running.append(a)
            wait_until(lambda: owned_by(db, a), 60, "worker A owning the partitions")
            publisher = Publisher(broker.port, "failover-publisher")
            sender = threading.Thread(
                target=publisher.send_all, args=(sent,), kwargs={"pause_every": 24, "pause_s": 0.75}
            )
            sender.start()  # about 60 s of steady publishing

            def more(n: int) -> None:
                seen = count("readings")
                target = min(seen + n, len(sent))
                wait_until(lambda: count("readings") >= target, 60, f"{target} readings")

            more(20)
            b = Worker(worker_config).start()  # joins
            running.append(b)
            wait_until(lambda: owned_by(db, a, b), 60, "A and B sharing the partitions")
            assert a.process is not None
            everything = "the group assigns partitions [0, 1, 2, 3]"
            for _ in range(3):  # stalls, until a stall catches A with a batch in hand
                more(20)
                given = b.logs().count(everything)
                os.kill(a.process.pid, signal.SIGSTOP)
                try:
                    # The group gives B everything; B takes it in the store at once, unless A
                    # stopped mid-commit and holds the store (then only after A goes on).
                    wait_until(lambda g=given: b.logs().count(everything) > g, 60, "A put out")
                    with contextlib.suppress(TimeoutError):
                        wait_until(lambda: owned_by(db, b), 3, "B owning everything")
                finally:
                    os.kill(a.process.pid, signal.SIGCONT)
                wait_until(lambda: owned_by(db, a, b), 60, "A back in the group")
                if "rolled back" in a.logs():
                    break
            assert "rolled back" in a.logs(), "A's late batch was not refused by the fence"
            more(20)
            assert a.stop() == 0  # leaves
            wait_until(lambda: owned_by(db, b), 60, "B owning everything")
            a2 = Worker(worker_config).start()
            running.append(a2)
            wait_until(lambda: owned_by(db, b, a2), 60, "B and A2 sharing")
            more(20)
            b.kill()  # dies
            wait_until(lambda: owned_by(db, a2), 60, "A2 owning everything after the kill")
            b2 = Worker(worker_config).start()
            running.append(b2)
            wait_until(lambda: owned_by(db, a2, b2), 60, "A2 and B2 sharing")
            sender.join()
            publisher.close()
            wait_until(lambda: count("readings") == len(sent), 90, "every reading")
            wait_until(lambda: count("outbox", "delivered_at IS NULL") == 0, 60, "outbox drained")
            for worker in (a2, b2):
                assert worker.stop() == 0
        finally:
            for worker in running:
                if worker.alive():
                    worker.kill()
            bridge.send_signal(signal.SIGTERM)
            bridge.wait(30)

    # Exactly once, in order: every (stream, time) once, numbered 0.. in time order.
    assert count("readings") == len(sent)
    for stream in STREAMS:
        rows = db.rows(
            "SELECT idx, time, value FROM readings WHERE stream = ? ORDER BY idx", (stream,)
        )
        assert [(t, v) for _, t, v in rows] == per_stream[stream], stream
        assert [i for i, _, _ in rows] == list(range(PER_STREAM)), stream
    assert count("dead_letters") == 0

    # The same signals as one process replaying the same readings, and the same final state.
    table = tmp_path / "readings.csv"
    with table.open("w", newline="") as f:
        out = csv.writer(f)
        out.writerow(["stream", "time", "value"])
        for stream in STREAMS:
            out.writerows([stream, t, v] for t, v in per_stream[stream])
    replay = cli(
        "replay", str(table), "--value", "value", "--time", "time", "--stream", "stream",
        "--baseline-first", "20", "--rules", "western-electric", "--format", "jsonl",
    )
    assert replay.returncode == 0, replay.stderr
    expected = sorted(
        (s["stream"], s["index"], s["rule"]) for s in map(json.loads, replay.stdout.splitlines())
    )
    stored = sorted(
        (stream, idx, rule)
        for stream, idx, signals in db.rows(
            "SELECT stream, idx, signals FROM readings WHERE signals != ''"
        )
        for rule in signals.split()
    )
    assert expected and stored == expected
    settings = load_config(worker_config)
    for stream in STREAMS:
        monitor = StreamMonitor(stream, settings.stream_settings(stream).monitor_settings())
        for t, v in per_stream[stream]:
            monitor.update(Reading(stream, t, v))
        assert db.checkpoints()[stream] == json.loads(json.dumps(monitor.state())), stream
    incidents = {s for (s,) in db.rows("SELECT DISTINCT stream FROM alerts")}
    assert incidents == {s for s, _, _ in expected}

    # Every notification arrived; a repeat carries the same event id and body.
    accepted = hook.accepted()
    ids = [r.headers["X-Limitwatch-Event"] for r in accepted]
    keys = {k.rsplit(":", 1)[0] for (k,) in db.rows("SELECT idempotency_key FROM outbox")}
    assert ids and set(ids) == keys
    bodies: dict[str, bytes] = {}
    for r in accepted:
        event = r.headers["X-Limitwatch-Event"]
        assert json.loads(bodies.setdefault(event, r.body)) == json.loads(r.body)
