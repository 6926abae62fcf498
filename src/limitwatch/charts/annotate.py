"""What goes on top of the charts: incident bars and silences, margin labels of the limits,
flag labels kept from overlapping, and the caption."""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from typing import Any

from limitwatch import SAFETY_CAUTION
from limitwatch.charts.data import (
    ChartData,
    LimitSet,
    caption_lines,
)
from limitwatch.charts.style import (
    FLAG,
    INCIDENT,
    INK,
    MUTED,
    SILENCE,
)
from limitwatch.textout import num


def _incidents_and_silences(
    ax: Any, mr_ax: Any, data: ChartData, at: Any, left_t: float, right_t: float
) -> None:
    """A bar under the readings for each incident (its span, labelled with its rules), and a
    hatched gap with a marker where the stream went silent."""
    from limitwatch.durations import format_elapsed

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
        words = f"silent {format_elapsed(end - gap.start)}"
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


CAPTION_WIDTH = 135
"""Characters per caption line: about the picture's width at the caption's font size, so a
long note is wrapped instead of running off the right edge."""


def _caption(fig: Any, data: ChartData) -> None:
    lines = [part for line in caption_lines(data) for part in textwrap.wrap(line, CAPTION_WIDTH)]
    y = 0.168
    for line in lines[:6]:
        fig.text(0.055, y, line, fontsize=8.5, va="top", ha="left")
        y -= 0.024
    fig.text(0.055, 0.014, SAFETY_CAUTION, fontsize=7, color=MUTED, va="bottom", ha="left")
