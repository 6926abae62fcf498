"""The daemon: sources in, one worker evaluating and committing, notifications out.

Threads and who owns what:

* sources are plugins (:mod:`limitwatch.ingest.base`, found by type name through the
  ``limitwatch.sources`` entry-point group); the worker knows none of them by name. A source
  that is pushed to puts items on ``intake`` from its own thread (the MQTT source: a reader
  thread per connection process, :mod:`limitwatch.ingest.mqtt.process`); a source that is asked
  (files) is polled by a scheduled job on the worker. Either way the worker parses, commits,
  and only then has the source acknowledge, in arrival order;
* the APScheduler ``BackgroundScheduler`` only puts :class:`Job` requests on ``intake``;
* the **worker** (the thread that calls :meth:`Service.run`) is the only one that touches the
  monitors and the store: it takes a batch (bounded by count and time), evaluates, commits in
  one transaction, and only then acknowledges MQTT deliveries in arrival order and moves file
  offsets; file polls, stale checks, reminders, retention and refits run here too;
* the outbox worker delivers notifications from its own thread and connection, so a slow or
  dead notifier never holds up ingestion;
* the status server answers ``/metrics`` and ``/health``.

Time: every "now" (commits, jobs, file rows, MQTT receipt times) comes from a
:class:`~limitwatch.clocks.ServiceClock`, which never goes backwards when the wall clock is
stepped back; the worker looks for steps every round, logs a WARNING naming the size, and plans
the scheduled jobs again from the monotonic clock (APScheduler plans on the wall clock, and
after a step back would otherwise run nothing until the wall clock made the step up).
``/health`` lists each job's last run and turns ``degraded`` when one is overdue.

SIGTERM or SIGINT: intake stops, the batch in hand is finished, committed and acknowledged,
sources disconnect cleanly (saying ``offline`` on their status topic), the process exits 0.
Anything still queued but unacknowledged stays with the broker for the next start.

Layout: ``worker`` (:class:`Service`, its start, loop and stop, and :func:`serve`), ``batch``
(parse, commit, acknowledge; polled sources), ``jobs`` (:class:`Job`, the scheduler and what
each job does), ``health`` (``/health``) and ``lock`` (one service per database file;
``limitwatch.instance`` still names it). Callers import from ``limitwatch.service``.
"""

from __future__ import annotations

from limitwatch.service.jobs import _STOP as _STOP
from limitwatch.service.jobs import JOB_GRACE_S, RETENTION_EVERY_S, Job
from limitwatch.service.jobs import _now_dt as _now_dt
from limitwatch.service.worker import Service, log, serve

__all__ = ["JOB_GRACE_S", "RETENTION_EVERY_S", "Job", "Service", "log", "serve"]
