"""``[[sources]]`` with ``type = "kafka"``: a consumer-group member reading readings that the
bridge (``limitwatch bridge``) put on a Kafka topic, keyed by stream id.

The payload is the MQTT message's own bytes and the bridge puts the MQTT topic in a header,
so the same ``[[sources.topics]]`` entries as an MQTT source map topic to stream and parse the
payload.

>>> source = KafkaSourceConfig.model_validate({
...     "type": "kafka", "name": "readings", "bootstrap_servers": "127.0.0.1:9092",
...     "topic": "plant-readings", "group_id": "limitwatch",
...     "topics": [{"filter": "plant/+/+", "stream": "{2}/{3}", "payload": "number"}]})
>>> source.client_config("worker-1")["enable.auto.commit"], source.client_config("w")["group.id"]
(False, 'limitwatch')

References
----------
librdkafka, CONFIGURATION.md (the client properties named here); Apache Kafka documentation,
"Consumer Configs" (``session.timeout.ms``, ``max.poll.interval.ms``,
``partition.assignment.strategy``).
"""

from __future__ import annotations

import os
import socket
from pathlib import Path
from typing import Any, Literal

from pydantic import Field, field_validator, model_validator

from limitwatch.config import (
    ConfigPath,
    EnvName,
    PositiveDuration,
    Problem,
    SecretRef,
    SourceSettings,
    _fail,
    _Section,
)
from limitwatch.ingest.mqtt.settings import MqttTopic

__all__ = ["KafkaConnection", "KafkaSourceConfig", "default_member"]

TOPIC_HEADER = "mqtt-topic"
"""Header the bridge puts the MQTT topic in."""
RECEIVED_HEADER = "received-at"
"""Header with the bridge's receipt time, epoch seconds as decimal text."""
SEQUENCE_HEADER = "bridge-seq"
"""Header with the bridge's own count of the messages it forwarded (for tracing a message)."""

_TOPIC_CHARS = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789._-")


def default_member() -> str:
    """This process's name in the group and in the store's ``partitions.owner``: host and
    process id, so a restarted worker is a new owner (its old generation is fenced)."""
    return f"{socket.gethostname()}-{os.getpid()}"


def kafka_topic_problem(value: str) -> str | None:
    """Why ``value`` cannot be a Kafka topic name (the broker's rule: 1-249 characters of
    ASCII letters, digits, ``.``, ``_`` and ``-``, not ``.`` or ``..``)."""
    if not value or len(value) > 249:
        return "a Kafka topic name has 1 to 249 characters"
    if value in {".", ".."}:
        return "'.' and '..' are not Kafka topic names"
    bad = sorted(set(value) - _TOPIC_CHARS)
    if bad:
        return f"a Kafka topic name holds only letters, digits, '.', '_' and '-', not {bad[0]!r}"
    return None


class KafkaConnection(_Section):
    """The broker connection keys shared by the source and the bridge."""

    bootstrap_servers: str = Field(min_length=1)
    """``host:port[,host:port...]`` of one or more brokers."""
    topic: str
    security_protocol: Literal["plaintext", "ssl", "sasl_plaintext", "sasl_ssl"] = "plaintext"
    sasl_mechanism: Literal["PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512"] | None = None
    username: str | None = None
    password_env: EnvName | None = None
    password_file: ConfigPath | None = None
    ca_file: ConfigPath | None = None
    client_options: dict[str, str | int | float | bool] = Field(default_factory=dict)
    """Further librdkafka properties, passed through as given (after ours, so they win)."""

    @field_validator("topic")
    @classmethod
    def _topic(cls, value: str) -> str:
        problem = kafka_topic_problem(value)
        if problem is not None:
            raise ValueError(problem)
        return value

    @model_validator(mode="after")
    def _security(self) -> KafkaConnection:
        problems: list[tuple[tuple[str | int, ...], str]] = []
        sasl = self.security_protocol.startswith("sasl")
        if self.password_env is not None and self.password_file is not None:
            problems.append((("password_file",), "give password_env or password_file, not both"))
        if sasl and (self.sasl_mechanism is None or self.username is None):
            problems.append(
                (("sasl_mechanism",), f"{self.security_protocol} needs sasl_mechanism and username")
            )
        if not sasl and self.username is not None:
            problems.append(
                (("username",), "a user name is sent only with security_protocol sasl_*")
            )
        if problems:
            raise _fail(*problems)
        return self

    def connection_config(self, password: str | None) -> dict[str, Any]:
        """librdkafka properties for the connection (``password`` read from the secret)."""
        out: dict[str, Any] = {
            "bootstrap.servers": self.bootstrap_servers,
            "security.protocol": self.security_protocol,
        }
        if self.sasl_mechanism is not None:
            out["sasl.mechanism"] = self.sasl_mechanism
        if self.username is not None:
            out["sasl.username"] = self.username
        if password is not None:
            out["sasl.password"] = password
        if self.ca_file is not None:
            out["ssl.ca.location"] = str(self.ca_file)
        return out

    def kafka_secret_refs(self, where: str, what: str) -> list[SecretRef]:
        return SecretRef.either(where, "password", self.password_env, self.password_file, what)

    def kafka_files_needed(self, where: str) -> list[tuple[str, Path]]:
        return [] if self.ca_file is None else [(f"{where}.ca_file", self.ca_file)]

    def kafka_advice(self, where: str) -> list[Problem]:
        has_password = self.password_env is not None or self.password_file is not None
        if has_password and self.security_protocol == "sasl_plaintext":
            return [
                Problem(
                    f"{where}.security_protocol",
                    "the Kafka password would travel unencrypted; use sasl_ssl",
                )
            ]
        return []


class KafkaSourceConfig(SourceSettings, KafkaConnection):
    """``type = "kafka"``: one consumer-group member (see the module's description)."""

    type: Literal["kafka"]
    group_id: str = Field(min_length=1)
    member: str | None = None
    """This worker's name as partition owner; default host name and process id."""
    session_timeout: PositiveDuration = 10.0
    """How long the group waits for a silent member before giving its partitions away."""
    max_poll_interval: PositiveDuration = 300.0
    """How long a member may go without asking for messages before it is put out of the
    group (a stalled worker); its late batch is then refused by the store's fence."""
    settle: PositiveDuration = 30.0
    """After a partition is assigned, stale checks of its streams wait this long and until
    the worker has caught up, so a rebalance pause opens no false ``stale`` incident; the
    reminders, escalations and announcements of their incidents wait the same."""
    max_payload_bytes: int = Field(65536, ge=1, le=268_435_455)
    topics: list[MqttTopic] = Field(min_length=1)
    """MQTT topic (from the bridge's header, else the message key) -> stream and payload."""

    @model_validator(mode="after")
    def _intervals(self) -> KafkaSourceConfig:
        if self.max_poll_interval < self.session_timeout:
            raise _fail(
                (
                    ("max_poll_interval",),
                    f"must be at least session_timeout ({self.session_timeout:g} s)",
                )
            )
        return self

    def client_config(self, member: str, password: str | None = None) -> dict[str, Any]:
        """The consumer's librdkafka properties. No auto-commit and no offset store: the
        store holds each partition's next offset; Kafka's own commits only feed lag views.
        Eager ``range`` assignment: a rebalance revokes everything, then assigns, so a
        partition is never processed by two members' batches at once on purpose."""
        out = self.connection_config(password)
        out.update(
            {
                "group.id": self.group_id,
                "client.id": member,
                "enable.auto.commit": False,
                "enable.auto.offset.store": False,
                "auto.offset.reset": "earliest",
                "partition.assignment.strategy": "range",
                "session.timeout.ms": int(self.session_timeout * 1000),
                "max.poll.interval.ms": int(self.max_poll_interval * 1000),
            }
        )
        out.update(self.client_options)
        return out

    def secret_refs(self, where: str) -> list[SecretRef]:
        return self.kafka_secret_refs(where, f"Kafka password for source {self.name!r}")

    def files_needed(self, where: str) -> list[tuple[str, Path]]:
        return self.kafka_files_needed(where)

    def advice(self, where: str) -> list[Problem]:
        return self.kafka_advice(where)

    def describe(self) -> str:
        return (
            f"{self.name} (kafka {self.security_protocol}): topic {self.topic!r} on "
            f"{self.bootstrap_servers}, group {self.group_id!r}"
        )
