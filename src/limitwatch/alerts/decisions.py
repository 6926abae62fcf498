"""The decision: live incidents, a batch's outcomes, shelves, the policy and ``now`` in, ONE
change set out (incidents opened and changed, rule tallies, events, outbox rows, floods). Pure:
it touches none of its inputs; the store writes what it returns."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from limitwatch.alerts.messages import (
    describe,
    flood_payload,
    iso_time,
    notification_payload,
)
from limitwatch.alerts.policy import (
    _SENT_EVENT,
    HELD_BY_SHELVES,
    AlertPolicy,
    Notice,
    _finite,
    _rank,
    after_sending,
    held_until,
    notices_due,
)
from limitwatch.durations import format_duration
from limitwatch.model import Outcome, StreamSignal
from limitwatch.store import (
    Alert,
    ChangeSet,
    EventRow,
    Flood,
    OutboxRow,
    RuleTally,
    Shelf,
    signal_context,
)

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
        alert.rules[signal.rule] = RuleTally.first(
            signal.rule, severity, signal.time, signal.index, value, ctx
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
            alert.rules[signal.rule] = RuleTally.first(
                signal.rule, severity, signal.time, signal.index, value, ctx
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
            if "cause" in tally.signal and "cause" not in ctx:
                # The stale check's later signal repeats a silence whose cause a source said
                # (a Sparkplug death): keep saying it.
                ctx["cause"] = tally.signal["cause"]
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
