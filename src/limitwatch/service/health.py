"""What ``/health`` says about the service: worker, sources, jobs, clock and notifiers.

Why measured on the monotonic clock: a step of the wall clock must neither hide a stalled
worker or a late job nor fake one.
"""

from __future__ import annotations

import logging
import time
from typing import TYPE_CHECKING, Any

from limitwatch.ingest.timeparse import format_time

if TYPE_CHECKING:
    from limitwatch.service.worker import Service

log = logging.getLogger("limitwatch.service")


def since_last_round(service: Service) -> float:
    beat = service._heartbeat
    return 0.0 if beat is None else time.monotonic() - beat


def health(service: Service) -> dict[str, Any]:
    states = {name: s.health() for name, s in service.sources.items() if s.connection}
    sources = {name: bool(h.connected) for name, h in states.items()}
    broken = service.pipeline is not None and service.pipeline.broken
    quiet = None if service._heartbeat is None else round(service._since_last_round(), 3)
    stalled = quiet is not None and quiet > service.config.service.stall_after
    jobs = service._job_health()
    overdue = any(j["overdue"] for j in jobs.values())
    now = service.clock()
    watch = service.outbox.watch if service.outbox is not None else None
    notifiers = {} if watch is None else watch.health(now)
    after = service.config.service.notifier_failing_after
    failing = [] if watch is None else watch.failing_longer_than(after, now)
    ok = all(sources.values()) and not broken and not stalled and not overdue and not failing
    return {
        "status": "ok" if ok else "degraded",
        "worker": "stalled" if stalled else "failed" if broken else "running",
        "worker_last_round_s_ago": quiet,
        "sources": sources,
        "errors": {n: h.last_error for n, h in states.items() if h.last_error},
        "source_state": {n: dict(h.detail) for n, h in states.items() if h.detail},
        "queue_depth": service.intake.qsize(),
        "streams": 0 if service.pipeline is None else len(service.pipeline.monitors),
        "last_commit": None if service.last_commit is None else format_time(service.last_commit),
        "jobs": jobs,
        "clock": {
            "steps_seen": service.timekeeper.steps,
            "ahead_of_wall_s": round(service.timekeeper.ahead_s(), 3),
        },
        "notifiers": notifiers,
        "notifiers_failing_too_long": failing,
    }
