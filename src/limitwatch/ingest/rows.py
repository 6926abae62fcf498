"""A file source's rows to readings: a CSV row (a dict by header) or a JSON-lines object.

The stream comes from a column or field (text or a whole number) or is fixed for the whole
file (``stream_fixed``); value, time and sequence number are read by
:class:`~limitwatch.ingest.fields.Fields`, the same rules as MQTT payloads.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Literal, Protocol

from limitwatch.ingest.fields import MISSING, Fields, field_path, lookup
from limitwatch.ingest.reasons import PayloadError, show
from limitwatch.ingest.streamid import stream_id_problem
from limitwatch.ingest.timefield import TimeFormat
from limitwatch.model import Reading

__all__ = ["FileSourceLike", "RowParser"]


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
        self._fields = Fields(
            source.value, source.time, source.time_format, source.seq, flat, future_tolerance
        )
        if source.stream_fixed is not None:
            problem = stream_id_problem(source.stream_fixed)
            if problem is not None:
                raise ValueError(f"stream_fixed {show(source.stream_fixed)} {problem}")
        self.stream_fixed = source.stream_fixed
        self.stream_name = source.stream
        self._stream = None
        if source.stream is not None:
            self._stream = (source.stream,) if flat else field_path(source.stream)
        elif source.stream_fixed is None:
            raise ValueError("a file source needs stream (a column or path) or stream_fixed")

    def parse(self, record: Mapping[str, Any], received_at: float) -> Reading:
        if not isinstance(record, Mapping):
            raise PayloadError("bad-json", f"line {show(record)} is not a JSON object")
        if self._stream is None:
            stream = self.stream_fixed
            assert stream is not None
        else:
            raw = lookup(record, self._stream)
            label = f"stream field {self.stream_name!r}"
            if raw is MISSING or raw is None:
                raise PayloadError("missing-field", f"{label} is absent")
            if isinstance(raw, int) and not isinstance(raw, bool):
                stream = str(raw)
            elif isinstance(raw, str):
                stream = raw.strip()
                if not stream:
                    raise PayloadError("missing-field", f"{label} is blank")
            else:
                raise PayloadError(
                    "bad-stream", f"{label} {show(raw)} is neither text nor a whole number"
                )
            problem = stream_id_problem(stream)
            if problem is not None:
                raise PayloadError("bad-stream", f"{label} {show(raw)} {problem}")
        moment, value, seq = self._fields.read(record, received_at)
        return Reading(stream, moment, value, seq)
