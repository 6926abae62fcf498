"""Evaluate a batch of readings and commit everything it caused in one transaction.

The pipeline is the only writer of stream state. For a batch it runs each reading through its
stream's :class:`~limitwatch.engine.StreamMonitor`, then in ONE SQLite transaction stores the
accepted readings, the refused ones as dead letters, any baseline the learning phase fitted, the
alert changes and the notifications they owe (outbox rows), the checkpoints that are due, and the
file offsets of the lines it used. Only after that commit does the caller acknowledge the broker
or move a file offset in memory.

Checkpoints and the readings table together are the stream state. The accepted readings of every
batch are committed with it, in the order the engine saw them, so a monitor's state is always its
last checkpoint plus the readings committed after it. A checkpoint is therefore written when a
stream first appears, when it fits a baseline, at most every ``checkpoint_every`` seconds while
it changes, before old readings are pruned, and for every stream at a clean stop -- not with
every batch: serialising each touched stream's whole state was most of a batch's cost, and most
of what it wrote to disk. After a crash, :meth:`Pipeline.restore` applies the readings committed
after each checkpoint again (the engine is deterministic), so the monitors stand exactly where
the last commit left them.

If the commit fails, the in-memory monitors are ahead of the database; the pipeline then refuses
to go on (:class:`PipelineBroken`) and the service exits, so a restart resumes from the last
commit and the broker redelivers what was never acknowledged.
"""

from __future__ import annotations

import gc
import logging
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

from limitwatch.alerts.lifecycle import AlertBook
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.stats.baseline import Baseline
from limitwatch.store import Store

log = logging.getLogger("limitwatch.pipeline")

CHECKPOINT_EVERY_S = 30.0
"""Longest time a changing stream goes without a new checkpoint. Longer means less work per
batch and less written to disk, but more readings to apply again after a crash (at most this
many seconds' worth)."""


class PipelineBroken(RuntimeError):
    """A commit failed after monitors moved on; only a restart from the checkpoints is safe."""


@dataclass(frozen=True, slots=True)
class Parsed:
    """One intake item after payload parsing: a reading, or the reason it has none."""

    source: str
    raw: bytes
    reading: Reading | None = None
    error: str | None = None
    detail: str = ""


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


class Pipeline:
    """Owns the monitors and the store connection; used from one thread only."""

    def __init__(
        self,
        store: Store,
        settings_for: Callable[[str], MonitorSettings],
        book: AlertBook,
        stored_baseline: Callable[[str], Baseline | None] | None = None,
        checkpoint_every: float = CHECKPOINT_EVERY_S,
    ) -> None:
        self.store = store
        self.book = book
        self._settings_for = settings_for
        self._stored_baseline = stored_baseline or (lambda stream: None)
        self.checkpoint_every = checkpoint_every
        self.monitors: dict[str, StreamMonitor] = {}
        self.broken = False
        self._unsaved: dict[str, float] = {}
        """Streams whose monitor moved past its stored checkpoint, with the time (the batch's
        ``now``) it first did; oldest first, since a dict keeps insertion order."""
        self._new: set[str] = set()
        """Monitors created since the last commit, which have no checkpoint yet."""

    # -- state ---

    def restore(self) -> int:
        """Rebuild every monitor from its committed checkpoint, then apply again the readings
        committed after that checkpoint (see :meth:`_catch_up`); return how many monitors.

        The cyclic garbage collector is paused meanwhile: a restart builds about a dozen
        long-lived objects per stream, none of them in a reference cycle, and the collector
        would otherwise walk all of them again and again while they are being built (about
        half the restore time at 100,000 streams) to free nothing.
        """
        collecting = gc.isenabled()
        gc.disable()
        try:
            for stream, state in self.store.iter_checkpoints():
                monitor = StreamMonitor.restore(state, self._settings_for(stream))
                self.monitors[monitor.stream] = monitor  # one copy of the id, the monitor's
            caught_up = self._catch_up()
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
            for reading in self.store.readings_after(stream, monitor.last_time):
                outcome = monitor.update(reading)
                if not outcome.accepted:  # the config's bounds changed since, say
                    log.warning(
                        "stream %s: a committed reading at %s was refused again (%s)",
                        stream,
                        reading.time,
                        outcome.reason,
                    )
            self._unsaved[stream] = -math.inf  # due at once
            behind += 1
        return behind

    def monitor(self, stream: str) -> StreamMonitor:
        monitor = self.monitors.get(stream)
        if monitor is None:
            baseline = self._stored_baseline(stream)
            monitor = StreamMonitor(stream, self._settings_for(stream), baseline=baseline)
            self.monitors[stream] = monitor
            self._new.add(stream)
        return monitor

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
                    {s: self.monitors[s].snapshot() for s in streams}, now=now
                )
        self._saved(streams)
        return len(streams)

    # -- the batch ---

    def process(
        self,
        items: Iterable[Parsed],
        now: float,
        file_offsets: dict[str, dict[str, int]] | None = None,
    ) -> BatchResult:
        """Evaluate and commit; raise :class:`PipelineBroken` if the commit fails."""
        if self.broken:
            raise PipelineBroken("an earlier commit failed; restart the service")
        result = BatchResult()
        dead_rows: list[tuple[str, bytes, str]] = []
        touched: dict[str, StreamMonitor] = {}
        fitted: list[tuple[StreamMonitor, Outcome]] = []
        due: list[str] = []
        for item in items:
            if item.reading is None:
                reason = item.error or "unreadable"
                dead_rows.append((item.source, item.raw, _reason(reason, item.detail)))
                result.dead.append((item.source, reason))
                continue
            monitor = self.monitor(item.reading.stream)
            outcome = monitor.update(item.reading)
            if not outcome.accepted:
                reason = outcome.reason or "refused"
                detail = f"stream {item.reading.stream!r} at {item.reading.time}"
                dead_rows.append((item.source, item.raw, _reason(reason, detail)))
                result.dead.append((item.source, reason))
                continue
            touched[monitor.stream] = monitor
            result.outcomes.append(outcome)
            result.signals.extend(outcome.signals)
            if outcome.baseline_fitted:
                fitted.append((monitor, outcome))
        try:
            with self.store.transaction():
                self.store.add_readings(result.outcomes, now=now)
                for source, raw, reason in dead_rows:
                    self.store.add_dead_letter(source, raw, reason, now=now)
                for monitor, outcome in fitted:
                    self._record_learned(monitor, outcome, now)
                report = self.book.apply(result.outcomes, now)
                due = self._due(touched, [m.stream for m, _ in fitted], now)
                if due:
                    self.store.save_checkpoints(
                        {s: self.monitors[s].snapshot() for s in due}, now=now
                    )
                for source, offsets in (file_offsets or {}).items():
                    if offsets:
                        self.store.save_file_offsets(source, offsets, now=now)
        except Exception as exc:
            self.broken = True
            raise PipelineBroken(f"batch commit failed: {exc}") from exc
        self._saved(due)
        result.opened = report.opened
        result.queued = report.queued
        result.flood_started, result.flood_ended = report.flood_started, report.flood_ended
        return result

    def _record_learned(self, monitor: StreamMonitor, outcome: Outcome, now: float) -> None:
        baseline = monitor.baseline
        assert baseline is not None and outcome.index is not None
        first = outcome.index - baseline.n + 1
        self.store.add_baseline(
            monitor.stream,
            baseline.to_dict(),
            now=now,
            by="limitwatch",
            reason=f"learned from the stream's readings {first}..{outcome.index}",
            method=baseline.method,
            version=monitor.baseline_version,
            first_index=first,
            last_index=outcome.index,
            last_time=outcome.reading.time,
            excluded=[first + p for p in baseline.excluded],
        )

    # -- jobs the scheduler asks for ---

    def adopt_new_baselines(self, now: float) -> list[str]:
        """Apply baselines stored by someone else (``limitwatch baseline refit``): newer
        versions replace the monitor's, and its run counts restart."""
        changed = []
        for stream, version in self.store.baseline_versions().items():
            monitor = self.monitors.get(stream)
            if monitor is None or version <= monitor.baseline_version:
                continue
            stored = self.store.current_baseline(stream)
            if stored is None:
                continue
            monitor.set_baseline(Baseline.from_dict(stored.numbers), version=stored.version)
            changed.append(stream)
        if changed:
            # At once: a baseline adopted from outside cannot be found again by replaying
            # readings after a crash.
            with self.store.transaction():
                self.store.save_checkpoints(
                    {s: self.monitors[s].snapshot() for s in changed}, now=now
                )
            self._saved(changed)
        return changed

    def stale_signals(
        self, now: float, cadence_for: Callable[[str], tuple[float | None, float]]
    ) -> list[StreamSignal]:
        """A ``stale`` signal for each monitored stream silent for longer than its expected
        cadence times its multiple. ``cadence_for(stream)`` gives (cadence s or None, multiple)."""
        out = []
        for stream, monitor in self.monitors.items():
            cadence, multiple = cadence_for(stream)
            last = monitor.last_time
            if cadence is None or last is None:
                continue
            silent = now - last
            if silent <= cadence * multiple:
                continue
            b = monitor.baseline
            out.append(
                StreamSignal(
                    stream=stream,
                    rule="stale",
                    chart="x",
                    side=None,
                    index=max(monitor.count - 1, 0),
                    time=now,
                    value=monitor.last_value if monitor.last_value is not None else float("nan"),
                    involved=(),
                    center=b.center if b else float("nan"),
                    sigma=b.sigma if b else float("nan"),
                    ucl=b.ucl if b else None,
                    lcl=b.lcl if b else None,
                    mr=None,
                    mr_ucl=b.mr_ucl if b else float("nan"),
                    baseline_version=monitor.baseline_version,
                    statistic=silent,
                    limit=cadence * multiple,
                )
            )
        return out


def _reason(code: str, detail: str) -> str:
    return f"{code}: {detail}" if detail else code
