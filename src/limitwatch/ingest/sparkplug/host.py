"""What a Sparkplug host application keeps of each edge node, and what one message means.

Pure: a message (topic, payload bytes, receipt time) and the state of its edge node in; readings,
refusals, and whether to ask the node for a rebirth out. No I/O and no clock.

Per edge node (group, node), from its last NBIRTH until its NDEATH:

* **aliases**: NBIRTH and DBIRTH give each metric's name, alias and datatype; NDATA and DDATA
  may carry only the alias, which is resolved through the last birth. An alias the births did not
  give is never guessed: that metric is refused (``unknown-alias``) and a rebirth is requested;
* **seq**: every message of the node after NBIRTH carries the next ``seq``, 0 to 255 and round
  again. A gap means a message was lost on the way: the message in hand is still used (its
  aliases are known), a ``seq-gap`` dead letter says how many are missing, and a rebirth is
  requested so that the host's picture of the node is whole again;
* **bdSeq**: the NBIRTH's ``bdSeq`` metric ties the session to the NDEATH the broker publishes
  for it (the node's last will). An NDEATH whose ``bdSeq`` is not the current birth's is from an
  older session and is ignored (``stale-death``); a death of the current session is a
  ``node-offline`` (``device-offline`` for DDEATH) dead letter, so it is seen and counted;
* data from a node (or device) that has not been born, or that died, is refused
  (``not-born``) and a rebirth is requested.

Metric values: numeric datatypes (Int8 to UInt64, Float, Double) become readings; Int8, Int16
and Int32 arrive as two's complement in a uint32, Int64 in a uint64. A metric is skipped
(counted, no dead letter) when it is transient (``is_transient``), not numeric by datatype
(Boolean, String, DateTime, DataSet, Template ...), or one of Sparkplug's own (``bdSeq``,
``Node Control/...``, ``Properties/...``). A numeric metric marked null is a dead letter
(``null-value``), as is a value of the wrong kind (``not-a-number``) or a NaN or infinity
(``not-finite``). A historical metric (``is_historical``) is a reading at its own time stamp:
in its stream's order it is applied, behind it the pipeline refuses it as ``late``.

The time of a reading is the metric's ``timestamp``, else the payload's, else the receipt time
(all milliseconds since the epoch, UTC).

References
----------
Eclipse Foundation, *Sparkplug 3.0.0 Specification* (2022): section 4.1 (topic namespace),
5.2-5.4 (host applications, edge node session, bdSeq and seq), 6.4.16 (datatypes),
6.4.4 (metric fields: alias, is_historical, is_transient, is_null) and 6.4.9 ("Node
Control/Rebirth").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from google.protobuf.message import DecodeError

from limitwatch.ingest.sparkplug.proto import DATATYPES, Payload

__all__ = [
    "NAMESPACE",
    "Message",
    "MetricReading",
    "NodeState",
    "Outcome",
    "Refusal",
    "SparkplugHost",
    "parse_topic",
]

NAMESPACE = "spBv1.0"

MESSAGE_TYPES = frozenset(
    {"NBIRTH", "NDEATH", "DBIRTH", "DDEATH", "NDATA", "DDATA", "NCMD", "DCMD"}
)

_SIGNED32 = {DATATYPES["Int8"], DATATYPES["Int16"], DATATYPES["Int32"]}
_UNSIGNED32 = {DATATYPES["UInt8"], DATATYPES["UInt16"], DATATYPES["UInt32"]}
_NUMERIC = (
    _SIGNED32
    | _UNSIGNED32
    | {DATATYPES[n] for n in ("Int64", "UInt64", "Float", "Double")}
)
_OWN = ("bdSeq", "Node Control/", "Properties/")


@dataclass(frozen=True, slots=True)
class Message:
    """Where a message came from, read from its topic."""

    group: str
    kind: str
    node: str
    device: str | None


def parse_topic(topic: str) -> Message | None:
    """``spBv1.0/<group>/<type>/<node>[/<device>]``, or None for any other topic.

    >>> parse_topic("spBv1.0/plant-a/DDATA/press-1/pump-2")
    Message(group='plant-a', kind='DDATA', node='press-1', device='pump-2')
    >>> parse_topic("spBv1.0/plant-a/NDATA/press-1/x/y") is None
    True
    """
    parts = topic.split("/")
    if len(parts) not in (4, 5) or parts[0] != NAMESPACE or parts[2] not in MESSAGE_TYPES:
        return None
    if not all(parts[1:]):
        return None
    device = parts[4] if len(parts) == 5 else None
    if (device is None) == parts[2].startswith("D"):
        return None  # node messages have no device level, device messages need one
    return Message(parts[1], parts[2], parts[3], device)


@dataclass(frozen=True, slots=True)
class MetricReading:
    device: str | None
    metric: str
    time: float
    value: float
    historical: bool


@dataclass(frozen=True, slots=True)
class Refusal:
    reason: str
    detail: str


@dataclass
class Outcome:
    """What one message gave: readings, refusals, skipped metrics, and whether to ask for a
    rebirth; ``event`` names a birth or death for the log and ``/health``."""

    readings: list[MetricReading] = field(default_factory=list)
    refusals: list[Refusal] = field(default_factory=list)
    skipped: int = 0
    rebirth: bool = False
    event: str | None = None
    offline: list[tuple[str | None, str]] = field(default_factory=list)
    """(device or None, metric name) of each numeric metric a death took offline."""
    offline_words: str = ""
    """Who reported offline, for the stale incidents of those metrics' streams."""


@dataclass
class NodeState:
    """One edge node's session as the host knows it."""

    born: bool = False
    bd_seq: int | None = None
    seq: int | None = None
    aliases: dict[int, tuple[str | None, str, int]] = field(default_factory=dict)
    """Alias -> (device or None, metric name, datatype), from the births."""
    names: dict[tuple[str | None, str], int] = field(default_factory=dict)
    """(device, metric name) -> datatype, for data that names metrics instead of aliasing."""
    devices: set[str] = field(default_factory=set)
    """Devices born and not dead."""

    def snapshot(self) -> dict[str, Any]:
        """Plain data to keep across restarts (aliases outlive the service's process: a
        message redelivered after a crash is read with the birth that came before it)."""
        return {
            "born": self.born,
            "bd_seq": self.bd_seq,
            "aliases": [[a, d, n, t] for a, (d, n, t) in self.aliases.items()],
            "names": [[d, n, t] for (d, n), t in self.names.items()],
            "devices": sorted(self.devices),
        }

    @classmethod
    def from_snapshot(cls, data: dict[str, Any]) -> NodeState:
        return cls(
            born=bool(data["born"]),
            bd_seq=data["bd_seq"],
            seq=None,  # resynchronised by the next message
            aliases={int(a): (d, n, int(t)) for a, d, n, t in data["aliases"]},
            names={(d, n): int(t) for d, n, t in data["names"]},
            devices=set(data["devices"]),
        )


class SparkplugHost:
    """The host application's view of every edge node it hears from."""

    def __init__(self, nodes: dict[tuple[str, str], NodeState] | None = None) -> None:
        self.nodes: dict[tuple[str, str], NodeState] = nodes or {}

    def handle(self, message: Message, payload: bytes, received_at: float) -> Outcome:
        """The meaning of one message; raises only :class:`DecodeError` for a payload that is
        not a Sparkplug B protobuf (the caller makes it a dead letter)."""
        decoded = _decode(payload)
        key = (message.group, message.node)
        node = self.nodes.setdefault(key, NodeState())
        out = Outcome()
        kind = message.kind
        if kind in ("NCMD", "DCMD"):
            return out  # commands to the node (ours among them); nothing to read
        if kind == "NBIRTH":
            self._birth_node(node, decoded, out)
        elif kind == "NDEATH":
            self._death_node(message, node, decoded, out)
            return out
        else:
            if not node.born:
                out.rebirth = True
                out.refusals.append(
                    Refusal(
                        "not-born",
                        f"{kind} from edge node {_name(message)} before its NBIRTH; a rebirth "
                        "is requested",
                    )
                )
                return out
            self._check_seq(message, node, decoded, out)
            if kind == "DBIRTH":
                assert message.device is not None
                node.devices.add(message.device)
                self._learn(node, message.device, decoded)
                out.event = f"device {_name(message)} born"
            elif kind == "DDEATH":
                assert message.device is not None
                if message.device in node.devices:
                    node.devices.discard(message.device)
                    out.offline = _numeric_metrics(node, {message.device})
                    out.offline_words = f"the device {_name(message)} reported offline (DDEATH)"
                    out.refusals.append(
                        Refusal(
                            "device-offline",
                            f"device {_name(message)} reported offline (DDEATH); its streams "
                            "get no readings until its next DBIRTH",
                        )
                    )
                out.event = f"device {_name(message)} reported offline (DDEATH)"
                return out
            elif kind == "DDATA" and message.device not in node.devices:
                out.rebirth = True
                out.refusals.append(
                    Refusal(
                        "not-born",
                        f"DDATA from device {_name(message)} before its DBIRTH (or after its "
                        "DDEATH); a rebirth is requested",
                    )
                )
                return out
        self._read(message, node, decoded, received_at, out)
        return out

    # -- births, deaths, seq

    def _birth_node(self, node: NodeState, decoded: Any, out: Outcome) -> None:
        node.born = True
        node.aliases.clear()
        node.names.clear()
        node.devices.clear()
        node.seq = decoded.seq if decoded.HasField("seq") else None
        node.bd_seq = _bd_seq(decoded)
        self._learn(node, None, decoded)
        out.event = f"edge node born (bdSeq {node.bd_seq})"

    def _death_node(self, message: Message, node: NodeState, decoded: Any, out: Outcome) -> None:
        bd_seq = _bd_seq(decoded)
        if node.born and bd_seq is not None and node.bd_seq is not None and bd_seq != node.bd_seq:
            out.refusals.append(
                Refusal(
                    "stale-death",
                    f"NDEATH of edge node {_name(message)} with bdSeq {bd_seq}, but the current "
                    f"birth has bdSeq {node.bd_seq}: it ends an older session and is ignored",
                )
            )
            return
        was_born = node.born
        node.born = False
        node.devices.clear()
        node.seq = None
        out.event = "edge node reported offline (NDEATH)"
        if was_born:
            out.offline = _numeric_metrics(node, None)
            out.offline_words = f"the edge node {_name(message)} reported offline (NDEATH)"
            out.refusals.append(
                Refusal(
                    "node-offline",
                    f"edge node {_name(message)} reported offline (NDEATH, bdSeq {bd_seq}); its "
                    "streams get no readings until its next NBIRTH",
                )
            )

    def _check_seq(self, message: Message, node: NodeState, decoded: Any, out: Outcome) -> None:
        if not decoded.HasField("seq"):
            out.refusals.append(
                Refusal("bad-seq", f"{message.kind} from {_name(message)} has no seq")
            )
            return
        seq = decoded.seq
        if seq > 255:
            out.refusals.append(
                Refusal("bad-seq", f"{message.kind} from {_name(message)} has seq {seq} > 255")
            )
            out.rebirth = True
            return
        last = node.seq
        node.seq = seq
        if last is None:
            return  # the first message heard since a restart: take it as the count
        expected = (last + 1) % 256
        if seq != expected:
            missing = (seq - expected) % 256
            out.rebirth = True
            out.refusals.append(
                Refusal(
                    "seq-gap",
                    f"{message.kind} from {_name(message)} has seq {seq} where {expected} was "
                    f"due: {missing} message(s) lost or reordered on the way; a rebirth is "
                    "requested",
                )
            )

    def _learn(self, node: NodeState, device: str | None, decoded: Any) -> None:
        for metric in decoded.metrics:
            if not metric.HasField("name"):
                continue
            datatype = metric.datatype
            node.names[(device, metric.name)] = datatype
            if metric.HasField("alias"):
                node.aliases[metric.alias] = (device, metric.name, datatype)

    # -- metrics

    def _read(
        self, message: Message, node: NodeState, decoded: Any, received_at: float, out: Outcome
    ) -> None:
        sent = decoded.timestamp / 1000.0 if decoded.HasField("timestamp") else received_at
        for metric in decoded.metrics:
            if metric.HasField("name"):
                name = metric.name
                datatype = node.names.get((message.device, name), metric.datatype)
            elif metric.HasField("alias"):
                known = node.aliases.get(metric.alias)
                if known is None or known[0] != message.device:
                    out.rebirth = True
                    out.refusals.append(
                        Refusal(
                            "unknown-alias",
                            f"metric alias {metric.alias} in {message.kind} from "
                            f"{_name(message)} was not given by its birth; a rebirth is "
                            "requested",
                        )
                    )
                    continue
                _, name, datatype = known
            else:
                out.refusals.append(
                    Refusal(
                        "missing-field",
                        f"a metric in {message.kind} from {_name(message)} has neither name "
                        "nor alias",
                    )
                )
                continue
            if metric.is_transient or name.startswith(_OWN) or datatype not in _NUMERIC:
                out.skipped += 1
                continue
            where = f"metric {name!r} of {_name(message)}"
            if metric.is_null:
                out.refusals.append(Refusal("null-value", f"{where} is null"))
                continue
            value = _number(metric, datatype)
            if value is None:
                kind = metric.WhichOneof("value") or "no value"
                out.refusals.append(
                    Refusal("not-a-number", f"{where} is {kind}, not a number of its datatype")
                )
                continue
            if not math.isfinite(value):
                out.refusals.append(Refusal("not-finite", f"{where} is {value}"))
                continue
            moment = metric.timestamp / 1000.0 if metric.HasField("timestamp") else sent
            out.readings.append(
                MetricReading(message.device, name, moment, value, metric.is_historical)
            )


def _numeric_metrics(
    node: NodeState, devices: set[str] | None
) -> list[tuple[str | None, str]]:
    """The metrics the births gave as numbers (those that become readings), of ``devices``
    only, or of the node and every device when None."""
    return sorted(
        ((device, name) for (device, name), datatype in node.names.items()
         if datatype in _NUMERIC and not name.startswith(_OWN)
         and (devices is None or device in devices)),
        key=lambda pair: (pair[0] or "", pair[1]),
    )


def _decode(payload: bytes) -> Any:
    try:
        return Payload.FromString(payload)
    except DecodeError:
        raise
    except (RecursionError, ValueError, TypeError) as exc:  # nesting too deep, bad UTF-8 ...
        raise DecodeError(f"{type(exc).__name__}: {exc}") from None


def _bd_seq(decoded: Any) -> int | None:
    for metric in decoded.metrics:
        if metric.name == "bdSeq":
            which = metric.WhichOneof("value")
            if which in ("long_value", "int_value"):
                return int(getattr(metric, which))
    return None


def _number(metric: Any, datatype: int) -> float | None:
    which = metric.WhichOneof("value")
    if datatype in _SIGNED32 and which == "int_value":
        raw = metric.int_value
        return float(raw - (1 << 32) if raw >= 1 << 31 else raw)
    if datatype in _UNSIGNED32 and which == "int_value":
        return float(metric.int_value)
    if datatype == DATATYPES["Int64"] and which == "long_value":
        raw = metric.long_value
        return float(raw - (1 << 64) if raw >= 1 << 63 else raw)
    if datatype == DATATYPES["UInt64"] and which == "long_value":
        return float(metric.long_value)
    if datatype == DATATYPES["Float"] and which == "float_value":
        return float(metric.float_value)
    if datatype == DATATYPES["Double"] and which == "double_value":
        return float(metric.double_value)
    return None


def _name(message: Message) -> str:
    base = f"{message.group}/{message.node}"
    return base if message.device is None else f"{base}/{message.device}"
