"""Are notifications getting through? Each notifier's delivery state, for the log, /metrics and
/health.

The outbox retries quietly by design: a receiver that is down for an hour must not flood the log
with a line per row per attempt. But quiet must not mean unseen. So the outbox worker reports
every row it handles here, and this keeps, per notifier:

* whether it is failing, since when, and its last error: one WARNING when it starts failing,
  one when it delivers again (with how long it failed and how many attempts failed meanwhile);
* counters of delivered rows, failed attempts and rows given up;
* the queue as last looked at: rows still to deliver and when the oldest of them was queued.

A notifier counts as failing from its first failed attempt (or given-up row) after a success
until its next success. :meth:`DeliveryWatch.failing_longer_than` gives the notifiers failing
for longer than the site accepts, which turns ``/health`` degraded. Time comes in as ``now``.

>>> lines = []
>>> watch = DeliveryWatch(emit=lines.append)
>>> watch.record("pager", "retry", now=100.0, error="connection refused")
>>> watch.record("pager", "retry", now=160.0, error="connection refused")
>>> watch.failing_longer_than(30.0, now=200.0)
['pager']
>>> watch.record("pager", "delivered", now=300.0)
>>> [line.split(":")[0].split(" of ")[0] for line in lines]
['notifier pager is failing', 'notifier pager delivers again after 3m20s']
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from limitwatch.durations import format_elapsed
from limitwatch.ingest.timeparse import format_time

log = logging.getLogger("limitwatch.outbox")


@dataclass(slots=True)
class NotifierState:
    delivered: int = 0
    failed_attempts: int = 0
    given_up: int = 0
    failing_since: float | None = None
    failed_while_failing: int = 0
    last_error: str | None = None
    pending: int = 0
    oldest_pending_at: float | None = None


class DeliveryWatch:
    """Per-notifier delivery state; written by the outbox thread, read by /metrics and /health
    (a lock keeps each reading whole)."""

    def __init__(
        self, notifiers: Iterable[str] = (), emit: Callable[[str], None] | None = None
    ) -> None:
        self._emit = emit or (lambda line: log.warning("%s", line))
        self._lock = threading.Lock()
        self._states: dict[str, NotifierState] = {name: NotifierState() for name in notifiers}

    def _state(self, notifier: str) -> NotifierState:
        state = self._states.get(notifier)
        if state is None:
            state = self._states[notifier] = NotifierState()
        return state

    def record(
        self, notifier: str, result: str, now: float, error: str = "", *, attempted: bool = True
    ) -> None:
        """One row handled: ``delivered``, ``retry`` (a failed attempt) or ``gave-up``. A row
        given up without an attempt (it expired while the service was down) is counted but says
        nothing about the notifier."""
        with self._lock:
            state = self._state(notifier)
            if not attempted:
                state.given_up += result == "gave-up"
                return
            if result == "delivered":
                state.delivered += 1
                if state.failing_since is not None:
                    failed_for = format_elapsed(now - state.failing_since)
                    self._emit(
                        f"notifier {notifier} delivers again after {failed_for} of failures "
                        f"({state.failed_while_failing} failed attempt(s) meanwhile); "
                        "the notifications it owes are being sent"
                    )
                state.failing_since, state.failed_while_failing = None, 0
                return
            if result == "retry":
                state.failed_attempts += 1
            elif result == "gave-up":
                state.given_up += 1
            else:
                return
            state.last_error = error or state.last_error
            state.failed_while_failing += 1
            if state.failing_since is None:
                state.failing_since = now
                self._emit(
                    f"notifier {notifier} is failing: {error or result}; its notifications wait "
                    "in the outbox and are retried with backoff, unless the failure is one a "
                    "retry cannot mend (then given up); one line again when it delivers"
                )

    def observe_queue(self, queue: Mapping[str, tuple[int, float | None]]) -> None:
        """The outbox as just read: notifier -> (rows to deliver, oldest one's queue time)."""
        with self._lock:
            for state in self._states.values():
                state.pending, state.oldest_pending_at = 0, None
            for notifier, (pending, oldest) in queue.items():
                state = self._state(notifier)
                state.pending, state.oldest_pending_at = pending, oldest

    def failing_longer_than(self, seconds: float, now: float) -> list[str]:
        with self._lock:
            return sorted(
                name
                for name, s in self._states.items()
                if s.failing_since is not None and now - s.failing_since > seconds
            )

    def health(self, now: float) -> dict[str, dict[str, Any]]:
        """Each notifier's state for ``/health``, times in ISO 8601."""
        with self._lock:
            return {
                name: {
                    "state": "ok" if s.failing_since is None else "failing",
                    "failing_since": _iso(s.failing_since),
                    "last_error": s.last_error if s.failing_since is not None else None,
                    "pending": s.pending,
                    "oldest_pending_at": _iso(s.oldest_pending_at),
                    "oldest_pending_age_s": _age(s.oldest_pending_at, now),
                }
                for name, s in sorted(self._states.items())
            }

    def snapshot(self) -> dict[str, NotifierState]:
        with self._lock:
            return {name: NotifierState(**_fields(s)) for name, s in self._states.items()}


class DeliveryCollector:
    """Exposes a :class:`DeliveryWatch` on ``/metrics``, read when scraped."""

    def __init__(self, watch: DeliveryWatch, clock: Callable[[], float]) -> None:
        self.watch = watch
        self.clock = clock

    def collect(self) -> Iterator[Any]:
        states = self.watch.snapshot()
        now = self.clock()
        families = {
            "delivered": CounterMetricFamily(
                "limitwatch_notifications_delivered",
                "Notifications delivered, by notifier.",
                labels=["notifier"],
            ),
            "failed_attempts": CounterMetricFamily(
                "limitwatch_notification_failed_attempts",
                "Delivery attempts that failed (each is retried with backoff), by notifier.",
                labels=["notifier"],
            ),
            "given_up": CounterMetricFamily(
                "limitwatch_notifications_given_up",
                "Notifications given up (not retryable, or past give_up_after), by notifier.",
                labels=["notifier"],
            ),
        }
        pending = GaugeMetricFamily(
            "limitwatch_notifications_pending",
            "Notifications waiting in the outbox to be delivered, by notifier.",
            labels=["notifier"],
        )
        oldest = GaugeMetricFamily(
            "limitwatch_notification_oldest_pending_seconds",
            "Age of the oldest notification still waiting, by notifier (0 when none waits).",
            labels=["notifier"],
        )
        failing = GaugeMetricFamily(
            "limitwatch_notifier_failing",
            "1 while a notifier's last delivery attempt failed.",
            labels=["notifier"],
        )
        for name, s in sorted(states.items()):
            for key, family in families.items():
                family.add_metric([name], getattr(s, key))
            pending.add_metric([name], s.pending)
            oldest.add_metric([name], _age(s.oldest_pending_at, now) or 0.0)
            failing.add_metric([name], 0.0 if s.failing_since is None else 1.0)
        yield from families.values()
        yield from (pending, oldest, failing)


def _fields(state: NotifierState) -> dict[str, Any]:
    return {name: getattr(state, name) for name in NotifierState.__slots__}


def _iso(t: float | None) -> str | None:
    return None if t is None else format_time(round(t, 3))


def _age(t: float | None, now: float) -> float | None:
    return None if t is None else round(max(0.0, now - t), 3)
