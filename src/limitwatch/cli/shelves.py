"""``limitwatch shelve`` and ``unshelve``: hold an incident's notifications for planned work."""

from __future__ import annotations

from fnmatch import fnmatchcase

import click

from limitwatch import SAFETY_CAUTION
from limitwatch.cli.options import (
    WIDTH,
    InputProblem,
    UnitDuration,
    actor_name,
    clock,
    db_options,
    iso_s,
    opened,
    wrap_text,
)
from limitwatch.config import (
    ConfigError,
    load_config,
)
from limitwatch.durations import format_duration, short_duration
from limitwatch.stats import rules
from limitwatch.store import (
    NotShelved,
    Shelf,
    Store,
    StoreError,
)
from limitwatch.textout import printable

RULE_IDS: tuple[str, ...] = tuple(sorted(rules.RULE_IDS))
"""Rule ids an operator may shelve: every detector plus the stale-stream check."""


_rule_option = click.option(
    "--rule",
    type=click.Choice(RULE_IDS),
    metavar="RULE",
    help="Only this rule of the stream  [default: every rule]. Rule ids: "
    + ", ".join(RULE_IDS)
    + ".",
)


MAX_SHELF_S = 7 * 86400.0
"""The longest shelf without --force, unless the config's ``[alerts] max_shelf`` says
otherwise: a shelf forgotten for weeks silences a stream nobody is watching any more."""


def _max_shelf(config_file: str | None) -> float:
    if config_file is None:
        return MAX_SHELF_S
    try:
        return float(load_config(config_file).alerts.max_shelf)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None


def _matching_streams(store: Store, pattern: str) -> list[str]:
    """Known streams matching ``pattern`` (a shell-style glob; a plain id matches itself)."""
    found = [s.id for s in store.streams(glob=pattern)]
    if not found:
        raise InputProblem(
            f"no stream matching {pattern!r} has reported to this database; "
            "'limitwatch streams' lists the known ones"
        )
    return sorted(found)


@click.command("shelve")
@click.argument("pattern", metavar="STREAM_GLOB")
@_rule_option
@click.option(
    "--for",
    "duration",
    required=True,
    type=UnitDuration(),
    help="How long to hold notifications, e.g. 90m, 8h, 2d or 1h30m.",
)
@click.option("--reason", required=True, help="Why, for the audit trail.")
@click.option("--by", help="Who shelves  [default: your login name].")
@click.option(
    "--force", is_flag=True, help="Allow a shelf longer than the maximum (alerts.max_shelf)."
)
@db_options
def shelve_cmd(
    pattern: str,
    rule: str | None,
    duration: float,
    reason: str,
    by: str | None,
    force: bool,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """Hold notifications for the streams matching STREAM_GLOB (or one rule of them) for a
    while, e.g. during planned maintenance.

    STREAM_GLOB is a stream id or a shell-style glob ('pack-2/*'); the streams it covers now
    are listed and each gets its own shelf, recorded with the glob. Incidents are still
    opened, counted and cleared, and their logs say that a shelf held their notifications;
    when the shelf ends, anything still owed is sent once. A shelf longer than the maximum
    (7 days, or alerts.max_shelf of --config) is refused unless --force. Shelving a stream
    that has a shelf for the same rule replaces that shelf, and says whether it extends or
    shortens it. 'limitwatch unshelve' ends shelves early.

    \b
    Examples:
      limitwatch shelve pack-2/downtime --for 8h --reason "sealing jaw replacement"
      limitwatch shelve 'oven-*' --rule stale --for 2d --reason "gateway firmware update"
    """
    now = clock()
    actor = actor_name(by)
    longest = _max_shelf(config_file)
    if duration > longest and not force:
        raise InputProblem(
            f"a shelf of {format_duration(duration)} is longer than the maximum of "
            f"{format_duration(longest)}; a shelf that long may outlive the reason for it. "
            "Shelve for less and renew it, or pass --force."
        )
    with opened(db_path, config_file, write=True, now=now) as store:
        streams = _matching_streams(store, pattern)
        done = store.shelve_streams(
            streams,
            rule,
            until=now + duration,
            reason=reason,
            by=actor,
            now=now,
            pattern=pattern if pattern != streams[0] or len(streams) > 1 else None,
        )
        covered = [
            a.id
            for a in store.live_alerts(streams)
            if rule is None or rule in a.rules or a.rule == rule
        ]
    what = "every rule" if rule is None else f"rule {rule}"
    until = done[0][0].until
    click.echo(
        wrap_text(
            f"Shelved notifications ({what}) until {iso_s(until)} "
            f"({format_duration(duration)} from now), by {actor}: {reason}"
        )
    )
    click.echo(f"Streams covered ({len(streams)}):")
    for shelf, old in done:
        line = f"  {printable(shelf.stream)}"
        if old:
            before = max(s.until for s in old)
            verb = "extends" if until >= before else "shortens"
            line += (
                f"  (replaces the shelf by {old[-1].shelved_by} until {iso_s(before)}: {verb} it)"
            )
        click.echo(wrap_text(line, "    ") if len(line) > WIDTH else line)
    if covered:
        click.echo(f"Live incidents covered: {', '.join(map(str, covered))}.")
    click.echo(wrap_text(f"Incidents are still recorded while shelved. {SAFETY_CAUTION}"))


@click.command("unshelve")
@click.argument("pattern", metavar="STREAM_GLOB")
@_rule_option
@click.option("--by", help="Who ends the shelf  [default: your login name].")
@db_options
def unshelve_cmd(
    pattern: str,
    rule: str | None,
    by: str | None,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """End the shelves of the streams matching STREAM_GLOB now, so notifications flow again.

    Without --rule every shelf of each stream ends (those for single rules too); with --rule
    only the shelves for that rule. Notifications a shelf held are sent once if still owed.

    \b
    Examples:
      limitwatch unshelve pack-2/downtime
      limitwatch unshelve 'oven-*'
    """
    now = clock()
    actor = actor_name(by)
    with opened(db_path, config_file, write=True, now=now) as store:
        shelved = sorted(
            {s.stream for s in store.active_shelves(now) if fnmatchcase(s.stream, pattern)}
        )
        if not shelved:
            what = f"streams matching {pattern!r}" + ("" if rule is None else f" rule {rule!r}")
            raise InputProblem(
                f"nothing is shelved for {what} at {iso_s(now)} ('limitwatch streams' shows "
                "the shelves in force)"
            )
        ended: list[Shelf] = []
        try:
            with store.transaction():
                for stream in shelved:
                    try:
                        ended += store.unshelve(stream, rule, by=actor, now=now)
                    except NotShelved:
                        continue  # shelved, but not for this rule
        except StoreError as exc:
            raise InputProblem(str(exc)) from None
    if not ended:
        raise InputProblem(
            f"nothing is shelved for streams matching {pattern!r} rule {rule!r} at "
            f"{iso_s(now)} ('limitwatch streams' shows the shelves in force)"
        )
    for shelf in ended:
        what = "every rule" if shelf.rule is None else f"rule {shelf.rule}"
        click.echo(
            wrap_text(
                f"Ended the shelf on {printable(shelf.stream)} ({what}) set by {shelf.shelved_by} "
                f"({shelf.reason}); it had {short_duration(shelf.until - now)} left."
            )
        )


# -- streams -------------------------------------------------------------------------------------
