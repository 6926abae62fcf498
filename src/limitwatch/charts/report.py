"""A static HTML page with every stream's chart, its current limits and its live alerts.

Why static and self-contained: the page must open from a USB stick, a file share or an e-mail
attachment on a control-room PC with no internet access. So it is one ``index.html`` with its
style inline, no scripts, no web fonts, and the chart pictures as files next to it, linked by
relative names. Everything shown is escaped; stream ids and alert notes come from the field.

This module only writes text from plain data; the caller gathers the data and draws the charts.

>>> names: set[str] = set()
>>> image_name("pack-2/downtime", names), image_name("pack-2:downtime", names)
('pack-2_downtime.png', 'pack-2_downtime-2.png')
>>> html = render_page([Section("kiln/t", "kiln_t.png", [("center", "820.1")], [])],
...                    generated="2027-01-01T00:00:00Z", source="plant.db")
>>> 'src="kiln_t.png"' in html, "<script" in html
(True, False)

References
----------
WHATWG, *HTML Living Standard* (https://html.spec.whatwg.org/): ``<table>``, ``<img>`` with
``width``/``height`` to reserve the layout, fragment links to ``id`` attributes.
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries* (cited from memory):
an alarm summary lists each active alarm with its state, priority and time.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from html import escape

from limitwatch import SAFETY_CAUTION

__all__ = ["IMAGE_SIZE", "AlertRow", "Section", "anchor", "image_name", "render_page"]

IMAGE_SIZE = (1200, 800)
"""Pixel size of the chart pictures the page shows (reserved in the layout before they load)."""


@dataclass(frozen=True, slots=True)
class AlertRow:
    """One live alert as the page shows it (text already formatted by the caller)."""

    id: int
    rule: str
    state: str
    severity: str
    opened: str
    first: str
    last_value: str
    count: int
    meaning: str


@dataclass(frozen=True, slots=True)
class Section:
    """One stream: the chart file (relative to the page, None when it could not be drawn), its
    current limits as (label, text) rows, its live alerts and one-line facts for the summary."""

    stream: str
    image: str | None
    limits: Sequence[tuple[str, str]]
    alerts: Sequence[AlertRow]
    summary: Sequence[str] = field(default=())
    note: str = ""


def image_name(stream: str, taken: set[str], suffix: str = ".png") -> str:
    """A file name for the stream's chart: letters, digits, ``.``, ``_`` and ``-`` only, unique
    among ``taken`` ignoring case (so it also works on case-insensitive file systems); the name
    is added to ``taken``."""
    base = re.sub(r"[^A-Za-z0-9._-]+", "_", stream).strip("._-") or "stream"
    name, n = base, 1
    while (name + suffix).lower() in taken:
        n += 1
        name = f"{base}-{n}"
    taken.add((name + suffix).lower())
    return name + suffix


def anchor(stream: str) -> str:
    """An ``id`` for the stream's section, stable for the same stream id.

    >>> anchor("pack-2/downtime")
    's-pack-2-downtime'
    """
    return "s-" + (re.sub(r"[^A-Za-z0-9_-]+", "-", stream).strip("-") or "stream")


_CSS = """
body { font-family: system-ui, "Segoe UI", "DejaVu Sans", sans-serif; color: #26323c;
       background: #fbfbfa; margin: 0 auto; max-width: 1240px; padding: 1.2em 1.5em 3em; }
h1 { font-size: 1.5em; margin: 0.2em 0 0.1em; }
h2 { font-size: 1.2em; margin: 2.2em 0 0.5em; padding-top: 0.8em; border-top: 1px solid #d9dde1; }
h3 { font-size: 1em; margin: 1.2em 0 0.4em; color: #4a5864; }
p.meta { color: #6b7680; margin: 0 0 1em; }
.caution { border-left: 4px solid #a0522d; background: #f7ece6; padding: 0.6em 0.9em;
           margin: 0.8em 0 1.4em; }
table { border-collapse: collapse; margin: 0.3em 0 0.8em; font-size: 0.92em; }
th, td { text-align: left; padding: 0.28em 0.8em 0.28em 0; border-bottom: 1px solid #e3e6e9;
         vertical-align: top; }
th { color: #4a5864; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.state-open { color: #b0392a; font-weight: 600; }
.state-acknowledged { color: #6d5f8c; }
img.chart { max-width: 100%; height: auto; border: 1px solid #e3e6e9; background: white; }
.none { color: #6b7680; }
a { color: #2f5573; }
"""


def _cell(text: str, cls: str = "") -> str:
    attr = f' class="{cls}"' if cls else ""
    return f"<td{attr}>{escape(text)}</td>"


def _alerts_table(alerts: Sequence[AlertRow]) -> str:
    if not alerts:
        return '<p class="none">No open or acknowledged incidents.</p>'
    head = (
        "<tr><th>incident</th><th>rules</th><th>state</th><th>severity</th><th>opened (UTC)</th>"
        "<th>first signal</th><th>last value</th><th>signals</th><th>what it means</th></tr>"
    )
    rows = [
        "<tr>"
        + _cell(str(a.id), "num")
        + _cell(a.rule)
        + _cell(a.state, f"state-{re.sub(r'[^a-z]', '', a.state)}")
        + _cell(a.severity)
        + _cell(a.opened)
        + _cell(a.first)
        + _cell(a.last_value, "num")
        + _cell(str(a.count), "num")
        + _cell(a.meaning)
        + "</tr>"
        for a in alerts
    ]
    return "<table>" + head + "".join(rows) + "</table>"


def _limits_table(rows: Sequence[tuple[str, str]]) -> str:
    if not rows:
        return '<p class="none">No baseline yet: the stream is still learning its limits.</p>'
    body = "".join(f"<tr><th>{escape(k)}</th>{_cell(v)}</tr>" for k, v in rows)
    return f"<table>{body}</table>"


def render_page(
    sections: Sequence[Section],
    *,
    generated: str,
    source: str,
    title: str = "limitwatch report",
    summary_headers: Sequence[str] = (),
) -> str:
    """The whole page as text: the caution first, a summary table linking to each stream, then
    one section per stream with its live alerts, its chart and its current limits. Two streams
    whose ids differ only in punctuation still get distinct anchors."""
    ids: list[str] = []
    for s in sections:
        ident, n = anchor(s.stream), 1
        while ident in ids:
            n += 1
            ident = f"{anchor(s.stream)}-{n}"
        ids.append(ident)
    out = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{escape(title)}</title>",
        f"<style>{_CSS}</style>",
        "</head><body>",
        f"<h1>{escape(title)}</h1>",
        f'<p class="caution"><strong>Caution.</strong> {escape(SAFETY_CAUTION)}</p>',
        f'<p class="meta">Generated {escape(generated)} from {escape(source)}; '
        f"{len(sections)} stream(s), "
        f"{sum(len(s.alerts) for s in sections)} open or acknowledged alert(s).</p>",
    ]
    if sections:
        heads = ["stream", *summary_headers, "live alerts"]
        out.append("<table><tr>" + "".join(f"<th>{escape(h)}</th>" for h in heads) + "</tr>")
        for s, ident in zip(sections, ids, strict=True):
            link = f'<td><a href="#{ident}">{escape(s.stream)}</a></td>'
            facts = "".join(_cell(f) for f in s.summary)
            out.append(f"<tr>{link}{facts}{_cell(str(len(s.alerts)), 'num')}</tr>")
        out.append("</table>")
    else:
        out.append('<p class="none">No streams have reported to this database yet.</p>')
    for s, ident in zip(sections, ids, strict=True):
        out.append(f'<h2 id="{ident}">{escape(s.stream)}</h2>')
        out.append("<h3>Open and acknowledged alerts</h3>")
        out.append(_alerts_table(s.alerts))
        if s.image is not None:
            out.append(
                f'<img class="chart" src="{escape(s.image)}" width="{IMAGE_SIZE[0]}" '
                f'height="{IMAGE_SIZE[1]}" alt="XmR chart of {escape(s.stream)}">'
            )
        if s.note:
            out.append(f'<p class="none">{escape(s.note)}</p>')
        out.append("<h3>Current limits</h3>")
        out.append(_limits_table(s.limits))
    out.append("</body></html>")
    return "\n".join(out) + "\n"
