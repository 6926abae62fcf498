"""The demo's plant as one Sparkplug B edge node: ``limitwatch demo --sparkplug``.

Quillmoor Works' site gateway (invented, like the plant) is an edge node ``site-gateway`` in
group ``quillmoor``; each demo stream's line or machine is one of its devices and the stream's
quantity one metric, so ``pack-2/downtime`` is metric ``downtime`` of device ``pack-2``. The
service reads them through ``type = "sparkplug"`` with the stream template
``{device}/{metric}``, which gives back the demo's own stream ids, so the demo config's
``[[streams]]`` apply unchanged.

What the gateway sends, as a real one would: an NBIRTH when it connects; a DBIRTH for each
device when that device first reports (carrying its metric's name, alias and first reading);
DDATA by alias only after that. The stream whose injected cause is "stops reporting" has its
device declared dead (DDEATH) right after its last reading, so in this run its stale incident
opens as soon as the gateway says so ("reported offline") rather than at the stale check.
"""

from __future__ import annotations

import time
from collections.abc import Sequence

from limitwatch.demo import SPARKPLUG_SOURCE, STREAMS
from limitwatch.ingest.sparkplug.simulate import EdgeNode

GROUP = "quillmoor"
NODE = "site-gateway"


def source_config(port: int) -> str:
    """The ``[[sources]]`` entry the demo config gets instead of its file source."""
    return f"""[[sources]]
type = "sparkplug"
name = "{SPARKPLUG_SOURCE}"
host = "127.0.0.1"
port = {port}
client_id = "limitwatch-demo"
host_id = "limitwatch-demo"
edge_nodes = ["{GROUP}/{NODE}"]
stream = "{{device}}/{{metric}}"
session_expiry = "1h"

"""


def device_metrics() -> dict[str, dict[str, int]]:
    """Device -> {metric name: alias}: one device per demo stream, aliases 1, 2, ..."""
    devices: dict[str, dict[str, int]] = {}
    for alias, spec in enumerate(STREAMS, start=1):
        device, metric = spec.stream.split("/", 1)
        devices.setdefault(device, {})[metric] = alias
    return devices


class PlantGateway:
    """Publishes the demo's rows as the site gateway's births, data and device deaths."""

    def __init__(self, port: int, rows: Sequence[tuple[str, float, float]]) -> None:
        self.node = EdgeNode(port, GROUP, NODE, devices=device_metrics())
        self._born: set[str] = set()
        last: dict[str, float] = {}
        for stream, moment, _ in rows:
            last[stream] = max(moment, last.get(stream, moment))
        silenced = {s.stream for s in STREAMS if s.injected == "stops reporting"}
        self._dies_after = {stream: last[stream] for stream in silenced if stream in last}

    def describe(self) -> str:
        return (
            f"Sparkplug B edge node {GROUP}/{NODE} with devices "
            f"{', '.join(self.node.devices)}, publishing births and data by alias"
        )

    def start(self) -> None:
        self.node.connect()
        self.node.birth({}, int(time.time() * 1000))

    def feed(self, chunk: Sequence[tuple[str, float, float]]) -> None:
        for stream, moment, value in chunk:
            device, metric = stream.split("/", 1)
            at_ms = round(moment * 1000)
            if device in self._born:
                self.node.device_data(device, {metric: value}, at_ms)
            else:
                self.node.device_birth(device, {metric: value}, at_ms)
                self._born.add(device)
            if self._dies_after.get(stream) == moment:
                self.node.device_death(device)
                self._born.discard(device)

    def close(self) -> None:
        """Disconnect cleanly: no will, so the edge node does not report itself offline."""
        self.node.close()
