"""``limitwatch alerts``, ``ack`` and ``log``: list incidents, acknowledge them, trace one."""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from typing import Any

import click

from limitwatch.alerts.lifecycle import held_until, rule_words
from limitwatch.alerts.messages import with_unit
from limitwatch.cli.options import (
    WIDTH,
    InputProblem,
    actor_name,
    ago_text,
    clock,
    cut,
    db_options,
    emit_json,
    fit_table,
    format_option,
    iso,
    iso_s,
    load_config_arg,
    opened,
    short_num,
    stream_info,
    wrap_text,
)
from limitwatch.store import (
    ALERT_STATES,
    Alert,
    AlertEvent,
    Shelf,
    StoreError,
)
from limitwatch.textout import output_width, printable

_STATE_SHORT = {"open": "open", "acknowledged": "acked", "cleared": "cleared"}


def alert_record(alert: Alert, shelved_until: float | None) -> dict[str, Any]:
    """The JSON object for one incident (``limitwatch alerts --format json``)."""
    sig = alert.signal
    return {
        "id": alert.id,
        "stream": alert.stream,
        "rule": alert.rule,
        "rule_words": rule_words(alert.rule),
        "rules": [
            {
                "rule": t.rule,
                "severity": t.severity,
                "count": t.signal_count,
                "first_time": iso(t.first_time),
                "last_time": iso(t.last_time),
            }
            for t in _tallies(alert)
        ],
        "state": alert.state,
        "severity": alert.severity,
        "count": alert.signal_count,
        "opened_at": iso(alert.opened_at),
        "first_time": iso(alert.first_time),
        "first_value": alert.first_value,
        "last_time": iso(alert.last_time),
        "last_value": alert.last_value,
        "worst_zone": alert.worst_zone,
        "silent_since": iso(alert.silent_since),
        "center": sig.get("center"),
        "lcl": sig.get("lcl"),
        "ucl": sig.get("ucl"),
        "baseline_version": sig.get("baseline_version"),
        "acknowledged_at": iso(alert.acknowledged_at),
        "acknowledged_by": alert.acknowledged_by,
        "ack_note": alert.ack_note,
        "cleared_at": iso(alert.cleared_at),
        "merged_into": alert.merged_into,
        "shelved_until": iso(shelved_until),
    }





def _tallies(alert: Alert) -> list[Any]:
    return sorted(alert.rules.values(), key=lambda t: (t.first_time, t.rule))


def _rules_cell(alert: Alert) -> str:
    """The rule that opened the incident, and how many others joined it (``--format json``
    and ``log`` name them)."""
    others = len(set(alert.rules) - {alert.rule})
    return alert.rule + (f" +{others}" if others else "")


def _held_until(alert: Alert, shelves: Sequence[Shelf], now: float) -> float | None:
    if alert.state == "cleared":
        return None
    hold = held_until(shelves, alert, now)
    return None if hold is None else hold[0]


class _State(click.Choice):
    """The states, and the short words the tables print for them (``acked``)."""

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> Any:
        text = str(value).strip().lower()
        return super().convert(_STATE_WORDS.get(text, text), param, ctx)


_STATE_WORDS = {short: state for state, short in _STATE_SHORT.items()} | {
    "ack": "acknowledged",
    "live": "live",
}


@click.command("alerts")
@click.option(
    "--state",
    type=_State([*ALERT_STATES, "live", "all"]),
    help="Only incidents in this state: open, acknowledged (or acked, as the table prints it), "
    "cleared, live (open or acknowledged) or all  [default: live].",
)
@click.option(
    "--stream",
    "stream_glob",
    metavar="GLOB",
    help="Only streams whose id matches GLOB (shell-style, case-sensitive), e.g. 'pack-*'.",
)
@format_option()
@db_options
def alerts_cmd(
    state: str | None,
    stream_glob: str | None,
    fmt: str,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """List incidents, newest first: by default those still open or acknowledged.

    An incident is everything that went wrong on one stream from its first signal until it
    was quiet again; every rule that signalled meanwhile joined it (the 'rules' column, the
    first being the one that opened it). In the table, 'acked' means acknowledged, 'count'
    the signals since it opened and 'value' the last reading that signalled. With --format
    json the output is a list of objects with the keys id, stream, rule, rule_words, rules
    (rule, severity, count, first_time, last_time), state, severity, count, opened_at,
    first_time, first_value, last_time, last_value, worst_zone, silent_since, center, lcl,
    ucl, baseline_version, acknowledged_at, acknowledged_by, ack_note, cleared_at,
    merged_into and shelved_until. Times are UTC ISO 8601 strings; a key without a value
    holds null.

    \b
    Examples:
      limitwatch alerts
      limitwatch alerts --state acked
      limitwatch alerts --state all --stream 'pack-*' --format json
    """
    now = clock()
    live = ("open", "acknowledged")
    states = ALERT_STATES if state == "all" else live if state in (None, "live") else (state,)
    with opened(db_path, config_file, now=now) as store:
        found = store.alerts(state=list(states), stream_glob=stream_glob)
        shelves = store.active_shelves(now)
    held = {a.id: _held_until(a, shelves, now) for a in found}
    if fmt == "json":
        emit_json([alert_record(a, held[a.id]) for a in found])
        return
    if not found:
        where = f" for streams matching {stream_glob!r}" if stream_glob else ""
        which = "" if state == "all" else f"{' or '.join(states)} "
        click.echo(f"No {which}incidents{where}.")
        return
    config = load_config_arg(config_file)
    rows = [
        [
            str(a.id),
            _STATE_SHORT[a.state],
            a.severity,
            a.stream,
            _rules_cell(a),
            str(a.signal_count),
            ago_text(a.opened_at, now),
            with_unit(
                short_num(a.last_value), config.stream_info(a.stream).unit if config else None
            ),
        ]
        for a in found
    ]
    headers = ["id", "state", "severity", "stream", "rules", "count", "opened", "value"]
    click.echo(fit_table(headers, rows, cuttable=[3, 4]))
    click.echo(f"{len(found)} incident(s).")
    shelved = [str(a.id) for a in found if held[a.id] is not None]
    if shelved:
        click.echo(
            wrap_text(f"Notifications held by a shelf for: {', '.join(shelved)} (see 'streams').")
        )


@click.command("ack")
@click.argument("alert_ids", metavar="[ID]...", nargs=-1, type=int)
@click.option(
    "--stream",
    "stream_glob",
    metavar="GLOB",
    help="Every open incident of the streams matching GLOB, e.g. 'pack-2/*'.",
)
@click.option("--all-open", is_flag=True, help="Every open incident (asks first, unless --yes).")
@click.option("--yes", is_flag=True, help="Do not ask before acknowledging with --all-open.")
@click.option("--note", help="What you are doing about it, kept in each incident's log.")
@click.option("--by", help="Who acknowledges  [default: your login name].")
@db_options
def ack_cmd(
    alert_ids: tuple[int, ...],
    stream_glob: str | None,
    all_open: bool,
    yes: bool,
    note: str | None,
    by: str | None,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """Acknowledge incidents: you have seen them and are acting on them.

    Name incidents by id (several at once), or take every open incident of the streams matching
    --stream GLOB, or every open one with --all-open. Reminders and escalation stop, and the
    routes that ask for it hear who acknowledged and the note; an incident still clears by
    itself once its stream is quiet. An id that is unknown or already cleared is an error (exit
    status 1, after the others are acknowledged), and so is one already acknowledged.

    \b
    Examples:
      limitwatch ack 42 --note "checking the sealing jaw on line 2"
      limitwatch ack 4 5 7
      limitwatch ack --stream 'pack-2/*' --note "line 2 stopped for the jaw"
      limitwatch ack --all-open --yes --note "site power dip at 06:10"
    """
    if not alert_ids and stream_glob is None and not all_open:
        raise click.UsageError("name incident ids, or give --stream GLOB or --all-open")
    if all_open and (alert_ids or stream_glob is not None):
        raise click.UsageError("--all-open takes every open incident; give no ids or --stream")
    now = clock()
    actor = actor_name(by)
    note = note.strip() if note and note.strip() else None
    problems: list[str] = []
    with opened(db_path, config_file, write=True, now=now) as store:
        ids = list(dict.fromkeys(alert_ids))
        if stream_glob is not None or all_open:
            chosen = store.alerts(state="open", stream_glob=stream_glob)
            if not chosen:
                where = f" on streams matching {stream_glob!r}" if stream_glob else ""
                click.echo(f"No open incidents{printable(where)}; nothing to acknowledge.")
                return
            if all_open and not yes:
                click.echo(f"{len(chosen)} open incident(s):")
                for a in chosen:
                    click.echo(
                        f"  {a.id:>6}  {a.severity:<8}  {printable(a.stream)}  ({_rules_cell(a)})"
                    )
                if not click.confirm("Acknowledge all of them?", default=False):
                    raise InputProblem("nothing acknowledged")
            ids += [a.id for a in reversed(chosen) if a.id not in ids]
        for alert_id in ids:
            try:
                alert = store.acknowledge(alert_id, by=actor, note=note, now=now)
            except StoreError as exc:
                problems.append(str(exc))
                continue
            click.echo(
                wrap_text(
                    f"Acknowledged incident {alert.id} ({printable(alert.stream)}: "
                    f"{_rules_cell(alert)}) as {actor} at {iso_s(now)}; reminders and "
                    "escalation for it stop."
                )
            )
    if problems:
        raise InputProblem("; ".join(problems))


def event_record(event: AlertEvent) -> dict[str, Any]:
    """The JSON object for one event (``limitwatch log --format json``)."""
    return {
        "time": iso(event.time),
        "kind": event.kind,
        "actor": event.actor,
        "note": event.note,
        "data": event.data,
    }


@click.command("log")
@click.argument("alert_id", type=int)
@format_option()
@db_options
def log_cmd(alert_id: int, fmt: str, db_path: str | None, config_file: str | None) -> None:
    """Show incident ALERT_ID: the rules that joined it (how often, first and last signal) and
    its history, oldest first: when it opened, each rule that joined, every notification,
    reminder, escalation, shelf and acknowledgement (with who and why), and when it cleared.

    With --format json the output is an object with the keys alert (as in 'limitwatch alerts',
    with its rules) and events, a list of objects with the keys time, kind, actor, note and
    data.

    \b
    Example:
      limitwatch log 42
    """
    now = clock()
    with opened(db_path, config_file, now=now) as store:
        alert = store.alert(alert_id)
        events = store.alert_events(alert_id)
        held = _held_until(alert, store.active_shelves(now), now)
    if fmt == "json":
        emit_json(
            {"alert": alert_record(alert, held), "events": [event_record(e) for e in events]}
        )
        return
    info = stream_info(config_file, alert.stream)
    about = f" ({info.description})" if info.description else ""
    click.echo(
        wrap_text(
            f"Incident {alert.id} on {printable(alert.stream)}{about}: {alert.severity}, now "
            f"{alert.state}; {alert.signal_count} signal(s), last reading "
            f"{with_unit(short_num(alert.last_value), info.unit)} at {iso_s(alert.last_time)}."
        )
    )
    if alert.merged_into is not None:
        click.echo(
            wrap_text(f"Merged into incident {alert.merged_into} when the database was upgraded.")
        )
    click.echo()
    rule_rows = [
        [t.rule, t.severity, str(t.signal_count), iso_s(t.first_time), iso_s(t.last_time)]
        for t in _tallies(alert)
    ]
    if rule_rows:
        click.echo(fit_table(["rule", "severity", "count", "first", "last"], rule_rows, [0]))
        for t in _tallies(alert):
            click.echo(wrap_text(f"{t.rule}: {rule_words(t.rule)}", "  "))
        click.echo()
    click.echo(_event_table(events))


def _event_table(events: Sequence[AlertEvent]) -> str:
    """Events with their notes wrapped onto continuation rows, so nothing is cut off."""
    headers = ["time (UTC)", "event", "by", "note"]
    fixed = [
        max(len(headers[0]), 20),
        max([len(headers[1])] + [len(e.kind) for e in events]),
        min(20, max([len(headers[2])] + [len(e.actor) for e in events])),
    ]
    room = max(24, (output_width() or WIDTH) - sum(fixed) - 2 * len(fixed))
    rows: list[list[str]] = []
    for e in events:
        lines = textwrap.wrap(e.note or "", room, break_on_hyphens=False) or [""]
        rows.append([iso_s(e.time), e.kind, cut(e.actor, fixed[2]), lines[0]])
        rows.extend(["", "", "", more] for more in lines[1:])
    return fit_table(headers, rows, cuttable=[2])


# -- shelves -----------------------------------------------------------------------------------
