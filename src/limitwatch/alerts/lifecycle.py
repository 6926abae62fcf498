"""When a signal becomes an alert, when it goes quiet, and which notifications it owes.

Why this exists: a detector may fire on reading after reading while a process sits off target,
and a chart that flaps across a limit would open and close alerts all day. People need one
notification per real event, reminders while nobody has acted, silence during planned
maintenance, and a record of all of it. The rules here:

* An alert is keyed by (stream, rule). A signal with no live alert opens one and owes an
  ``opened`` notification; further signals for a live (open or acknowledged) alert only count
  (debounce).
* Hysteresis: a live alert clears after ``clear_after`` consecutive accepted monitoring readings
  of its stream without a signal for its rule. A signal after that opens a new alert.
* While open and unacknowledged: a ``reminder`` every ``repeat_every_s`` since the last
  notification, and one ``escalation`` to a second route ``escalate_after_s`` after opening.
  Acknowledged alerts owe nothing more.
* A shelf holds notifications (not the alerts themselves) for a stream, or one rule of it, until
  a time. The hold is written to the alert's event log once per shelf; when the shelf ends, what
  is still owed goes out once (a late ``opened``, one reminder, the escalation), the way a shelved
  alarm returns to annunciation when its shelf time runs out.

The decisions are small pure functions over :class:`~limitwatch.store.Alert` values with explicit
times (``judge_signal``, ``judge_quiet``, ``notices_due``, ``covering_shelf`` ...), so every path
can be tested without a clock. :class:`AlertBook` is the thin part that reads and writes the store.

>>> policy = AlertPolicy(severities=(SeverityRule("kiln-*", "beyond-limits", "critical"),))
>>> policy.severity_for("kiln-2/temp", "beyond-limits"), policy.severity_for("kiln-2/temp", "trend")
('critical', 'warning')

References
----------
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*: shelving (a
temporary, operator-initiated suppression that ends by itself), and deadband/off-delay as the
cure for chattering alarms -- the clearing hysteresis here is an off-delay counted in readings.
Western Electric Co. (1956), *Statistical Quality Control Handbook*, and L. S. Nelson (1984),
"The Shewhart control chart -- tests for special causes", J. Quality Technology 16(4): the rules
named in :data:`RULE_WORDS`. (Both cited from memory.)
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from fnmatch import fnmatchcase
from typing import Any, Literal

from limitwatch import SAFETY_CAUTION
from limitwatch.durations import format_duration
from limitwatch.model import Outcome, StreamSignal
from limitwatch.store import ALERT_BOOKKEEPING, Alert, Shelf, Store, signal_context

NoticeKind = Literal["opened", "reminder", "escalation"]
SEVERITIES: tuple[str, ...] = ("info", "warning", "critical")

RULE_WORDS: dict[str, str] = {
    "beyond-limits": "A reading fell outside the natural process limits "
    "(more than three sigma from the center line).",
    "two-of-three-zone-a": "Two of three consecutive readings fell more than two sigma from the "
    "center line on the same side (zone A or beyond).",
    "four-of-five-zone-b": "Four of five consecutive readings fell more than one sigma from the "
    "center line on the same side (zone B or beyond).",
    "run-one-side": "A long run of consecutive readings fell on the same side of the center "
    "line: the process average has probably shifted.",
    "trend": "Consecutive readings kept rising, or kept falling: the process is drifting.",
    "alternating": "Consecutive readings went up and down in turn, like a sawtooth: "
    "two sources may be alternating, or something is over-adjusting the process.",
    "hugging-center": "Many consecutive readings stayed within one sigma of the center line: "
    "the spread is smaller than the limits assume (stale limits or averaged data).",
    "avoiding-center": "Several consecutive readings fell more than one sigma from the center "
    "line, on either side, with none near it: readings may come from mixed sources.",
    "mr-beyond-limit": "The jump between two consecutive readings (the moving range) exceeded "
    "its upper limit: a sudden change.",
    "ewma": "The exponentially weighted moving average (EWMA) of recent readings crossed its "
    "limit: a small but sustained shift in the process average.",
    "cusum": "The cumulative sum (CUSUM) of deviations from the center line crossed its "
    "decision interval: a small but sustained shift in the process average.",
    "stale": "No reading has arrived for longer than expected: the sensor, gateway or export "
    "may have stopped.",
}
"""Each rule id in plain English, for notification texts."""

_SENT_EVENT = {"opened": "notified", "reminder": "reminded", "escalation": "escalated"}

Targets = Callable[[str, str, str, NoticeKind], Sequence[str]]
"""``(stream, rule, severity, kind) -> route names``: where a notification goes."""


def rule_words(rule: str) -> str:
    """The plain-English sentence for ``rule``; unknown rules still get a readable line.

    >>> rule_words("no-such-rule")
    "Rule 'no-such-rule' signalled a special cause."
    """
    return RULE_WORDS.get(rule, f"Rule {rule!r} signalled a special cause.")


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

    def __post_init__(self) -> None:
        if self.clear_after < 1:
            raise ValueError(f"clear_after must be at least 1 reading, not {self.clear_after}")
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
        return (self.escalation_route,) if kind == "escalation" else (self.route,)


# --------------------------------------------------------------------------- pure decisions


@dataclass(frozen=True, slots=True)
class Notice:
    """A notification an alert owes: ``number`` is 0 for ``opened``, the reminder's ordinal for
    ``reminder`` and 1 for ``escalation``, so ``event_id`` is the same however often it is
    decided."""

    kind: NoticeKind
    number: int

    def event_id(self, alert_id: int) -> str:
        return f"{alert_id}:{self.kind}:{self.number}"


def judge_signal(
    latest: Alert | None, signal: StreamSignal
) -> Literal["open", "repeat", "replayed"]:
    """What a signal does, given the newest alert of any state for its stream and rule.

    A signal no newer than the last reading that alert has seen is a replay and changes nothing.
    """
    if latest is None:
        return "open"
    if signal.time <= latest.seen_time:
        return "replayed"
    return "open" if latest.state == "cleared" else "repeat"


def count_signal(alert: Alert, signal: StreamSignal) -> Alert:
    """A further signal for a live alert: count it, move its last reading, restart the quiet
    count."""
    return replace(
        alert,
        signal_count=alert.signal_count + 1,
        last_time=signal.time,
        last_index=signal.index,
        last_value=signal.value if math.isfinite(signal.value) else None,
        quiet_count=0,
        seen_time=signal.time,
        signal=signal_context(signal),
    )


def judge_quiet(
    alert: Alert, reading_time: float, clear_after: int
) -> Literal["quiet", "clear", "replayed"]:
    """What an accepted monitoring reading without this alert's rule does to the alert.

    >>> from limitwatch.store import Alert
    >>> a = Alert(1, "s", "trend", "open", "warning", 0.0, 0.0, 0, 5.0, 0.0, 0, 5.0, 1, 8,
    ...           60.0, {})
    >>> judge_quiet(a, 61.0, clear_after=10), judge_quiet(a, 61.0, clear_after=9)
    ('quiet', 'clear')
    """
    if reading_time <= alert.seen_time:
        return "replayed"
    return "clear" if alert.quiet_count + 1 >= clear_after else "quiet"


def count_quiet(alert: Alert, reading_time: float) -> Alert:
    return replace(alert, quiet_count=alert.quiet_count + 1, seen_time=reading_time)


def notices_due(alert: Alert, policy: AlertPolicy, now: float) -> tuple[Notice, ...]:
    """The notifications an alert owes at ``now``, ignoring shelves.

    Only open (unacknowledged) alerts owe anything. One that has never been notified owes its
    ``opened`` notice (late, if a shelf held it); otherwise a reminder falls due
    ``repeat_every_s`` after the last notification. The escalation falls due once,
    ``escalate_after_s`` after opening.
    """
    if alert.state != "open":
        return ()
    due: list[Notice] = []
    if alert.notified_at is None:
        due.append(Notice("opened", 0))
    elif (
        policy.repeat_every_s is not None
        and alert.last_notice_at is not None
        and now >= alert.last_notice_at + policy.repeat_every_s
    ):
        due.append(Notice("reminder", alert.reminders + 1))
    if (
        policy.escalate_after_s is not None
        and alert.escalated_at is None
        and now >= alert.opened_at + policy.escalate_after_s
    ):
        due.append(Notice("escalation", 1))
    return tuple(due)


def covering_shelf(shelves: Iterable[Shelf], stream: str, rule: str, now: float) -> Shelf | None:
    """The shelf in force at ``now`` that covers the stream and rule and ends last, if any."""
    live = [s for s in shelves if s.ended_at is None and s.until > now and s.covers(stream, rule)]
    return max(live, key=lambda s: s.until, default=None)


def hold_is_new(alert: Alert, shelf: Shelf) -> bool:
    """True when this shelf's hold on the alert has not been written to its event log yet."""
    return alert.suppressed_until is None or shelf.until > alert.suppressed_until


def after_sending(alert: Alert, notice: Notice, now: float) -> Alert:
    """The alert's bookkeeping once ``notice`` has been queued."""
    if notice.kind == "opened":
        return replace(alert, notified_at=now, last_notice_at=now)
    if notice.kind == "reminder":
        return replace(alert, reminders=notice.number, last_notice_at=now)
    return replace(alert, escalated_at=now)


# --------------------------------------------------------------------------- payload


def _num(x: Any) -> float | None:
    return float(x) if isinstance(x, int | float) and math.isfinite(x) else None


def _iso(t: float | None) -> str | None:
    if t is None:
        return None
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


def _duration(seconds: float) -> str:
    minutes = round(seconds / 60)
    if minutes < 120:
        return f"{minutes} min"
    return f"{minutes / 60:.1f} h"


def silence_words(silent_s: float, expected_s: float) -> str:
    """How long a stale stream has been silent against how soon a reading was due, in the
    units people write durations in (``limitwatch.durations``), the silence to the second.

    >>> silence_words(7512.4, 2400.0)
    'no reading for 2h5m12s (expected within 40m)'
    """
    return (
        f"no reading for {format_duration(round(silent_s))} "
        f"(expected within {format_duration(expected_s)})"
    )


def notification_payload(alert: Alert, notice: Notice, now: float) -> dict[str, Any]:
    """The JSON-safe body every notifier receives; ``event_id`` is stable across retries."""
    sig = alert.signal
    payload: dict[str, Any] = {
        "event_id": notice.event_id(alert.id),
        "kind": notice.kind,
        "number": notice.number,
        "alert_id": alert.id,
        "stream": alert.stream,
        "rule": alert.rule,
        "rule_words": rule_words(alert.rule),
        "severity": alert.severity,
        "value": _num(alert.last_value),
        "time": alert.last_time,
        "time_iso": _iso(alert.last_time),
        "chart": sig.get("chart"),
        "side": sig.get("side"),
        "center": _num(sig.get("center")),
        "sigma": _num(sig.get("sigma")),
        "ucl": _num(sig.get("ucl")),
        "lcl": _num(sig.get("lcl")),
        "mr": _num(sig.get("mr")),
        "mr_ucl": _num(sig.get("mr_ucl")),
        "statistic": _num(sig.get("statistic")),
        "limit": _num(sig.get("limit")),
        "baseline_version": sig.get("baseline_version"),
        "signal_count": alert.signal_count,
        "opened_at": alert.opened_at,
        "created_at": now,
        "caution": SAFETY_CAUTION,
    }
    payload["text"] = describe(payload)
    return payload


def describe(payload: dict[str, Any]) -> str:
    """One paragraph for people: what happened, the reading, the limits, and the caution."""

    def g(x: float | None) -> str:
        return "n/a" if x is None else f"{x:.6g}"

    kind = payload["kind"]
    if kind == "opened":
        head = "New alert"
    elif kind == "reminder":
        head = f"Reminder {payload['number']}, not yet acknowledged"
    else:
        waited = _duration(payload["created_at"] - payload["opened_at"])
        head = f"Escalation, not acknowledged after {waited}"
    parts = [
        f"{head}: {payload['severity']} alert {payload['alert_id']} on {payload['stream']} "
        f"({payload['rule']}).",
        payload["rule_words"],
    ]
    silent, due = payload["statistic"], payload["limit"]
    stale = payload["rule"] == "stale" and silent is not None and due is not None
    if stale:
        # The alert's time is when the check ran; the reading it shows came ``silent`` earlier.
        words = silence_words(silent, due)
        last = _iso(payload["time"] - silent) if payload["time"] is not None else None
        if payload["value"] is None:
            parts.append(f"{words[0].upper()}{words[1:]}, checked at {payload['time_iso']}.")
        else:
            parts.append(
                f"Last reading {g(payload['value'])} at {last}: {words}, checked at "
                f"{payload['time_iso']}."
            )
    else:
        parts.append(f"Reading {g(payload['value'])} at {payload['time_iso']}.")
    if payload["chart"] == "mr":
        # The moving range is the MR chart's statistic; say it once.
        parts.append(
            f"Moving range {g(payload['mr'])} against an upper limit of {g(payload['mr_ucl'])}."
        )
    else:
        parts.append(
            f"Center line {g(payload['center'])}, natural process limits "
            f"{g(payload['lcl'])} to {g(payload['ucl'])}."
        )
        if not stale and payload["statistic"] is not None and payload["limit"] is not None:
            parts.append(
                f"Statistic {g(payload['statistic'])} against limit {g(payload['limit'])}."
            )
    if payload["signal_count"] > 1:
        parts.append(f"{payload['signal_count']} signals since it opened.")
    parts.append(payload["caution"])
    return " ".join(parts)


# --------------------------------------------------------------------------- applier


@dataclass(slots=True)
class BookReport:
    """What one ``apply`` or ``tick`` did, for logs and health counters."""

    opened: int = 0
    repeated: int = 0
    cleared: int = 0
    replayed: int = 0
    queued: int = 0
    suppressed: int = 0


_BOOKKEEPING = ALERT_BOOKKEEPING


class AlertBook:
    """Applies the lifecycle to the store.

    ``apply(outcomes, now)`` runs inside the service's batch transaction (it opens a savepoint, or
    its own transaction when called alone), so alert changes and the outbox rows they owe commit
    with the readings. ``tick(now)`` is the scheduler's job for reminders and escalation.

    The live alerts of the streams it has seen are kept between batches: a batch used to read
    them all again, and with many alerts live that was an eighth of a batch's time. What is kept
    is exactly what this book last wrote, and it is dropped whenever another connection has
    committed (``Store.data_version``: an operator acknowledged, say), when a ``tick`` changed
    alerts, and when a transaction holding its writes was rolled back (``Store.on_rollback``).
    """

    def __init__(self, store: Store, policy: AlertPolicy | None = None) -> None:
        self.store = store
        self.policy = policy or AlertPolicy()
        self._live: dict[str, dict[str, Alert]] = {}
        """Live alerts by stream and rule, for the streams in ``_known`` that have any."""
        self._known: set[str] = set()
        self._version: int | None = None
        store.on_rollback(self.forget)

    def forget(self) -> None:
        """Drop what is kept of the live alerts; the next batch reads them from the store."""
        self._live.clear()
        self._known.clear()
        self._version = None

    def _live_alerts(self, streams: set[str]) -> dict[str, dict[str, Alert]]:
        """The live alerts of ``streams`` (a copy to work on); call inside the transaction, so
        no other writer can slip in between the version check and the batch's own writes."""
        version = self.store.data_version()
        if version != self._version:
            self.forget()
            self._version = version
        missing = streams - self._known
        if missing:
            for alert in self.store.live_alerts(missing):
                self._live.setdefault(alert.stream, {})[alert.rule] = alert
            self._known |= missing
        live = self._live
        return {s: dict(live[s]) for s in streams if s in live}

    def _remember(self, live: dict[str, dict[str, Alert]]) -> None:
        """Keep what a batch wrote: its streams' live alerts as they now stand in the store."""
        for stream, rules in live.items():
            if rules:
                self._live[stream] = dict(rules)
            else:
                self._live.pop(stream, None)
            self._known.add(stream)

    # ---- entry points

    def apply(self, outcomes: Iterable[Outcome], now: float) -> BookReport:
        """Fold a batch of engine outcomes, in order, into the alerts."""
        outcomes = [o for o in outcomes if o.accepted]
        report = BookReport()
        with self.store.transaction():
            batch = _Batch(self, {o.reading.stream for o in outcomes}, now, report)
            for outcome in outcomes:
                fired = batch.take_signals(outcome.signals)
                batch.heard_from(outcome.reading.stream, outcome.reading.time, fired)
                if outcome.phase == "monitoring":
                    batch.count_quiet(outcome.reading.stream, outcome.reading.time, fired)
            batch.flush()
        return report

    def apply_signals(self, signals: Iterable[StreamSignal], now: float) -> BookReport:
        """Fold signals that came without a reading (e.g. a stale-stream check)."""
        signals = list(signals)
        report = BookReport()
        with self.store.transaction():
            batch = _Batch(self, {s.stream for s in signals}, now, report)
            batch.take_signals(signals)
            batch.flush()
        return report

    def tick(self, now: float) -> BookReport:
        """Queue the reminders and escalations due at ``now`` (and opened notices a shelf held)."""
        report = BookReport()
        changed = False
        with self.store.transaction():
            shelves = self.store.active_shelves(now)
            for alert in self.store.alerts(state="open"):
                notices = notices_due(alert, self.policy, now)
                if not notices:
                    continue
                updated = self._owe(alert, notices, shelves, now, report)
                self._write(alert, updated)
                changed = True
        if changed:  # what is kept of these alerts is older than what was just written
            self.forget()
        return report

    # ---- shared steps

    def _owe(
        self,
        alert: Alert,
        notices: Sequence[Notice],
        shelves: Sequence[Shelf],
        now: float,
        report: BookReport,
    ) -> Alert:
        """Queue ``notices`` for the alert, or record once that a shelf holds them."""
        shelf = covering_shelf(shelves, alert.stream, alert.rule, now)
        if shelf is not None:
            if hold_is_new(alert, shelf):
                kinds = ", ".join(n.kind for n in notices)
                self.store.add_alert_event(
                    alert.id,
                    "suppressed",
                    now=now,
                    note=f"{kinds} notification held until {_iso(shelf.until)} "
                    f"(shelved by {shelf.shelved_by}: {shelf.reason})",
                    data={"shelf_id": shelf.id, "held": [n.event_id(alert.id) for n in notices]},
                )
                report.suppressed += 1
                alert = replace(alert, suppressed_until=shelf.until)
            return alert
        for notice in notices:
            alert = self._send(alert, notice, now, report)
        return alert

    def _send(self, alert: Alert, notice: Notice, now: float, report: BookReport) -> Alert:
        payload = notification_payload(alert, notice, now)
        routes = self.policy.routes_for(alert, notice.kind)
        ttl = self.policy.notification_ttl_s
        queued = [
            route
            for route in routes
            if self.store.enqueue_notification(
                f"{payload['event_id']}:{route}",
                alert_id=alert.id,
                route=route,
                payload=payload,
                now=now,
                expires_at=None if ttl is None else now + ttl,
            )
            is not None
        ]
        report.queued += len(queued)
        if queued or not routes:
            self.store.add_alert_event(
                alert.id,
                _SENT_EVENT[notice.kind],
                now=now,
                note=f"queued for {', '.join(queued)}" if queued else "no route matches",
                data={"event_id": payload["event_id"], "routes": queued},
            )
        return after_sending(alert, notice, now)

    def _write(self, before: Alert, after: Alert) -> None:
        changes = {
            name: getattr(after, name)
            for name in _BOOKKEEPING
            if getattr(after, name) != getattr(before, name)
        }
        self.store.update_alert(after.id, **changes)


class _Batch:
    """The working set of one ``apply``: live alerts of the batch's streams, kept in memory and
    written once at the end."""

    def __init__(self, book: AlertBook, streams: set[str], now: float, report: BookReport):
        self.book, self.store, self.policy = book, book.store, book.policy
        self.now, self.report = now, report
        self.shelves = self.store.active_shelves(now)
        self.live: dict[str, dict[str, Alert]] = book._live_alerts(streams)
        self.loaded: dict[int, Alert] = {
            alert.id: alert for rules in self.live.values() for alert in rules.values()
        }

    def take_signals(self, signals: Iterable[StreamSignal]) -> set[str]:
        """Apply signals; return the rules that fired (replays included: not quiet either)."""
        fired: set[str] = set()
        seen: set[tuple[str, str]] = set()
        for signal in signals:
            key = (signal.stream, signal.rule)
            if key in seen:
                continue  # one reading counts once per rule, however many detectors agree
            seen.add(key)
            fired.add(signal.rule)
            live = self.live.setdefault(signal.stream, {})
            alert = live.get(signal.rule)
            latest = (
                alert if alert is not None else self.store.latest_alert(signal.stream, signal.rule)
            )
            verdict = judge_signal(latest, signal)
            if verdict == "replayed":
                self.report.replayed += 1
            elif verdict == "repeat":
                assert alert is not None
                live[signal.rule] = count_signal(alert, signal)
                self.report.repeated += 1
            else:
                severity = self.policy.severity_for(signal.stream, signal.rule)
                opened = self.store.open_alert(signal, severity=severity, now=self.now)
                self.report.opened += 1
                self.loaded[opened.id] = opened
                notices = notices_due(opened, self.policy, self.now)
                live[signal.rule] = self.book._owe(
                    opened, notices, self.shelves, self.now, self.report
                )
        return fired

    def heard_from(self, stream: str, time: float, fired: set[str]) -> None:
        """A ``stale`` alert clears as soon as the stream is no longer silent by the measure that
        opened it: an accepted reading no older at the batch's ``now`` than the silence allowed
        (learning or monitoring alike). Readings sent late, from before that, leave it open: the
        next check would only find the stream silent again."""
        alert = self.live.get(stream, {}).get("stale")
        if alert is None or "stale" in fired:
            return
        allowed = alert.signal.get("limit")
        if allowed is None or self.now - time > allowed:
            return
        live = self.live[stream]
        self.book._write(self.loaded.pop(alert.id), live.pop("stale"))
        self.store.clear_alert(
            alert.id, now=self.now, note=f"readings arrive again (one at {_iso(time)})"
        )
        self.report.cleared += 1

    def count_quiet(self, stream: str, time: float, fired: set[str]) -> None:
        live = self.live.get(stream, {})
        for rule, alert in list(live.items()):
            if rule in fired or rule == "stale":  # silence is ended by readings, not counted
                continue
            verdict = judge_quiet(alert, time, self.policy.clear_after)
            if verdict == "replayed":
                continue
            live[rule] = count_quiet(alert, time)
            if verdict == "clear":
                self.book._write(self.loaded.pop(alert.id), live.pop(rule))
                self.store.clear_alert(
                    alert.id,
                    now=self.now,
                    note=f"{self.policy.clear_after} consecutive readings without this rule",
                )
                self.report.cleared += 1

    def flush(self) -> None:
        for rules in self.live.values():
            for alert in rules.values():
                self.book._write(self.loaded[alert.id], alert)
        self.book._remember(self.live)
