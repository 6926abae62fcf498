"""Plain-text output for terminals: numbers people can read and tables that fit 80 columns.

Text that came from the field -- stream ids above all, which a gateway or a file names -- goes
through :func:`printable` before it reaches a person: an ESC in a stream id would otherwise
drive the operator's terminal, a newline would forge a line of a table, log or mail (and an
e-mail header with a newline cannot be sent at all).
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence

# C0 controls, DEL, C1 controls, the Unicode line and paragraph separators, and the
# bidirectional overrides and isolates (which can make text display in another order).
_UNPRINTABLE = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029\u202a-\u202e\u2066-\u2069]")


def _escape(match: re.Match[str]) -> str:
    code = ord(match.group())
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def printable(text: object) -> str:
    r"""``text`` with every control character written as an escape, for human output only.

    >>> print(printable("kiln-3\x1b[2J/temp\nline 2\x07"))
    kiln-3\x1b[2J/temp\x0aline 2\x07
    >>> printable("pack-2/downtime °C")
    'pack-2/downtime °C'
    """
    return _UNPRINTABLE.sub(_escape, str(text))


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


def table(headers: Sequence[str], rows: Sequence[Sequence[str]], max_width: int = 80) -> str:
    """Left-aligned columns separated by two spaces. Cells of the widest text column are cut
    with an ellipsis when the table would pass ``max_width``; control characters in any cell
    are escaped (:func:`printable`).

    >>> print(table(["a", "bb"], [["1", "x"], ["22", "yyy"]]))
    a   bb
    --  ---
    1   x
    22  yyy
    """
    headers = [printable(h) for h in headers]
    rows = [[printable(c) for c in row] for row in rows]
    widths = [len(h) for h in headers]
    for row in rows:
        for i, cell in enumerate(row):
            widths[i] = max(widths[i], len(cell))
    total = sum(widths) + 2 * (len(widths) - 1)
    if total > max_width:
        widest = max(range(len(widths)), key=lambda i: widths[i])
        widths[widest] = max(len(headers[widest]), widths[widest] - (total - max_width))

    def cut(text: str, width: int) -> str:
        return text if len(text) <= width else text[: max(width - 1, 0)] + "…"

    def line(cells: Sequence[str]) -> str:
        return "  ".join(cut(c, w).ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip()

    out = [line(headers), line(["-" * w for w in widths])]
    out.extend(line(row) for row in rows)
    return "\n".join(out)
