"""Deliver the outbox: every queued notification reaches its notifier once, late rather than never.

Why an outbox: the alert change and the notification it owes are written in the same SQLite
transaction as the readings that caused them (see :mod:`limitwatch.store`). Delivery happens
afterwards, here, in a thread of its own with its own database connection, so a slow mail
server or a dead webhook can delay a notification but never a reading. Because the row is
durable, a restart picks up exactly where the last run stopped.

The contract with the rows (written by :class:`limitwatch.alerts.lifecycle.AlertBook`):

* A row's ``route`` names **one notifier**: the service's ``AlertPolicy.targets`` (from the
  config's ``[[routes]]``) returns notifier names, and the lifecycle queues one row per name,
  keyed ``"{event_id}:{notifier}"``. So one notifier's failure never makes another send twice.
* Optionally the worker also takes ``routes`` (route name -> notifier names), for rows written
  under a route name (e.g. a policy without ``targets`` queues for ``"default"``). Such a row is
  *handed on*: in one transaction the worker queues one row per notifier of the route, with the
  same ``"{event_id}:{notifier}"`` key (so the same event reaching a notifier through two routes
  is delivered once), and marks the route row delivered. Route and notifier names must differ.
* A row whose route names neither a notifier nor a route is given up at once, with the reason.
* Success: the row is marked delivered before the next row is looked at; a delivered row is
  never offered again. A crash between the receiver's acceptance and that mark is the only way
  to send twice, and then the repeat carries the same event id (at-least-once delivery).
* Retryable failure: ``next_attempt_at = now + U(0, min(cap, base * 2**failures))`` -- the
  "full jitter" exponential backoff, base 5 s and cap 15 min by default. After a retryable
  failure the rest of that notifier's rows in the same pass are not tried (they get their own
  backoff), so a notifier that times out costs one timeout per pass, not one per row.
* Giving up: on a non-retryable failure, when the next attempt would fall after the row's
  ``expires_at``, or when a row is found already expired. The row keeps ``delivered_at`` NULL,
  gets ``next_attempt_at`` = :data:`PARKED_AT` and a ``last_error`` starting ``"gave up: "``.

>>> import random
>>> delays = [backoff_delay(n, random.Random(1)) for n in (0, 3, 20)]
>>> 0 <= delays[0] <= 5.0, 0 <= delays[1] <= 40.0, 0 <= delays[2] <= 900.0
(True, True, True)

References
----------
M. Brooker, "Exponential Backoff And Jitter", AWS Architecture Blog (2015): "full jitter",
sleep = random_between(0, min(cap, base * 2 ** attempt)), spreads retries of many clients and
finishes the work with the fewest calls. C. Richardson, *Microservices Patterns* (Manning, 2018),
ch. 3, "Transactional outbox".
"""

from __future__ import annotations

import contextlib
import fcntl
import logging
import os
import random
import socket
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from limitwatch.alerts.delivery_watch import DeliveryWatch
from limitwatch.alerts.messages import iso_time
from limitwatch.alerts.notifiers.base import DeliveryError, Notifier
from limitwatch.alerts.notifiers.registry import build_notifier
from limitwatch.store import Notification, Store, open_store, parse_location

log = logging.getLogger(__name__)

PARKED_AT = 253402300799.0
"""``next_attempt_at`` of a row given up on: 9999-12-31T23:59:59Z, i.e. never."""

GAVE_UP = "gave up: "
"""Prefix of ``last_error`` for a row that will not be tried again."""

Routes = Mapping[str, Sequence[str]]
"""Route name -> names of the notifiers it delivers to."""

Result = Literal["delivered", "retry", "gave-up", "handed-on"]


def backoff_delay(
    failures: int, rng: random.Random, *, base_s: float = 5.0, cap_s: float = 900.0
) -> float:
    """Seconds to wait after the ``failures``-th failure (0 for the first): full jitter."""
    return rng.uniform(0.0, min(cap_s, base_s * 2.0 ** min(failures, 40)))


@dataclass(frozen=True, slots=True)
class RowResult:
    """What one pass did with one outbox row."""

    row_id: int
    route: str
    result: Result
    notifier: str | None = None
    message: str = ""
    next_attempt_at: float | None = None
    attempted: bool = True
    """False for a row not tried because its notifier failed earlier in the same pass."""


@dataclass(slots=True)
class DeliveryReport:
    """One pass of :meth:`OutboxWorker.deliver_due`, for logs, health counters and tests."""

    picked: int = 0
    full: bool = False
    """The pass took as many rows as it may: more may be due already."""
    rows: list[RowResult] = field(default_factory=list)

    def count(self, result: Result) -> int:
        return sum(1 for r in self.rows if r.result == result)

    @property
    def delivered(self) -> int:
        return self.count("delivered")

    @property
    def retried(self) -> int:
        return self.count("retry")

    @property
    def gave_up(self) -> int:
        return self.count("gave-up")

    @property
    def handed_on(self) -> int:
        return self.count("handed-on")


class OutboxWorker:
    """Delivers due outbox rows to notifiers, in a background thread or one pass at a time.

    ``store`` is a database path or store URL, or a callable returning a new :class:`Store`; the
    worker opens one connection per thread that uses it (SQLite connections are bound to their
    thread). On PostgreSQL several services' workers share the outbox: each pass claims its rows
    for its database session and ``lease_s`` seconds (longer than a pass takes), so no row is
    sent by two at once; the rows of a worker that died are claimed again as soon as its session
    is gone, and those of a hung one when the lease runs out.
    ``clock`` gives the time for the background loop only; :meth:`deliver_due` takes ``now``.
    ``rng`` draws the jitter (pass a seeded ``random.Random`` in tests).

    :meth:`start` starts the notifiers and the loop, :meth:`wake` asks for a pass now (call it
    after each commit that queued notifications), :meth:`stop` finishes the row in hand, stops
    the loop and closes the notifiers.
    """

    def __init__(
        self,
        store: str | Path | Callable[[], Store],
        notifiers: Mapping[str, Notifier],
        *,
        routes: Routes | None = None,
        clock: Callable[[], float] = time.time,
        rng: random.Random | None = None,
        base_delay_s: float = 5.0,
        max_delay_s: float = 900.0,
        batch_size: int = 100,
        poll_interval_s: float = 1.0,
        watch: DeliveryWatch | None = None,
        lease_s: float = 300.0,
        shared: bool = False,
    ) -> None:
        """``shared``: several services deliver from one SQLite file (Kafka group workers);
        each pass then runs only while it holds ``<database>.outbox.lock``, so two of them
        never send the same row at once (a row is marked delivered before the lock goes). On
        PostgreSQL the rows' leases do that."""
        self._open = store if callable(store) else (lambda: open_store(store))
        self.claimant = f"{socket.gethostname()}:{os.getpid()}:{id(self):x}"
        """Who this worker is in an outbox row's lease (PostgreSQL, where services share it)."""
        self.lease_s = lease_s
        file = None if callable(store) else parse_location(str(store)).path
        self._pass_file = Path(f"{file}.outbox.lock") if shared and file is not None else None
        self.notifiers = dict(notifiers)
        self.routes = {name: tuple(targets) for name, targets in (routes or {}).items()}
        _check_routes(self.notifiers, self.routes)
        self.clock = clock
        self.rng = rng or random.Random()
        self.base_delay_s, self.max_delay_s = base_delay_s, max_delay_s
        if batch_size < 1:
            raise ValueError("batch_size must be at least 1")
        self.batch_size = batch_size
        self.poll_interval_s = poll_interval_s
        self.watch = watch or DeliveryWatch(self.notifiers)
        """Each notifier's delivery state (failing since, counters, queue), for the log,
        ``/metrics`` and ``/health``."""
        self._local = threading.local()
        self._pass_lock = threading.Lock()
        self._wakeup = threading.Event()
        self._stopping = threading.Event()
        self._thread: threading.Thread | None = None

    @classmethod
    def from_config(cls, config: Any, **kwargs: Any) -> OutboxWorker:
        """A worker for the service's :class:`~limitwatch.config.Config`: its ``store.path`` and
        one notifier per ``[[notifiers]]`` table (secrets are read now, so a missing one stops
        start-up with a clear message). ``kwargs`` go to the constructor (``clock``, ...).

        The config's routes are applied when rows are queued (``AlertPolicy.targets`` returns
        notifier names), so no ``routes`` mapping is needed here.
        """
        notifiers = {}
        for raw in config.notifiers:
            notifier = build_notifier(raw)
            notifiers[notifier.name] = notifier
        return cls(config.store.location, notifiers, **kwargs)

    # ---- one pass

    def deliver_due(self, now: float) -> DeliveryReport:
        """Try every row due at ``now`` (up to ``batch_size``) once, in the calling thread."""
        with self._pass_lock, _pass_held(self._pass_file) as held:
            if not held:  # another service on this file is delivering
                return DeliveryReport()
            store = self._store()
            report = DeliveryReport()
            self._give_up_expired(store, now, report)
            rows = store.claim_notifications(
                now, by=self.claimant, lease_s=self.lease_s, limit=self.batch_size
            )
            report.picked, report.full = len(rows), len(rows) == self.batch_size
            failed: dict[str, str] = {}  # notifier -> its retryable failure in this pass
            for row in rows:
                if self._stopping.is_set():
                    report.full = False
                    break
                report.rows.append(self._handle(store, row, now, failed))
            for r in report.rows:
                if r.result != "handed-on":
                    name = r.notifier or r.route
                    self.watch.record(name, r.result, now, r.message, attempted=r.attempted)
            self.watch.observe_queue(store.waiting_by_route(PARKED_AT))
            return report

    run_once = deliver_due

    def _handle(
        self, store: Store, row: Notification, now: float, failed: dict[str, str]
    ) -> RowResult:
        if row.route in self.routes:
            return self._hand_on(store, row, now)
        notifier = self.notifiers.get(row.route)
        if notifier is None:
            return self._give_up(
                store,
                row,
                f"no notifier or route is named {row.route!r} (notifiers: "
                f"{', '.join(sorted(self.notifiers)) or 'none'}; routes: "
                f"{', '.join(sorted(self.routes)) or 'none'})",
            )
        name = notifier.name
        if row.route in failed:
            return self._retry(
                store,
                row,
                now,
                f"not tried: {row.route} failed earlier in this pass: {failed[row.route]}",
                name,
                attempted=False,
            )
        try:
            notifier.deliver(row.payload, event_id=_event_id(row))
        except DeliveryError as exc:
            if not exc.retryable:
                return self._give_up(store, row, exc.message, name)
            failed[row.route] = exc.message
            return self._retry(store, row, now, exc.message, name)
        except Exception as exc:  # a notifier bug must not stop the other rows
            log.exception("notifier %r raised while delivering outbox row %s", name, row.id)
            failed[row.route] = repr(exc)
            return self._retry(store, row, now, f"unexpected error: {exc!r}", name)
        store.mark_delivered(row.id, now=now)
        return RowResult(row.id, row.route, "delivered", name)

    def _hand_on(self, store: Store, row: Notification, now: float) -> RowResult:
        targets = self.routes[row.route]
        event_id = _event_id(row)
        with store.transaction():
            for name in targets:
                store.enqueue_notification(
                    f"{event_id}:{name}",
                    alert_id=row.alert_id,
                    route=name,
                    payload=row.payload,
                    now=now,
                    expires_at=row.expires_at,
                )
            store.mark_delivered(row.id, now=now)
        return RowResult(row.id, row.route, "handed-on", message=", ".join(targets))

    def _retry(
        self,
        store: Store,
        row: Notification,
        now: float,
        error: str,
        notifier: str,
        *,
        attempted: bool = True,
    ) -> RowResult:
        delay = backoff_delay(
            row.attempts, self.rng, base_s=self.base_delay_s, cap_s=self.max_delay_s
        )
        next_at = now + delay
        if row.expires_at is not None and next_at >= row.expires_at:
            return self._give_up(
                store,
                row,
                f"it expires at {iso_time(row.expires_at)}, before the next attempt would be due; "
                f"last error: {error}",
                notifier,
            )
        store.mark_failed(row.id, error, next_at)
        # DEBUG: an outage would write a line per row per attempt; the delivery watch says
        # once that the notifier fails and once that it recovers.
        log.debug(
            "outbox row %s for %s: %s; next attempt in %.1f s", row.id, notifier, error, delay
        )
        return RowResult(row.id, row.route, "retry", notifier, error, next_at, attempted)

    def _give_up(
        self, store: Store, row: Notification, reason: str, notifier: str | None = None
    ) -> RowResult:
        store.mark_failed(row.id, GAVE_UP + reason, PARKED_AT)
        log.warning("outbox row %s (%s) given up: %s", row.id, row.route, reason)
        return RowResult(row.id, row.route, "gave-up", notifier, reason, PARKED_AT)

    def _give_up_expired(self, store: Store, now: float, report: DeliveryReport) -> None:
        """Record why rows that expired while waiting (e.g. the service was down) end here; only
        ``last_error`` and ``next_attempt_at`` change (no attempt was made)."""
        for row in store.expired_waiting(now, parked_at=PARKED_AT, limit=self.batch_size):
            row_id, route = row.id, row.route
            reason = f"expired at {iso_time(row.expires_at)} after {row.attempts} attempt(s)" + (
                f"; last error: {row.last_error}" if row.last_error else ""
            )
            store.park_notification(row_id, GAVE_UP + reason, PARKED_AT)
            log.warning("outbox row %s (%s) given up: %s", row_id, route, reason)
            report.rows.append(
                RowResult(row_id, route, "gave-up", None, reason, PARKED_AT, attempted=False)
            )

    # ---- background loop

    def start(self) -> None:
        """Start the notifiers, then the delivery thread."""
        if self._thread is not None:
            raise RuntimeError("the outbox worker is already running")
        for notifier in self.notifiers.values():
            try:
                notifier.start()
            except Exception:  # deliveries will fail and be retried; say so once here
                log.exception("notifier %r failed to start", notifier.name)
        self._stopping.clear()
        self._thread = threading.Thread(target=self._loop, name="limitwatch-outbox", daemon=True)
        self._thread.start()

    def wake(self) -> None:
        """Ask for a pass now instead of at the next poll."""
        self._wakeup.set()

    def stop(self, timeout: float | None = 30.0) -> None:
        """Finish the row in hand, stop the thread, close the notifiers."""
        self._stopping.set()
        self._wakeup.set()
        if self._thread is not None:
            self._thread.join(timeout)
            if self._thread.is_alive():
                log.warning("outbox worker still busy after %s s; leaving it to finish", timeout)
            self._thread = None
        for notifier in self.notifiers.values():
            try:
                notifier.close()
            except Exception:
                log.exception("notifier %r failed to close", notifier.name)
        self.close()

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def close(self) -> None:
        """Close the calling thread's database connection, if the worker opened one."""
        store = getattr(self._local, "store", None)
        if store is not None:
            self._local.store = None
            store.close()

    def _loop(self) -> None:
        try:
            while not self._stopping.is_set():
                self._wakeup.clear()
                try:
                    report = self.deliver_due(self.clock())
                except Exception:
                    log.exception("outbox pass failed; trying again shortly")
                    report = None
                if report is not None and report.full:
                    continue
                self._wakeup.wait(self.poll_interval_s)
        finally:
            self.close()

    def _store(self) -> Store:
        store = getattr(self._local, "store", None)
        if store is None:
            store = self._local.store = self._open()
        return store


@contextlib.contextmanager
def _pass_held(path: Path | None) -> Iterator[bool]:
    """Hold ``path``'s exclusive lock for one pass (True), or yield False when another process
    holds it; no file: always True. The kernel drops the lock with a killed process."""
    if path is None:
        yield True
        return
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            yield False
            return
        yield True
    finally:
        os.close(fd)


def _event_id(row: Notification) -> str:
    event_id = row.payload.get("event_id")
    return event_id if isinstance(event_id, str) and event_id else row.idempotency_key


def _check_routes(notifiers: Mapping[str, Notifier], routes: Mapping[str, Sequence[str]]) -> None:
    for key, notifier in notifiers.items():
        if key != notifier.name:
            raise ValueError(f"notifier {notifier.name!r} is filed under a different name {key!r}")
    both = sorted(set(routes) & set(notifiers))
    if both:
        raise ValueError(
            f"{', '.join(both)}: a name cannot be both a route and a notifier; rename one"
        )
    for route, targets in routes.items():
        if not targets:
            raise ValueError(f"route {route!r} names no notifiers")
        unknown = sorted(set(targets) - set(notifiers))
        if unknown:
            raise ValueError(
                f"route {route!r} names unknown notifier(s) {', '.join(unknown)}; notifiers are "
                f"{', '.join(sorted(notifiers)) or 'none'}"
            )
