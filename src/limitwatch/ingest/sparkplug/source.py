"""The Sparkplug B source: the MQTT source's connection process, a host application's rules.

Connection: the same connection process as ``type = "mqtt"`` (persistent session, QoS 1,
manual acknowledgements after commit, in arrival order), subscribed to
``spBv1.0/<group>/+/<node>/#`` for each configured edge node. Its status message is the host
application's STATE (Sparkplug 3.0 section 5.3): retained on ``spBv1.0/STATE/<host_id>``, JSON
``{"online": true, "timestamp": <ms>}`` at connect and the same with ``false`` as the last will
and at a clean stop, both with the time the source was started.

Each message is read by :class:`~limitwatch.ingest.sparkplug.host.SparkplugHost`; its metrics
become readings (one message, many readings, all in one batch), its refusals dead letters that
keep the topic and the raw protobuf. A rebirth request (NCMD ``Node Control/Rebirth`` = true)
goes out through the connection process at most once per ``rebirth_every`` per edge node.

Across restarts: the births (aliases, datatypes, bdSeq) are kept in a small JSON file beside
the database, written after a batch holding a birth or death has committed and before that
batch is acknowledged. A message the broker redelivers after a crash is then read with the
birth that came before it; the birth itself, if it was not acknowledged, comes again first.
"""

from __future__ import annotations

import json
import logging
import os
import queue
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Self

from google.protobuf.message import DecodeError

from limitwatch.ingest.base import Parsed, Source, SourceContext, SourceHealth
from limitwatch.ingest.mqtt.client import Delivery, MqttSettings
from limitwatch.ingest.mqtt.process import MqttProcess
from limitwatch.ingest.mqtt.source import connection_settings, envelope
from limitwatch.ingest.sparkplug.host import (
    Message,
    NodeState,
    Outcome,
    SparkplugHost,
    parse_topic,
)
from limitwatch.ingest.sparkplug.proto import DATATYPES, Payload
from limitwatch.ingest.sparkplug.settings import SparkplugSourceConfig
from limitwatch.ingest.streamid import stream_id_problem
from limitwatch.ingest.timefield import LATEST_TIME
from limitwatch.ingest.timeparse import format_time
from limitwatch.model import Reading
from limitwatch.secrets import resolve_secret

__all__ = ["SparkplugSource", "rebirth_request", "state_message"]

log = logging.getLogger("limitwatch.sparkplug")


def state_message(online: bool, timestamp_ms: int) -> bytes:
    """The host application's STATE payload (Sparkplug 3.0 section 5.3)."""
    return json.dumps({"online": online, "timestamp": timestamp_ms}).encode()


def rebirth_request(timestamp_ms: int) -> bytes:
    """An NCMD payload asking an edge node to publish its births again."""
    payload = Payload(timestamp=timestamp_ms)
    payload.metrics.add(
        name="Node Control/Rebirth", datatype=DATATYPES["Boolean"], boolean_value=True
    )
    return bytes(payload.SerializeToString())


class SparkplugSource(Source):
    """``type = "sparkplug"``."""

    Settings = SparkplugSourceConfig
    connection = True

    def __init__(
        self,
        settings: SparkplugSourceConfig,
        connect: MqttSettings,
        context: SourceContext,
        state_file: Path | None,
    ) -> None:
        super().__init__(settings)
        self.config = settings
        self.connect = connect
        self.future_tolerance = context.future_tolerance
        self.state_file = state_file
        self.host = SparkplugHost(_load(state_file))
        self.process: MqttProcess | None = None
        self._idle = threading.Event()
        self._asked: dict[tuple[str, str], float] = {}
        """Edge node -> when a rebirth was last requested (receipt time)."""
        self._dirty = False
        self.rebirths = 0
        self.skipped = 0
        self.events: dict[str, str] = {}
        """``group/node`` -> its last birth or death, for ``/health``."""

    @classmethod
    def from_settings(cls, settings: SparkplugSourceConfig, context: SourceContext) -> Self:
        password = resolve_secret(
            env=settings.password_env, file=settings.password_file, what=f"sources.{settings.name}"
        )
        started = int(time.time() * 1000)
        connect = connection_settings(
            settings,
            settings.subscriptions,
            password,
            status_topic=settings.state_topic,
            online_payload=state_message(True, started),
            offline_payload=state_message(False, started),
            clean=settings.clean_session,
        )
        return cls(settings, connect, context, context.state_file)

    @property
    def subscribed(self) -> threading.Event:
        return self._idle if self.process is None else self.process.subscribed

    def start(self, intake: queue.SimpleQueue[Any]) -> None:
        self.process = MqttProcess(self.connect, intake)
        self.process.start()

    def parse(self, item: Delivery, received_at: float) -> list[Parsed]:
        raw = envelope(item)
        limit = self.config.max_payload_bytes
        if len(item.payload) > limit:
            detail = f"payload of {len(item.payload)} bytes is over the limit of {limit} bytes"
            return [Parsed(self.name, raw, error="oversize", detail=detail)]
        message = parse_topic(item.topic)
        if message is None:
            detail = f"topic {item.topic[:200]!r} is not a Sparkplug B topic"
            return [Parsed(self.name, raw, error="unmapped-topic", detail=detail)]
        try:
            outcome = self.host.handle(message, item.payload, received_at)
        except DecodeError as exc:
            detail = f"not a Sparkplug B payload: {str(exc)[:200]}"
            return [Parsed(self.name, raw, error="bad-protobuf", detail=detail)]
        node = f"{message.group}/{message.node}"
        if outcome.event is not None:
            self._dirty = True
            self.events[node] = f"{outcome.event} at {format_time(received_at)}"
            log.info("sparkplug %s: %s: %s", self.name, node, outcome.event)
        if outcome.rebirth:
            self._ask_rebirth(message.group, message.node, received_at)
        self.skipped += outcome.skipped
        out = [Parsed(self.name, raw, error=r.reason, detail=r.detail) for r in outcome.refusals]
        if outcome.offline:
            out.append(self._offline(message, outcome, raw))
        for found in outcome.readings:
            stream = self.config.stream_for(message.group, message.node, found.device, found.metric)
            problem = _time_problem(found.time, received_at, self.future_tolerance)
            if problem is not None:
                out.append(
                    Parsed(self.name, raw, error=problem[0], detail=f"{stream[:200]}: {problem[1]}")
                )
                continue
            bad = stream_id_problem(stream)
            if bad is not None:
                detail = f"the stream id {stream[:200]!r} {bad}"
                out.append(Parsed(self.name, raw, error="bad-stream", detail=detail))
                continue
            out.append(Parsed(self.name, raw, reading=Reading(stream, found.time, found.value)))
        return out

    def _offline(self, message: Message, outcome: Outcome, raw: bytes) -> Parsed:
        """The streams a death took offline, for the worker to open their stale incidents."""
        streams = []
        for device, metric in outcome.offline:
            stream = self.config.stream_for(message.group, message.node, device, metric)
            if stream_id_problem(stream) is None:
                streams.append(stream)
        return Parsed(self.name, raw, offline=tuple(streams), detail=outcome.offline_words)

    def _ask_rebirth(self, group: str, node: str, now: float) -> None:
        last = self._asked.get((group, node))
        if last is not None and now - last < self.config.rebirth_every:
            return
        if self.process is None:
            return
        topic = f"spBv1.0/{group}/NCMD/{node}"
        if self.process.publish(topic, rebirth_request(int(now * 1000)), qos=0):
            self._asked[(group, node)] = now
            self.rebirths += 1
            log.info("sparkplug %s: asked edge node %s/%s for a rebirth", self.name, group, node)

    def refused(self, item: Delivery, reason: str, detail: str) -> Parsed:
        return Parsed(self.name, envelope(item), error=reason, detail=detail)

    def acknowledge(self, items: Sequence[Delivery]) -> None:
        if self._dirty:
            _save(self.state_file, self.host.nodes)  # before the births are acknowledged
            self._dirty = False
        if self.process is not None:
            self.process.ack(list(items))

    def health(self) -> SourceHealth:
        process = self.process
        detail = {
            "edge_nodes": dict(self.events),
            "rebirths_requested": self.rebirths,
            "metrics_skipped": self.skipped,
        }
        if process is None:
            return SourceHealth(connected=False, ready=False, detail=detail)
        return SourceHealth(
            connected=process.connected.is_set(),
            ready=process.subscribed.is_set(),
            last_error=process.last_error,
            restarts=process.restarts,
            detail=detail,
        )

    def close(self) -> None:
        if self.process is not None:
            self.process.close()


def _time_problem(
    moment: float, received: float, tolerance: float | None
) -> tuple[str, str] | None:
    if not 0.0 <= moment < LATEST_TIME:
        return "bad-time", f"time {moment * 1000:.0f} ms lies outside the years 1970 to 9999"
    if tolerance is not None and moment > received + tolerance:
        return (
            "in-the-future",
            f"time {format_time(moment)} is {moment - received:.0f} s after the receive time "
            f"{format_time(received)}, more than future_tolerance ({tolerance:g} s); check the "
            "edge node's clock",
        )
    return None


def _load(path: Path | None) -> dict[tuple[str, str], NodeState]:
    if path is None or not path.exists():
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        return {
            (g, n): NodeState.from_snapshot(state) for g, n, state in data["nodes"]
        }
    except (OSError, ValueError, KeyError, TypeError) as exc:
        log.warning(
            "sparkplug: %s could not be read (%s); every edge node is asked for a rebirth "
            "as its data arrives",
            path,
            exc,
        )
        return {}


def _save(path: Path | None, nodes: dict[tuple[str, str], NodeState]) -> None:
    if path is None:
        return
    data = {"nodes": [[g, n, state.snapshot()] for (g, n), state in nodes.items()]}
    temporary = path.with_name(path.name + ".new")
    fd = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as handle:
        json.dump(data, handle)
    os.replace(temporary, path)
