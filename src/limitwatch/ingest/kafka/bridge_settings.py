"""``[bridge]``: what ``limitwatch bridge`` reads from MQTT and where it writes in Kafka.

``[bridge.mqtt]`` has the keys of an MQTT source (broker, client id, ``[[bridge.mqtt.topics]]``
with the same topic templates, which give each message its stream id); ``[bridge.kafka]`` the
Kafka connection and topic. The same ``[[...topics]]`` entries go into the workers' kafka
source, which parses the payloads.

>>> bridge = BridgeSettings.model_validate({
...     "mqtt": {"host": "127.0.0.1", "client_id": "lw-bridge-1",
...              "topics": [{"filter": "plant/+/+", "stream": "{2}/{3}", "payload": "number"}]},
...     "kafka": {"bootstrap_servers": "127.0.0.1:9092", "topic": "plant-readings"}})
>>> bridge.producer_config()["acks"], bridge.producer_config()["enable.idempotence"]
('all', True)
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Literal

from pydantic import Field

from limitwatch.config import Duration, Problem, SecretRef, _Section
from limitwatch.ingest.kafka.settings import KafkaConnection
from limitwatch.ingest.mqtt.settings import MqttSourceConfig

__all__ = ["BridgeKafka", "BridgeMqtt", "BridgeSettings"]


class BridgeMqtt(MqttSourceConfig):
    """``[bridge.mqtt]``: an MQTT source's keys; ``type`` and ``name`` may be left out."""

    type: Literal["mqtt"] = "mqtt"
    name: str = "bridge"


class BridgeKafka(KafkaConnection):
    """``[bridge.kafka]``: where the readings go."""

    linger: Duration = 0.005
    """How long the producer gathers records into one request (librdkafka ``linger.ms``)."""
    delivery_timeout: Duration = 120.0
    """How long a record may wait for the brokers before the bridge gives up and exits
    without acknowledging it (the MQTT broker keeps it for the next run)."""


class BridgeSettings(_Section):
    """``[bridge]`` (see the module's description)."""

    mqtt: BridgeMqtt
    kafka: BridgeKafka
    in_flight: int = Field(20_000, ge=1, le=1_000_000)
    """Most messages taken from MQTT and not yet acknowledged by Kafka."""

    def producer_config(self, password: str | None = None) -> dict[str, Any]:
        """The idempotent producer: ``acks=all``, retries without duplicates or reordering
        within a partition, and the Java client's partitioner for keyed records (the one
        the workers compute, :mod:`limitwatch.ingest.kafka.partitioner`)."""
        out = self.kafka.connection_config(password)
        out.update(
            {
                "client.id": self.mqtt.client_id,
                "enable.idempotence": True,
                "acks": "all",
                "partitioner": "murmur2_random",
                "linger.ms": max(0, int(self.kafka.linger * 1000)),
                "message.timeout.ms": max(1000, int(self.kafka.delivery_timeout * 1000)),
            }
        )
        out.update(self.kafka.client_options)
        return out

    def secret_refs(self) -> list[SecretRef]:
        return self.mqtt.secret_refs("bridge.mqtt") + self.kafka.kafka_secret_refs(
            "bridge.kafka", "Kafka password for the bridge"
        )

    def files_needed(self) -> list[tuple[str, Path]]:
        return self.mqtt.files_needed("bridge.mqtt") + self.kafka.kafka_files_needed(
            "bridge.kafka"
        )

    def advice(self) -> list[Problem]:
        return self.mqtt.advice("bridge.mqtt") + self.kafka.kafka_advice("bridge.kafka")

    def describe(self) -> str:
        filters = ", ".join(t.filter for t in self.mqtt.topics)
        return (
            f"bridge: MQTT {self.mqtt.host}:{self.mqtt.port} as {self.mqtt.client_id!r}, "
            f"topics {filters} -> Kafka topic {self.kafka.topic!r} on "
            f"{self.kafka.bootstrap_servers}"
        )
