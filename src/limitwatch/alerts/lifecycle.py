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

from collections.abc import Callable, Iterable, Sequence

from limitwatch.alerts.decisions import (
    BookReport,
    Decision,
    FloodInput,
    decide,
    decide_tick,
)
from limitwatch.alerts.messages import (
    RECENT_FOR,
    RECENT_READINGS,
    RULE_WORDS,
    describe,
    notification_payload,
    recent_block,
    rule_words,
    silence_words,
)
from limitwatch.alerts.policy import (
    DEFAULT_NOTICES,
    NOTICE_KINDS,
    AlertPolicy,
    Notice,
    NoticeKind,
    SeverityRule,
    covering_shelf,
    held_until,
    notices_due,
)
from limitwatch.model import Outcome, StreamSignal
from limitwatch.store import (
    SEVERITIES,
    Alert,
    OutboxRow,
    Store,
)

__all__ = [
    "DEFAULT_NOTICES",
    "NOTICE_KINDS",
    "RULE_WORDS",
    "SEVERITIES",
    "AlertBook",
    "AlertPolicy",
    "BookReport",
    "Decision",
    "Notice",
    "NoticeKind",
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
        """What the store knows of floods: three small indexed reads per batch. The next
        number first: on a shared store that waits for any other worker's decision in flight,
        so the flood read after it is the one this decision writes over."""
        if self.policy.flood_after is None:
            return None
        store = self.store
        next_id = store.next_flood_id()
        return FloodInput(
            tuple(store.changes_since(now - self.policy.flood_window_s)),
            store.live_flood(),
            next_id,
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

    def tick(self, now: float, mine: Callable[[str], bool] | None = None) -> BookReport:
        """Queue the reminders, escalations and announcements due at ``now``, for the live
        incidents of the streams ``mine`` accepts (None: all of them).

        Several workers on one store (Kafka partitions) each pass the streams whose partitions
        they own now (:meth:`~limitwatch.ingest.base.Source.looks_after`), so an incident is
        reminded by the one worker whose batches change it too. A lone service passes nothing
        and ticks every incident, as before. Why not every worker over every incident: on
        PostgreSQL a worker's kept copy of its incidents (see the class) goes stale unseen when
        another worker writes one (``data_version`` moves only for an operator's command), so
        its next batch decides from the old incident and writes it back (tried: a reminder
        the other worker had sent was sent again, the notice kept once by its outbox key but
        the ``reminded`` event twice); and two ticks that read the same incident both queued
        its reminder, with the same result.

        The site-wide part, a flood's end, stays on every worker's ticks and batches and
        happens once: whichever decision first reads the floods after the surge has passed
        ends it, and the others then read it ended. That holds because the tick first waits
        for other workers' decisions in flight (``decide_alone``: on PostgreSQL the numbering
        lock, which batches take before they read floods; on SQLite the write lock of BEGIN
        IMMEDIATE) and reads only after. Before, a PostgreSQL tick read with only a shared
        lock on the change counter, which keeps no other worker's tick or batch out: two ticks
        at once both ended the flood (``tests/test_tick_owners.py``).
        """
        with self.store.transaction():
            # Before reading: other workers' decisions and, on a shared (PostgreSQL) store, an
            # acknowledgement wait for this transaction, so what is written back below cannot
            # undo one. (It takes the change counter first, as batches do: no deadlock.)
            self.store.decide_alone()
            live = {
                a.stream: a
                for a in self.store.live_alerts()
                if mine is None or mine(a.stream)
            }
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
