"""Drawing one stream's X chart over its MR chart with matplotlib (Agg canvas, no pyplot).
matplotlib is imported only here and only when a picture is drawn."""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from limitwatch.charts.annotate import (
    _caption,
    _incidents_and_silences,
    _label,
    _margin_labels,
    _runs,
    _unoverlap,
)
from limitwatch.charts.data import (
    FORMATS,
    INSTALL_HINT,
    ChartData,
    ChartsUnavailable,
    cluster_flags,
    flag_labels,
    spans,
)
from limitwatch.charts.style import (
    _STYLE,
    CENTER,
    CHANGE,
    FLAG,
    LEARNING,
    LEARNING_BAND,
    LIMIT,
    MUTED,
    READING,
    ZONE_A,
    ZONE_B,
    ZONE_C,
)


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
        draw_figure(fig, data)
        meta: dict[str, Any] = {"Title": f"XmR chart of {data.stream}"}
        if fmt == "svg":
            meta["Date"] = None  # the same data gives the same file
        fig.savefig(path, format=fmt, dpi=dpi, facecolor="white", metadata=meta)
    return path


def draw_figure(fig: Any, data: ChartData) -> None:
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
