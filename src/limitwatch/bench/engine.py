"""The engine alone, against the flat yardstick (bench_flat), in CPU time from paired runs."""

from __future__ import annotations

import gc
import statistics
from typing import Any

import numpy as np

from limitwatch.bench.common import (
    ALL_DETECTORS,
    SIGNAL_HEAVY_SHIFT,
    T0,
    Clock,
    Figure,
    Sizes,
    load_average,
)

# --------------------------------------------------------------------------- engine only


def _engine_monitors(streams: int, rules: str) -> list[Any]:
    """Monitors in phase II whose baseline matches the readings' distribution, so signals come
    at the in-control (false alarm) rate of the rule set, as on a quiet site."""
    from limitwatch.engine import MonitorSettings, StreamMonitor
    from limitwatch.stats.baseline import Baseline

    settings = MonitorSettings(rules=rules)
    baseline = Baseline.from_limits(center=0.0, sigma=1.0)
    return [
        StreamMonitor(f"unit-{i:06d}/temp", settings, baseline=baseline) for i in range(streams)
    ]


def _engine_rounds(
    names: list[str],
    per_stream: int,
    rng: np.random.Generator,
    first_step: int,
    shift: float = 0.0,
) -> list[list[Any]]:
    """``per_stream`` rounds of one standard normal reading per stream, a minute apart; with
    ``shift``, the level jumps between +shift and -shift sigma every few readings (streams in
    alarm: most readings complete some test)."""
    from limitwatch.model import Reading

    values = rng.normal(0.0, 1.0, (per_stream, len(names)))
    if shift:
        steps = np.arange(first_step, first_step + per_stream)
        values += shift * np.where(np.sin(steps / 7.0) >= 0.0, 1.0, -1.0)[:, None]
    values = values.tolist()
    return [
        [Reading(name, T0 + 60.0 * (first_step + k), v) for name, v in zip(names, row, strict=True)]
        for k, row in enumerate(values)
    ]


def _run_engine(monitors: list[Any], rounds: list[list[Any]]) -> list[tuple[str, str, int, str]]:
    """Every reading through its monitor; the signals as (rule, side, position, stream)."""
    found = []
    for readings in rounds:
        for monitor, reading in zip(monitors, readings, strict=True):
            for s in monitor.update(reading).signals:
                found.append((s.rule, s.side, s.index, s.stream))
    return found


def _run_flat(states: list[Any], rounds: list[list[Any]]) -> list[tuple[str, str, int, str]]:
    """Every reading through the yardstick, signals as :func:`_run_engine` gives them."""
    from limitwatch.bench_flat import flat_update

    found = []
    for readings in rounds:
        for state, reading in zip(states, readings, strict=True):
            for rule, side, index in flat_update(state, reading.time, reading.value):
                found.append((rule, side, index, reading.stream))
    return found


def engine_runs(
    streams: int,
    per_stream: int,
    repeats: int,
    rules: str = ALL_DETECTORS,
    seed: int = 1,
    shift: float = 0.0,
) -> tuple[list[dict[str, float]], int]:
    """Each run's CPU-time and wall-clock rates, CPU time per reading and the load average,
    and the signals raised in all of them.

    The readings are built before the clocks start; each run continues the same monitors, so
    later runs see warmed-up detector state exactly as a long-running service does.
    """
    rng = np.random.default_rng(seed)
    monitors = _engine_monitors(streams, rules)
    names = [m.stream for m in monitors]
    runs: list[dict[str, float]] = []
    signals = 0
    for repeat in range(repeats):
        rounds = _engine_rounds(names, per_stream, rng, repeat * per_stream, shift)
        gc.collect()
        clock = Clock()
        signals += len(_run_engine(monitors, rounds))
        cpu, wall = clock.lap()
        n = per_stream * streams
        runs.append({"cpu_rate": n / cpu, "wall_rate": n / wall, "cpu_us": 1e6 * cpu / n})
        del rounds
    return runs, signals


def flat_comparison(streams: int, per_stream: int, pairs: int, seed: int = 2) -> dict[str, Any]:
    """Engine against the flat yardstick on the same readings, in ``pairs`` paired runs.

    In each pair both run on the same readings (rounds built beforehand), one straight after
    the other, the engine first in even pairs and the yardstick first in odd ones, so a change
    in the machine's load falls on both alike; the ratio of a pair is engine CPU rate over
    yardstick CPU rate. Both keep their state from pair to pair, as a service does. Raises
    when the two disagree on any signal: then they were not doing the same work.
    """
    from limitwatch.bench_flat import new_state

    rng = np.random.default_rng(seed)
    monitors = _engine_monitors(streams, ALL_DETECTORS)
    states = [new_state(0.0, 1.0) for _ in monitors]
    names = [m.stream for m in monitors]
    ratios, engine_rates, flat_rates, signals = [], [], [], 0
    for pair in range(pairs):
        rounds = _engine_rounds(names, per_stream, rng, pair * per_stream)
        cpu: dict[str, float] = {}
        found: dict[str, list[tuple[str, str, int, str]]] = {}
        order = ("engine", "flat") if pair % 2 == 0 else ("flat", "engine")
        for which in order:
            gc.collect()
            clock = Clock()
            if which == "engine":
                found[which] = _run_engine(monitors, rounds)
            else:
                found[which] = _run_flat(states, rounds)
            cpu[which] = clock.lap()[0]
        if sorted(found["engine"]) != sorted(found["flat"]):
            raise RuntimeError(
                f"the flat yardstick raised {len(found['flat'])} signals, the engine "
                f"{len(found['engine'])}: they do not run the same tests"
            )
        signals += len(found["engine"])
        n = streams * per_stream
        engine_rates.append(n / cpu["engine"])
        flat_rates.append(n / cpu["flat"])
        ratios.append(cpu["flat"] / cpu["engine"])
    return {
        "ratios": ratios,
        "engine_cpu_rate": statistics.median(engine_rates),
        "flat_cpu_rate": statistics.median(flat_rates),
        "signals": signals,
    }


def measure_engine(sizes: Sizes) -> list[Figure]:
    out = []
    for streams, per_stream in (sizes.engine_few, sizes.engine_many):
        load = load_average()
        runs, signals = engine_runs(streams, per_stream, sizes.repeats)
        out.append(
            Figure(
                f"engine {streams:,} streams",
                "readings/s",
                [r["cpu_rate"] for r in runs],
                {
                    "streams": streams,
                    "readings_per_run": streams * per_stream,
                    "rules": ALL_DETECTORS,
                    "phase": "monitoring (baseline locked)",
                    "threads": 1,
                    "what": "StreamMonitor.update only: readings built beforehand, no storage",
                    "clock": "readings per second of process CPU time",
                    "signals_raised": signals,
                    "load_average": load,
                },
                target=(">=", 200_000),
                extra={
                    "wall_clock_readings_per_s": statistics.median(r["wall_rate"] for r in runs),
                    "cpu_us_per_reading": statistics.median(r["cpu_us"] for r in runs),
                },
            )
        )
    streams, per_stream = sizes.engine_few
    load = load_average()
    runs, signals = engine_runs(streams, per_stream, sizes.repeats, shift=SIGNAL_HEAVY_SHIFT)
    out.append(
        Figure(
            f"engine {streams:,} streams, signal-heavy",
            "readings/s",
            [r["cpu_rate"] for r in runs],
            {
                "streams": streams,
                "readings_per_run": streams * per_stream,
                "rules": ALL_DETECTORS,
                "readings": f"the level jumps between +{SIGNAL_HEAVY_SHIFT:g} and "
                f"-{SIGNAL_HEAVY_SHIFT:g} sigma every 22 readings or so: streams in alarm",
                "clock": "readings per second of process CPU time",
                "signals_per_reading": round(signals / (streams * per_stream * sizes.repeats), 3),
                "load_average": load,
            },
            extra={
                "wall_clock_readings_per_s": statistics.median(r["wall_rate"] for r in runs),
                "cpu_us_per_reading": statistics.median(r["cpu_us"] for r in runs),
            },
        )
    )
    load = load_average()
    flat = flat_comparison(streams, per_stream, sizes.flat_pairs)
    out.append(
        Figure(
            "engine / flat yardstick",
            "ratio",
            flat["ratios"],
            {
                "streams": streams,
                "readings_per_run": streams * per_stream,
                "rules": ALL_DETECTORS,
                "yardstick": "limitwatch.bench_flat.flat_update: the same tests and parameters "
                "inlined in one plain function, each stream's state in one list, same readings",
                "how": "paired runs on the same readings, engine and yardstick in turn (each "
                "goes first in every other pair); ratio = engine CPU rate / yardstick CPU rate; "
                "median of the pairs' ratios",
                "signals_checked": f"{flat['signals']:,} signals, identical in rule, side, "
                "position and stream",
                "load_average": load,
            },
            target=(">=", 0.5),
            extra={
                "engine_cpu_readings_per_s": flat["engine_cpu_rate"],
                "yardstick_cpu_readings_per_s": flat["flat_cpu_rate"],
            },
        )
    )
    return out
