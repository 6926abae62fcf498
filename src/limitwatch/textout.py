"""Plain-text output for terminals: numbers people can read and tables that fit 80 columns."""

from __future__ import annotations

import math
from collections.abc import Sequence


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
    with an ellipsis when the table would pass ``max_width``.

    >>> print(table(["a", "bb"], [["1", "x"], ["22", "yyy"]]))
    a   bb
    --  ---
    1   x
    22  yyy
    """
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
