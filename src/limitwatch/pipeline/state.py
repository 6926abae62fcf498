"""The pipeline's monitors and what it knows of their checkpoints.

A monitor's committed state is its last checkpoint plus the readings committed after it, so
this is where monitors are made (from the baseline in force), restored at a start, rebuilt
after a failed batch, and where the pipeline tracks which checkpoints are due.
"""

from __future__ import annotations

import gc
import logging
import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field

from limitwatch.alerts.lifecycle import AlertBook
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.ingest.base import Parsed
from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.pipeline.baselines import (
    adopt_stored_baselines,
    baseline_in_force,
    record_unnumbered,
)
from limitwatch.pipeline.failures import PipelineBroken, failure_words, store_failed
from limitwatch.pipeline.refusals import AppliedReadings, dead_reason
from limitwatch.pipeline.signals import offline_signals, stale_signals
from limitwatch.stats.baseline import Baseline
from limitwatch.store import Fenced, Store
from limitwatch.textout import printable

log = logging.getLogger("limitwatch.pipeline")

Within = Callable[[Sequence[Parsed]], None]
"""Work a source does inside each transaction that commits its items (the Kafka source moves
its partitions' offsets there, fenced); it may raise
:class:`~limitwatch.store.errors.Fenced`, which rolls that transaction back."""

CHECKPOINT_EVERY_S = 30.0
"""Longest time a changing stream goes without a new checkpoint. Longer means less work per
batch and less written to disk, but more readings to apply again after a crash (at most this
many seconds' worth)."""


@dataclass
class BatchResult:
    outcomes: list[Outcome] = field(default_factory=list)
    dead: list[tuple[str, str]] = field(default_factory=list)
    """(source, reason) of each dead letter written."""
    signals: list[StreamSignal] = field(default_factory=list)
    opened: int = 0
    queued: int = 0
    flood_started: int = 0
    flood_ended: int = 0
    applied: AppliedReadings = field(init=False, repr=False, compare=False)
    """The outcomes' readings as a lookup, for naming a reading refused for its order."""

    def __post_init__(self) -> None:
        self.applied = AppliedReadings(self.outcomes)


class PipelineState:
    """Owns the monitors and the store connection; used from one thread only."""

    def __init__(
        self,
        store: Store,
        settings_for: Callable[[str], MonitorSettings],
        book: AlertBook,
        typed_baseline: Callable[[str], Baseline | None] | None = None,
        checkpoint_every: float = CHECKPOINT_EVERY_S,
    ) -> None:
        self.store = store
        self.book = book
        self._settings_for = settings_for
        self._typed_baseline = typed_baseline or (lambda stream: None)
        self.checkpoint_every = checkpoint_every
        self.monitors: dict[str, StreamMonitor] = {}
        self.broken = False
        self._unsaved: dict[str, float] = {}
        """Streams whose monitor moved past its stored checkpoint, with the time (the batch's
        ``now``) it first did; oldest first, since a dict keeps insertion order."""
        self._new: set[str] = set()
        """Monitors created since the last commit, which have no checkpoint yet."""
        self._unusable_streams: set[str] = set()
        """Streams whose monitor could not be made, already reported in the log."""
        self.restore_on_demand = False
        """True when this worker holds only some streams' monitors (a Kafka worker owns its
        partitions' streams): a stream without a monitor is then rebuilt from its checkpoint
        and the readings after it before its first reading here, instead of starting afresh."""

    def restore(self) -> int:
        """Rebuild every monitor from its committed checkpoint, then apply again the readings
        committed after that checkpoint (see :meth:`_catch_up`); return how many monitors.

        The cyclic garbage collector is paused meanwhile: a restart builds about a dozen
        long-lived objects per stream, none of them in a reference cycle, and the collector
        would otherwise walk all of them again and again while they are being built (about
        half the restore time at 100,000 streams) to free nothing. That includes the check of
        the baselines in force, whose query returns a row per stream: those rows alone set off
        a full collection over every monitor (0.2 s of CPU at 100,000 streams).
        """
        collecting = gc.isenabled()
        gc.disable()
        try:
            for stream, state in self.store.iter_checkpoints():
                try:
                    monitor = StreamMonitor.from_state(state, self._settings_for(stream))
                except Exception as exc:
                    if store_failed(exc):
                        raise
                    # e.g. a baseline this version refuses (a subnormal sigma): one stream's
                    # checkpoint must not keep the service from starting
                    log.error(
                        "stream %s: its checkpoint cannot be restored (%s); it starts afresh",
                        stream,
                        failure_words(exc),
                    )
                    continue
                self.monitors[monitor.stream] = monitor  # one copy of the id, the monitor's
            caught_up = self._catch_up()
            record_unnumbered(self.store, self.monitors.values(), self._typed_baseline)
        finally:
            if collecting:
                gc.enable()
        if caught_up:
            log.info(
                "applied the readings committed after the checkpoints of %d streams", caught_up
            )
        return len(self.monitors)

    def _catch_up(self) -> int:
        """Apply again the readings committed after each stream's checkpoint (there are some
        only when the service stopped without its final checkpoints, e.g. killed); return how
        many streams needed it. Their checkpoints are written with the next batch."""
        behind = 0
        for stream, last_time in self.store.stream_last_times().items():
            monitor = self.monitors.get(stream)
            if monitor is None or last_time is None:
                continue
            if monitor.last_time is not None and last_time <= monitor.last_time:
                continue
            try:
                for reading in self.store.readings_after(stream, monitor.last_time):
                    outcome = monitor.update(reading)
                    if not outcome.accepted:  # the config's bounds changed since, say
                        log.warning(
                            "stream %s: a committed reading at %s was refused again (%s)",
                            printable(stream),
                            reading.time,
                            outcome.reason,
                        )
            except Exception as exc:  # a checkpoint's state that cannot go on (edited by hand)
                if store_failed(exc):
                    raise
                log.error(
                    "stream %s: the readings after its checkpoint cannot be applied (%s); "
                    "it starts afresh",
                    printable(stream),
                    failure_words(exc),
                )
                del self.monitors[stream]
                continue
            self._unsaved[stream] = -math.inf  # due at once
            behind += 1
        return behind

    def monitor(self, stream: str, now: float = 0.0) -> StreamMonitor:
        monitor = self.monitors.get(stream)
        if monitor is None and self.restore_on_demand:
            self._rebuild(stream)
            monitor = self.monitors.get(stream)
        if monitor is None:
            found = self.baseline_in_force(stream, now)
            baseline, version = (None, 1) if found is None else found
            monitor = StreamMonitor(
                stream, self._settings_for(stream), baseline=baseline, baseline_version=version
            )
            self.monitors[stream] = monitor
            self._new.add(stream)
        return monitor

    def baseline_in_force(self, stream: str, now: float) -> tuple[Baseline, int] | None:
        """The baseline a new monitor of ``stream`` starts from, with its store version (see
        :func:`limitwatch.pipeline.baselines.baseline_in_force`)."""
        return baseline_in_force(self.store, self._typed_baseline, stream, now)

    def _due(self, touched: dict[str, StreamMonitor], fitted: list[str], now: float) -> list[str]:
        """Streams whose checkpoint this batch writes: new ones and fresh fits at once, the
        others once their oldest unsaved change is ``checkpoint_every`` seconds old."""
        unsaved = self._unsaved
        for stream in touched:
            unsaved.setdefault(stream, now)
        due = [s for s in touched if s in self._new]
        due += fitted
        cutoff = now - self.checkpoint_every
        for stream, since in unsaved.items():
            if since > cutoff:
                break
            due.append(stream)
        return list(dict.fromkeys(due))

    def _saved(self, streams: Iterable[str]) -> None:
        for stream in streams:
            self._unsaved.pop(stream, None)
            self._new.discard(stream)

    def checkpoint_all(self, now: float) -> int:
        """Write the checkpoint of every stream that changed since its last one (at a clean
        stop, and before old readings are pruned); return how many."""
        if self.broken:
            raise PipelineBroken("an earlier commit failed; restart the service")
        streams = [s for s in self._unsaved if s in self.monitors]
        if streams:
            with self.store.transaction():
                self.store.save_checkpoints(
                    {s: self.monitors[s].state() for s in streams}, now=now
                )
        self._saved(streams)
        return len(streams)

    def _unusable(self, stream: str, reading: Reading, exc: Exception) -> str:
        """A stream whose monitor cannot be made (a stored baseline this version refuses, say):
        said once in the log, and in every one of its dead letters."""
        if stream not in self._unusable_streams:
            self._unusable_streams.add(stream)
            log.error("stream %s: no monitor can be made for it: %s", stream, failure_words(exc))
        return f"stream {stream!r} at {reading.time}: {failure_words(exc)}"

    def _dead_alone(
        self,
        item: Parsed,
        reason: str,
        detail: str,
        now: float,
        result: BatchResult,
        fence: Callable[[], None] | None = None,
    ) -> None:
        def write() -> None:
            self.store.add_dead_letter(item.source, item.raw, dead_reason(reason, detail), now=now)
            self._save_position(item, now)
            if fence is not None:
                fence()

        self._commit_or_break(write)
        result.dead.append((item.source, reason))

    def _save_position(self, item: Parsed, now: float) -> None:
        if item.position is not None:
            file_id, offset = item.position
            self.store.save_file_offsets(item.source, {file_id: offset}, now=now)

    def _commit_or_break(self, write: Callable[[], object]) -> None:
        """One transaction; if even this fails, the store cannot keep what it must."""
        try:
            with self.store.transaction():
                write()
        except Fenced:
            raise
        except Exception as exc:
            self.broken = True
            raise PipelineBroken(f"commit failed: {failure_words(exc)}") from exc

    def _rebuild(self, stream: str) -> None:
        """Make the stream's monitor what the store says it is: its checkpoint plus the readings
        committed after it (as :meth:`restore` does), or nothing for a stream never committed."""
        self.monitors.pop(stream, None)
        try:
            state = self.store.load_checkpoint(stream)
            if state is not None:
                monitor = StreamMonitor.from_state(state, self._settings_for(stream))
                for reading in self.store.readings_after(stream, monitor.last_time):
                    monitor.update(reading)
                self.monitors[stream] = monitor
                return
        except Exception as exc:
            if store_failed(exc):
                self.broken = True
                raise PipelineBroken(f"reading stream {stream!r} back failed: {exc}") from exc
            log.error(
                "stream %s: its checkpoint cannot be restored (%s); it starts afresh",
                stream,
                failure_words(exc),
            )
        self._new.discard(stream)
        self._unsaved.pop(stream, None)

    # -- jobs the scheduler asks for ---

    def adopt_new_baselines(self, now: float) -> list[str]:
        """Apply baselines stored by someone else (``limitwatch baseline refit``): newer
        versions replace the monitor's, and its run counts restart."""
        changed = adopt_stored_baselines(self.store, self.monitors)
        if changed:
            # At once: a baseline adopted from outside cannot be found again by replaying
            # readings after a crash.
            with self.store.transaction():
                self.store.save_checkpoints(
                    {s: self.monitors[s].state() for s in changed}, now=now
                )
            self._saved(changed)
        return changed

    def stale_signals(
        self, now: float, cadence_for: Callable[[str], tuple[float | None, float]]
    ) -> list[StreamSignal]:
        """A ``stale`` signal for each monitored stream silent for longer than its expected
        cadence times its multiple (see :func:`limitwatch.pipeline.signals.stale_signals`)."""
        return stale_signals(self.monitors, now, cadence_for)

    def offline_signals(self, causes: dict[str, str], now: float) -> list[StreamSignal]:
        """A ``stale`` signal at once for each stream whose sender said it went offline (see
        :func:`limitwatch.pipeline.signals.offline_signals`)."""
        return offline_signals(self.monitors, causes, now)
