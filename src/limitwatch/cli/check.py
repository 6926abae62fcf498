"""``limitwatch check --config FILE``: prove a service config is usable before starting on it.

Why a separate command: the service refuses a bad config at start-up, but a deployment step
(a CI job, an Ansible handler, a person before ``systemctl restart``) should learn every
problem at once, by key path, without starting anything. ``check`` also reads every secret the
file points at, exactly as start-up will, so a missing environment variable or a secret file
that other users can read is found here rather than at 3 a.m.

Exit status 0 with a short summary when the file is usable (warnings included); 1 with every
problem, one per line, when it is not.

``check`` also says how many false alarms the configured rules should raise at their cadence
(:mod:`limitwatch.planner`, counting one stream per ``[[streams]]`` entry with a cadence and one
for ``[defaults]``, as ``limitwatch plan --config`` does), and warns -- without failing -- when
that exceeds ``[budget] false_alarms_per_week``: a rule set that cries wolf is usable, but the
people on duty will soon stop reading it.

References
----------
The Twelve-Factor App, "III. Config" (https://12factor.net/config), on keeping credentials in
the environment rather than in config files.
ANSI/ISA-18.2-2016 and EEMUA 191 on alarm rates an operator can handle (why a budget at all).
"""

from __future__ import annotations

import shlex
from typing import Any

import click

from limitwatch.cli.options import (
    InputProblem,
)
from limitwatch.config import (
    Config,
    ConfigError,
    check_files,
    check_secrets,
    load_config,
)
from limitwatch.config.units import bare_durations_in
from limitwatch.durations import format_duration
from limitwatch.site_plan import expected_false_alarms, known_streams
from limitwatch.textout import num


@click.command("check")
@click.option(
    "--config",
    "config_file",
    required=True,
    metavar="FILE",
    type=click.Path(dir_okay=False),
    help="The TOML service config to check.",
)
@click.option(
    "--file-only",
    is_flag=True,
    help="Check the file alone: do not read the secrets it points at or look for the files it "
    "names (for checking a config away from the machine that runs the service).",
)
def check(config_file: str, file_only: bool) -> None:
    """Check a service config: every problem by key path, or a summary of what it sets up.

    Also reads every secret the file points at (environment variables and secret files) the way
    start-up does, refuses secret files that other users can read, and looks for the
    certificate files and the database folder it names.

    It also gives the false alarms a week the configured rules are expected to raise at their
    cadence, and warns, without failing, when the site total exceeds [budget]
    false_alarms_per_week, or, with no budget set, when a stream is expected to raise more than
    one a week (a default, common practice). Streams are counted from the database at
    store.path when it exists (each under the first [[streams]] entry that matches it), else one
    per [[streams]] entry with a cadence and one for [defaults], as 'limitwatch plan --config'
    counts them. The figure assumes independent, normal readings; autocorrelated readings
    raise more.

    \b
    Example:
      limitwatch check --config /etc/limitwatch/site.toml
    """
    try:
        config = load_config(config_file)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None
    problems = [] if file_only else [*check_files(config), *check_secrets(config)]
    if problems:
        raise InputProblem(
            f"{ConfigError(config_file, problems)}\n(these are the secrets and files the "
            "config names, looked for on this machine; to check the file alone, away from the "
            f"machine that runs the service: limitwatch check --config {shlex.quote(config_file)} "
            "--file-only)"
        )
    click.echo(f"{config_file}: the configuration is usable.")
    click.echo("")
    for line in summary(config, secrets_checked=not file_only):
        click.echo(line)
    expected = expected_false_alarms(config, known_streams(config))
    for line in expected.lines():
        click.echo(line)
    warnings = [f"warning: {w}" for w in config.warnings()]
    warnings += [f"warning: {w}" for w in bare_durations_in(config_file)]
    warnings += expected.warnings(config_file, config.budget.false_alarms_per_week)
    if config.budget.false_alarms_per_week is None:
        warnings += expected.noisy()
    if warnings:
        click.echo("")
        for warning in warnings:
            click.echo(warning)


def summary(config: Config, *, secrets_checked: bool = True) -> list[str]:
    """A few lines per section: what the service will do with this config."""
    out: list[str] = []

    def section(title: str, lines: list[str]) -> None:
        for i, line in enumerate(lines or ["(none)"]):
            out.append(f"{title if i == 0 else '':<10} {line}")

    store = config.store
    keep = [
        f"for {format_duration(store.keep_readings_for)}"
        if store.keep_readings_for is not None
        else None,
        f"the last {store.keep_readings_per_stream} per stream"
        if store.keep_readings_per_stream is not None
        else None,
    ]
    kept = " and ".join(k for k in keep if k) or "without limit"
    section(
        "store",
        [
            f"{store.location}" + (" (shared by every service using it)" if store.shared else ""),
            f"state checkpointed every 30 s and at stop; readings kept {kept}",
        ],
    )
    service = config.service
    section(
        "service",
        [
            f"batches of up to {service.batch_max} readings or "
            f"{format_duration(service.batch_wait)}",
            "metrics and health "
            + (f"on {service.metrics_listen}" if service.metrics_listen else "off"),
        ],
    )
    streams = [f"defaults: {_stream_line(config.default_settings())}"]
    for i, entry in enumerate(config.streams):
        merged = config.entry_settings(i)
        streams.append(f"{entry.match}: {_stream_line(merged)}")
    section("streams", streams)
    section("sources", [s.describe() for s in config.sources])
    if config.bridge is not None:
        section("bridge", [config.bridge.describe()])
    section("notifiers", [f"{n.get('name')} ({n.get('type')})" for n in config.notifiers])
    routes = [
        f"{r.name}: streams {r.streams!r}, {'/'.join(r.severities)}"
        + (f" -> {', '.join(r.notifiers)}" if r.notifiers else "")
        + (f"; escalations -> {', '.join(r.escalate_to)}" if r.escalate_to else "")
        for r in config.routes
    ]
    if not routes and config.notifiers:
        routes = ["none: every notifier gets every notice but escalations"]
    section("routes", routes)
    alerts = config.alerts
    section(
        "alerts",
        [
            f"clear after {alerts.clear_after} quiet readings; reminders "
            + (
                f"every {format_duration(alerts.repeat_every)}"
                if alerts.repeat_every is not None
                else "off"
            )
            + "; escalation "
            + (
                f"after {format_duration(alerts.escalate_after)}"
                if alerts.escalate_after is not None
                else "off"
            )
        ],
    )
    if config.budget.false_alarms_per_week is not None:
        section("budget", [f"{num(config.budget.false_alarms_per_week)} false alarms a week"])
    refs = config.secret_refs()
    if refs:
        verdict = "all readable" if secrets_checked else "not read (--file-only)"
        section("secrets", [f"{len(refs)} referenced, {verdict}"])
    return out


def _stream_line(s: Any) -> str:
    parts = [s.rules, f"learn from {s.learn_count}", s.severity]
    if s.baseline is not None:
        parts.append("typed-in baseline")
    if s.lower_bound is not None:
        parts.append(f"lower bound {num(s.lower_bound)}")
    if s.upper_bound is not None:
        parts.append(f"upper bound {num(s.upper_bound)}")
    if s.cadence is not None:
        parts.append(
            f"every {format_duration(s.cadence)}, stale after {format_duration(s.stale_after_s)}"
        )
    if s.unit:
        parts.append(s.unit)
    return ", ".join(parts)


__all__ = ["check", "summary"]
