"""Replaying autocorrelated readings: each value replaced by its AR(1) one-step-ahead residual,
so the engine charts what the model did not predict (Alwan and Roberts 1988).

Why apart from the command: it decides which readings fit each stream's model and how refused
readings move the filter -- library logic that a replay from another front end needs as well.

References
----------
Alwan, L. C. and Roberts, H. V. (1988), "Time-series modeling for statistical process control",
*Journal of Business & Economic Statistics* 6(1), 87-95.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Iterator

from limitwatch.engine import MonitorSettings
from limitwatch.ingest.csvfile import Row
from limitwatch.stats.autocorrelation import Ar1Fit, fit_ar1
from limitwatch.stats.baseline import BaselineError


class ResidualFeed:
    """The rows of a replay with each value replaced by its AR(1) one-step-ahead residual.

    Each stream's model is fitted on the first ``learn_count`` readings the engine will accept
    (in time order, within the natural bounds), the same readings whose residuals the engine
    then learns its baseline from. Readings beyond a natural bound are refused here (the
    residuals have no bound); a reading the engine will refuse for its time does not move the
    filter, and a repeat of the previous reading is passed as a repeat of its residual, so the
    engine names the refusal as it would for raw readings.
    """

    def __init__(
        self,
        rows: list[Row],
        settings: MonitorSettings,
        on_refused: Callable[[Row, str], None] = lambda row, reason: None,
    ) -> None:
        self.settings = settings
        self.on_refused = on_refused
        self.refused = 0
        self.raw: dict[int, float] = {}
        self.models: dict[str, Ar1Fit] = {}
        self.problems: dict[str, str] = {}
        first: dict[str, list[float]] = {}
        last: dict[str, float] = {}
        for row in rows:
            if self._bound(row.value) is not None:
                continue
            before = last.get(row.stream)
            if before is not None and row.time <= before:
                continue
            last[row.stream] = row.time
            values = first.setdefault(row.stream, [])
            if len(values) < settings.learn_count:
                values.append(row.value)
        for stream, values in first.items():
            if len(values) < settings.learn_count:
                continue  # never leaves the learning phase: nothing to chart
            try:
                self.models[stream] = fit_ar1(
                    values,
                    method=settings.method,
                    exclude_beyond=settings.exclude_beyond,
                    max_iterations=settings.max_iterations,
                    min_points=settings.min_points,
                    warn_points=settings.warn_points,
                )
            except BaselineError as exc:
                self.problems[stream] = str(exc)

    def _bound(self, value: float) -> str | None:
        s = self.settings
        if s.lower_bound is not None and value < s.lower_bound:
            return "below-lower-bound"
        if s.upper_bound is not None and value > s.upper_bound:
            return "above-upper-bound"
        return None

    def rows(self, rows: Iterable[Row]) -> Iterator[Row]:
        filters = {stream: model.filter() for stream, model in self.models.items()}
        last: dict[str, tuple[float, float, float]] = {}  # time, reading, residual
        for row in rows:
            reason = self._bound(row.value)
            if reason is not None:
                self.refused += 1
                self.on_refused(row, reason)
                continue
            if row.stream in self.problems:
                continue
            self.raw[row.line] = row.value
            f = filters.get(row.stream)
            if f is None:  # too few readings ever to fit a baseline
                yield row
                continue
            before = last.get(row.stream)
            if before is not None and row.time <= before[0]:
                repeat = row.time == before[0] and row.value == before[1]
                value = before[2] if repeat else f.peek(row.value)
            else:
                value = f.update(row.value)
                last[row.stream] = (row.time, row.value, value)
            yield dataclasses.replace(row, value=value)
