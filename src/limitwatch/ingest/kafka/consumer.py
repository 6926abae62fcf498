"""The consumer thread of a Kafka source: messages onto the intake, rebalances handed to the
worker, offsets committed to Kafka for lag views.

Why a thread and not a process (the MQTT source has one): librdkafka does its network work
in C threads of its own; what runs in Python here is one call per batch of messages and one
small record per message.

Why rebalances wait for the worker: with eager assignment, a partition given up is revoked
before anyone else is given it. The callback runs on this thread inside ``consume()``; it hands
the work to the worker (:meth:`~limitwatch.ingest.base.StreamKeeper.on_worker`), which first
commits the batch it holds, then checkpoints and drops the partition's streams, and only
then does this thread return to the group coordinator. An assignment likewise takes
ownership in the store and builds the partition's monitors before its first message is read,
from the offset the store holds.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable
from typing import Any, NamedTuple

from confluent_kafka import OFFSET_BEGINNING, Consumer, KafkaError, KafkaException, TopicPartition

from limitwatch.ingest.kafka.settings import RECEIVED_HEADER, TOPIC_HEADER

log = logging.getLogger("limitwatch.kafka")

CONSUME_MAX = 1000
"""Most messages taken from the client in one call."""
OUTSTANDING_MAX = 20_000
"""Most messages on the intake and not yet committed; past it the thread waits, so a long
backlog does not pile up in memory."""


class Record(NamedTuple):
    """One Kafka message as the worker sees it."""

    source: str
    topic: str
    """The MQTT topic (the bridge's header), else the message key."""
    payload: bytes
    received_at: float
    """When this worker took it from Kafka (the worker's batch window counts from here)."""
    partition: int
    offset: int
    sent_at: float
    """The bridge's receipt time (its header), else the message's Kafka timestamp: the time
    of a reading whose payload has none, the same whichever worker applies it."""


def record_of(source: str, message: Any) -> Record:
    """``message`` as a :class:`Record`; a missing or unreadable header falls back."""
    topic = None
    received = None
    for name, value in message.headers() or ():
        if name == TOPIC_HEADER and value is not None:
            topic = value.decode("utf-8", "replace")
        elif name == RECEIVED_HEADER and value is not None:
            try:
                received = float(value)
            except ValueError:
                received = None
    if topic is None:
        key = message.key()
        topic = "" if key is None else key.decode("utf-8", "replace")
    now = time.time()
    if received is None or received != received:  # NaN
        _, stamp = message.timestamp()
        received = stamp / 1000.0 if stamp > 0 else now
    return Record(
        source, topic, message.value() or b"", now, message.partition(), message.offset(), received
    )


class ConsumerThread:
    """One ``confluent_kafka.Consumer`` driven by its own thread."""

    def __init__(
        self,
        source: str,
        topic: str,
        config: dict[str, Any],
        intake: queue.SimpleQueue[Any],
        on_assign: Callable[[list[int], int], dict[int, int | None]],
        on_revoke: Callable[[list[int], bool], None],
    ) -> None:
        self.source = source
        self.topic = topic
        self.config = dict(config)
        self.config.setdefault("error_cb", self._error)
        self.intake = intake
        self._on_assign = on_assign
        self._on_revoke = on_revoke
        self._acks: queue.SimpleQueue[dict[int, int]] = queue.SimpleQueue()
        self._outstanding = 0
        self._count_lock = threading.Condition()
        self._stopping = threading.Event()
        self._thread: threading.Thread | None = None
        self.consumer: Consumer | None = None
        self.assigned: set[int] = set()
        self.connected = threading.Event()
        self.last_error: str | None = None
        self.drained_at = 0.0
        """``time.monotonic()`` when ``consume`` last came back empty (nothing behind)."""

    # -- life

    def start(self) -> None:
        self.consumer = Consumer(self.config)
        self.consumer.subscribe(
            [self.topic], on_assign=self._assign, on_revoke=self._revoke, on_lost=self._lost
        )
        self._thread = threading.Thread(
            target=self._loop, name=f"limitwatch-kafka-{self.source}", daemon=True
        )
        self._thread.start()

    def close(self) -> None:
        """Stop reading, then leave the group (its revoke runs the give-up on the caller,
        the worker having stopped)."""
        self._stopping.set()
        with self._count_lock:
            self._count_lock.notify_all()
        if self._thread is not None:
            self._thread.join(30)
        if self.consumer is not None:
            try:
                self.consumer.close()
            except (KafkaException, RuntimeError) as exc:
                log.warning("source %s: leaving the group failed: %s", self.source, exc)
            self.consumer = None

    # -- from the worker

    def committed(self, offsets: dict[int, int], count: int) -> None:
        """``count`` messages are done; ``offsets`` (partition -> next offset) may be told to
        Kafka, for lag views only."""
        if offsets:
            self._acks.put(offsets)
        with self._count_lock:
            self._outstanding -= count
            self._count_lock.notify_all()

    # -- the thread

    def _loop(self) -> None:
        consumer = self.consumer
        assert consumer is not None
        while not self._stopping.is_set():
            self._commit_acks(consumer)
            with self._count_lock:
                while self._outstanding >= OUTSTANDING_MAX and not self._stopping.is_set():
                    self._count_lock.wait(0.5)
            try:
                messages = consumer.consume(CONSUME_MAX, 0.2)
            except (KafkaException, RuntimeError) as exc:
                self.last_error = str(exc)
                log.warning("source %s: consume failed: %s", self.source, exc)
                time.sleep(0.5)
                continue
            if not messages:
                self.drained_at = time.monotonic()
                continue
            records = []
            for message in messages:
                error = message.error()
                if error is not None:
                    if error.code() != KafkaError._PARTITION_EOF:
                        self.last_error = str(error)
                        log.warning("source %s: %s", self.source, error)
                    continue
                records.append(record_of(self.source, message))
            if not records:
                continue
            self.connected.set()
            with self._count_lock:
                self._outstanding += len(records)
            for record in records:
                self.intake.put(record)
        self._commit_acks(consumer)

    def _commit_acks(self, consumer: Consumer) -> None:
        merged: dict[int, int] = {}
        while True:
            try:
                offsets = self._acks.get_nowait()
            except queue.Empty:
                break
            for partition, offset in offsets.items():
                merged[partition] = max(offset, merged.get(partition, 0))
        mine = [TopicPartition(self.topic, p, o) for p, o in merged.items() if p in self.assigned]
        if not mine:
            return
        try:
            consumer.commit(offsets=mine, asynchronous=True)
        except (KafkaException, RuntimeError) as exc:  # lag views only: never a stop
            log.debug("source %s: offset commit for lag failed: %s", self.source, exc)

    def _partition_count(self, consumer: Consumer) -> int:
        metadata = consumer.list_topics(self.topic, timeout=10)
        topic = metadata.topics.get(self.topic)
        if topic is None or topic.error is not None or not topic.partitions:
            raise RuntimeError(f"topic {self.topic!r} has no partitions the broker will name")
        return len(topic.partitions)

    def _assign(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        log.info(
            "source %s: the group assigns partitions %s; taking them in the store",
            self.source,
            sorted(tp.partition for tp in partitions),
        )
        try:
            count = self._partition_count(consumer)
            starts = self._on_assign([tp.partition for tp in partitions], count)
        except Exception as exc:
            # Consuming without ownership would be refused by the fence anyway; leave the
            # group so the partitions go to a member that can take them.
            self.last_error = f"taking partitions failed: {exc}"
            log.exception("source %s: taking partitions failed; leaving them", self.source)
            consumer.assign([])
            return
        for tp in partitions:
            start = starts.get(tp.partition)
            tp.offset = OFFSET_BEGINNING if start is None else start
        consumer.assign(partitions)
        self.assigned = {tp.partition for tp in partitions}
        self.connected.set()
        log.info(
            "source %s: assigned partitions %s of %s",
            self.source,
            sorted(self.assigned),
            self.topic,
        )

    def _revoke(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        self._give_up(consumer, partitions, lost=False)

    def _lost(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        self._give_up(consumer, partitions, lost=True)

    def _give_up(self, consumer: Consumer, partitions: list[TopicPartition], lost: bool) -> None:
        gone = [tp.partition for tp in partitions]
        self.assigned -= set(gone)
        try:
            self._on_revoke(gone, lost)
        except Exception:
            log.exception("source %s: giving up partitions %s failed", self.source, gone)
        log.info(
            "source %s: %s partitions %s", self.source, "lost" if lost else "gave up", gone
        )

    def _error(self, error: KafkaError) -> None:
        self.last_error = str(error)
        if error.code() in (KafkaError._ALL_BROKERS_DOWN, KafkaError._TRANSPORT):
            self.connected.clear()
        log.warning("source %s: %s", self.source, error)
