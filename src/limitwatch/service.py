"""The daemon: sources in, one worker evaluating and committing, notifications out.

Threads and who owns what:

* each MQTT source runs its paho-mqtt client in a process of its own
  (:mod:`limitwatch.ingest.mqtt_process`); a reader thread per source only puts the deliveries
  it passes up on ``intake``, and acknowledgements go back down once their batch committed;
* the APScheduler ``BackgroundScheduler`` only puts :class:`Job` requests on ``intake``;
* the **worker** (the thread that calls :meth:`Service.run`) is the only one that touches the
  monitors and the store: it takes a batch (bounded by count and time), evaluates, commits in
  one transaction, and only then acknowledges MQTT deliveries in arrival order and moves file
  offsets; file polls, stale checks, reminders, retention and refits run here too;
* the outbox worker delivers notifications from its own thread and connection, so a slow or
  dead notifier never holds up ingestion;
* the status server answers ``/metrics`` and ``/health``.

SIGTERM or SIGINT: intake stops, the batch in hand is finished, committed and acknowledged,
sources disconnect cleanly (saying ``offline`` on their status topic), the process exits 0.
Anything still queued but unacknowledged stays with the broker for the next start.
"""

from __future__ import annotations

import logging
import queue
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MISSED, JobExecutionEvent
from apscheduler.schedulers.background import BackgroundScheduler

from limitwatch.alerts.lifecycle import AlertBook
from limitwatch.alerts.outbox import OutboxWorker
from limitwatch.config import Config, FileSourceConfig, MqttSourceConfig
from limitwatch.engine import MonitorSettings
from limitwatch.ingest.files import FileLine, FileSource
from limitwatch.ingest.mqtt import Delivery, MqttSettings
from limitwatch.ingest.mqtt_process import MqttProcess
from limitwatch.ingest.payload import PayloadError, RowParser, SourceParser
from limitwatch.instance import InstanceLock
from limitwatch.metrics import Metrics, StatusServer
from limitwatch.pipeline import BatchResult, Parsed, Pipeline
from limitwatch.secrets import resolve_secret
from limitwatch.stats.baseline import Baseline
from limitwatch.store import Store

log = logging.getLogger("limitwatch.service")


@dataclass(frozen=True, slots=True)
class Job:
    """A request from the scheduler, carried out by the worker between batches."""

    kind: str
    source: str | None = None


_STOP = Job("stop")


class Service:
    def __init__(self, config: Config, clock: Callable[[], float] = time.time) -> None:
        self.config = config
        self.clock = clock
        # SimpleQueue is written in C, without Queue's Python-level locks and conditions: a put
        # and a get cost about a twentieth as much, paid for every reading. Nothing here needs
        # Queue's size bound or task tracking.
        self.intake: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self.metrics = Metrics()
        self._stopping = threading.Event()
        self.mqtt: dict[str, MqttProcess] = {}
        self._mqtt_parsers: dict[str, SourceParser] = {}
        self.files: dict[str, FileSource] = {}
        self._row_parsers: dict[str, RowParser] = {}
        self._offsets: dict[str, dict[str, int]] = {}
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

    # -- settings lookups ---

    def settings_for(self, stream: str) -> MonitorSettings:
        return self.config.stream_settings(stream).monitor_settings()

    def _stored_baseline(self, stream: str) -> Baseline | None:
        typed = self.config.stream_settings(stream).typed_baseline()
        if typed is not None:
            return typed
        assert self.store is not None
        stored = self.store.current_baseline(stream)
        return None if stored is None else Baseline.from_dict(stored.numbers)

    def _cadence_for(self, stream: str) -> tuple[float | None, float]:
        s = self.config.stream_settings(stream)
        return s.cadence, s.stale_after

    # -- start and stop ---

    def start(self) -> None:
        """Open the store, restore every stream, connect sources, start jobs."""
        cfg = self.config
        now = self.clock()
        self.started_at = now
        lock = InstanceLock(cfg.store.path)
        lock.acquire()  # before anything is read: a second service must not even restore
        self._lock = lock
        self.store = Store.open(cfg.store.path, now=now)
        self.book = AlertBook(self.store, cfg.alert_policy())
        self.pipeline = Pipeline(self.store, self.settings_for, self.book, self._stored_baseline)
        restored = self.pipeline.restore()
        log.info("restored %d streams from %s", restored, cfg.store.path)

        self.outbox = OutboxWorker.from_config(cfg, clock=self.clock)
        self.outbox.start()

        for source in cfg.sources:
            if isinstance(source, MqttSourceConfig):
                self._start_mqtt(source)
            elif isinstance(source, FileSourceConfig):
                self.files[source.name] = FileSource(
                    source.name, source.glob, source.format, source.start_at
                )
                self._row_parsers[source.name] = RowParser(source)
                self._offsets[source.name] = self.store.file_offsets(source.name)

        self.scheduler = self._make_scheduler()
        self.scheduler.start()
        self.metrics.worker_last_round.set_function(self._since_last_round)
        if cfg.service.metrics_listen:
            self.status = StatusServer(cfg.service.metrics_listen, self.metrics, self.health)
            self.status.start()
            log.info("metrics and health on http://%s:%d/", *self.status.address)

    def _start_mqtt(self, source: MqttSourceConfig) -> None:
        password = resolve_secret(
            env=source.password_env, file=source.password_file, what=f"sources.{source.name}"
        )
        tls = source.tls

        def path(value: object) -> str | None:
            return None if value is None else str(value)

        settings = MqttSettings(
            name=source.name,
            host=source.host,
            port=source.port,
            client_id=source.client_id,
            topics=source.subscriptions,
            protocol=source.protocol,
            keepalive_s=int(source.keepalive_s),
            session_expiry_s=int(source.session_expiry),
            receive_maximum=source.receive_maximum,
            username=source.username,
            password=password,
            tls=tls is not None,
            ca_file=None if tls is None else path(tls.ca_file),
            cert_file=None if tls is None else path(tls.cert_file),
            key_file=None if tls is None else path(tls.key_file),
            status_topic=source.status_topic,
            reconnect_min_s=source.reconnect_min_s,
            reconnect_max_s=source.reconnect_max_s,
        )
        self._mqtt_parsers[source.name] = SourceParser(source)
        client = MqttProcess(settings, self.intake)
        self.mqtt[source.name] = client
        # Read when /metrics is scraped, so the figures are current whether or not anyone
        # asked /health.
        self.metrics.source_connected.labels(source.name).set_function(
            lambda: 1.0 if client.connected.is_set() else 0.0
        )
        self.metrics.connection_restarts.labels(source.name).set_function(
            lambda: float(client.restarts)
        )
        client.start()

    def _make_scheduler(self) -> BackgroundScheduler:
        cfg = self.config
        scheduler = BackgroundScheduler(
            timezone="UTC",
            job_defaults={"coalesce": True, "max_instances": 1, "misfire_grace_time": 30},
        )
        scheduler.add_listener(self._job_event, EVENT_JOB_ERROR | EVENT_JOB_MISSED)

        def ask(kind: str, source: str | None = None) -> Callable[[], None]:
            return lambda: self.intake.put(Job(kind, source))

        for name, source in ((s.name, s) for s in cfg.sources if isinstance(s, FileSourceConfig)):
            scheduler.add_job(
                ask("poll-files", name),
                "interval",
                seconds=source.poll_every,
                id=f"poll:{name}",
                next_run_time=_now_dt(),
            )
        scheduler.add_job(
            ask("stale-check"), "interval", seconds=cfg.service.stale_check_every, id="stale"
        )
        scheduler.add_job(
            ask("alert-tick"), "interval", seconds=cfg.service.alert_tick_every, id="alert-tick"
        )
        scheduler.add_job(
            ask("refits"), "interval", seconds=cfg.service.refit_check_every, id="refits"
        )
        if cfg.store.keep_readings_for or cfg.store.keep_readings_per_stream:
            scheduler.add_job(ask("retention"), "interval", seconds=3600, id="retention")
        return scheduler

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
        for client in self.mqtt.values():
            client.close()
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
            batch, jobs = self._take()
            if batch:
                self._process_deliveries(batch)
            for job in jobs:
                if job is _STOP:
                    continue
                self._run_job(job)
        log.info("stopping: the last batch is committed and acknowledged")
        assert self.pipeline is not None
        if not self.pipeline.broken:
            saved = self.pipeline.checkpoint_all(self.clock())
            log.info("checkpoints of %d streams written", saved)

    def _take(self) -> tuple[list[Delivery], list[Job]]:
        cfg = self.config.service
        batch: list[Delivery] = []
        jobs: list[Job] = []
        try:
            first = self.intake.get(timeout=0.5)
        except queue.Empty:
            return batch, jobs
        # batch_wait counts from when the first reading arrived, not from when the worker got
        # to it: a reading that queued while the previous batch was being committed has
        # already waited, and waiting the whole batch_wait again would double its delay.
        waited = self.clock() - first.received_at if isinstance(first, Delivery) else 0.0
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

    def _parse_delivery(self, d: Delivery) -> Parsed:
        try:
            reading = self._mqtt_parsers[d.source].parse(d.topic, d.payload, d.received_at)
        except PayloadError as exc:
            return Parsed(d.source, _envelope(d), error=exc.reason, detail=str(exc))
        return Parsed(d.source, _envelope(d), reading=reading)

    def _process_deliveries(self, batch: list[Delivery]) -> None:
        items = [self._parse_delivery(d) for d in batch]
        self._commit(items)
        by_source: dict[str, list[Delivery]] = {}
        for d in batch:  # arrival order, only after the commit
            by_source.setdefault(d.source, []).append(d)
        for source, deliveries in by_source.items():
            self.mqtt[source].ack(deliveries)

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
        for _, reason in result.dead:
            m.dead_letters.labels(reason).inc()
        for s in result.signals:
            m.signals.labels(s.rule).inc()
        m.alerts_opened.inc(result.opened)
        self._count_floods(result.flood_started, result.flood_ended)
        m.streams.set(len(self.pipeline.monitors))
        if result.queued and self.outbox is not None:
            self.outbox.wake()
        return result

    def _run_job(self, job: Job) -> None:
        assert self.pipeline is not None and self.book is not None and self.store is not None
        now = self.clock()
        if job.kind == "poll-files" and job.source is not None:
            self.poll_files(job.source)
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
                log.info("stream %s: adopted a new stored baseline", stream)
        elif job.kind == "retention":
            cfg = self.config.store
            # Readings newer than a stream's checkpoint are part of its state until the next one.
            self.pipeline.checkpoint_all(now)
            self.store.prune_readings(
                now, max_age_s=cfg.keep_readings_for, max_per_stream=cfg.keep_readings_per_stream
            )

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

    def poll_files(self, name: str) -> int:
        """Read every new complete line of a file source, committing in batches; return the
        number of lines used."""
        source = self.files[name]
        parser = self._row_parsers[name]
        committed = self._offsets[name]
        before = dict(committed)
        pending: dict[str, int] = dict(committed)  # the source may set offsets (start_at=end)
        batch: list[Parsed] = []
        advanced: dict[str, int] = {}
        used = 0
        for line in source.poll(pending):
            if self._stopping.is_set():
                break
            advanced[line.file_id] = line.end_offset
            if line.record is not None or line.error is not None:
                batch.append(self._parse_line(line, parser))
            if len(batch) >= self.config.service.batch_max:
                used += len(batch)
                self._commit(batch, {name: advanced})
                committed.update(advanced)
                batch, advanced = [], {}
        # offsets the source itself moved (start_at=end skips a file's existing lines)
        for ident, offset in pending.items():
            if before.get(ident) != offset and ident not in advanced and ident not in committed:
                advanced[ident] = offset
        if batch or advanced:
            used += len(batch)
            self._commit(batch, {name: advanced})
            committed.update(advanced)
        return used

    def _parse_line(self, line: FileLine, parser: RowParser) -> Parsed:
        where = f"{line.path} at byte {line.end_offset - len(line.raw)}"
        if line.record is None:
            return Parsed(
                line.source, line.raw, error="unreadable-line", detail=f"{where}: {line.error}"
            )
        try:
            reading = parser.parse(line.record, self.clock())
        except PayloadError as exc:
            return Parsed(line.source, line.raw, error=exc.reason, detail=f"{where}: {exc}")
        return Parsed(line.source, line.raw, reading=reading)

    # -- health ---

    def _since_last_round(self) -> float:
        beat = self._heartbeat
        return 0.0 if beat is None else time.monotonic() - beat

    def health(self) -> dict[str, Any]:
        sources = {name: c.connected.is_set() for name, c in self.mqtt.items()}
        broken = self.pipeline is not None and self.pipeline.broken
        quiet = None if self._heartbeat is None else round(self._since_last_round(), 3)
        stalled = quiet is not None and quiet > self.config.service.stall_after
        ok = all(sources.values()) and not broken and not stalled
        return {
            "status": "ok" if ok else "degraded",
            "worker": "stalled" if stalled else "failed" if broken else "running",
            "worker_last_round_s_ago": quiet,
            "sources": sources,
            "errors": {n: c.last_error for n, c in self.mqtt.items() if c.last_error},
            "queue_depth": self.intake.qsize(),
            "streams": 0 if self.pipeline is None else len(self.pipeline.monitors),
            "last_commit": self.last_commit,
        }


def _envelope(d: Delivery) -> bytes:
    """What a dead letter keeps of an MQTT message: topic and payload, so it can be replayed."""
    return d.topic.encode() + b"\n" + d.payload


def _now_dt() -> Any:
    from datetime import UTC, datetime

    return datetime.now(UTC)


def serve(config: Config) -> int:
    """Run until SIGTERM/SIGINT; return the exit status."""
    service = Service(config)
    service.install_signal_handlers()
    try:
        service.start()
        service.run()
    finally:
        service.close()
    return 0
