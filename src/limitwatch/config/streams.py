"""How streams are watched: ``[defaults]`` and ``[[streams]]``, merged per stream.

Why merged options are checked apart: a ``[[streams]]`` entry may leave out keys that make a
problem only together with ``[defaults]``; :func:`_merged_problems` names the keys involved so
an entry is blamed only for the keys it sets.
"""

from __future__ import annotations

import math
from typing import Annotated, Literal

from pydantic import BeforeValidator, Field, PrivateAttr, field_validator, model_validator

from limitwatch.config.errors import _fail
from limitwatch.config.value_types import (
    MAX_COUNT,
    Glob,
    PositiveDuration,
    Severity,
    _cadences,
    _Section,
)
from limitwatch.engine import MonitorSettings
from limitwatch.stats.baseline import Baseline, sigma_problem
from limitwatch.stats.constants import D2
from limitwatch.stats.rules import parse_rules

_MONITOR = MonitorSettings()


class BaselineInput(_Section):
    """A baseline typed in rather than learned: the center line and either sigma or the
    average moving range (``sigma = mr_bar / d2``)."""

    center: float
    sigma: float | None = Field(None, gt=0)
    mr_bar: float | None = Field(None, gt=0)

    @model_validator(mode="after")
    def _one_spread(self) -> BaselineInput:
        if (self.sigma is None) == (self.mr_bar is None):
            raise _fail((("sigma",), "give exactly one of sigma and mr_bar (average moving range)"))
        key = "sigma" if self.sigma is not None else "mr_bar"
        problem = sigma_problem(self.sigma_value)
        if problem is not None:
            raise _fail(((key,), problem))
        sigma = self.sigma_value
        # Readings become z = (x - center) / sigma: limits must be finite numbers apart from
        # the center, or every reading would be refused as non-finite or signal at once.
        if not math.isfinite(abs(self.center) + 10 * sigma):
            raise _fail(((key,), "is so large that the limits are not finite numbers"))
        if sigma < max(abs(self.center) * 1e-12, 1e-300):
            raise _fail(((key,), "is too small to tell the limits from the center line"))
        return self

    @property
    def sigma_value(self) -> float:
        return self.sigma if self.sigma is not None else self.mr_bar / D2  # type: ignore[operator]


class StreamOptions(_Section):
    """``[defaults]``: how a stream is watched. Defaults are :class:`MonitorSettings`'."""

    rules: str = _MONITOR.rules  # type: ignore[assignment]
    learn_count: int = Field(_MONITOR.learn_count, ge=2, le=MAX_COUNT)
    method: Literal["mean", "median"] = _MONITOR.method
    exclude_beyond: bool = _MONITOR.exclude_beyond
    max_iterations: int = Field(_MONITOR.max_iterations, ge=1, le=50)
    min_points: int = Field(_MONITOR.min_points, ge=2, le=MAX_COUNT)
    warn_points: int = Field(_MONITOR.warn_points, ge=2, le=MAX_COUNT)
    autocorrelation_threshold: float = Field(_MONITOR.autocorrelation_threshold, gt=0, le=1)
    lower_bound: float | None = None
    upper_bound: float | None = None
    spec_lower: float | None = None
    spec_upper: float | None = None
    max_gap: PositiveDuration | None = None
    cadence: PositiveDuration | None = None
    stale_after: Annotated[float, BeforeValidator(_cadences)] = Field(5.0, ge=1, le=1000)
    severity: Severity = "warning"
    baseline: BaselineInput | None = None
    description: str | None = None
    unit: str | None = None

    @field_validator("rules")
    @classmethod
    def _rules(cls, value: str) -> str:
        parse_rules(value)  # RuleSpecError is a ValueError: reported at this key
        return value


class StreamEntry(StreamOptions):
    """``[[streams]]``: options for the streams whose id matches ``match``; keys left out come
    from ``[defaults]``."""

    match: Glob


class StreamConfig(StreamOptions):
    """The options in force for one stream: its first matching ``[[streams]]`` entry over
    ``[defaults]``. ``entry`` is that entry's index (None: defaults only)."""

    match: str | None = None
    entry: int | None = None
    _monitor: MonitorSettings | None = PrivateAttr(default=None)

    @property
    def stale_after_s(self) -> float | None:
        """Seconds without a reading before the stream counts as stale (None: not checked)."""
        return None if self.cadence is None else self.cadence * self.stale_after

    def monitor_settings(self) -> MonitorSettings:
        """The engine's settings for this stream (built once, then shared: they are frozen)."""
        if self._monitor is None:
            self._monitor = MonitorSettings(
                rules=self.rules,
                learn_count=self.learn_count,
                method=self.method,
                exclude_beyond=self.exclude_beyond,
                max_iterations=self.max_iterations,
                min_points=self.min_points,
                warn_points=self.warn_points,
                autocorrelation_threshold=self.autocorrelation_threshold,
                lower_bound=self.lower_bound,
                upper_bound=self.upper_bound,
                spec_lower=self.spec_lower,
                spec_upper=self.spec_upper,
                max_gap=self.max_gap,
            )
        return self._monitor

    def typed_baseline(self) -> Baseline | None:
        """The typed-in baseline, if any, with this stream's bounds and spec limits."""
        if self.baseline is None:
            return None
        return Baseline.from_limits(
            center=self.baseline.center,
            sigma=self.baseline.sigma_value,
            method=self.method,
            lower_bound=self.lower_bound,
            upper_bound=self.upper_bound,
            spec_lower=self.spec_lower,
            spec_upper=self.spec_upper,
        )


def _merged_problems(
    opts: StreamConfig,
) -> list[tuple[tuple[str, ...], str, frozenset[str]]]:
    """Checks that need the merged options of one stream entry (or the defaults alone): each
    problem comes with the keys it involves, so an entry is blamed only for keys it sets."""
    out: list[tuple[tuple[str, ...], str, frozenset[str]]] = []
    if opts.learn_count < opts.min_points:
        out.append(
            (
                ("learn_count",),
                f"learn_count ({opts.learn_count}) is below min_points ({opts.min_points}): "
                "the learning phase could never fit a baseline",
                frozenset({"learn_count", "min_points"}),
            )
        )
    for low, high in (("lower_bound", "upper_bound"), ("spec_lower", "spec_upper")):
        a, b = getattr(opts, low), getattr(opts, high)
        if a is not None and b is not None and not a < b:
            out.append(
                ((high,), f"{high} ({b:g}) must be above {low} ({a:g})", frozenset({low, high}))
            )
    if opts.baseline is not None:
        center = opts.baseline.center
        lo, hi = opts.lower_bound, opts.upper_bound
        if (lo is not None and center < lo) or (hi is not None and center > hi):
            out.append(
                (
                    ("baseline", "center"),
                    f"center {center:g} lies outside the natural bounds (lower_bound, upper_bound)",
                    frozenset({"baseline", "lower_bound", "upper_bound"}),
                )
            )
    return out

