"""``limitwatch replay``: recorded readings through the engine, every signal printed."""

from __future__ import annotations

import dataclasses
import json
from functools import partial
from typing import Any

import click

from limitwatch.cli.options import (
    AR1_HELP,
    DURATION,
    InputProblem,
    fit_options,
    format_option,
    read_csv_rows,
)
from limitwatch.engine import REFUSAL_WORDS, MonitorSettings
from limitwatch.ingest.csvfile import Row
from limitwatch.ingest.replay import replay
from limitwatch.residuals import ResidualFeed
from limitwatch.stats.autocorrelation import ESTIMATOR
from limitwatch.stats.rules import UnknownRuleError
from limitwatch.textout import num, table


@click.command("replay")
@click.argument("file", type=click.Path(dir_okay=False, allow_dash=True))
@click.option("--value", "value_col", required=True, help="Column holding the readings.")
@click.option("--time", "time_col", help="Column holding the time (epoch seconds or ISO 8601).")
@click.option("--stream", "stream_col", help="Column naming the stream of each row.")
@click.option(
    "--baseline-first",
    type=click.IntRange(2),
    default=25,
    show_default=True,
    help="Fit each stream's baseline from its first N readings, then monitor the rest.",
)
@click.option(
    "--rules",
    default="western-electric",
    show_default=True,
    help="A preset (limits, western-electric, nelson) or a comma list of rule ids.",
)
@fit_options
@click.option(
    "--max-gap",
    type=DURATION,
    help="A duration as in the config (90s, 15m, 2h) or plain seconds; a moving range across "
    "a longer gap between readings is skipped.",
)
@click.option(
    "--ar1-residuals",
    is_flag=True,
    help=AR1_HELP + " The model is fitted on each stream's baseline readings (--baseline-first); "
    "limits, rules and signals then refer to the residuals.",
)
@format_option(
    "A table for people, or JSON Lines (one object per signal) for scripts.",
    click.Choice(["table", "jsonl"]),
)
def replay_cmd(
    file: str,
    value_col: str,
    time_col: str | None,
    stream_col: str | None,
    baseline_first: int,
    rules: str,
    method: str,
    lower_bound: float | None,
    upper_bound: float | None,
    exclude_beyond: bool,
    max_iterations: int,
    min_points: int,
    max_gap: float | None,
    ar1_residuals: bool,
    fmt: str,
) -> None:
    """Run the readings in a CSV FILE through the monitoring engine and print every signal.

    --ar1-residuals is an option for autocorrelated readings (a slowly wandering temperature or
    level; the baseline fit warns when the lag-1 autocorrelation is high), whose plain XmR
    limits are too tight and raise false alarms. For each stream it fits an AR(1) model
    x_t - mu = phi (x_t-1 - mu) + e_t to the stream's first --baseline-first readings
    (conditional least squares) and charts the one-step-ahead residuals
    e_t = x_t - mu - phi (x_t-1 - mu) instead of the raw readings: the baseline, limits, run
    tests and signals are those of the residuals, and each signal also carries the raw
    reading ("reading" in JSON lines). A sustained shift shows in the residuals mostly at its
    first reading when phi is near 1. Natural bounds still apply to the raw readings.

    \b
    Examples:
      limitwatch replay line-temps.csv --value temp_c --time ts --stream sensor --rules nelson
      limitwatch replay tank-level.csv --value level --baseline-first 200 --ar1-residuals
    """
    try:
        settings = MonitorSettings(
            rules=rules,
            learn_count=baseline_first,
            method=method,  # type: ignore[arg-type]
            exclude_beyond=exclude_beyond,
            max_iterations=max_iterations,
            min_points=min(min_points, baseline_first),
            lower_bound=lower_bound,
            upper_bound=upper_bound,
            max_gap=max_gap,
        )
    except UnknownRuleError as exc:
        raise click.BadParameter(str(exc), param_hint="--rules") from None
    except ValueError as exc:
        raise click.UsageError(str(exc)) from None
    rows = read_csv_rows(file, value_col, time=time_col, stream=stream_col)
    signals: list[dict[str, Any]] = []
    refused = 0
    feed: ResidualFeed | None = None
    engine_settings = settings
    if ar1_residuals:
        feed = ResidualFeed(rows, settings, on_refused=partial(_say_refused, file))
        # Bounds belong to the raw readings (the feed refuses those beyond them); the residuals'
        # own autocorrelation is judged by the AR(1) fit, in words that fit residuals.
        engine_settings = dataclasses.replace(
            settings, lower_bound=None, upper_bound=None, autocorrelation_threshold=1.0
        )
        for stream, problem in feed.problems.items():
            click.echo(
                f"warning: {stream!r}: no AR(1) model ({problem}); its readings are left out",
                err=True,
            )
    judged: dict[str, int] = {}
    learning: dict[str, Any] = {}
    for step in replay(rows if feed is None else feed.rows(rows), engine_settings):
        outcome = step.outcome
        if outcome.accepted and outcome.phase == "monitoring":
            judged[step.row.stream] = judged.get(step.row.stream, 0) + 1
        else:
            learning.setdefault(step.row.stream, step.monitor)
        reading = step.row.value if feed is None else feed.raw[step.row.line]
        if not outcome.accepted:
            refused += 1
            click.echo(
                f"refused: {file}, line {step.row.line}: reading {num(reading)} "
                f"for stream {step.row.stream!r}: {outcome.reason}: "
                f"{REFUSAL_WORDS.get(outcome.reason or '', 'refused')}",
                err=True,
            )
            continue
        if outcome.baseline_fitted and fmt == "table":
            b = step.monitor.baseline
            assert b is not None
            if feed is not None:
                model = feed.models[step.row.stream]
                click.echo(
                    f"AR(1) for {step.row.stream!r} from its first {model.n} readings "
                    f"({ESTIMATOR}): phi {num(model.phi, 4)}, mu {num(model.mu)}; charting "
                    "its one-step-ahead residuals",
                    err=True,
                )
                for warning in model.warnings:
                    click.echo(f"warning: {step.row.stream!r}: residuals: {warning}", err=True)
            what = "baseline" if feed is None else "residual baseline"
            click.echo(
                f"{what} for {step.row.stream!r} from its first {b.n} readings: "
                f"center {num(b.center)}, limits {num(b.lcl) if b.lcl is not None else 'none'}"
                f" .. {num(b.ucl) if b.ucl is not None else 'none'}, MR limit {num(b.mr_ucl)}",
                err=True,
            )
            for warning in b.warnings:
                click.echo(f"warning: {step.row.stream!r}: {warning}", err=True)
        for signal in outcome.signals:
            record = {
                "stream": signal.stream,
                "index": signal.index,
                "line": step.row.line,
                "time": step.row.time_text if time_col else None,
                "value": signal.value,
                "rule": signal.rule,
                "chart": signal.chart,
                "side": signal.side,
                "involved": list(signal.involved),
                "center": signal.center,
                "ucl": signal.ucl,
                "lcl": signal.lcl,
                "mr": signal.mr,
                "mr_ucl": signal.mr_ucl,
            }
            if feed is not None:
                record["reading"] = reading
            if fmt == "jsonl":
                click.echo(json.dumps(record))
            else:
                signals.append(record)
    if feed is not None:
        refused += feed.refused
    unjudged = _never_judged(learning, judged, baseline_first)
    for line in unjudged:
        click.echo(f"warning: {line}", err=True)
    if not judged:
        raise InputProblem(
            f"Nothing was judged in {file}: no reading came after its stream's learning "
            f"phase, so none was tested against limits (the first --baseline-first "
            f"{baseline_first} readings of a stream fit its baseline). Give more readings or a "
            "smaller --baseline-first."
        )
    if fmt == "table":
        _print_signals(signals, file, refused, residuals=feed is not None)


def _never_judged(monitors: dict[str, Any], judged: dict[str, int], needed: int) -> list[str]:
    """Why each stream that never left learning was never judged, one line each."""
    out = []
    for stream, monitor in monitors.items():
        if stream in judged or monitor.phase != "learning":
            continue
        why = (
            f"its {monitor.count} accepted reading(s) could not fit a baseline "
            f"({monitor.last_fit_error})"
            if monitor.last_fit_error
            else f"it has {monitor.count} accepted reading(s); {needed} fit the baseline first"
        )
        out.append(f"stream {stream!r} was never judged: {why}")
    return out


def _say_refused(file: str, row: Row, reason: str) -> None:
    click.echo(
        f"refused: {file}, line {row.line}: reading {num(row.value)} "
        f"for stream {row.stream!r}: {reason}",
        err=True,
    )


def _print_signals(
    signals: list[dict[str, Any]], file: str, refused: int, *, residuals: bool = False
) -> None:
    if not signals:
        click.echo(f"No signals in {file}" + (" (AR(1) residuals)." if residuals else "."))
        return
    rows = [
        [
            s["stream"],
            str(s["index"]),
            s["time"] if s["time"] is not None else "-",
            *([num(s["reading"])] if residuals else []),
            num(s["value"]),
            s["rule"],
            s["chart"].upper(),
            s["side"] or "",
        ]
        for s in signals
    ]
    values = ["reading", "residual"] if residuals else ["value"]
    headers = ["stream", "index", "time", *values, "rule", "chart", "side"]
    # Cut names before anything else, and never the time: "2027-0…" tells nothing.
    click.echo(table(headers, rows, shorten=[0, len(headers) - 3]))
    click.echo(f"{len(signals)} signal(s); {refused} reading(s) refused.")
    if residuals:
        click.echo("Charted: one-step-ahead residuals of each stream's AR(1) model.")
