"""A time stamp field by ``time_format``, within the years the service takes.

``epoch_s`` and ``epoch_ms`` want a number (or a text holding one), ``iso8601`` wants text such
as ``2027-01-01T06:00:00Z`` (no offset means UTC, see :mod:`limitwatch.ingest.timeparse`),
``auto`` reads a number as epoch seconds and text as ISO 8601. Live readings lie in the years
1970 to 9999; a recorded file read by the offline commands may reach back to the year 1.

>>> parse_time_field("2027-01-01T00:00:00Z", "iso8601", "time field 'ts'")
1798761600.0

References
----------
ISO 8601-1:2019 for the time stamps, as read by :mod:`limitwatch.ingest.timeparse`.
"""

from __future__ import annotations

from typing import Any, Literal

from limitwatch.ingest.reasons import PayloadError, show
from limitwatch.ingest.timeparse import PLAIN_DECIMAL, TimeFormatError, parse_time

__all__ = [
    "EARLIEST_HISTORY",
    "LATEST_TIME",
    "TimeFormat",
    "parse_time_field",
    "read_time",
]

TimeFormat = Literal["epoch_s", "epoch_ms", "iso8601", "auto"]

LATEST_TIME = 253402300800.0
"""Epoch seconds of 10000-01-01T00:00:00Z; later times (and times before 1970) are refused."""

EARLIEST_HISTORY = -62_135_596_800.0
"""Epoch seconds of 0001-01-01T00:00:00Z: the earliest time the offline commands take from a
recorded file (the Nile's flows start in 1871); live readings start at 1970."""


def read_time(raw: Any, fmt: TimeFormat, what: str, earliest: float = 0.0) -> float:
    """Epoch seconds from a time stamp field, refused by name when it does not fit ``fmt`` or
    lies outside ``earliest`` to the year 9999."""
    if isinstance(raw, bool) or raw is None or isinstance(raw, dict | list):
        raise PayloadError("bad-time", f"{what} {show(raw)} is not a time stamp")
    is_number = isinstance(raw, int | float) or (
        isinstance(raw, str) and PLAIN_DECIMAL.fullmatch(raw.strip()) is not None
    )
    try:
        if fmt == "iso8601":
            if is_number:
                raise PayloadError(
                    "bad-time",
                    f"{what} {show(raw)} is a number, but time_format is iso8601; "
                    "use epoch_s, epoch_ms or auto",
                )
            seconds = parse_time(str(raw))
        elif fmt in ("epoch_s", "epoch_ms"):
            if not is_number:
                raise PayloadError(
                    "bad-time", f"{what} {show(raw)} is not a number of epoch {fmt[6:]}"
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
            "bad-time", f"{what} {show(raw)} lies outside the years {first} to 9999{hint}"
        )
    return seconds


def parse_time_field(raw: Any, fmt: TimeFormat, what: str, *, history: bool = False) -> float:
    """A time stamp by the service's rules (``time_format`` and the years 1970 to 9999);
    ``history`` lets a recorded file reach back before 1970 (the offline commands)."""
    return read_time(raw, fmt, what, EARLIEST_HISTORY if history else 0.0)
