"""The worker: :class:`Service` starts the parts, runs the loop that takes batches and jobs
from ``intake``, and stops them cleanly; :func:`serve` runs it as the daemon.

Why one worker: it is the only thread that touches the monitors and the store, so a batch, the
alerts it causes and the notifications they owe land in one transaction (see the package's
docstring, :mod:`limitwatch.service`, for who owns what). The batch path, the jobs and
``/health`` live in ``batch``, ``jobs`` and ``health``; each method here that names one of
their functions is that function, kept as a method for callers and tests.
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
from typing import Any

from apscheduler.events import JobExecutionEvent
from apscheduler.schedulers.background import BackgroundScheduler

from limitwatch.alerts.delivery_watch import DeliveryCollector
from limitwatch.alerts.lifecycle import AlertBook
from limitwatch.alerts.outbox import OutboxWorker
from limitwatch.clocks import CARRY_ON_AT_MOST_S, ServiceClock, describe_step
from limitwatch.config import Config, SourceSettings
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.base import Source, SourceContext
from limitwatch.ingest.registry import SOURCES, build_source
from limitwatch.ingest.reorder import ReorderBuffer
from limitwatch.metrics import Metrics, StatusServer
from limitwatch.pipeline import BatchResult, Parsed, Pipeline, PipelineBroken
from limitwatch.refusals import RefusalLog
from limitwatch.service import batch as batch_step
from limitwatch.service import health as health_report
from limitwatch.service import jobs as job_plan
from limitwatch.service.jobs import _STOP, Job
from limitwatch.service.keeper import WorkerStreams, run_source_task
from limitwatch.service.lock import CannotShare, InstanceLock
from limitwatch.stats.baseline import Baseline
from limitwatch.store import Store, open_store, parse_location
from limitwatch.store.location import redacted
from limitwatch.store.wal import WalCheckpoints
from limitwatch.streamcap import StreamCap

log = logging.getLogger("limitwatch.service")


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
        self._carried: list[Any] = []
        """Deliveries of an intake list that did not fit in the last batch: the next one's
        first (see :meth:`_take`)."""
        self.last_commit: float | None = None
        self._heartbeat: float | None = None
        """``time.monotonic()`` when the worker last came round its loop or committed a batch
        (a file backlog is read in many batches within one job); None until it runs."""
        self.started_at: float | None = None
        self.store: Store | None = None
        self.wal: WalCheckpoints | None = None
        self.pipeline: Pipeline | None = None
        self.book: AlertBook | None = None
        self.outbox: OutboxWorker | None = None
        self.scheduler: BackgroundScheduler | None = None
        self.status: StatusServer | None = None
        self._lock: InstanceLock | None = None
        self.worker_thread: threading.Thread | None = None
        """The thread that runs (or ran) :meth:`run`: sources hand it work (see
        :mod:`limitwatch.service.keeper`), and at close it gives up what they hold."""
        self.worker_finished = False
        """True once :meth:`run` has returned."""

    @property
    def partial(self) -> bool:
        """True when a source hands this worker only some streams (Kafka partitions): other
        workers share the store, and monitors are built as streams are taken on."""
        return any(SOURCES.load(s.type).partial for s in self.config.sources)

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
        partial = self.partial
        if partial and len(cfg.sources) > 1:
            raise CannotShare(
                "a source that shares its store with other workers (type = \"kafka\") must "
                "be the service's only source; run the other sources in a service of their own"
            )
        where = parse_location(cfg.store.location)
        if where.path is not None:
            lock = InstanceLock(where.path)
            # before anything is read: a second service must not even restore. Workers of one
            # consumer group share the file (each owns its partitions, fenced in the store); a
            # lone service and group workers still exclude each other.
            lock.acquire(shared=partial)
            self._lock = lock
        else:
            # Several services share one PostgreSQL database (each owning its own streams, or
            # Kafka partitions); the store's own locks and leases keep them apart.
            log.info("store %s is shared: no single-instance lock", redacted(str(where)))
        self.store = open_store(where, now=now)
        if where.path is not None:
            self.wal = WalCheckpoints(self.store)
            self.wal.start()  # the log's copying off the worker's commits (see store/wal.py)
        self._carry_on_from(self.store.last_service_time())
        self.book = AlertBook(self.store, cfg.alert_policy())
        self.pipeline = Pipeline(self.store, self.settings_for, self.book, self._typed_baseline)
        if partial:
            # Streams arrive with the partitions the group assigns; none is held before.
            self.pipeline.restore_on_demand = True
        else:
            restored = self.pipeline.restore()
            log.info("restored %d streams from %s", restored, self.store.path)

        self.outbox = OutboxWorker.from_config(cfg, clock=self.clock, shared=partial)
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
            state_file=None
            if (file := self.config.store.file) is None
            else file.with_name(f"{file.name}.source-{settings.name}.json"),
            keeper=WorkerStreams(self, settings.name),
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
        """See :func:`limitwatch.service.jobs.make_scheduler`."""
        return job_plan.make_scheduler(self)

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
        """See :func:`limitwatch.service.jobs.replan`."""
        job_plan.replan(self)

    def _job_event(self, event: JobExecutionEvent) -> None:
        """See :func:`limitwatch.service.jobs.job_event`."""
        job_plan.job_event(self, event)

    def request_stop(self, *_: Any) -> None:
        """Signal-handler safe: set a flag and wake the worker."""
        self._stopping.set()
        self.intake.put(_STOP)

    def install_signal_handlers(self) -> None:
        signal.signal(signal.SIGTERM, self.request_stop)
        signal.signal(signal.SIGINT, self.request_stop)

    def close(self) -> None:
        """Disconnect and release everything; safe to call after a failed start."""
        self.worker_finished = True  # a source's last give-up runs here, or not at all
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
        if self.wal is not None:
            self.wal.stop()
        if self.store is not None:
            self.store.close()
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    # -- the worker ---

    def run(self) -> None:
        """Process intake until asked to stop; then write every stream's checkpoint, so the
        next start restores without applying any reading again."""
        self.worker_thread = threading.current_thread()
        try:
            self._run()
        finally:
            self.worker_finished = True

    def _run(self) -> None:
        while not self._stopping.is_set():
            self._heartbeat = time.monotonic()
            self._watch_clock()
            self.refusals.flush(self.clock())
            batch, jobs = self._take()
            if batch or self._holding():
                self._process_deliveries(batch)
            for job in jobs:
                if job is _STOP or run_source_task(job):
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
        """The next batch (at most ``batch_max`` deliveries) and the jobs queued meanwhile.

        The intake holds jobs, single deliveries, and lists of deliveries (a connection
        process's pipe message, put in one piece); what a list brings past ``batch_max`` is
        carried over to the next batch, first in line."""
        cfg = self.config.service
        batch: list[Any] = self._carried
        self._carried = []
        jobs: list[Job] = []
        first: Any = None
        if batch:
            stamped: float | None = batch[0].received_at
        else:
            try:
                first = self.intake.get(timeout=0.5)
            except queue.Empty:
                return batch, jobs
            if type(first) is list:
                stamped = first[0].received_at
            else:
                stamped = None if isinstance(first, Job) else first.received_at
        # batch_wait counts from when the first reading arrived, not from when the worker got
        # to it: a reading that queued while the previous batch was being committed has
        # already waited, and waiting the whole batch_wait again would double its delay.
        waited = 0.0 if stamped is None else self.timekeeper.wall() - stamped
        deadline = time.monotonic() + min(cfg.batch_wait, max(0.0, cfg.batch_wait - waited))
        item = first
        while True:
            if item is None:
                pass  # carried over from the last batch
            elif type(item) is list:
                batch.extend(item)
            elif isinstance(item, Job):
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
        if len(batch) > cfg.batch_max:
            self._carried = batch[cfg.batch_max :]
            del batch[cfg.batch_max :]
        self.metrics.queue_depth.set(self.intake.qsize())
        return batch, jobs

    def _parse(self, source: Source, item: Any, received_at: float) -> list[Parsed]:
        """See :func:`limitwatch.service.batch.parse`."""
        return batch_step.parse(self, source, item, received_at)

    def _parse_pushed(self, item: Any) -> list[Parsed]:
        """See :func:`limitwatch.service.batch.parse_pushed`."""
        return batch_step.parse_pushed(self, item)

    def _refuse_new_stream(self, source: str, stream: str) -> str | None:
        """See :func:`limitwatch.service.batch.refuse_new_stream`."""
        return batch_step.refuse_new_stream(self, source, stream)

    def _holding(self) -> bool:
        """See :func:`limitwatch.service.batch.holding`."""
        return batch_step.holding(self)

    def _process_deliveries(self, batch: list[Any], *, flush: bool = False) -> None:
        """See :func:`limitwatch.service.batch.process_deliveries`."""
        batch_step.process_deliveries(self, batch, flush=flush)

    def _process_reordered(self, batch: list[Any], flush: bool) -> None:
        """See :func:`limitwatch.service.batch.process_reordered`."""
        batch_step.process_reordered(self, batch, flush)

    def _commit(
        self, items: list[Parsed], offsets: dict[str, dict[str, int]] | None = None
    ) -> BatchResult:
        """See :func:`limitwatch.service.batch.commit`."""
        return batch_step.commit(self, items, offsets)

    def _streams_fed(self, source: str) -> float:
        return float(self.stream_cap.count(source))

    def _run_job_guarded(self, job: Job) -> None:
        """See :func:`limitwatch.service.jobs.run_job_guarded`."""
        job_plan.run_job_guarded(self, job)

    def _run_job(self, job: Job) -> None:
        """See :func:`limitwatch.service.jobs.run_job`."""
        job_plan.run_job(self, job)

    def prune(self, now: float) -> tuple[int, int]:
        """See :func:`limitwatch.service.jobs.prune`."""
        return job_plan.prune(self, now)

    def _count_floods(self, started: int, ended: int) -> None:
        """See :func:`limitwatch.service.jobs.count_floods`."""
        job_plan.count_floods(self, started, ended)

    def poll_source(self, name: str) -> int:
        """See :func:`limitwatch.service.batch.poll_source`."""
        return batch_step.poll_source(self, name)

    def poll_files(self, name: str) -> int:
        """:meth:`poll_source` under its earlier name (``limitwatch bench`` times it)."""
        return self.poll_source(name)

    # -- health ---

    def _since_last_round(self) -> float:
        """See :func:`limitwatch.service.health.since_last_round`."""
        return health_report.since_last_round(self)

    def health(self) -> dict[str, Any]:
        """See :func:`limitwatch.service.health.health`."""
        return health_report.health(self)

    def _job_health(self) -> dict[str, dict[str, Any]]:
        """See :func:`limitwatch.service.jobs.job_health`."""
        return job_plan.job_health(self)


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
