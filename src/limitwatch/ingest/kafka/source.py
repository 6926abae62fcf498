"""The Kafka source: one member of a consumer group, owning whole partitions and the
monitors of their streams, its batches fenced in the store.

Why the store, not Kafka, holds the offsets: each batch commits its readings, alerts, outbox
rows, checkpoints and its partitions' next offsets in ONE store transaction
(:meth:`KafkaSource.within`), under the fence (partition, owner, generation) of
:mod:`limitwatch.store.partitions`. A worker that stalled past ``max_poll_interval`` and lost
its partitions finds no row to update when it wakes: its batch rolls back, and it drops those
partitions' monitors (:meth:`KafkaSource.fenced`). Kafka's own committed offsets are written
after the store's commit, asynchronously, for lag views only.

Everything here that touches ``_owned`` runs on the worker's thread: parsing, the hooks, and
the rebalance work the consumer thread hands over (:mod:`limitwatch.ingest.kafka.consumer`).
"""

from __future__ import annotations

import logging
import queue
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Self

from limitwatch.ingest.base import Parsed, Source, SourceContext, SourceHealth, StreamKeeper
from limitwatch.ingest.kafka.consumer import ConsumerThread, Record
from limitwatch.ingest.kafka.partitioner import partition_of
from limitwatch.ingest.kafka.settings import KafkaSourceConfig, default_member
from limitwatch.ingest.payload import PayloadError, SourceParser
from limitwatch.secrets import resolve_secret
from limitwatch.store import Fenced

__all__ = ["KafkaSource", "Owned"]

log = logging.getLogger("limitwatch.kafka")


@dataclass
class Owned:
    """A partition this worker owns now."""

    generation: int
    assigned_at: float
    """Service time of the assignment (stale checks wait ``settle`` after it)."""
    assigned_mono: float
    streams: set[str] = field(default_factory=set)
    last_received: float | None = None
    """The bridge's receipt time of the newest record parsed from it."""


def envelope(record: Record) -> bytes:
    """What a dead letter keeps: the MQTT topic and the payload, as for an MQTT source."""
    return record.topic.encode("utf-8", "backslashreplace") + b"\n" + record.payload


class KafkaSource(Source):
    """``type = "kafka"``: see the module's description."""

    Settings = KafkaSourceConfig
    connection = True
    partial = True

    def __init__(
        self,
        settings: KafkaSourceConfig,
        parser: SourceParser,
        member: str,
        client: dict[str, Any],
        keeper: StreamKeeper | None,
    ) -> None:
        super().__init__(settings)
        self.settings: KafkaSourceConfig = settings
        self.parser = parser
        self.member = member
        self.client = client
        self.keeper = keeper
        self.topic = settings.topic
        self.partitions = 0
        """The topic's partition count, as the last assignment found it."""
        self._owned: dict[int, Owned] = {}
        self._where: dict[str, int] = {}
        """Stream -> the partition its readings came from (when seen)."""
        self.consumer: ConsumerThread | None = None
        self.fenced_batches = 0

    @classmethod
    def from_settings(cls, settings: KafkaSourceConfig, context: SourceContext) -> Self:
        password = resolve_secret(
            env=settings.password_env, file=settings.password_file, what=f"sources.{settings.name}"
        )
        member = settings.member or default_member()
        parser = SourceParser(settings, future_tolerance=context.future_tolerance)
        client = settings.client_config(member, password)
        return cls(settings, parser, member, client, context.keeper)

    # -- the consumer thread's side

    def start(self, intake: queue.SimpleQueue[Any]) -> None:
        if self.keeper is None:
            raise RuntimeError("a kafka source runs only inside the service's worker")
        self.consumer = ConsumerThread(
            self.name, self.topic, self.client, intake, self._assign, self._revoke
        )
        self.consumer.start()

    def _assign(self, partitions: list[int], count: int) -> dict[int, int | None]:
        """On the consumer thread: have the worker take the partitions; their start offsets."""
        starts: dict[int, int | None] = {}
        keeper = self.keeper
        assert keeper is not None

        def take() -> None:
            self.partitions = count
            store = keeper.store
            now = keeper.now()
            wanted = set(partitions)
            by_partition: dict[int, set[str]] = {p: set() for p in partitions}
            for row in store.streams():
                p = self._where.get(row.id)
                p = partition_of(row.id, count) if p is None else p
                if p in wanted:
                    by_partition[p].add(row.id)
            for p in partitions:
                taken = store.take_partition(self.topic, p, self.member, now=now)
                keeper.take_on(sorted(by_partition[p]))
                self._owned[p] = Owned(taken.generation, now, time.monotonic(), by_partition[p])
                starts[p] = taken.next_offset
                log.info(
                    "source %s: partition %d taken (generation %d, %d streams, from offset %s)",
                    self.name,
                    p,
                    taken.generation,
                    len(by_partition[p]),
                    "the beginning" if taken.next_offset is None else taken.next_offset,
                )

        # The store may be held by a worker that stalled mid-commit (SQLite's one writer, or a
        # row lock on PostgreSQL): try again until it lets go, within half the poll interval.
        deadline = time.monotonic() + self.settings.max_poll_interval / 2
        while True:
            try:
                keeper.on_worker(take)
                return starts
            except Exception as exc:
                if time.monotonic() > deadline:
                    raise
                log.warning("source %s: taking partitions failed (%s); again", self.name, exc)
                time.sleep(1.0)

    def _revoke(self, partitions: list[int], lost: bool) -> None:
        """On the consumer thread: have the worker checkpoint and drop the partitions' streams
        (after the batch in hand); a lost partition is dropped without writing."""
        keeper = self.keeper
        assert keeper is not None

        def give_up() -> None:
            store = keeper.store
            for p in partitions:
                owned = self._owned.pop(p, None)
                if owned is None:
                    continue
                if lost:
                    keeper.give_up(owned.streams)
                    continue

                def still_ours(p: int = p, owned: Owned = owned) -> None:
                    store.check_partition(self.topic, p, self.member, owned.generation)

                try:
                    keeper.give_up(owned.streams, still_ours)
                except Fenced as exc:
                    log.warning("source %s: %s", self.name, exc)
                    continue
                store.release_partition(self.topic, p, self.member, owned.generation)

        keeper.on_worker(give_up)

    # -- the worker's side

    def parse(self, item: Record, received_at: float) -> Parsed | None:
        owned = self._owned.get(item.partition)
        if owned is None:
            return None  # read before its partition went elsewhere: the new owner applies it
        owned.last_received = item.sent_at
        origin = (item.partition, item.offset)
        try:
            # The bridge's receipt time, not this worker's: any worker that applies the
            # record after a failover must time a payload without a time the same way.
            reading = self.parser.parse(item.topic, item.payload, item.sent_at)
        except PayloadError as exc:
            return Parsed(
                self.name, envelope(item), error=exc.reason, detail=exc.message, origin=origin
            )
        if reading.stream not in owned.streams:
            owned.streams.add(reading.stream)
            self._where[reading.stream] = item.partition
        return Parsed(self.name, envelope(item), reading=reading, origin=origin)

    def refused(self, item: Record, reason: str, detail: str) -> Parsed:
        return Parsed(
            self.name,
            envelope(item),
            error=reason,
            detail=detail,
            origin=(item.partition, item.offset),
        )

    def within(self, store: Any, parsed: Sequence[Parsed]) -> None:
        """Move each partition's next offset past its items, fenced (see the module)."""
        ends: dict[int, int] = {}
        for p in parsed:
            if p.origin is not None:
                partition, offset = p.origin
                ends[partition] = max(offset + 1, ends.get(partition, 0))
        now = self.keeper.now() if self.keeper is not None else time.time()
        for partition, end in ends.items():
            owned = self._owned.get(partition)
            if owned is None:
                raise Fenced(self.topic, partition, self.member, -1)
            store.advance_partition(
                self.topic, partition, self.member, owned.generation, end, now=now
            )

    def fenced(self, error: Exception) -> None:
        if not isinstance(error, Fenced) or error.topic != self.topic:
            return
        self.fenced_batches += 1
        owned = self._owned.pop(error.partition, None)
        log.warning("source %s: %s", self.name, error)
        if owned is not None and self.keeper is not None:
            self.keeper.give_up(owned.streams)

    def owns(self, parsed: Parsed) -> bool:
        return parsed.origin is None or parsed.origin[0] in self._owned

    def stale_allowed(self, stream: str, now: float) -> bool:
        return self._settled(stream, now)

    def looks_after(self, stream: str, now: float) -> bool:
        """The owner of the stream's partition, once settled as for stale checks. Settling
        holds a reminder back by ``settle`` seconds, or until the backlog is read, and never
        loses one (what is due is reckoned from the incident's last notice in the store, and a
        late tick sends one reminder, not a backlog). It buys two things: the backlog the new
        owner is still reading may clear or raise the incident, and a reminder sent first
        would be about what is over; and a former owner that stalled past
        ``max_poll_interval`` (a lost partition, still in its ``_owned`` until its next batch
        is fenced) gets that long to wake and drop it before two workers could both remind."""
        return self._settled(stream, now)

    def _settled(self, stream: str, now: float) -> bool:
        """This worker owns the stream's partition, was given it ``settle`` ago or longer,
        and has caught up on it (the consumer came back empty since, or read a record the
        bridge received within ``settle``)."""
        partition = self._where.get(stream)
        if partition is None and self.partitions:
            partition = partition_of(stream, self.partitions)
        owned = self._owned.get(partition) if partition is not None else None
        if owned is None:
            return False
        settle = self.settings.settle
        if now - owned.assigned_at < settle:
            return False
        drained = self.consumer is not None and self.consumer.drained_at > owned.assigned_mono
        recent = owned.last_received is not None and owned.last_received >= now - settle
        return drained or recent

    def acknowledge(self, items: Sequence[Record]) -> None:
        ends: dict[int, int] = {}
        for r in items:
            if r.partition in self._owned:
                ends[r.partition] = max(r.offset + 1, ends.get(r.partition, 0))
        if self.consumer is not None:
            self.consumer.committed(ends, len(items))

    @property
    def owned(self) -> dict[int, int]:
        """Partition -> generation, of the partitions owned now."""
        return {p: o.generation for p, o in sorted(self._owned.items())}

    def health(self) -> SourceHealth:
        consumer = self.consumer
        if consumer is None:
            return SourceHealth(connected=False, ready=False)
        return SourceHealth(
            connected=consumer.connected.is_set(),
            ready=bool(consumer.assigned),
            last_error=consumer.last_error,
            detail={
                "member": self.member,
                "partitions": sorted(consumer.assigned),
                "fenced_batches": self.fenced_batches,
            },
        )

    def close(self) -> None:
        if self.consumer is not None:
            self.consumer.close()
            self.consumer = None
