"""How many false alarms a rule set will raise, and how fast it sees a real shift, before it
goes live.

Why: a maintenance team that gets too many false alarms stops reading them, and every run test
added to a chart trades quicker detection for more false alarms. The in-control average run
length (ARL0, from :mod:`limitwatch.stats.arl`) turns into alarms per day, week and month at a
stream's cadence; the ARL after a shift of 1, 1.5, 2 and 3 sigma turns into a delay in readings
and in wall-clock time. :func:`search_budget` picks, among a fixed list of candidate rule sets,
the one that stays within a false-alarm budget and is quickest to see a one-sigma shift.

Every figure rests on the assumptions in :data:`ASSUMPTIONS`; output built from a plan should
show them:

* independent, normal readings with known center line and sigma (positively autocorrelated
  readings give moving-range limits that are too tight and more false alarms than planned:
  the baseline fit warns when the lag-1 autocorrelation is high);
* false alarms per period = readings per period / ARL0 (the renewal approximation: after each
  alarm every rule starts afresh; in service only the rule that fired restarts, and the alert
  lifecycle may merge repeated signals into one alert);
* delays are zero-state ARLs: the shift is there from the first reading and every rule starts
  empty; the wall-clock delay is ARL x cadence.

Three-sigma limits alone at a reading a minute: ARL0 = 1 / P(|Z| > 3), and 10,080 readings a
week; after a shift of d sigma, ARL = 1 / (P(Z > 3 - d) + P(Z < -3 - d)):

>>> p = plan_stream("beyond-limits", cadence=60.0)
>>> round(p.in_control.arl, 1), round(p.false_alarms("week"), 2)
(370.4, 27.21)
>>> [round(d.run.arl, 2) for d in p.delays], round(p.delays[0].seconds / 60, 2)
([43.89, 14.97, 6.3, 2.0], 43.89)

References
----------
Champ, C. W. & Woodall, W. H. (1987). Exact results for Shewhart control charts with
supplementary runs rules. *Technometrics* 29(4), 393-399.
Montgomery, D. C. *Introduction to Statistical Quality Control*, on the average run length and
the choice of run rules (more rules, shorter in-control ARL).
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*, and EEMUA 191,
*Alarm Systems* (alarm rates an operator can handle).
Alwan, L. C. & Roberts, H. V. (1988). Time-series modeling for statistical process control.
*Journal of Business & Economic Statistics* 6(1), 87-95 (autocorrelated data).
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

from limitwatch.stats.arl import RunLength, run_length
from limitwatch.stats.rules import RuleSpec, parse_rules

__all__ = [
    "ASSUMPTIONS",
    "CANDIDATES",
    "PERIODS",
    "SHIFTS",
    "BudgetError",
    "BudgetSearch",
    "Delay",
    "Option",
    "StreamPlan",
    "parse_budget",
    "plan_stream",
    "search_budget",
    "site_false_alarms",
]

SHIFTS: tuple[float, ...] = (1.0, 1.5, 2.0, 3.0)
"""Sustained mean shifts, in sigma, whose detection delay a plan reports."""

PERIODS: dict[str, float] = {"day": 86_400.0, "week": 7 * 86_400.0, "month": 30 * 86_400.0}
"""Seconds per reporting period; a month counts 30 days."""

ASSUMPTIONS: tuple[str, ...] = (
    "Readings are independent and normal, with the center line and sigma known exactly. "
    "Autocorrelated readings raise more false alarms than planned (the baseline fit warns "
    "when the lag-1 autocorrelation is high); skewed readings and limits from a short "
    "baseline change the figures too.",
    "False alarms per period = readings per period / in-control ARL (renewal approximation: "
    "every alarm counts as a fresh start of all rules). Alerts may be fewer: the alert "
    "lifecycle merges repeated signals.",
    "Delays are zero-state ARLs: the shift is present from the first reading and every rule "
    "starts empty. Time = ARL x cadence. A month is 30 days.",
)
"""What every figure of a plan assumes; show these with the figures."""

CANDIDATES: tuple[str, ...] = (
    "limits",
    "western-electric",
    "nelson",
    "beyond-limits",
    "limits, two-of-three-zone-a",
    "limits, four-of-five-zone-b",
    "limits, run-one-side",
    "limits, run-one-side(length=9)",
    "limits, trend",
    "limits, alternating",
    "limits, hugging-center",
    "limits, avoiding-center",
    "limits, ewma(lam=0.1, L=2.814)",
    "limits, ewma(lam=0.2, L=2.962)",
    "limits, cusum(k=0.5, h=4)",
    "limits, cusum(k=0.5, h=5)",
    "ewma(lam=0.1, L=2.814)",
    "ewma(lam=0.2, L=2.962)",
    "ewma(lam=0.1, L=3.2)",
    "cusum(k=0.5, h=4)",
    "cusum(k=0.5, h=5)",
    "cusum(k=0.5, h=6)",
    "cusum(k=0.5, h=8)",
)
"""Rule sets the budget search weighs: the presets, ``beyond-limits`` alone, every single
addition to ``limits``, and EWMA and CUSUM designs, alone and added to ``limits``. The designs
are the tabled ones (in-control ARL about 500 for the EWMA, Lucas & Saccucci 1990; 168 and 465
for the CUSUM, Montgomery) and wider ones (ARL0 in the thousands) for streams with a short
cadence, where a few hundred readings pass every day. Each text is a valid ``--rules``."""


class BudgetError(ValueError):
    """A budget that cannot be read; the message shows what works."""


@dataclass(frozen=True, slots=True)
class Delay:
    """Expected readings (``run``) and seconds from a sustained shift to its first signal."""

    shift: float
    run: RunLength
    seconds: float


@dataclass(frozen=True)
class StreamPlan:
    """The expected false alarms and detection delays of one rule set at one cadence.

    ``streams`` identical streams are planned together: per-stream figures are per stream,
    :meth:`total_false_alarms` covers them all.
    """

    name: str
    rules: str
    specs: tuple[RuleSpec, ...]
    cadence: float
    streams: int
    in_control: RunLength
    delays: tuple[Delay, ...]

    def readings(self, period: str) -> float:
        return PERIODS[period] / self.cadence

    def false_alarms(self, period: str) -> float:
        """Expected false alarms of one stream in ``period`` (day, week or month)."""
        return self.readings(period) / self.in_control.arl

    def total_false_alarms(self, period: str) -> float:
        return self.streams * self.false_alarms(period)

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "rules": self.rules,
            "rule_ids": [str(s) for s in self.specs],
            "cadence_seconds": self.cadence,
            "streams": self.streams,
            "in_control": self.in_control.to_dict(),
            "false_alarms_per_stream": {p: self.false_alarms(p) for p in PERIODS},
            "false_alarms_total": {p: self.total_false_alarms(p) for p in PERIODS},
            "delays": [
                {"shift_sigma": d.shift, "readings": d.run.arl, "seconds": d.seconds, **_run(d.run)}
                for d in self.delays
            ],
        }


def _run(r: RunLength) -> dict[str, Any]:
    return {"sd": r.sd, "method": r.method, "standard_error": r.standard_error, "runs": r.runs}


def _check_cadence(cadence: float) -> float:
    cadence = float(cadence)
    if not (math.isfinite(cadence) and cadence > 0):
        raise ValueError(f"the cadence must be a positive number of seconds, got {cadence!r}")
    return cadence


def plan_stream(
    rules: str | Iterable[RuleSpec],
    cadence: float,
    *,
    name: str = "",
    streams: int = 1,
    shifts: Sequence[float] = SHIFTS,
) -> StreamPlan:
    """Plan ``streams`` streams that share a rule set and a cadence (seconds between readings)."""
    cadence = _check_cadence(cadence)
    if streams < 1:
        raise ValueError(f"streams must be at least 1, got {streams}")
    text = rules if isinstance(rules, str) else ", ".join(str(s) for s in rules)
    specs = tuple(parse_rules(rules) if isinstance(rules, str) else rules)
    delays = []
    for shift in shifts:
        r = run_length(specs, shift)
        delays.append(Delay(float(shift), r, r.arl * cadence))
    return StreamPlan(
        name=name,
        rules=text,
        specs=specs,
        cadence=cadence,
        streams=streams,
        in_control=run_length(specs, 0.0),
        delays=tuple(delays),
    )


def site_false_alarms(plans: Iterable[StreamPlan]) -> dict[str, float]:
    """Expected false alarms of all ``plans`` together, per period."""
    plans = list(plans)
    return {p: sum(plan.total_false_alarms(p) for plan in plans) for p in PERIODS}


_BUDGET = re.compile(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*(?:(?:/|per|a)\s*(day|week|month))?\s*$")


def parse_budget(text: str | float) -> float:
    """False alarms per week from ``5/week``, ``1/day``, ``20/month`` or a plain number (per
    week).

    >>> parse_budget("5/week"), parse_budget("1/day"), parse_budget("30/month"), parse_budget(2)
    (5.0, 7.0, 7.0, 2.0)
    """
    if isinstance(text, int | float) and not isinstance(text, bool):
        value, unit = float(text), "week"
    else:
        match = _BUDGET.match(str(text))
        if match is None:
            raise BudgetError(
                f"cannot read the budget {text!r}; write false alarms per period, "
                "e.g. 5/week, 1/day or 20/month"
            )
        value, unit = float(match.group(1)), match.group(2) or "week"
    if not (math.isfinite(value) and value > 0):
        raise BudgetError(f"the budget must be a positive number of false alarms, got {text!r}")
    return value * PERIODS["week"] / PERIODS[unit]


@dataclass(frozen=True)
class Option:
    """One candidate of a budget search."""

    rules: str
    in_control: RunLength
    one_sigma: RunLength
    false_alarms_per_week: float
    fits: bool

    def to_dict(self) -> dict[str, Any]:
        return {
            "rules": self.rules,
            "in_control": self.in_control.to_dict(),
            "one_sigma": self.one_sigma.to_dict(),
            "false_alarms_per_week": self.false_alarms_per_week,
            "fits": self.fits,
        }


@dataclass(frozen=True)
class BudgetSearch:
    """Candidates weighed against a budget; ``chosen`` is None when none fits."""

    budget_per_week: float
    readings_per_week: float
    options: tuple[Option, ...]
    chosen: Option | None

    @property
    def needed_arl(self) -> float:
        """The smallest in-control ARL that fits the budget."""
        return self.readings_per_week / self.budget_per_week

    def to_dict(self) -> dict[str, Any]:
        return {
            "budget_per_week": self.budget_per_week,
            "readings_per_week": self.readings_per_week,
            "needed_in_control_arl": self.needed_arl,
            "chosen": None if self.chosen is None else self.chosen.rules,
            "options": [o.to_dict() for o in self.options],
        }


def search_budget(
    budget_per_week: float,
    readings_per_week: float,
    candidates: Iterable[str] = CANDIDATES,
) -> BudgetSearch:
    """The candidate with the shortest ARL at a one-sigma shift among those whose expected
    false alarms, ``readings_per_week / ARL0``, stay within ``budget_per_week``.

    ``readings_per_week`` counts every stream the budget covers (a site budget: the sum over
    its streams). Ties go to fewer false alarms. Options come back quickest first.

    >>> few = ["limits", "ewma(lam=0.1, L=3.2)", "cusum(k=0.5, h=8)"]
    >>> found = search_budget(2.0, 7 * 24 * 60, few)  # one stream, a reading a minute
    >>> found.chosen.rules, round(found.needed_arl)
    ('cusum(k=0.5, h=8)', 5040)
    """
    if not (math.isfinite(budget_per_week) and budget_per_week > 0):
        raise BudgetError(f"the budget must be positive, got {budget_per_week!r}")
    if not (math.isfinite(readings_per_week) and readings_per_week > 0):
        raise ValueError(f"readings per week must be positive, got {readings_per_week!r}")
    options = []
    for text in candidates:
        in_control = run_length(text, 0.0)
        alarms = readings_per_week / in_control.arl
        options.append(
            Option(text, in_control, run_length(text, 1.0), alarms, alarms <= budget_per_week)
        )
    options.sort(key=lambda o: (o.one_sigma.arl, o.false_alarms_per_week, o.rules))
    chosen = next((o for o in options if o.fits), None)
    return BudgetSearch(float(budget_per_week), float(readings_per_week), tuple(options), chosen)
