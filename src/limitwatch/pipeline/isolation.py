"""Applying a batch's items one transaction each, after the batch failed as a whole.

The batch was rolled back and the monitors it touched rebuilt from the store, so each item
now meets the state that is committed; the item that fails again alone becomes a dead letter
(``engine-error`` or ``store-refused``) and the others are kept.
"""

from __future__ import annotations

import logging

from limitwatch.alerts.lifecycle import BookReport
from limitwatch.ingest.base import Parsed
from limitwatch.pipeline.baselines import record_learned
from limitwatch.pipeline.failures import PipelineBroken, failure_words, store_failed
from limitwatch.pipeline.refusals import ORDER_REASONS, refused_because, where
from limitwatch.pipeline.state import BatchResult, PipelineState

log = logging.getLogger("limitwatch.pipeline")


class ItemByItem(PipelineState):
    """The pipeline's fallback: one item, one transaction."""

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
            if reason in ORDER_REASONS:
                reason = refused_because(self.store, reading, monitor, reason, result.applied)
            self._dead_alone(item, reason, where(reading), now, result)
            return
        fitted = [stream] if outcome.baseline_fitted else []
        due: list[str] = []
        try:
            with self.store.transaction():
                self.store.add_readings([outcome], now=now)
                if fitted:
                    record_learned(self.store, monitor, outcome, now)
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
