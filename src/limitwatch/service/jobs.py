"""The scheduled jobs: what the scheduler plans, what each job does on the worker, and
whether each is on time.

Why the scheduler only enqueues: the worker is the only one that touches the monitors and the
store, so a job is a :class:`Job` request on ``intake``, carried out between batches. Jobs are
planned on the monotonic clock's terms after a step of the wall clock (see :func:`replan`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any

from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MISSED, JobExecutionEvent
from apscheduler.schedulers.background import BackgroundScheduler

from limitwatch.ingest.timeparse import format_time
from limitwatch.pipeline import PipelineBroken, store_failed
from limitwatch.textout import printable

if TYPE_CHECKING:
    from limitwatch.service.worker import Service

log = logging.getLogger("limitwatch.service")


@dataclass(frozen=True, slots=True)
class Job:
    """A request from the scheduler, carried out by the worker between batches."""

    kind: str
    source: str | None = None

    @property
    def id(self) -> str:
        """The scheduler's id for the job, and its name in ``/health``."""
        return self.kind if self.source is None else f"{self.kind}:{self.source}"


_STOP = Job("stop")

RETENTION_EVERY_S = 3600.0
"""How often old readings and dead letters are pruned."""

JOB_GRACE_S = 60.0
"""A job is overdue in ``/health`` once it has not run for its interval plus the larger of
this and its interval (a file poll reading a long backlog holds the other jobs up a while)."""


def _now_dt() -> datetime:
    return datetime.now(UTC)


def make_scheduler(service: Service) -> BackgroundScheduler:
    cfg = service.config
    scheduler = BackgroundScheduler(
        timezone="UTC",
        job_defaults={"coalesce": True, "max_instances": 1, "misfire_grace_time": 30},
    )
    scheduler.add_listener(service._job_event, EVENT_JOB_ERROR | EVENT_JOB_MISSED)

    def every(seconds: float, kind: str, source: str | None = None, **options: Any) -> None:
        job = Job(kind, source)

        def ask() -> None:
            service._job_fired[job.id] = service.monotonic()
            service.intake.put(job)

        service._job_every[job.id] = seconds
        scheduler.add_job(ask, "interval", seconds=seconds, id=job.id, **options)

    for name, source in service.sources.items():
        if source.poll_every is not None:
            every(source.poll_every, source.poll_job, name, next_run_time=_now_dt())
    every(cfg.service.stale_check_every, "stale-check")
    every(cfg.service.alert_tick_every, "alert-tick")
    every(cfg.service.refit_check_every, "refits")
    # Always: dead letters are bounded by default even when readings are kept for ever.
    every(RETENTION_EVERY_S, "retention")
    return scheduler


def replan(service: Service) -> None:
    """Set each job's next run from the monotonic clock: one interval after the scheduler
    last queued it. APScheduler keeps next run times on the wall clock, so after a step
    back of two hours it would wait two hours before running anything."""
    scheduler = service.scheduler
    if scheduler is None or not scheduler.running:
        return
    mono = service.monotonic()
    wall_now = _now_dt()  # the scheduler's own clock, whatever the service was given
    for job in scheduler.get_jobs():
        every = service._job_every.get(job.id)
        if every is None or job.next_run_time is None:  # not ours, or paused
            continue
        since = mono - service._job_fired.get(job.id, service._started_mono)
        wait = min(every, max(0.0, every - since))
        scheduler.modify_job(job.id, next_run_time=wall_now + timedelta(seconds=wait))


def job_event(service: Service, event: JobExecutionEvent) -> None:
    if event.exception is not None:
        log.error("scheduled job %s failed: %s", event.job_id, event.exception)
    else:
        log.warning("scheduled job %s missed its run time", event.job_id)


def run_job_guarded(service: Service, job: Job) -> None:
    """Run one job; a job's own failure is logged and the next run tries again, so a bug
    in, say, the stale check never stops the readings. A failure of the store itself ends
    the service the way a failed batch commit does (see :func:`serve`)."""
    try:
        service._run_job(job)
    except PipelineBroken:
        raise
    except Exception as exc:
        if store_failed(exc):
            raise PipelineBroken(f"scheduled job {job.kind} failed: {exc}") from exc
        service.metrics.job_failures.labels(job.kind).inc()
        log.exception("scheduled job %s failed; its next run tries again", job.kind)


def run_job(service: Service, job: Job) -> None:
    assert service.pipeline is not None and service.book is not None and service.store is not None
    now = service.clock()
    if job.source is not None:  # a source's poll
        service.poll_source(job.source)
    elif job.kind == "stale-check":
        signals = service.pipeline.stale_signals(now, service._cadence_for)
        # A source that shares streams with other workers holds checks back while it settles
        # after a rebalance (a pause is not a silent sensor).
        signals = [
            s
            for s in signals
            if all(src.stale_allowed(s.stream, now) for src in service.sources.values())
        ]
        if signals:
            report = service.book.apply_signals(signals, now)
            service.metrics.alerts_opened.inc(report.opened)
            service._count_floods(report.flood_started, report.flood_ended)
            if report.queued and service.outbox is not None:
                service.outbox.wake()
    elif job.kind == "alert-tick":
        # On several workers sharing the store, each ticks the incidents of its own streams.
        sources = tuple(service.sources.values())
        report = service.book.tick(
            now, mine=lambda stream: all(src.looks_after(stream, now) for src in sources)
        )
        service._count_floods(report.flood_started, report.flood_ended)
        if report.queued and service.outbox is not None:
            service.outbox.wake()
    elif job.kind == "refits":
        for stream in service.pipeline.adopt_new_baselines(now):
            log.info("stream %s: adopted a new stored baseline", printable(stream))
    elif job.kind == "retention":
        service.prune(now)
    service._job_ran[job.id] = (service.monotonic(), now)


def prune(service: Service, now: float) -> tuple[int, int]:
    """The retention job: drop readings and dead letters past the ``[store]`` limits;
    return (readings, dead letters) deleted."""
    assert service.pipeline is not None and service.store is not None
    cfg = service.config.store
    readings = 0
    if cfg.keep_readings_for is not None or cfg.keep_readings_per_stream is not None:
        # Readings newer than a stream's checkpoint are part of its state until the next one.
        service.pipeline.checkpoint_all(now)
        readings = service.store.prune_readings(
            now, max_age_s=cfg.keep_readings_for, max_per_stream=cfg.keep_readings_per_stream
        )
    letters = service.store.prune_dead_letters(
        now, max_age_s=cfg.keep_dead_letters_for, max_count=cfg.keep_dead_letters
    )
    if readings or letters:
        log.info("retention: dropped %d readings and %d dead letters", readings, letters)
    return readings, letters


def count_floods(service: Service, started: int, ended: int) -> None:
    """Log and count a flood's start and end (its record is in the store's floods table)."""
    if started:
        service.metrics.floods.labels("started").inc(started)
        log.warning(
            "flood: more than %s incidents within %s s; their notifications fold into one",
            service.config.alerts.flood_after,
            service.config.alerts.flood_window,
        )
    if ended:
        service.metrics.floods.labels("ended").inc(ended)
        log.warning("flood over: notifications go out one by one again")


def job_health(service: Service) -> dict[str, dict[str, Any]]:
    """Each scheduled job's interval, last run (ISO 8601, service time) and whether it is
    overdue, measured on the monotonic clock so that a clock step neither hides nor fakes
    a late job."""
    mono = service.monotonic()
    out: dict[str, dict[str, Any]] = {}
    for job_id, every in service._job_every.items():
        ran = service._job_ran.get(job_id)
        since = mono - (service._started_mono if ran is None else ran[0])
        out[job_id] = {
            "every_s": every,
            "last_run": None if ran is None else format_time(ran[1]),
            "overdue": since > every + max(every, JOB_GRACE_S),
        }
    return out
