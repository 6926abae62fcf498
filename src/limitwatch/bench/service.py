"""Running the real service for a measurement: its config, a timed subclass, waiting for commits."""

from __future__ import annotations

import contextlib
import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from limitwatch.bench.common import (
    ALL_DETECTORS,
)

# --------------------------------------------------------------------------- service helpers


def _service_config(
    folder: Path,
    *,
    source: str,
    rules: str = ALL_DETECTORS,
    batch_max: int = 500,
    batch_wait: str = "200ms",
) -> Path:
    """A config for the real service: typed-in baseline so every stream is in phase II from its
    first reading (the steady state a site runs in), no notifiers (alerts are opened and
    recorded, delivery is not measured), no metrics listener."""
    text = f"""
[store]
path = "{folder / "bench.db"}"

[service]
batch_max = {batch_max}
batch_wait = "{batch_wait}"

[defaults]
rules = "{rules}"
baseline = {{ center = 50.0, sigma = 1.0 }}

{source}
"""
    path = folder / "bench.toml"
    path.write_text(text)
    return path


def _timed_service_class() -> type:
    """The real service, noting when each batch's commit returned (for the delay figures)."""
    from limitwatch.service import Service

    class TimedService(Service):
        def __init__(self, config: Any) -> None:
            super().__init__(config)
            self.committed = 0
            self.first_received: float | None = None
            self.last_commit_at: float | None = None
            self.delays: list[tuple[float, float]] | None = None
            self.done = threading.Event()
            self.expect: int | None = None
            self.failure: BaseException | None = None
            self.batches: list[tuple[float, float, float, float, float]] | None = None
            """Per batch, when ``batches`` is a list: (the first delivery's time from publish
            to receipt, from its receipt to the worker taking the batch, the worker's time on
            the batch, its size, the part of that time in the pipeline's commit): where a
            reading's delay goes."""
            self.commit_seconds = 0.0

        def _process_deliveries(self, batch: list[Any], *, flush: bool = False) -> None:
            if self.first_received is None and batch:
                self.first_received = min(d.received_at for d in batch)
            if self.batches is None or not batch:
                super()._process_deliveries(batch, flush=flush)
                return
            taken = time.time()
            first = batch[0]
            self.commit_seconds = 0.0
            super()._process_deliveries(batch, flush=flush)
            done = time.time()
            published = json.loads(first.payload)["t"]
            self.batches.append(
                (
                    first.received_at - published,
                    taken - first.received_at,
                    done - taken,
                    len(batch),
                    self.commit_seconds,
                )
            )

        def _commit(self, items: list[Any], offsets: Any = None) -> Any:
            started = time.time()
            result = super()._commit(items, offsets)
            now = time.time()
            self.commit_seconds += now - started
            self.last_commit_at = now
            self.committed += len(result.outcomes)
            if self.delays is not None:  # (publish time, delay to commit)
                self.delays.extend((o.reading.time, now - o.reading.time) for o in result.outcomes)
            if self.expect is not None and self.committed >= self.expect:
                self.done.set()
            return result

    return TimedService


@contextlib.contextmanager
def _running(service: Any) -> Iterator[None]:
    """Start the service and run its worker in a thread, as ``serve`` does in its main thread
    (SQLite connections belong to the thread that opened them); stop and close it after."""
    started = threading.Event()

    def work() -> None:
        try:
            service.start()
            started.set()
            service.run()
        except BaseException as exc:
            service.failure = exc
            service.done.set()
        finally:
            started.set()
            service.close()

    worker = threading.Thread(target=work, name="limitwatch-worker", daemon=True)
    worker.start()
    started.wait(60)
    try:
        yield
    finally:
        service.request_stop()
        worker.join(timeout=60)


def _await_commits(service: Any, stall_s: float = 30.0) -> None:
    """Wait until the service committed ``service.expect`` readings; give up when nothing new
    was committed for ``stall_s`` seconds or the worker failed."""
    seen, last_progress = -1, time.monotonic()
    while not service.done.wait(0.2):
        if service.committed != seen:
            seen, last_progress = service.committed, time.monotonic()
        elif time.monotonic() - last_progress > stall_s:
            break
    if service.failure is not None:
        raise RuntimeError(f"the service failed: {service.failure}") from service.failure
    if service.committed < service.expect:
        raise RuntimeError(f"the service committed {service.committed} of {service.expect}")
