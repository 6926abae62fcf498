"""How many streams, at what rate, with what delay and memory, on *this* machine.

An integrator sizing a site needs figures measured where the service will run, each with the
conditions that produced it. :func:`run` measures five things through the real code paths and
returns :class:`Figure` objects that ``limitwatch bench`` prints or writes as JSON:

``engine``
    Readings per second of process CPU time through :class:`~limitwatch.engine.StreamMonitor`
    alone (no parsing, no storage), one thread, every detector on, for a few and for many
    streams: the ceiling of the evaluation itself. Beside it, the engine against a yardstick
    with no design at all (:mod:`limitwatch.bench_flat`: the same tests inlined in one plain
    function, same readings), from paired runs taken in turn, as the median of the pairs'
    ratios; the yardstick must raise exactly the engine's signals.
``file``
    A CSV export read end to end by the real :class:`~limitwatch.service.Service`: lines parsed,
    readings evaluated, readings, state, alerts and file offsets committed to SQLite.
``mqtt``
    The service draining a backlog of QoS 1 messages from a private Mosquitto (persistent
    session, manual acknowledgement after each commit), beside a bare paho-mqtt subscriber that
    only counts the same number of messages from the same broker: the ceiling for a Python client.
    Then the same with a live publisher: the service subscribed while another process publishes
    as fast as the broker takes the messages, all sharing the machine as on a site.
``latency``
    Delay from publish to commit while a publisher in another process sends at a fixed rate; the
    publish time travels in each message as the reading's time.
``memory`` / ``restore``
    Resident memory (what an operator sees in ``ps``) gained per stream once many streams are
    restored from their checkpoints, with the Python memory tracemalloc counts beside it, and
    the CPU time that restore takes (what a restart does: :meth:`~limitwatch.store.Store.
    iter_checkpoints` and :meth:`~limitwatch.engine.StreamMonitor.restore` for each stream).

On a shared machine wall-clock rates swing two or three times with other people's work, so
rates are given per second of this process's CPU time (``time.process_time``), with wall-clock
rates and CPU time per reading beside them, and every figure notes the load average while it
was measured. Each figure is the median of several runs, every run kept beside it. Nothing here
is a pass/fail test: targets are printed for comparison only.

>>> f = Figure("engine", "readings/s", [90.0, 110.0, 100.0], {"streams": 10}, target=(">=", 95))
>>> f.value, f.met
(100.0, True)

References
----------
OASIS *MQTT Version 5.0* (2019), 3.1.2.11.3 Receive Maximum (how many unacknowledged QoS 1
messages the broker may send ahead) and 4.4 message delivery retry (persistent sessions).
Python documentation, :mod:`tracemalloc` (memory traced per allocation, net of frees),
:func:`time.process_time` (CPU time of the process, all its threads) and :func:`os.getloadavg`.
Mosquitto ``mosquitto.conf(5)``: ``max_queued_messages``, ``max_inflight_messages``.
"""

from __future__ import annotations

import contextlib
import gc
import json
import multiprocessing
import os
import platform
import statistics
import tempfile
import threading
import time
import tracemalloc
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from limitwatch.localbroker import mosquitto_path, private_broker

ALL_DETECTORS = "nelson,ewma,cusum"
"""Every run test of Nelson's eight, the moving-range limit, EWMA and CUSUM."""

SIGNAL_HEAVY_SHIFT = 1.5
"""Sigmas by which the signal-heavy engine run moves the level up and down."""

T0 = 1_767_225_600.0
"""2026-01-01T00:00:00Z, the invented plant's first reading: in the past, since the service refuses
readings stamped later than the clock by more than [service] future_tolerance."""


@dataclass(frozen=True)
class Sizes:
    """How much work each measurement does; ``quick`` keeps the whole run near a minute."""

    repeats: int
    engine_few: tuple[int, int]
    """(streams, readings per stream) for the few-streams engine run."""
    engine_many: tuple[int, int]
    file_lines: int
    file_streams: int
    mqtt_messages: int
    mqtt_streams: int
    latency_rate: int
    latency_seconds: float
    latency_warmup_s: float
    """Readings published this early in a delay run are left out of its percentiles."""
    latency_streams: int
    memory_streams: int
    flat_pairs: int = 11
    """Paired runs (engine, yardstick, in turn) for the comparison with the flat yardstick.
    Single pairs of a fraction of a second each scatter widely on a shared machine (0.4 to 1.0
    seen in one run of twelve); the median of many is steady."""


FULL = Sizes(
    repeats=3,
    engine_few=(1_000, 200),
    engine_many=(100_000, 3),
    file_lines=100_000,
    file_streams=1_000,
    mqtt_messages=50_000,
    mqtt_streams=1_000,
    latency_rate=2_000,
    latency_seconds=10.0,
    latency_warmup_s=1.0,
    latency_streams=1_000,
    memory_streams=100_000,
)
QUICK = Sizes(
    repeats=3,
    engine_few=(1_000, 50),
    engine_many=(100_000, 1),
    file_lines=15_000,
    file_streams=1_000,
    mqtt_messages=10_000,
    mqtt_streams=1_000,
    latency_rate=2_000,
    latency_seconds=3.0,
    latency_warmup_s=1.0,
    latency_streams=1_000,
    memory_streams=25_000,
    flat_pairs=7,
)

PARTS = ("engine", "file", "mqtt", "latency", "memory")

LATENCY_BATCH_WAITS = (("200ms", "the default"), ("50ms", "a lower setting"))
"""The delay is mostly ``batch_wait`` (how long the worker may wait to fill a batch), so it is
measured at the default and at a lower setting."""


@dataclass
class Figure:
    """One measured figure: the median of ``runs``, its unit, and what it was measured under."""

    name: str
    unit: str
    runs: list[float]
    conditions: dict[str, Any]
    target: tuple[str, float] | None = None
    """(">=" or "<", bound): what issue 6 asks for; printed for comparison, never asserted."""
    extra: dict[str, Any] = field(default_factory=dict)
    """Companion numbers measured in the same runs (medians), e.g. the bare subscriber's rate."""
    skipped: str | None = None

    @property
    def value(self) -> float | None:
        return statistics.median(self.runs) if self.runs else None

    @property
    def met(self) -> bool | None:
        if self.target is None or self.value is None:
            return None
        op, bound = self.target
        return self.value >= bound if op == ">=" else self.value < bound

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "value": self.value,
            "unit": self.unit,
            "runs": self.runs,
            "conditions": self.conditions,
            "extra": self.extra,
            "target": None if self.target is None else f"{self.target[0]} {self.target[1]:g}",
            "target_met": self.met,
            "skipped": self.skipped,
        }


def load_average() -> str | None:
    """The 1, 5 and 15 minute load averages: how busy the machine was (on a 2-core machine a
    load of 4 means each process gets about half a core)."""
    if not hasattr(os, "getloadavg"):
        return None
    return " / ".join(f"{x:.2f}" for x in os.getloadavg())


def machine() -> dict[str, Any]:
    """What the figures were measured on."""
    return {
        "python": platform.python_version(),
        "implementation": platform.python_implementation(),
        "machine": platform.machine(),
        "system": f"{platform.system()} {platform.release()}",
        "cpus": os.cpu_count(),
        "load_average_1m": round(os.getloadavg()[0], 2) if hasattr(os, "getloadavg") else None,
        "load_average": load_average(),
    }


@dataclass
class Clock:
    """CPU time of this process (every thread) and wall time, started together."""

    cpu: float = field(default_factory=time.process_time)
    wall: float = field(default_factory=time.perf_counter)

    def lap(self) -> tuple[float, float]:
        """(CPU seconds, wall seconds) since the start."""
        return time.process_time() - self.cpu, time.perf_counter() - self.wall


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

        def _process_deliveries(self, batch: list[Any], *, flush: bool = False) -> None:
            if self.first_received is None and batch:
                self.first_received = min(d.received_at for d in batch)
            super()._process_deliveries(batch, flush=flush)

        def _commit(self, items: list[Any], offsets: Any = None) -> Any:
            result = super()._commit(items, offsets)
            now = time.time()
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


# --------------------------------------------------------------------------- MQTT


def _paho() -> Any:
    import paho.mqtt.client as mqtt

    return mqtt


def _message(i: int, streams: int, t: float, value: float) -> tuple[str, bytes]:
    topic = f"bench/unit-{i % streams:04d}/temp"
    return topic, json.dumps({"v": value, "t": t, "seq": i // streams + 1}).encode()


def _publish_backlog(port: int, messages: int, streams: int, seed: int) -> float:
    """Publish QoS 1 messages as fast as the broker takes them; return once all are acknowledged,
    with the time (epoch seconds) the first was handed to the client."""
    mqtt = _paho()
    rng = np.random.default_rng(seed)
    values = np.round(rng.normal(50.0, 1.0, messages), 3).tolist()
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-publisher")
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    first = time.time()
    try:
        # In slices: paho scans its whole list of unacknowledged messages on every PUBACK.
        for start in range(0, messages, 1000):
            infos = [
                client.publish(*_message(i, streams, T0 + 60.0 * (i // streams), v), qos=1)
                for i, v in enumerate(values[start : start + 1000], start=start)
            ]
            for info in infos:
                info.wait_for_publish(timeout=120)
    finally:
        client.disconnect()
        client.loop_stop()
    return first


def _bare_session(port: int, client_id: str) -> Any:
    mqtt = _paho()
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    client = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5
    )
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 3600
    return client, props


def bare_subscriber_run(port: int, messages: int, streams: int, seed: int) -> float:
    """A paho subscriber that only counts: QoS 1, persistent session, automatic acks. Returns
    messages per second while draining a backlog of ``messages`` held by the broker."""
    client, props = _bare_session(port, "bench-bare")
    subscribed = threading.Event()
    state = {"n": 0, "first": 0.0, "last": 0.0}
    done = threading.Event()

    def on_connect(c: Any, userdata: Any, flags: Any, rc: Any, properties: Any) -> None:
        c.subscribe("bench/+/+", qos=1)

    def on_subscribe(*_: Any) -> None:
        subscribed.set()

    def on_message(c: Any, userdata: Any, message: Any) -> None:
        now = time.time()
        if state["n"] == 0:
            state["first"] = now
        state["n"] += 1
        state["last"] = now
        if state["n"] >= messages:
            done.set()

    client.on_connect, client.on_subscribe, client.on_message = (
        on_connect,
        on_subscribe,
        on_message,
    )
    # First visit: create the session and subscription, then leave so the broker queues.
    client.connect("127.0.0.1", port, clean_start=False, properties=props)
    client.loop_start()
    if not subscribed.wait(10):
        raise RuntimeError("bare subscriber could not subscribe")
    client.disconnect()
    client.loop_stop()
    _publish_backlog(port, messages, streams, seed)
    client.reconnect_delay_set(1, 2)
    client.connect("127.0.0.1", port, clean_start=False, properties=props)
    client.loop_start()
    try:
        if not done.wait(300):
            raise RuntimeError(f"bare subscriber got {state['n']} of {messages} messages")
    finally:
        client.disconnect()
        client.loop_stop()
    return messages / (state["last"] - state["first"])


def _mqtt_source(port: int, client_id: str, receive_maximum: int = 1000) -> str:
    return f"""[[sources]]
type = "mqtt"
name = "gateway"
host = "127.0.0.1"
port = {port}
client_id = "{client_id}"
session_expiry = "1h"
receive_maximum = {receive_maximum}

[[sources.topics]]
filter = "bench/+/+"
stream = "{{2}}/{{3}}"
payload = "json"
value = "v"
time = "t"
time_format = "epoch_s"
seq = "seq"
"""


def _wait(check: Callable[[], bool], timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise RuntimeError(f"timed out waiting for {what}")
        time.sleep(0.02)


def service_mqtt_run(
    folder: Path, port: int, messages: int, streams: int, seed: int
) -> tuple[float, float]:
    """The real service draining the same backlog: readings per second from the first message
    received to the commit of the last one, and CPU seconds per message (service and its
    connection process)."""
    from limitwatch.config import load_config

    folder.mkdir(parents=True, exist_ok=True)
    config = load_config(_service_config(folder, source=_mqtt_source(port, "bench-service")))
    timed = _timed_service_class()
    # First visit: the session and subscription exist from here on; then leave.
    first = timed(config)
    first.start()
    _wait(lambda: first.mqtt["gateway"].subscribed.is_set(), 10, "the service's subscription")
    first.close()
    _publish_backlog(port, messages, streams, seed)
    service = timed(config)
    service.expect = messages
    with _running(service):
        _wait(lambda: service.mqtt["gateway"].subscribed.is_set(), 10, "the subscription")
        connection = getattr(service.mqtt["gateway"], "_process", None)
        pid = getattr(connection, "pid", None)
        cpu = time.process_time() + _cpu_of(pid)
        _await_commits(service)
        cpu = time.process_time() + _cpu_of(pid) - cpu
    assert service.first_received is not None and service.last_commit_at is not None
    return messages / (service.last_commit_at - service.first_received), cpu / messages


def _cpu_of(pid: int | None) -> float:
    """CPU seconds (user + system) of another process so far, from ``/proc/<pid>/stat``; 0 when
    it cannot be read (not Linux, or the process is gone)."""
    if pid is None:
        return 0.0
    try:
        with open(f"/proc/{pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def live_mqtt_run(
    folder: Path, port: int, publisher: Any, messages: int, streams: int, seed: int
) -> tuple[float, float]:
    """The service subscribed while a publisher in another process sends ``messages`` as fast
    as the broker takes them: both share the machine, as on a live site. Returns the service's
    readings per second (first publish to last commit) and the publisher's messages per second."""
    from limitwatch.config import load_config

    folder.mkdir(parents=True, exist_ok=True)
    config = load_config(_service_config(folder, source=_mqtt_source(port, "bench-live")))
    service = _timed_service_class()(config)
    service.expect = messages
    with _running(service):
        _wait(lambda: service.mqtt["gateway"].subscribed.is_set(), 10, "the subscription")
        first = publisher.apply_async(_publish_backlog, (port, messages, streams, seed)).get(
            timeout=600
        )
        published = time.time()
        _await_commits(service)
    assert service.last_commit_at is not None
    return messages / (service.last_commit_at - first), messages / (published - first)


def measure_mqtt(sizes: Sizes, workdir: Path) -> list[Figure]:
    conditions = {
        "messages_per_run": sizes.mqtt_messages,
        "streams": sizes.mqtt_streams,
        "broker": "private Mosquitto on 127.0.0.1 (max_inflight_messages 1000)",
        "how": "the broker holds the backlog for the client's persistent session; the client "
        "connects and drains it; rate = messages / (last commit or message - first message)",
        "qos": 1,
        "payload": 'JSON {"v", "t", "seq"}',
    }
    if mosquitto_path() is None:
        skip = "skipped: mosquitto is not installed (Debian/Ubuntu: apt-get install mosquitto)"
        return [Figure("mqtt end to end", "readings/s", [], conditions, skipped=skip)]
    service_rates, bare_rates, ratios, cpu_per = [], [], [], []
    load = load_average()
    for i in range(sizes.repeats):
        with private_broker(workdir / f"mqtt-{i}" / "broker", sizes.mqtt_messages + 1000) as port:
            bare = bare_subscriber_run(port, sizes.mqtt_messages, sizes.mqtt_streams, seed=i)
            ours, cpu = service_mqtt_run(
                workdir / f"mqtt-{i}", port, sizes.mqtt_messages, sizes.mqtt_streams, seed=i
            )
        bare_rates.append(bare)
        service_rates.append(ours)
        ratios.append(ours / bare)
        cpu_per.append(cpu)
    service_conditions = {
        **conditions,
        "rules": ALL_DETECTORS,
        "phase": "monitoring (typed-in baseline)",
        "session": "MQTT 5, clean_start false, session expiry 1 h, receive maximum 1000",
        "acks": "manual, in arrival order, after each batch's commit",
        "batch_max": 500,
        "batch_wait": "200ms",
        "clock": "wall clock from the first message received to the last commit",
        "load_average": load,
    }
    bare_conditions = {
        **conditions,
        "client": "paho-mqtt, MQTT 5, persistent session, automatic acks; counts only",
    }
    live_rates, publisher_rates = [], []
    live_load = load_average()
    with multiprocessing.get_context("spawn").Pool(1) as publisher:
        for i in range(sizes.repeats):
            folder = workdir / f"mqtt-live-{i}"
            with private_broker(folder / "broker", sizes.mqtt_messages + 1000) as port:
                ours, theirs = live_mqtt_run(
                    folder, port, publisher, sizes.mqtt_messages, sizes.mqtt_streams, seed=i
                )
            live_rates.append(ours)
            publisher_rates.append(theirs)
    live_conditions = {
        **service_conditions,
        "how": "the service subscribed first; a publisher in another process then sends the "
        "messages as fast as the broker acknowledges them (QoS 1, 1,000 in flight) while the "
        "service drains them; rate = messages / (last commit - first publish)",
        "clock": "wall clock; publisher, broker and service share the machine",
        "load_average": live_load,
    }
    return [
        Figure(
            "mqtt end to end",
            "readings/s",
            service_rates,
            service_conditions,
            extra={
                "cpu_us_per_reading": 1e6 * statistics.median(cpu_per),
                "cpu_note": "CPU time of the service's process and of its connection process "
                "(from /proc) while it drained the backlog, per reading; the broker not included",
            },
        ),
        Figure("mqtt bare subscriber", "messages/s", bare_rates, bare_conditions),
        Figure(
            "mqtt end to end / bare subscriber",
            "ratio",
            ratios,
            {"runs_paired": "each ratio pairs the two clients of one run on one broker"},
            target=(">=", 0.70),
        ),
        Figure(
            "mqtt end to end, live publisher",
            "readings/s",
            live_rates,
            live_conditions,
            extra={"publisher_messages_per_s": statistics.median(publisher_rates)},
        ),
    ]


# --------------------------------------------------------------------------- delay


def paced_publisher(port: int, rate: int, seconds: float, streams: int, seed: int) -> int:
    """Publish ``rate`` QoS 1 messages a second for ``seconds``; each carries its publish time
    (epoch seconds) as the reading's time. Runs in its own process. Returns messages sent."""
    mqtt = _paho()
    rng = np.random.default_rng(seed)
    total = int(rate * seconds)
    values = np.round(rng.normal(50.0, 1.0, total), 3).tolist()
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-paced")
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port)
    client.loop_start()
    infos = []
    try:
        started = time.perf_counter()
        for i, v in enumerate(values):
            due = started + i / rate
            pause = due - time.perf_counter()
            if pause > 0:
                time.sleep(pause)
            topic = f"bench/unit-{i % streams:04d}/temp"
            payload = json.dumps({"v": v, "t": time.time(), "seq": i // streams + 1})
            infos.append(client.publish(topic, payload, qos=1))
        for info in infos:
            info.wait_for_publish(timeout=60)
    finally:
        client.disconnect()
        client.loop_stop()
    return total


def latency_run(
    folder: Path,
    port: int,
    publisher: Any,
    sizes: Sizes,
    batch_wait: str,
    seed: int,
) -> dict[str, float]:
    """One run: the service subscribed, the paced publisher (a process pool of one) sending,
    every reading's delay from its publish time to its batch's commit."""
    from limitwatch.config import load_config

    folder.mkdir(parents=True, exist_ok=True)
    source = _mqtt_source(port, f"bench-delay-{folder.name}")
    config = load_config(_service_config(folder, source=source, batch_wait=batch_wait))
    service = _timed_service_class()(config)
    service.delays = []
    service.expect = int(sizes.latency_rate * sizes.latency_seconds)
    args = (port, sizes.latency_rate, sizes.latency_seconds, sizes.latency_streams, seed)
    with _running(service):
        _wait(lambda: service.mqtt["gateway"].subscribed.is_set(), 10, "the subscription")
        steady_from = time.time() + sizes.latency_warmup_s
        publisher.apply_async(paced_publisher, args).get(timeout=sizes.latency_seconds + 120)
        _await_commits(service)
    delays = np.array([d for t, d in service.delays if t >= steady_from]) * 1000.0
    return {
        "p50": float(np.percentile(delays, 50)),
        "p99": float(np.percentile(delays, 99)),
        "max": float(delays.max()),
    }


def measure_latency(sizes: Sizes, workdir: Path) -> list[Figure]:
    conditions = {
        "rate": f"{sizes.latency_rate:,} readings/s, paced, from a publisher in another process",
        "seconds_per_run": sizes.latency_seconds,
        "streams": sizes.latency_streams,
        "rules": ALL_DETECTORS,
        "measured": "time.time() after the batch's commit minus the publish time carried in "
        f"the message, for every reading after the first {sizes.latency_warmup_s:g} s of each run "
        "(while the streams are new, their monitors and first checkpoints are being made)",
        "batch_max": 500,
        "qos": 1,
    }
    if mosquitto_path() is None:
        skip = "skipped: mosquitto is not installed (Debian/Ubuntu: apt-get install mosquitto)"
        return [Figure("publish to commit p99", "ms", [], conditions, skipped=skip)]
    out = []
    with multiprocessing.get_context("spawn").Pool(1) as publisher:
        for batch_wait, note in LATENCY_BATCH_WAITS:
            p50s, p99s, maxes = [], [], []
            for i in range(sizes.repeats):
                folder = workdir / f"delay-{batch_wait}-{i}"
                with private_broker(folder / "broker", 100_000) as port:
                    r = latency_run(folder, port, publisher, sizes, batch_wait, seed=i)
                p50s.append(r["p50"])
                p99s.append(r["p99"])
                maxes.append(r["max"])
            these = {**conditions, "batch_wait": f"{batch_wait} ({note})"}
            out.append(Figure(f"publish to commit p50, batch_wait {batch_wait}", "ms", p50s, these))
            out.append(
                Figure(
                    f"publish to commit p99, batch_wait {batch_wait}",
                    "ms",
                    p99s,
                    these,
                    target=("<", 250),
                    extra={"max_ms_median": statistics.median(maxes)},
                )
            )
    return out


# --------------------------------------------------------------------------- memory, restore


def _rss_bytes() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _checkpointed_store(path: Path, streams: int, seed: int) -> None:
    """A store holding one checkpoint per stream, as a site that has run for a while leaves
    it: each stream with its own baseline, thousands of readings behind it (positions past
    the small integers Python shares) and live detector state (made once, not timed)."""
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
            chunk[name] = monitor.snapshot()
            if len(chunk) >= 5_000:
                store.save_checkpoints(chunk, now=T0)
                chunk = {}
        if chunk:
            store.save_checkpoints(chunk, now=T0)


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
                "measured": "CPU time of Store.open + Pipeline.restore (checkpoints read "
                "and parsed, StreamMonitor.restore per stream); the first run may read the "
                "newly written database from disk (system CPU time), which the median leaves out",
            },
            target=("<", 2.0) if full_size else None,
            extra={"wall_seconds": statistics.median(r["seconds"] for r in runs)},
        ),
    ]


# --------------------------------------------------------------------------- the whole run


def run(
    only: str | None = None,
    quick: bool = False,
    workdir: Path | None = None,
    sizes: Sizes | None = None,
    progress: Callable[[str], None] | None = None,
) -> list[Figure]:
    """Measure the chosen part (or all of them) and return the figures."""
    sizes = sizes or (QUICK if quick else FULL)
    parts = PARTS if only is None else (only,)
    say = progress or (lambda _text: None)
    figures: list[Figure] = []
    with contextlib.ExitStack() as stack:
        if workdir is None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="lw-bench-")))
        for part in parts:
            say(f"measuring {part} ...")
            if part == "engine":
                figures += measure_engine(sizes)
            elif part == "file":
                figures += measure_file(sizes, workdir)
            elif part == "mqtt":
                figures += measure_mqtt(sizes, workdir)
            elif part == "latency":
                figures += measure_latency(sizes, workdir)
            elif part == "memory":
                figures += measure_memory(sizes, workdir / "memory")
            else:
                raise ValueError(f"unknown part {part!r}; parts: {', '.join(PARTS)}")
    return figures


def _number(value: float, unit: str) -> str:
    if unit in ("readings/s", "messages/s"):
        return f"{value:,.0f} {unit}"
    if unit == "ratio":
        return f"{value:.2f}"
    if unit == "bytes":
        return f"{value:,.0f} bytes"
    if unit == "ms":
        return f"{value:.1f} ms"
    return f"{value:.2f} {unit}"


def describe(figure: Figure) -> list[str]:
    """A figure as text: headline, runs, target, then every condition on its own line."""
    if figure.skipped or figure.value is None:
        return [f"{figure.name}: {figure.skipped or 'no result'}"]
    head = f"{figure.name}: {_number(figure.value, figure.unit)}"
    if len(figure.runs) > 1:
        runs = ", ".join(_number(r, figure.unit) for r in figure.runs)
        head += f" (median of {len(figure.runs)} runs: {runs})"
    if figure.target is not None:
        op, bound = figure.target
        shown = _number(bound, figure.unit)
        head += f"; target {op} {shown}: {'met' if figure.met else 'NOT met'}"
    lines = [head]
    for key, value in {**figure.conditions, **figure.extra}.items():
        if isinstance(value, float):
            value = f"{value:,.1f}"
        lines.append(f"    {key.replace('_', ' ')}: {value}")
    return lines
