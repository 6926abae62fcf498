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
"""

from __future__ import annotations

import functools
import logging
import queue
import signal
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MISSED, JobExecutionEvent
from apscheduler.schedulers.background import BackgroundScheduler

from limitwatch.alerts.delivery_watch import DeliveryCollector
from limitwatch.alerts.lifecycle import AlertBook
from limitwatch.alerts.outbox import OutboxWorker
from limitwatch.clocks import CARRY_ON_AT_MOST_S, ServiceClock, describe_step
from limitwatch.config import Config, SourceSettings
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.base import Source, SourceContext
from limitwatch.ingest.registry import build_source
from limitwatch.ingest.reorder import ReorderBuffer
from limitwatch.ingest.timeparse import format_time
from limitwatch.instance import InstanceLock
from limitwatch.metrics import Metrics, StatusServer
from limitwatch.pipeline import BatchResult, Parsed, Pipeline, PipelineBroken, store_failed
from limitwatch.refusals import RefusalLog
from limitwatch.stats.baseline import Baseline
from limitwatch.store import Store
from limitwatch.streamcap import REASON as TOO_MANY_STREAMS
from limitwatch.streamcap import StreamCap
from limitwatch.textout import printable

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


class Service:
    def __init__(
        self,
        config: Config,
        clock: Callable[[], float] = time.time,
        monotonic: Callable[[], float] = time.monotonic,
    ) -> None:
        """``clock`` (the wall clock) and ``monotonic`` are there to be replaced in tests, so
        that a test can step the wall clock by hours without waiting."""
        self.config = config
        self.timekeeper = ServiceClock(clock, monotonic)
        self.clock = self.timekeeper.now
        """The service's time: the wall clock, except that it never goes backwards."""
        self.monotonic = monotonic
        self._job_every: dict[str, float] = {}
        """Scheduled job id -> interval in seconds."""
        self._job_fired: dict[str, float] = {}
        """Job id -> monotonic time the scheduler last queued it."""
        self._job_ran: dict[str, tuple[float, float]] = {}
        """Job id -> (monotonic time, service time) the worker last carried it out."""
        self._started_mono = monotonic()
        self.stream_cap = StreamCap({s.name: s.max_streams for s in config.sources}, monotonic)
        # SimpleQueue is written in C, without Queue's Python-level locks and conditions: a put
        # and a get cost about a twentieth as much, paid for every reading. Nothing here needs
        # Queue's size bound or task tracking.
        self.intake: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self.metrics = Metrics()
        self.refusals = RefusalLog()
        self._stopping = threading.Event()
        self.sources: dict[str, Source] = {}
        """Every configured source by name, built from its plugin at start."""
        self._reorder: dict[str, ReorderBuffer] = {}
        """Sources with ``reorder_within``: their readings wait here, in order."""
        self._unacked: dict[str, deque[list[Any]]] = {}
        """Per source with a reorder window, its deliveries in arrival order as [delivery,
        readings of it held and not yet committed]: acknowledgements go in arrival order, so
        a held reading holds back the acknowledgement of every later one until it is
        committed too."""
        self.last_commit: float | None = None
        self._heartbeat: float | None = None
        """``time.monotonic()`` when the worker last came round its loop or committed a batch
        (a file backlog is read in many batches within one job); None until it runs."""
        self.started_at: float | None = None
        self.store: Store | None = None
        self.pipeline: Pipeline | None = None
        self.book: AlertBook | None = None
        self.outbox: OutboxWorker | None = None
        self.scheduler: BackgroundScheduler | None = None
        self.status: StatusServer | None = None
        self._lock: InstanceLock | None = None

    @property
    def mqtt(self) -> dict[str, Any]:
        """The connection processes of the sources that have one, by source name (what
        ``limitwatch bench`` and tests watch for a subscription); the worker itself goes
        through :attr:`sources` only."""
        return {
            name: process
            for name, source in self.sources.items()
            if (process := getattr(source, "process", None)) is not None
        }

    # -- settings lookups ---

    def settings_for(self, stream: str) -> MonitorSettings:
        return self.config.stream_settings(stream).monitor_settings()

    def _typed_baseline(self, stream: str) -> Baseline | None:
        return self.config.stream_settings(stream).typed_baseline()

    def _cadence_for(self, stream: str) -> tuple[float | None, float]:
        s = self.config.stream_settings(stream)
        return s.cadence, s.stale_after

    # -- start and stop ---

    def start(self) -> None:
        """Open the store, restore every stream, connect sources, start jobs."""
        cfg = self.config
        now = self.clock()
        self.started_at = now
        self._started_mono = self.monotonic()
        lock = InstanceLock(cfg.store.path)
        lock.acquire()  # before anything is read: a second service must not even restore
        self._lock = lock
        self.store = Store.open(cfg.store.path, now=now)
        self._carry_on_from(self.store.last_service_time())
        self.book = AlertBook(self.store, cfg.alert_policy())
        self.pipeline = Pipeline(self.store, self.settings_for, self.book, self._typed_baseline)
        restored = self.pipeline.restore()
        log.info("restored %d streams from %s", restored, cfg.store.path)

        self.outbox = OutboxWorker.from_config(cfg, clock=self.clock)
        self.metrics.registry.register(DeliveryCollector(self.outbox.watch, self.clock))
        self.outbox.start()

        for settings in cfg.sources:
            self._start_source(settings)

        self.scheduler = self._make_scheduler()
        self.scheduler.start()
        self.metrics.worker_last_round.set_function(self._since_last_round)
        for name in self.stream_cap.limits:
            self.metrics.source_streams.labels(name).set_function(
                functools.partial(self._streams_fed, name)
            )
        if cfg.service.metrics_listen:
            self.status = StatusServer(cfg.service.metrics_listen, self.metrics, self.health)
            self.status.start()
            log.info("metrics and health on http://%s:%d/", *self.status.address)

    def _carry_on_from(self, last: float | None) -> None:
        """After a restart, go on from the last time the previous run committed when the wall
        clock is now behind it (stepped back while the service was down), so readings timed at
        receipt are not older than the ones stored."""
        if last is None:
            return
        behind = last - self.timekeeper.wall()
        if behind > CARRY_ON_AT_MOST_S:
            log.warning(
                "the store's last commit is %s ahead of the wall clock, more than the %d s the "
                "service will go on from; readings timed at receipt are refused as out-of-order "
                "until the clock passes it (check the clock)",
                describe_step(-behind).removeprefix("back by "),
                CARRY_ON_AT_MOST_S,
            )
            return
        if self.timekeeper.carry_on_from(last):
            log.warning(
                "the wall clock is behind the store's last commit by %s (stepped back while the "
                "service was down?); the service's time goes on from that commit, catching up",
                describe_step(-behind).removeprefix("back by "),
            )

    def _start_source(self, settings: SourceSettings) -> None:
        """Build a configured source from its plugin and start it; pushed sources begin
        putting items on ``intake``, polled ones get a job in :meth:`_make_scheduler`."""
        assert self.store is not None
        context = SourceContext(
            future_tolerance=self.config.service.future_tolerance,
            positions=self.store.file_offsets(settings.name),
            state_file=self.config.store.path.with_name(
                f"{self.config.store.path.name}.source-{settings.name}.json"
            ),
        )
        source = build_source(settings, context)
        self.sources[source.name] = source
        if source.reorder_within is not None:
            self._reorder[source.name] = ReorderBuffer(source.reorder_within)
            self._unacked[source.name] = deque()
        if source.connection:
            # Read when /metrics is scraped, so the figures are current whether or not anyone
            # asked /health.
            self.metrics.source_connected.labels(source.name).set_function(
                lambda: 1.0 if source.health().connected else 0.0
            )
            self.metrics.connection_restarts.labels(source.name).set_function(
                lambda: float(source.health().restarts)
            )
        source.start(self.intake)

    def _make_scheduler(self) -> BackgroundScheduler:
        cfg = self.config
        scheduler = BackgroundScheduler(
            timezone="UTC",
            job_defaults={"coalesce": True, "max_instances": 1, "misfire_grace_time": 30},
        )
        scheduler.add_listener(self._job_event, EVENT_JOB_ERROR | EVENT_JOB_MISSED)

        def every(seconds: float, kind: str, source: str | None = None, **options: Any) -> None:
            job = Job(kind, source)

            def ask() -> None:
                self._job_fired[job.id] = self.monotonic()
                self.intake.put(job)

            self._job_every[job.id] = seconds
            scheduler.add_job(ask, "interval", seconds=seconds, id=job.id, **options)

        for name, source in self.sources.items():
            if source.poll_every is not None:
                every(source.poll_every, source.poll_job, name, next_run_time=_now_dt())
        every(cfg.service.stale_check_every, "stale-check")
        every(cfg.service.alert_tick_every, "alert-tick")
        every(cfg.service.refit_check_every, "refits")
        # Always: dead letters are bounded by default even when readings are kept for ever.
        every(RETENTION_EVERY_S, "retention")
        return scheduler

    def _watch_clock(self) -> None:
        """Notice a step of the wall clock; say so and plan the jobs again."""
        step = self.timekeeper.step()
        if step is None:
            return
        log.warning(
            "the wall clock stepped %s; receipt times go on from the last one given out "
            "(now %.1f s ahead of the wall clock, catching up) and the scheduled jobs are "
            "planned again",
            describe_step(step),
            self.timekeeper.ahead_s(),
        )
        self._replan()

    def _replan(self) -> None:
        """Set each job's next run from the monotonic clock: one interval after the scheduler
        last queued it. APScheduler keeps next run times on the wall clock, so after a step
        back of two hours it would wait two hours before running anything."""
        scheduler = self.scheduler
        if scheduler is None or not scheduler.running:
            return
        mono = self.monotonic()
        wall_now = _now_dt()  # the scheduler's own clock, whatever the service was given
        for job in scheduler.get_jobs():
            every = self._job_every.get(job.id)
            if every is None or job.next_run_time is None:  # not ours, or paused
                continue
            since = mono - self._job_fired.get(job.id, self._started_mono)
            wait = min(every, max(0.0, every - since))
            scheduler.modify_job(job.id, next_run_time=wall_now + timedelta(seconds=wait))

    def _job_event(self, event: JobExecutionEvent) -> None:
        if event.exception is not None:
            log.error("scheduled job %s failed: %s", event.job_id, event.exception)
        else:
            log.warning("scheduled job %s missed its run time", event.job_id)

    def request_stop(self, *_: Any) -> None:
        """Signal-handler safe: set a flag and wake the worker."""
        self._stopping.set()
        self.intake.put(_STOP)

    def install_signal_handlers(self) -> None:
        signal.signal(signal.SIGTERM, self.request_stop)
        signal.signal(signal.SIGINT, self.request_stop)

    def close(self) -> None:
        """Disconnect and release everything; safe to call after a failed start."""
        if self.scheduler is not None and self.scheduler.running:
            self.scheduler.shutdown(wait=False)
        for source in self.sources.values():
            try:
                source.close()
            except Exception:  # one source's failure to close must not keep the others open
                log.exception("source %s could not be closed cleanly", source.name)
        if self.outbox is not None:
            self.outbox.stop()
        if self.status is not None:
            self.status.close()
        if self.store is not None:
            self.store.close()
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    # -- the worker ---

    def run(self) -> None:
        """Process intake until asked to stop; then write every stream's checkpoint, so the
        next start restores without applying any reading again."""
        while not self._stopping.is_set():
            self._heartbeat = time.monotonic()
            self._watch_clock()
            self.refusals.flush(self.clock())
            batch, jobs = self._take()
            if batch or self._holding():
                self._process_deliveries(batch)
            for job in jobs:
                if job is _STOP:
                    continue
                self._run_job_guarded(job)
        log.info("stopping: the last batch is committed and acknowledged")
        assert self.pipeline is not None
        if not self.pipeline.broken and self._holding():
            self._process_deliveries([], flush=True)  # held readings: commit and acknowledge
        if not self.pipeline.broken:
            saved = self.pipeline.checkpoint_all(self.clock())
            log.info("checkpoints of %d streams written", saved)

    def _take(self) -> tuple[list[Any], list[Job]]:
        cfg = self.config.service
        batch: list[Any] = []
        jobs: list[Job] = []
        try:
            first = self.intake.get(timeout=0.5)
        except queue.Empty:
            return batch, jobs
        # batch_wait counts from when the first reading arrived, not from when the worker got
        # to it: a reading that queued while the previous batch was being committed has
        # already waited, and waiting the whole batch_wait again would double its delay.
        stamped = None if isinstance(first, Job) else first.received_at
        waited = 0.0 if stamped is None else self.timekeeper.wall() - stamped
        deadline = time.monotonic() + min(cfg.batch_wait, max(0.0, cfg.batch_wait - waited))
        item = first
        while True:
            if isinstance(item, Job):
                jobs.append(item)
                if item is _STOP:
                    break
            else:
                batch.append(item)
            if len(batch) >= cfg.batch_max:
                break
            try:
                item = self.intake.get_nowait()
            except queue.Empty:
                remaining = deadline - time.monotonic()
                if remaining <= 0 or jobs:
                    break
                try:
                    item = self.intake.get(timeout=remaining)
                except queue.Empty:
                    break
        self.metrics.queue_depth.set(self.intake.qsize())
        return batch, jobs

    def _parse(self, source: Source, item: Any, received_at: float) -> list[Parsed]:
        """``item`` parsed by its source (none, one, or several readings and refusals), with
        the worker's own refusals: a new stream past the source's ``max_streams``, and a
        parser's bug (a dead letter, never a stop)."""
        try:
            parsed = source.parse(item, received_at)
        except Exception as exc:  # a parser bug must not stop the service: a dead letter
            log.exception("source %s: an item could not be parsed", source.name)
            return [source.refused(item, "parse-error", _failure(exc))]
        if parsed is None:
            return []
        found = [parsed] if isinstance(parsed, Parsed) else list(parsed)
        for i, part in enumerate(found):
            if part.reading is None:
                continue
            refused = self._refuse_new_stream(source.name, part.reading.stream)
            if refused is not None:
                found[i] = source.refused(item, TOO_MANY_STREAMS, refused)
        return found

    def _parse_pushed(self, item: Any) -> list[Parsed]:
        # The source stamped the wall clock where the item arrived; a step back since must
        # not make a reading timed at receipt older than the one before it.
        received = self.timekeeper.receipt(item.received_at)
        return self._parse(self.sources[item.source], item, received)

    def _refuse_new_stream(self, source: str, stream: str) -> str | None:
        """Why a reading for ``stream`` is refused (its source already feeds ``max_streams``
        streams and this one would be new), or None when it may go on."""
        assert self.pipeline is not None
        cap = self.stream_cap
        if cap.admit(source, stream, exists=stream in self.pipeline.monitors):
            return None
        self.metrics.streams_refused.labels(source).inc()
        return f"stream {stream[:200]!r} would be more than max_streams = {cap.limits[source]}"

    def _holding(self) -> bool:
        return any(len(buffer) for buffer in self._reorder.values())

    def _process_deliveries(self, batch: list[Any], *, flush: bool = False) -> None:
        if not self._reorder:
            items = [p for d in batch for p in self._parse_pushed(d)]
            self._commit(items)
            by_source: dict[str, list[Any]] = {}
            for d in batch:  # arrival order, only after the commit
                by_source.setdefault(d.source, []).append(d)
            for source, deliveries in by_source.items():
                self.sources[source].acknowledge(deliveries)
            return
        self._process_reordered(batch, flush)

    def _process_reordered(self, batch: list[Any], flush: bool) -> None:
        """As :meth:`_process_deliveries`, with the readings of sources that have a reorder
        window held back until their time is up (see :mod:`limitwatch.ingest.reorder`)."""
        now = self.clock()
        items: list[Parsed] = []
        direct: dict[str, list[Any]] = {}
        committed: list[list[Any]] = []
        for d in batch:
            parts = self._parse_pushed(d)
            buffer = self._reorder.get(d.source)
            if buffer is None:
                items.extend(parts)
                direct.setdefault(d.source, []).append(d)
                continue
            entry = [d, 0]  # the delivery, and how many of its readings are held
            self._unacked[d.source].append(entry)
            for parsed in parts:
                if parsed.reading is None:  # a dead letter has no place in the order
                    items.append(parsed)
                else:
                    entry[1] += 1
                    buffer.hold(parsed.reading, (parsed, entry), d.received_at)
        for buffer in self._reorder.values():
            if len(buffer):
                for _, (parsed, entry) in buffer.release(now, everything=flush):
                    items.append(parsed)
                    committed.append(entry)
        if items:
            self._commit(items)
        for entry in committed:  # only after the commit
            entry[1] -= 1
        for source, deliveries in direct.items():
            self.sources[source].acknowledge(deliveries)
        for source, waiting in self._unacked.items():
            ready = []
            while waiting and waiting[0][1] == 0:
                ready.append(waiting.popleft()[0])
            if ready:
                self.sources[source].acknowledge(ready)

    def _commit(
        self, items: list[Parsed], offsets: dict[str, dict[str, int]] | None = None
    ) -> BatchResult:
        assert self.pipeline is not None
        started = time.perf_counter()
        now = self.clock()
        result = self.pipeline.process(items, now, file_offsets=offsets)
        self.last_commit = now
        self._heartbeat = time.monotonic()
        m = self.metrics
        m.batch_seconds.observe(time.perf_counter() - started)
        m.batch_size.observe(len(items))
        m.readings.labels("accepted").inc(len(result.outcomes))
        for source, reason in result.dead:
            m.dead_letters.labels(reason).inc()
            self.refusals.note(source, reason, now)
        for s in result.signals:
            m.signals.labels(s.rule).inc()
        m.alerts_opened.inc(result.opened)
        self._count_floods(result.flood_started, result.flood_ended)
        m.streams.set(len(self.pipeline.monitors))
        if result.queued and self.outbox is not None:
            self.outbox.wake()
        return result

    def _streams_fed(self, source: str) -> float:
        return float(self.stream_cap.count(source))

    def _run_job_guarded(self, job: Job) -> None:
        """Run one job; a job's own failure is logged and the next run tries again, so a bug
        in, say, the stale check never stops the readings. A failure of the store itself ends
        the service the way a failed batch commit does (see :func:`serve`)."""
        try:
            self._run_job(job)
        except PipelineBroken:
            raise
        except Exception as exc:
            if store_failed(exc):
                raise PipelineBroken(f"scheduled job {job.kind} failed: {exc}") from exc
            self.metrics.job_failures.labels(job.kind).inc()
            log.exception("scheduled job %s failed; its next run tries again", job.kind)

    def _run_job(self, job: Job) -> None:
        assert self.pipeline is not None and self.book is not None and self.store is not None
        now = self.clock()
        if job.source is not None:  # a source's poll
            self.poll_source(job.source)
        elif job.kind == "stale-check":
            signals = self.pipeline.stale_signals(now, self._cadence_for)
            if signals:
                report = self.book.apply_signals(signals, now)
                self.metrics.alerts_opened.inc(report.opened)
                self._count_floods(report.flood_started, report.flood_ended)
                if report.queued and self.outbox is not None:
                    self.outbox.wake()
        elif job.kind == "alert-tick":
            report = self.book.tick(now)
            self._count_floods(report.flood_started, report.flood_ended)
            if report.queued and self.outbox is not None:
                self.outbox.wake()
        elif job.kind == "refits":
            for stream in self.pipeline.adopt_new_baselines(now):
                log.info("stream %s: adopted a new stored baseline", printable(stream))
        elif job.kind == "retention":
            self.prune(now)
        self._job_ran[job.id] = (self.monotonic(), now)

    def prune(self, now: float) -> tuple[int, int]:
        """The retention job: drop readings and dead letters past the ``[store]`` limits;
        return (readings, dead letters) deleted."""
        assert self.pipeline is not None and self.store is not None
        cfg = self.config.store
        readings = 0
        if cfg.keep_readings_for is not None or cfg.keep_readings_per_stream is not None:
            # Readings newer than a stream's checkpoint are part of its state until the next one.
            self.pipeline.checkpoint_all(now)
            readings = self.store.prune_readings(
                now, max_age_s=cfg.keep_readings_for, max_per_stream=cfg.keep_readings_per_stream
            )
        letters = self.store.prune_dead_letters(
            now, max_age_s=cfg.keep_dead_letters_for, max_count=cfg.keep_dead_letters
        )
        if readings or letters:
            log.info("retention: dropped %d readings and %d dead letters", readings, letters)
        return readings, letters

    def _count_floods(self, started: int, ended: int) -> None:
        """Log and count a flood's start and end (its record is in the store's floods table)."""
        if started:
            self.metrics.floods.labels("started").inc(started)
            log.warning(
                "flood: more than %s incidents within %s s; their notifications fold into one",
                self.config.alerts.flood_after,
                self.config.alerts.flood_window,
            )
        if ended:
            self.metrics.floods.labels("ended").inc(ended)
            log.warning("flood over: notifications go out one by one again")

    def poll_source(self, name: str) -> int:
        """Read everything new from a polled source, committing in batches of ``batch_max``
        with the positions it reached; return the number of items used."""
        source = self.sources[name]
        items: list[Any] = []
        batch: list[Parsed] = []
        used = 0
        for item in source.poll():
            if self._stopping.is_set():
                break
            items.append(item)
            batch.extend(self._parse(source, item, self.clock()))
            if len(batch) >= self.config.service.batch_max:
                used += len(batch)
                self._commit(batch, {name: source.positions(items)})
                source.acknowledge(items)
                items, batch = [], []
        positions = source.positions(items)
        if batch or positions:
            used += len(batch)
            self._commit(batch, {name: positions})
            source.acknowledge(items)
        return used

    def poll_files(self, name: str) -> int:
        """:meth:`poll_source` under its earlier name (``limitwatch bench`` times it)."""
        return self.poll_source(name)

    # -- health ---

    def _since_last_round(self) -> float:
        beat = self._heartbeat
        return 0.0 if beat is None else time.monotonic() - beat

    def health(self) -> dict[str, Any]:
        states = {name: s.health() for name, s in self.sources.items() if s.connection}
        sources = {name: bool(h.connected) for name, h in states.items()}
        broken = self.pipeline is not None and self.pipeline.broken
        quiet = None if self._heartbeat is None else round(self._since_last_round(), 3)
        stalled = quiet is not None and quiet > self.config.service.stall_after
        jobs = self._job_health()
        overdue = any(j["overdue"] for j in jobs.values())
        now = self.clock()
        watch = self.outbox.watch if self.outbox is not None else None
        notifiers = {} if watch is None else watch.health(now)
        after = self.config.service.notifier_failing_after
        failing = [] if watch is None else watch.failing_longer_than(after, now)
        ok = all(sources.values()) and not broken and not stalled and not overdue and not failing
        return {
            "status": "ok" if ok else "degraded",
            "worker": "stalled" if stalled else "failed" if broken else "running",
            "worker_last_round_s_ago": quiet,
            "sources": sources,
            "errors": {n: h.last_error for n, h in states.items() if h.last_error},
            "source_state": {n: dict(h.detail) for n, h in states.items() if h.detail},
            "queue_depth": self.intake.qsize(),
            "streams": 0 if self.pipeline is None else len(self.pipeline.monitors),
            "last_commit": None if self.last_commit is None else format_time(self.last_commit),
            "jobs": jobs,
            "clock": {
                "steps_seen": self.timekeeper.steps,
                "ahead_of_wall_s": round(self.timekeeper.ahead_s(), 3),
            },
            "notifiers": notifiers,
            "notifiers_failing_too_long": failing,
        }

    def _job_health(self) -> dict[str, dict[str, Any]]:
        """Each scheduled job's interval, last run (ISO 8601, service time) and whether it is
        overdue, measured on the monotonic clock so that a clock step neither hides nor fakes
        a late job."""
        mono = self.monotonic()
        out: dict[str, dict[str, Any]] = {}
        for job_id, every in self._job_every.items():
            ran = self._job_ran.get(job_id)
            since = mono - (self._started_mono if ran is None else ran[0])
            out[job_id] = {
                "every_s": every,
                "last_run": None if ran is None else format_time(ran[1]),
                "overdue": since > every + max(every, JOB_GRACE_S),
            }
        return out


def _failure(exc: BaseException) -> str:
    """An unexpected exception in words, bounded: the kind and the start of its message."""
    text = f"{type(exc).__name__}: {exc}"
    return text if len(text) <= 300 else text[:297] + "..."


def _now_dt() -> datetime:
    return datetime.now(UTC)


def serve(config: Config) -> int:
    """Run until SIGTERM/SIGINT; return the exit status."""
    service = Service(config)
    service.install_signal_handlers()
    try:
        service.start()
        service.run()
    except PipelineBroken as exc:
        # The store itself failed (disk full, an I/O error): the monitors are ahead of it, and
        # only a restart from the last commit is safe. Nothing unacknowledged is lost.
        log.error(
            "stopping: %s; the next start resumes from the last commit, and the broker and the "
            "file offsets give back what was not committed",
            exc,
        )
        return 1
    finally:
        service.close()
    return 0
