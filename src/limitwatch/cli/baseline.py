"""``limitwatch baseline``: fit limits from a CSV file, and show, list and refit a stream's
stored baseline versions."""

from __future__ import annotations

import json
import textwrap
from typing import Any

import click

from limitwatch.cli.options import (
    AR1_HELP,
    WIDTH,
    InputProblem,
    actor_name,
    clock,
    db_options,
    emit_json,
    fit_options,
    format_option,
    iso,
    iso_s,
    opened,
    read_csv_rows,
    short_num,
    stream_row,
    unknown_stream,
)
from limitwatch.stats.autocorrelation import ESTIMATOR, Ar1Fit, fit_ar1
from limitwatch.stats.baseline import Baseline, BaselineError, fit_baseline, limits_of
from limitwatch.store import Baseline as StoredBaseline
from limitwatch.store import (
    Store,
)
from limitwatch.textout import num, printable


@click.group()
def baseline() -> None:
    """Fit and inspect baselines (phase I limits)."""


@baseline.command("fit")
@click.argument("file", type=click.Path(dir_okay=False, allow_dash=True))
@click.option("--value", "value_col", required=True, help="Column holding the readings.")
@click.option(
    "--first", type=click.IntRange(1), help="Use only the first N readings (default: all)."
)
@fit_options
@click.option("--spec-lower", type=float, help="Lower specification limit (for Cpk, Ppk).")
@click.option("--spec-upper", type=float, help="Upper specification limit (for Cp, Cpk, ...).")
@click.option(
    "--ar1-residuals",
    is_flag=True,
    help=AR1_HELP + " Reports phi and the residuals' limits next to the plain fit.",
)
@format_option()
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
    rows = read_csv_rows(file, value_col)
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




def baseline_record(stored: StoredBaseline) -> dict[str, Any]:
    """The JSON object for one stored baseline version, provenance first."""
    return {
        "stream": stored.stream,
        "version": stored.version,
        "created_at": iso(stored.created_at),
        "created_by": stored.created_by,
        "reason": stored.reason,
        "method": stored.method,
        "first_index": stored.first_index,
        "last_index": stored.last_index,
        "first_time": iso(stored.first_time),
        "last_time": iso(stored.last_time),
        "excluded": list(stored.excluded),
        "numbers": stored.numbers,
    }


def _baseline_lines(stored: StoredBaseline) -> list[str]:
    """One stored version for people: who, why, from which readings, and its limits."""
    lines = [f"Baseline version {stored.version} of {printable(stored.stream)}"]

    def add(label: str, text: str) -> None:
        lines.extend(
            textwrap.wrap(
                text,
                WIDTH,
                initial_indent=f"  {label:<14}",
                subsequent_indent=" " * 16,
                break_on_hyphens=False,
            )
            or [f"  {label}"]
        )

    add("created", f"{iso_s(stored.created_at)} by {stored.created_by}")
    add("reason", stored.reason)
    method = {"mean": "average moving range", "median": "median moving range"}
    add("method", f"sigma from the {method.get(stored.method, stored.method)}")
    if stored.first_index is not None or stored.first_time is not None:
        span = f"index {_idx(stored.first_index)} to {_idx(stored.last_index)}"
        if stored.first_time is None and stored.last_time is None:
            add("readings", span)
        elif stored.first_time is None:  # stored before the first time was recorded
            add("readings", f"{span}, up to {iso_s(stored.last_time)}")
        else:
            add("readings", f"{span}, {iso_s(stored.first_time)} to {iso_s(stored.last_time)}")
    add("excluded", ", ".join(map(str, stored.excluded)) or "none")
    limits = limits_of(stored.numbers)
    if limits is None:
        add("numbers", json.dumps(stored.numbers))
        return lines
    if limits.n:
        add("used", f"{limits.n_used} of {limits.n} readings")
    add("center line", short_num(limits.center))
    mr = f"average {short_num(limits.mr_bar)}"
    if limits.mr_median == limits.mr_median:  # typed-in limits have no median (NaN)
        mr += f", median {short_num(limits.mr_median)}"
    add("moving range", mr)
    add("sigma", short_num(limits.sigma))
    add("limits", f"LCL {_limit(limits.lcl, limits.lower_bound)}, UCL {_limit(limits.ucl, None)}")
    add("MR limit", short_num(limits.mr_ucl))
    for warning in limits.warnings:
        add("warning", warning)
    return lines


def _index_of(index: int | None, position: int, indexed: bool) -> int:
    """Exclusions are recorded as stream indices (as the service records them), or as positions
    in the window when some stored reading lacks an index."""
    return int(index) if indexed and index is not None else position


def _idx(i: int | None) -> str:
    return "?" if i is None else str(i)


def _limit(value: float | None, bound: float | None) -> str:
    if value is not None:
        return short_num(value)
    return "none (beyond the natural bound)" if bound is not None else "none"


def _no_baseline(store: Store, stream: str) -> InputProblem:
    if stream_row(store, stream) is None:
        return unknown_stream(stream)
    return InputProblem(
        f"stream {stream!r} has no stored baseline yet (it may still be learning); "
        "'limitwatch baseline refit' can fit one from its stored readings"
    )


@baseline.command("show")
@click.argument("stream")
@format_option("Text for people, or JSON for scripts.")
@db_options
def baseline_show(stream: str, fmt: str, db_path: str | None, config_file: str | None) -> None:
    """Show the current baseline of STREAM: its limits and where they came from.

    With --format json the output is an object with the keys stream, version, created_at,
    created_by, reason, method, first_index, last_index, first_time, last_time, excluded
    (stream indices left out of the fit) and numbers (the fitted values).

    \b
    Example:
      limitwatch baseline show oven-1/energy
    """
    now = clock()
    with opened(db_path, config_file, now=now) as store:
        current = store.current_baseline(stream)
        if current is None:
            raise _no_baseline(store, stream)
    if fmt == "json":
        emit_json(baseline_record(current))
        return
    click.echo("\n".join(_baseline_lines(current)))


@baseline.command("history")
@click.argument("stream")
@format_option("Text for people, or JSON (a list, oldest version first) for scripts.")
@db_options
def baseline_history(stream: str, fmt: str, db_path: str | None, config_file: str | None) -> None:
    """List every baseline version of STREAM, oldest first, each with who made it, why, from
    which readings, what was left out, and its limits.

    \b
    Example:
      limitwatch baseline history pack-2/downtime
    """
    now = clock()
    with opened(db_path, config_file, now=now) as store:
        versions = store.baseline_history(stream)
        if not versions:
            raise _no_baseline(store, stream)
    if fmt == "json":
        emit_json([baseline_record(v) for v in versions])
        return
    click.echo("\n\n".join("\n".join(_baseline_lines(v)) for v in versions))


@baseline.command("refit")
@click.argument("stream")
@click.option("--reason", required=True, help="Why the limits change, for the audit trail.")
@click.option(
    "--last",
    type=click.IntRange(2),
    metavar="N",
    help="Fit from the newest N stored readings  [default: every stored reading].",
)
@click.option(
    "--method",
    type=click.Choice(["mean", "median"]),
    default="mean",
    show_default=True,
    help="Sigma from the average moving range, or from the median moving range.",
)
@click.option(
    "--exclude-beyond",
    is_flag=True,
    help="Leave out readings beyond the limits (and moving ranges beyond the MR limit), refit, "
    "and repeat; the excluded readings are recorded.",
)
@click.option(
    "--min-points",
    type=click.IntRange(2),
    default=10,
    show_default=True,
    help="Refuse to fit from fewer readings than this (after exclusions).",
)
@click.option("--by", help="Who refits  [default: your login name].")
@db_options
def baseline_refit(
    stream: str,
    reason: str,
    last: int | None,
    method: str,
    exclude_beyond: bool,
    min_points: int,
    by: str | None,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """Fit new limits for STREAM from its stored readings and store them as its next baseline
    version, with who, why, which readings and which exclusions.

    Refit after a confirmed, lasting change (a new part, a new recipe), from readings taken
    since the change: limits fitted across the change mix two processes. Natural bounds of the
    current baseline (e.g. 0 for downtime) carry over.

    \b
    Example:
      limitwatch baseline refit pack-2/downtime --last 30 --reason "new sealing jaw fitted"
    """
    now = clock()
    actor = actor_name(by)
    if not reason.strip():
        raise click.BadParameter("must say why", param_hint="--reason")
    with opened(db_path, config_file, write=True, now=now) as store:
        readings = store.recent_readings(stream, last=last)
        if not readings:
            if stream_row(store, stream) is None:
                raise unknown_stream(stream)
            raise InputProblem(f"stream {stream!r} has no stored readings to fit from")
        previous = store.current_baseline(stream)
        before = limits_of(previous.numbers) if previous is not None else None
        try:
            fitted = fit_baseline(
                [r.value for r in readings],
                method=method,  # type: ignore[arg-type]
                exclude_beyond=exclude_beyond,
                min_points=min_points,
                lower_bound=None if before is None else before.lower_bound,
                upper_bound=None if before is None else before.upper_bound,
            )
        except BaselineError as exc:
            raise InputProblem(f"cannot refit {printable(stream)}: {exc}") from None
        indexed = all(r.index is not None for r in readings)
        excluded = [_index_of(readings[p].index, p, indexed) for p in fitted.excluded]
        stored = store.add_baseline(
            stream,
            fitted.to_dict(),
            now=now,
            by=actor,
            reason=reason.strip(),
            method=method,
            first_index=readings[0].index,
            last_index=readings[-1].index,
            first_time=readings[0].time,
            last_time=readings[-1].time,
            excluded=excluded,
        )
    click.echo("\n".join(_baseline_lines(stored)))
    if previous is not None:
        click.echo(f"Replaces version {previous.version}, which stays in the history.")


# The dead-letters and notifications commands share this module's database options; they
# register themselves on ``main`` when imported, which must come after everything above.
