"""The file source end to end: an export written, read, judged and committed."""

from __future__ import annotations

import statistics
from pathlib import Path

import numpy as np

from limitwatch.bench.common import (
    ALL_DETECTORS,
    T0,
    Clock,
    Figure,
    Sizes,
    load_average,
)
from limitwatch.bench.service import (
    _service_config,
    _timed_service_class,
)

# --------------------------------------------------------------------------- file source


def _write_export(path: Path, lines: int, streams: int, seed: int) -> None:
    from limitwatch.ingest.timeparse import format_time

    rng = np.random.default_rng(seed)
    values = np.round(rng.normal(50.0, 1.0, lines), 3).tolist()
    with path.open("w") as f:
        f.write("time,stream,value\n")
        for i, v in enumerate(values):
            f.write(f"{format_time(T0 + 60.0 * (i // streams))},unit-{i % streams:04d}/temp,{v}\n")


def file_run(folder: Path, lines: int, streams: int, seed: int) -> dict[str, float]:
    from limitwatch.config import load_config

    data = folder / "data"
    data.mkdir(parents=True)
    _write_export(data / "export.csv", lines, streams, seed)
    source = f"""[[sources]]
type = "file"
name = "export"
glob = "{data}/*.csv"
format = "csv"
poll_every = "1h"
value = "value"
time = "time"
time_format = "iso8601"
stream = "stream"
"""
    service = _timed_service_class()(load_config(_service_config(folder, source=source)))
    service.start()
    try:
        clock = Clock()
        used = 0
        while True:  # a poll reads at most a few MiB per file; poll until the file is done
            got = service.poll_files("export")
            if not got:
                break
            used += got
        cpu, elapsed = clock.lap()
    finally:
        service.close()
    if service.committed != lines:
        raise RuntimeError(f"file benchmark committed {service.committed} of {lines} readings")
    return {"rate": lines / elapsed, "lines": used, "cpu_rate": lines / cpu}


def measure_file(sizes: Sizes, workdir: Path) -> list[Figure]:
    rates, cpu_rates = [], []
    load = load_average()
    for i in range(sizes.repeats):
        result = file_run(workdir / f"file-{i}", sizes.file_lines, sizes.file_streams, seed=i)
        rates.append(result["rate"])
        cpu_rates.append(result["cpu_rate"])
    cpu_rate = statistics.median(cpu_rates)
    return [
        Figure(
            "file end to end",
            "readings/s",
            rates,
            {
                "lines": sizes.file_lines,
                "streams": sizes.file_streams,
                "format": "CSV time,stream,value; ISO 8601 times",
                "rules": ALL_DETECTORS,
                "phase": "monitoring (typed-in baseline)",
                "batch_max": 500,
                "what": "Service.poll_files: parse, evaluate, one SQLite transaction per batch "
                "(readings, stream rows, alerts, checkpoints, file offset), WAL, "
                "synchronous=NORMAL; no notifiers",
                "clock": "wall clock; CPU time of the service's process beside it",
                "load_average": load,
            },
            extra={"cpu_readings_per_s": cpu_rate, "cpu_us_per_reading": 1e6 / cpu_rate},
        )
    ]
