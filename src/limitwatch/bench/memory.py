"""Resident memory per stream and the time a restart takes to restore checkpoints."""

from __future__ import annotations

import gc
import multiprocessing
import os
import statistics
import tracemalloc
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from limitwatch.bench.common import (
    ALL_DETECTORS,
    T0,
    Clock,
    Figure,
    Sizes,
    load_average,
)

# --------------------------------------------------------------------------- memory, restore


def _rss_bytes() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _checkpointed_store(path: Path, streams: int, seed: int) -> None:
    """A store holding one checkpoint per stream, as a site that has run for a while leaves
    it: each stream with its own baseline (numbered in the store, as every baseline in force
    is), thousands of readings behind it (positions past the small integers Python shares)
    and live detector state (made once, not timed).

    Without the baselines' rows the first restore would record every one of them (about five
    times the restore's own work at 100,000 streams), and the runs would differ."""
    from limitwatch.engine import MonitorSettings, StreamMonitor
    from limitwatch.model import Reading
    from limitwatch.stats.baseline import Baseline
    from limitwatch.store import Store

    settings = MonitorSettings(rules=ALL_DETECTORS)
    rng = np.random.default_rng(seed)
    centers = rng.normal(50.0, 5.0, streams).tolist()
    sigmas = rng.uniform(0.5, 2.0, streams).tolist()
    counts = rng.integers(1_000, 100_000, streams).tolist()
    values = rng.normal(0.0, 1.0, (3, streams)).tolist()
    with Store.open(path, now=T0) as store:
        chunk: dict[str, Any] = {}
        for i in range(streams):
            name = f"unit-{i:06d}/temp"
            baseline = Baseline.from_limits(center=centers[i], sigma=sigmas[i])
            monitor = StreamMonitor(name, settings, baseline=baseline)
            monitor.count = counts[i]  # as if its earlier readings had been seen
            for k in range(3):
                t = T0 + 60.0 * (counts[i] + k)
                monitor.update(Reading(name, t, centers[i] + sigmas[i] * values[k][i]))
            chunk[name] = monitor.state()
            if len(chunk) >= 5_000:
                _save(store, chunk)
                chunk = {}
        if chunk:
            _save(store, chunk)


def _save(store: Any, checkpoints: dict[str, Any]) -> None:
    """Checkpoints with the baseline each holds, as the service leaves them."""
    with store.transaction():
        for stream, state in checkpoints.items():
            store.add_baseline(
                stream,
                state["baseline"],
                now=T0,
                by="limitwatch",
                reason="the bench's site",
                method=state["baseline"]["method"],
                version=state["baseline_version"],
            )
        store.save_checkpoints(checkpoints, now=T0)


def restart_in_fresh_process(path: str, trace: bool) -> dict[str, float]:
    """What a restart does, in a new interpreter (run by :mod:`multiprocessing`): open the
    store and rebuild every monitor through the pipeline. Returns the CPU and wall time, the
    resident-memory growth and, with ``trace``, the Python memory still held (tracemalloc)."""
    from limitwatch.alerts.lifecycle import AlertBook
    from limitwatch.engine import MonitorSettings
    from limitwatch.pipeline import Pipeline
    from limitwatch.store import Store

    settings = MonitorSettings(rules=ALL_DETECTORS)
    gc.collect()
    if trace:
        tracemalloc.start()
    rss = _rss_bytes()
    traced = tracemalloc.get_traced_memory()[0] if trace else 0
    clock = Clock()
    store = Store.open(path)
    try:
        pipeline = Pipeline(store, lambda stream: settings, AlertBook(store))
        restored = pipeline.restore()
    finally:
        store.close()
    cpu, elapsed = clock.lap()
    gc.collect()
    result = {
        "streams": float(restored),
        "seconds": elapsed,
        "cpu_seconds": cpu,
        "rss_bytes": float(_rss_bytes() - rss),
        "traced_bytes": float(tracemalloc.get_traced_memory()[0] - traced) if trace else 0.0,
    }
    tracemalloc.stop()
    return result


def _in_fresh_process(func: Callable[..., Any], *args: Any, timeout: float = 900.0) -> Any:
    with multiprocessing.get_context("spawn").Pool(1) as pool:
        return pool.apply_async(func, args).get(timeout=timeout)


def measure_memory(sizes: Sizes, workdir: Path) -> list[Figure]:
    streams = sizes.memory_streams
    workdir.mkdir(parents=True, exist_ok=True)
    path = workdir / "checkpoints.db"
    _checkpointed_store(path, streams, seed=7)
    load = load_average()
    runs = [
        _in_fresh_process(restart_in_fresh_process, str(path), False) for _ in range(sizes.repeats)
    ]
    traced = _in_fresh_process(restart_in_fresh_process, str(path), True)
    for run in [*runs, traced]:
        if run["streams"] != streams:
            raise RuntimeError(f"restored {run['streams']:.0f} of {streams} streams")
    conditions = {
        "streams": streams,
        "rules": ALL_DETECTORS,
        "state": "each stream with its own baseline, 1,000 to 100,000 readings behind it and "
        "live detector state",
        "process": "a fresh interpreter per run, modules imported first (a restart)",
        "load_average": load,
    }
    # The targets are for 100,000 streams; a smaller (quick) run is not comparable.
    full_size = streams == 100_000
    return [
        Figure(
            f"memory per stream at {streams:,} streams",
            "bytes",
            [r["rss_bytes"] / streams for r in runs],
            {
                **conditions,
                "measured": "resident-set growth of the process over the restore, per stream: "
                "what an operator sees (monitors, baselines, detectors, the stream table, and "
                "memory the allocator and SQLite's page cache keep)",
            },
            target=("<", 2048),
            extra={
                "tracemalloc_bytes_per_stream": traced["traced_bytes"] / streams,
                "tracemalloc_note": "Python memory still held after restoring every stream, "
                "counted by tracemalloc in a separate run",
            },
        ),
        Figure(
            f"restore {streams:,} streams",
            "s",
            [r["cpu_seconds"] for r in runs],
            {
                **conditions,
                "measured": "CPU time (user and system) of Store.open + Pipeline.restore "
                "(checkpoints read and parsed, StreamMonitor.from_state per stream, the "
                "baselines in force checked against the store's numbering); the first run may "
                "read the newly written database from disk, which the median leaves out",
            },
            target=("<", 2.0) if full_size else None,
            extra={"wall_seconds": statistics.median(r["seconds"] for r in runs)},
        ),
    ]
