"""What a chart is made of, as plain data, and the pure helpers that lay it out (which
limits cover which readings, which flags share a label, the caption). No drawing, no I/O."""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

from limitwatch.textout import num

FORMATS: tuple[str, ...] = ("png", "svg")
INSTALL_HINT = "pip install 'limitwatch[charts]'"


class ChartsUnavailable(RuntimeError):
    """matplotlib is not installed; the message says how to install it."""


# --------------------------------------------------------------------------- plain data


@dataclass(frozen=True, slots=True)
class Point:
    """One reading to draw. ``index`` is its position in the stream (as the engine numbered
    it), ``time`` epoch seconds (UTC), ``mr`` its moving range (None for the first reading or
    one after a long gap), ``learning`` True while the baseline was still being learned."""

    index: int
    time: float
    value: float
    mr: float | None
    learning: bool


@dataclass(frozen=True, slots=True)
class LimitSet:
    """The limits readings were judged against from stream index ``start`` until the next set.

    ``version`` is the stored baseline version, or None for limits not in the baseline history
    (e.g. typed into the config). ``ucl`` / ``lcl`` are None where a natural bound switched the
    limit off. ``mr_center`` is the average (method ``mean``) or median moving range.
    ``lower_bound`` / ``upper_bound`` are the natural bounds of the reading; zone bands stop
    there. ``title`` is a short provenance for labels (``learned``, ``refit by ana``) and
    ``detail`` a longer one for the caption.
    """

    version: int | None
    start: int
    center: float
    sigma: float
    ucl: float | None
    lcl: float | None
    mr_center: float
    mr_ucl: float
    n: int
    method: str
    lower_bound: float | None = None
    upper_bound: float | None = None
    title: str = ""
    detail: str = field(default="", compare=False)

    @property
    def name(self) -> str:
        return "limits not in the history" if self.version is None else f"v{self.version}"


@dataclass(frozen=True, slots=True)
class Flag:
    """The reading at stream index ``index`` signalled ``rule`` on the ``chart`` (X or MR)."""

    index: int
    rule: str
    chart: Literal["x", "mr"] = "x"


@dataclass(frozen=True, slots=True)
class IncidentSpan:
    """An incident drawn under the readings: from its first signalling reading (``start``) to
    the reading that cleared it (``end``; None while it is live), with the rules that joined."""

    id: int
    start: float
    end: float | None
    rules: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Silence:
    """No readings from ``start`` (the last reading before) to ``end`` (the first after; None
    while the stream is still silent, drawn up to ``checked``, the last check that found it)."""

    start: float
    end: float | None
    checked: float | None = None


def silences(points: Sequence[Point], *, factor: float = 5.0) -> list[Silence]:
    """Gaps between consecutive readings longer than ``factor`` times their median interval.

    >>> pts = [Point(i, t, 1.0, None, False) for i, t in enumerate([0, 60, 120, 1800, 1860])]
    >>> silences(pts)
    [Silence(start=120, end=1800, checked=None)]
    """
    times = [p.time for p in points]
    gaps = sorted(b - a for a, b in itertools.pairwise(times) if b > a)
    if len(gaps) < 2:
        return []
    typical = gaps[len(gaps) // 2]
    return [
        Silence(a, b)
        for a, b in itertools.pairwise(times)
        if typical > 0 and b - a > factor * typical
    ]


@dataclass(frozen=True, slots=True)
class ChartData:
    """Everything one picture needs. ``points`` are in time order, ``limits`` in order of
    ``start``; ``window`` says which readings were chosen (e.g. ``newest 500 readings``)."""

    stream: str
    points: tuple[Point, ...]
    limits: tuple[LimitSet, ...] = ()
    flags: tuple[Flag, ...] = ()
    window: str = ""
    notes: tuple[str, ...] = ()
    incidents: tuple[IncidentSpan, ...] = ()
    silences: tuple[Silence, ...] = ()


# --------------------------------------------------------------------------- pure helpers


def spans(points: Sequence[Point], limits: Sequence[LimitSet]) -> list[tuple[LimitSet, int, int]]:
    """For each limit set that covers any drawn reading, the positions ``[a, b)`` in ``points``
    of the readings judged against it. Learning readings belong to no set.

    >>> pts = [Point(i, float(i), 1.0, None, False) for i in range(10, 16)]
    >>> a = LimitSet(1, 0, 1.0, 1.0, 4.0, -2.0, 1.1, 3.7, 20, "mean")
    >>> b = LimitSet(2, 13, 2.0, 1.0, 5.0, -1.0, 1.1, 3.7, 20, "mean")
    >>> [(s.version, lo, hi) for s, lo, hi in spans(pts, [a, b])]
    [(1, 0, 3), (2, 3, 6)]
    """
    ordered = sorted(limits, key=lambda s: s.start)
    out: list[tuple[LimitSet, int, int]] = []
    for k, current in enumerate(ordered):
        end = ordered[k + 1].start if k + 1 < len(ordered) else math.inf
        chosen = [
            i for i, p in enumerate(points) if not p.learning and current.start <= p.index < end
        ]
        if chosen:
            out.append((current, chosen[0], chosen[-1] + 1))
    return out


def limits_per_point(
    points: Sequence[Point], limits: Sequence[LimitSet]
) -> list[LimitSet | None]:
    """The limit set drawn for each of ``points``, in order (None for a learning reading or one
    no set covers): what the picture steps through, one entry per reading.

    >>> pts = [Point(i, float(i), 1.0, None, i < 11) for i in range(10, 14)]
    >>> a = LimitSet(1, 0, 1.0, 1.0, 4.0, -2.0, 1.1, 3.7, 20, "mean")
    >>> b = LimitSet(2, 12, 2.0, 1.0, 5.0, -1.0, 1.1, 3.7, 20, "mean")
    >>> [None if s is None else s.version for s in limits_per_point(pts, [a, b])]
    [None, 1, 2, 2]
    """
    out: list[LimitSet | None] = [None] * len(points)
    for s, a, b in spans(points, limits):
        out[a:b] = [s] * (b - a)
    return out


def flag_labels(flags: Sequence[Flag]) -> dict[tuple[int, str], tuple[str, ...]]:
    """The rule ids that fired per (stream index, chart), sorted, without repeats.

    >>> flag_labels([Flag(7, "trend"), Flag(7, "beyond-limits"), Flag(7, "mr-beyond-limit", "mr")])
    {(7, 'x'): ('beyond-limits', 'trend'), (7, 'mr'): ('mr-beyond-limit',)}
    """
    found: dict[tuple[int, str], set[str]] = {}
    for f in flags:
        found.setdefault((f.index, f.chart), set()).add(f.rule)
    return {key: tuple(sorted(rules)) for key, rules in found.items()}


def cluster_flags(
    keyed: Sequence[tuple[int, tuple[str, ...]]], gap: int = 2
) -> list[tuple[list[int], str]]:
    """Group flagged positions at most ``gap`` apart and give each group one label: every rule
    that fired in it, most frequent first, with ``×n`` when it fired on ``n`` readings. A
    sustained shift then reads as one labelled stretch instead of a pile of overlapping labels.

    >>> cluster_flags([(3, ("beyond-limits",)), (4, ("beyond-limits", "trend")), (9, ("trend",))])
    [([3, 4], 'beyond-limits ×2\\ntrend'), ([9], 'trend')]
    """
    groups: list[list[tuple[int, tuple[str, ...]]]] = []
    for pos, rules in sorted(keyed):
        if groups and pos - groups[-1][-1][0] <= gap:
            groups[-1].append((pos, rules))
        else:
            groups.append([(pos, rules)])
    out = []
    for group in groups:
        counts: dict[str, int] = {}
        for _, rules in group:
            for rule in rules:
                counts[rule] = counts.get(rule, 0) + 1
        order = sorted(counts, key=lambda r: (-counts[r], r))
        text = "\n".join(f"{r} ×{counts[r]}" if counts[r] > 1 else r for r in order)
        out.append(([pos for pos, _ in group], text))
    return out


def method_words(method: str) -> str:
    return {"mean": "average moving range", "median": "median moving range"}.get(method, method)


def _limit_text(value: float | None, bound: float | None) -> str:
    if value is not None:
        return num(value, 5)
    return f"none (natural bound {num(bound, 5)})" if bound is not None else "none"


def caption_lines(data: ChartData, *, most: int = 3) -> list[str]:
    """The caption under the picture: the numbers of each baseline drawn (newest ``most``),
    what was flagged, and notes. The safety caution is added by :func:`render`.

    >>> v1 = LimitSet(1, 0, 10.0, 0.5, 11.5, 8.5, 0.564, 1.843, 25, "mean", title="learned")
    >>> data = ChartData("line-1/scrap", (Point(0, 0.0, 10.2, None, False),), (v1,),
    ...                  (Flag(0, "beyond-limits"),))
    >>> first, flagged = caption_lines(data)
    >>> first.split(" · ")[:4]
    ['v1 learned: center 10', 'sigma 0.5', 'LCL 8.5', 'UCL 11.5']
    >>> flagged
    'flagged: 1 reading(s): beyond-limits ×1'
    """
    shown = [s for s, _, _ in spans(data.points, data.limits)]
    lines: list[str] = []
    if len(shown) > most:
        older = ", ".join(s.name for s in shown[:-most])
        lines.append(f"earlier limits in this window: {older} (see 'limitwatch baseline history')")
        shown = shown[-most:]
    for s in shown:
        head = s.name + (f" {s.title}" if s.title else "")
        lines.append(
            f"{head}: center {num(s.center, 5)} · sigma {num(s.sigma, 4)} · "
            f"LCL {_limit_text(s.lcl, s.lower_bound)} · UCL {_limit_text(s.ucl, s.upper_bound)} · "
            f"MR limit {num(s.mr_ucl, 4)}"
            + (f" · n {s.n}" if s.n > 0 else "")  # unknown (0) in a notification's chart
            + f" · sigma from the {method_words(s.method)}"
        )
    if not shown:
        learning = any(p.learning for p in data.points)
        lines.append(
            "no limits yet: the stream is still learning its baseline"
            if learning or not data.points
            else "no limits known for these readings"
        )
    indices = {p.index for p in data.points}
    labels = {k: v for k, v in flag_labels(data.flags).items() if k[0] in indices}
    if labels:
        counts: dict[str, int] = {}
        for rules in labels.values():
            for rule in rules:
                counts[rule] = counts.get(rule, 0) + 1
        readings = len({index for index, _ in labels})
        parts = ", ".join(f"{rule} ×{n}" for rule, n in sorted(counts.items()))
        lines.append(f"flagged: {readings} reading(s): {parts}")
    lines.extend(data.notes)
    return lines
