"""Who hears what, and when: the alert policy (severities, reminders, escalation, routes),
the notices an incident owes at a time, and how shelves hold them. Pure: time comes in as
``now``."""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from fnmatch import fnmatchcase
from typing import Literal

from limitwatch.alerts.messages import (
    StreamInfo,
)
from limitwatch.store import (
    SEVERITIES,
    Alert,
    Shelf,
)

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
