"""The operator's commands: list, acknowledge, shelve and trace alerts; inspect streams; show,
list and refit baselines. All of them work on the service's SQLite file.

Why a module of its own: these commands share one concern -- finding the database, opening it
safely next to a running service, and turning the store's named errors into one clear line --
that the data commands in :mod:`limitwatch.cli` do not have.

Conventions:

* The database is ``--db PATH``, else ``store.path`` of ``--config FILE``, else the environment
  variable ``LIMITWATCH_DB``, else ``./limitwatch.db``. A missing file is an error: a typo must
  never create an empty database that then shows "no alerts".
* Commands that only read open the file read-only (SQLite ``mode=ro``), so a look at the alerts
  cannot change anything the service depends on, nor upgrade its schema behind its back.
* "Now" is read once per command, here at the edge (:func:`clock`), and passed to the store.
* Problems the operator can fix exit with status 1 and one line starting ``Error:``; option
  mistakes exit with status 2 (click's convention).

>>> span_text(5400), span_text(3 * 86400 + 7200), ago_text(0.0, 600.0)
('1h30m', '3d02h', '10m ago')

References
----------
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries* (cited from memory):
shelving as a temporary, operator-initiated suppression that ends by itself, and the record of who
acknowledged or shelved what, when and why.
Montgomery, D. C., *Introduction to Statistical Quality Control*, on revising control limits from
recent in-control data (phase I), which ``baseline refit`` does with a stored provenance.
"""

from __future__ import annotations

import getpass
import glob
import json
import math
import os
import re
import sqlite3
import textwrap
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from fnmatch import fnmatchcase
from pathlib import Path
from typing import Any

import click
import sqlite_utils

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import held_until, rule_words
from limitwatch.alerts.messages import StreamInfo, with_unit
from limitwatch.cli import FORMATS, InputProblem, baseline, main
from limitwatch.config import ConfigError, load_config
from limitwatch.durations import DurationError, format_duration, parse_duration
from limitwatch.ingest.timeparse import format_time
from limitwatch.planner import plan_stream
from limitwatch.stats.arl import ArlError
from limitwatch.stats.baseline import Baseline as Limits
from limitwatch.stats.baseline import BaselineError, fit_baseline
from limitwatch.stats.rules import DETECTORS
from limitwatch.store import (
    ALERT_STATES,
    MIGRATIONS,
    Alert,
    AlertEvent,
    NotShelved,
    Shelf,
    Store,
    StoreError,
    StreamRow,
)
from limitwatch.store import Baseline as StoredBaseline
from limitwatch.textout import AUTO, num, output_width, printable, table

DB_ENV = "LIMITWATCH_DB"
DEFAULT_DB = "limitwatch.db"
WIDTH = 80
RULE_IDS: tuple[str, ...] = tuple(sorted({*DETECTORS, "stale"}))
"""Rule ids an operator may shelve: every detector plus the stale-stream check."""

_SCHEMA = MIGRATIONS[-1].version
_STATE_SHORT = {"open": "open", "acknowledged": "acked", "cleared": "cleared"}


def clock() -> float:
    """The one place the operator commands read the time (epoch seconds, UTC)."""
    return time.time()


# -- small text helpers ----------------------------------------------------------------------


def span_text(seconds: float, parts: int = 2) -> str:
    """A duration in its largest unit or two (rounded down), compact enough for a table cell.

    >>> [span_text(s) for s in (42, 600, 3 * 3600, 3 * 3600 + 300, 50 * 3600)]
    ['42s', '10m', '3h', '3h05m', '2d02h']
    >>> span_text(3 * 3600 + 300, parts=1)
    '3h'
    """
    s = max(0, round(seconds))
    if s < 60:
        return f"{s}s"
    m = s // 60
    if m < 60:
        return f"{m}m"
    h, m = divmod(m, 60)
    if h < 48:
        return f"{h}h{m:02d}m" if m and parts > 1 else f"{h}h"
    d, h = divmod(h, 24)
    return f"{d}d{h:02d}h" if h and parts > 1 else f"{d}d"


def ago_text(then: float | None, now: float) -> str:
    """How long ago, for the past week; a short UTC date otherwise (or for a time ahead).

    >>> ago_text(1000.0, 1000.0 + 7500), ago_text(0.0, 30 * 86400.0)
    ('2h ago', '1970-01-01')
    """
    if then is None:
        return "-"
    d = now - then
    if -60 < d < 0:
        return "just now"
    if 0 <= d < 7 * 86400:
        return f"{span_text(d, parts=1)} ago"
    return format_time(math.floor(then))[:10]


def iso(t: float | None) -> str | None:
    """UTC ISO 8601 for JSON (full precision), None stays None."""
    return None if t is None else format_time(t)


def iso_s(t: float | None) -> str:
    """UTC ISO 8601 to the second, for tables."""
    return "-" if t is None else format_time(math.floor(t))


class _Duration(click.ParamType):
    name = "duration"

    def convert(
        self, value: Any, param: click.Parameter | None, ctx: click.Context | None
    ) -> float:
        """Seconds from e.g. ``90m``, ``8h``, ``2d`` or ``1h30m``; a bare number is refused
        here (is ``8`` hours or seconds?), and so is zero."""
        if isinstance(value, float):
            return value
        text = str(value).strip()
        try:
            seconds = parse_duration(text)
        except DurationError as exc:
            self.fail(str(exc), param, ctx)
        if not re.search(r"[a-z]", text):
            self.fail(f"{text!r} has no unit; write e.g. 90m, 8h or 2d", param, ctx)
        if seconds <= 0:
            self.fail(f"{text!r} is no time at all; give a positive duration", param, ctx)
        return seconds


def _cut(text: str, width: int) -> str:
    return text if len(text) <= width else text[: max(width - 1, 0)] + "…"


def fit_table(
    headers: Sequence[str],
    rows: Sequence[Sequence[str]],
    cuttable: Sequence[int],
    width: int | None = AUTO,
) -> str:
    """:func:`limitwatch.textout.table` within the terminal's width (``width``, by default
    :func:`~limitwatch.textout.output_width`; never cut when the output is not a terminal),
    shortening the ``cuttable`` columns (names) in turn, the widest first, so that no one of
    them loses everything.

    >>> out = fit_table(["a", "b"], [["x" * 50, "y" * 50]], cuttable=[0, 1], width=80)
    >>> max(len(line) for line in out.splitlines()), out.splitlines()[2][:5]
    (80, 'xxxxx')
    """
    rows = [[printable(cell) for cell in row] for row in rows]  # escaped before measuring
    width = output_width() if width == AUTO else width
    if width is None:
        return table(headers, rows, max_width=None)
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]
    over = sum(widths) + 2 * (len(widths) - 1) - width
    while over > 0:
        i = max(cuttable, key=lambda j: widths[j])
        if widths[i] <= max(len(headers[i]), 8):
            break
        widths[i] -= 1
        over -= 1
    cut_rows = [
        [_cut(cell, widths[i]) if i in cuttable else cell for i, cell in enumerate(row)]
        for row in rows
    ]
    text = table(headers, cut_rows, max_width=width)
    if any(len(row[i]) > widths[i] for row in rows for i in cuttable):
        text += (
            f"\n(… marks a name shortened to fit {width} columns; --format json shows it whole)"
        )
    return text


def _wrap(text: str, indent: str = "") -> str:
    return textwrap.fill(
        text, WIDTH, initial_indent=indent, subsequent_indent=indent, break_on_hyphens=False
    )


def _g(x: float | None) -> str:
    """Numbers in tables: five significant figures."""
    return num(x, 5)


def _emit_json(data: Any) -> None:
    click.echo(json.dumps(data, indent=2, allow_nan=False))


# -- finding and opening the database ----------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Target:
    """The database file a command works on, and where that choice came from (for messages)."""

    path: Path
    origin: str


def _db_options(func: Callable[..., Any]) -> Callable[..., Any]:
    func = click.option(
        "--config",
        "config_file",
        metavar="FILE",
        type=click.Path(dir_okay=False),
        help="Use the database named by store.path in this TOML config file.",
    )(func)
    return click.option(
        "--db",
        "db_path",
        metavar="PATH",
        help=f"The limitwatch database file [default: ${DB_ENV}, else ./{DEFAULT_DB}].",
    )(func)


def locate(db_path: str | None, config_file: str | None) -> Target:
    """Which file to open: ``--db``, else the config's ``store.path``, else ``$LIMITWATCH_DB``,
    else ``./limitwatch.db``."""
    if db_path is not None and config_file is not None:
        raise click.UsageError("give --db or --config, not both")
    if db_path is not None:
        return Target(Path(db_path), "--db")
    if config_file is not None:
        return Target(_config_store_path(config_file), f"store.path in {config_file}")
    env = os.environ.get(DB_ENV)
    if env:
        return Target(Path(env), f"${DB_ENV}")
    return Target(Path(DEFAULT_DB), "the default location")


def _config_store_path(config_file: str) -> Path:
    """``store.path`` of the config (relative paths are taken from the config file's folder).
    Only the file's structure is checked: reading the alerts needs none of its secrets."""
    try:
        return Path(load_config(config_file).store.path)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None


def _connect_read_only(target: Target) -> tuple[sqlite3.Connection, int]:
    """Open the file read-only and check it is a limitwatch database this code can read."""
    path = target.path
    if not path.exists():
        raise InputProblem(
            f"no database at {path} (from {target.origin}). Check the path; the service "
            "creates the file when it first starts."
        )
    if not path.is_file():
        raise InputProblem(f"{path} (from {target.origin}) is not a file")
    conn = sqlite3.connect(path.resolve().as_uri() + "?mode=ro", uri=True)
    try:
        conn.execute("PRAGMA busy_timeout = 5000")
        row = conn.execute("SELECT max(version) FROM schema_migrations").fetchone()
    except sqlite3.DatabaseError as exc:
        conn.close()
        what = "a limitwatch database" if "no such table" in str(exc) else "an SQLite database"
        raise InputProblem(
            f"{path} (from {target.origin}) is not {what} ({exc}); check the path"
        ) from None
    version = int(row[0] or 0)
    if version > _SCHEMA:
        conn.close()
        raise InputProblem(
            f"{path} has schema version {version}, newer than this limitwatch knows "
            f"({_SCHEMA}); upgrade limitwatch"
        )
    return conn, version


def _open(target: Target, *, write: bool, now: float) -> Store:
    conn, version = _connect_read_only(target)
    if write:
        conn.close()
        # Store.open upgrades an older schema in place, as the service would.
        return Store.open(target.path, now=now)
    if version < _SCHEMA:
        conn.close()
        raise InputProblem(
            f"{target.path} has schema version {version}, older than this limitwatch "
            f"reads ({_SCHEMA}); the service upgrades it when it starts, and so does any "
            "command that changes something (ack, shelve, unshelve, baseline refit)"
        )
    db = sqlite_utils.Database(conn, execute_plugins=False)
    db.register_function(fnmatchcase, deterministic=True, name="glob_match")
    return Store(db, str(target.path))


@contextmanager
def opened(
    db_path: str | None, config_file: str | None, *, write: bool = False, now: float
) -> Iterator[Store]:
    """The store for one command; the store's named errors become one ``Error:`` line."""
    target = locate(db_path, config_file)
    with _explained(target):
        store = _open(target, write=write, now=now)
    try:
        with _explained(target):
            yield store
    finally:
        store.close()


@contextmanager
def _explained(target: Target) -> Iterator[None]:
    try:
        yield
    except StoreError as exc:
        raise InputProblem(str(exc)) from None
    except sqlite3.OperationalError as exc:
        raise InputProblem(
            f"{target.path}: {exc}; if the service is busy writing, try again"
        ) from None


def _actor(by: str | None) -> str:
    if by is not None:
        if not by.strip():
            raise click.BadParameter("must name someone", param_hint="--by")
        return by.strip()
    try:
        name = getpass.getuser()
    except (KeyError, OSError, ImportError):
        name = ""
    if not name:
        raise InputProblem("cannot tell who you are from the system; pass --by NAME")
    return name


def _stream_row(store: Store, stream: str) -> StreamRow | None:
    return next((s for s in store.streams(glob=glob.escape(stream)) if s.id == stream), None)


def _unknown_stream(stream: str) -> InputProblem:
    return InputProblem(
        f"no stream {stream!r} has reported to this database; "
        "'limitwatch streams' lists the known ones"
    )


# -- alerts --------------------------------------------------------------------------------------


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


def _load(config_file: str | None) -> Any:
    if config_file is None:
        return None
    try:
        return load_config(config_file)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None


def _stream_info(config_file: str | None, stream: str) -> StreamInfo:
    """The stream's description and unit from ``--config``; nothing without one (the database
    does not keep them)."""
    config = _load(config_file)
    return StreamInfo() if config is None else config.stream_info(stream)


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


@main.command("alerts")
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
@click.option(
    "--format",
    "fmt",
    type=FORMATS,
    default="table",
    show_default=True,
    help="A table for people, or JSON for scripts.",
)
@_db_options
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
        _emit_json([alert_record(a, held[a.id]) for a in found])
        return
    if not found:
        where = f" for streams matching {stream_glob!r}" if stream_glob else ""
        which = "" if state == "all" else f"{' or '.join(states)} "
        click.echo(f"No {which}incidents{where}.")
        return
    config = _load(config_file)
    rows = [
        [
            str(a.id),
            _STATE_SHORT[a.state],
            a.severity,
            a.stream,
            _rules_cell(a),
            str(a.signal_count),
            ago_text(a.opened_at, now),
            with_unit(_g(a.last_value), config.stream_info(a.stream).unit if config else None),
        ]
        for a in found
    ]
    headers = ["id", "state", "severity", "stream", "rules", "count", "opened", "value"]
    click.echo(fit_table(headers, rows, cuttable=[3, 4]))
    click.echo(f"{len(found)} incident(s).")
    shelved = [str(a.id) for a in found if held[a.id] is not None]
    if shelved:
        click.echo(
            _wrap(f"Notifications held by a shelf for: {', '.join(shelved)} (see 'streams').")
        )


@main.command("ack")
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
@_db_options
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
    actor = _actor(by)
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
                _wrap(
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


@main.command("log")
@click.argument("alert_id", type=int)
@click.option(
    "--format",
    "fmt",
    type=FORMATS,
    default="table",
    show_default=True,
    help="A table for people, or JSON for scripts.",
)
@_db_options
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
        _emit_json(
            {"alert": alert_record(alert, held), "events": [event_record(e) for e in events]}
        )
        return
    info = _stream_info(config_file, alert.stream)
    about = f" ({info.description})" if info.description else ""
    click.echo(
        _wrap(
            f"Incident {alert.id} on {printable(alert.stream)}{about}: {alert.severity}, now "
            f"{alert.state}; {alert.signal_count} signal(s), last reading "
            f"{with_unit(_g(alert.last_value), info.unit)} at {iso_s(alert.last_time)}."
        )
    )
    if alert.merged_into is not None:
        click.echo(
            _wrap(f"Merged into incident {alert.merged_into} when the database was upgraded.")
        )
    click.echo()
    rule_rows = [
        [t.rule, t.severity, str(t.signal_count), iso_s(t.first_time), iso_s(t.last_time)]
        for t in _tallies(alert)
    ]
    if rule_rows:
        click.echo(fit_table(["rule", "severity", "count", "first", "last"], rule_rows, [0]))
        for t in _tallies(alert):
            click.echo(_wrap(f"{t.rule}: {rule_words(t.rule)}", "  "))
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
        rows.append([iso_s(e.time), e.kind, _cut(e.actor, fixed[2]), lines[0]])
        rows.extend(["", "", "", more] for more in lines[1:])
    return fit_table(headers, rows, cuttable=[2])


# -- shelves -----------------------------------------------------------------------------------


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


@main.command("shelve")
@click.argument("pattern", metavar="STREAM_GLOB")
@_rule_option
@click.option(
    "--for",
    "duration",
    required=True,
    type=_Duration(),
    help="How long to hold notifications, e.g. 90m, 8h, 2d or 1h30m.",
)
@click.option("--reason", required=True, help="Why, for the audit trail.")
@click.option("--by", help="Who shelves  [default: your login name].")
@click.option(
    "--force", is_flag=True, help="Allow a shelf longer than the maximum (alerts.max_shelf)."
)
@_db_options
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
    actor = _actor(by)
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
        _wrap(
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
        click.echo(_wrap(line, "    ") if len(line) > WIDTH else line)
    if covered:
        click.echo(f"Live incidents covered: {', '.join(map(str, covered))}.")
    click.echo(_wrap(f"Incidents are still recorded while shelved. {SAFETY_CAUTION}"))


@main.command("unshelve")
@click.argument("pattern", metavar="STREAM_GLOB")
@_rule_option
@click.option("--by", help="Who ends the shelf  [default: your login name].")
@_db_options
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
    actor = _actor(by)
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
            _wrap(
                f"Ended the shelf on {printable(shelf.stream)} ({what}) set by {shelf.shelved_by} "
                f"({shelf.reason}); it had {span_text(shelf.until - now)} left."
            )
        )


# -- streams -------------------------------------------------------------------------------------


def limits_of(numbers: dict[str, Any]) -> Limits | None:
    """The stored baseline's numbers as a :class:`~limitwatch.stats.baseline.Baseline`: the full
    fit when stored whole (``Baseline.to_dict()``), else from its center and sigma, else None."""
    try:
        return Limits.from_dict(numbers)
    except (BaselineError, KeyError, TypeError, ValueError):
        pass
    try:
        return Limits.from_limits(center=numbers["center"], sigma=numbers["sigma"])
    except (BaselineError, KeyError, TypeError, ValueError):
        return None


def _zone(limits: Limits | None, value: float | None) -> str | None:
    if limits is None or value is None or not math.isfinite(value):
        return None
    return limits.zone(value)


def stream_record(
    row: StreamRow,
    current: StoredBaseline | None,
    live: Sequence[Alert],
    shelves: Sequence[Shelf],
    false_alarms_per_week: float | None = None,
) -> dict[str, Any]:
    """The JSON object for one stream (``limitwatch streams --format json``)."""
    limits = limits_of(current.numbers) if current is not None else None
    whole = [s.until for s in shelves if s.rule is None]
    return {
        "stream": row.id,
        "last_value": row.last_value,
        "last_time": iso(row.last_time),
        "zone": _zone(limits, row.last_value),
        "phase": row.phase,
        "baseline_version": None if current is None else current.version,
        "center": None if limits is None else limits.center,
        "lcl": None if limits is None else limits.lcl,
        "ucl": None if limits is None else limits.ucl,
        "open_alerts": sum(a.state == "open" for a in live),
        "acknowledged_alerts": sum(a.state == "acknowledged" for a in live),
        "live_alerts": len(live),
        "shelved_until": iso(max(whole)) if whole else None,
        "shelves": [
            {"rule": s.rule, "until": iso(s.until), "reason": s.reason, "by": s.shelved_by}
            for s in shelves
        ],
        "false_alarms_per_week": false_alarms_per_week,
    }


def false_alarms_by_stream(config_file: str | None, streams: Sequence[str]) -> dict[str, float]:
    """Each stream's expected false alarms a week from its configured rules and cadence
    (:mod:`limitwatch.planner`); streams without a cadence, or without ``--config``, are left
    out. The planner caches run lengths per rule set, so many streams cost little more than
    one."""
    if config_file is None:
        return {}
    try:
        config = load_config(config_file)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None
    known: dict[tuple[str, float], float | None] = {}
    out: dict[str, float] = {}
    for stream in streams:
        opts = config.stream_settings(stream)
        if opts.cadence is None:
            continue
        key = (opts.rules, float(opts.cadence))
        if key not in known:
            try:
                plan = plan_stream(opts.rules, float(opts.cadence), shifts=())
                known[key] = plan.false_alarms("week")
            except (ArlError, ValueError):
                known[key] = None
        value = known[key]
        if value is not None:
            out[stream] = value
    return out


def _shelf_cell(shelves: Sequence[Shelf], now: float) -> str:
    if not shelves:
        return "-"
    until = max(s.until for s in shelves)
    rules = {s.rule for s in shelves}
    if None in rules:
        return f"all {span_text(until - now)}"
    label = "1 rule" if len(rules) == 1 else f"{len(rules)} rules"
    return f"{label} {span_text(until - now)}"


@main.command("streams")
@click.option(
    "--stream",
    "stream_glob",
    metavar="GLOB",
    help="Only streams whose id matches GLOB (shell-style, case-sensitive), e.g. 'oven-*'.",
)
@click.option(
    "--format",
    "fmt",
    type=FORMATS,
    default="table",
    show_default=True,
    help="A table for people, or JSON for scripts.",
)
@_db_options
def streams_cmd(
    stream_glob: str | None, fmt: str, db_path: str | None, config_file: str | None
) -> None:
    """List the streams with their last reading, where it falls against the current baseline,
    their alerts and shelves, and the false alarms a week their rules should raise.

    In the table, 'zone' is the last reading's place against the current baseline (zone-c is
    within one sigma of the center line, zone-b within two, zone-a within three; above-ucl and
    below-lcl are beyond the limits), 'live' counts the alerts not yet cleared (open or
    acknowledged: the report's 'live alerts' too), 'shelved' what is shelved (all rules or
    which) and for how much longer. With --config, 'false/wk' is the false alarms a week
    expected from the stream's rules at its cadence as the config gives them ('-' when it gives
    no cadence; the planner's figure, which assumes independent, normal readings). With --format
    json the output is a list of objects with the keys stream, last_value, last_time, zone,
    phase, baseline_version, center, lcl, ucl, open_alerts, acknowledged_alerts, live_alerts
    (the two together), shelved_until (a shelf of every rule), shelves (each with rule, until,
    reason, by) and false_alarms_per_week (null when unknown).

    \b
    Examples:
      limitwatch streams
      limitwatch streams --config /etc/limitwatch/site.toml
      limitwatch streams --stream 'pack-*' --format json
    """
    now = clock()
    with opened(db_path, config_file, now=now) as store:
        rows = store.streams(glob=stream_glob)
        live = store.live_alerts([r.id for r in rows])
        shelves = store.active_shelves(now)
        current = {r.id: store.current_baseline(r.id) for r in rows}
    by_stream: dict[str, list[Alert]] = {}
    for alert in live:
        by_stream.setdefault(alert.stream, []).append(alert)
    shelves_of: dict[str, list[Shelf]] = {}
    for shelf in shelves:
        shelves_of.setdefault(shelf.stream, []).append(shelf)
    expected = false_alarms_by_stream(config_file, [r.id for r in rows])
    records = [
        stream_record(
            r,
            current[r.id],
            by_stream.get(r.id, []),
            shelves_of.get(r.id, []),
            expected.get(r.id),
        )
        for r in rows
    ]
    if fmt == "json":
        _emit_json(records)
        return
    if not records:
        where = f" matching {stream_glob!r}" if stream_glob else ""
        click.echo(f"No streams{where} have reported to this database yet.")
        return
    table_rows = [
        [
            rec["stream"],
            _g(rec["last_value"]),
            rec["zone"] or "-",
            rec["phase"] or "-",
            "-" if rec["baseline_version"] is None else f"v{rec['baseline_version']}",
            str(rec["live_alerts"]),
            _shelf_cell(shelves_of.get(rec["stream"], []), now),
        ]
        for rec in records
    ]
    headers = ["stream", "last", "zone", "phase", "baseline", "live", "shelved"]
    if config_file is not None:
        # Only a config knows rules and cadences; without one the column would be all '-'
        # and cost the stream names ten columns.
        headers.append("false/wk")
        for cells, rec in zip(table_rows, records, strict=True):
            cells.append(num(rec["false_alarms_per_week"], 3))
    click.echo(fit_table(headers, table_rows, cuttable=[0, 6]))


# -- baselines -----------------------------------------------------------------------------------


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
    add("center line", _g(limits.center))
    mr = f"average {_g(limits.mr_bar)}"
    if limits.mr_median == limits.mr_median:  # typed-in limits have no median (NaN)
        mr += f", median {_g(limits.mr_median)}"
    add("moving range", mr)
    add("sigma", _g(limits.sigma))
    add("limits", f"LCL {_limit(limits.lcl, limits.lower_bound)}, UCL {_limit(limits.ucl, None)}")
    add("MR limit", _g(limits.mr_ucl))
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
        return _g(value)
    return "none (beyond the natural bound)" if bound is not None else "none"


def _no_baseline(store: Store, stream: str) -> InputProblem:
    if _stream_row(store, stream) is None:
        return _unknown_stream(stream)
    return InputProblem(
        f"stream {stream!r} has no stored baseline yet (it may still be learning); "
        "'limitwatch baseline refit' can fit one from its stored readings"
    )


@baseline.command("show")
@click.argument("stream")
@click.option(
    "--format",
    "fmt",
    type=FORMATS,
    default="table",
    show_default=True,
    help="Text for people, or JSON for scripts.",
)
@_db_options
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
        _emit_json(baseline_record(current))
        return
    click.echo("\n".join(_baseline_lines(current)))


@baseline.command("history")
@click.argument("stream")
@click.option(
    "--format",
    "fmt",
    type=FORMATS,
    default="table",
    show_default=True,
    help="Text for people, or JSON (a list, oldest version first) for scripts.",
)
@_db_options
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
        _emit_json([baseline_record(v) for v in versions])
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
@_db_options
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
    actor = _actor(by)
    if not reason.strip():
        raise click.BadParameter("must say why", param_hint="--reason")
    with opened(db_path, config_file, write=True, now=now) as store:
        readings = store.recent_readings(stream, last=last)
        if not readings:
            if _stream_row(store, stream) is None:
                raise _unknown_stream(stream)
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
from limitwatch import cli_deadletters, cli_outbox  # noqa: E402,F401
