"""From a message or a file row to a :class:`~limitwatch.model.Reading`, or a reason why not.

Nothing that arrives from outside may stop the service. Every way a message can be unusable
raises :class:`PayloadError` with a short, stable ``reason_code`` (the dead-letter reason, good
for counting and alerting) and a message a person can act on:

==================  =======================================================================
``oversize``        the payload is larger than the source's ``max_payload_bytes``
``unmapped-topic``  no topic entry of the source matches the topic, or its template is empty
``bad-json``        the payload is not UTF-8 JSON
``missing-field``   a configured field (value, time, seq, stream) is absent, null or blank
``not-a-number``    the value is not a decimal number
``not-finite``      the value is NaN or infinite (or too large for a float)
``bad-time``        the time stamp does not fit ``time_format`` or lies outside 1970..9999
``in-the-future``   the time stamp is later than the receive time plus ``future_tolerance``
``bad-seq``         the sequence number is not a whole number from 0 to 2**63 - 1
``bad-stream``      the stream id is not usable: a file row names it with something other than
                    text or a whole number, or the id (from a topic, a row or ``stream_fixed``)
                    is too long, holds a control character or is not UTF-8 text (see
                    :mod:`limitwatch.ingest.streamid`)
==================  =======================================================================

Field paths (``value``, ``time``, ``seq`` and a file's ``stream``) are dotted: ``data.temp``
reads ``{"data": {"temp": 71.5}}``; a part that is a whole number indexes a list
(``readings.0.v``). Keys that contain dots cannot be reached; CSV columns are looked up by their
exact header instead, dots and all.

Time stamps (``time_format``): ``epoch_s`` and ``epoch_ms`` want a number (or a text holding
one), ``iso8601`` wants text such as ``2027-01-01T06:00:00Z`` (no offset means UTC, see
:mod:`limitwatch.ingest.timeparse`), ``auto`` reads a number as epoch seconds and text as ISO
8601. Without a configured time field the receive time is used. With ``future_tolerance`` (the
service passes ``[service] future_tolerance``), a time stamp later than the receive time by more
than that is refused: one reading dated years ahead would otherwise make every real reading of
its stream look out of order, and its silence never look stale.

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
ISO 8601-1:2019 for the time stamps, as read by :mod:`limitwatch.ingest.timeparse`.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping, Sequence
from typing import Any, Literal, Protocol

from limitwatch.ingest.streamid import stream_id_problem
from limitwatch.ingest.timeparse import (
    PLAIN_DECIMAL,
    TimeFormatError,
    format_time,
    parse_time,
)
from limitwatch.ingest.topics import TopicMapper
from limitwatch.model import Reading

__all__ = [
    "REASONS",
    "FileSourceLike",
    "PayloadError",
    "PayloadParser",
    "RowParser",
    "SourceParser",
    "TopicLike",
    "field_path",
    "lookup",
]

REASONS: tuple[str, ...] = (
    "oversize",
    "unmapped-topic",
    "bad-json",
    "missing-field",
    "not-a-number",
    "not-finite",
    "bad-time",
    "in-the-future",
    "bad-seq",
    "bad-stream",
)
"""Every ``PayloadError.reason_code``, in the order the checks run."""

TimeFormat = Literal["epoch_s", "epoch_ms", "iso8601", "auto"]

LATEST_TIME = 253402300800.0
"""Epoch seconds of 10000-01-01T00:00:00Z; later times (and times before 1970) are refused."""

MAX_SEQ = 2**63 - 1
"""Largest sequence number SQLite stores as an INTEGER."""

_NON_FINITE = re.compile(r"[+-]?(?:nan|inf|infinity)", re.IGNORECASE)
_DIGITS = re.compile(r"\+?0*(\d{1,19})")
"""A whole number in text; the group holds its significant digits (at most 19: ``MAX_SEQ`` has
19, and ``int()`` of a longer text is work for nothing, refused past 4,300 digits besides)."""


class PayloadError(ValueError):
    """Input that cannot become a reading; it goes to the dead letters with ``reason_code``."""

    def __init__(self, reason_code: str, message: str) -> None:
        super().__init__(f"{reason_code}: {message}")
        self.reason_code = reason_code
        self.message = message

    @property
    def reason(self) -> str:
        """Same as ``reason_code`` (the dead-letter reason)."""
        return self.reason_code


class TopicLike(Protocol):
    """What a parser needs from an ``[[sources.topics]]`` entry (see :mod:`limitwatch.config`)."""

    filter: str
    stream: str
    payload: Literal["number", "json"]
    value: str
    time: str | None
    time_format: TimeFormat
    seq: str | None


class FileSourceLike(Protocol):
    """What :class:`RowParser` needs from a ``type = "file"`` source (read only: the config's
    models are frozen)."""

    @property
    def format(self) -> Literal["csv", "jsonl"]: ...
    @property
    def value(self) -> str: ...
    @property
    def time(self) -> str: ...
    @property
    def time_format(self) -> TimeFormat: ...
    @property
    def seq(self) -> str | None: ...
    @property
    def stream(self) -> str | None: ...
    @property
    def stream_fixed(self) -> str | None: ...


# --------------------------------------------------------------------------- field paths


def field_path(text: str) -> tuple[str | int, ...]:
    """Split a dotted path; whole-number parts become list indexes.

    >>> field_path("readings.0.v")
    ('readings', 0, 'v')
    """
    if not isinstance(text, str) or not text.strip():
        raise ValueError("a field path must not be empty; write e.g. value or data.temp")
    parts = text.split(".")
    if any(not p.strip() for p in parts):
        raise ValueError(f"field path {text!r} has an empty part; write e.g. data.temp")
    return tuple(int(p) if p.isdigit() else p for p in parts)


_MISSING = object()


def lookup(obj: Any, path: Sequence[str | int]) -> Any:
    """The value at ``path`` in nested dicts and lists, or a sentinel when it is absent.

    An int part indexes a list, and is also tried as a text key of a dict (``{"0": ...}``).
    """
    for part in path:
        if isinstance(obj, Mapping):
            obj = obj.get(part if isinstance(part, str) else str(part), _MISSING)
        elif isinstance(obj, list) and isinstance(part, int):
            obj = obj[part] if part < len(obj) else _MISSING
        else:
            return _MISSING
        if obj is _MISSING:
            return _MISSING
    return obj


# --------------------------------------------------------------------------- field readers


def _decimal(raw: str, what: str) -> float:
    text = raw.strip()
    if PLAIN_DECIMAL.fullmatch(text):
        number = float(text)
        if not math.isfinite(number):
            raise PayloadError("not-finite", f"{what} {_show(raw)} is too large for a number")
        return number
    if _NON_FINITE.fullmatch(text):
        raise PayloadError("not-finite", f"{what} {_show(raw)} is not a finite number")
    if not text:
        raise PayloadError("not-a-number", f"{what} is empty")
    raise PayloadError("not-a-number", f"{what} {_show(raw)} is not a decimal number")


def _show(value: Any, limit: int = 60) -> str:
    try:
        text = repr(value)
    except (RecursionError, ValueError):  # nested past the interpreter's limit; a huge int
        return f"<a {type(value).__name__} too large to show>"
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _value(raw: Any, what: str) -> float:
    if isinstance(raw, bool) or raw is None or isinstance(raw, dict | list):
        raise PayloadError("not-a-number", f"{what} {_show(raw)} is not a number")
    if isinstance(raw, int):
        try:
            number = float(raw)
        except OverflowError:
            raise PayloadError("not-finite", f"{what} {_show(raw)} is too large") from None
    elif isinstance(raw, float):
        number = raw
    elif isinstance(raw, str):
        return _decimal(raw, what)
    else:
        raise PayloadError("not-a-number", f"{what} {_show(raw)} is not a number")
    if not math.isfinite(number):
        raise PayloadError("not-finite", f"{what} {_show(raw)} is not a finite number")
    return number


EARLIEST_HISTORY = -62_135_596_800.0
"""Epoch seconds of 0001-01-01T00:00:00Z: the earliest time the offline commands take from a
recorded file (the Nile's flows start in 1871); live readings start at 1970."""


def _time(raw: Any, fmt: TimeFormat, what: str, earliest: float = 0.0) -> float:
    if isinstance(raw, bool) or raw is None or isinstance(raw, dict | list):
        raise PayloadError("bad-time", f"{what} {_show(raw)} is not a time stamp")
    is_number = isinstance(raw, int | float) or (
        isinstance(raw, str) and PLAIN_DECIMAL.fullmatch(raw.strip()) is not None
    )
    try:
        if fmt == "iso8601":
            if is_number:
                raise PayloadError(
                    "bad-time",
                    f"{what} {_show(raw)} is a number, but time_format is iso8601; "
                    "use epoch_s, epoch_ms or auto",
                )
            seconds = parse_time(str(raw))
        elif fmt in ("epoch_s", "epoch_ms"):
            if not is_number:
                raise PayloadError(
                    "bad-time", f"{what} {_show(raw)} is not a number of epoch {fmt[6:]}"
                )
            seconds = parse_time(raw, unit="ms" if fmt == "epoch_ms" else "s")
        else:
            seconds = parse_time(raw)
    except (TimeFormatError, OverflowError) as exc:
        raise PayloadError("bad-time", f"{what}: {exc}") from None
    if not earliest <= seconds < LATEST_TIME:
        hint = (
            "; it looks like milliseconds: set time_format = 'epoch_ms'"
            if fmt != "epoch_ms" and LATEST_TIME <= seconds < LATEST_TIME * 1000.0
            else ""
        )
        first = "1970" if earliest >= 0.0 else "1"
        raise PayloadError(
            "bad-time", f"{what} {_show(raw)} lies outside the years {first} to 9999{hint}"
        )
    return seconds


def _seq(raw: Any, what: str) -> int:
    number: int | None = None
    if isinstance(raw, bool) or raw is None:
        number = None
    elif isinstance(raw, int):
        number = raw
    elif isinstance(raw, float) and math.isfinite(raw) and raw.is_integer():
        number = int(raw)
    elif isinstance(raw, str) and (digits := _DIGITS.fullmatch(raw.strip())) is not None:
        number = int(digits.group(1))
    if number is None or not 0 <= number <= MAX_SEQ:
        raise PayloadError(
            "bad-seq", f"{what} {_show(raw)} is not a whole number from 0 to {MAX_SEQ}"
        )
    return number


class _Fields:
    """Value, time and sequence number out of one record: shared by MQTT JSON and file rows."""

    __slots__ = (
        "_labels",
        "_seq",
        "_time",
        "_value",
        "flat",
        "future_tolerance",
        "names",
        "time_format",
    )

    def __init__(
        self,
        value: str,
        time: str | None,
        time_format: TimeFormat,
        seq: str | None,
        flat: bool,
        future_tolerance: float | None = None,
    ) -> None:
        # ``flat``: CSV rows, looked up by the exact column name.
        self.flat = flat
        self.future_tolerance = future_tolerance
        self.names = {"value": value, "time": time, "seq": seq}
        # Error texts name the field; made once here, not for every reading.
        self._labels = {key: f"{key} field {name!r}" for key, name in self.names.items()}
        self._value = self._path(value)
        self._time = None if time is None else self._path(time)
        self._seq = None if seq is None else self._path(seq)
        self.time_format = time_format

    def _path(self, name: str) -> tuple[str | int, ...]:
        return (name,) if self.flat else field_path(name)

    def get(self, record: Any, path: tuple[str | int, ...], key: str) -> Any:
        raw = lookup(record, path)
        if raw is _MISSING or (raw is None and self.flat):
            raise PayloadError("missing-field", f"{self._labels[key]} is absent")
        if raw is None:
            raise PayloadError("missing-field", f"{self._labels[key]} is null")
        if isinstance(raw, str) and not raw.strip():
            raise PayloadError("missing-field", f"{self._labels[key]} is blank")
        return raw

    def read(self, record: Any, received_at: float) -> tuple[float, float, int | None]:
        labels = self._labels
        value = _value(self.get(record, self._value, "value"), labels["value"])
        if self._time is None:
            moment = received_at
        else:
            moment = _time(self.get(record, self._time, "time"), self.time_format, labels["time"])
            tolerance = self.future_tolerance
            if tolerance is not None and moment > received_at + tolerance:
                raise PayloadError(
                    "in-the-future",
                    f"{labels['time']} {format_time(moment)} is {moment - received_at:.0f} s "
                    f"after the receive time {format_time(received_at)}, more than "
                    f"future_tolerance ({tolerance:g} s); check the sender's clock",
                )
        seq = None
        if self._seq is not None:
            seq = _seq(self.get(record, self._seq, "seq"), labels["seq"])
        return moment, value, seq


# --------------------------------------------------------------------------- MQTT


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
            _Fields(
                topic.value, topic.time, topic.time_format, topic.seq, False, future_tolerance
            )
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
                f"topic {_show(topic)} does not give a stream through filter "
                f"{self.mapper.filter!r} and template {self.mapper.template!r}",
            )
        _check_stream(stream, f"topic {_show(topic)}")
        return self._parse(stream, payload, received_at)

    def _parse(self, stream: str, payload: bytes, received_at: float) -> Reading:
        if self._fields is None:
            try:
                text = _utf8(payload)
            except UnicodeDecodeError:
                raise PayloadError(
                    "not-a-number", f"payload {_show(payload)} is not UTF-8 text"
                ) from None
            return Reading(stream, received_at, _decimal(text, "payload"))
        try:
            document = _JSON.decode(_utf8(payload))
        except (UnicodeDecodeError, ValueError) as exc:
            # ValueError also covers a number past the interpreter's 4,300-digit limit
            raise PayloadError("bad-json", f"payload is not UTF-8 JSON: {exc}") from None
        except RecursionError:
            raise PayloadError(
                "bad-json", "payload nests arrays or objects too deeply to be read"
            ) from None
        moment, value, seq = self._fields.read(document, received_at)
        return Reading(stream, moment, value, seq)


_JSON = json.JSONDecoder(parse_constant=float)
"""One decoder for every payload: ``json.loads`` with an option builds a new one each call.
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
                f"topic {_show(topic)} matches none of the filters "
                + ", ".join(repr(p.mapper.filter) for p in self.parsers),
            )
        parser, stream = found
        if self._refused and topic in self._refused:
            raise PayloadError(
                "bad-stream", f"the stream id from topic {_show(topic)} {self._refused[topic]}"
            )
        return parser._parse(stream, payload, received_at)


# --------------------------------------------------------------------------- files


class RowParser:
    """Parses rows of a file source: a CSV row (dict by header) or a JSON-lines object.

    >>> from types import SimpleNamespace as NS
    >>> source = NS(format="csv", value="value", time="time", time_format="auto", seq=None,
    ...             stream="stream", stream_fixed=None)
    >>> RowParser(source).parse(
    ...     {"time": "2027-01-01T08:00:00Z", "stream": "pack-1/downtime", "value": "17.25"}, 0.0)
    Reading(stream='pack-1/downtime', time=1798790400.0, value=17.25, seq=None)
    """

    __slots__ = ("_fields", "_stream", "stream_fixed", "stream_name")

    def __init__(self, source: FileSourceLike, *, future_tolerance: float | None = None) -> None:
        flat = source.format == "csv"
        self._fields = _Fields(
            source.value, source.time, source.time_format, source.seq, flat, future_tolerance
        )
        if source.stream_fixed is not None:
            problem = stream_id_problem(source.stream_fixed)
            if problem is not None:
                raise ValueError(f"stream_fixed {_show(source.stream_fixed)} {problem}")
        self.stream_fixed = source.stream_fixed
        self.stream_name = source.stream
        self._stream = None
        if source.stream is not None:
            self._stream = (source.stream,) if flat else field_path(source.stream)
        elif source.stream_fixed is None:
            raise ValueError("a file source needs stream (a column or path) or stream_fixed")

    def parse(self, record: Mapping[str, Any], received_at: float) -> Reading:
        if not isinstance(record, Mapping):
            raise PayloadError("bad-json", f"line {_show(record)} is not a JSON object")
        if self._stream is None:
            stream = self.stream_fixed
            assert stream is not None
        else:
            raw = lookup(record, self._stream)
            label = f"stream field {self.stream_name!r}"
            if raw is _MISSING or raw is None:
                raise PayloadError("missing-field", f"{label} is absent")
            if isinstance(raw, int) and not isinstance(raw, bool):
                stream = str(raw)
            elif isinstance(raw, str):
                stream = raw.strip()
                if not stream:
                    raise PayloadError("missing-field", f"{label} is blank")
            else:
                raise PayloadError(
                    "bad-stream", f"{label} {_show(raw)} is neither text nor a whole number"
                )
            problem = stream_id_problem(stream)
            if problem is not None:
                raise PayloadError("bad-stream", f"{label} {_show(raw)} {problem}")
        moment, value, seq = self._fields.read(record, received_at)
        return Reading(stream, moment, value, seq)


# --------------------------------------------------------------------------- for offline readers


def parse_value(raw: Any, what: str) -> float:
    """A reading's value by the service's rules, for the offline commands (``baseline fit``,
    ``replay``), so that a file they accept is one the service accepts too.

    >>> parse_value(" 10.5 ", "value"), parse_value(7, "value")
    (10.5, 7.0)
    >>> parse_value("1_05", "value")
    Traceback (most recent call last):
    ...
    limitwatch.ingest.payload.PayloadError: not-a-number: value '1_05' is not a decimal number
    """
    return _value(raw, what)


def parse_time_field(raw: Any, fmt: TimeFormat, what: str, *, history: bool = False) -> float:
    """A time stamp by the service's rules (``time_format`` and the years 1970 to 9999);
    ``history`` lets a recorded file reach back before 1970 (the offline commands)."""
    return _time(raw, fmt, what, EARLIEST_HISTORY if history else 0.0)
