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
``cluster`` (only with ``--only cluster``)
    Kafka consumer-group workers sharing one store (an SQLite file, or with ``store`` an empty
    PostgreSQL database), the bridge in front, and a failover: see
    :mod:`limitwatch.bench.cluster`.
``memory`` / ``restore``
    Resident memory (what an operator sees in ``ps``) gained per stream once many streams are
    restored from their checkpoints, with the Python memory tracemalloc counts beside it, and
    the CPU time that restore takes (what a restart does: :meth:`~limitwatch.store.Store.
    iter_checkpoints` and :meth:`~limitwatch.engine.StreamMonitor.from_state` for each stream).

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
import tempfile
from collections.abc import Callable
from pathlib import Path

from limitwatch.bench.cluster_store import BenchStoreRefused, bench_store
from limitwatch.bench.common import (
    ALL_DETECTORS,
    EXTRA_PARTS,
    FULL,
    LATENCY_BATCH_WAITS,
    PARTS,
    QUICK,
    Figure,
    Sizes,
    load_average,
    machine,
)
from limitwatch.bench.engine import (
    _engine_monitors,
    _engine_rounds,
    _run_engine,
    _run_flat,
    measure_engine,
)
from limitwatch.bench.files import measure_file
from limitwatch.bench.latency import measure_latency
from limitwatch.bench.memory import measure_memory
from limitwatch.bench.mqtt import measure_mqtt

__all__ = [
    "ALL_DETECTORS",
    "EXTRA_PARTS",
    "FULL",
    "LATENCY_BATCH_WAITS",
    "PARTS",
    "QUICK",
    "BenchStoreRefused",
    "Figure",
    "Sizes",
    "_engine_monitors",
    "_engine_rounds",
    "_run_engine",
    "_run_flat",
    "describe",
    "load_average",
    "machine",
    "run",
]


# --------------------------------------------------------------------------- the whole run


def run(
    only: str | None = None,
    quick: bool = False,
    workdir: Path | None = None,
    sizes: Sizes | None = None,
    progress: Callable[[str], None] | None = None,
    store: str | None = None,
) -> list[Figure]:
    """Measure the chosen part (or all of them) and return the figures. ``store`` (the
    cluster part only) is ``sqlite`` or the URL of an empty PostgreSQL database; a bad one
    raises :class:`~limitwatch.bench.cluster_store.BenchStoreRefused` before anything runs."""
    sizes = sizes or (QUICK if quick else FULL)
    parts = PARTS if only is None else (only,)
    if store is not None and parts != ("cluster",):
        raise BenchStoreRefused(
            "a store applies to the cluster part only (--only cluster); the other parts "
            "measure one service on its own SQLite file"
        )
    chosen = bench_store(store)
    if "cluster" in parts:
        chosen.check_ready()  # a database holding anything is refused before anything runs
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
            elif part == "cluster":
                from limitwatch.bench.cluster import measure_cluster

                figures += measure_cluster(sizes, workdir, chosen)
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
