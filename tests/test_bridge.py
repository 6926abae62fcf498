"""`limitwatch bridge`: MQTT (real Mosquitto) -> Kafka (librdkafka's mock cluster here; Tansu
in the failover test), acknowledging MQTT only after Kafka's delivery report."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from confluent_kafka import Consumer, Producer

from limitwatch.config import load_config
from limitwatch.ingest.kafka.bridge import Bridge
from limitwatch.ingest.kafka.settings import RECEIVED_HEADER, SEQUENCE_HEADER, TOPIC_HEADER
from tests.broker import Broker
from tests.helpers import cli
from tests.service_harness import Publisher, wait_until

T0 = 1_767_225_600.0
TOPIC = "plant-readings"


def bridge_config(folder: Path, mqtt_port: int, brokers: str, topic: str = TOPIC) -> Path:
    path = folder / "bridge.toml"
    path.write_text(
        f"""
[bridge.mqtt]
host = "127.0.0.1"
port = {mqtt_port}
client_id = "lw-bridge-test"
session_expiry = "1h"
reconnect_min_s = 1
reconnect_max_s = 2

[[bridge.mqtt.topics]]
filter = "plant/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
time = "time"

[bridge.kafka]
bootstrap_servers = "{brokers}"
topic = "{topic}"
linger = "1ms"
"""
    )
    return path


def test_bridge_without_a_bridge_section_says_what_to_add(tmp_path: Path) -> None:
    config = tmp_path / "site.toml"
    config.write_text('[store]\npath = "plant.db"\n')
    result = cli("bridge", "--config", str(config))
    assert result.returncode == 1
    assert "no [bridge] section" in result.stderr and "[bridge.kafka]" in result.stderr


def test_check_validates_the_bridge_section_by_key_path(tmp_path: Path) -> None:
    path = bridge_config(tmp_path, 1883, "127.0.0.1:9092", topic="plant readings")
    result = cli("check", "--config", str(path))
    assert result.returncode == 1
    assert "bridge.kafka.topic" in result.stderr + result.stdout
    good = bridge_config(tmp_path, 1883, "127.0.0.1:9092")
    result = cli("check", "--config", str(good))
    assert "bridge: MQTT 127.0.0.1:1883" in result.stdout


def test_producer_is_idempotent_and_keys_by_the_stream(tmp_path: Path) -> None:
    settings = load_config(bridge_config(tmp_path, 1883, "127.0.0.1:9092")).bridge
    producer = settings.producer_config()
    assert producer["enable.idempotence"] is True and producer["acks"] == "all"
    assert producer["partitioner"] == "murmur2_random"
    bridge = Bridge(settings)
    assert bridge.stream_of("plant/kiln-2/temp") == "kiln-2/temp"
    assert bridge.stream_of("elsewhere/x") == "elsewhere/x"  # the worker dead-letters it


@pytest.fixture
def mock_cluster() -> Iterator[str]:
    owner = Producer({"test.mock.num.brokers": 1, "log_level": 3})
    brokers = owner.list_topics(timeout=10).brokers.values()
    yield ",".join(f"{b.host}:{b.port}" for b in brokers)
    owner.flush(1)


def read_all(brokers: str, want: int, timeout: float = 30.0) -> list:
    consumer = Consumer(
        {
            "bootstrap.servers": brokers,
            "group.id": f"reader-{time.monotonic_ns()}",
            "auto.offset.reset": "earliest",
            "enable.auto.commit": False,
        }
    )
    consumer.subscribe([TOPIC])
    got: list = []
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and len(got) < want:
        got.extend(m for m in consumer.consume(500, 0.5) if m.error() is None)
    time.sleep(1.0 if len(got) >= want else 0)  # anything past what was expected shows now
    got.extend(m for m in consumer.consume(500, 0.5) if m.error() is None)
    consumer.close()
    return got


def test_bridge_forwards_in_order_with_headers_and_acknowledges_after_delivery(
    tmp_path: Path, broker: Broker, mock_cluster: str
) -> None:
    settings = load_config(bridge_config(tmp_path, broker.port, mock_cluster)).bridge
    streams = ["kiln-1/temp", "kiln-2/temp", "press-4/force"]

    def run_once() -> Bridge:
        bridge = Bridge(settings)
        thread = threading.Thread(target=bridge.run, daemon=True)
        thread.start()
        wait_until(lambda: bridge.subscribed, 30, "the bridge's subscription")
        bridge.thread = thread  # type: ignore[attr-defined]
        return bridge

    bridge = run_once()
    publisher = Publisher(broker.port, "bridge-test-publisher")
    messages = [
        (f"plant/{s}", json.dumps({"value": n, "time": T0 + n}))
        for n in range(60)
        for s in streams
    ]
    publisher.send_all(messages)
    wait_until(lambda: bridge.acknowledged == 180, 30, "180 acknowledgements")
    bridge.stop()
    bridge.thread.join(30)  # type: ignore[attr-defined]
    records = read_all(mock_cluster, 180)
    assert len(records) == 180
    by_key: dict[str, list[float]] = {}
    for r in records:
        headers = dict(r.headers())
        topic = headers[TOPIC_HEADER].decode()
        assert r.key().decode() == topic.removeprefix("plant/")
        assert float(headers[RECEIVED_HEADER]) > T0 and int(headers[SEQUENCE_HEADER]) >= 1
        by_key.setdefault(r.key().decode(), []).append(json.loads(r.value())["value"])
    assert by_key == {s: list(range(60)) for s in streams}  # in order per stream

    # Acknowledged: a second run of the same client id gets nothing again from the session.
    again = run_once()
    info = publisher.send("plant/kiln-1/temp", json.dumps({"value": 60, "time": T0 + 60}))
    info.wait_for_publish(10)
    wait_until(lambda: again.acknowledged == 1, 30, "the one new message")
    time.sleep(1.0)
    again.stop()
    again.thread.join(30)  # type: ignore[attr-defined]
    publisher.close()
    assert again.forwarded == 1
    assert len(read_all(mock_cluster, 181)) == 181
