"""``limitwatch chart`` and ``limitwatch report``: pictures of what the service judged.

The pictures are gathered by :mod:`limitwatch.charts.gather` and drawn by
:mod:`limitwatch.charts.draw`; the database is found as the operator commands find it
(``--db``, ``--config``, ``$LIMITWATCH_DB``, ``./limitwatch.db``) and opened read-only through
:func:`limitwatch.cli.options.opened`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from limitwatch import charts
from limitwatch.alerts.lifecycle import rule_words
from limitwatch.charts.gather import (
    DEFAULT_LAST,
    BadSince,
    NothingToChart,
    since_time,
    stored_limit_set,
)
from limitwatch.charts.gather import gather as gather_chart
from limitwatch.charts.report import IMAGE_SIZE, AlertRow, Section, image_name, render_page
from limitwatch.cli.options import (
    InputProblem,
    clock,
    db_options,
    iso_s,
    opened,
    unknown_stream,
)
from limitwatch.store import (
    Alert,
    Store,
)
from limitwatch.store import Baseline as StoredBaseline
from limitwatch.textout import num


def parse_since(text: str, newest: float | None) -> float:
    """``--since``: see :func:`limitwatch.charts.gather.since_time`.

    >>> parse_since("2027-01-01T06:00:00Z", None), parse_since("2h", 10_000.0)
    (1798783200.0, 2800.0)
    """
    try:
        return since_time(text, newest)
    except BadSince as exc:
        raise click.BadParameter(str(exc), param_hint="--since") from None


def gather(
    store: Store, stream: str, *, since: str | None, last: int | None, strict: bool = True
) -> charts.ChartData:
    """:func:`limitwatch.charts.gather.gather`, its refusals as the command's errors."""
    try:
        return gather_chart(store, stream, since=since, last=last, strict=strict)
    except BadSince as exc:
        raise click.BadParameter(str(exc), param_hint="--since") from None
    except NothingToChart as exc:
        raise (InputProblem(str(exc)) if exc.known else unknown_stream(stream)) from None


def _draw(data: charts.ChartData, path: Path) -> None:
    try:
        charts.render(data, path, width_px=IMAGE_SIZE[0], height_px=IMAGE_SIZE[1])
    except charts.ChartsUnavailable as exc:
        raise InputProblem(str(exc)) from None
    except OSError as exc:
        raise InputProblem(f"cannot write {path}: {exc.strerror or exc}") from None


def _need_matplotlib() -> None:
    try:
        charts.require_matplotlib()
    except charts.ChartsUnavailable as exc:
        raise InputProblem(str(exc)) from None


# --------------------------------------------------------------------------- commands


_since_option = click.option(
    "--since",
    metavar="TIME",
    help="Only readings at or after TIME: ISO 8601 (2027-01-02T06:00:00Z), epoch seconds, or a "
    "span back from the stream's newest reading (8h, 2d).",
)


@click.command("chart")
@click.argument("stream")
@_since_option
@click.option(
    "--last",
    type=click.IntRange(1),
    metavar="N",
    help=f"Only the newest N readings (of those since --since)  [default: {DEFAULT_LAST} "
    "without --since].",
)
@click.option(
    "-o",
    "--output",
    required=True,
    type=click.Path(dir_okay=False),
    help="The picture to write: FILE.png or FILE.svg.",
)
@db_options
def chart_cmd(
    stream: str,
    since: str | None,
    last: int | None,
    output: str,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """Draw the XmR chart of STREAM: the X chart over the moving-range chart, with the limits in
    force (stepping where the baseline changed), zones A/B/C, the readings that signalled
    marked with their rule, and the numbers in a caption.

    Needs the charts extra: pip install 'limitwatch[charts]'.

    \b
    Examples:
      limitwatch chart pack-2/downtime -o pack-2.png
      limitwatch chart comp-a/discharge-temp --since 12h -o comp-a.svg
    """
    path = Path(output)
    if path.suffix.lower() not in (".png", ".svg"):
        raise click.BadParameter(
            f"{output!r} must end in .png or .svg (the suffix picks the format)",
            param_hint="-o/--output",
        )
    _need_matplotlib()
    with opened(db_path, config_file, now=clock()) as store:
        data = gather(store, stream, since=since, last=last)
    if path.parent != Path():
        path.parent.mkdir(parents=True, exist_ok=True)
    _draw(data, path)
    names = [s.name for s, _, _ in charts.spans(data.points, data.limits)]
    versions = f"limits {', '.join(names)}" if names else "no limits yet"
    flagged = len({f.index for f in data.flags})
    click.echo(
        f"Wrote {path}: {len(data.points)} readings of {stream} ({data.window}), "
        f"{versions}, {flagged} reading(s) flagged."
    )


def _limit_rows(stored: StoredBaseline | None) -> list[tuple[str, str]]:
    if stored is None:
        return []
    s = stored_limit_set(stored, 0)
    if s is None:
        return [("version", f"v{stored.version}"), ("numbers", str(stored.numbers))]
    return [
        ("version", f"v{stored.version}, {s.title}, {iso_s(stored.created_at)}"),
        ("reason", stored.reason),
        ("center line", num(s.center, 5)),
        ("sigma", num(s.sigma, 4)),
        ("UCL", num(s.ucl, 5) if s.ucl is not None else "none (beyond the natural bound)"),
        ("LCL", num(s.lcl, 5) if s.lcl is not None else "none (beyond the natural bound)"),
        ("MR upper limit", num(s.mr_ucl, 4)),
        ("readings used", str(s.n)),
        ("method", f"sigma from the {charts.method_words(s.method)}"),
    ]


def _alert_row(a: Alert) -> AlertRow:
    at = "" if a.first_index is None else f"reading {a.first_index}, "
    return AlertRow(
        id=a.id,
        rule=", ".join(t.rule for t in sorted(a.rules.values(), key=lambda t: t.first_time))
        or a.rule,
        state=a.state,
        severity=a.severity,
        opened=iso_s(a.opened_at),
        first=f"{at}{iso_s(a.first_time)}",
        last_value=num(a.last_value, 5),
        count=a.signal_count,
        meaning=rule_words(a.rule),
    )


@click.command("report")
@click.option(
    "--out",
    "out_dir",
    required=True,
    type=click.Path(file_okay=False),
    help="Folder for index.html and the chart pictures (created if needed).",
)
@click.option(
    "--stream",
    "stream_glob",
    metavar="GLOB",
    help="Only streams whose id matches GLOB (shell-style, case-sensitive)  [default: all].",
)
@click.option(
    "--last",
    type=click.IntRange(1),
    default=DEFAULT_LAST,
    show_default=True,
    metavar="N",
    help="Readings per chart (the newest N).",
)
@db_options
def report_cmd(
    out_dir: str,
    stream_glob: str | None,
    last: int,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """Write a static HTML page (DIR/index.html) with every stream's chart, its current limits
    and its open and acknowledged alerts. The page needs no network: no scripts, no web fonts,
    the pictures are PNG files next to it.

    Needs the charts extra: pip install 'limitwatch[charts]'.

    \b
    Example:
      limitwatch report --out plant-report
    """
    _need_matplotlib()
    now = clock()
    gathered: list[tuple[charts.ChartData, StoredBaseline | None, list[Alert], Any]] = []
    with opened(db_path, config_file, now=now) as store:
        source = store.path
        rows = store.streams(glob=stream_glob)
        live = store.live_alerts([r.id for r in rows])
        for row in rows:
            data = gather(store, row.id, since=None, last=last, strict=False)
            mine = [a for a in live if a.stream == row.id]
            gathered.append((data, store.current_baseline(row.id), mine, row))
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    taken: set[str] = {"index.html"}
    sections: list[Section] = []
    for data, current, mine, row in gathered:
        name = image_name(row.id, taken)
        _draw(data, out / name)
        sections.append(
            Section(
                stream=row.id,
                image=name,
                limits=_limit_rows(current),
                alerts=[_alert_row(a) for a in sorted(mine, key=lambda a: a.id)],
                summary=[
                    num(row.last_value, 5),
                    iso_s(row.last_time),
                    row.phase or "-",
                    "-" if current is None else f"v{current.version}",
                ],
            )
        )
    page = render_page(
        sections,
        generated=iso_s(now),
        source=source,
        summary_headers=["last value", "last reading (UTC)", "phase", "baseline"],
    )
    index = out / "index.html"
    index.write_text(page, encoding="utf-8")
    alerts = sum(len(s.alerts) for s in sections)
    click.echo(
        f"Wrote {index} with {len(sections)} stream chart(s) and {alerts} open or acknowledged "
        "alert(s); open it in a browser, no network needed."
    )
