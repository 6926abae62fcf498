"""Durations as people write them in a config file: ``250ms``, ``90s``, ``15m``, ``8h``, ``30d``,
``1h30m``, or a plain number of seconds.

Why a grammar of our own rather than ISO 8601 (``PT1H30M``): the people who edit these files
think in "8h shifts" and "every 5s", and a config value should read the way they say it. The
rules are kept strict so that a slip is an error, never a silent surprise:

* units are ``ms``, ``s``, ``m`` (minutes), ``h``, ``d`` and ``w``, lower case only -- ``M``
  could be read as months;
* a compound value lists its parts largest unit first, each unit once (``1h30m``, ``1d 6h``);
* each part is a plain decimal number (``1.5h`` is fine); negative durations do not exist;
* a number with no unit -- in TOML either ``90`` or ``"90"`` -- counts seconds.

>>> parse_duration("1h30m"), parse_duration("250ms"), parse_duration(90)
(5400.0, 0.25, 90.0)
>>> format_duration(5400.0), format_duration(0.25), format_duration(28800)
('1h30m', '250ms', '8h')

References
----------
The unit letters follow SI symbols (s, ms) and the everyday h/d abbreviations of
ISO 80000-3 (quantities of time); ``m`` for minutes is common practice in service configs.
"""

from __future__ import annotations

import math
import re

__all__ = [
    "UNITS",
    "DurationError",
    "format_duration",
    "format_elapsed",
    "parse_duration",
    "short_duration",
]

UNITS: dict[str, float] = {
    "w": 7 * 86400.0,
    "d": 86400.0,
    "h": 3600.0,
    "m": 60.0,
    "s": 1.0,
    "ms": 0.001,
}
"""Seconds per unit, largest first (the order a compound duration must follow)."""

_ORDER = {unit: rank for rank, unit in enumerate(UNITS)}
_NUMBER = r"(?:\d+(?:\.\d*)?|\.\d+)"
_PART = re.compile(rf"\s*({_NUMBER})\s*(ms|[wdhms])(?![A-Za-z])\s*")
_PLAIN = re.compile(rf"\s*({_NUMBER}(?:[eE][+-]?\d+)?)\s*")
_HINT = "write a number of seconds or e.g. 250ms, 90s, 15m, 8h, 30d, 1h30m"


class DurationError(ValueError):
    """A duration that cannot be read; the message quotes the text and shows what works."""


def parse_duration(text: str | int | float) -> float:
    """Seconds in ``text``: a number (seconds) or unit-suffixed parts such as ``1h30m``.

    >>> parse_duration("1d 6h"), parse_duration("1.5h"), parse_duration("0.5")
    (108000.0, 5400.0, 0.5)
    >>> try:
    ...     parse_duration("30m1h")
    ... except DurationError as exc:
    ...     print(exc)
    '30m1h' is not a duration: 'h' after 'm'; list the parts largest unit first, e.g. 1h30m
    """
    if isinstance(text, bool):
        raise DurationError(f"{text!r} is not a duration; {_HINT}")
    if isinstance(text, int | float):
        return _check(text, float(text))
    if not isinstance(text, str):
        raise DurationError(f"{text!r} is not a duration; {_HINT}")
    stripped = text.strip()
    if stripped.startswith("-"):
        raise DurationError(f"{text!r} is not a duration: durations cannot be negative")
    plain = _PLAIN.fullmatch(stripped)
    if plain is not None:
        return _check(text, float(plain.group(1)))
    total, pos, last = 0.0, 0, None
    if not stripped:
        raise DurationError(f"an empty text is not a duration; {_HINT}")
    while pos < len(stripped):
        part = _PART.match(stripped, pos)
        if part is None:
            raise DurationError(f"{text!r} is not a duration; {_HINT}")
        number, unit = part.groups()
        if last is not None and _ORDER[unit] <= _ORDER[last]:
            problem = f"{unit!r} twice" if unit == last else f"{unit!r} after {last!r}"
            raise DurationError(
                f"{text!r} is not a duration: {problem}; "
                "list the parts largest unit first, e.g. 1h30m"
            )
        total += float(number) * UNITS[unit]
        last, pos = unit, part.end()
    return _check(text, total)


def _check(text: object, seconds: float) -> float:
    if not math.isfinite(seconds):
        raise DurationError(f"{text!r} is not a finite duration")
    if seconds < 0:
        raise DurationError(f"{text!r} is not a duration: durations cannot be negative")
    return seconds


def format_duration(seconds: float | None) -> str:
    """The shortest compound form for display: ``5400 -> '1h30m'``, ``0.25 -> '250ms'``.

    Whole days, hours and minutes are split off; what is left is shown in seconds (to the
    microsecond) or, below one second overall, in milliseconds. ``None`` reads as ``off``.
    :func:`parse_duration` reads every result back to the same number of seconds.

    >>> format_duration(90), format_duration(2592000), format_duration(None), format_duration(0)
    ('1m30s', '30d', 'off', '0s')
    """
    if seconds is None:
        return "off"
    if not math.isfinite(seconds) or seconds < 0:
        raise DurationError(f"{seconds!r} seconds cannot be shown as a duration")
    seconds = round(seconds, 6)
    if seconds == 0:
        return "0s"
    if seconds < 1:
        return f"{_trim(seconds * 1000.0, 3)}ms"
    parts: list[str] = []
    rest = seconds
    for unit in ("d", "h", "m"):
        size = UNITS[unit]
        whole = math.floor(rest / size + 1e-9)
        if whole:
            parts.append(f"{whole}{unit}")
            rest = max(rest - whole * size, 0.0)
    text = _trim(rest, 6)
    if text != "0":
        parts.append(f"{text}s")
    return "".join(parts)


def format_elapsed(seconds: float) -> str:
    """A span the service measured (a silence, an outage, a log window) to the whole second,
    in the config's own words: log lines, notices and charts all say spans this way, so an
    operator can paste one back into a config.

    >>> format_elapsed(59.6), format_elapsed(5400), format_elapsed(8000), format_elapsed(-3)
    ('1m', '1h30m', '2h13m20s', '0s')
    """
    return format_duration(max(0, round(seconds)))


def _trim(value: float, decimals: int) -> str:
    return f"{value:.{decimals}f}".rstrip("0").rstrip(".")


def short_duration(seconds: float, parts: int = 2) -> str:
    """A duration in its largest unit or two (rounded down), compact enough for a table cell;
    :func:`format_duration` is the exact form that :func:`parse_duration` reads back.

    >>> [short_duration(s) for s in (42, 600, 3 * 3600, 3 * 3600 + 300, 50 * 3600)]
    ['42s', '10m', '3h', '3h05m', '2d02h']
    >>> short_duration(3 * 3600 + 300, parts=1)
    '3h'
    """
    s = max(0, round(seconds))
    if s < 60:
        return f"{s}s"
    m = s // 60
    if m < 60:
        return f"{m}m"
    h, m = divmod(m, 60)
    if h < 48:
        return f"{h}h{m:02d}m" if m and parts > 1 else f"{h}h"
    d, h = divmod(h, 24)
    return f"{d}d{h:02d}h" if h and parts > 1 else f"{d}d"
