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

One bad reading must never stop monitoring, and with at-least-once delivery a reading that
stops the service comes back after every restart. So no reading's failure leaves
:meth:`Pipeline.process` as an exception. If the engine raises for a reading, or the batch's
commit fails for a reason that is not the store's own (the database refuses one row, say), the
batch is rolled back, the monitors it touched are rebuilt from the store (checkpoint plus the
readings committed after it, as a restart does), and its items are applied again one
transaction each; the one that fails again becomes a dead letter (``engine-error`` or
``store-refused``) and the rest are kept. The monitors therefore always equal what is
committed, and the caller acknowledges only after :meth:`Pipeline.process` returns, in
arrival order, as before.

A failure of the store itself (an I/O error, a full disk, a locked or damaged database: any
``sqlite3.OperationalError`` or ``DatabaseError`` other than a refused row) leaves the monitors
ahead of the database; the pipeline then refuses to go on (:class:`PipelineBroken`) and the
service exits, so a restart resumes from the last commit and the broker redelivers what was
never acknowledged.
"""

from __future__ import annotations

import gc
import logging
import math
import sqlite3
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, fields

from limitwatch.alerts.lifecycle import AlertBook, BookReport
from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.ingest.base import Parsed
from limitwatch.ingest.timeparse import format_time
from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.stats.baseline import Baseline, BaselineError
from limitwatch.store import CONFIG_AUTHOR, Store, same_numbers
from limitwatch.textout import printable

log = logging.getLogger("limitwatch.pipeline")

CHECKPOINT_EVERY_S = 30.0
"""Longest time a changing stream goes without a new checkpoint. Longer means less work per
batch and less written to disk, but more readings to apply again after a crash (at most this
many seconds' worth)."""


class PipelineBroken(RuntimeError):
    """A commit failed after monitors moved on; only a restart from the checkpoints is safe."""


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
                try:
                    monitor = StreamMonitor.restore(state, self._settings_for(stream))
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
        finally:
            if collecting:
                gc.enable()
        self._record_unnumbered()
        if caught_up:
            log.info(
                "applied the readings committed after the checkpoints of %d streams", caught_up
            )
        return len(self.monitors)

    def _record_unnumbered(self) -> None:
        """Record the baselines in force that the store has never numbered.

        Databases written before the store numbered every version hold monitors whose typed-in
        baseline (version 1) has no row, so an operator's refit was numbered 1 too and never
        adopted. Recording the monitor's version makes the next refit come out above it.
        """
        versions = self.store.baseline_versions()
        missing = [
            m
            for m in self.monitors.values()
            if m.baseline is not None and versions.get(m.stream, 0) < m.baseline_version
        ]
        if not missing:
            return
        with self.store.transaction():
            for m in missing:
                assert m.baseline is not None
                typed = self._typed_baseline(m.stream) is not None
                self.store.add_baseline(
                    m.stream,
                    m.baseline.to_dict(),
                    now=0.0 if m.last_time is None else m.last_time,
                    by=CONFIG_AUTHOR if typed else "limitwatch",
                    reason="in force at a restart but never recorded",
                    method=m.baseline.method,
                    version=m.baseline_version,
                )
        log.info("recorded %d baselines in force that the store had not numbered", len(missing))

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
        """The baseline a new monitor of ``stream`` starts from, with its store version.

        The store is the only numberer of baseline versions. A baseline typed into the config
        is recorded as a version the first time it is used, and again whenever the config's
        numbers change; otherwise the newest stored version (an operator's refit included)
        is in force. So a refit always gets a number above the one the monitor holds, and
        the refits job adopts it.
        """
        typed = self._typed_baseline(stream)
        if typed is not None:
            numbers = typed.to_dict()
            recorded = self.store.latest_baseline_by(stream, CONFIG_AUTHOR)
            if recorded is None or not same_numbers(recorded.numbers, numbers):
                stored = self.store.add_baseline(
                    stream,
                    numbers,
                    now=now,
                    by=CONFIG_AUTHOR,
                    reason="typed into the config",
                    method=typed.method,
                )
                log.info("stream %s: the config's baseline is version %d", stream, stored.version)
                return typed, stored.version
        current = self.store.current_baseline(stream)
        if current is None:
            return None
        return Baseline.from_dict(current.numbers), current.version

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
        """Evaluate and commit; raise :class:`PipelineBroken` only if the store itself fails.

        Any other failure (the engine raising for a reading, the database refusing a row)
        makes that one item a dead letter; see the module's description."""
        if self.broken:
            raise PipelineBroken("an earlier commit failed; restart the service")
        items = list(items)
        seen: set[str] = set()
        try:
            result, due, report = self._process_batch(items, now, file_offsets, seen)
        except Exception as exc:
            if store_failed(exc):
                self.broken = True
                raise PipelineBroken(f"batch commit failed: {failure_words(exc)}") from exc
            log.warning(
                "a batch of %d items failed as a whole (%s); applying them one at a time",
                len(items),
                failure_words(exc),
            )
            for stream in seen:
                self._rebuild(stream)
            return self._one_by_one(items, now, file_offsets)
        # Committed: nothing after this point may send the batch round again.
        self._saved(due)
        result.opened = report.opened
        result.queued = report.queued
        result.flood_started, result.flood_ended = report.flood_started, report.flood_ended
        return result

    def _process_batch(
        self,
        items: list[Parsed],
        now: float,
        file_offsets: dict[str, dict[str, int]] | None,
        seen: set[str],
    ) -> tuple[BatchResult, list[str], BookReport]:
        """Evaluate the batch and commit it in one transaction; return the result, the streams
        whose checkpoints it wrote and the alert book's report."""
        result = BatchResult()
        dead_rows: list[tuple[str, bytes, str]] = []
        touched: dict[str, StreamMonitor] = {}
        fitted: list[tuple[StreamMonitor, Outcome]] = []
        due: list[str] = []
        offline: dict[str, str] = {}
        """Stream -> why its sender went offline, for streams with no reading after that."""
        for item in items:
            if item.offline:
                offline.update(dict.fromkeys(item.offline, item.detail))
                continue
            if item.reading is None:
                reason = item.error or "unreadable"
                dead_rows.append((item.source, item.raw, _reason(reason, item.detail)))
                result.dead.append((item.source, reason))
                continue
            stream = item.reading.stream
            offline.pop(stream, None)  # back online within the batch
            try:
                monitor = self.monitor(stream, now)
            except Exception as exc:
                if store_failed(exc):
                    raise
                # Nothing moved yet, so this item alone is a dead letter, here in the batch.
                detail = self._unusable(stream, item.reading, exc)
                dead_rows.append((item.source, item.raw, _reason("engine-error", detail)))
                result.dead.append((item.source, "engine-error"))
                continue
            seen.add(stream)  # before the engine runs: it may be what fails
            outcome = monitor.update(item.reading)
            if not outcome.accepted:
                reason = outcome.reason or "refused"
                if reason in _ORDER_REASONS:
                    reason = self._refused_because(item.reading, monitor, reason, result)
                detail = _where(item.reading)
                dead_rows.append((item.source, item.raw, _reason(reason, detail)))
                result.dead.append((item.source, reason))
                continue
            touched[monitor.stream] = monitor
            result.outcomes.append(outcome)
            result.signals.extend(outcome.signals)
            if outcome.baseline_fitted:
                fitted.append((monitor, outcome))
        with self.store.transaction():
            self.store.add_readings(result.outcomes, now=now)
            for source, raw, reason in dead_rows:
                self.store.add_dead_letter(source, raw, reason, now=now)
            for monitor, outcome in fitted:
                self._record_learned(monitor, outcome, now)
            report = self.book.apply(result.outcomes, now)
            gone = self.offline_signals(offline, now)
            if gone:
                report = _added(report, self.book.apply_signals(gone, now))
                result.signals.extend(gone)
            due = self._due(touched, [m.stream for m, _ in fitted], now)
            if due:
                self.store.save_checkpoints(
                    {s: self.monitors[s].snapshot() for s in due}, now=now
                )
            for source, offsets in (file_offsets or {}).items():
                if offsets:
                    self.store.save_file_offsets(source, offsets, now=now)
        return result, due, report

    # -- one item at a time, after a batch failed as a whole ---

    def _one_by_one(
        self,
        items: list[Parsed],
        now: float,
        file_offsets: dict[str, dict[str, int]] | None,
    ) -> BatchResult:
        result = BatchResult()
        for item in items:
            self._apply_alone(item, now, result)
        offsets = {source: o for source, o in (file_offsets or {}).items() if o}
        if offsets:

            def save() -> None:
                for source, offset in offsets.items():
                    self.store.save_file_offsets(source, offset, now=now)

            self._commit_or_break(save)
        return result

    def _apply_alone(self, item: Parsed, now: float, result: BatchResult) -> None:
        if item.offline:
            gone = self.offline_signals(dict.fromkeys(item.offline, item.detail), now)
            if gone:
                reports: list[BookReport] = []
                self._commit_or_break(lambda: reports.append(self.book.apply_signals(gone, now)))
                result.signals.extend(gone)
                for report in reports:
                    result.opened += report.opened
                    result.queued += report.queued
                    result.flood_started += report.flood_started
                    result.flood_ended += report.flood_ended
            return
        reading = item.reading
        if reading is None:
            self._dead_alone(item, item.error or "unreadable", item.detail, now, result)
            return
        stream = reading.stream
        try:
            monitor = self.monitor(stream, now)
        except Exception as exc:
            if store_failed(exc):
                self.broken = True
                raise PipelineBroken(f"reading stream {stream!r} failed: {exc}") from exc
            detail = self._unusable(stream, reading, exc)
            self._dead_alone(item, "engine-error", detail, now, result)
            return
        try:
            outcome = monitor.update(reading)
        except Exception as exc:
            log.exception("stream %s: the engine failed on the reading at %s", stream, reading.time)
            self._rebuild(stream)
            detail = f"stream {stream!r} at {reading.time}: {failure_words(exc)}"
            self._dead_alone(item, "engine-error", detail, now, result)
            return
        if not outcome.accepted:
            reason = outcome.reason or "refused"
            if reason in _ORDER_REASONS:
                reason = self._refused_because(reading, monitor, reason, result)
            self._dead_alone(item, reason, _where(reading), now, result)
            return
        fitted = [stream] if outcome.baseline_fitted else []
        due: list[str] = []
        try:
            with self.store.transaction():
                self.store.add_readings([outcome], now=now)
                if fitted:
                    self._record_learned(monitor, outcome, now)
                report = self.book.apply([outcome], now)
                due = self._due({stream: monitor}, fitted, now)
                if due:
                    self.store.save_checkpoints(
                        {s: self.monitors[s].snapshot() for s in due}, now=now
                    )
                self._save_position(item, now)
        except Exception as exc:
            if store_failed(exc):
                self.broken = True
                raise PipelineBroken(f"commit failed: {failure_words(exc)}") from exc
            log.warning("stream %s: the store refused the reading at %s", stream, reading.time)
            self._rebuild(stream)
            detail = f"stream {stream!r} at {reading.time}: {failure_words(exc)}"
            self._dead_alone(item, "store-refused", detail, now, result)
            return
        self._saved(due)
        result.outcomes.append(outcome)
        result.signals.extend(outcome.signals)
        result.opened += report.opened
        result.queued += report.queued
        result.flood_started += report.flood_started
        result.flood_ended += report.flood_ended

    def _unusable(self, stream: str, reading: Reading, exc: Exception) -> str:
        """A stream whose monitor cannot be made (a stored baseline this version refuses, say):
        said once in the log, and in every one of its dead letters."""
        if stream not in self._unusable_streams:
            self._unusable_streams.add(stream)
            log.error("stream %s: no monitor can be made for it: %s", stream, failure_words(exc))
        return f"stream {stream!r} at {reading.time}: {failure_words(exc)}"

    def _dead_alone(
        self, item: Parsed, reason: str, detail: str, now: float, result: BatchResult
    ) -> None:
        def write() -> None:
            self.store.add_dead_letter(item.source, item.raw, _reason(reason, detail), now=now)
            self._save_position(item, now)

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
                monitor = StreamMonitor.restore(state, self._settings_for(stream))
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

    def _refused_because(
        self, reading: Reading, monitor: StreamMonitor, said: str, batch: BatchResult
    ) -> str:
        """The true name of a reading the monitor refused for its order. The monitor keeps only
        its stream's last reading, so all it knows is "not newer"; the store (and this batch)
        knows whether the reading was ever applied. ``duplicate``: it was, this is a repeat.
        ``late``: it never was, and came after a newer one (a gateway that sends n+1 before n
        on reconnecting) -- a reading lost to the chart, to be counted apart from repeats.
        ``out-of-order`` stays for a reading whose sequence number is newer but whose time is
        not, or one at the time of the last reading with another value."""
        if any(_same(o.reading, reading) for o in batch.outcomes) or self.store.has_reading(
            reading
        ):
            return "duplicate"
        if said == "duplicate":  # an older sequence number (or a pruned repeat)
            return "late"
        last = monitor.last_time
        if reading.seq is None and last is not None and reading.time < last:
            return "late"
        return said

    def _time_at(self, stream: str, index: int, last_time: float) -> float | None:
        """The time of the stream's reading at ``index`` (stored in this transaction already,
        with the batch's readings), for the first reading of a learned baseline."""
        row = self.store.db.conn.execute(
            "SELECT time FROM readings WHERE stream = ? AND idx = ? AND time <= ?",
            (stream, index, last_time),
        ).fetchone()
        return None if row is None else float(row[0])

    def _record_learned(self, monitor: StreamMonitor, outcome: Outcome, now: float) -> None:
        baseline = monitor.baseline
        assert baseline is not None and outcome.index is not None
        current = self.store.current_baseline(monitor.stream)
        if current is not None and current.version >= monitor.baseline_version:
            # An operator refitted the stream while it was still learning, before the refits
            # job adopted it: the operator's explicit choice wins over the automatic fit, which
            # is not recorded (its number is taken). Readings of this batch that ran past the
            # fit were judged against it: their stored version would name the operator's.
            self.store.forget_judged_against(
                monitor.stream, monitor.baseline_version, after=outcome.reading.time
            )
            monitor.set_baseline(Baseline.from_dict(current.numbers), version=current.version)
            log.warning(
                "stream %s: finished learning after an operator stored baseline version %d; "
                "that version is in force and the learned fit is dropped",
                monitor.stream,
                current.version,
            )
            return
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
            first_time=self._time_at(monitor.stream, first, outcome.reading.time),
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
            try:
                monitor.set_baseline(Baseline.from_dict(stored.numbers), version=stored.version)
            except BaselineError as exc:
                log.error("stream %s: stored baseline %d refused: %s", stream, stored.version, exc)
                continue
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
            if now - last <= cadence * multiple:
                continue
            out.append(_stale(monitor, now, limit=cadence * multiple))
        return out

    def offline_signals(self, causes: dict[str, str], now: float) -> list[StreamSignal]:
        """A ``stale`` signal at once for each stream whose sender said it went offline
        (``causes``: stream -> the words why), whatever its cadence: the same signal the stale
        check makes, with the cause and without a limit. Streams never read are left out
        (there is no last reading to speak of); no monitor is made for them."""
        out = []
        for stream, cause in causes.items():
            monitor = self.monitors.get(stream)
            if monitor is None or monitor.last_time is None:
                continue
            out.append(_stale(monitor, now, limit=None, cause=cause))
        return out


def _stale(
    monitor: StreamMonitor, now: float, *, limit: float | None, cause: str | None = None
) -> StreamSignal:
    """A ``stale`` signal for ``monitor``'s stream as of ``now``: its statistic is the silence
    since the last reading, so the incident's silence begins there."""
    assert monitor.last_time is not None
    b = monitor.baseline
    return StreamSignal(
        stream=monitor.stream,
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
        statistic=max(now - monitor.last_time, 0.0),
        limit=limit,
        cause=cause,
    )


def _added(a: BookReport, b: BookReport) -> BookReport:
    """Two reports of one batch as one."""
    return BookReport(
        **{f.name: getattr(a, f.name) + getattr(b, f.name) for f in fields(a)}
    )


_ROW_REFUSED = (
    sqlite3.IntegrityError,
    sqlite3.DataError,
    sqlite3.ProgrammingError,
    sqlite3.InterfaceError,
)
"""What the database says about a row it will not take, as opposed to failing itself."""


def store_failed(exc: BaseException) -> bool:
    """True when the store itself failed (I/O, disk full, locked, damaged), so that applying
    the items again one at a time could not help; False for a refused row or any failure of
    our own code, which one item may cause."""
    if isinstance(exc, _ROW_REFUSED):
        return False
    return isinstance(exc, sqlite3.Error | OSError | MemoryError)


def failure_words(exc: BaseException) -> str:
    """An unexpected exception in words, bounded: the kind and the start of its message."""
    text = f"{type(exc).__name__}: {exc}"
    return text if len(text) <= 300 else text[:297] + "..."


_ORDER_REASONS = frozenset({"duplicate", "out-of-order"})


def _same(a: Reading, b: Reading) -> bool:
    if a.stream != b.stream:
        return False
    return (a.time == b.time and a.value == b.value) or (a.seq is not None and a.seq == b.seq)


def _where(reading: Reading) -> str:
    """The refused reading, named as a person looks for it: stream, ISO 8601 time, sequence."""
    seq = "" if reading.seq is None else f", seq {reading.seq}"
    try:
        when = format_time(reading.time)
    except (OverflowError, OSError, ValueError):
        when = repr(reading.time)
    return f"stream {reading.stream!r} at {when}{seq}, value {reading.value!r}"


def _reason(code: str, detail: str) -> str:
    """The dead letter's reason text. It must be storable whatever the input held: a lone
    surrogate (from a file name, say) would fail the commit, so such characters are escaped."""
    text = f"{code}: {detail}" if detail else code
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        text = text.encode("utf-8", "backslashreplace").decode("utf-8")
    return text
