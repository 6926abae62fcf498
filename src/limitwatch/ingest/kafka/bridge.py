"""``limitwatch bridge``: MQTT in, Kafka out, and an MQTT acknowledgement only once Kafka
has the record.

Why a bridge and not the workers on MQTT: a Kafka topic keyed by stream id keeps each
stream's readings on one partition, in order, and a consumer group moves partitions between
workers when one joins, leaves or dies. The bridge keeps nothing of its own: it takes
messages through the MQTT source's connection process (QoS 1, persistent session, manual
acknowledgements), maps each topic to its stream id with the same topic templates, produces
with key = stream id, the payload untouched and the topic, receipt time and its own
sequence number in headers, and acknowledges the MQTT messages, in arrival order, once the
idempotent producer's delivery report says the brokers have the record (``acks=all``).

A topic no template maps is forwarded too, keyed by the topic: the workers, which hold the
same templates, make it a dead letter where an operator sees it, instead of it vanishing here.
If Kafka refuses a record for good (a delivery timeout), the bridge exits with status 1
without acknowledging it or anything after it: the MQTT broker keeps them for the persistent
session, and the next run sends them again (the workers refuse a repeat as a duplicate).

Scale bridges by topic subtree (each bridge its own filters and client id), never with
``$share`` subscriptions, which would split a stream's messages between bridges and their
order with them.
"""

from __future__ import annotations

import collections
import logging
import queue
import threading
import time
from typing import Any

from confluent_kafka import KafkaError, Producer

from limitwatch.ingest.kafka.bridge_settings import BridgeSettings
from limitwatch.ingest.kafka.settings import RECEIVED_HEADER, SEQUENCE_HEADER, TOPIC_HEADER
from limitwatch.ingest.mqtt.client import Delivery
from limitwatch.ingest.mqtt.process import MqttProcess
from limitwatch.ingest.mqtt.source import connection_settings
from limitwatch.ingest.payload import SourceParser
from limitwatch.secrets import resolve_secret

__all__ = ["Bridge"]

log = logging.getLogger("limitwatch.bridge")


class _Waiting:
    """One MQTT message on its way: acknowledged once ``done`` and every earlier one is."""

    __slots__ = ("delivery", "done", "failed")

    def __init__(self, delivery: Delivery) -> None:
        self.delivery = delivery
        self.done = False
        self.failed: str | None = None


class Bridge:
    """One bridge process's work; :meth:`run` until :meth:`stop`."""

    def __init__(self, settings: BridgeSettings) -> None:
        self.settings = settings
        mqtt = settings.mqtt
        mqtt_password = resolve_secret(
            env=mqtt.password_env, file=mqtt.password_file, what="bridge.mqtt"
        )
        kafka_password = resolve_secret(
            env=settings.kafka.password_env, file=settings.kafka.password_file, what="bridge.kafka"
        )
        self.connect = connection_settings(
            mqtt, mqtt.subscriptions, mqtt_password, status_topic=mqtt.status_topic
        )
        self.producer_config = settings.producer_config(kafka_password)
        self.parser = SourceParser(mqtt)
        self.topic = settings.kafka.topic
        self.intake: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self.process: MqttProcess | None = None
        self.forwarded = 0
        self.acknowledged = 0
        self.failure: str | None = None
        self._stopping = threading.Event()

    def stream_of(self, topic: str) -> str:
        """The record's key: the stream the topic maps to, or the topic itself."""
        found = self.parser.route(topic)
        return topic if found is None else found[1]

    def stop(self, *_: Any) -> None:
        """Signal-handler safe: finish what was sent, acknowledge, disconnect."""
        self._stopping.set()

    @property
    def subscribed(self) -> bool:
        return self.process is not None and self.process.subscribed.is_set()

    def run(self) -> int:
        """Forward until stopped; return the exit status (1 after a record Kafka refused)."""
        producer = Producer(self.producer_config)
        self.process = MqttProcess(self.connect, self.intake)
        self.process.start()
        waiting: collections.deque[_Waiting] = collections.deque()
        try:
            while not self._stopping.is_set() and self.failure is None:
                self._take(producer, waiting)
                producer.poll(0)
                self._acknowledge(waiting)
            remaining = producer.flush(self.settings.kafka.delivery_timeout)
            self._acknowledge(waiting)
            if remaining:
                log.error("%d records were not confirmed by Kafka; not acknowledged", remaining)
        finally:
            self.process.close()
        if self.failure is not None:
            log.error(
                "stopping: Kafka refused a record (%s); it and everything after it stay "
                "unacknowledged with the MQTT broker for the next run",
                self.failure,
            )
            return 1
        return 0

    def _take(self, producer: Producer, waiting: collections.deque[_Waiting]) -> None:
        if len(waiting) >= self.settings.in_flight:
            producer.poll(0.05)
            return
        try:
            first = self.intake.get(timeout=0.05)
        except queue.Empty:
            return
        batch = [first]
        while len(batch) < 1000:
            try:
                batch.append(self.intake.get_nowait())
            except queue.Empty:
                break
        for item in batch:
            # The MQTT connection puts each pipe message's deliveries on the intake as one list.
            for delivery in item if type(item) is list else (item,):
                if isinstance(delivery, Delivery):
                    self._produce(producer, delivery, waiting)

    def _produce(
        self, producer: Producer, delivery: Delivery, waiting: collections.deque[_Waiting]
    ) -> None:
        entry = _Waiting(delivery)
        waiting.append(entry)
        self.forwarded += 1

        def reported(error: KafkaError | None, _message: Any) -> None:
            if error is None:
                entry.done = True
            else:
                entry.failed = str(error)
                self.failure = self.failure or entry.failed

        headers: list[tuple[str, str | bytes | None]] = [
            (TOPIC_HEADER, delivery.topic.encode("utf-8", "surrogateescape")),
            (RECEIVED_HEADER, repr(delivery.received_at).encode()),
            (SEQUENCE_HEADER, str(self.forwarded).encode()),
        ]
        while True:
            try:
                producer.produce(
                    self.topic,
                    key=self.stream_of(delivery.topic).encode("utf-8", "surrogateescape"),
                    value=delivery.payload,
                    headers=headers,
                    on_delivery=reported,
                )
                return
            except BufferError:  # the producer's queue is full: let it send, then again
                producer.poll(0.1)

    def _acknowledge(self, waiting: collections.deque[_Waiting]) -> None:
        ready: list[Delivery] = []
        while waiting and waiting[0].done:
            ready.append(waiting.popleft().delivery)
        if ready and self.process is not None:
            self.process.ack(ready)
            self.acknowledged += len(ready)


def run_bridge(settings: BridgeSettings) -> int:
    """Run a bridge until SIGTERM/SIGINT; its exit status."""
    import signal

    bridge = Bridge(settings)
    signal.signal(signal.SIGTERM, bridge.stop)
    signal.signal(signal.SIGINT, bridge.stop)
    started = time.monotonic()
    status = bridge.run()
    log.info(
        "bridge stopped after %.0f s: %d messages forwarded, %d acknowledged",
        time.monotonic() - started,
        bridge.forwarded,
        bridge.acknowledged,
    )
    return status
