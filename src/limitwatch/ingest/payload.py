"""MQTT messages to readings: the topic gives the stream, the payload the value (and time and
sequence number), or a reason why not (the reason codes are in :mod:`limitwatch.ingest.reasons`).

The plain ``number`` payload is the whole message as a decimal text; a ``json`` payload is read
by the field paths of :mod:`limitwatch.ingest.fields`. This module also re-exports the names of
the modules it was split into (reasons, numbers, time fields, fields, file rows), so callers may
import every parsing name from here.

>>> from types import SimpleNamespace as NS
>>> topic = NS(filter="gw/+/+", stream="{2}/{3}", payload="json", value="data.temp",
...            time="ts", time_format="auto", seq="n")
>>> parser = PayloadParser(topic)
>>> parser.parse("gw/comp-a/discharge-temp", b'{"data": {"temp": 86.2}, "ts": 1798761600, "n": 7}',
...              received_at=1798761601.0)
Reading(stream='comp-a/discharge-temp', time=1798761600.0, value=86.2, seq=7)
>>> try:
...     parser.parse("gw/comp-a/discharge-temp", b'{"data": {}}', received_at=0.0)
... except PayloadError as exc:
...     print(exc.reason_code)
missing-field

References
----------
OASIS, *MQTT Version 3.1.1* (2014), section 3.3.3: a PUBLISH payload is application bytes with
no format of its own, hence the explicit ``payload`` setting. IETF RFC 8259 (2017), *The
JavaScript Object Notation (JSON) Data Interchange Format*, section 6: NaN and Infinity are
not JSON numbers (Python's ``json`` reads them anyway; they are refused here as not finite).
"""

from __future__ import annotations

import json
import re
from typing import Any, Literal, Protocol

import orjson

from limitwatch.ingest.fields import Fields, field_path, lookup
from limitwatch.ingest.numbers import MAX_SEQ, parse_decimal, parse_seq, parse_value
from limitwatch.ingest.reasons import REASONS, PayloadError, show
from limitwatch.ingest.rows import FileSourceLike, RowParser
from limitwatch.ingest.streamid import stream_id_problem
from limitwatch.ingest.timefield import (
    EARLIEST_HISTORY,
    LATEST_TIME,
    TimeFormat,
    parse_time_field,
)
from limitwatch.ingest.topics import TopicMapper
from limitwatch.model import Reading

__all__ = [
    "EARLIEST_HISTORY",
    "LATEST_TIME",
    "MAX_SEQ",
    "REASONS",
    "FileSourceLike",
    "PayloadError",
    "PayloadParser",
    "RowParser",
    "SourceParser",
    "TimeFormat",
    "TopicLike",
    "field_path",
    "lookup",
    "parse_seq",
    "parse_time_field",
    "parse_value",
    "read_json",
]


class TopicLike(Protocol):
    """What a parser needs from an ``[[sources.topics]]`` entry (see :mod:`limitwatch.config`)."""

    filter: str
    stream: str
    payload: Literal["number", "json"]
    value: str
    time: str | None
    time_format: TimeFormat
    seq: str | None


class PayloadParser:
    """Parses messages for one ``[[sources.topics]]`` entry.

    ``max_payload_bytes`` is the source's limit (None: no limit). The plain ``number`` payload
    is the whole message as a decimal text (surrounding white space allowed), timed at receipt.
    """

    __slots__ = ("_fields", "json", "mapper", "max_payload_bytes")

    def __init__(
        self,
        topic: TopicLike,
        *,
        max_payload_bytes: int | None = None,
        future_tolerance: float | None = None,
    ) -> None:
        self.mapper = TopicMapper(topic.filter, topic.stream)
        self.json = topic.payload == "json"
        self.max_payload_bytes = max_payload_bytes
        self._fields = (
            Fields(topic.value, topic.time, topic.time_format, topic.seq, False, future_tolerance)
            if self.json
            else None
        )

    def matches(self, topic: str) -> bool:
        """True when the topic matches this entry's filter (its stream may still be unmapped:
        an empty ``{#}``)."""
        return self.mapper.matches(topic)

    def stream_for(self, topic: str) -> str | None:
        return self.mapper.stream_for(topic)

    def parse(self, topic: str, payload: bytes, received_at: float) -> Reading:
        """The reading in ``payload``, or :class:`PayloadError` saying why there is none."""
        _check_size(payload, self.max_payload_bytes)
        stream = self.mapper.stream_for(topic)
        if stream is None:
            raise PayloadError(
                "unmapped-topic",
                f"topic {show(topic)} does not give a stream through filter "
                f"{self.mapper.filter!r} and template {self.mapper.template!r}",
            )
        _check_stream(stream, f"topic {show(topic)}")
        return self._parse(stream, payload, received_at)

    def _parse(self, stream: str, payload: bytes, received_at: float) -> Reading:
        if self._fields is None:
            try:
                text = _utf8(payload)
            except UnicodeDecodeError:
                raise PayloadError(
                    "not-a-number", f"payload {show(payload)} is not UTF-8 text"
                ) from None
            return Reading(stream, received_at, parse_decimal(text, "payload"))
        moment, value, seq = self._fields.read(read_json(payload), received_at)
        return Reading(stream, moment, value, seq)


def read_json(payload: bytes) -> Any:
    """The JSON document in ``payload`` (UTF-8, a leading byte-order mark allowed), exactly as
    the standard library's decoder reads it, or :class:`PayloadError` (``bad-json``).

    Why two decoders: orjson reads a small payload in about a tenth of the time, but it differs
    from the standard library at the edges, and what a payload becomes must not depend on which
    one read it. orjson refuses NaN, Infinity, numbers past a double's range and lone surrogate
    escapes, which the standard library reads (NaN is then refused by name, as ``not-finite``);
    it reads integers past 64 bits as floats, where the standard library keeps them whole (a
    ``bad-seq`` message quotes them); and it nests 1,024 levels deep, past the interpreter's
    recursion limit. So orjson reads only payloads without those edges -- no run of 19 digits,
    fewer than :data:`FAST_NESTING_MAX` brackets -- and whatever it refuses is read again by the
    standard library, whose result or error stands.

    >>> read_json(b'{"v": 1.5, "n": 7}')
    {'v': 1.5, 'n': 7}
    >>> read_json(b'{"v": NaN}')
    {'v': nan}
    """
    if (
        payload.count(b"[") + payload.count(b"{") < FAST_NESTING_MAX
        and _LONG_DIGITS.search(payload) is None
    ):
        try:
            return orjson.loads(payload)
        except orjson.JSONDecodeError:
            pass  # the standard library's result or error stands
    try:
        return _JSON.decode(_utf8(payload))
    except (UnicodeDecodeError, ValueError) as exc:
        # ValueError also covers a number past the interpreter's 4,300-digit limit
        raise PayloadError("bad-json", f"payload is not UTF-8 JSON: {exc}") from None
    except RecursionError:
        raise PayloadError(
            "bad-json", "payload nests arrays or objects too deeply to be read"
        ) from None


FAST_NESTING_MAX = 200
"""Payloads with this many ``[`` and ``{`` bytes or more are read by the standard library: they
may nest deeper than it can (its limit is the interpreter's recursion limit, less the depth of
the caller), and orjson, which nests 1,024 deep, would read what it refuses."""

_LONG_DIGITS = re.compile(rb"\d{19}")
"""A run of 19 digits: an integer that may lie past 64 bits, which orjson reads as a float."""

_JSON = json.JSONDecoder(parse_constant=float)
"""The standard library's decoder: ``json.loads`` with an option builds a new one each call.
NaN and Infinity become floats here so that the value check can refuse them by name."""

_BOM = b"\xef\xbb\xbf"


def _utf8(payload: bytes) -> str:
    """UTF-8 text with a leading byte-order mark dropped; the same as the ``utf-8-sig`` codec,
    whose decoder runs in Python, by way of the one written in C."""
    return (payload[3:] if payload.startswith(_BOM) else payload).decode("utf-8")


def _check_stream(stream: str, where: str) -> None:
    problem = stream_id_problem(stream)
    if problem is not None:
        raise PayloadError("bad-stream", f"the stream id from {where} {problem}")


def _check_size(payload: bytes, limit: int | None) -> None:
    if limit is not None and len(payload) > limit:
        raise PayloadError(
            "oversize", f"payload of {len(payload)} bytes is over the limit of {limit} bytes"
        )


class SourceParser:
    """Every topic entry of one MQTT source; the first entry whose filter matches parses.

    >>> from types import SimpleNamespace as NS
    >>> entry = dict(payload="number", value="value", time=None, time_format="auto", seq=None)
    >>> source = NS(max_payload_bytes=64, topics=[
    ...     NS(filter="gw/oven-1/energy", stream="oven-1/energy", **entry),
    ...     NS(filter="gw/+/+", stream="{2}/{3}", **entry)])
    >>> SourceParser(source).parse("gw/oven-1/energy", b"412.5", 10.0).stream
    'oven-1/energy'
    """

    __slots__ = ("_refused", "_routes", "max_payload_bytes", "parsers")

    ROUTES_KEPT = 1 << 17
    """Most topics whose parser and stream are remembered; past it the memory starts afresh.
    A site's topics are its streams, so this covers 130,000 of them."""

    def __init__(self, source: Any, *, future_tolerance: float | None = None) -> None:
        self.max_payload_bytes: int | None = source.max_payload_bytes
        self.parsers = tuple(
            PayloadParser(t, future_tolerance=future_tolerance) for t in source.topics
        )
        self._routes: dict[str, tuple[PayloadParser, str] | None] = {}
        self._refused: dict[str, str] = {}
        """Topics among ``_routes`` whose stream id is refused, with the reason."""
        """Topic -> (the entry that parses it, its stream), or None when no entry maps it.
        Every message on a topic maps the same way, and matching filters and filling in the
        template is work done again for each reading otherwise."""

    def route(self, topic: str) -> tuple[PayloadParser, str] | None:
        """The first entry whose filter gives ``topic`` a stream, and that stream."""
        try:
            return self._routes[topic]
        except KeyError:
            pass
        found = None
        for parser in self.parsers:
            stream = parser.stream_for(topic)
            if stream is not None:
                found = (parser, stream)
                break
        if len(self._routes) >= self.ROUTES_KEPT:
            self._routes.clear()
            self._refused.clear()
        self._routes[topic] = found
        if found is not None:
            problem = stream_id_problem(found[1])
            if problem is not None:
                self._refused[topic] = problem
        return found

    def parse(self, topic: str, payload: bytes, received_at: float) -> Reading:
        _check_size(payload, self.max_payload_bytes)
        found = self.route(topic)
        if found is None:
            raise PayloadError(
                "unmapped-topic",
                f"topic {show(topic)} matches none of the filters "
                + ", ".join(repr(p.mapper.filter) for p in self.parsers),
            )
        parser, stream = found
        if self._refused and topic in self._refused:
            raise PayloadError(
                "bad-stream", f"the stream id from topic {show(topic)} {self._refused[topic]}"
            )
        return parser._parse(stream, payload, received_at)
