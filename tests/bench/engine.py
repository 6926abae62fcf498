"""Engine throughput: readings per second through StreamMonitor with every detector on.

Run: ``.venv/bin/python -m tests.bench.engine [--streams 1000] [--readings 200000] [--json]``

Prints the figure with its conditions. This is a benchmark, not a test: nothing here asserts a
speed (timed asserts make a suite flaky on a busy machine).
"""

from __future__ import annotations

import argparse
import json
import platform
import time

import numpy as np

from limitwatch.engine import MonitorSettings, StreamMonitor
from limitwatch.model import Reading
from limitwatch.stats.baseline import fit_baseline

ALL_RULES = "nelson,ewma,cusum"


def run(streams: int, readings: int, rules: str = ALL_RULES, seed: int = 1) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    settings = MonitorSettings(rules=rules)
    baseline = fit_baseline(list(rng.normal(0.0, 1.0, 50)))
    monitors = [StreamMonitor(f"s{i}", settings, baseline=baseline) for i in range(streams)]
    per_stream = max(readings // streams, 1)
    values = rng.normal(0.0, 1.0, (per_stream, streams)).tolist()
    batch = [
        [Reading(f"s{j}", float(t), row[j]) for j in range(streams)] for t, row in enumerate(values)
    ]
    total = per_stream * streams
    signals = 0
    started = time.perf_counter()
    for t in range(per_stream):
        readings_now = batch[t]
        for j in range(streams):
            signals += len(monitors[j].update(readings_now[j]).signals)
    elapsed = time.perf_counter() - started
    return {
        "benchmark": "engine",
        "streams": streams,
        "readings": total,
        "rules": rules,
        "seconds": round(elapsed, 3),
        "readings_per_second": round(total / elapsed),
        "signals": signals,
        "python": platform.python_version(),
        "machine": platform.machine(),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--streams", type=int, nargs="+", default=[1000])
    parser.add_argument("--readings", type=int, default=200_000)
    parser.add_argument("--rules", default=ALL_RULES)
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args()
    for streams in args.streams:
        result = run(streams, args.readings, args.rules)
        if args.json:
            print(json.dumps(result))
        else:
            print(
                f"engine, {result['streams']} streams, rules {result['rules']}: "
                f"{result['readings_per_second']:,} readings/s "
                f"({result['readings']:,} readings in {result['seconds']} s, one core, "
                f"Python {result['python']} {result['machine']}; {result['signals']} signals)"
            )


if __name__ == "__main__":
    main()
