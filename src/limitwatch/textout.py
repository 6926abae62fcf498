"""Plain-text output for terminals: numbers people can read and tables that fit the terminal.

Text that came from the field -- stream ids above all, which a gateway or a file names -- goes
through :func:`printable` before it reaches a person: an ESC in a stream id would otherwise
drive the operator's terminal, a newline would forge a line of a table, log or mail (and an
e-mail header with a newline cannot be sent at all).
"""

from __future__ import annotations

import math
import os
import shutil
import sys
from collections.abc import Sequence

_ESCAPES = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _escaped(ch: str) -> str:
    if ch in _ESCAPES:
        return _ESCAPES[ch]
    if ch.isprintable():
        return ch
    code = ord(ch)
    if code < 0x100:
        return f"\\x{code:02x}"
    return f"\\u{code:04x}" if code < 0x10000 else f"\\U{code:08x}"


def printable(text: object) -> str:
    r"""``text`` with every character that is not printable written as an escape, as in a
    Python string literal, for human output only (terminals, logs, mail, tables).

    Escaped: C0 and C1 controls and DEL (an ESC drives the terminal, a newline forges a line),
    the line and paragraph separators, format characters such as the bidirectional overrides
    and isolates (which make text display in another order than it is stored), lone
    surrogates (not text at all), unassigned and private-use code points, and spaces other
    than the plain one. Nothing is cut: a long text comes out whole.

    A backslash is left as it is, so that escaping twice changes nothing: field text passes
    through more than one layer on its way out (a cell escaped before it is measured, then by
    the table; a notifier's error, then by the table), and a doubled backslash would double
    again at each. The cost: a text holding the four characters ``\x1b`` shows as one holding
    an ESC would; ``--format json`` keeps the real text, and a dead letter's payload, shown
    once by :mod:`limitwatch.payloadview`, has its backslashes doubled before this escaping.

    >>> print(printable("kiln-3\x1b[2J/temp\nline 2\x07"))
    kiln-3\x1b[2J/temp\nline 2\x07
    >>> printable("pack-2/downtime °C")
    'pack-2/downtime °C'
    >>> print(printable("abc\u202edcba \ud800 C:\\data"))
    abc\u202edcba \ud800 C:\data
    """
    text = str(text)
    if text.isprintable():
        return text  # the usual case, without a look at each character
    return "".join(map(_escaped, text))


def num(value: float | None, digits: int = 6) -> str:
    """A number with ``digits`` significant figures, without a trailing ``.0`` clutter.

    Whole digits are kept up to 1e15 (past it a double no longer holds every whole number, and
    1e308 written out would be 309 digits).

    >>> num(12.0), num(3.14159265, 4), num(None), num(1234567.891), num(1e308)
    ('12', '3.142', '-', '1234568', '1e+308')
    """
    if value is None:
        return "-"
    if not math.isfinite(value):
        return str(value)
    return f"{value:.0f}" if 10**digits <= abs(value) < 1e15 else f"{value:.{digits}g}"


def output_width() -> int | None:
    """How many columns a table may take: ``$COLUMNS`` when set, else the terminal's width when
    standard output is one, else None -- output going to a file or a pipe is never cut, since
    whatever reads it has no screen edge to respect.
    """
    env = os.environ.get("COLUMNS", "").strip()
    if env.isdigit() and int(env) > 0:
        return int(env)
    try:
        if sys.stdout.isatty():
            return shutil.get_terminal_size().columns
    except (AttributeError, ValueError, OSError):
        pass
    return None


AUTO: int = -1
"""``max_width`` of :func:`table` by default: :func:`output_width`."""


def table(
    headers: Sequence[str],
    rows: Sequence[Sequence[str]],
    max_width: int | None = AUTO,
    shorten: Sequence[int] | None = None,
) -> str:
    """Left-aligned columns separated by two spaces, within ``max_width`` columns (by default
    the terminal's; None never cuts). Control characters in any cell are escaped
    (:func:`printable`).

    When the table is too wide, the columns in ``shorten`` are cut with an ellipsis, the least
    important first (the first listed), each no shorter than its header or 8 characters,
    before the next is touched; without ``shorten``, the widest column. A column left out of
    ``shorten`` is never cut (a time stamp cut to ``2026-1…`` tells nothing).

    >>> print(table(["a", "bb"], [["1", "x"], ["22", "yyy"]]))
    a   bb
    --  ---
    1   x
    22  yyy
    >>> print(table(["name", "time"], [["x" * 20, "2027-01-01T00:00:00Z"]], 32, shorten=[0]))
    name        time
    ----------  --------------------
    xxxxxxxxx…  2027-01-01T00:00:00Z
    """
    headers = [printable(h) for h in headers]
    rows = [[printable(c) for c in row] for row in rows]
    if max_width == AUTO:
        max_width = output_width()
    widths = [len(h) for h in headers]
    for row in rows:
        for i, cell in enumerate(row):
            widths[i] = max(widths[i], len(cell))
    over = sum(widths) + 2 * (len(widths) - 1) - (max_width or 0)
    if max_width is not None and over > 0:
        widest = max(range(len(widths)), key=widths.__getitem__)
        order = list(shorten) if shorten is not None else [widest]
        for i in order:
            floor = max(len(headers[i]), min(8, widths[i]))
            take = min(over, widths[i] - floor)
            if take > 0:
                widths[i] -= take
                over -= take
            if over <= 0:
                break

    def cut(text: str, width: int) -> str:
        return text if len(text) <= width else text[: max(width - 1, 0)] + "…"

    def line(cells: Sequence[str]) -> str:
        return "  ".join(cut(c, w).ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip()

    out = [line(headers), line(["-" * w for w in widths])]
    out.extend(line(row) for row in rows)
    return "\n".join(out)
