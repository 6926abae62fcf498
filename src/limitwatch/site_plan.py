"""The planner's figures for a whole config: expected false alarms a week per ``[[streams]]``
entry and per stream, and the warnings ``check`` gives when a site would cry wolf.

Why apart from the commands: ``check`` and ``streams`` both ask it, and what it computes (which
entry governs which stream, which rule sets the planner can cost) is library logic.
"""

from __future__ import annotations

import shlex
import sqlite3
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from fnmatch import fnmatchcase
from functools import partial

from limitwatch.config import (
    Config,
)
from limitwatch.durations import format_duration
from limitwatch.planner import (
    StreamPlan,
    plan_stream,
    site_false_alarms,
)
from limitwatch.stats.arl import ArlError
from limitwatch.textout import num

WORST = 3
"""How many of the noisiest streams a budget warning names."""

DEFAULT_PER_STREAM_WEEK = 1.0
"""Without a ``[budget]``, ``check`` warns about streams expected to raise more than this many
false alarms a week each. A default, common practice rather than a standard: a stream that
cries wolf more than weekly soon stops being read (ANSI/ISA-18.2 and EEMUA 191 make the same
point about alarm rates at the scale of a whole control room)."""



def weekly_false_alarms(config: Config, streams: Sequence[str]) -> dict[str, float]:
    """Each stream's expected false alarms a week from its configured rules and cadence;
    streams without a cadence, or whose rule set the planner cannot cost, are left out. The
    planner caches run lengths per rule set, so many streams cost little more than one."""
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


_wrap = partial(textwrap.wrap, width=80, break_on_hyphens=False, break_long_words=False)


@dataclass(frozen=True)
class ExpectedFalseAlarms:
    """The planner's expected false alarms of a config's streams, one stream per ``[[streams]]``
    entry with a cadence and one for ``[defaults]`` (``limitwatch plan --config``'s count).

    ``unplanned`` names the entries left out, each with the reason (no cadence, or a rule set
    whose run length cannot be computed)."""

    plans: tuple[StreamPlan, ...]
    unplanned: tuple[tuple[str, str], ...]

    counted_from_store: bool = False

    @property
    def per_week(self) -> float:
        return site_false_alarms(self.plans)["week"]

    def worst(self, count: int = WORST) -> list[StreamPlan]:
        return sorted(self.plans, key=lambda p: -p.false_alarms("week"))[:count]

    def noisy(self, per_stream: float = DEFAULT_PER_STREAM_WEEK) -> list[str]:
        """Without a budget: a warning naming the entries whose streams each exceed the
        default rate."""
        loud = [p for p in self.worst(len(self.plans)) if p.false_alarms("week") > per_stream]
        if not loud:
            return []
        named = ", ".join(
            f"{p.name} {num(p.false_alarms('week'), 3)} a week"
            + (f" each, x{p.streams} streams" if p.streams > 1 else "")
            + f" ({p.rules}, every {format_duration(p.cadence)})"
            for p in loud[:WORST]
        )
        more = f" and {len(loud) - WORST} more" if len(loud) > WORST else ""
        text = (
            f"warning: noisy: {named}{more} -- over {num(per_stream)} false alarm a week for "
            "one stream, a default (common practice: a stream that cries wolf more often is "
            "soon ignored). Set [budget] false_alarms_per_week for your site's own limit, or "
            "let 'limitwatch plan --config FILE --budget N/week' suggest quieter rule sets."
        )
        return ["\n".join(_wrap(text, subsequent_indent="  "))]

    def lines(self) -> list[str]:
        """The expected figure as information, with how the streams were counted, as the
        ``expected`` section of the summary."""
        if not self.plans:
            text = [
                "false alarms not estimated: no [[streams]] entry and not [defaults] sets a cadence"
            ]
        else:
            counted = len(self.plans)
            text = [
                f"about {num(self.per_week, 3)} false alarms a week from {counted} "
                f"stream{'s' if counted != 1 else ''}: each [[streams]] entry with a cadence, "
                "and [defaults] if it has one, counts as one stream, as 'limitwatch plan "
                "--config' counts them (a glob matching many streams counts once)",
            ]
            if self.counted_from_store:
                counted = sum(p.streams for p in self.plans)
                text[0] = (
                    f"about {num(self.per_week, 3)} false alarms a week from {counted} "
                    f"stream{'s' if counted != 1 else ''}: the streams the database at "
                    "store.path has seen, each counted under the first entry that matches it "
                    "([defaults] for the rest; an entry matching none counts as one)"
                )
            if self.unplanned:
                text.append("not counted: " + ", ".join(f"{n} ({r})" for n, r in self.unplanned))
            text.append("assumes independent, normal readings (autocorrelated ones raise more)")
        out: list[str] = []
        for i, paragraph in enumerate(text):
            lead = "expected   " if i == 0 else " " * 11
            out += _wrap(paragraph, initial_indent=lead, subsequent_indent=" " * 11)
        return out

    def warnings(self, config_file: str, budget: float | None) -> list[str]:
        """A warning when the expected site rate exceeds ``budget`` (false alarms a week)."""
        if budget is None or not self.plans or self.per_week <= budget:
            return []
        named = ", ".join(
            f"{p.name} {num(p.false_alarms('week'), 3)} ({p.rules}, every "
            f"{format_duration(p.cadence)})"
            for p in self.worst()
        )
        text = (
            f"warning: budget: about {num(self.per_week, 3)} false alarms a week expected, over "
            f"the budget of {num(budget)} ([budget] false_alarms_per_week). The noisiest "
            f"stream{'s' if len(self.plans) > 1 else ''}: {named}. To find rule sets that fit:"
        )
        command = f"limitwatch plan --config {shlex.quote(config_file)} --budget {num(budget)}/week"
        return ["\n".join([*_wrap(text, subsequent_indent="  "), f"  {command}"])]


def expected_false_alarms(
    config: Config, known: Sequence[str] | None = None
) -> ExpectedFalseAlarms:
    """Plan each ``[[streams]]`` entry and the defaults at their rules and cadence (in-control
    run lengths only: the planner caches them per rule set, so this stays quick).

    With ``known`` (the stream ids the store has seen), each entry counts the known streams it
    is the first match for, and ``[defaults]`` those no entry matches; an entry matching none
    of them still counts as one stream (it is there for streams to come)."""
    settings = [(e.match, config.entry_settings(i)) for i, e in enumerate(config.streams)]
    settings.append(("[defaults]", config.default_settings()))
    counts = _matched(config, known) if known else {}
    plans: list[StreamPlan] = []
    unplanned: list[tuple[str, str]] = []
    for i, (name, opts) in enumerate(settings):
        if opts.cadence is None:
            unplanned.append((name, "no cadence"))
            continue
        streams = max(1, counts.get(i, 0))
        try:
            plans.append(
                plan_stream(
                    opts.rules, float(opts.cadence), name=name, streams=streams, shifts=()
                )
            )
        except (ArlError, ValueError) as exc:
            unplanned.append((name, f"run length not computed: {exc}"))
    return ExpectedFalseAlarms(tuple(plans), tuple(unplanned), bool(counts))


def _matched(config: Config, known: Sequence[str]) -> dict[int, int]:
    """Entry index (len(streams) for [defaults]) -> known streams it is the first match for."""
    counts: dict[int, int] = {}
    for stream in known:
        index = next(
            (i for i, e in enumerate(config.streams) if fnmatchcase(stream, e.match)),
            len(config.streams),
        )
        counts[index] = counts.get(index, 0) + 1
    return counts


def _server_streams(url: str) -> list[str]:
    """Stream ids in a PostgreSQL store, read-only; none when it cannot be read."""
    from limitwatch.store import StoreError, open_store_read_only

    try:
        with open_store_read_only(url) as store:
            return [s.id for s in store.streams()]
    except (StoreError, OSError):
        return []


def known_streams(config: Config) -> list[str]:
    """Stream ids in the database the config names, read-only; none when there is no such
    database yet (or it cannot be read: the count then falls back to one per entry)."""
    path = config.store.file
    if path is None:
        return _server_streams(str(config.store.location))
    if not path.is_file():
        return []
    try:
        conn = sqlite3.connect(path.resolve().as_uri() + "?mode=ro", uri=True)
        try:
            return [row[0] for row in conn.execute("SELECT id FROM streams")]
        finally:
            conn.close()
    except sqlite3.Error:
        return []


