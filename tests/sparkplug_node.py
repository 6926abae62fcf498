"""A small Sparkplug B edge node for the tests: real protobuf payloads, births with aliases,
data by alias, seq counted 0-255, a last will NDEATH with the session's bdSeq.

It encodes with the same schema the service decodes with (built from the Sparkplug 3.0
specification's field numbers in limitwatch.ingest.sparkplug.proto); the field numbers
themselves are checked against hand-encoded bytes in tests/test_sparkplug.py.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterable

import paho.mqtt.client as mqtt

from limitwatch.ingest.sparkplug.proto import DATATYPES, Payload


def payload(
    seq: int | None,
    metrics: Iterable[dict],
    timestamp_ms: int | None = None,
) -> bytes:
    """A Sparkplug B payload; each metric is a dict of Metric fields (``double_value`` ...)."""
    message = Payload()
    if timestamp_ms is not None:
        message.timestamp = timestamp_ms
    if seq is not None:
        message.seq = seq
    for fields in metrics:
        metric = message.metrics.add()
        for key, value in fields.items():
            setattr(metric, key, DATATYPES[value] if key == "datatype" else value)
    return message.SerializeToString()


def bd_seq_metric(bd_seq: int) -> dict:
    return {"name": "bdSeq", "datatype": "Int64", "long_value": bd_seq}


class EdgeNode:
    """One edge node on a real broker; every publish is QoS 0 as Sparkplug's DATA are, births
    and deaths QoS 0 as well (the will is QoS 1), and every command it receives is kept."""

    def __init__(self, port: int, group: str, node: str, metrics: dict[str, int]) -> None:
        self.group, self.node = group, node
        self.metrics = metrics  # name -> alias
        self.seq = 0
        self.bd_seq = 0
        self.commands: list[Payload] = []
        self._got = threading.Event()
        self.client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2, client_id=f"edge-{group}-{node}"
        )
        self.client.on_message = self._on_message
        self._port = port

    def topic(self, kind: str, device: str | None = None) -> str:
        tail = f"/{device}" if device else ""
        return f"spBv1.0/{self.group}/{kind}/{self.node}{tail}"

    def connect(self) -> None:
        will = payload(None, [bd_seq_metric(self.bd_seq)])
        self.client.will_set(self.topic("NDEATH"), will, qos=1)
        self.client.connect("127.0.0.1", self._port)
        self.client.subscribe(self.topic("NCMD"), qos=1)
        self.client.loop_start()

    def _on_message(self, client, userdata, message) -> None:
        self.commands.append(Payload.FromString(message.payload))
        self._got.set()

    def send(self, kind: str, metrics: list[dict], *, seq: int | None = None) -> None:
        body = payload(self.seq if seq is None else seq, metrics, int(time.time() * 1000))
        self.client.publish(self.topic(kind), body, qos=1).wait_for_publish(5)
        self.seq = (self.seq + 1) % 256

    def birth(self, values: dict[str, float], at_ms: int) -> None:
        self.seq = 0
        metrics = [bd_seq_metric(self.bd_seq)]
        rebirth = {"name": "Node Control/Rebirth", "datatype": "Boolean", "boolean_value": False}
        metrics.append(rebirth)
        for name, alias in self.metrics.items():
            metrics.append(
                {"name": name, "alias": alias, "datatype": "Double", "timestamp": at_ms,
                 "double_value": values[name]}
            )  # fmt: skip
        self.send("NBIRTH", metrics)

    def data(self, values: dict[str, float], at_ms: int, *, seq: int | None = None) -> None:
        metrics = [
            {"alias": self.metrics[n], "timestamp": at_ms, "double_value": v}
            for n, v in values.items()
        ]
        self.send("NDATA", metrics, seq=seq)

    def wait_for_command(self, timeout: float = 10.0) -> bool:
        return self._got.wait(timeout)

    def rebirths_asked(self) -> int:
        return sum(
            1
            for c in self.commands
            for m in c.metrics
            if m.name == "Node Control/Rebirth" and m.boolean_value
        )

    def die(self) -> None:
        """Publish the NDEATH explicitly and disconnect (as a node that shuts down cleanly)."""
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
