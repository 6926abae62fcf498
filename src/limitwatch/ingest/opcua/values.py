"""What one OPC UA data change means: a reading, or the reason it is not one. Pure.

The client thread (:mod:`.connection`) turns each data change notification into a
:class:`Change` of plain Python values; :func:`read_change` decides, on the worker's thread:

* **status** (IEC 62541-4, the StatusCode type: the two highest bits of a status code are
  its severity, ``00`` Good, ``01`` Uncertain, ``10`` Bad, ``11`` reserved and read as Bad):
  a Bad value is refused as ``bad-status`` with the status's name in the detail; an
  Uncertain one is a reading or an ``uncertain-status`` refusal, as the source's
  ``uncertain`` key says. The low bits (info bits such as "overflow") do not change the
  severity;
* **value**: an integer or floating-point number becomes the reading's value; a Boolean is
  refused (``not-a-number``): it is a state (a pump on or off), and an individuals chart of
  zeros and ones says nothing a state change alarm would not say better; text, byte strings,
  arrays, structures and empty values (``null-value``) are refused with what they were;
  NaN and infinities (and integers too large for a float) are ``not-finite``;
* **time**: the value's source timestamp (when the device or the server sampled it); when the
  server sent none, its server timestamp; when neither came, the receipt time. Which one was
  used is counted for ``/health`` (``Change.clock``). A time outside 1970..9999 is
  ``bad-time``, one later than the receipt time plus ``future_tolerance`` is
  ``in-the-future`` (a server clock set wrong).

>>> change = Change("hall", 0, "press-1/oil-temp", "ns=2;s=Press1.OilTemp", 41.5, "Double",
...                 0, "Good", 1767225600.0, 1767225600.2, 1767225601.0)
>>> read_change(change, uncertain="refuse", future_tolerance=300.0).reading
Reading(stream='press-1/oil-temp', time=1767225600.0, value=41.5, seq=None)
>>> bad = change._replace(status=0x808C0000, status_name="BadSensorFailure")
>>> found = read_change(bad, uncertain="refuse", future_tolerance=300.0)
>>> found.error
'bad-status'
>>> found.detail  # doctest: +ELLIPSIS
'ns=2;s=Press1.OilTemp (press-1/oil-temp): status BadSensorFailure (0x808C0000) at 2026-...'

References
----------
IEC 62541-4 (OPC UA part 4, services): the StatusCode type (its two severity bits) and the
DataValue type (SourceTimestamp, ServerTimestamp; a server may leave the source time stamp
out); IEC 62541-6 (part 6, mappings) for the built-in types whose values arrive here. Section
numbers are left out: they moved between editions.
"""

from __future__ import annotations

import math
from typing import Any, Literal, NamedTuple

from limitwatch.ingest.base import Parsed
from limitwatch.ingest.payload import LATEST_TIME
from limitwatch.ingest.timeparse import format_time
from limitwatch.model import Reading

__all__ = ["Change", "raw_text", "read_change", "severity"]

SEVERITIES = ("good", "uncertain", "bad", "bad")


class Change(NamedTuple):
    """One data change notification as plain values, put on the intake by the client thread."""

    source: str
    item: int
    """Which of the source's ``items`` it is (its index)."""
    stream: str
    node: str
    """The item as configured (node id or browse path), for people."""
    value: Any
    variant: str
    """The OPC UA built-in type the value came as (``Double``, ``Boolean``, ``Null`` ...)."""
    status: int
    status_name: str
    source_time: float | None
    server_time: float | None
    received_at: float

    @property
    def raw(self) -> bytes:
        return raw_text(self).encode("utf-8", "backslashreplace")


def raw_text(change: Change) -> str:
    """What a dead letter keeps: node, status, type and value (shortened)."""
    value = repr(change.value)
    if len(value) > 300:
        value = value[:300] + "..."
    return f"{change.node}\n{change.status_name} 0x{change.status:08X}\n{change.variant}: {value}"


def severity(status: int) -> Literal["good", "uncertain", "bad"]:
    """The severity of a status code (IEC 62541-4, the StatusCode type).

    >>> severity(0), severity(0x40000000), severity(0x80340000), severity(0xC0000000)
    ('good', 'uncertain', 'bad', 'bad')
    """
    return SEVERITIES[(status >> 30) & 3]  # type: ignore[return-value]


def _number(change: Change) -> tuple[float | None, str, str]:
    """The value as a float, or None with a reason code and words."""
    value = change.value
    if value is None:
        return None, "null-value", "has no value (Null)"
    if isinstance(value, bool):
        return (
            None,
            "not-a-number",
            f"is a Boolean ({str(value).lower()}): a state, not a measurement",
        )
    if isinstance(value, int):
        try:
            number = float(value)
        except OverflowError:
            return None, "not-finite", f"is the integer {str(value)[:40]}, too large for a float"
        return number, "", ""
    if isinstance(value, float):
        if not math.isfinite(value):
            return None, "not-finite", f"is {value}"
        return value, "", ""
    if isinstance(value, (list, tuple)):
        return None, "not-a-number", f"is an array of {len(value)} value(s) ({change.variant})"
    shown = repr(value)
    if len(shown) > 60:
        shown = shown[:60] + "..."
    return None, "not-a-number", f"is {change.variant} {shown}, not a number"


def _time(change: Change) -> float:
    if change.source_time is not None:
        return change.source_time
    if change.server_time is not None:
        return change.server_time
    return change.received_at


def clock_used(change: Change) -> Literal["source", "server", "receipt"]:
    """Which clock gives the reading its time."""
    if change.source_time is not None:
        return "source"
    return "server" if change.server_time is not None else "receipt"


def read_change(
    change: Change,
    *,
    uncertain: Literal["accept", "refuse"],
    future_tolerance: float | None,
    received_at: float | None = None,
) -> Parsed:
    """The reading in ``change``, or a refusal saying why (never raises for any values)."""
    where = f"{change.node} ({change.stream})"
    raw = change.raw
    received = change.received_at if received_at is None else received_at
    moment = _time(change)
    level = severity(change.status)
    status = f"status {change.status_name} (0x{change.status:08X})"
    if level == "bad" or (level == "uncertain" and uncertain == "refuse"):
        when = format_time(moment) if 0.0 <= moment < LATEST_TIME else f"{moment!r}"
        reason = "bad-status" if level == "bad" else "uncertain-status"
        return Parsed(change.source, raw, error=reason, detail=f"{where}: {status} at {when}")
    number, reason, words = _number(change)
    if number is None:
        return Parsed(change.source, raw, error=reason, detail=f"{where} {words}")
    if not (0.0 <= moment < LATEST_TIME):
        return Parsed(
            change.source,
            raw,
            error="bad-time",
            detail=f"{where}: time {moment!r} s lies outside the years 1970 to 9999",
        )
    if future_tolerance is not None and moment > received + future_tolerance:
        return Parsed(
            change.source,
            raw,
            error="in-the-future",
            detail=(
                f"{where}: {clock_used(change)} time {format_time(moment)} is "
                f"{moment - received:.0f} s after the receive time {format_time(received)}, "
                f"more than future_tolerance ({future_tolerance:g} s); check the server's or "
                "the device's clock"
            ),
        )
    return Parsed(change.source, raw, reading=Reading(change.stream, moment, number))
