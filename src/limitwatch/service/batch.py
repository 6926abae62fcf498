"""One batch of deliveries: parse, commit in one transaction, and only then acknowledge.

Why acknowledgements wait: nothing is acknowledged to a broker and no file offset moves before
the state it produced is committed; with a reorder window, a held reading holds back the
acknowledgement of every later delivery of its source until it is committed too.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from limitwatch.ingest.base import Source
from limitwatch.pipeline import BatchResult, Parsed, PipelineBroken, failure_words
from limitwatch.store import Fenced
from limitwatch.streamcap import REASON as TOO_MANY_STREAMS

if TYPE_CHECKING:
    from limitwatch.service.worker import Service

log = logging.getLogger("limitwatch.service")


def parse(service: Service, source: Source, item: Any, received_at: float) -> list[Parsed]:
    """``item`` parsed by its source (none, one, or several readings and refusals), with
    the worker's own refusals: a new stream past the source's ``max_streams``, and a
    parser's bug (a dead letter, never a stop)."""
    try:
        parsed = source.parse(item, received_at)
    except Exception as exc:  # a parser bug must not stop the service: a dead letter
        log.exception("source %s: an item could not be parsed", source.name)
        return [source.refused(item, "parse-error", failure_words(exc))]
    if parsed is None:
        return []
    found = [parsed] if isinstance(parsed, Parsed) else list(parsed)
    for i, part in enumerate(found):
        if part.reading is None:
            continue
        refused = service._refuse_new_stream(source.name, part.reading.stream)
        if refused is not None:
            found[i] = source.refused(item, TOO_MANY_STREAMS, refused)
    return found


def parse_pushed(service: Service, item: Any) -> list[Parsed]:
    # The source stamped the wall clock where the item arrived; a step back since must
    # not make a reading timed at receipt older than the one before it.
    received = service.timekeeper.receipt(item.received_at)
    return service._parse(service.sources[item.source], item, received)


def refuse_new_stream(service: Service, source: str, stream: str) -> str | None:
    """Why a reading for ``stream`` is refused (its source already feeds ``max_streams``
    streams and this one would be new), or None when it may go on."""
    assert service.pipeline is not None
    cap = service.stream_cap
    if cap.admit(source, stream, exists=stream in service.pipeline.monitors):
        return None
    service.metrics.streams_refused.labels(source).inc()
    return f"stream {stream[:200]!r} would be more than max_streams = {cap.limits[source]}"


def holding(service: Service) -> bool:
    return any(len(buffer) for buffer in service._reorder.values())


def process_deliveries(service: Service, batch: list[Any], *, flush: bool = False) -> None:
    if not service._reorder:
        items = [p for d in batch for p in service._parse_pushed(d)]
        service._commit(items)
        by_source: dict[str, list[Any]] = {}
        for d in batch:  # arrival order, only after the commit
            by_source.setdefault(d.source, []).append(d)
        for source, deliveries in by_source.items():
            service.sources[source].acknowledge(deliveries)
        return
    service._process_reordered(batch, flush)


def process_reordered(service: Service, batch: list[Any], flush: bool) -> None:
    """As :meth:`_process_deliveries`, with the readings of sources that have a reorder
    window held back until their time is up (see :mod:`limitwatch.ingest.reorder`)."""
    now = service.clock()
    items: list[Parsed] = []
    direct: dict[str, list[Any]] = {}
    committed: list[list[Any]] = []
    for d in batch:
        parts = service._parse_pushed(d)
        buffer = service._reorder.get(d.source)
        if buffer is None:
            items.extend(parts)
            direct.setdefault(d.source, []).append(d)
            continue
        entry = [d, 0]  # the delivery, and how many of its readings are held
        service._unacked[d.source].append(entry)
        for parsed in parts:
            if parsed.reading is None:  # a dead letter has no place in the order
                items.append(parsed)
            else:
                entry[1] += 1
                buffer.hold(parsed.reading, (parsed, entry), d.received_at)
    for buffer in service._reorder.values():
        if len(buffer):
            for _, (parsed, entry) in buffer.release(now, everything=flush):
                items.append(parsed)
                committed.append(entry)
    if items:
        service._commit(items)
    for entry in committed:  # only after the commit
        entry[1] -= 1
    for source, deliveries in direct.items():
        service.sources[source].acknowledge(deliveries)
    for source, waiting in service._unacked.items():
        ready = []
        while waiting and waiting[0][1] == 0:
            ready.append(waiting.popleft()[0])
        if ready:
            service.sources[source].acknowledge(ready)


def commit(
    service: Service, items: list[Parsed], offsets: dict[str, dict[str, int]] | None = None
) -> BatchResult:
    assert service.pipeline is not None
    started = time.perf_counter()
    now = service.clock()
    result = _commit_owned(service, items, now, offsets)
    service.last_commit = now
    service._heartbeat = time.monotonic()
    m = service.metrics
    m.batch_seconds.observe(time.perf_counter() - started)
    m.batch_size.observe(len(items))
    m.readings.labels("accepted").inc(len(result.outcomes))
    for source, reason in result.dead:
        m.dead_letters.labels(reason).inc()
        service.refusals.note(source, reason, now)
    for s in result.signals:
        m.signals.labels(s.rule).inc()
    m.alerts_opened.inc(result.opened)
    service._count_floods(result.flood_started, result.flood_ended)
    m.streams.set(len(service.pipeline.monitors))
    if result.queued and service.outbox is not None:
        service.outbox.wake()
    return result


FENCED_RETRIES = 16
"""Most times one batch is committed again without the items of partitions taken over."""


def _commit_owned(
    service: Service, items: list[Parsed], now: float, offsets: dict[str, dict[str, int]] | None
) -> BatchResult:
    """Commit ``items`` with each source's :meth:`~limitwatch.ingest.base.Source.within` work
    in the transaction. A batch refused by a fence (a partition another worker took over)
    rolled back whole; the source gives that partition up, and the rest is committed again."""
    assert service.pipeline is not None and service.store is not None
    store = service.store
    sources = service.sources

    def within(parsed: Sequence[Parsed]) -> None:
        by_source: dict[str, list[Parsed]] = {}
        for p in parsed:
            by_source.setdefault(p.source, []).append(p)
        for name, mine in by_source.items():
            source = sources.get(name)
            if source is not None:
                source.within(store, mine)

    for _ in range(FENCED_RETRIES):
        try:
            return service.pipeline.process(items, now, file_offsets=offsets, within=within)
        except Fenced as exc:
            log.warning("a batch of %d items was rolled back: %s", len(items), exc)
            for source in sources.values():
                source.fenced(exc)
            items = [p for p in items if (s := sources.get(p.source)) is None or s.owns(p)]
    raise PipelineBroken(f"a batch was refused by the store's fence {FENCED_RETRIES} times")


def poll_source(service: Service, name: str) -> int:
    """Read everything new from a polled source, committing in batches of ``batch_max``
    with the positions it reached; return the number of items used."""
    source = service.sources[name]
    items: list[Any] = []
    batch: list[Parsed] = []
    used = 0
    for item in source.poll():
        if service._stopping.is_set():
            break
        items.append(item)
        batch.extend(service._parse(source, item, service.clock()))
        if len(batch) >= service.config.service.batch_max:
            used += len(batch)
            service._commit(batch, {name: source.positions(items)})
            source.acknowledge(items)
            items, batch = [], []
    positions = source.positions(items)
    if batch or positions:
        used += len(batch)
        service._commit(batch, {name: positions})
        source.acknowledge(items)
    return used
