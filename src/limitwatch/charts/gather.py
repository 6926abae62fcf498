"""What a chart of one stream shows, gathered from the store: readings, the limits each was
judged against, the readings that signalled, incidents and silences.

Why gathering is apart from drawing: the picture must show the limits each reading was
actually judged against. Each stored reading names the baseline version that judged it (the
store numbers every version: learned, refit by an operator, typed into the config), so
:func:`limits_in_force` takes each reading's center line, limits and MR limit from that stored
version, and a window spanning a refit steps exactly where the service switched.

Readings stored before limitwatch recorded the version (a database from an older limitwatch)
fall back on what they do record: ``z = (value - center) / sigma`` under the limits in force.
For those, the stored version that reproduces the stored ``z`` is found reading by reading, and
limits no stored version reproduces are recovered from two readings' values and z-scores;
:func:`fallback_note` says so under the chart.

Each stored reading records the rules that signalled on it, and :func:`signal_flags` marks
exactly those. Readings stored before that record existed (a database from an older limitwatch)
fall back on the alerts: an alert holds its first and last signalling reading.
:func:`flags_from_alerts` marks both, and for the two rules that keep no state
(``beyond-limits``, ``mr-beyond-limit``) every reading between them that crossed the same limit,
which the rule must have signalled too.

>>> from limitwatch.store import StoredReading
>>> rs = [StoredReading("s", float(i), v, None, i, "monitoring", z, None)
...       for i, (v, z) in enumerate([(11.0, 0.5), (12.0, 1.0), (9.0, -0.5)])]
>>> [(s.version, s.start, s.center, s.sigma) for s in limits_in_force(rs, [])]
[(None, 0, 10.0, 2.0)]

References
----------
Montgomery, D. C., *Introduction to Statistical Quality Control*, on phase II monitoring against
fixed limits and revising them (a new version applies from the reading after the change).
Western Electric Co. (1956), *Statistical Quality Control Handbook* (cited from memory): a point
beyond the limits is a signal by itself, whatever came before.
"""

from __future__ import annotations

import glob
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

from limitwatch.charts.data import (
    ChartData,
    Flag,
    IncidentSpan,
    LimitSet,
    Point,
    Silence,
    silences,
)
from limitwatch.durations import DurationError, parse_duration
from limitwatch.ingest.timeparse import TimeFormatError, format_time, parse_time
from limitwatch.stats.baseline import limits_of
from limitwatch.stats.constants import D2, MR_UCL_SIGMA
from limitwatch.stats.rules import DETECTORS
from limitwatch.stats.signal import Chart
from limitwatch.store import (
    CONFIG_AUTHOR,
    Alert,
    Store,
    StoredReading,
)
from limitwatch.store import Baseline as StoredBaseline

DEFAULT_LAST = 500
"""Readings drawn when neither --since nor --last is given: enough to see runs and shifts, few
enough that each point stays visible at 1200 pixels."""

_Z_TOLERANCE = 1e-7
_LOOKAHEAD = 50
"""How far ahead to look for a second reading to recover unstored limits from."""
_EVERY_SIGNAL_MARKED = frozenset({"beyond-limits", "mr-beyond-limit"})
"""Rules that judge each reading alone, so every signal between an alert's first and last can
be found again from the stored readings."""


class NothingToChart(LookupError):
    """The stream never reported, or has no readings in the window asked for."""

    def __init__(self, stream: str, *, known: bool, window: str = "") -> None:
        self.stream = stream
        self.known = known
        super().__init__(
            f"stream {stream!r} has no stored readings in that window ({window})"
            if known
            else f"no stream {stream!r} has reported to this database"
        )


class BadSince(ValueError):
    """A ``since`` that is neither a time nor a span back from the newest reading."""


def since_time(text: str, newest: float | None) -> float:
    """An ISO 8601 time, epoch seconds, or a span with a unit (``8h``, ``2d``) counted back from
    the stream's newest reading (readings carry the sender's time, which in a replay may be far
    from today's clock).

    >>> since_time("2027-01-01T06:00:00Z", None), since_time("2h", 10_000.0)
    (1798783200.0, 2800.0)
    """
    stripped = text.strip()
    problem = BadSince(
        f"{text!r} is neither a time (ISO 8601 such as 2027-01-02T06:00:00Z, or epoch seconds) "
        "nor a span back from the newest reading (such as 8h or 2d)"
    )
    if stripped and stripped[-1].isalpha() and not stripped.upper().endswith("Z"):
        try:
            span = parse_duration(stripped)
        except DurationError:
            raise problem from None
        return (newest if newest is not None else 0.0) - span
    try:
        return parse_time(stripped)
    except TimeFormatError:
        raise problem from None


# --------------------------------------------------------------------------- gathering (pure)


def _provenance(stored: StoredBaseline) -> tuple[str, str]:
    learned = stored.created_by == "limitwatch" and stored.reason.startswith("learned")
    if learned:
        title = "learned"
    elif stored.created_by == CONFIG_AUTHOR:
        title = "typed into the config"
    else:
        title = f"refit by {stored.created_by}"
    return title, f"{stored.reason} ({format_time(math.floor(stored.created_at))})"


def stored_limit_set(stored: StoredBaseline, start: int) -> LimitSet | None:
    limits = limits_of(stored.numbers)
    if limits is None:
        return None
    title, detail = _provenance(stored)
    return LimitSet(
        version=stored.version,
        start=start,
        center=limits.center,
        sigma=limits.sigma,
        ucl=limits.ucl,
        lcl=limits.lcl,
        mr_center=limits.mr_bar if limits.method == "mean" else limits.mr_median,
        mr_ucl=limits.mr_ucl,
        n=limits.n_used,
        method=limits.method,
        lower_bound=limits.lower_bound,
        upper_bound=limits.upper_bound,
        title=title,
        detail=detail,
    )


def _reproduces(s: LimitSet, r: StoredReading) -> bool:
    assert r.z is not None
    z = (r.value - s.center) / s.sigma
    return abs(z - r.z) <= _Z_TOLERANCE * max(1.0, abs(r.z))


def _recovered(a: StoredReading, b: StoredReading) -> LimitSet | None:
    """Center and sigma from two readings judged against the same limits:
    ``value = center + z * sigma`` twice gives both."""
    assert a.z is not None and b.z is not None and a.index is not None
    if a.z == b.z:
        return None
    sigma = (b.value - a.value) / (b.z - a.z)
    if not (math.isfinite(sigma) and sigma > 0):
        return None
    center = a.value - a.z * sigma
    return LimitSet(
        version=None,
        start=a.index,
        center=center,
        sigma=sigma,
        ucl=center + 3.0 * sigma,
        lcl=center - 3.0 * sigma,
        mr_center=D2 * sigma,
        mr_ucl=MR_UCL_SIGMA * sigma,
        n=0,
        method="mean",
        title="(recovered from the readings' z-scores)",
        detail="limits not in the baseline history, e.g. typed into the config",
    )


def limits_in_force(
    readings: Sequence[StoredReading], history: Sequence[StoredBaseline]
) -> list[LimitSet]:
    """The limits each monitored reading in ``readings`` was judged against, as a list of
    :class:`~limitwatch.charts.data.LimitSet` whose ``start`` is the first reading (stream index)
    of the window judged against it.

    A reading that names its baseline version takes that stored version's numbers; a new set
    starts wherever the version changes. Readings that name none (stored before limitwatch
    recorded it), or a version missing from ``history``, get limits found from their z-scores
    (:func:`limits_from_z`); learning readings (no z) get none.
    """
    stored = {b.version: s for b in history if (s := stored_limit_set(b, 0)) is not None}
    judged = [r for r in readings if r.z is not None and r.index is not None]
    out: list[LimitSet] = []
    older: list[StoredReading] = []
    """A run of readings whose version is not recorded, waiting to be worked out from z."""
    for r in judged:
        assert r.index is not None
        found = stored.get(r.baseline_version) if r.baseline_version is not None else None
        if found is None:
            older.append(r)
            continue
        if older:
            out += limits_from_z(older, history)
            older = []
        if not out or out[-1].version != found.version:
            out.append(replace(found, start=r.index))
    if older:
        out += limits_from_z(older, history)
    return out


def fallback_note(readings: Sequence[StoredReading], history: Sequence[StoredBaseline]) -> str:
    """The chart's footnote when some monitored readings do not name a stored baseline version
    (their limits then come from :func:`limits_from_z`); empty when every one does."""
    known = {b.version for b in history}
    judged = [r for r in readings if r.z is not None and r.index is not None]
    unnamed = sum(r.baseline_version is None for r in judged)
    missing = sorted(
        {v for r in judged if (v := r.baseline_version) is not None and v not in known}
    )
    words = []
    if unnamed:
        words.append(
            f"{unnamed} reading(s) stored without the baseline version that judged them (by an "
            "older limitwatch, say)"
        )
    if missing:
        named = ", ".join(f"v{v}" for v in missing)
        words.append(f"readings judged against {named}, which the baseline history lacks")
    if not words:
        return ""
    return (
        "; ".join(words)
        + ": their limits are worked out from their stored z-scores."
    )


def limits_from_z(
    readings: Sequence[StoredReading], history: Sequence[StoredBaseline]
) -> list[LimitSet]:
    """The limits found from the readings' stored z-scores alone, for readings that do not
    name their baseline version.

    Versions only move forward, so the current version is kept while it reproduces the stored z;
    otherwise the oldest newer version that does is taken. Readings no stored version explains
    get limits recovered from themselves (see :func:`_recovered`); learning readings (no z) get
    none.
    """
    stored = [s for b in history if (s := stored_limit_set(b, 0)) is not None]
    stored.sort(key=lambda s: s.version or 0)
    judged = [r for r in readings if r.z is not None and r.index is not None]
    out: list[LimitSet] = []
    current: LimitSet | None = None
    for k, r in enumerate(judged):
        assert r.index is not None
        if current is not None and _reproduces(current, r):
            continue
        floor = (current.version or 0) if current is not None else 0
        found = next(
            (s for s in stored if (s.version or 0) > floor and _reproduces(s, r)),
            None,
        )
        if found is not None:
            current = replace(found, start=r.index)
            out.append(current)
            continue
        later = next(
            (
                s
                for q in judged[k + 1 : k + 1 + _LOOKAHEAD]
                if not any(_reproduces(v, q) for v in stored)
                and (s := _recovered(r, q)) is not None
            ),
            None,
        )
        if later is not None:
            current = later
            out.append(current)
    return out


def signal_flags(
    alerts: Sequence[Alert],
    readings: Sequence[StoredReading],
    limits: Sequence[LimitSet],
) -> list[Flag]:
    """Every rule that signalled on each reading in ``readings``, as recorded with the reading;
    for readings stored before signals were recorded, what :func:`flags_from_alerts` can tell."""
    out = [
        Flag(r.index, rule, _chart_of(rule))
        for r in readings
        if r.signals and r.index is not None
        for rule in r.signals
    ]
    older = [r for r in readings if r.signals is None]
    if older:
        out += flags_from_alerts(alerts, older, limits)
    return sorted(set(out), key=lambda f: (f.index, f.chart, f.rule))


def _chart_of(rule: str) -> Chart:
    detector = DETECTORS.get(rule)
    return "x" if detector is None else detector.chart


@dataclass(frozen=True, slots=True)
class _RuleSpan:
    """One rule's part of an incident: its first and last signalling reading."""

    rule: str
    first_index: int | None
    last_index: int | None
    signal: dict[str, Any]


def _per_rule(alerts: Sequence[Alert]) -> list[_RuleSpan]:
    """Each incident's rules as spans of their own (an incident from before rules were kept
    per incident counts as one span of its opening rule)."""
    out = []
    for a in alerts:
        if not a.rules:
            out.append(_RuleSpan(a.rule, a.first_index, a.last_index, a.signal))
        for t in a.rules.values():
            out.append(_RuleSpan(t.rule, t.first_index, t.last_index, t.signal))
    return out


def flags_from_alerts(
    alerts: Sequence[Alert],
    readings: Sequence[StoredReading],
    limits: Sequence[LimitSet],
) -> list[Flag]:
    """The readings in ``readings`` that signalled, with the rule, from the stream's alerts.

    Every alert's first and last signalling reading is marked. For ``beyond-limits`` and
    ``mr-beyond-limit``, which judge each reading alone, every reading between the two that
    crossed the same limit (``|z| > k``; ``MR / sigma > limit``) is marked as well: the rule
    cannot have let it pass.
    """
    by_index = {r.index: r for r in readings if r.index is not None}
    ordered = sorted(limits, key=lambda s: s.start)

    def sigma_at(index: int) -> float | None:
        found = None
        for s in ordered:
            if s.start <= index:
                found = s.sigma
        return found

    out: list[Flag] = []
    for a in _per_rule(alerts):
        chart: Chart = "mr" if a.signal.get("chart") == "mr" else "x"
        for index in {a.first_index, a.last_index}:
            if index is not None and index in by_index:
                out.append(Flag(index, a.rule, chart))
        if a.first_index is None or a.last_index is None:
            continue
        between = [
            r for i, r in by_index.items() if a.first_index < i < a.last_index and r.z is not None
        ]
        if a.rule == "beyond-limits":
            k = abs(a.signal.get("limit") or 3.0)
            out.extend(Flag(r.index, a.rule, "x") for r in between if abs(r.z) > k)  # type: ignore[arg-type]
        elif a.rule == "mr-beyond-limit":
            limit, sigma = a.signal.get("limit"), a.signal.get("sigma")
            k = limit / sigma if limit and sigma else MR_UCL_SIGMA
            for r in between:
                s = sigma_at(r.index)  # type: ignore[arg-type]
                if r.mr is not None and s and r.mr / s > k:
                    out.append(Flag(r.index, a.rule, "mr"))  # type: ignore[arg-type]
    return sorted(set(out), key=lambda f: (f.index, f.chart, f.rule))


def to_points(readings: Sequence[StoredReading]) -> tuple[Point, ...]:
    return tuple(
        Point(
            index=r.index if r.index is not None else i,
            time=r.time,
            value=r.value,
            mr=r.mr,
            learning=r.phase == "learning" or r.z is None,
        )
        for i, r in enumerate(readings)
    )



def gather(
    store: Store, stream: str, *, since: str | None, last: int | None, strict: bool = True
) -> ChartData:
    """The chart data of ``stream`` from the store: the chosen readings, the limits in force,
    the flagged readings. ``strict`` makes an unknown stream or an empty window an error
    (:class:`NothingToChart`)."""
    if since is None:
        wanted = last or DEFAULT_LAST
        readings = store.recent_readings(stream, last=wanted)
        window = f"newest {wanted} readings"
        if len(readings) < wanted:
            window = f"all {len(readings)} stored readings"
    else:
        everything = store.recent_readings(stream)
        start = since_time(since, everything[-1].time if everything else None)
        readings = [r for r in everything if r.time >= start]
        if last is not None:
            readings = readings[-last:]
        window = f"since {format_time(math.floor(start))}" + (
            f", newest {last}" if last is not None else ""
        )
    if strict and not readings:
        if not any(s.id == stream for s in store.streams(glob=glob.escape(stream))):
            raise NothingToChart(stream, known=False)
        raise NothingToChart(stream, known=True, window=window)
    history = store.baseline_history(stream)
    alerts = [a for a in store.alerts(stream_glob=glob.escape(stream)) if a.stream == stream]
    limits = limits_in_force(readings, history)
    notes: list[str] = []
    if fallback := fallback_note(readings, history):
        notes.append(fallback)
    if history and history[-1].version not in {s.version for s in limits}:
        notes.append(
            f"v{history[-1].version} ({history[-1].reason}) is stored but no reading drawn here "
            "was judged against it yet."
        )
    unrecorded = any(r.signals is None for r in readings)
    partial = {
        t.rule: t.signal_count
        for a in alerts
        for t in (a.rules.values() if a.rules else ())
        if unrecorded
        and t.rule not in _EVERY_SIGNAL_MARKED
        and t.signal_count > 2
        and t.first_index is not None
        and t.first_index >= (readings[0].index or 0 if readings else 0)
    }
    if partial:
        counts = ", ".join(f"{rule} {n}" for rule, n in sorted(partial.items()))
        notes.append(
            "Readings stored by an older limitwatch do not record their signals: there, run "
            f"rules mark each alert's first and last signal only; the alerts counted {counts}."
        )
    points = to_points(readings)
    gaps = silences(points)
    for a in alerts:
        if a.state != "cleared" and a.silent_since is not None:
            gaps.append(Silence(a.silent_since, None, a.last_time))
    return ChartData(
        stream=stream,
        points=points,
        limits=tuple(limits),
        flags=tuple(signal_flags(alerts, readings, limits)),
        window=window,
        notes=tuple(notes),
        incidents=tuple(
            IncidentSpan(
                a.id,
                a.first_time,
                a.seen_time if a.state == "cleared" else None,
                tuple(t.rule for t in sorted(a.rules.values(), key=lambda t: t.first_time))
                or (a.rule,),
            )
            for a in reversed(alerts)
        ),
        silences=tuple(gaps),
    )

