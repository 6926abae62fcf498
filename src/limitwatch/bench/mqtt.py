"""MQTT end to end: a backlog drained by a bare subscriber and by the service."""

from __future__ import annotations

import json
import multiprocessing
import os
import statistics
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from limitwatch.bench.common import (
    ALL_DETECTORS,
    T0,
    Figure,
    Sizes,
    load_average,
)
from limitwatch.bench.service import (
    _await_commits,
    _running,
    _service_config,
    _timed_service_class,
)
from limitwatch.localbroker import mosquitto_path, private_broker

# --------------------------------------------------------------------------- MQTT


def _paho() -> Any:
    import paho.mqtt.client as mqtt

    return mqtt


def _message(i: int, streams: int, t: float, value: float) -> tuple[str, bytes]:
    topic = f"bench/unit-{i % streams:04d}/temp"
    return topic, json.dumps({"v": value, "t": t, "seq": i // streams + 1}).encode()


def _publish_backlog(port: int, messages: int, streams: int, seed: int) -> float:
    """Publish QoS 1 messages as fast as the broker takes them; return once all are acknowledged,
    with the time (epoch seconds) the first was handed to the client."""
    mqtt = _paho()
    rng = np.random.default_rng(seed)
    values = np.round(rng.normal(50.0, 1.0, messages), 3).tolist()
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-publisher")
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    first = time.time()
    try:
        # In slices: paho scans its whole list of unacknowledged messages on every PUBACK.
        for start in range(0, messages, 1000):
            infos = [
                client.publish(*_message(i, streams, T0 + 60.0 * (i // streams), v), qos=1)
                for i, v in enumerate(values[start : start + 1000], start=start)
            ]
            for info in infos:
                info.wait_for_publish(timeout=120)
    finally:
        client.disconnect()
        client.loop_stop()
    return first


def _bare_session(port: int, client_id: str) -> Any:
    mqtt = _paho()
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    client = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5
    )
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 3600
    return client, props


def bare_subscriber_run(port: int, messages: int, streams: int, seed: int) -> tuple[float, float]:
    """A paho subscriber that only counts: QoS 1, persistent session, automatic acks. Returns
    messages per second while draining a backlog of ``messages`` held by the broker, and CPU
    seconds per message (this process, whose only work then is the client's network thread)."""
    client, props = _bare_session(port, "bench-bare")
    subscribed = threading.Event()
    state = {"n": 0, "first": 0.0, "last": 0.0}
    done = threading.Event()

    def on_connect(c: Any, userdata: Any, flags: Any, rc: Any, properties: Any) -> None:
        c.subscribe("bench/+/+", qos=1)

    def on_subscribe(*_: Any) -> None:
        subscribed.set()

    def on_message(c: Any, userdata: Any, message: Any) -> None:
        now = time.time()
        if state["n"] == 0:
            state["first"] = now
        state["n"] += 1
        state["last"] = now
        if state["n"] >= messages:
            done.set()

    client.on_connect, client.on_subscribe, client.on_message = (
        on_connect,
        on_subscribe,
        on_message,
    )
    # First visit: create the session and subscription, then leave so the broker queues.
    client.connect("127.0.0.1", port, clean_start=False, properties=props)
    client.loop_start()
    if not subscribed.wait(10):
        raise RuntimeError("bare subscriber could not subscribe")
    client.disconnect()
    client.loop_stop()
    _publish_backlog(port, messages, streams, seed)
    client.reconnect_delay_set(1, 2)
    cpu = time.process_time()
    client.connect("127.0.0.1", port, clean_start=False, properties=props)
    client.loop_start()
    try:
        if not done.wait(300):
            raise RuntimeError(f"bare subscriber got {state['n']} of {messages} messages")
        cpu = time.process_time() - cpu
    finally:
        client.disconnect()
        client.loop_stop()
    return messages / (state["last"] - state["first"]), cpu / messages


def _mqtt_source(port: int, client_id: str, receive_maximum: int = 1000) -> str:
    return f"""[[sources]]
type = "mqtt"
name = "gateway"
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
session_expiry = "1h"
receive_maximum = {receive_maximum}

[[sources.topics]]
filter = "bench/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
value = "v"
time = "t"
time_format = "epoch_s"
seq = "seq"
"""


def _wait(check: Callable[[], bool], timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise RuntimeError(f"timed out waiting for {what}")
        time.sleep(0.02)


def service_mqtt_run(
    folder: Path, port: int, messages: int, streams: int, seed: int
) -> tuple[float, float]:
    """The real service draining the same backlog: readings per second from the first message
    received to the commit of the last one, and CPU seconds per message (service and its
    connection process)."""
    from limitwatch.config import load_config

    folder.mkdir(parents=True, exist_ok=True)
    config = load_config(_service_config(folder, source=_mqtt_source(port, "bench-service")))
    timed = _timed_service_class()
    # First visit: the session and subscription exist from here on; then leave.
    first = timed(config)
    first.start()
    _wait(lambda: first.mqtt["gateway"].subscribed.is_set(), 10, "the service's subscription")
    first.close()
    _publish_backlog(port, messages, streams, seed)
    service = timed(config)
    service.expect = messages
    with _running(service):
        _wait(lambda: service.mqtt["gateway"].subscribed.is_set(), 10, "the subscription")
        connection = getattr(service.mqtt["gateway"], "_process", None)
        pid = getattr(connection, "pid", None)
        cpu = time.process_time() + _cpu_of(pid)
        _await_commits(service)
        cpu = time.process_time() + _cpu_of(pid) - cpu
    assert service.first_received is not None and service.last_commit_at is not None
    return messages / (service.last_commit_at - service.first_received), cpu / messages


def _cpu_of(pid: int | None) -> float:
    """CPU seconds (user + system) of another process so far, from ``/proc/<pid>/stat``; 0 when
    it cannot be read (not Linux, or the process is gone)."""
    if pid is None:
        return 0.0
    try:
        with open(f"/proc/{pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def live_mqtt_run(
    folder: Path, port: int, publisher: Any, messages: int, streams: int, seed: int
) -> tuple[float, float]:
    """The service subscribed while a publisher in another process sends ``messages`` as fast
    as the broker takes them: both share the machine, as on a live site. Returns the service's
    readings per second (first publish to last commit) and the publisher's messages per second."""
    from limitwatch.config import load_config

    folder.mkdir(parents=True, exist_ok=True)
    config = load_config(_service_config(folder, source=_mqtt_source(port, "bench-live")))
    service = _timed_service_class()(config)
    service.expect = messages
    with _running(service):
        _wait(lambda: service.mqtt["gateway"].subscribed.is_set(), 10, "the subscription")
        first = publisher.apply_async(_publish_backlog, (port, messages, streams, seed)).get(
            timeout=600
        )
        published = time.time()
        _await_commits(service)
    assert service.last_commit_at is not None
    return messages / (service.last_commit_at - first), messages / (published - first)


def measure_mqtt(sizes: Sizes, workdir: Path) -> list[Figure]:
    conditions = {
        "messages_per_run": sizes.mqtt_messages,
        "streams": sizes.mqtt_streams,
        "broker": "private Mosquitto on 127.0.0.1 (max_inflight_messages 1000)",
        "how": "the broker holds the backlog for the client's persistent session; the client "
        "connects and drains it; rate = messages / (last commit or message - first message)",
        "qos": 1,
        "payload": 'JSON {"v", "t", "seq"}',
    }
    if mosquitto_path() is None:
        skip = "skipped: mosquitto is not installed (Debian/Ubuntu: apt-get install mosquitto)"
        return [Figure("mqtt end to end", "readings/s", [], conditions, skipped=skip)]
    service_rates, bare_rates, ratios, cpu_per, bare_cpu_per, cpu_ratios = [], [], [], [], [], []
    load = load_average()
    for i in range(sizes.repeats):
        with private_broker(workdir / f"mqtt-{i}" / "broker", sizes.mqtt_messages + 1000) as port:
            bare, bare_cpu = bare_subscriber_run(
                port, sizes.mqtt_messages, sizes.mqtt_streams, seed=i
            )
            ours, cpu = service_mqtt_run(
                workdir / f"mqtt-{i}", port, sizes.mqtt_messages, sizes.mqtt_streams, seed=i
            )
        bare_rates.append(bare)
        service_rates.append(ours)
        ratios.append(ours / bare)
        cpu_per.append(cpu)
        bare_cpu_per.append(bare_cpu)
        cpu_ratios.append(cpu / bare_cpu)
    load_after = load_average()
    service_conditions = {
        **conditions,
        "rules": ALL_DETECTORS,
        "phase": "monitoring (typed-in baseline)",
        "session": "MQTT 5, clean_start false, session expiry 1 h, receive maximum 1000",
        "acks": "manual, in arrival order, after each batch's commit",
        "batch_max": 500,
        "batch_wait": "200ms",
        "clock": "wall clock from the first message received to the last commit",
        "load_average": load,
        "load_average_after": load_after,
    }
    bare_conditions = {
        **conditions,
        "client": "paho-mqtt, MQTT 5, persistent session, automatic acks; counts only",
        "load_average": load,
    }
    live_rates, publisher_rates = [], []
    live_load = load_average()
    with multiprocessing.get_context("spawn").Pool(1) as publisher:
        for i in range(sizes.repeats):
            folder = workdir / f"mqtt-live-{i}"
            with private_broker(folder / "broker", sizes.mqtt_messages + 1000) as port:
                ours, theirs = live_mqtt_run(
                    folder, port, publisher, sizes.mqtt_messages, sizes.mqtt_streams, seed=i
                )
            live_rates.append(ours)
            publisher_rates.append(theirs)
    live_conditions = {
        **service_conditions,
        "how": "the service subscribed first; a publisher in another process then sends the "
        "messages as fast as the broker acknowledges them (QoS 1, 1,000 in flight) while the "
        "service drains them; rate = messages / (last commit - first publish)",
        "clock": "wall clock; publisher, broker and service share the machine",
        "load_average": live_load,
    }
    return [
        Figure(
            "mqtt end to end",
            "readings/s",
            service_rates,
            service_conditions,
            extra={
                "cpu_us_per_reading": 1e6 * statistics.median(cpu_per),
                "cpu_note": "CPU time of the service's process and of its connection process "
                "(from /proc) while it drained the backlog, per reading; the broker not included",
            },
        ),
        Figure(
            "mqtt bare subscriber",
            "messages/s",
            bare_rates,
            bare_conditions,
            extra={
                "cpu_us_per_message": 1e6 * statistics.median(bare_cpu_per),
                "cpu_note": "CPU time of the process running only the bare client while it "
                "drained the backlog, per message",
            },
        ),
        Figure(
            "mqtt end to end / bare subscriber",
            "ratio",
            ratios,
            {
                "runs_paired": "each ratio pairs the two clients of one run on one broker",
                "load_average": load,
            },
            target=(">=", 0.80),
        ),
        Figure(
            "mqtt CPU per message, end to end / bare subscriber",
            "ratio",
            cpu_ratios,
            {
                "runs_paired": "each ratio pairs the two clients of one run on one broker",
                "measured": "CPU seconds per message: the service's process and its connection "
                "process against the bare client's process, each while draining the backlog",
                "load_average": load,
            },
            target=("<=", 1.5),
        ),
        Figure(
            "mqtt end to end, live publisher",
            "readings/s",
            live_rates,
            live_conditions,
            extra={"publisher_messages_per_s": statistics.median(publisher_rates)},
        ),
    ]
