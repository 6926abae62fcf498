"""The MQTT source as the service runs it: a connection process, a topic router, acks.

Messages come up from the connection process (:mod:`limitwatch.ingest.mqtt.process`) onto the
service's intake as :class:`~limitwatch.ingest.mqtt.client.Delivery` records; the worker parses
them here, by the first ``[[sources.topics]]`` entry whose filter gives the topic a stream
(:class:`~limitwatch.ingest.payload.SourceParser`), and acknowledges them through the same
process, in arrival order, once their batch committed.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Sequence
from typing import Any, Self

from limitwatch.ingest.base import Parsed, Source, SourceContext, SourceHealth
from limitwatch.ingest.mqtt.client import Delivery, MqttSettings
from limitwatch.ingest.mqtt.process import MqttProcess
from limitwatch.ingest.mqtt.settings import MqttSourceConfig
from limitwatch.ingest.payload import PayloadError, SourceParser
from limitwatch.secrets import resolve_secret

__all__ = ["MqttSource", "connection_settings", "envelope"]


def connection_settings(
    source: Any,
    topics: tuple[tuple[str, int], ...],
    password: str | None,
    **status: Any,
) -> MqttSettings:
    """The connection part of a broker source's settings (shared with the sources built on
    MQTT: ``source`` has the keys of :class:`~limitwatch.ingest.mqtt.settings.BrokerSettings`;
    ``status`` gives ``status_topic`` and its payloads)."""
    tls = source.tls

    def path(value: object) -> str | None:
        return None if value is None else str(value)

    return MqttSettings(
        name=source.name,
        host=source.host,
        port=source.port,
        client_id=source.client_id,
        topics=topics,
        protocol=source.protocol,
        keepalive_s=int(source.keepalive_s),
        session_expiry_s=int(source.session_expiry),
        receive_maximum=source.receive_maximum,
        username=source.username,
        password=password,
        tls=tls is not None,
        ca_file=None if tls is None else path(tls.ca_file),
        cert_file=None if tls is None else path(tls.cert_file),
        key_file=None if tls is None else path(tls.key_file),
        reconnect_min_s=source.reconnect_min_s,
        reconnect_max_s=source.reconnect_max_s,
        **status,
    )


def envelope(d: Delivery) -> bytes:
    """What a dead letter keeps of an MQTT message: topic and payload, so it can be replayed."""
    return d.topic.encode("utf-8", "backslashreplace") + b"\n" + d.payload


class MqttSource(Source):
    """``type = "mqtt"``: one broker connection feeding the intake."""

    Settings = MqttSourceConfig
    connection = True

    def __init__(self, settings: MqttSourceConfig, connect: MqttSettings, parser: Any) -> None:
        super().__init__(settings)
        self.connect = connect
        self.parser = parser
        self.reorder_within = settings.reorder_within
        self.process: MqttProcess | None = None
        self._idle = threading.Event()  # stands for "subscribed" until the process starts

    @classmethod
    def from_settings(cls, settings: MqttSourceConfig, context: SourceContext) -> Self:
        password = resolve_secret(
            env=settings.password_env, file=settings.password_file, what=f"sources.{settings.name}"
        )
        connect = connection_settings(
            settings, settings.subscriptions, password, status_topic=settings.status_topic
        )
        parser = SourceParser(settings, future_tolerance=context.future_tolerance)
        return cls(settings, connect, parser)

    @property
    def subscribed(self) -> threading.Event:
        """Set while the broker has granted the subscriptions (tests wait for it)."""
        return self._idle if self.process is None else self.process.subscribed

    def start(self, intake: queue.SimpleQueue[Any]) -> None:
        self.process = MqttProcess(self.connect, intake)
        self.process.start()

    def parse(self, item: Delivery, received_at: float) -> Parsed:
        try:
            reading = self.parser.parse(item.topic, item.payload, received_at)
        except PayloadError as exc:
            return Parsed(self.name, envelope(item), error=exc.reason, detail=exc.message)
        return Parsed(self.name, envelope(item), reading=reading)

    def refused(self, item: Delivery, reason: str, detail: str) -> Parsed:
        return Parsed(self.name, envelope(item), error=reason, detail=detail)

    def acknowledge(self, items: Sequence[Delivery]) -> None:
        if self.process is not None:
            self.process.ack(list(items))

    def health(self) -> SourceHealth:
        process = self.process
        if process is None:
            return SourceHealth(connected=False, ready=False)
        return SourceHealth(
            connected=process.connected.is_set(),
            ready=process.subscribed.is_set(),
            last_error=process.last_error,
            restarts=process.restarts,
        )

    def close(self) -> None:
        if self.process is not None:
            self.process.close()
