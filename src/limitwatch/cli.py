"""The ``limitwatch`` command. Thin by design: parse options, call the library, print.

Every command that reads a file reports problems as one line naming the file, line and column,
and exits with status 1; option mistakes exit with status 2 (click's convention).
"""

from __future__ import annotations

import json
from typing import Any

import click

from limitwatch import __version__
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.csvfile import InputFileError, read_rows
from limitwatch.ingest.replay import replay
from limitwatch.stats.baseline import Baseline, BaselineError, fit_baseline
from limitwatch.stats.rules import UnknownRuleError
from limitwatch.textout import num, table

FORMATS = click.Choice(["table", "json"])


class InputProblem(click.ClickException):
    """Bad input data: one clear line, exit status 1, nothing else touched."""

    exit_code = 1

    def format_message(self) -> str:
        return self.message


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="limitwatch")
def main() -> None:
    """Watch streams of individual readings with XmR charts and raise alerts on special causes.

    limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms
    required by local codes, or the judgement of qualified staff.
    """


# -- shared options ---------------------------------------------------------------------------


def _fit_options(func: Any) -> Any:
    options = [
        click.option(
            "--method",
            type=click.Choice(["mean", "median"]),
            default="mean",
            show_default=True,
            help="Sigma from the average moving range, or from the median moving range "
            "(robust to a few wild ranges).",
        ),
        click.option(
            "--lower-bound", type=float, help="Natural lower bound (e.g. 0 for downtime)."
        ),
        click.option("--upper-bound", type=float, help="Natural upper bound (e.g. 100 for %)."),
        click.option(
            "--exclude-beyond",
            is_flag=True,
            help="Drop baseline points beyond the limits (and moving ranges beyond the MR limit), "
            "refit, and repeat; every exclusion is reported.",
        ),
        click.option(
            "--max-iterations",
            type=click.IntRange(1, 50),
            default=5,
            show_default=True,
            help="Cap on refits with --exclude-beyond.",
        ),
        click.option(
            "--min-points",
            type=click.IntRange(2),
            default=10,
            show_default=True,
            help="Refuse to fit from fewer readings than this.",
        ),
    ]
    for option in reversed(options):
        func = option(func)
    return func


def _rows(file: str, value: str, time: str | None = None, stream: str | None = None) -> list[Any]:
    try:
        return list(read_rows(file, value=value, time=time, stream=stream))
    except InputFileError as exc:
        raise InputProblem(str(exc)) from None


# -- baseline ---------------------------------------------------------------------------------


@main.group()
def baseline() -> None:
    """Fit and inspect baselines (phase I limits)."""


@baseline.command("fit")
@click.argument("file", type=click.Path(dir_okay=False, allow_dash=True))
@click.option("--value", "value_col", required=True, help="Column holding the readings.")
@click.option(
    "--first", type=click.IntRange(1), help="Use only the first N readings (default: all)."
)
@_fit_options
@click.option("--spec-lower", type=float, help="Lower specification limit (for Cpk, Ppk).")
@click.option("--spec-upper", type=float, help="Upper specification limit (for Cp, Cpk, ...).")
@click.option("--format", "fmt", type=FORMATS, default="table", show_default=True)
def baseline_fit(
    file: str,
    value_col: str,
    first: int | None,
    method: str,
    lower_bound: float | None,
    upper_bound: float | None,
    exclude_beyond: bool,
    max_iterations: int,
    min_points: int,
    spec_lower: float | None,
    spec_upper: float | None,
    fmt: str,
) -> None:
    """Fit XmR limits from the readings in a CSV FILE (with a header row).

    \b
    Example:
      limitwatch baseline fit downtime.csv --value minutes --first 25 --lower-bound 0
    """
    rows = _rows(file, value_col)
    values = [row.value for row in (rows[:first] if first else rows)]
    try:
        fitted = fit_baseline(
            values,
            method=method,  # type: ignore[arg-type]
            lower_bound=lower_bound,
            upper_bound=upper_bound,
            exclude_beyond=exclude_beyond,
            max_iterations=max_iterations,
            min_points=min_points,
            spec_lower=spec_lower,
            spec_upper=spec_upper,
        )
    except (BaselineError, ValueError) as exc:
        raise InputProblem(f"{file}: {exc}") from None
    if fmt == "json":
        click.echo(json.dumps(fitted.to_dict(), indent=2))
        return
    click.echo(_baseline_text(fitted))


def _baseline_text(fitted: Baseline) -> str:
    method = "average moving range" if fitted.method == "mean" else "median moving range"
    lcl = (
        num(fitted.lcl)
        if fitted.lcl is not None
        else f"none (below the lower bound {num(fitted.lower_bound)})"
    )
    ucl = (
        num(fitted.ucl)
        if fitted.ucl is not None
        else f"none (above the upper bound {num(fitted.upper_bound)})"
    )
    lines = [
        f"Baseline from {fitted.n_used} of {fitted.n} readings, sigma from the {method}",
        "",
        f"  center line          {num(fitted.center)}",
        f"  average moving range {num(fitted.mr_bar)}",
        f"  median moving range  {num(fitted.mr_median)}",
        f"  sigma                {num(fitted.sigma)}",
        f"  upper limit (UCL)    {ucl}",
        f"  lower limit (LCL)    {lcl}",
        f"  MR upper limit       {num(fitted.mr_ucl)}",
        f"  lag-1 autocorrelation {num(fitted.lag1_autocorrelation, 3)}",
    ]
    cap = fitted.capability
    if cap is not None:
        parts = [
            f"{name} {num(getattr(cap, name.lower()), 3)}"
            for name in ("Cp", "Cpk", "Pp", "Ppk")
            if getattr(cap, name.lower()) is not None
        ]
        lines.append(f"  capability           {'  '.join(parts)}")
    if fitted.exclusions:
        lines.append("")
        lines.append("Excluded from the fit:")
        for ex in fitted.exclusions:
            lines.append(
                f"  position {ex.position}: {ex.kind} (value {num(ex.value)}, "
                f"limit {num(ex.limit)}, pass {ex.iteration})"
            )
    else:
        lines.append("  excluded             none")
    for warning in fitted.warnings:
        lines.append(f"warning: {warning}")
    return "\n".join(lines)


# -- replay -----------------------------------------------------------------------------------


@main.command("replay")
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
@_fit_options
@click.option(
    "--max-gap",
    type=float,
    help="Seconds; a moving range across a longer gap between readings is skipped.",
)
@click.option(
    "--format", "fmt", type=click.Choice(["table", "jsonl"]), default="table", show_default=True
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
    fmt: str,
) -> None:
    """Run the readings in a CSV FILE through the monitoring engine and print every signal.

    \b
    Example:
      limitwatch replay line-temps.csv --value temp_c --time ts --stream sensor --rules nelson
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
    rows = _rows(file, value_col, time=time_col, stream=stream_col)
    signals: list[dict[str, Any]] = []
    refused = 0
    for step in replay(rows, settings):
        outcome = step.outcome
        if not outcome.accepted:
            refused += 1
            click.echo(
                f"refused: {file}, line {step.row.line}: reading {num(step.row.value)} "
                f"for stream {step.row.stream!r}: {outcome.reason}",
                err=True,
            )
            continue
        if outcome.baseline_fitted and fmt == "table":
            b = step.monitor.baseline
            assert b is not None
            click.echo(
                f"baseline for {step.row.stream!r} from its first {b.n} readings: "
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
            if fmt == "jsonl":
                click.echo(json.dumps(record))
            else:
                signals.append(record)
    if fmt == "table":
        _print_signals(signals, file, refused)


def _print_signals(signals: list[dict[str, Any]], file: str, refused: int) -> None:
    if not signals:
        click.echo(f"No signals in {file}.")
        return
    rows = [
        [
            s["stream"],
            str(s["index"]),
            s["time"] if s["time"] is not None else "-",
            num(s["value"]),
            s["rule"],
            s["chart"].upper(),
            s["side"] or "",
        ]
        for s in signals
    ]
    click.echo(table(["stream", "index", "time", "value", "rule", "chart", "side"], rows))
    click.echo(f"{len(signals)} signal(s); {refused} reading(s) refused.")


# Command groups kept in their own modules register themselves on ``main`` when imported.
from limitwatch import (  # noqa: E402,F401
    cli_charts,
    cli_config,
    cli_demo,
    cli_operator,
    cli_plan,
    cli_service,
)
