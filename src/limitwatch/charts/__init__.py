"""Pictures of one stream's XmR chart: the individuals (X) chart above the moving-range (MR) chart.

Layout: :mod:`~limitwatch.charts.data` (plain data and pure layout helpers),
:mod:`~limitwatch.charts.gather` (what a stream's chart shows, read from the store),
:mod:`~limitwatch.charts.draw` and :mod:`~limitwatch.charts.annotate` (matplotlib),
:mod:`~limitwatch.charts.style` (palette) and :mod:`~limitwatch.charts.report` (the static page).

Why drawing is apart from gathering: the picture must show exactly what the service judged, so the
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

from limitwatch.charts.data import (
    FORMATS,
    INSTALL_HINT,
    ChartData,
    ChartsUnavailable,
    Flag,
    IncidentSpan,
    LimitSet,
    Point,
    Silence,
    caption_lines,
    cluster_flags,
    flag_labels,
    limits_per_point,
    method_words,
    silences,
    spans,
)
from limitwatch.charts.draw import draw_figure, render, require_matplotlib
from limitwatch.charts.style import (
    CENTER,
    CHANGE,
    FLAG,
    INCIDENT,
    INK,
    LEARNING,
    LEARNING_BAND,
    LIMIT,
    MUTED,
    READING,
    SILENCE,
    ZONE_A,
    ZONE_B,
    ZONE_C,
)

__all__ = [
    "CENTER",
    "CHANGE",
    "FLAG",
    "FORMATS",
    "INCIDENT",
    "INK",
    "INSTALL_HINT",
    "LEARNING",
    "LEARNING_BAND",
    "LIMIT",
    "MUTED",
    "READING",
    "SILENCE",
    "ZONE_A",
    "ZONE_B",
    "ZONE_C",
    "ChartData",
    "ChartsUnavailable",
    "Flag",
    "IncidentSpan",
    "LimitSet",
    "Point",
    "Silence",
    "caption_lines",
    "cluster_flags",
    "draw_figure",
    "flag_labels",
    "limits_per_point",
    "method_words",
    "render",
    "require_matplotlib",
    "silences",
    "spans",
]
