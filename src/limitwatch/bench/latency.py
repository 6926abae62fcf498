"""Publish-to-commit delay at a paced rate, for the batch waits compared."""

from __future__ import annotations

import json
import multiprocessing
import statistics
import time
from pathlib import Path
from typing import Any

import numpy as np

from limitwatch.bench.common import (
    ALL_DETECTORS,
    LATENCY_BATCH_WAITS,
    Figure,
    Sizes,
    load_average,
)
from limitwatch.bench.mqtt import (
    _cpu_of,
    _mqtt_source,
    _paho,
    _wait,
)
from limitwatch.bench.service import (
    _await_commits,
    _running,
    _service_config,
    _timed_service_class,
)
from limitwatch.localbroker import mosquitto_path, private_broker

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
    service.batches = []
    service.expect = int(sizes.latency_rate * sizes.latency_seconds)
    args = (port, sizes.latency_rate, sizes.latency_seconds, sizes.latency_streams, seed)
    with _running(service):
        _wait(lambda: service.mqtt["gateway"].subscribed.is_set(), 10, "the subscription")
        pid = getattr(getattr(service.mqtt["gateway"], "_process", None), "pid", None)
        cpu = time.process_time() + _cpu_of(pid)
        steady_from = time.time() + sizes.latency_warmup_s
        publisher.apply_async(paced_publisher, args).get(timeout=sizes.latency_seconds + 120)
        _await_commits(service)
        cpu = time.process_time() + _cpu_of(pid) - cpu
    delays = np.array([d for t, d in service.delays if t >= steady_from]) * 1000.0
    parts = np.array(service.batches) * [1000.0, 1000.0, 1000.0, 1.0, 1000.0]
    return {
        "p50": float(np.percentile(delays, 50)),
        "p99": float(np.percentile(delays, 99)),
        "max": float(delays.max()),
        "cpu_us": 1e6 * cpu / service.expect,
        "transport_p99": float(np.percentile(parts[:, 0], 99)),
        "gather_p50": float(np.percentile(parts[:, 1], 50)),
        "gather_p99": float(np.percentile(parts[:, 1], 99)),
        "work_p50": float(np.percentile(parts[:, 2], 50)),
        "work_p99": float(np.percentile(parts[:, 2], 99)),
        "batch_size": float(np.median(parts[:, 3])),
        "commit_p50": float(np.percentile(parts[:, 4], 50)),
        "commit_p99": float(np.percentile(parts[:, 4], 99)),
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
            runs: list[dict[str, float]] = []
            load = load_average()
            for i in range(sizes.repeats):
                folder = workdir / f"delay-{batch_wait}-{i}"
                with private_broker(folder / "broker", 100_000) as port:
                    r = latency_run(folder, port, publisher, sizes, batch_wait, seed=i)
                p50s.append(r["p50"])
                p99s.append(r["p99"])
                maxes.append(r["max"])
                runs.append(r)
            these = {
                **conditions,
                "batch_wait": f"{batch_wait} ({note})",
                "load_average": load,
                "load_average_after": load_average(),
            }
            parts = {
                key: statistics.median(r[key] for r in runs)
                for key in (
                    "cpu_us",
                    "transport_p99",
                    "gather_p50",
                    "gather_p99",
                    "work_p50",
                    "work_p99",
                    "batch_size",
                    "commit_p50",
                    "commit_p99",
                )
            }
            out.append(Figure(f"publish to commit p50, batch_wait {batch_wait}", "ms", p50s, these))
            out.append(
                Figure(
                    f"publish to commit p99, batch_wait {batch_wait}",
                    "ms",
                    p99s,
                    these,
                    target=("<", 250),
                    extra={
                        "max_ms_median": statistics.median(maxes),
                        "cpu_us_per_reading": parts["cpu_us"],
                        "publish_to_receipt_p99_ms": parts["transport_p99"],
                        "receipt_to_batch_taken_ms_p50_p99": (
                            f"{parts['gather_p50']:.1f} / {parts['gather_p99']:.1f}"
                        ),
                        "batch_parse_commit_ack_ms_p50_p99": (
                            f"{parts['work_p50']:.1f} / {parts['work_p99']:.1f}"
                        ),
                        "of_which_pipeline_commit_ms_p50_p99": (
                            f"{parts['commit_p50']:.1f} / {parts['commit_p99']:.1f}"
                        ),
                        "batch_size_median": parts["batch_size"],
                        "parts_note": "per batch, for its first delivery: publish to receipt "
                        "in the connection process; receipt to the worker taking the batch "
                        "(pipe, batch_wait, the previous batch); the worker's parse, commit "
                        "and acknowledgement of the batch. CPU: the service's process and its "
                        "connection process, per reading",
                    },
                )
            )
    return out
