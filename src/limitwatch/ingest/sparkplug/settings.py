"""``[[sources]]`` with ``type = "sparkplug"``: a Sparkplug B host application on a broker.

>>> source = SparkplugSourceConfig.model_validate({
...     "type": "sparkplug", "name": "presses", "host": "127.0.0.1", "client_id": "lw-host",
...     "host_id": "limitwatch", "edge_nodes": ["plant-a/+"]})
>>> source.subscriptions, source.state_topic
((('spBv1.0/plant-a/+/+/#', 1),), 'spBv1.0/STATE/limitwatch')
>>> source.stream_for("plant-a", "press-1", "pump-2", "flow")
'plant-a/press-1/pump-2/flow'
>>> source.stream_for("plant-a", "press-1", None, "oil/temp")
'plant-a/press-1/oil/temp'

References
----------
Eclipse Foundation, *Sparkplug 3.0.0 Specification* (2022), sections 4.1.1 (topic namespace
``spBv1.0/group_id/message_type/edge_node_id[/device_id]``; the ids are valid MQTT topic
levels without ``+``, ``#`` or ``/``) and 5.3 / 6.4.3 (the host application's STATE topic).
"""

from __future__ import annotations

import string
from typing import Literal

from pydantic import Field, field_validator

from limitwatch.config import Duration
from limitwatch.ingest.mqtt.settings import BrokerSettings
from limitwatch.ingest.streamid import stream_id_problem

__all__ = ["SparkplugSourceConfig"]

_PLACES = ("group", "node", "device", "metric")
_ID_FORBIDDEN = set("+#/\x00")


def _template_problem(template: str, allowed: tuple[str, ...]) -> str | None:
    try:
        parts = list(string.Formatter().parse(template))
    except ValueError as exc:
        return f"is not a template ({exc}); write e.g. {{group}}/{{node}}/{{metric}}"
    text = "".join(literal for literal, _, _, _ in parts)
    for _, name, spec, conversion in parts:
        if name is None:
            continue
        if name not in allowed or spec or conversion:
            places = ", ".join("{" + a + "}" for a in allowed)
            return f"has a place {name!r} it cannot fill (with no format); the places are {places}"
    if "{metric}" not in template:
        return "must name {metric}, or every metric of a node would feed one stream"
    problem = stream_id_problem(text)
    return None if problem is None else f"has text that {problem}"


class SparkplugSourceConfig(BrokerSettings):
    """``type = "sparkplug"``: edge nodes' births, data and deaths, as a host application."""

    type: Literal["sparkplug"]
    host_id: str = Field(min_length=1, max_length=200)
    """Our host application id: STATE is published on ``spBv1.0/STATE/<host_id>``."""
    edge_nodes: list[str] = Field(min_length=1)
    """``group/node`` pairs to subscribe to; ``+`` stands for every node (or group)."""
    stream: str = "{group}/{node}/{device}/{metric}"
    """Stream id of a device's metric."""
    node_stream: str = "{group}/{node}/{metric}"
    """Stream id of an edge node's own metric (no device)."""
    rebirth_every: Duration = 10.0
    """Least time between two rebirth requests to one edge node."""
    clean_session: bool = False
    """Connect with a clean session, as Sparkplug 3.0 requires of host applications
    (tck-id-message-flow-phid-sparkplug-clean-session-311 and -50). Off by default: with a
    clean session the broker keeps nothing while limitwatch is down, so readings sent then are
    lost unless the edge nodes store and forward them (as historical metrics) while our STATE
    says offline."""

    @field_validator("host_id")
    @classmethod
    def _host_id(cls, value: str) -> str:
        if _ID_FORBIDDEN & set(value):
            raise ValueError("a host id is one topic level: no '+', '#', '/' or U+0000")
        return value

    @field_validator("edge_nodes")
    @classmethod
    def _edge_nodes(cls, values: list[str]) -> list[str]:
        for value in values:
            parts = value.split("/")
            bad = [p for p in parts if not p or (p != "+" and _ID_FORBIDDEN & set(p))]
            if len(parts) != 2 or bad:
                raise ValueError(
                    f"{value!r} is not group/node (each one topic level, or + for all)"
                )
        return values

    @field_validator("stream")
    @classmethod
    def _stream(cls, value: str) -> str:
        problem = _template_problem(value, _PLACES)
        if problem is not None:
            raise ValueError(f"this stream template {problem}")
        return value

    @field_validator("node_stream")
    @classmethod
    def _node_stream(cls, value: str) -> str:
        problem = _template_problem(value, ("group", "node", "metric"))
        if problem is not None:
            raise ValueError(f"this stream template {problem}")
        return value

    @property
    def subscriptions(self) -> tuple[tuple[str, int], ...]:
        """``spBv1.0/<group>/+/<node>/#`` at QoS 1 for each entry of ``edge_nodes``."""
        out = []
        for pair in self.edge_nodes:
            group, node = pair.split("/")
            out.append((f"spBv1.0/{group}/+/{node}/#", 1))
        return tuple(dict.fromkeys(out))

    @property
    def state_topic(self) -> str:
        return f"spBv1.0/STATE/{self.host_id}"

    def stream_for(self, group: str, node: str, device: str | None, metric: str) -> str:
        if device is None:
            return self.node_stream.format(group=group, node=node, metric=metric)
        return self.stream.format(group=group, node=node, device=device, metric=metric)

    def describe(self) -> str:
        tls = ", TLS" if self.tls is not None else ""
        return (
            f"{self.name} (sparkplug {self.protocol}{tls}): {self.host}:{self.port} as host "
            f"{self.host_id!r}, edge nodes {', '.join(self.edge_nodes)}"
        )
