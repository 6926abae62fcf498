"""The per-stream state machine: readings in, signals out.

A :class:`StreamMonitor` owns everything one stream needs: the learning buffer (phase I), the
locked baseline, the previous reading (for the moving range and for refusing redeliveries) and
the counters of every configured test (one :class:`~limitwatch.stats.fused.FusedRules`, run in
one call per reading and held by the tests to the separate detectors' results). It does no I/O
and reads no clock -- the time arrives on the :class:`~limitwatch.model.Reading` -- so the live
service, ``limitwatch replay`` and the tests all run exactly the same code.

Conventions worth knowing:

* A reading is checked in full before anything moves: one that cannot be judged is refused
  with a reason and leaves the monitor exactly as it was. Besides order and bounds, that is a
  reading ``off-scale``: its moving range overflows, or it lies more than :data:`Z_LIMIT`
  sigmas from the center line (past that, double precision no longer charts it; 1e308 against
  a sigma of 0.01 would be an infinite z).
* Readings must arrive in time order. A reading at or before the previous one is refused with a
  reason and changes nothing: ``duplicate`` when it repeats the previous reading (same time and
  value, or a sequence number already seen), ``out-of-order`` otherwise. A monitoring aid that
  silently re-sorted readings would compute moving ranges nobody can reproduce.
* The moving range of a reading that arrives more than ``max_gap`` seconds after the previous one
  is skipped (``mr`` is None), because a range across a shutdown measures the shutdown, not the
  process. Run tests on the X chart carry on across the gap.
* Learning: the first ``learn_count`` accepted readings fit the baseline, which is then locked.
  If they cannot (for instance a stuck sensor gives only zero moving ranges) the oldest reading
  is dropped and the fit is retried on the next one, so memory stays bounded.
* Index: every accepted reading gets the next 0-based position in its stream, learning readings
  included, so a signal's ``index`` points at the row that completed it.

>>> from limitwatch.model import Reading
>>> monitor = StreamMonitor("line-1", MonitorSettings(learn_count=20, rules="limits"))
>>> for i, v in enumerate([5, 6, 5, 7, 6, 5, 6, 6, 5, 7, 6, 5, 6, 5, 7, 6, 5, 6, 6, 5]):
...     _ = monitor.update(Reading("line-1", float(i), float(v)))
>>> monitor.phase
'monitoring'
>>> outcome = monitor.update(Reading("line-1", 20.0, 12.0))
>>> [s.rule for s in outcome.signals]
['beyond-limits', 'mr-beyond-limit']
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

from limitwatch.model import Outcome, Phase, Reading, StreamSignal
from limitwatch.stats.baseline import Baseline, BaselineError, check_usable, fit_baseline
from limitwatch.stats.fused import FusedPlan, FusedRules
from limitwatch.stats.rules import DETECTORS, RuleSpec, parse_rules
from limitwatch.stats.signal import Detector, Signal

Z_LIMIT = 1e100
"""Farthest a reading may lie from the center line, in sigmas (and largest moving range, in
sigmas), to be judged; a farther one is refused as ``off-scale``. Far past any real reading
(ten sigmas out is already extraordinary) and far below overflow: every detector's state then
stays finite, since CUSUM, which sums one z per reading, would need 1e208 readings to
overflow."""

REFUSAL_WORDS: dict[str, str] = {
    "duplicate": "it repeats a reading already applied (same time and value, or a sequence "
    "number already seen)",
    "out-of-order": "it is not later than the stream's last reading",
    "not-finite": "the value or time is not a finite number",
    "below-lower-bound": "the value is below the stream's lower_bound",
    "above-upper-bound": "the value is above the stream's upper_bound",
    "off-scale": f"the value is too far from the center line to be judged (its distance or "
    f"moving range is over {Z_LIMIT:g} sigmas, or overflows)",
}
"""Each refusal reason in a sentence, for people reading a replay or a dead letter."""

CHECKPOINT_FORMAT = 2
"""Checkpoint layout written by :meth:`StreamMonitor.state`. Format 1 (every detector's full
``state()``, parameters included) is still read."""


@dataclass(frozen=True)
class MonitorSettings:
    """How one stream is watched. Plain data so a config file, a CLI flag set and a test can all
    build one."""

    rules: str | tuple[RuleSpec, ...] = "western-electric"
    learn_count: int = 25
    method: Literal["mean", "median"] = "mean"
    exclude_beyond: bool = False
    max_iterations: int = 5
    min_points: int = 10
    warn_points: int = 20
    autocorrelation_threshold: float = 0.5
    lower_bound: float | None = None
    upper_bound: float | None = None
    spec_lower: float | None = None
    spec_upper: float | None = None
    max_gap: float | None = None
    rule_specs: tuple[RuleSpec, ...] = field(init=False, repr=False, compare=False)
    x_specs: tuple[RuleSpec, ...] = field(init=False, repr=False, compare=False)
    """The selected detectors of the X chart, then (``mr_specs``) of the MR chart."""
    mr_specs: tuple[RuleSpec, ...] = field(init=False, repr=False, compare=False)
    plan: FusedPlan = field(init=False, repr=False, compare=False)
    """Every selected test's parameters, checked once here: each stream's tests run in one
    :class:`~limitwatch.stats.fused.FusedRules`, made from this plan without checking again.
    Its ``key`` names every detector with all its parameters, X chart first: a checkpoint
    whose key differs was written under other rules, and its run counts are not reused."""

    def __post_init__(self) -> None:
        specs = parse_rules(self.rules) if isinstance(self.rules, str) else tuple(self.rules)
        object.__setattr__(self, "rule_specs", tuple(specs))
        object.__setattr__(self, "x_specs", tuple(s for s in specs if _chart(s) == "x"))
        object.__setattr__(self, "mr_specs", tuple(s for s in specs if _chart(s) == "mr"))
        object.__setattr__(self, "plan", FusedPlan((*self.x_specs, *self.mr_specs)))
        if self.learn_count < self.min_points:
            raise ValueError(
                f"learn_count ({self.learn_count}) is below min_points ({self.min_points}): "
                "the learning phase could never fit a baseline"
            )
        if self.max_gap is not None and self.max_gap <= 0:
            raise ValueError(f"max_gap must be positive seconds, got {self.max_gap}")

    def build_detectors(self) -> tuple[tuple[Detector, ...], tuple[Detector, ...]]:
        """Fresh reference detectors (X chart, MR chart), each in selection order: what a
        stream's :class:`~limitwatch.stats.fused.FusedRules` stands in for."""
        return tuple(s.build() for s in self.x_specs), tuple(s.build() for s in self.mr_specs)

    def fit(self, values: list[float]) -> Baseline:
        """Fit a baseline with these settings (phase I)."""
        return fit_baseline(
            values,
            method=self.method,
            lower_bound=self.lower_bound,
            upper_bound=self.upper_bound,
            exclude_beyond=self.exclude_beyond,
            max_iterations=self.max_iterations,
            min_points=self.min_points,
            warn_points=self.warn_points,
            autocorrelation_threshold=self.autocorrelation_threshold,
            spec_lower=self.spec_lower,
            spec_upper=self.spec_upper,
        )


class StreamMonitor:
    """XmR monitoring of one stream, one reading at a time, in O(1) per reading once the
    baseline is locked."""

    __slots__ = (
        "_center",
        "_last_seq",
        "_last_time",
        "_last_value",
        "_learning",
        "_rules",
        "_sigma",
        "baseline",
        "baseline_version",
        "count",
        "last_fit_error",
        "settings",
        "stream",
    )

    def __init__(
        self,
        stream: str,
        settings: MonitorSettings | None = None,
        baseline: Baseline | None = None,
        baseline_version: int = 1,
    ) -> None:
        self.stream = stream
        self.settings = settings or MonitorSettings()
        self.count = 0
        self._last_time: float | None = None
        self._last_value: float | None = None
        self._last_seq: int | None = None
        self._learning: list[float] | None = []
        """Phase I readings; None once a baseline is locked (nothing left to learn)."""
        self.last_fit_error: str | None = None
        self.baseline: Baseline | None = None
        self.baseline_version = 0
        self._rules: FusedRules | None = None
        """Every selected test's counters; made when a baseline is locked."""
        self._center = 0.0
        self._sigma = 1.0
        if baseline is not None:
            self.set_baseline(baseline, version=baseline_version)

    @property
    def last_time(self) -> float | None:
        """Time of the last accepted reading (for stale-stream checks)."""
        return self._last_time

    @property
    def last_value(self) -> float | None:
        return self._last_value

    @property
    def phase(self) -> Phase:
        return "learning" if self.baseline is None else "monitoring"

    def set_baseline(self, baseline: Baseline, version: int | None = None) -> None:
        """Lock a baseline (fitted, stored or refitted) and start every detector afresh: run
        tests counted against old limits mean nothing against new ones."""
        self._lock(baseline, version, FusedRules(self.settings.plan))

    def _lock(self, baseline: Baseline, version: int | None, rules: FusedRules) -> None:
        try:
            check_usable(baseline)
        except BaselineError as exc:
            raise BaselineError(f"stream {self.stream!r}: baseline refused: {exc}") from None
        self.baseline = baseline
        self.baseline_version = self.baseline_version + 1 if version is None else version
        self._center = baseline.center
        self._sigma = baseline.sigma
        self._learning = None
        self._rules = rules

    # -- the hot path ---------------------------------------------------------------------------

    def _refusal(self, reading: Reading) -> str | None:
        value = reading.value
        if not math.isfinite(value) or not math.isfinite(reading.time):
            return "not-finite"
        settings = self.settings
        if settings.lower_bound is not None and value < settings.lower_bound:
            return "below-lower-bound"
        if settings.upper_bound is not None and value > settings.upper_bound:
            return "above-upper-bound"
        if self._last_time is None:
            return None
        if reading.seq is not None and self._last_seq is not None and reading.seq <= self._last_seq:
            return "duplicate"
        if reading.time > self._last_time:
            return None
        if reading.time == self._last_time and value == self._last_value:
            return "duplicate"
        return "out-of-order"

    def update(self, reading: Reading) -> Outcome:
        """Apply one reading; a refused reading leaves the monitor exactly as it was."""
        reason = self._refusal(reading)
        if reason is not None:
            return Outcome(reading, False, reason, None, self.phase)

        value = reading.value
        index = self.count
        last_value = self._last_value
        mr: float | None = None
        if last_value is not None:
            gap = self.settings.max_gap
            if gap is None or reading.time - self._last_time <= gap:  # type: ignore[operator]
                mr = abs(value - last_value)
        # Everything the detectors will be given is computed before anything moves.
        learning = self.baseline is None
        z = mr_sigma = 0.0
        if learning:
            if mr is not None and not _isfinite(mr):
                return Outcome(reading, False, "off-scale", None, "learning")
        else:
            sigma = self._sigma
            z = (value - self._center) / sigma
            if mr is not None:
                mr_sigma = mr / sigma
            # written so that an infinite or NaN z or moving range is refused too
            if not (-Z_LIMIT <= z <= Z_LIMIT and mr_sigma <= Z_LIMIT):
                return Outcome(reading, False, "off-scale", None, "monitoring")

        self.count = index + 1
        self._last_time = reading.time
        self._last_value = value
        if reading.seq is not None:
            self._last_seq = reading.seq

        if learning:
            return self._learn(reading, index, mr)

        rules = self._rules
        assert rules is not None
        hits = rules.update(index, z, None if mr is None else mr_sigma)
        signals = tuple([self._place(hit, reading, mr) for hit in hits]) if hits else ()
        # Positional: Outcome(reading, accepted, reason, index, phase, z, mr, signals,
        # baseline_fitted, baseline_version)
        return Outcome(
            reading, True, None, index, "monitoring", z, mr, signals, False, self.baseline_version
        )

    def _learn(self, reading: Reading, index: int, mr: float | None) -> Outcome:
        learning = self._learning
        assert learning is not None
        learning.append(reading.value)
        settings = self.settings
        if len(learning) < settings.learn_count:
            return Outcome(reading, accepted=True, index=index, phase="learning", mr=mr)
        try:
            baseline = settings.fit(learning)
        except BaselineError as exc:
            # Keep the window sliding so memory stays bounded while the stream cannot be fitted.
            self.last_fit_error = str(exc)
            del learning[0]
            return Outcome(reading, accepted=True, index=index, phase="learning", mr=mr)
        self.last_fit_error = None
        self.set_baseline(baseline)
        return Outcome(
            reading, accepted=True, index=index, phase="learning", mr=mr, baseline_fitted=True
        )

    def _place(self, hit: Signal, reading: Reading, mr: float | None) -> StreamSignal:
        baseline = self.baseline
        assert baseline is not None
        sigma = self._sigma
        statistic = hit.statistic
        limit = hit.limit
        if hit.chart == "mr" and statistic is not None:
            # MR detectors work in sigma units; report the moving range in the reading's units.
            statistic = statistic * sigma
            limit = None if limit is None else limit * sigma
        return StreamSignal(
            stream=self.stream,
            rule=hit.rule,
            chart=hit.chart,
            side=hit.side,
            index=hit.index,
            time=reading.time,
            value=reading.value,
            involved=hit.involved,
            center=baseline.center,
            sigma=sigma,
            ucl=baseline.ucl,
            lcl=baseline.lcl,
            mr=mr,
            mr_ucl=baseline.mr_ucl,
            baseline_version=self.baseline_version,
            statistic=statistic,
            limit=limit,
        )

    # -- checkpoints ----------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        """Plain JSON-ready state; :meth:`from_state` continues exactly where this one stopped.

        The tests' counters are their :meth:`~limitwatch.stats.fused.FusedRules.state`:
        ``rules`` names every detector and its parameters once (the same for every stream
        under the same settings) and ``states`` holds each one's values, X chart first.
        """
        rules = self._rules
        baseline = self.baseline
        return {
            "format": CHECKPOINT_FORMAT,
            "stream": self.stream,
            "count": self.count,
            "last_time": self._last_time,
            "last_value": self._last_value,
            "last_seq": self._last_seq,
            "learning": [] if self._learning is None else list(self._learning),
            "baseline": None if baseline is None else baseline.to_dict(),
            "baseline_version": self.baseline_version,
            **({"rules": None, "states": []} if rules is None else rules.state()),
        }

    @classmethod
    def from_state(cls, data: dict[str, Any], settings: MonitorSettings) -> StreamMonitor:
        """Rebuild a monitor from :meth:`state` (this format or format 1). ``settings`` come
        from the current config; when their detectors differ from the checkpoint's, detectors
        restart (and say so by their fresh state) rather than mixing counts from different
        rules."""
        found = data.get("format")
        if found not in (1, CHECKPOINT_FORMAT):
            raise ValueError(
                f"checkpoint for stream {data.get('stream')!r} has format {found!r}, "
                f"this version reads formats 1 and {CHECKPOINT_FORMAT}"
            )
        monitor = cls(data["stream"], settings)
        monitor.count = data["count"]
        monitor._last_time = data["last_time"]
        monitor._last_value = data["last_value"]
        monitor._last_seq = data["last_seq"]
        if data["baseline"] is None:
            monitor._learning = list(data["learning"])
            return monitor
        if found == 1:
            rules = _format_1_rules(settings, data["detectors"])
        else:
            # The checkpoint holds the fused rules' state (``rules`` and ``states``) as is.
            # Every detector's state ends with the position of the last reading it saw. JSON
            # gives each its own int object (28 bytes); the live monitor shares one.
            rules = FusedRules.from_state(data, settings.plan, position=monitor.count - 1)
        # The store wrote this baseline: its numbers are trusted, not converted again.
        monitor._lock(Baseline.from_stored(data["baseline"]), data["baseline_version"], rules)
        return monitor


def _format_1_rules(settings: MonitorSettings, saved: list[dict[str, Any]]) -> FusedRules:
    """Format 1 kept each detector's full ``state()``, parameters included: its counts go on
    when the detectors and their parameters are still the settings' ones."""
    x, mr = settings.build_detectors()
    fresh = [*x, *mr]
    plan = settings.plan
    if [s.get("rule") for s in saved] != [d.rule for d in fresh] or not all(
        _same_params(s, d.state()) for s, d in zip(saved, fresh, strict=True)
    ):
        return FusedRules(plan)
    restored = [type(d).from_state(s) for d, s in zip(fresh, saved, strict=True)]
    states = [list(d.state()["state"].values()) for d in restored]
    return FusedRules.from_state({"rules": plan.key, "states": states}, plan)


_isfinite = math.isfinite


def _chart(spec: RuleSpec) -> str:
    return DETECTORS[spec.rule].chart


def _same_params(saved: dict[str, Any], fresh: dict[str, Any]) -> bool:
    """Detectors match when every non-state field (their parameters) is equal."""
    params = saved.get("params")
    return params is None or params == fresh.get("params")
