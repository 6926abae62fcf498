"""What the store hands out and takes in: plain dataclasses and the few value helpers
that turn rows into them. No SQL here beyond the column lists the incident writer shares."""

from __future__ import annotations

import copy
import hashlib
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import orjson

from limitwatch.ingest.timeparse import format_time
from limitwatch.model import StreamSignal

SEVERITIES: tuple[str, ...] = ("info", "warning", "critical")
"""Severities, lowest first: an incident's severity is the highest of its rules'."""

AlertState = Literal["open", "acknowledged", "cleared"]
ALERT_STATES: tuple[str, ...] = ("open", "acknowledged", "cleared")
EVENT_KINDS: tuple[str, ...] = (
    "opened",
    "notified",
    "reminded",
    "escalated",
    "acknowledged",
    "shelved",
    "unshelved",
    "suppressed",
    "cleared",
    "joined",
    "raised",
    "resumed",
    "merged",
)
"""Kinds of incident event. ``suppressed`` records a notification held back by a shelf,
``joined`` a further rule signalling on a live incident, ``raised`` its severity going up,
``resumed`` readings arriving again after a stale check, ``merged`` the upgrade that folded a
stream's live per-rule alerts into one incident."""

SYSTEM_ACTOR = "limitwatch"
"""The actor recorded for transitions the service makes on its own (opening, clearing)."""


CONFIG_AUTHOR = "config"
"""``created_by`` of a baseline typed into the config file."""


def same_numbers(a: Mapping[str, Any], b: Mapping[str, Any]) -> bool:
    """Whether two baselines' numbers are the same, as stored (NaN equal to NaN)."""
    return json.dumps(dict(a), sort_keys=True) == json.dumps(dict(b), sort_keys=True)


DEAD_LETTER_KEEP_BYTES = 4096
"""How much of a refused payload a dead letter keeps. Enough to read what went wrong with a
JSON document or a CSV line; a 10 MB message sent by mistake (or on purpose) must not become
10 MB of database per copy. The whole payload's size and SHA-256 are kept beside the prefix,
so a copy kept elsewhere can still be matched to its dead letter."""


def _payload_bytes(payload: bytes | str) -> bytes:
    return payload.encode("utf-8", "surrogatepass") if isinstance(payload, str) else payload


def _sha256_hex(payload: bytes | str | None) -> str | None:
    return None if payload is None else hashlib.sha256(_payload_bytes(payload)).hexdigest()


def read_json(text: str) -> Any:
    """Parse JSON the standard library wrote. orjson first: a restart parses one checkpoint per
    stream, and it does so about four times as fast (1.4 s against 0.37 s for 100,000 streams).
    orjson refuses the ``NaN`` and ``Infinity`` that ``json.dumps`` writes for such floats; that
    rare text goes to the standard library, so both read every document to the same value."""
    try:
        return orjson.loads(text)
    except orjson.JSONDecodeError:
        return json.loads(text)


# --------------------------------------------------------------------------- values


def _iso(t: float | None) -> str:
    if t is None:
        return "an unknown time"
    return format_time(math.floor(t))


def _loads(text: str | None, default: Any) -> Any:
    return default if text is None else json.loads(text)


def _finite(x: float | None) -> float | None:
    """SQLite stores NaN as NULL anyway; say so explicitly rather than rely on it."""
    return None if x is None or not math.isfinite(x) else float(x)


@dataclass(frozen=True, slots=True)
class StreamRow:
    """What the store knows about a stream: when it was first and last heard from, and its last
    accepted reading."""

    id: str
    first_seen: float
    last_seen: float
    last_time: float | None
    last_value: float | None
    last_index: int | None
    phase: str | None
    last_baseline_version: int | None = None
    """The baseline version that judged the last accepted reading; None while learning and for
    a reading stored before limitwatch recorded it."""


@dataclass(frozen=True, slots=True)
class StoredReading:
    """An accepted reading as kept for refits and charts: the value and what the engine said."""

    stream: str
    time: float
    value: float
    seq: int | None
    index: int | None
    phase: str | None
    z: float | None
    mr: float | None
    signals: tuple[str, ...] | None = None
    """The rules that signalled on this reading (empty: none); None for a reading stored before
    limitwatch recorded them."""
    baseline_version: int | None = None
    """The stored baseline version the reading was judged against; None for a learning reading
    and for one stored before limitwatch recorded it (its limits then come from its z-score)."""


@dataclass(frozen=True, slots=True)
class Baseline:
    """A fitted set of limits for a stream, with the provenance needed to trust or redo it."""

    stream: str
    version: int
    created_at: float
    created_by: str
    reason: str
    method: str
    numbers: dict[str, Any]
    excluded: tuple[int, ...]
    first_index: int | None
    last_index: int | None
    first_time: float | None
    last_time: float | None

    @classmethod
    def _from_row(cls, row: Mapping[str, Any]) -> Baseline:
        return cls(
            stream=row["stream"],
            version=row["version"],
            created_at=row["created_at"],
            created_by=row["created_by"],
            reason=row["reason"],
            method=row["method"],
            numbers=json.loads(row["numbers_json"]),
            excluded=tuple(json.loads(row["excluded_json"])),
            first_index=row["first_index"],
            last_index=row["last_index"],
            first_time=row["first_time"],
            last_time=row["last_time"],
        )


@dataclass(slots=True)
class RuleTally:
    """What one rule contributed to an incident: how often it signalled, its first and last
    signalling reading, its severity and its last signal's context."""

    rule: str
    severity: str
    signal_count: int
    first_time: float
    first_index: int | None
    first_value: float | None
    last_time: float
    last_index: int | None
    last_value: float | None
    signal: dict[str, Any]

    @classmethod
    def first(
        cls, rule: str, severity: str, time: float, index: int | None, value: float | None,
        signal: dict[str, Any],
    ) -> RuleTally:  # fmt: skip
        """A rule's tally at its first signal: one signal, first reading and last the same."""
        return cls(rule, severity, 1, time, index, value, time, index, value, signal)


@dataclass(slots=True)
class Alert:
    """One incident: everything that went wrong on one stream from its first signal until it
    had been quiet for ``clear_after`` readings. ``rule`` is the rule that opened it; ``rules``
    holds every rule that joined, with its own counts. ``signal`` is the last signal's context
    (limits, center, chart, side ...), so a reminder can be written without looking anything up.

    Mutable on purpose: the lifecycle works on copies of the live incidents and changes their
    counters in place for each reading (a new frozen value per reading per incident was most of
    its cost), and the store writes only the incidents whose state changed.

    Bookkeeping fields: ``quiet_count`` counts consecutive monitoring readings without any
    signal (hysteresis), ``seen_time`` is the time of the last reading that touched the
    incident (a replayed reading at or before it is ignored), ``notified_at``/``last_notice_at``
    are when a notification was first/last queued, ``reminders`` how many reminders were queued,
    ``escalated_at`` when the escalation was queued, ``suppressed_until`` the end of the shelf
    already recorded as holding its notifications, ``worst_z`` the largest distance from the
    center line in sigmas of a reading while it was live, ``silent_since`` the time of the
    stream's last reading while a stale check finds it silent.
    """

    id: int
    stream: str
    rule: str
    state: AlertState
    severity: str
    opened_at: float
    first_time: float
    first_index: int | None
    first_value: float | None
    last_time: float
    last_index: int | None
    last_value: float | None
    signal_count: int
    quiet_count: int
    seen_time: float
    signal: dict[str, Any]
    acknowledged_at: float | None = None
    acknowledged_by: str | None = None
    ack_note: str | None = None
    cleared_at: float | None = None
    notified_at: float | None = None
    last_notice_at: float | None = None
    reminders: int = 0
    escalated_at: float | None = None
    suppressed_until: float | None = None
    worst_z: float | None = None
    silent_since: float | None = None
    ack_announced_at: float | None = None
    cleared_announced_at: float | None = None
    merged_into: int | None = None
    announced_severity: str | None = None
    rules: dict[str, RuleTally] = field(default_factory=dict)

    @classmethod
    def _from_row(cls, row: Mapping[str, Any]) -> Alert:
        fields = {k: v for k, v in row.items() if k != "signal_json"}
        return cls(signal=json.loads(row["signal_json"]), **fields)

    def copy(self) -> Alert:
        """A working copy whose counters (its own and its rules') can change independently."""
        twin = copy.copy(self)
        twin.rules = {rule: copy.copy(tally) for rule, tally in self.rules.items()}
        return twin

    @property
    def worst_zone(self) -> str | None:
        """The worst zone a reading reached while live: ``beyond`` the limits, ``A``, ``B`` or
        ``C``; None when no reading with a known distance came."""
        return zone_of(self.worst_z)


Incident = Alert
"""The plain name for what an alert row now holds."""


def zone_of(z: float | None) -> str | None:
    """The zone of a distance from the center line in sigmas.

    >>> [zone_of(z) for z in (0.5, -1.5, 2.5, 3.2, None)]
    ['C', 'B', 'A', 'beyond', None]
    """
    if z is None or not math.isfinite(z):
        return None
    a = abs(z)
    return "beyond" if a > 3 else "A" if a > 2 else "B" if a > 1 else "C"


ALERT_BOOKKEEPING = (
    "state",
    "severity",
    "first_time",
    "last_time",
    "last_index",
    "last_value",
    "signal_count",
    "quiet_count",
    "seen_time",
    "signal",
    "cleared_at",
    "notified_at",
    "last_notice_at",
    "reminders",
    "escalated_at",
    "suppressed_until",
    "worst_z",
    "silent_since",
    "ack_announced_at",
    "cleared_announced_at",
    "announced_severity",
)
"""Incident fields the lifecycle changes (acknowledging goes through :meth:`Store.acknowledge`)."""

_ALERT_MUTABLE = frozenset(ALERT_BOOKKEEPING) - {"state", "cleared_at"}
"""Columns ``update_alert`` may change; state changes go through the named methods (or a
lifecycle change set), which also write the event log."""


def signal_context(signal: StreamSignal) -> dict[str, Any]:
    """The parts of a signal a notification needs, as plain JSON-safe values.

    >>> from limitwatch.model import StreamSignal
    >>> s = StreamSignal("kiln-3/temp", "beyond-limits", "x", "upper", 40, 100.0, 131.0,
    ...                  (40,), 120.0, 3.0, 129.0, 111.0, 2.0, 11.06, 1)
    >>> signal_context(s)["ucl"], signal_context(s)["involved"]
    (129.0, [40])
    """
    context: dict[str, Any] = {
        "chart": signal.chart,
        "side": signal.side,
        "index": signal.index,
        "involved": list(signal.involved),
        "center": _finite(signal.center),
        "sigma": _finite(signal.sigma),
        "ucl": _finite(signal.ucl),
        "lcl": _finite(signal.lcl),
        "mr": _finite(signal.mr),
        "mr_ucl": _finite(signal.mr_ucl),
        "baseline_version": signal.baseline_version,
        "statistic": _finite(signal.statistic),
        "limit": _finite(signal.limit),
    }
    if signal.cause:
        context["cause"] = signal.cause
    return context


@dataclass(frozen=True, slots=True)
class AlertEvent:
    """One line of an alert's audit trail."""

    id: int
    alert_id: int
    kind: str
    time: float
    actor: str
    note: str | None
    data: dict[str, Any] | None


@dataclass(frozen=True, slots=True)
class Shelf:
    """Notifications for ``stream`` (all rules when ``rule`` is None) are held until ``until``."""

    id: int
    stream: str
    rule: str | None
    created_at: float
    until: float
    reason: str
    shelved_by: str
    ended_at: float | None = None
    ended_by: str | None = None
    pattern: str | None = None
    """The glob the operator gave when one command shelved several streams (one row each)."""

    def covers(self, stream: str, rule: str) -> bool:
        """True when this shelf applies to alerts of ``stream`` for ``rule``."""
        return self.stream == stream and (self.rule is None or self.rule == rule)


@dataclass(frozen=True, slots=True)
class Notification:
    """One outbox row: a payload owed to one route, with its delivery bookkeeping."""

    id: int
    idempotency_key: str
    alert_id: int | None
    route: str
    payload: dict[str, Any]
    created_at: float
    next_attempt_at: float
    attempts: int
    last_error: str | None
    delivered_at: float | None
    expires_at: float | None


@dataclass(frozen=True, slots=True)
class DeadLetter:
    """Input that could not be used, with the reason: the payload verbatim up to
    :data:`DEAD_LETTER_KEEP_BYTES`, and the whole payload's size and SHA-256."""

    id: int
    source: str
    received_at: float
    reason: str
    payload: bytes | str | None
    """The payload, or its first :data:`DEAD_LETTER_KEEP_BYTES` bytes when it was longer."""
    payload_size: int | None = None
    """Bytes in the whole payload as received (UTF-8 for text)."""
    payload_sha256: str | None = None
    """Hex SHA-256 of the whole payload."""

    @property
    def truncated(self) -> bool:
        """True when :attr:`payload` is only the start of what was received."""
        if self.payload is None or self.payload_size is None:
            return False
        return len(_payload_bytes(self.payload)) < self.payload_size


@dataclass(slots=True)
class Flood:
    """Many incidents opening or clearing at once: from ``started_at`` until ``ended_at`` the
    per-incident notifications are folded into one flood notice. ``changes`` counts the
    incidents opened or cleared since it started, ``streams`` names them."""

    id: int
    started_at: float
    ended_at: float | None = None
    changes: int = 0
    streams: list[str] = field(default_factory=list)

    def copy(self) -> Flood:
        return Flood(self.id, self.started_at, self.ended_at, self.changes, list(self.streams))


@dataclass(frozen=True, slots=True)
class EventRow:
    """One line for an incident's audit trail, as decided (see :meth:`Store.write_changes`)."""

    alert_id: int
    kind: str
    time: float
    actor: str = SYSTEM_ACTOR
    note: str | None = None
    data: Mapping[str, Any] | None = None


@dataclass(frozen=True, slots=True)
class OutboxRow:
    """One notification owed to one notifier (or route), keyed so a repeat changes nothing."""

    key: str
    alert_id: int | None
    route: str
    payload: Mapping[str, Any]
    created_at: float
    expires_at: float | None = None


@dataclass(slots=True)
class ChangeSet:
    """Everything one lifecycle decision changes, written by :meth:`Store.write_changes` in one
    call: incidents opened (ids already chosen, see :meth:`Store.next_alert_id`) and incidents
    changed (only those whose fields moved), the rule tallies that moved, events and outbox
    rows."""

    opened: list[Alert] = field(default_factory=list)
    changed: list[Alert] = field(default_factory=list)
    rules: list[tuple[int, RuleTally]] = field(default_factory=list)
    events: list[EventRow] = field(default_factory=list)
    outbox: list[OutboxRow] = field(default_factory=list)
    floods: list[Flood] = field(default_factory=list)

    def __bool__(self) -> bool:
        return bool(
            self.opened or self.changed or self.rules or self.events or self.outbox or self.floods
        )


_INCIDENT_COLUMNS = (
    "id",
    "stream",
    "rule",
    "state",
    "severity",
    "opened_at",
    "first_time",
    "first_index",
    "first_value",
    "last_time",
    "last_index",
    "last_value",
    "signal_count",
    "quiet_count",
    "seen_time",
    "signal_json",
    "acknowledged_at",
    "acknowledged_by",
    "ack_note",
    "cleared_at",
    "notified_at",
    "last_notice_at",
    "reminders",
    "escalated_at",
    "suppressed_until",
    "worst_z",
    "silent_since",
    "ack_announced_at",
    "cleared_announced_at",
    "announced_severity",
)
_UPDATED_COLUMNS = tuple("signal_json" if name == "signal" else name for name in ALERT_BOOKKEEPING)


def _column_value(alert: Alert, column: str) -> Any:
    if column == "signal_json":
        return json.dumps(alert.signal)
    value = getattr(alert, column)
    return _finite(value) if isinstance(value, float) else value


def _tally_row(alert_id: int, t: RuleTally) -> tuple:
    return (
        alert_id,
        t.rule,
        t.severity,
        t.signal_count,
        t.first_time,
        t.first_index,
        _finite(t.first_value),
        t.last_time,
        t.last_index,
        _finite(t.last_value),
        json.dumps(t.signal),
    )


def _tally(row: Mapping[str, Any]) -> RuleTally:
    return RuleTally(
        rule=row["rule"],
        severity=row["severity"],
        signal_count=row["signal_count"],
        first_time=row["first_time"],
        first_index=row["first_index"],
        first_value=row["first_value"],
        last_time=row["last_time"],
        last_index=row["last_index"],
        last_value=row["last_value"],
        signal=json.loads(row["signal_json"]),
    )


# --------------------------------------------------------------------------- the store


def _flood(row: Mapping[str, Any]) -> Flood:
    return Flood(
        row["id"],
        row["started_at"],
        row["ended_at"],
        row["changes"],
        json.loads(row["streams_json"]),
    )


def _notification(row: Mapping[str, Any]) -> Notification:
    fields = {k: v for k, v in row.items() if k != "payload_json"}
    return Notification(payload=json.loads(row["payload_json"]), **fields)
