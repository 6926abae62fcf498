"""Value, time and sequence number out of one record (a JSON document or a CSV row).

Field paths (``value``, ``time``, ``seq`` and a file's ``stream``) are dotted: ``data.temp``
reads ``{"data": {"temp": 71.5}}``; a part that is a whole number indexes a list
(``readings.0.v``). Keys that contain dots cannot be reached; CSV columns are looked up by their
exact header instead, dots and all.

Without a configured time field the receive time is used. With ``future_tolerance`` (the
service passes ``[service] future_tolerance``), a time stamp later than the receive time by more
than that is refused: one reading dated years ahead would otherwise make every real reading of
its stream look out of order, and its silence never look stale.

>>> fields = Fields("data.temp", "ts", "auto", None, flat=False)
>>> fields.read({"data": {"temp": 86.2}, "ts": 1798761600}, received_at=1798761601.0)
(1798761600.0, 86.2, None)
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from limitwatch.ingest.numbers import parse_seq, parse_value
from limitwatch.ingest.reasons import PayloadError
from limitwatch.ingest.timefield import TimeFormat, read_time
from limitwatch.ingest.timeparse import format_time

__all__ = ["MISSING", "Fields", "field_path", "lookup"]


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


MISSING = object()
"""What :func:`lookup` gives for a path that leads nowhere (``None`` is a JSON null)."""


def lookup(obj: Any, path: Sequence[str | int]) -> Any:
    """The value at ``path`` in nested dicts and lists, or :data:`MISSING` when it is absent.

    An int part indexes a list, and is also tried as a text key of a dict (``{"0": ...}``).
    """
    for part in path:
        if type(obj) is dict:  # a JSON object or a CSV row: no abstract-class check for it
            obj = obj.get(part if type(part) is str else str(part), MISSING)
        elif isinstance(obj, Mapping):
            obj = obj.get(part if isinstance(part, str) else str(part), MISSING)
        elif isinstance(obj, list) and isinstance(part, int):
            obj = obj[part] if part < len(obj) else MISSING
        else:
            return MISSING
        if obj is MISSING:
            return MISSING
    return obj


class Fields:
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
        if raw is MISSING or (raw is None and self.flat):
            raise PayloadError("missing-field", f"{self._labels[key]} is absent")
        if raw is None:
            raise PayloadError("missing-field", f"{self._labels[key]} is null")
        if isinstance(raw, str) and not raw.strip():
            raise PayloadError("missing-field", f"{self._labels[key]} is blank")
        return raw

    def read(self, record: Any, received_at: float) -> tuple[float, float, int | None]:
        labels = self._labels
        value = parse_value(self.get(record, self._value, "value"), labels["value"])
        if self._time is None:
            moment = received_at
        else:
            moment = read_time(
                self.get(record, self._time, "time"), self.time_format, labels["time"]
            )
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
            seq = parse_seq(self.get(record, self._seq, "seq"), labels["seq"])
        return moment, value, seq
