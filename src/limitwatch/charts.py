"""Pictures of one stream's XmR chart: the individuals (X) chart above the moving-range (MR) chart.

Why a module that only draws: the picture must show exactly what the service judged, so the
numbers come in as plain data (readings, the limits in force and from which reading, the readings
that signalled and the rule that fired) gathered by the caller; nothing here opens the database,
reads a clock or decides anything about the process. matplotlib is an optional extra
(``pip install 'limitwatch[charts]'``) and is imported only when a picture is drawn, on the Agg
canvas, without touching pyplot's global state.

What the picture shows:

* both charts share the time axis (UTC); readings of the learning phase are hollow grey circles on
  a shaded strip, monitored readings solid;
* per baseline version, the center line, the natural process limits (absent where a natural bound
  switched one off) and zones C, B and A (one, two and three sigma) as quiet bands; on the MR chart
  the average (or median) moving range and the MR upper limit. Limits step where the baseline
  changed; each change is a vertical line labelled with its version;
* readings that signalled as filled diamonds, annotated with the rule id that fired;
* a caption with the numbers of each version shown, and the safety caution.

>>> pts = [Point(i, 60.0 * i, 10.0 + (i % 3), None, i < 3) for i in range(6)]
>>> v1 = LimitSet(1, 3, center=11.0, sigma=1.0, ucl=14.0, lcl=8.0, mr_center=1.128,
...               mr_ucl=3.686, n=3, method="mean")
>>> [(s.name, first, stop) for s, first, stop in spans(pts, [v1])]
[('v1', 3, 6)]

References
----------
Wheeler, D. J. and Chambers, D. S., *Understanding Statistical Process Control* (the XmR chart
drawn as an X chart over its moving-range chart, natural process limits, zones of one sigma).
Montgomery, D. C., *Introduction to Statistical Quality Control*, chapter on control charts for
individual measurements (phase I / phase II, revised limits).
ASTM E2587, *Standard Practice for Use of Control Charts in Statistical Process Control*.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Literal

from limitwatch import SAFETY_CAUTION
from limitwatch.textout import num

__all__ = [
    "FORMATS",
    "INSTALL_HINT",
    "ChartData",
    "ChartsUnavailable",
    "Flag",
    "LimitSet",
    "Point",
    "caption_lines",
    "cluster_flags",
    "flag_labels",
    "method_words",
    "render",
    "require_matplotlib",
    "spans",
]

FORMATS: tuple[str, ...] = ("png", "svg")
INSTALL_HINT = "pip install 'limitwatch[charts]'"

# Our own quiet palette: slate for the process, clay for limits, sage/straw/blush for zones.
INK = "#26323c"
MUTED = "#7b8690"
READING = "#2f5573"
LEARNING = "#a3acb4"
LEARNING_BAND = "#f2f3f4"
CENTER = "#34454f"
LIMIT = "#a0522d"
ZONE_C = "#ecf2ee"
ZONE_B = "#f5f0e1"
ZONE_A = "#f7e6df"
INCIDENT = "#6b4c8a"
SILENCE = "#9aa4ad"
FLAG = "#c2412d"
CHANGE = "#6d5f8c"

_STYLE: dict[str, Any] = {
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "svg.fonttype": "none",  # keep text as text in SVG (searchable, selectable)
    "axes.edgecolor": "#b8bec4",
    "axes.linewidth": 0.8,
    "axes.labelcolor": INK,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "text.color": INK,
}


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


# --------------------------------------------------------------------------- drawing


def require_matplotlib() -> Any:
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
    except ImportError as exc:
        raise ChartsUnavailable(
            f"drawing charts needs matplotlib, which is not installed ({exc}); install the "
            f"charts extra: {INSTALL_HINT}"
        ) from None
    return matplotlib


def _when(t: float) -> datetime:
    return datetime.fromtimestamp(t, UTC)


def _edges(times: Sequence[float], a: int, b: int) -> tuple[float, float]:
    """The time span drawn for readings ``a .. b-1``: from halfway to the previous reading to
    halfway to the next, so consecutive spans meet without a gap or an overlap."""
    left = times[a] if a == 0 else (times[a - 1] + times[a]) / 2.0
    right = times[b - 1] if b >= len(times) else (times[b - 1] + times[b]) / 2.0
    return left, right


def _window_text(data: ChartData) -> str:
    pts = data.points
    if not pts:
        return data.window or "no readings"
    fmt = "%Y-%m-%d %H:%M"
    span = f"{_when(pts[0].time):{fmt}} to {_when(pts[-1].time):{fmt}} UTC"
    which = f"readings {pts[0].index}–{pts[-1].index}"
    return " · ".join(x for x in (data.window, which, span) if x)


def render(
    data: ChartData,
    path: str | Path,
    *,
    width_px: int = 1200,
    height_px: int = 800,
    dpi: int = 100,
) -> Path:
    """Draw ``data`` into ``path`` (``.png`` or ``.svg``, from its suffix) at ``width_px`` x
    ``height_px`` pixels and return the path. Raises :class:`ChartsUnavailable` without
    matplotlib and :class:`ValueError` for another suffix.

    The layout uses fixed figure fractions (no "tight" bounding box), so a PNG has exactly the
    size asked for.
    """
    path = Path(path)
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in FORMATS:
        raise ValueError(
            f"{path}: the chart file must end in .png or .svg, not {path.suffix or 'nothing'}"
        )
    matplotlib = require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_STYLE):
        fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi, facecolor="white")
        FigureCanvasAgg(fig)
        _draw(fig, data)
        meta: dict[str, Any] = {"Title": f"XmR chart of {data.stream}"}
        if fmt == "svg":
            meta["Date"] = None  # the same data gives the same file
        fig.savefig(path, format=fmt, dpi=dpi, facecolor="white", metadata=meta)
    return path


def _draw(fig: Any, data: ChartData) -> None:
    import matplotlib.dates as mdates
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.transforms import offset_copy

    pts = data.points
    times = [p.time for p in pts]
    where = {p.index: i for i, p in enumerate(pts)}
    placed = spans(pts, data.limits)

    fig.text(0.055, 0.962, data.stream, fontsize=14, fontweight="bold", va="center")
    fig.text(0.945, 0.962, _window_text(data), fontsize=9, color=MUTED, va="center", ha="right")

    ax = fig.add_axes((0.055, 0.475, 0.80, 0.415))
    mr_ax = fig.add_axes((0.055, 0.26, 0.80, 0.18), sharex=ax)
    for a in (ax, mr_ax):
        a.spines["top"].set_visible(False)
        a.spines["right"].set_visible(False)
        a.tick_params(length=3, width=0.6)
        a.set_facecolor("white")
    ax.set_ylabel("individual value (X)")
    mr_ax.set_ylabel("moving range (MR)")
    mr_ax.set_xlabel("time (UTC)")
    ax.tick_params(labelbottom=False)

    if not pts:
        ax.text(0.5, 0.5, "no readings in this window", transform=ax.transAxes, ha="center")
        _caption(fig, data)
        return

    def at(t: float) -> float:
        return float(mdates.date2num(_when(t)))

    x = [at(t) for t in times]
    lo_t, hi_t = times[0], times[-1]
    # A stream still silent is drawn up to the check that found it so.
    hi_t = max([hi_t] + [g.checked for g in data.silences if g.end is None and g.checked])
    pad = max((hi_t - lo_t) * 0.01, 30.0)
    ax.set_xlim(at(lo_t - pad), at(hi_t + pad))
    mr_ax.xaxis_date(tz=UTC)

    # Learning strips.
    i = 0
    while i < len(pts):
        if not pts[i].learning:
            i += 1
            continue
        j = i
        while j < len(pts) and pts[j].learning:
            j += 1
        left, right = _edges(times, i, j)
        for a in (ax, mr_ax):
            a.axvspan(at(left), at(right), color=LEARNING_BAND, lw=0, zorder=0)
        ax.text(
            at(left),
            1.0,
            " learning",
            transform=ax.get_xaxis_transform(),
            fontsize=8,
            color=MUTED,
            va="bottom",
            ha="left",
        )
        i = j

    # Limits, zones and version changes.
    y_seen = [p.value for p in pts]
    mr_seen = [p.mr for p in pts if p.mr is not None]
    for s, a, b in placed:
        left, right = _edges(times, a, b)
        xs = [at(left), at(right)]
        lo_cap = -math.inf if s.lower_bound is None else s.lower_bound
        hi_cap = math.inf if s.upper_bound is None else s.upper_bound
        for sign in (1.0, -1.0):
            for width, colour in ((1.0, ZONE_C), (2.0, ZONE_B), (3.0, ZONE_A)):
                inner = s.center + sign * (width - 1.0) * s.sigma
                outer = s.center + sign * width * s.sigma
                y0, y1 = sorted((inner, outer))
                y0, y1 = max(y0, lo_cap), min(y1, hi_cap)
                if y1 > y0:
                    ax.fill_between(xs, y0, y1, color=colour, lw=0, zorder=0.5)
        ax.plot(xs, [s.center] * 2, color=CENTER, lw=1.2, zorder=2)
        for limit in (s.ucl, s.lcl):
            if limit is not None:
                ax.plot(xs, [limit] * 2, color=LIMIT, lw=1.1, ls=(0, (5, 3)), zorder=2)
                y_seen.append(limit)
        mr_ax.plot(xs, [s.mr_center] * 2, color=CENTER, lw=1.1, zorder=2)
        mr_ax.plot(xs, [s.mr_ucl] * 2, color=LIMIT, lw=1.1, ls=(0, (5, 3)), zorder=2)
        mr_seen.append(s.mr_ucl)
        if a > 0:  # the limits changed inside the window (or learning ended)
            for axis in (ax, mr_ax):
                axis.axvline(at(left), color=CHANGE, lw=1.0, ls=(0, (2, 2)), zorder=3)
        label = s.name + (f" {s.title}" if s.title else "")
        ax.annotate(
            label,
            xy=(at(left), 1.0),
            xycoords=ax.get_xaxis_transform(),
            xytext=(3, -3),
            textcoords="offset points",
            fontsize=8,
            color=CHANGE,
            va="top",
            ha="left",
            bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "none", "alpha": 0.85},
            zorder=6,
        )

    # Readings: one line through all, learning ones hollow and grey.
    for a, b, learning in _runs([p.learning for p in pts]):
        first = a if learning or a == 0 else a - 1  # join a monitored run to the reading before
        ax.plot(
            x[first:b],
            [p.value for p in pts[first:b]],
            color=LEARNING if learning else READING,
            lw=0.9,
            zorder=3,
        )
    learn_x = [x[i] for i, p in enumerate(pts) if p.learning]
    learn_y = [p.value for p in pts if p.learning]
    mon_x = [x[i] for i, p in enumerate(pts) if not p.learning]
    mon_y = [p.value for p in pts if not p.learning]
    size = 3.4 if len(pts) <= 300 else 2.2
    ax.plot(mon_x, mon_y, ls="none", marker="o", ms=size, color=READING, zorder=4)
    ax.plot(
        learn_x,
        learn_y,
        ls="none",
        marker="o",
        ms=size,
        mfc="white",
        mec=LEARNING,
        mew=0.9,
        zorder=4,
    )
    mr_pts = [(x[i], p.mr, p.learning) for i, p in enumerate(pts) if p.mr is not None]
    if mr_pts:
        for a, b, learning in _runs([m[2] for m in mr_pts]):
            first = a if learning or a == 0 else a - 1
            mr_ax.plot(
                [m[0] for m in mr_pts[first:b]],
                [m[1] for m in mr_pts[first:b]],
                color=LEARNING if learning else READING,
                lw=0.8,
                zorder=3,
            )
        mr_ax.plot(
            [m[0] for m in mr_pts if not m[2]],
            [m[1] for m in mr_pts if not m[2]],
            ls="none",
            marker="o",
            ms=size * 0.85,
            color=READING,
            zorder=4,
        )
        mr_ax.plot(
            [m[0] for m in mr_pts if m[2]],
            [m[1] for m in mr_pts if m[2]],
            ls="none",
            marker="o",
            ms=size * 0.85,
            mfc="white",
            mec=LEARNING,
            mew=0.9,
            zorder=4,
        )

    _incidents_and_silences(ax, mr_ax, data, at, lo_t - pad, hi_t + pad)

    # Flags: a diamond on every reading that signalled, one label per cluster of them.
    centre_at: dict[int, tuple[float, float]] = {}
    for s, a, b in placed:
        for i in range(a, b):
            centre_at[i] = (s.center, s.mr_center)
    labels = flag_labels(data.flags)
    plans = []
    for chart_id, axis, seen in (("x", ax, y_seen), ("mr", mr_ax, mr_seen)):
        keyed = []
        value_of: dict[int, float] = {}
        for (index, c), rules in sorted(labels.items(), key=lambda kv: where.get(kv[0][0], -1)):
            pos = where.get(index)
            if c != chart_id or pos is None:
                continue
            y = pts[pos].value if chart_id == "x" else pts[pos].mr
            if y is not None:
                keyed.append((pos, rules))
                value_of[pos] = y
        if keyed:
            axis.plot(
                [x[pos] for pos, _ in keyed],
                [value_of[pos] for pos, _ in keyed],
                ls="none",
                marker="D",
                ms=6.2,
                mfc=FLAG,
                mec="white",
                mew=0.8,
                zorder=5,
            )
        placed_labels = []
        taken: dict[bool, list[tuple[float, float, float, float]]] = {True: [], False: []}
        char_px = 7.5 * 0.6 * fig.dpi / 72.0  # average glyph width of the label font
        for group, text in cluster_flags(keyed):
            ys = [value_of[p] for p in group]
            centre = [centre_at.get(p, (None, None))[0 if chart_id == "x" else 1] for p in group]
            above = sum((y - c) if c is not None else 0.0 for y, c in zip(ys, centre, strict=True))
            up = chart_id == "mr" or above >= 0
            lines = text.count("\n") + 1
            mid = axis.transData.transform(((x[group[0]] + x[group[-1]]) / 2.0, 0.0))[0]
            half = max(len(line) for line in text.split("\n")) * char_px / 2.0 + 4.0
            height = 10.5 * lines + 2.0
            offset = 9.0
            # First fit: lift the label above every label on the same side it would overlap.
            for left, right, low, tall in sorted(taken[up], key=lambda box: box[2]):
                beside = right < mid - half or left > mid + half
                if not beside and low < offset + height and low + tall > offset:
                    offset = low + tall + 2.0
            taken[up].append((mid - half, mid + half, offset, height))
            placed_labels.append((group, text, up, offset, lines, max(ys) if up else min(ys)))
        plans.append((axis, seen, placed_labels, chart_id == "mr"))

    # Value ranges with room for the labels, then the labels themselves.
    drawn: list[tuple[Any, bool]] = []
    for axis, seen, placed_labels, floored in plans:
        lo, hi = (min(seen), max(seen)) if seen else (0.0, 1.0)
        height_pt = axis.get_position().height * fig.get_figheight() * 72.0
        need_up = max([o + 10.5 * n + 6 for _, _, up, o, n, _ in placed_labels if up] + [0.0])
        need_down = max([o + 10.5 * n + 6 for _, _, up, o, n, _ in placed_labels if not up] + [0])
        f_up = min(0.45, 0.05 + need_up / height_pt)
        f_down = 0.0 if floored else min(0.3, 0.05 + need_down / height_pt)
        span = (hi - lo) or max(abs(hi), 1.0) * 0.1
        if floored:
            lo = 0.0
            span = hi or 1.0
        whole = span / (1.0 - f_up - f_down)
        axis.set_ylim(lo - f_down * whole, hi + f_up * whole)
        for group, text, up, offset, _lines, y in placed_labels:
            x0, x1 = x[group[0]], x[group[-1]]
            if len(group) > 1:
                lifted = offset_copy(axis.transData, fig=fig, y=5.0 if up else -5.0, units="points")
                axis.annotate(
                    "",
                    xy=(x0, y),
                    xytext=(x1, y),
                    xycoords=lifted,
                    textcoords=lifted,
                    arrowprops={
                        "arrowstyle": "|-|,widthA=0.25,widthB=0.25",
                        "color": FLAG,
                        "lw": 0.7,
                        "shrinkA": 0,
                        "shrinkB": 0,
                    },
                    annotation_clip=False,
                    zorder=5,
                )
            drawn.append(
                (_label(axis, text, ((x0 + x1) / 2.0, y), offset, up, bracket=len(group) > 1), up)
            )
    _unoverlap(fig, drawn)

    if placed:
        _margin_labels(fig, ax, mr_ax, placed[-1][0])

    locator = mdates.AutoDateLocator(tz=UTC, minticks=4, maxticks=9)
    mr_ax.xaxis.set_major_locator(locator)
    mr_ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=UTC))

    handles = [
        Line2D([], [], color=READING, marker="o", ms=4, lw=0.9, label="reading"),
        Line2D([], [], color=LEARNING, marker="o", ms=4, mfc="white", lw=0, label="learning"),
        Line2D([], [], color=FLAG, marker="D", ms=5, lw=0, label="signalled (rule id)"),
        Line2D([], [], color=CENTER, lw=1.2, label="center line"),
        Line2D([], [], color=LIMIT, lw=1.1, ls=(0, (5, 3)), label="limits"),
        Patch(color=ZONE_C, label="zone C"),
        Patch(color=ZONE_B, label="zone B"),
        Patch(color=ZONE_A, label="zone A"),
        Line2D([], [], color=CHANGE, lw=1.0, ls=(0, (2, 2)), label="baseline change"),
    ]
    fig.legend(
        handles=handles,
        loc="center left",
        bbox_to_anchor=(0.05, 0.918),
        ncol=9,
        frameon=False,
        fontsize=8,
        handlelength=1.8,
        columnspacing=1.4,
    )
    _caption(fig, data)


def _incidents_and_silences(
    ax: Any, mr_ax: Any, data: ChartData, at: Any, left_t: float, right_t: float
) -> None:
    """A bar under the readings for each incident (its span, labelled with its rules), and a
    hatched gap with a marker where the stream went silent."""
    from limitwatch.durations import format_duration

    for span in data.incidents:
        start, end = max(span.start, left_t), min(span.end or right_t, right_t)
        if end < left_t or start > right_t:
            continue
        ax.axvspan(at(start), at(max(end, start)), ymin=0.0, ymax=0.025, color=INCIDENT, lw=0,
                   zorder=6)  # fmt: skip
        if end == start:
            ax.axvline(at(start), ymin=0.0, ymax=0.04, color=INCIDENT, lw=2.0, zorder=6)
        rules = ", ".join(span.rules[:3]) + (
            f" +{len(span.rules) - 3}" if len(span.rules) > 3 else ""
        )
        ax.annotate(
            f"incident {span.id}: {rules}" + ("" if span.end else " (live)"),
            xy=(at(start), 0.025),
            xycoords=ax.get_xaxis_transform(),
            xytext=(1, 2),
            textcoords="offset points",
            fontsize=7.5,
            color=INCIDENT,
            va="bottom",
            ha="left",
            bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.85},
            zorder=6,
        )
    for gap in data.silences:
        end = gap.end if gap.end is not None else (gap.checked or right_t)
        if end <= gap.start:
            continue
        for axis in (ax, mr_ax):
            axis.axvspan(at(gap.start), at(end), facecolor="white", edgecolor=SILENCE,
                         hatch="///", lw=0, zorder=3.5)  # fmt: skip
            axis.axvline(at(gap.start), color=SILENCE, lw=1.0, ls=(0, (1, 2)), zorder=3.6)
        words = f"silent {format_duration(round(end - gap.start))}"
        if gap.end is None:
            words += ", still"
        ax.annotate(
            words,
            xy=(at(gap.start), 0.5),
            xycoords=ax.get_xaxis_transform(),
            xytext=(3, 0),
            textcoords="offset points",
            fontsize=8,
            color=INK,
            va="center",
            ha="left",
            rotation=90,
            bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": SILENCE, "alpha": 0.9},
            zorder=7,
        )


def _runs(flags: Sequence[bool]) -> list[tuple[int, int, bool]]:
    """Maximal runs of equal flags as ``(start, stop, flag)``.

    >>> _runs([True, True, False, False, False, True])
    [(0, 2, True), (2, 5, False), (5, 6, True)]
    """
    out: list[tuple[int, int, bool]] = []
    for i, f in enumerate(flags):
        if out and out[-1][2] == f:
            out[-1] = (out[-1][0], i + 1, f)
        else:
            out.append((i, i + 1, f))
    return out


def _spread(ys_px: list[float], gap: float) -> list[float]:
    """Nudge label positions (pixels, any order) apart so neighbours are at least ``gap`` apart,
    keeping their order and their mean.

    >>> _spread([100.0, 104.0, 108.0], 10.0)
    [94.0, 104.0, 114.0]
    """
    order = sorted(range(len(ys_px)), key=lambda i: ys_px[i])
    placed = [ys_px[i] for i in order]
    for k in range(1, len(placed)):
        placed[k] = max(placed[k], placed[k - 1] + gap)
    shift = (sum(ys_px) - sum(placed)) / len(placed) if placed else 0.0
    out = [0.0] * len(ys_px)
    for k, i in enumerate(order):
        out[i] = placed[k] + shift
    return out


def _margin_labels(fig: Any, ax: Any, mr_ax: Any, last: LimitSet) -> None:
    """Names and values of the newest lines in the right margin, nudged apart where the limits
    sit close together on the page; zone letters only where the zones are tall enough to read."""
    mr_name = "avg MR" if last.method == "mean" else "median MR"
    for axis, rows in (
        (
            ax,
            [
                (last.ucl, f"UCL {num(last.ucl, 5)}"),
                (last.center, f"center {num(last.center, 5)}"),
                (last.lcl, f"LCL {num(last.lcl, 5)}"),
            ],
        ),
        (
            mr_ax,
            [
                (last.mr_ucl, f"MR limit {num(last.mr_ucl, 4)}"),
                (
                    last.mr_center,
                    f"{mr_name} {num(last.mr_center, 4)}",
                ),
            ],
        ),
    ):
        rows = [(y, text) for y, text in rows if y is not None]
        px = [axis.transData.transform((0.0, y))[1] for y, _ in rows]
        moved = _spread(px, 11.0)
        inverse = axis.transAxes.inverted()
        for (_, text), y_px in zip(rows, moved, strict=True):
            y_axes = inverse.transform((0.0, y_px))[1]
            axis.text(1.022, y_axes, text, transform=axis.transAxes, fontsize=8, va="center")
    low, high = ax.get_ylim()
    sigma_px = last.sigma / (high - low) * ax.get_position().height * fig.get_figheight() * fig.dpi
    if sigma_px < 13.0:
        return
    trans = ax.get_yaxis_transform()
    for width, zone in ((0.5, "C"), (1.5, "B"), (2.5, "A")):
        for sign in (1.0, -1.0):
            y = last.center + sign * width * last.sigma
            if (last.lower_bound is None or y > last.lower_bound) and (
                last.upper_bound is None or y < last.upper_bound
            ):
                ax.text(1.006, y, zone, transform=trans, fontsize=7, color=MUTED, va="center")


def _label(
    axis: Any, text: str, xy: tuple[float, float], offset: float, up: bool, *, bracket: bool
) -> Any:
    """A rule label ``offset`` points above (or below) ``xy``; a bracket label sits on a bracket
    drawn a few points off the cluster's extreme reading, hence the small extra lift. A label
    lifted clear of another keeps a thin leader to its reading."""
    sign = 1.0 if up else -1.0
    return axis.annotate(
        text,
        xy=xy,
        xytext=(0, sign * (offset + (4.0 if bracket else 0.0))),
        textcoords="offset points",
        ha="center",
        va="bottom" if up else "top",
        fontsize=7.5,
        color=FLAG,
        linespacing=1.15,
        annotation_clip=False,
        bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.85},
        arrowprops={  # a leader, shown only once the label is lifted clear of another
            "arrowstyle": "-",
            "color": FLAG,
            "lw": 0.5,
            "alpha": 0.7 if offset > 9.0 else 0.0,
            "shrinkA": 0.0,
            "shrinkB": 7.0 if bracket else 4.0,
        },
        zorder=6,
    )


def _unoverlap(fig: Any, labels: Sequence[tuple[Any, bool]]) -> None:
    """Lift (or lower) labels that still overlap one drawn before them on the same side.

    The first placement estimates text widths and measures offsets from each cluster's own
    extreme reading, so two neighbouring clusters at different heights can still collide; here
    the real extents are measured once the value ranges are final, and a label overlapping an
    earlier one moves away from the data until it is clear.
    """
    from matplotlib.text import Text

    renderer = fig.canvas.get_renderer()
    points_per_pixel = 72.0 / fig.dpi

    def text_box(annotation: Any) -> Any:  # the text alone; an annotation's own includes its leader
        annotation.update_positions(renderer)
        return Text.get_window_extent(annotation, renderer).padded(2.0)

    done: dict[tuple[int, bool], list[Any]] = {}
    for annotation, up in labels:
        side = done.setdefault((id(annotation.axes), up), [])
        for _ in range(len(side) + 1):
            box = text_box(annotation)
            clash = [b for b in side if box.overlaps(b)]
            if not clash:
                break
            shift = max(b.y1 for b in clash) - box.y0 if up else box.y1 - min(b.y0 for b in clash)
            dx, dy = annotation.xyann
            dy += (shift + 1.0) * points_per_pixel * (1.0 if up else -1.0)
            annotation.xyann = (dx, dy)
            if annotation.arrow_patch is not None:
                annotation.arrow_patch.set_alpha(0.7)
        side.append(text_box(annotation))


def _caption(fig: Any, data: ChartData) -> None:
    lines = caption_lines(data)
    y = 0.168
    for line in lines[:5]:
        fig.text(0.055, y, line, fontsize=8.5, va="top", ha="left")
        y -= 0.024
    fig.text(0.055, 0.014, SAFETY_CAUTION, fontsize=7, color=MUTED, va="bottom", ha="left")
