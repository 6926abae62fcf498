"""The worker's streams as a source that holds only some of them sees them (a Kafka
consumer-group member): take streams on, give them up, run work on the worker's thread.

Why through the worker: the monitors and the store connection belong to the worker's thread.
A rebalance is told to the consumer's thread, which hands the work over here and waits, so a
partition is given up only after the batch in hand has committed, and its streams' monitors
are built before the first of its readings is parsed.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Iterable
from typing import TYPE_CHECKING, Any

from limitwatch.service.jobs import Job

if TYPE_CHECKING:
    from limitwatch.service.worker import Service
    from limitwatch.store import Store

log = logging.getLogger("limitwatch.service")


class SourceTask(Job):
    """Work a source asked the worker to do between batches (see
    :meth:`WorkerStreams.on_worker`)."""

    __slots__ = ("done", "error", "task")
    task: Callable[[], None]
    done: threading.Event
    error: Exception | None

    def __init__(self, source: str, task: Callable[[], None]) -> None:
        object.__setattr__(self, "kind", "source-task")
        object.__setattr__(self, "source", source)
        object.__setattr__(self, "task", task)
        object.__setattr__(self, "done", threading.Event())
        object.__setattr__(self, "error", None)

    def run(self) -> None:
        """Carry the task out; its failure is logged and handed to the waiting source, never
        raised into the worker's loop."""
        try:
            self.task()
        except Exception as exc:
            log.exception("source %s: a task on the worker failed", self.source)
            object.__setattr__(self, "error", exc)
        finally:
            self.done.set()


class WorkerStreams:
    """:class:`~limitwatch.ingest.base.StreamKeeper` over a running :class:`Service`."""

    def __init__(self, service: Service, source: str) -> None:
        self.service = service
        self.source = source

    @property
    def store(self) -> Store:
        assert self.service.store is not None
        return self.service.store

    def now(self) -> float:
        return self.service.clock()

    def on_worker(self, task: Callable[[], None]) -> None:
        """Queued for the worker and waited for; a task asked for before the worker's loop
        began waits for it. Run here at once when this is the worker's thread, or when the
        worker's loop has ended (at close, on the thread that ran it)."""
        service = self.service
        if threading.current_thread() is service.worker_thread:
            task()
            return
        if service.worker_finished:
            raise RuntimeError("the worker has stopped; its store is closed to other threads")
        job = SourceTask(self.source, task)
        service.intake.put(job)
        while not job.done.wait(0.5):
            if service.worker_finished:
                raise RuntimeError("the worker stopped before it got to the task")
        if job.error is not None:
            raise RuntimeError(f"the worker failed the task: {job.error}")

    def take_on(self, streams: Iterable[str]) -> int:
        pipeline = self.service.pipeline
        assert pipeline is not None
        if self.service.book is not None:
            # What the alert book remembers of these streams' incidents may be another
            # worker's past by now (on a store that does not say when others commit).
            self.service.book.forget()
        taken = 0
        for stream in streams:
            if stream not in pipeline.monitors:
                pipeline._rebuild(stream)
            taken += stream in pipeline.monitors
        return taken

    def give_up(self, streams: Iterable[str], within: Callable[[], None] | None = None) -> int:
        pipeline = self.service.pipeline
        assert pipeline is not None
        held = [s for s in streams if s in pipeline.monitors]
        changed = [s for s in held if s in pipeline._unsaved]
        try:
            if within is not None:  # without: dropped unwritten (the partition is gone)
                store = self.store
                with store.transaction():
                    if changed:
                        store.save_checkpoints(
                            {s: pipeline.monitors[s].state() for s in changed}, now=self.now()
                        )
                    if within is not None:
                        within()
        finally:
            for stream in held:
                pipeline.monitors.pop(stream, None)
            pipeline._saved(held)
        return len(held)

    def held(self) -> list[str]:
        pipeline = self.service.pipeline
        return [] if pipeline is None else list(pipeline.monitors)


def run_source_task(job: Any) -> bool:
    """Carry out ``job`` if it is a source's task; True if it was."""
    if isinstance(job, SourceTask):
        job.run()
        return True
    return False
