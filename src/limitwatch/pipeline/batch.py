"""The batch: evaluate every item, then commit all it caused in ONE transaction (see the
package's description); on a failure that is not the store's own, fall back to one item at a
time."""

from __future__ import annotations

import logging
from collections.abc import Iterable
from dataclasses import fields

from limitwatch.alerts.lifecycle import BookReport
from limitwatch.engine import StreamMonitor
from limitwatch.ingest.base import Parsed
from limitwatch.model import Outcome
from limitwatch.pipeline.baselines import record_learned
from limitwatch.pipeline.failures import PipelineBroken, failure_words, store_failed
from limitwatch.pipeline.isolation import ItemByItem
from limitwatch.pipeline.refusals import ORDER_REASONS, dead_reason, refused_because, where
from limitwatch.pipeline.state import BatchResult

log = logging.getLogger("limitwatch.pipeline")


class Pipeline(ItemByItem):
    """Owns the monitors and the store connection; used from one thread only."""

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
                dead_rows.append((item.source, item.raw, dead_reason(reason, item.detail)))
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
                dead_rows.append((item.source, item.raw, dead_reason("engine-error", detail)))
                result.dead.append((item.source, "engine-error"))
                continue
            seen.add(stream)  # before the engine runs: it may be what fails
            outcome = monitor.update(item.reading)
            if not outcome.accepted:
                reason = outcome.reason or "refused"
                if reason in ORDER_REASONS:
                    reason = refused_because(
                        self.store, item.reading, monitor, reason, result.applied
                    )
                detail = where(item.reading)
                dead_rows.append((item.source, item.raw, dead_reason(reason, detail)))
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
                record_learned(self.store, monitor, outcome, now)
            report = self.book.apply(result.outcomes, now)
            gone = self.offline_signals(offline, now)
            if gone:
                report = _added(report, self.book.apply_signals(gone, now))
                result.signals.extend(gone)
            due = self._due(touched, [m.stream for m, _ in fitted], now)
            if due:
                self.store.save_checkpoints({s: self.monitors[s].snapshot() for s in due}, now=now)
            for source, offsets in (file_offsets or {}).items():
                if offsets:
                    self.store.save_file_offsets(source, offsets, now=now)
        return result, due, report


def _added(a: BookReport, b: BookReport) -> BookReport:
    """Two reports of one batch as one."""
    return BookReport(**{f.name: getattr(a, f.name) + getattr(b, f.name) for f in fields(a)})
