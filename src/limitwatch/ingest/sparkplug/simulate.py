"""A small Sparkplug B edge node on a real broker: real protobuf births with aliases, data by
alias, ``seq`` counted 0-255, deaths, and an MQTT last will that is the session's NDEATH.

Why it lives in the package: ``limitwatch demo --sparkplug`` runs the invented plant through it,
and the tests drive the service with it; one copy keeps the two speaking the same dialect. It
is a simulator for trying limitwatch out, not an edge node to deploy.

It encodes with the schema the service decodes with (:mod:`limitwatch.ingest.sparkplug.proto`,
written from the Sparkplug 3.0 specification's field numbers); those numbers are checked
against hand-encoded wire bytes in ``tests/test_sparkplug.py``, so the two cannot share a
mistake unnoticed.

>>> from limitwatch.ingest.sparkplug.proto import Payload
>>> body = payload(3, [{"alias": 1, "datatype": "Double", "double_value": 2.5}], 1000)
>>> decoded = Payload.FromString(body)
>>> decoded.seq, decoded.metrics[0].alias, decoded.metrics[0].double_value
(3, 1, 2.5)

References
----------
Eclipse Foundation, *Sparkplug 3.0.0 Specification* (2022): sections 5.2-5.4 (edge node
session, NBIRTH/DBIRTH/NDATA/DDATA/NDEATH/DDEATH, ``bdSeq`` and ``seq``, the NDEATH as will)
and 6.4.9 (``Node Control/Rebirth``).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterable, Mapping
from typing import Any

import paho.mqtt.client as mqtt

from limitwatch.ingest.sparkplug.proto import DATATYPES, Payload

__all__ = ["EdgeNode", "bd_seq_metric", "payload"]

REBIRTH = "Node Control/Rebirth"


def payload(
    seq: int | None, metrics: Iterable[Mapping[str, Any]], timestamp_ms: int | None = None
) -> bytes:
    """A Sparkplug B payload; each metric is a mapping of Metric fields (``double_value``,
    ``alias`` ...), its ``datatype`` given by name (``"Double"``)."""
    message = Payload()
    if timestamp_ms is not None:
        message.timestamp = timestamp_ms
    if seq is not None:
        message.seq = seq
    for fields in metrics:
        metric = message.metrics.add()
        for key, value in fields.items():
            setattr(metric, key, DATATYPES[value] if key == "datatype" else value)
    return bytes(message.SerializeToString())


def bd_seq_metric(bd_seq: int) -> dict[str, Any]:
    return {"name": "bdSeq", "datatype": "Int64", "long_value": bd_seq}


class EdgeNode:
    """One edge node and its devices on a broker at ``host:port``.

    ``metrics`` maps the node's own metric names to aliases; ``devices`` maps each device to
    its metric names and aliases (aliases are unique across the node and its devices, as
    Sparkplug requires). Every message goes out at QoS 1 and waits for the broker's PUBACK, so
    that what a caller sent has reached the broker when the call returns; the will (NDEATH
    with the session's ``bdSeq``) is QoS 1. Commands sent to the node (NCMD) are kept.
    """

    def __init__(
        self,
        port: int,
        group: str,
        node: str,
        metrics: Mapping[str, int] | None = None,
        *,
        devices: Mapping[str, Mapping[str, int]] | None = None,
        host: str = "127.0.0.1",
    ) -> None:
        self.group, self.node = group, node
        self.metrics = dict(metrics or {})
        self.devices = {device: dict(names) for device, names in (devices or {}).items()}
        aliases = list(self.metrics.values()) + [
            a for names in self.devices.values() for a in names.values()
        ]
        if len(set(aliases)) != len(aliases):
            raise ValueError(f"edge node {group}/{node}: aliases must be unique, got {aliases}")
        self.seq = 0
        self.bd_seq = 0
        self.commands: list[Any] = []
        self._got = threading.Event()
        self.client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2, client_id=f"edge-{group}-{node}"
        )
        self.client.on_message = self._on_message
        self._host, self._port = host, port

    def topic(self, kind: str, device: str | None = None) -> str:
        tail = f"/{device}" if device else ""
        return f"spBv1.0/{self.group}/{kind}/{self.node}{tail}"

    def connect(self) -> None:
        """Connect with the NDEATH of this session (``bdSeq``) as will, and listen for NCMD."""
        will = payload(None, [bd_seq_metric(self.bd_seq)])
        self.client.will_set(self.topic("NDEATH"), will, qos=1)
        self.client.connect(self._host, self._port)
        self.client.subscribe(self.topic("NCMD"), qos=1)
        self.client.loop_start()

    def _on_message(self, client: Any, userdata: Any, message: Any) -> None:
        try:
            self.commands.append(Payload.FromString(message.payload))
        except Exception:
            return
        self._got.set()

    def send(
        self,
        kind: str,
        metrics: list[dict[str, Any]],
        *,
        seq: int | None = None,
        device: str | None = None,
    ) -> None:
        """Publish one message with the next ``seq`` (or the one given, to make a gap)."""
        body = payload(self.seq if seq is None else seq, metrics, int(time.time() * 1000))
        self.client.publish(self.topic(kind, device), body, qos=1).wait_for_publish(5)
        self.seq = (self.seq + 1) % 256

    def birth(self, values: Mapping[str, float], at_ms: int) -> None:
        """NBIRTH: seq starts again at 0; the node's metrics with names, aliases, values."""
        self.seq = 0
        rebirth = {"name": REBIRTH, "datatype": "Boolean", "boolean_value": False}
        metrics = [bd_seq_metric(self.bd_seq), rebirth]
        metrics += _named(self.metrics, values, at_ms)
        self.send("NBIRTH", metrics)

    def data(
        self, values: Mapping[str, float], at_ms: int, *, seq: int | None = None
    ) -> None:
        """NDATA by alias only."""
        self.send("NDATA", _aliased(self.metrics, values, at_ms), seq=seq)

    def device_birth(self, device: str, values: Mapping[str, float], at_ms: int) -> None:
        """DBIRTH of ``device``: its metrics with names, aliases and their first values."""
        self.send("DBIRTH", _named(self.devices[device], values, at_ms), device=device)

    def device_data(self, device: str, values: Mapping[str, float], at_ms: int) -> None:
        """DDATA of ``device`` by alias only."""
        self.send("DDATA", _aliased(self.devices[device], values, at_ms), device=device)

    def device_death(self, device: str) -> None:
        """DDEATH: the device went offline (its node stays online)."""
        self.send("DDEATH", [], device=device)

    def wait_for_command(self, timeout: float = 10.0) -> bool:
        return self._got.wait(timeout)

    def rebirths_asked(self) -> int:
        return sum(
            1
            for command in self.commands
            for m in command.metrics
            if m.name == REBIRTH and m.boolean_value
        )

    def die(self) -> None:
        """Publish the NDEATH explicitly (as a node that shuts down cleanly)."""
        self.client.publish(
            self.topic("NDEATH"), payload(None, [bd_seq_metric(self.bd_seq)]), qos=1
        ).wait_for_publish(5)
        self.bd_seq += 1

    def vanish(self) -> None:
        """Drop the connection without a DISCONNECT (power cut, cable pulled): the broker
        publishes the will, the NDEATH set at connect."""
        self.client.loop_stop()
        sock = self.client.socket()
        if sock is not None:
            sock.close()
        self.bd_seq += 1

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def _named(aliases: Mapping[str, int], values: Mapping[str, float], at_ms: int) -> list[dict]:
    return [
        {"name": name, "alias": aliases[name], "datatype": "Double", "timestamp": at_ms,
         "double_value": value}
        for name, value in values.items()
    ]  # fmt: skip


def _aliased(aliases: Mapping[str, int], values: Mapping[str, float], at_ms: int) -> list[dict]:
    return [
        {"alias": aliases[name], "timestamp": at_ms, "double_value": value}
        for name, value in values.items()
    ]
