"""The ``limitwatch`` command. Thin by design: parse options, call the library, print.

Every command that reads a file reports problems as one line naming the file, line and column,
and exits with status 1; option mistakes exit with status 2 (click's convention).
"""

from __future__ import annotations

import dataclasses
import json
import textwrap
from collections.abc import Iterable, Iterator
from typing import Any

import click

from limitwatch import __version__
from limitwatch.durations import DurationError, parse_duration
from limitwatch.engine import REFUSAL_WORDS, MonitorSettings
from limitwatch.ingest.csvfile import InputFileError, Row, read_rows
from limitwatch.ingest.replay import replay
from limitwatch.stats.autocorrelation import ESTIMATOR, Ar1Fit, fit_ar1
from limitwatch.stats.baseline import Baseline, BaselineError, fit_baseline
from limitwatch.stats.rules import UnknownRuleError
from limitwatch.textout import num, table

FORMATS = click.Choice(["table", "json"])


class _SecondsOrDuration(click.ParamType):
    """``90s``, ``15m``, ``2h`` as the config writes durations, or a plain number of seconds."""

    name = "duration"

    def convert(
        self, value: Any, param: click.Parameter | None, ctx: click.Context | None
    ) -> float:
        if isinstance(value, float):
            return value
        try:
            return parse_duration(str(value))
        except DurationError as exc:
            self.fail(str(exc), param, ctx)


DURATION = _SecondsOrDuration()


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


AR1_HELP = (
    "For autocorrelated readings (Alwan & Roberts 1988): fit an AR(1) model "
    "x_t - mu = phi (x_t-1 - mu) + e_t to the baseline readings by conditional least squares "
    "and chart the one-step-ahead residuals e_t instead of the raw values."
)


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
@click.option(
    "--ar1-residuals",
    is_flag=True,
    help=AR1_HELP + " Reports phi and the residuals' limits next to the plain fit.",
)
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
    ar1_residuals: bool,
    fmt: str,
) -> None:
    """Fit XmR limits from the readings in a CSV FILE (with a header row).

    With --ar1-residuals the output adds an AR(1) model of the same readings (phi and mu, by
    conditional least squares) and the XmR limits of its one-step-ahead residuals
    e_t = x_t - mu - phi (x_t-1 - mu), the first reading's scaled by sqrt(1 - phi^2). Use it
    when the lag-1 autocorrelation is high: then the plain limits are too tight. In JSON the
    model and the residual limits are under the key "ar1".

    \b
    Examples:
      limitwatch baseline fit downtime.csv --value minutes --first 25 --lower-bound 0
      limitwatch baseline fit tank-level.csv --value level --ar1-residuals
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
        ar1 = (
            fit_ar1(
                values,
                method=method,  # type: ignore[arg-type]
                exclude_beyond=exclude_beyond,
                max_iterations=max_iterations,
                min_points=min_points,
            )
            if ar1_residuals
            else None
        )
    except (BaselineError, ValueError) as exc:
        raise InputProblem(f"{file}: {exc}") from None
    if fmt == "json":
        data = fitted.to_dict()
        if ar1 is not None:
            data["ar1"] = ar1.to_dict()
        click.echo(json.dumps(data, indent=2))
        return
    click.echo(_baseline_text(fitted))
    if ar1 is not None:
        click.echo("")
        click.echo(_ar1_text(ar1))


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
        lines += _warning_lines(f"warning: {warning}")
    return "\n".join(lines)


def _warning_lines(text: str) -> list[str]:
    """A warning wrapped to 80 columns, continuation lines indented."""
    return textwrap.wrap(text, 80, subsequent_indent="  ", break_on_hyphens=False)


def _ar1_text(ar1: Ar1Fit) -> str:
    b = ar1.baseline
    lines = [
        f"AR(1) model of the same {ar1.n} readings ({ESTIMATOR}):",
        "",
        f"  phi                  {num(ar1.phi, 4)}",
        f"  mean (mu)            {num(ar1.mu)}",
        f"  innovation sd        {num(ar1.innovation_sd)}",
        "",
        "Limits for its one-step-ahead residuals e_t = x_t - mu - phi (x_t-1 - mu),",
        f"from {b.n_used} of {b.n} residuals:",
        "",
        f"  center line          {num(b.center)}",
        f"  average moving range {num(b.mr_bar)}",
        f"  sigma                {num(b.sigma)}",
        f"  upper limit (UCL)    {num(b.ucl)}",
        f"  lower limit (LCL)    {num(b.lcl)}",
        f"  MR upper limit       {num(b.mr_ucl)}",
        f"  lag-1 autocorrelation {num(b.lag1_autocorrelation, 3)}",
    ]
    if b.exclusions:
        kinds = [e.kind for e in b.exclusions]
        lines.append(
            f"  excluded             {kinds.count('x-beyond-limits')} residual(s) beyond the "
            f"limits, {kinds.count('mr-beyond-limit')} moving range(s)"
        )
    for warning in (*ar1.warnings, *b.warnings):
        lines += _warning_lines(f"warning: residuals: {warning}")
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
    rows = _rows(file, value_col, time=time_col, stream=stream_col)
    signals: list[dict[str, Any]] = []
    refused = 0
    feed: _ResidualFeed | None = None
    engine_settings = settings
    if ar1_residuals:
        feed = _ResidualFeed(file, rows, settings)
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


class _ResidualFeed:
    """The rows of a replay with each value replaced by its AR(1) one-step-ahead residual.

    Each stream's model is fitted on the first ``learn_count`` readings the engine will accept
    (in time order, within the natural bounds), the same readings whose residuals the engine
    then learns its baseline from. Readings beyond a natural bound are refused here (the
    residuals have no bound); a reading the engine will refuse for its time does not move the
    filter, and a repeat of the previous reading is passed as a repeat of its residual, so the
    engine names the refusal as it would for raw readings.
    """

    def __init__(self, file: str, rows: list[Row], settings: MonitorSettings) -> None:
        self.file = file
        self.settings = settings
        self.refused = 0
        self.raw: dict[int, float] = {}
        self.models: dict[str, Ar1Fit] = {}
        self.problems: dict[str, str] = {}
        first: dict[str, list[float]] = {}
        last: dict[str, float] = {}
        for row in rows:
            if self._bound(row.value) is not None:
                continue
            before = last.get(row.stream)
            if before is not None and row.time <= before:
                continue
            last[row.stream] = row.time
            values = first.setdefault(row.stream, [])
            if len(values) < settings.learn_count:
                values.append(row.value)
        for stream, values in first.items():
            if len(values) < settings.learn_count:
                continue  # never leaves the learning phase: nothing to chart
            try:
                self.models[stream] = fit_ar1(
                    values,
                    method=settings.method,
                    exclude_beyond=settings.exclude_beyond,
                    max_iterations=settings.max_iterations,
                    min_points=settings.min_points,
                    warn_points=settings.warn_points,
                )
            except BaselineError as exc:
                self.problems[stream] = str(exc)

    def _bound(self, value: float) -> str | None:
        s = self.settings
        if s.lower_bound is not None and value < s.lower_bound:
            return "below-lower-bound"
        if s.upper_bound is not None and value > s.upper_bound:
            return "above-upper-bound"
        return None

    def rows(self, rows: Iterable[Row]) -> Iterator[Row]:
        filters = {stream: model.filter() for stream, model in self.models.items()}
        last: dict[str, tuple[float, float, float]] = {}  # time, reading, residual
        for row in rows:
            reason = self._bound(row.value)
            if reason is not None:
                self.refused += 1
                click.echo(
                    f"refused: {self.file}, line {row.line}: reading {num(row.value)} "
                    f"for stream {row.stream!r}: {reason}",
                    err=True,
                )
                continue
            if row.stream in self.problems:
                continue
            self.raw[row.line] = row.value
            f = filters.get(row.stream)
            if f is None:  # too few readings ever to fit a baseline
                yield row
                continue
            before = last.get(row.stream)
            if before is not None and row.time <= before[0]:
                repeat = row.time == before[0] and row.value == before[1]
                value = before[2] if repeat else f.peek(row.value)
            else:
                value = f.update(row.value)
                last[row.stream] = (row.time, row.value, value)
            yield dataclasses.replace(row, value=value)


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


# Command groups kept in their own modules register themselves on ``main`` when imported.
from limitwatch import (  # noqa: E402,F401
    cli_bench,
    cli_charts,
    cli_config,
    cli_demo,
    cli_operator,
    cli_plan,
    cli_service,
)
