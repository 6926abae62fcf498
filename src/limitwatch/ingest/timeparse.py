"""One place that decides what a time stamp means, so files and MQTT payloads agree.

Accepted: a plain number of seconds since the Unix epoch (``1767225600``, ``1767225600.25``) or
ISO 8601 (``2026-01-01T06:00:00Z``, ``2026-01-01 06:00:00+01:00``). An ISO time without an offset
is taken as UTC: controllers that export local time without saying so are common, and UTC is the
only reading of it that never jumps at a daylight-saving change.

>>> parse_time("2026-01-01T00:00:00Z")
1767225600.0
>>> parse_time("1767225600.5")
1767225600.5
>>> parse_time("1767225600500", unit="ms")
1767225600.5
"""

from __future__ import annotations

import math
import re
from datetime import UTC, datetime
from typing import Literal

TimeUnit = Literal["s", "ms"]

PLAIN_DECIMAL = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
"""A plain decimal number: what every reader of numbers in limitwatch accepts (no ``1_000``,
which Python's ``float`` would read, and no hexadecimal)."""


class TimeFormatError(ValueError):
    """A time stamp that is neither epoch seconds nor ISO 8601."""


def parse_time(text: str | float | int, unit: TimeUnit = "s") -> float:
    """Epoch seconds from a number (in ``unit``) or an ISO 8601 string."""
    if isinstance(text, bool):
        raise TimeFormatError(f"{text!r} is not a time")
    if isinstance(text, int | float):
        number = float(text)
    else:
        stripped = text.strip()
        try:
            number = float(stripped)
        except ValueError:
            return _parse_iso(stripped)
        if math.isfinite(number) and not PLAIN_DECIMAL.fullmatch(stripped):
            raise TimeFormatError(
                f"{text!r} is not a plain decimal number of seconds (digits, a point and an "
                "exponent only; no _ separators)"
            )
    if not math.isfinite(number):
        raise TimeFormatError(f"{text!r} is not a finite time")
    return number / 1000.0 if unit == "ms" else number


def _parse_iso(text: str) -> float:
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise TimeFormatError(
            f"{text!r} is neither epoch seconds nor an ISO 8601 time such as 2026-01-01T06:00:00Z"
        ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


def format_time(epoch: float) -> str:
    """ISO 8601 in UTC with a ``Z``, to the second unless there is a fraction."""
    moment = datetime.fromtimestamp(epoch, tz=UTC)
    text = moment.isoformat(timespec="milliseconds" if epoch % 1 else "seconds")
    return text.replace("+00:00", "Z")
