"""What every command shares: the ``--db``/``--config``/``--format`` options, the duration
option type, the error every command raises for a problem the user can fix, and finding and
opening the database (read-only unless the command changes something).

Why one module: the command modules never import each other, so anything two of them need
lives here, and a change to how the database is found or opened is made once.

Conventions:

* The database is ``--db PATH|URL``, else ``store.path`` (a path or URL) of ``--config FILE``,
  else the environment variable ``LIMITWATCH_DB``, else ``./limitwatch.db``. A URL names a
  PostgreSQL database (``postgresql://user@host:port/db``) or an SQLite file (``sqlite:///path``).
  A missing file is an error: a typo must never create an empty database that then shows "no
  alerts".
* Commands that only read open the database read-only (SQLite ``mode=ro``, a PostgreSQL session
  with ``default_transaction_read_only``), so a look at the alerts cannot change anything the
  service depends on, nor upgrade its schema behind its back.
* "Now" is read once per command, here at the edge (:func:`clock`), and passed to the store.
* Problems the operator can fix exit with status 1 and one line starting ``Error:``; option
  mistakes exit with status 2 (click's convention).

>>> short_duration(5400), short_duration(3 * 86400 + 7200), ago_text(0.0, 600.0)
('1h30m', '3d02h', '10m ago')

References
----------
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries* (cited from memory):
shelving as a temporary, operator-initiated suppression that ends by itself, and the record of who
acknowledged or shelved what, when and why.
"""

from __future__ import annotations

import contextlib
import getpass
import glob
import json
import math
import os
import re
import sqlite3
import sys
import textwrap
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import click

from limitwatch.alerts.messages import StreamInfo
from limitwatch.config import (
    ConfigError,
    load_config,
)
from limitwatch.durations import DurationError, parse_duration, short_duration
from limitwatch.ingest.csvfile import InputFileError, read_rows
from limitwatch.ingest.timeparse import format_time
from limitwatch.store import (
    SchemaTooOld,
    Store,
    StoreError,
    StoreLocation,
    StreamRow,
    open_store,
    open_store_read_only,
    parse_location,
)
from limitwatch.store.base import connect_checked
from limitwatch.store.location import redacted
from limitwatch.textout import AUTO, num, output_width, printable, table

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



DB_ENV = "LIMITWATCH_DB"
DEFAULT_DB = "limitwatch.db"
WIDTH = 80



def clock() -> float:
    """The one place the operator commands read the time (epoch seconds, UTC)."""
    return time.time()


# -- small text helpers ----------------------------------------------------------------------



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
        return f"{short_duration(d, parts=1)} ago"
    return format_time(math.floor(then))[:10]


def iso(t: float | None) -> str | None:
    """UTC ISO 8601 for JSON (full precision), None stays None."""
    return None if t is None else format_time(t)


def iso_s(t: float | None) -> str:
    """UTC ISO 8601 to the second, for tables."""
    return "-" if t is None else format_time(math.floor(t))



class UnitDuration(click.ParamType):
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


def cut(text: str, width: int) -> str:
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
        [cut(cell, widths[i]) if i in cuttable else cell for i, cell in enumerate(row)]
        for row in rows
    ]
    text = table(headers, cut_rows, max_width=width)
    if any(len(row[i]) > widths[i] for row in rows for i in cuttable):
        text += (
            f"\n(… marks a name shortened to fit {width} columns; --format json shows it whole)"
        )
    return text


def wrap_text(text: str, indent: str = "") -> str:
    return textwrap.fill(
        text, WIDTH, initial_indent=indent, subsequent_indent=indent, break_on_hyphens=False
    )


def short_num(x: float | None) -> str:
    """Numbers in tables: five significant figures."""
    return num(x, 5)


def emit_json(data: Any) -> None:
    click.echo(json.dumps(data, indent=2, allow_nan=False))


# -- finding and opening the database ----------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Target:
    """The database a command works on, and where that choice came from (for messages)."""

    location: StoreLocation
    origin: str

    @property
    def path(self) -> Path | None:
        """The SQLite file, or None for a PostgreSQL database."""
        return self.location.path

    def __str__(self) -> str:
        return redacted(str(self.location))


def db_options(func: Callable[..., Any]) -> Callable[..., Any]:
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
        metavar="PATH|URL",
        help=(
            "The limitwatch database: an SQLite file (a path or sqlite:///path) or "
            f"postgresql://user@host:port/database [default: ${DB_ENV}, else ./{DEFAULT_DB}]."
        ),
    )(func)


def format_option(
    help: str = "A table for people, or JSON for scripts.",
    choices: click.Choice = FORMATS,
) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """``--format``, passed to the command as ``fmt``; ``table`` unless asked otherwise."""
    return click.option(
        "--format", "fmt", type=choices, default="table", show_default=True, help=help
    )


def locate(db_path: str | None, config_file: str | None) -> Target:
    """Which database to open: ``--db``, else the config's ``store.path`` (a path or URL),
    else ``$LIMITWATCH_DB``, else ``./limitwatch.db``."""
    if db_path is not None and config_file is not None:
        raise click.UsageError("give --db or --config, not both")
    if db_path is not None:
        return Target(_parsed(db_path, "--db"), "--db")
    if config_file is not None:
        return _config_store(config_file)
    env = os.environ.get(DB_ENV)
    if env:
        return Target(_parsed(env, f"${DB_ENV}"), f"${DB_ENV}")
    return Target(parse_location(Path(DEFAULT_DB)), "the default location")


def _parsed(text: str, origin: str) -> StoreLocation:
    try:
        return parse_location(text)
    except StoreError as exc:
        raise InputProblem(f"{exc} (from {origin})") from None


def _config_store(config_file: str) -> Target:
    """The config's store (relative paths are taken from the config file's folder). Only the
    file's structure is checked: reading the alerts needs none of its secrets."""
    try:
        store = load_config(config_file).store
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None
    origin = f"store.path in {config_file}"
    location = store.location
    return Target(
        _parsed(location, origin) if isinstance(location, str) else parse_location(location), origin
    )


def _open(target: Target, *, write: bool, now: float) -> Store:
    """The store named by ``target``; the store checks it is a limitwatch database it can read
    (:func:`limitwatch.store.base.connect_checked`), and its errors become ``Error:`` lines."""
    path = target.path
    if path is None:  # PostgreSQL: the server says whether the database is there
        if write:
            # As for a file: a command never makes a limitwatch database out of a wrong one.
            # An older schema is fine: opening to write upgrades it, as the service would.
            with contextlib.suppress(SchemaTooOld):
                open_store_read_only(target.location).close()
            return open_store(target.location, now=now)
        return open_store_read_only(target.location)
    if not path.exists():
        raise InputProblem(
            f"no database at {path} (from {target.origin}). Check the path; the service "
            "creates the file when it first starts."
        )
    if not path.is_file():
        raise InputProblem(f"{path} (from {target.origin}) is not a file")
    described = f"{path} (from {target.origin})"
    if write:
        connect_checked(path, described=described)[0].close()
        # Store.open upgrades an older schema in place, as the service would.
        return Store.open(path, now=now)
    return Store.open_read_only(path, described=described)


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
    except _busy_errors() as exc:
        words = " ".join(str(exc).split())
        raise InputProblem(
            f"{target}: {words}; if the service is busy writing, try again"
        ) from None


def _busy_errors() -> tuple[type[Exception], ...]:
    """SQLite's operational errors, and PostgreSQL's once psycopg is loaded (an SQLite-only
    command never loads it)."""
    psycopg = sys.modules.get("psycopg")
    if psycopg is None:
        return (sqlite3.OperationalError,)
    return (sqlite3.OperationalError, psycopg.OperationalError)


def actor_name(by: str | None) -> str:
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


def stream_row(store: Store, stream: str) -> StreamRow | None:
    return next((s for s in store.streams(glob=glob.escape(stream)) if s.id == stream), None)


def unknown_stream(stream: str) -> InputProblem:
    return InputProblem(
        f"no stream {stream!r} has reported to this database; "
        "'limitwatch streams' lists the known ones"
    )


# -- alerts --------------------------------------------------------------------------------------



def load_config_arg(config_file: str | None) -> Any:
    if config_file is None:
        return None
    try:
        return load_config(config_file)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None


def stream_info(config_file: str | None, stream: str) -> StreamInfo:
    """The stream's description and unit from ``--config``; nothing without one (the database
    does not keep them)."""
    config = load_config_arg(config_file)
    return StreamInfo() if config is None else config.stream_info(stream)


def fit_options(func: Any) -> Any:
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


def read_csv_rows(
    file: str, value: str, time: str | None = None, stream: str | None = None
) -> list[Any]:
    try:
        return list(read_rows(file, value=value, time=time, stream=stream))
    except InputFileError as exc:
        raise InputProblem(str(exc)) from None


# -- baseline ---------------------------------------------------------------------------------
