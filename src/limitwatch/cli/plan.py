"""``limitwatch plan``: how many false alarms a rule set will raise, and how fast it will see a
real shift, before anything is switched on.

Two ways in: ad hoc (``--cadence 1m --rules nelson [--streams 40]``) or from a service config
(``--config site.toml``: each ``[[streams]]`` entry, the defaults, or named ``--stream`` ids,
with the rules and cadence the config gives them, plus a site total). ``--budget 5/week`` adds
the search for the candidate rule set that fits the budget with the shortest delay at one
sigma (:func:`limitwatch.planner.search_budget`).

The run lengths behind the figures are kept in a JSON file in the user's cache folder
(``$XDG_CACHE_HOME/limitwatch`` or ``~/.cache/limitwatch``) so that a second call answers at
once; ``--no-cache`` leaves the file alone. A damaged file is ignored with a warning.

References
----------
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*; EEMUA 191,
*Alarm Systems* (about one alarm per ten minutes per operator as the limit of what can be
handled; common practice).
"""

from __future__ import annotations

import json
import os
import textwrap
from collections.abc import Sequence
from functools import partial
from pathlib import Path
from typing import Any

import click

from limitwatch.cli.options import (
    InputProblem,
    format_option,
)
from limitwatch.config import (
    ConfigError,
    load_config,
)
from limitwatch.durations import DurationError, format_duration, parse_duration
from limitwatch.planner import (
    ASSUMPTIONS,
    PERIODS,
    BudgetError,
    BudgetSearch,
    StreamPlan,
    parse_budget,
    plan_stream,
    search_budget,
    site_false_alarms,
)
from limitwatch.stats import arl
from limitwatch.stats.rules import RuleSpecError, parse_rules
from limitwatch.textout import num, table

CACHE_NAME = "run-lengths.json"
_wrap = partial(textwrap.wrap, width=78, break_on_hyphens=False, break_long_words=False)
MANAGEABLE_PER_DAY = 24 * 6
"""One alarm per ten minutes: beyond it, alarm management practice (ANSI/ISA-18.2, EEMUA 191)
counts the load as more than one operator can handle (common practice)."""


def cache_path() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "limitwatch" / CACHE_NAME


def _load_cache(path: Path) -> None:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return
    except (OSError, ValueError) as exc:
        click.echo(f"warning: ignoring the run-length cache {path}: {exc}", err=True)
        return
    if isinstance(data, dict):
        arl.cache_import(data)


def _save_cache(path: Path) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        tmp.write_text(json.dumps(arl.cache_export(), indent=0, sort_keys=True), encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        click.echo(f"warning: could not keep the run lengths in {path}: {exc}", err=True)


@click.command("plan")
@click.option(
    "--cadence",
    metavar="DURATION",
    help="Time between readings (ad hoc), e.g. 30s, 1m, 8h.",
)
@click.option(
    "--rules",
    metavar="RULES",
    help="A preset (limits, western-electric, nelson) or a comma list of rule ids (ad hoc; "
    "default western-electric).",
)
@click.option(
    "--streams",
    type=click.IntRange(1),
    default=1,
    show_default=True,
    help="How many streams like this (ad hoc); totals and the budget cover them all.",
)
@click.option(
    "--config",
    "config_file",
    metavar="FILE",
    type=click.Path(dir_okay=False),
    help="Plan the streams of a service config with their own rules and cadence.",
)
@click.option(
    "--stream",
    "stream_ids",
    multiple=True,
    metavar="ID",
    help="With --config: a stream id to plan (repeat for more). Without it, each [[streams]] "
    "entry and the defaults count as one stream.",
)
@click.option(
    "--budget",
    metavar="RATE",
    help="False alarms all planned streams together may raise, e.g. 5/week, 1/day, 20/month; "
    "finds the rule set that fits with the shortest delay at one sigma. With --config the "
    "default is [budget] false_alarms_per_week.",
)
@format_option()
@click.option("--no-cache", is_flag=True, help="Neither read nor write the run-length cache file.")
def plan(
    cadence: str | None,
    rules: str | None,
    streams: int,
    config_file: str | None,
    stream_ids: Sequence[str],
    budget: str | None,
    fmt: str,
    no_cache: bool,
) -> None:
    """Expected false alarms per day, week and month, and the delay to detect a 1, 1.5, 2 and
    3 sigma shift, for a rule set at a cadence, before it goes live.

    The figures assume independent, normal readings with a known center line and sigma;
    autocorrelated readings raise more false alarms than planned.

    \b
    Examples:
      limitwatch plan --cadence 1m --rules nelson
      limitwatch plan --cadence 8h --rules western-electric --streams 12 --budget 2/week
      limitwatch plan --config /etc/limitwatch/site.toml
    """
    budget_week = None
    if budget is not None:
        try:
            budget_week = parse_budget(budget)
        except BudgetError as exc:
            raise click.BadParameter(str(exc), param_hint="--budget") from None
    if config_file is None:
        if cadence is None:
            raise click.UsageError("give --cadence (and --rules), or --config FILE")
        if stream_ids:
            raise click.UsageError("--stream names streams of a config; add --config FILE")
        try:
            seconds = parse_duration(cadence)
        except DurationError as exc:
            raise click.BadParameter(str(exc), param_hint="--cadence") from None
        if seconds <= 0:
            raise click.BadParameter("the cadence must be longer than zero", param_hint="--cadence")
        text = rules or "western-electric"
        try:
            parse_rules(text)
        except RuleSpecError as exc:
            raise click.BadParameter(str(exc), param_hint="--rules") from None
        targets = [(f"{streams} stream(s)" if streams > 1 else "stream", text, seconds, streams)]
        unplanned: list[tuple[str, str]] = []
        basis = "ad hoc"
    else:
        if cadence is not None or rules is not None or streams != 1:
            raise click.UsageError(
                "--cadence, --rules and --streams are for ad hoc planning; with --config each "
                "stream's rules and cadence come from the config"
            )
        try:
            config = load_config(config_file)
        except ConfigError as exc:
            raise InputProblem(str(exc)) from None
        if budget_week is None:
            budget_week = config.budget.false_alarms_per_week
        if stream_ids:
            settings = [(sid, config.stream_settings(sid)) for sid in dict.fromkeys(stream_ids)]
            basis = "named streams"
        else:
            settings = [(e.match, config.entry_settings(i)) for i, e in enumerate(config.streams)]
            settings.append(("(defaults)", config.default_settings()))
            basis = "one stream per [[streams]] entry and one for the defaults"
        targets = []
        unplanned = []
        for name, opts in settings:
            if opts.cadence is None:
                unplanned.append((name, "no cadence in the config"))
            else:
                targets.append((name, opts.rules, float(opts.cadence), 1))

    path = None if no_cache else cache_path()
    if path is not None:
        _load_cache(path)
    plans = [
        plan_stream(text, seconds, name=name, streams=count)
        for name, text, seconds, count in targets
    ]
    search = None
    if budget_week is not None and plans:
        per_week = sum(p.streams * p.readings("week") for p in plans)
        search = search_budget(budget_week, per_week)
    if path is not None:
        _save_cache(path)

    if fmt == "json":
        out: dict[str, Any] = {
            "basis": basis,
            "assumptions": list(ASSUMPTIONS),
            "plans": [p.to_dict() for p in plans],
            "unplanned": [{"name": n, "reason": r} for n, r in unplanned],
            "site_false_alarms": site_false_alarms(plans),
            "budget": None if search is None else search.to_dict(),
        }
        click.echo(json.dumps(out, indent=2))
        return
    lines: list[str] = []
    if basis == "ad hoc":
        lines += _single(plans[0])
    else:
        lines += _site(plans, unplanned, basis)
    if search is not None:
        cadences = {p.cadence for p in plans}
        lines += ["", *_budget(search, plans, cadences.pop() if len(cadences) == 1 else None)]
    lines += ["", "Assumptions:"]
    for text in ASSUMPTIONS:
        lines += _wrap(text, initial_indent="- ", subsequent_indent="  ")
    click.echo("\n".join(lines))


# -- text output ---------------------------------------------------------------------------------


def when(seconds: float) -> str:
    """A wall-clock span in the largest unit that keeps it above one.

    >>> when(42.0), when(561.0), when(9000.0), when(3 * 86400.0)
    ('42 s', '9.35 min', '2.5 h', '3 d')
    """
    for size, unit in ((86400.0, "d"), (3600.0, "h"), (60.0, "min")):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds:.3g} s"


def _how(r: arl.RunLength) -> str:
    if r.method == "exact":
        return "exact"
    return f"sim, SE {num(r.standard_error, 2)}"


def _single(p: StreamPlan) -> list[str]:
    expanded = ", ".join(str(s) for s in p.specs)
    lines = [f"Rules: {p.rules}"]
    if expanded != p.rules:
        lines += _wrap(expanded, initial_indent="  = ", subsequent_indent="    ")
    per_day = p.readings("day")
    lines.append(
        f"Cadence: a reading every {format_duration(p.cadence)} ({num(per_day, 4)} a day), "
        + ("1 stream" if p.streams == 1 else f"{p.streams} streams")
    )
    ic = p.in_control
    lines += [
        "",
        *_wrap(
            f"In control: average run length {num(ic.arl, 4)} readings ({_how(ic)}), "
            f"a false alarm every {when(ic.arl * p.cadence)} on average per stream."
        ),
        "",
    ]
    rows = [["one stream", *(num(p.false_alarms(period), 3) for period in PERIODS)]]
    if p.streams > 1:
        rows.append(
            [f"all {p.streams} streams", *(num(p.total_false_alarms(q), 3) for q in PERIODS)]
        )
    lines.append(table(["expected false alarms", "per day", "per week", "per 30 days"], rows))
    lines += ["", "Delay to detect a sustained shift of the mean:"]
    lines.append(
        table(
            ["shift", "readings (ARL)", "SD", "time", "method"],
            [
                [
                    f"{d.shift:g} sigma",
                    num(d.run.arl, 4),
                    num(d.run.sd, 3),
                    when(d.seconds),
                    _how(d.run),
                ]
                for d in p.delays
            ],
        )
    )
    lines += _load_warning(p.total_false_alarms("day"))
    return lines


def _site(plans: list[StreamPlan], unplanned: list[tuple[str, str]], basis: str) -> list[str]:
    lines = [f"Streams planned: {basis}.", ""]
    rows = []
    for p in plans:
        one = p.delays[0] if p.delays else None
        rows.append(
            [
                p.name,
                p.rules,
                format_duration(p.cadence),
                num(p.in_control.arl, 4),
                num(p.false_alarms("week"), 3),
                "-" if one is None else when(one.seconds),
            ]
        )
    for name, reason in unplanned:
        rows.append([name, reason, "-", "-", "-", "-"])
    lines.append(table(["stream", "rules", "cadence", "ARL0", "false/wk", "1 sigma"], rows))
    site = site_false_alarms(plans)
    lines += [
        "",
        *_wrap(
            "Site total of expected false alarms: "
            + ", ".join(
                f"{num(site[p], 3)} per {p if p != 'month' else '30 days'}" for p in PERIODS
            )
            + "."
        ),
    ]
    if any(p.in_control.method == "simulated" for p in plans):
        lines.append("(some in-control ARLs are simulated: see --format json for their errors)")
    lines += _load_warning(site["day"])
    return lines


def _load_warning(per_day: float) -> list[str]:
    if per_day <= MANAGEABLE_PER_DAY:
        return []
    return _wrap(
        f"warning: {num(per_day, 3)} false alarms a day is more than one every ten minutes, "
        "beyond what alarm management practice (ANSI/ISA-18.2, EEMUA 191) counts as "
        "manageable for one operator.",
        subsequent_indent="  ",
    )


def _budget(search: BudgetSearch, plans: list[StreamPlan], cadence: float | None) -> list[str]:
    streams = sum(p.streams for p in plans)
    lines = _wrap(
        f"Budget: {num(search.budget_per_week, 3)} false alarms a week for "
        + ("1 stream" if streams == 1 else f"all {streams} streams")
        + f" ({num(search.readings_per_week, 6)} readings a week): the in-control ARL must be "
        f"at least {num(search.needed_arl, 4)} readings.",
    )
    rows = [
        [
            o.rules,
            num(o.in_control.arl, 4),
            num(o.false_alarms_per_week, 3),
            num(o.one_sigma.arl, 4),
            "yes" if o.fits else "no",
            "exact" if o.in_control.method == "exact" else "sim",
        ]
        for o in search.options
    ]
    lines += ["", table(["rule set", "ARL0", "false/wk", "1-sigma ARL", "fits", "how"], rows)]
    lines.append("")
    chosen = search.chosen
    if chosen is None:
        fewest = min(search.options, key=lambda o: o.false_alarms_per_week)
        lines += _wrap(
            f"No candidate fits. The fewest false alarms: {fewest.rules}, "
            f"{num(fewest.false_alarms_per_week, 3)} a week. A longer cadence or fewer "
            "streams per budget would help.",
        )
    else:
        lines += _wrap(
            f"Best fit: {chosen.rules} -- {num(chosen.false_alarms_per_week, 3)} false alarms "
            f"a week, and a one-sigma shift is seen after {num(chosen.one_sigma.arl, 3)} "
            "readings on average"
            + ("." if cadence is None else f" ({when(chosen.one_sigma.arl * cadence)})."),
        )
    return lines
