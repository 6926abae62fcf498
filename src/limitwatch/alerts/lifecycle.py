"""When signals become an incident, when it is over, and which notifications it owes.

Why incidents: one sustained shift makes several rules fire within a few readings (beyond the
limits, the moving range, two of three in zone A, four of five in zone B, the run on one side).
Each used to open its own alert with its own notification, reminders and escalation: five
messages for one cause. Alarm-management practice (ANSI/ISA-18.2, EEMUA 191) calls that a flood
and asks for one annunciation per cause. So:

* A stream has at most one live (open or acknowledged) incident. A signal with none opens one
  and owes an ``opened`` notification; every rule that signals while it is live joins it
  (counted per rule, kept for ``log`` and JSON) and notifies again only when it raises the
  incident's severity (``raised``). The severity is the highest of its rules' severities.
  One incident per stream, not one per side of the center line: a cause that pushes a stream up
  and then down (over-adjustment) is still one thing for the people on duty, and two incidents
  would bring the flood back in another form.
* Hysteresis: a live incident clears after ``clear_after`` consecutive accepted monitoring
  readings with no signal from any rule (an off-delay counted in readings). A stale-only
  incident clears as soon as a recent reading arrives. A signal after clearing opens a new one.
* While open and unacknowledged: a ``reminder`` every ``repeat_every_s`` since the last
  notification, and one ``escalated`` notice ``escalate_after_s`` after opening. Once
  someone acknowledges it, an ``acknowledged`` notice says who and why, and reminders stop.
  When it clears, a ``cleared`` notice says how long it lasted. Routes choose which of these
  kinds they hear.
* A shelf holds notifications (not the incidents) for a stream, or one rule of it, until a time.
  An incident is held while every rule in it is shelved; the hold is logged once per shelf, and
  when the shelf ends what is still owed goes out once (a late ``opened``, one reminder, the
  escalation). ``acknowledged`` and ``cleared`` close a conversation a receiver already heard
  and are never held; an incident never announced is never announced as over.

Pure decisions, one write: :func:`decide` takes the live incidents, a batch of outcomes or
signals, the shelves in force, the policy and ``now``, and returns one :class:`Decision` (the
incidents opened and changed, rule tallies, events and outbox rows) without touching its inputs
or any store. :class:`AlertBook` reads the live incidents, calls it, and hands the change set to
:meth:`~limitwatch.store.Store.write_changes` in one call per batch.

>>> policy = AlertPolicy(severities=(SeverityRule("kiln-*", "beyond-limits", "critical"),))
>>> policy.severity_for("kiln-2/temp", "beyond-limits"), policy.severity_for("kiln-2/temp", "trend")
('critical', 'warning')

References
----------
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*, and IEC 62682:2014
(its international counterpart): shelving (a temporary, operator-initiated suppression that ends
by itself), deadband/off-delay against chattering, and alarm floods. EEMUA 191, *Alarm Systems:
A Guide to Design, Management and Procurement*. Western Electric Co. (1956), *Statistical
Quality Control Handbook*, and L. S. Nelson (1984), "The Shewhart control chart -- tests for
special causes", J. Quality Technology 16(4): the rules named in :data:`RULE_WORDS`. (All cited
from memory.)
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from fnmatch import fnmatchcase
from typing import Literal

from limitwatch.alerts.messages import (
    RECENT_FOR,
    RECENT_READINGS,
    RULE_WORDS,
    StreamInfo,
    describe,
    flood_payload,
    iso_time,
    notification_payload,
    recent_block,
    rule_words,
    silence_words,
)
from limitwatch.durations import format_duration
from limitwatch.model import Outcome, StreamSignal
from limitwatch.store import (
    SEVERITIES,
    Alert,
    ChangeSet,
    EventRow,
    Flood,
    OutboxRow,
    RuleTally,
    Shelf,
    Store,
    signal_context,
)

__all__ = [
    "NOTICE_KINDS",
    "RULE_WORDS",
    "SEVERITIES",
    "AlertBook",
    "AlertPolicy",
    "BookReport",
    "Decision",
    "Notice",
    "SeverityRule",
    "covering_shelf",
    "decide",
    "decide_tick",
    "describe",
    "held_until",
    "notices_due",
    "notification_payload",
    "rule_words",
    "silence_words",
]

NoticeKind = Literal[
    "opened",
    "raised",
    "reminder",
    "escalated",
    "acknowledged",
    "shelved",
    "unshelved",
    "cleared",
    "flood",
]
NOTICE_KINDS: tuple[str, ...] = (
    "opened",
    "raised",
    "reminder",
    "escalated",
    "acknowledged",
    "shelved",
    "unshelved",
    "cleared",
    "flood",
)
"""Every kind of notification, in the order an incident can owe them."""

DEFAULT_NOTICES: tuple[str, ...] = ("opened", "raised", "escalated", "cleared", "flood")
"""What a route hears unless it says otherwise: the start, a worse severity, the escalation,
the end, and a flood notice; reminders and acknowledgements only when asked for."""

HELD_BY_SHELVES = frozenset({"opened", "raised", "reminder", "escalated"})
"""Kinds a shelf holds back; ``acknowledged`` and ``cleared`` end what a receiver heard."""

_SENT_EVENT = {"reminder": "reminded", "escalated": "escalated"}

Targets = Callable[[str, str, str, NoticeKind], Sequence[str]]
"""``(stream, rule, severity, kind) -> notifier names``: where a notification goes."""


def _rank(severity: str) -> int:
    return SEVERITIES.index(severity) if severity in SEVERITIES else -1


# --------------------------------------------------------------------------- policy


@dataclass(frozen=True, slots=True)
class SeverityRule:
    """``severity`` for streams matching the glob ``streams`` and ``rule`` (any rule when None)."""

    streams: str = "*"
    rule: str | None = None
    severity: str = "warning"

    def matches(self, stream: str, rule: str) -> bool:
        return fnmatchcase(stream, self.streams) and self.rule in (None, rule)


@dataclass(frozen=True, slots=True)
class AlertPolicy:
    """The knobs of the lifecycle.

    The defaults are common practice, not a standard: ten quiet readings to clear, an hourly
    reminder, escalation off until a second route is configured, and notifications that stop
    being retried after a day.
    """

    clear_after: int = 10
    repeat_every_s: float | None = 3600.0
    escalate_after_s: float | None = None
    route: str = "default"
    escalation_route: str = "escalation"
    default_severity: str = "warning"
    severities: tuple[SeverityRule, ...] = ()
    notification_ttl_s: float | None = 86400.0
    targets: Targets | None = None
    """Optional router; without one, escalations go to ``escalation_route`` and the rest to
    ``route``."""
    stream_info: Callable[[str], StreamInfo] | None = None
    """The stream's description and unit, for notification texts."""
    flood_after: int | None = 10
    """More incidents than this opening or clearing within ``flood_window_s`` are a flood:
    their notifications fold into one flood notice. Ten in ten minutes is the common
    alarm-management target for one operator (EEMUA 191, ANSI/ISA-18.2; common practice,
    cited from memory). None turns flood handling off."""
    flood_window_s: float = 600.0

    def __post_init__(self) -> None:
        if self.clear_after < 1:
            raise ValueError(f"clear_after must be at least 1 reading, not {self.clear_after}")
        if self.flood_after is not None and self.flood_after < 1:
            raise ValueError(
                f"flood_after must be at least 1 or None (off), not {self.flood_after}"
            )
        if not self.flood_window_s > 0:
            raise ValueError("flood_window_s must be a positive number of seconds")
        for name in ("repeat_every_s", "escalate_after_s", "notification_ttl_s"):
            value = getattr(self, name)
            if value is not None and not value > 0:
                raise ValueError(f"{name} must be a positive number of seconds or None (off)")
        for severity in (self.default_severity, *(r.severity for r in self.severities)):
            if severity not in SEVERITIES:
                raise ValueError(
                    f"unknown severity {severity!r}; severities are {', '.join(SEVERITIES)}"
                )

    def severity_for(self, stream: str, rule: str) -> str:
        """The first matching :class:`SeverityRule` wins; otherwise ``default_severity``."""
        for entry in self.severities:
            if entry.matches(stream, rule):
                return entry.severity
        return self.default_severity

    def routes_for(self, alert: Alert, kind: NoticeKind) -> tuple[str, ...]:
        if self.targets is not None:
            return tuple(self.targets(alert.stream, alert.rule, alert.severity, kind))
        return (self.escalation_route,) if kind == "escalated" else (self.route,)

    def info(self, stream: str) -> StreamInfo:
        return self.stream_info(stream) if self.stream_info is not None else StreamInfo()


# --------------------------------------------------------------------------- small pure parts


@dataclass(frozen=True, slots=True)
class Notice:
    """A notification an incident owes. ``number`` makes the event id stable however often it
    is decided: 0 for ``opened``, ``acknowledged`` and ``cleared``, the reminder's ordinal,
    1 for ``escalated``, the new severity's rank for ``raised``, the shelf's id for
    ``shelved`` and the end of the hold (epoch seconds) for ``unshelved``."""

    kind: NoticeKind
    number: int

    def event_id(self, alert_id: int) -> str:
        return f"{alert_id}:{self.kind}:{self.number}"


def notices_due(alert: Alert, policy: AlertPolicy, now: float) -> tuple[Notice, ...]:
    """The notifications a live incident owes at ``now``, ignoring shelves.

    One never announced owes its ``opened`` notice (late, if a shelf held it), unless someone
    acknowledged it first; one announced at a lower severity owes ``raised``; while open, a
    reminder falls due ``repeat_every_s`` after the last notification and the escalation once,
    ``escalate_after_s`` after opening; an acknowledgement of an announced incident is
    announced once.
    """
    if alert.state == "cleared":
        return ()
    due: list[Notice] = []
    is_open = alert.state == "open"
    if alert.notified_at is None:
        if is_open:
            due.append(Notice("opened", 0))
    else:
        if _rank(alert.announced_severity or "") < _rank(alert.severity):
            due.append(Notice("raised", _rank(alert.severity)))
        if (
            is_open
            and policy.repeat_every_s is not None
            and alert.last_notice_at is not None
            and now >= alert.last_notice_at + policy.repeat_every_s
        ):
            due.append(Notice("reminder", alert.reminders + 1))
        if not is_open and alert.ack_announced_at is None:
            due.append(Notice("acknowledged", 0))
    if (
        is_open
        and policy.escalate_after_s is not None
        and alert.escalated_at is None
        and now >= alert.opened_at + policy.escalate_after_s
    ):
        due.append(Notice("escalated", 1))
    return tuple(due)


def covering_shelf(shelves: Iterable[Shelf], stream: str, rule: str, now: float) -> Shelf | None:
    """The shelf in force at ``now`` that covers the stream and rule and ends last, if any."""
    live = [s for s in shelves if s.ended_at is None and s.until > now and s.covers(stream, rule)]
    return max(live, key=lambda s: s.until, default=None)


def held_until(shelves: Sequence[Shelf], alert: Alert, now: float) -> tuple[float, Shelf] | None:
    """When the shelves stop holding the incident's notifications, and the shelf that ends
    first among those needed; None when some rule in it is not shelved. An incident is held
    only while everything it says is shelved."""
    needed: list[Shelf] = []
    for rule in alert.rules or (alert.rule,):
        shelf = covering_shelf(shelves, alert.stream, rule, now)
        if shelf is None:
            return None
        needed.append(shelf)
    first = min(needed, key=lambda s: s.until)
    return first.until, first


def after_sending(alert: Alert, notice: Notice, now: float) -> None:
    """The incident's bookkeeping once ``notice`` has been queued (changes ``alert``)."""
    kind = notice.kind
    if kind == "opened":
        alert.notified_at = alert.last_notice_at = now
        alert.announced_severity = alert.severity
    elif kind == "raised":
        alert.announced_severity = alert.severity
        alert.last_notice_at = now
    elif kind == "reminder":
        alert.reminders, alert.last_notice_at = notice.number, now
    elif kind == "escalated":
        alert.escalated_at = now
    elif kind == "acknowledged":
        alert.ack_announced_at = now
    elif kind == "cleared":
        alert.cleared_announced_at = now


def _finite(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


# --------------------------------------------------------------------------- the decision


@dataclass(slots=True)
class BookReport:
    """What one decision did, for logs and health counters."""

    opened: int = 0
    joined: int = 0
    repeated: int = 0
    cleared: int = 0
    replayed: int = 0
    queued: int = 0
    suppressed: int = 0
    flood_started: int = 0
    flood_ended: int = 0


@dataclass(slots=True)
class Decision:
    """The outcome of :func:`decide`: the change set to write, every live incident of the
    touched streams as it now stands (None: the stream has none), and the counts."""

    changes: ChangeSet
    live: dict[str, Alert | None]
    report: BookReport = field(default_factory=BookReport)
    flood: Flood | None = None
    """The flood going on after this decision, if any."""


class _Work:
    """The working state of one decision: copies of the live incidents it touches, changed in
    place reading by reading, compared with the originals at the end."""

    def __init__(
        self,
        live: Mapping[str, Alert],
        shelves: Sequence[Shelf],
        policy: AlertPolicy,
        now: float,
        next_id: int,
        last_seen: Mapping[str, float] | None = None,
        surge: FloodInput | None = None,
    ) -> None:
        self.original = live
        self.last_seen = last_seen or {}
        surge = surge or FloodInput()
        self.recent: list[str] = list(surge.recent)
        self.flood = surge.flood.copy() if surge.flood is not None else None
        self.flood_before = surge.flood
        self.next_flood_id = surge.next_id
        self.flood_routes: dict[str, None] = {}
        self.flood_notice: dict | None = None
        self.shelves, self.policy, self.now, self.next_id = shelves, policy, now, next_id
        self.current: dict[str, Alert | None] = {}
        self.touched: dict[int, Alert] = {}
        self.new: dict[int, Alert] = {}
        self.events: list[EventRow] = []
        self.outbox: list[OutboxRow] = []
        self.report = BookReport()
        self.ended_flood: Flood | None = None
        if (
            self.flood is not None
            and self.policy.flood_after is not None
            and len(self.recent) <= self.policy.flood_after
        ):
            self.flood.ended_at = now  # the surge has passed: notifications one by one again
            self.ended_flood = self.flood
            self.report.flood_ended += 1

    # ---- floods

    def changed_state(self, alert: Alert) -> None:
        """An incident opened or cleared: count it towards a flood, start one if it is."""
        self.recent.append(alert.stream)
        limit = self.policy.flood_after
        live = self.flood if self.flood is not None and self.flood.ended_at is None else None
        if live is None and limit is not None and len(self.recent) > limit:
            live = self.flood = Flood(self.next_flood_id, self.now)
            self.next_flood_id += 1
            live.streams = sorted(set(self.recent))
            live.changes = len(self.recent)
            self.report.flood_started += 1
            # Told as it stood when it started, whichever batch the rest arrive in.
            self.flood_notice = flood_payload(live, self.policy, self.now)
        elif live is not None:
            live.changes += 1
            if alert.stream not in live.streams:
                live.streams.append(alert.stream)

    def flooding(self) -> Flood | None:
        return self.flood if self.flood is not None and self.flood.ended_at is None else None

    # ---- reading and writing the working set

    def incident(self, stream: str) -> Alert | None:
        if stream in self.current:
            return self.current[stream]
        original = self.original.get(stream)
        if original is None or original.state == "cleared":
            self.current[stream] = None
            return None
        work = original.copy()
        self.current[stream] = work
        self.touched[work.id] = work
        self.settle(work)  # an acknowledgement from the operator, a reminder now due ...
        return work

    def event(self, alert: Alert, kind: str, note: str | None = None, **data: object) -> None:
        self.events.append(EventRow(alert.id, kind, self.now, note=note, data=data or None))

    # ---- transitions

    def open(self, signal: StreamSignal) -> Alert:
        policy, now = self.policy, self.now
        severity = policy.severity_for(signal.stream, signal.rule)
        value = _finite(signal.value)
        ctx = signal_context(signal)
        stale = signal.rule == "stale"
        last_reading = signal.time - signal.statistic if stale and signal.statistic else None
        alert = Alert(
            id=self.next_id,
            stream=signal.stream,
            rule=signal.rule,
            state="open",
            severity=severity,
            opened_at=now,
            # A silence begins at the stream's last reading, not at the check that found it.
            first_time=last_reading if last_reading is not None else signal.time,
            first_index=signal.index,
            first_value=value,
            last_time=signal.time,
            last_index=signal.index,
            last_value=value,
            signal_count=1,
            quiet_count=0,
            seen_time=last_reading if last_reading is not None else signal.time,
            signal=ctx,
            silent_since=last_reading if stale else None,
        )
        alert.rules[signal.rule] = RuleTally(
            signal.rule,
            severity,
            1,
            signal.time,
            signal.index,
            value,
            signal.time,
            signal.index,
            value,
            ctx,
        )
        self.next_id += 1
        self.current[signal.stream] = alert
        self.touched[alert.id] = self.new[alert.id] = alert
        self.report.opened += 1
        self.event(
            alert,
            "opened",
            f"{signal.rule} on {signal.chart} chart, severity {severity}",
            value=value,
            time=signal.time,
            index=signal.index,
        )
        self.changed_state(alert)
        self.settle(alert)
        return alert

    def join(self, alert: Alert, signal: StreamSignal) -> None:
        """A signal for a live incident: count it under its rule, move the last reading."""
        value = _finite(signal.value)
        ctx = signal_context(signal)
        tally = alert.rules.get(signal.rule)
        if tally is None:
            severity = self.policy.severity_for(alert.stream, signal.rule)
            alert.rules[signal.rule] = RuleTally(
                signal.rule,
                severity,
                1,
                signal.time,
                signal.index,
                value,
                signal.time,
                signal.index,
                value,
                ctx,
            )
            self.report.joined += 1
            self.event(
                alert,
                "joined",
                f"{signal.rule} on {signal.chart} chart, severity {severity}",
                rule=signal.rule,
                value=value,
                time=signal.time,
            )
            if _rank(severity) > _rank(alert.severity):
                self.event(alert, "raised", f"severity {alert.severity} -> {severity}")
                alert.severity = severity
        else:
            tally.signal_count += 1
            tally.last_time, tally.last_index, tally.last_value = (
                signal.time,
                signal.index,
                value,
            )
            tally.signal = ctx
            self.report.repeated += 1
        alert.signal_count += 1
        alert.last_time, alert.last_index, alert.last_value = signal.time, signal.index, value
        alert.signal = ctx
        if signal.rule == "stale" and alert.silent_since is None and signal.statistic is not None:
            alert.silent_since = signal.time - signal.statistic
        self.settle(alert)

    def clear(self, alert: Alert, note: str) -> None:
        alert.state = "cleared"
        alert.cleared_at = self.now
        self.current[alert.stream] = None
        self.report.cleared += 1
        self.event(alert, "cleared", note)
        self.changed_state(alert)
        if alert.notified_at is not None:
            self.send(alert, Notice("cleared", 0))

    # ---- notifications

    def settle(self, alert: Alert) -> None:
        """Queue what the incident owes now, or record once that a shelf holds it; tell the
        receivers who heard of it when a shelf starts or stops holding it."""
        hold = held_until(self.shelves, alert, self.now) if self.shelves else None
        self.shelf_news(alert, hold)
        notices = notices_due(alert, self.policy, self.now)
        if not notices:
            return
        held = [n for n in notices if n.kind in HELD_BY_SHELVES]
        if not held:
            hold = None
        for notice in notices:
            if hold is None or notice.kind not in HELD_BY_SHELVES:
                self.send(alert, notice)
        if hold is not None:
            until, shelf = hold
            if alert.suppressed_until is None or until > alert.suppressed_until:
                kinds = ", ".join(n.kind for n in held)
                self.event(
                    alert,
                    "suppressed",
                    f"{kinds} notification held until {_iso(until)} "
                    f"(shelved by {shelf.shelved_by}: {shelf.reason})",
                    shelf_id=shelf.id,
                    held=[n.event_id(alert.id) for n in held],
                )
                self.report.suppressed += 1
                alert.suppressed_until = until

    def shelf_news(self, alert: Alert, hold: tuple[float, Shelf] | None) -> None:
        """``shelved`` when a shelf starts holding an announced incident, ``unshelved`` when
        the hold ends (early or at its time); an incident never announced gets neither."""
        if alert.state == "cleared":
            return
        if hold is None:
            if alert.suppressed_until is not None:
                ended = alert.suppressed_until
                alert.suppressed_until = None  # a later shelf is a new hold
                if alert.notified_at is not None:
                    self.send(alert, Notice("unshelved", round(ended)))
            return
        until, shelf = hold
        new = alert.suppressed_until is None or until > alert.suppressed_until
        if new and alert.notified_at is not None:
            self.send(alert, Notice("shelved", shelf.id), shelf=shelf)
            alert.suppressed_until = until

    def send(self, alert: Alert, notice: Notice, *, shelf: Shelf | None = None) -> None:
        policy, now = self.policy, self.now
        flood = self.flooding()
        if flood is not None:
            # Told in the flood notice instead (to the routes that hear floods).
            self.flood_routes.update(dict.fromkeys(policy.routes_for(alert, "flood")))
            self.event(
                alert,
                "suppressed",
                f"{notice.kind} notification folded into flood {flood.id} "
                f"(more than {policy.flood_after} incidents within "
                f"{format_duration(policy.flood_window_s)})",
                flood_id=flood.id,
                held=[notice.event_id(alert.id)],
            )
            self.report.suppressed += 1
            after_sending(alert, notice, now)
            return
        payload = notification_payload(alert, notice, now, policy.info(alert.stream))
        if shelf is not None:
            payload["shelf"] = {
                "id": shelf.id,
                "until": shelf.until,
                "until_iso": iso_time(shelf.until),
                "by": shelf.shelved_by,
                "reason": shelf.reason,
            }
            payload["text"] = describe(payload)
        routes = policy.routes_for(alert, notice.kind)
        ttl = policy.notification_ttl_s
        expires = None if ttl is None else now + ttl
        for route in routes:
            self.outbox.append(
                OutboxRow(f"{payload['event_id']}:{route}", alert.id, route, payload, now, expires)
            )
        self.report.queued += len(routes)
        self.event(
            alert,
            _SENT_EVENT.get(notice.kind, "notified"),
            f"{notice.kind} notification queued for {', '.join(routes)}"
            if routes
            else "no route matches",
            event_id=payload["event_id"],
            routes=list(routes),
        )
        after_sending(alert, notice, now)

    # ---- what readings and signals do

    def take(
        self,
        stream: str,
        signals: Sequence[StreamSignal],
        *,
        time: float | None = None,
        z: float | None = None,
        monitoring: bool = False,
    ) -> None:
        """One accepted reading (``time`` given) with the signals it raised, or signals that
        came without a reading (a stale check)."""
        alert = self.incident(stream)
        if time is not None and time <= (
            alert.seen_time if alert is not None else self.last_seen.get(stream, -math.inf)
        ):
            self.report.replayed += 1
            return
        fired = {s.rule for s in signals}
        if signals:
            rest = signals
            if alert is None:
                alert, rest = self.open(signals[0]), signals[1:]
            for signal in rest:
                self.join(alert, signal)
            if time is not None:
                alert.quiet_count = 0
        if alert is None:
            return
        for signal in signals:
            _worse(alert, _signal_z(signal))
        if time is None:
            return
        alert.seen_time = time
        if monitoring:
            _worse(alert, z)
        if alert.silent_since is not None and "stale" not in fired:
            tally = alert.rules.get("stale")
            allowed = None if tally is None else tally.signal.get("limit")
            if allowed is None or self.now - time <= allowed:
                # Readings arrive again, recent enough by the measure that found the silence.
                # Readings sent late, from before it, leave the incident as it is.
                alert.silent_since = None
                if set(alert.rules) <= {"stale"}:
                    self.clear(alert, f"readings arrive again (one at {_iso(time)})")
                    return
                self.event(alert, "resumed", f"readings arrive again (one at {_iso(time)})")
        if not signals and monitoring and alert.silent_since is None:
            alert.quiet_count += 1
            if alert.quiet_count >= self.policy.clear_after:
                self.clear(
                    alert,
                    f"{self.policy.clear_after} consecutive readings without a signal from any "
                    "rule",
                )

    def finish(self) -> Decision:
        flood = self.flood
        if flood is not None and self.flood_routes:
            # Queued again by each decision during the flood; the key makes repeats no-ops, so a
            # route hears of the flood once, listing the incidents that made it.
            payload = self.flood_notice or flood_payload(flood, self.policy, self.now)
            ttl = self.policy.notification_ttl_s
            for route in self.flood_routes:
                self.outbox.append(
                    OutboxRow(
                        f"{payload['event_id']}:{route}",
                        None,
                        route,
                        payload,
                        self.now,
                        None if ttl is None else self.now + ttl,
                    )
                )
        changes = ChangeSet(outbox=self.outbox, events=self.events)
        if self.ended_flood is not None and self.ended_flood is not flood:
            changes.floods.append(self.ended_flood)
        if flood is not None and flood != self.flood_before:
            changes.floods.append(flood)
        for alert_id, alert in self.touched.items():
            if alert_id in self.new:
                changes.opened.append(alert)
                changes.rules.extend((alert_id, t) for t in alert.rules.values())
                continue
            before = self.original[alert.stream]
            if alert != before:
                changes.changed.append(alert)
                for rule, tally in alert.rules.items():
                    if before.rules.get(rule) != tally:
                        changes.rules.append((alert_id, tally))
        live_flood = flood if flood is not None and flood.ended_at is None else None
        return Decision(changes, dict(self.current), self.report, live_flood)


@dataclass(frozen=True, slots=True)
class FloodInput:
    """What a decision needs to know about floods: the streams of the incidents opened or
    cleared within the policy's window before it (one entry each), the flood going on, and
    the number a new flood would get."""

    recent: tuple[str, ...] = ()
    flood: Flood | None = None
    next_id: int = 1


def _iso(t: float | None) -> str:
    return iso_time(t) or "an unknown time"


def decide(
    live: Mapping[str, Alert],
    outcomes: Iterable[Outcome] = (),
    *,
    signals: Iterable[StreamSignal] = (),
    shelves: Sequence[Shelf] = (),
    policy: AlertPolicy,
    now: float,
    next_id: int,
    last_seen: Mapping[str, float] | None = None,
    surge: FloodInput | None = None,
) -> Decision:
    """Fold a batch into the incidents: accepted ``outcomes`` in order, then ``signals`` that
    came without a reading. ``live`` maps streams to their live incident (at least every stream
    in the batch that has one); it is not changed. New incidents are numbered from
    ``next_id``. A reading counts once per rule however many detectors agree.

    ``last_seen`` gives, for streams without a live incident, the time of the last reading a
    cleared one saw: a reading at or before it is a replay and changes nothing (a redelivered
    batch must not reopen what it once cleared)."""
    work = _Work(live, shelves, policy, now, next_id, last_seen, surge)
    for outcome in outcomes:
        if not outcome.accepted:
            continue
        reading = outcome.reading
        work.take(
            reading.stream,
            _one_per_rule(outcome.signals),
            time=reading.time,
            z=outcome.z,
            monitoring=outcome.phase == "monitoring",
        )
    by_stream: dict[str, list[StreamSignal]] = {}
    for signal in signals:
        by_stream.setdefault(signal.stream, []).append(signal)
    for stream, found in by_stream.items():
        work.take(stream, _one_per_rule(found))
    return work.finish()


def decide_tick(
    live: Mapping[str, Alert],
    *,
    shelves: Sequence[Shelf] = (),
    policy: AlertPolicy,
    now: float,
    surge: FloodInput | None = None,
) -> Decision:
    """What the live incidents owe at ``now`` with no reading: reminders, escalations,
    acknowledgements to announce, and notices a shelf held that may now go out; and whether
    a flood is over."""
    work = _Work(live, shelves, policy, now, next_id=0, surge=surge)
    for stream in live:
        work.incident(stream)
    return work.finish()


def _signal_z(signal: StreamSignal) -> float | None:
    """Where the signalling reading lay, in sigmas from the center line."""
    if signal.rule == "stale" or not signal.sigma > 0 or not math.isfinite(signal.value):
        return None
    return (signal.value - signal.center) / signal.sigma


def _worse(alert: Alert, z: float | None) -> None:
    if (
        z is not None
        and math.isfinite(z)
        and (alert.worst_z is None or abs(z) > abs(alert.worst_z))
    ):
        alert.worst_z = z


def _one_per_rule(signals: Sequence[StreamSignal]) -> list[StreamSignal]:
    if len(signals) < 2:
        return list(signals)
    seen: dict[str, StreamSignal] = {}
    for s in signals:
        seen.setdefault(s.rule, s)
    return list(seen.values())


# --------------------------------------------------------------------------- applier


class AlertBook:
    """Applies the lifecycle's decisions to the store: read the live incidents, :func:`decide`,
    one :meth:`~limitwatch.store.Store.write_changes`.

    ``apply(outcomes, now)`` runs inside the service's batch transaction (a savepoint, or its own
    transaction when called alone), so incident changes and the outbox rows they owe commit with
    the readings. ``tick(now)`` is the scheduler's job for reminders, escalations and
    acknowledgements.

    The live incidents of the streams it has seen are kept between batches: a batch used to read
    them all again, and with many live that was an eighth of a batch's time. What is kept is
    exactly what this book last wrote, and it is dropped whenever another connection has
    committed (``Store.data_version``: an operator acknowledged, say), and when a transaction
    holding its writes was rolled back (``Store.on_rollback``).
    """

    def __init__(self, store: Store, policy: AlertPolicy | None = None) -> None:
        self.store = store
        self.policy = policy or AlertPolicy()
        self._live: dict[str, Alert] = {}
        self._known: set[str] = set()
        self._version: int | None = None
        store.on_rollback(self.forget)

    def forget(self) -> None:
        """Drop what is kept of the live incidents; the next batch reads them from the store."""
        self._live.clear()
        self._known.clear()
        self._version = None

    def _live_incidents(self, streams: set[str]) -> dict[str, Alert]:
        """The live incidents of ``streams``; call inside the transaction, so no other writer
        can slip in between the version check and the batch's own writes."""
        version = self.store.data_version()
        if version != self._version:
            self.forget()
            self._version = version
        missing = streams - self._known
        if missing:
            for alert in self.store.live_alerts(missing):
                self._live[alert.stream] = alert
            self._known |= missing
        live = self._live
        return {s: live[s] for s in streams if s in live}

    def _surge(self, now: float) -> FloodInput | None:
        """What the store knows of floods: three small indexed reads per batch."""
        if self.policy.flood_after is None:
            return None
        store = self.store
        return FloodInput(
            tuple(store.changes_since(now - self.policy.flood_window_s)),
            store.live_flood(),
            store.next_flood_id(),
        )

    def _add_recent(self, rows: Sequence[OutboxRow]) -> None:
        """Give each body the stream's last readings up to the notice, for the chart an e-mail
        carries. Read here, not in :func:`decide`: the decision needs no readings, and only
        the few notices that go out pay for the query."""
        done: set[int] = set()
        for row in rows:
            payload = row.payload
            if id(payload) in done or not isinstance(payload, dict):
                continue
            done.add(id(payload))
            if payload.get("kind") not in RECENT_FOR:
                continue
            upto = payload.get("time") if payload.get("kind") != "cleared" else None
            upto = payload.get("cleared_through") or upto
            readings = [
                r
                for r in self.store.recent_readings(payload["stream"], last=RECENT_READINGS)
                if upto is None or r.time <= upto
            ]
            if readings:
                payload["recent"] = recent_block(readings)

    def _remember(self, decision: Decision) -> None:
        for stream, alert in decision.live.items():
            if alert is None:
                self._live.pop(stream, None)
            else:
                self._live[stream] = alert
            self._known.add(stream)

    # ---- entry points

    def apply(self, outcomes: Iterable[Outcome], now: float) -> BookReport:
        """Fold a batch of engine outcomes, in order, into the incidents."""
        outcomes = [o for o in outcomes if o.accepted]
        with self.store.transaction():
            live = self._live_incidents({o.reading.stream for o in outcomes})
            opening = {o.reading.stream for o in outcomes if o.signals} - set(live)
            decision = decide(
                live,
                outcomes,
                shelves=self.store.active_shelves(now),
                policy=self.policy,
                now=now,
                next_id=self.store.next_alert_id(),
                last_seen=self.store.last_seen_times(opening) if opening else None,
                surge=self._surge(now),
            )
            return self._write(decision)

    def apply_signals(self, signals: Iterable[StreamSignal], now: float) -> BookReport:
        """Fold signals that came without a reading (e.g. a stale-stream check)."""
        signals = list(signals)
        with self.store.transaction():
            live = self._live_incidents({s.stream for s in signals})
            decision = decide(
                live,
                signals=signals,
                shelves=self.store.active_shelves(now),
                policy=self.policy,
                now=now,
                next_id=self.store.next_alert_id(),
                surge=self._surge(now),
            )
            return self._write(decision)

    def tick(self, now: float) -> BookReport:
        """Queue the reminders, escalations and announcements due at ``now``."""
        with self.store.transaction():
            live = {a.stream: a for a in self.store.live_alerts()}
            decision = decide_tick(
                live,
                shelves=self.store.active_shelves(now),
                policy=self.policy,
                now=now,
                surge=self._surge(now),
            )
            report = self._write(decision)
        self.forget()  # the tick read everything fresh; the next batch reads its streams again
        return report

    def _write(self, decision: Decision) -> BookReport:
        if decision.changes:
            self._add_recent(decision.changes.outbox)
            self.store.write_changes(decision.changes)
        self._remember(decision)
        return decision.report
