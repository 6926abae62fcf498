"""Reading individual values out of a CSV file with a header row.

Errors name the file, the line (as a text editor counts it) and the column, because the person
who has to fix the file needs to find the cell, not a Python traceback.

Values and times are read by the service's own rules (:func:`limitwatch.ingest.numbers.
parse_value` and :func:`~limitwatch.ingest.timefield.parse_time_field`), so ``baseline fit`` and
``replay`` refuse exactly what the service would dead-letter. A row with more cells than the
header is refused too: ``10,43`` written with a decimal comma and no quotes is two cells, and
reading the first alone would silently give 10.
"""

from __future__ import annotations

import csv
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

from limitwatch.ingest.numbers import parse_value
from limitwatch.ingest.reasons import PayloadError
from limitwatch.ingest.timefield import TimeFormat, parse_time_field
from limitwatch.ingest.timeparse import TimeUnit


class InputFileError(ValueError):
    """A file that cannot be read as the user described it."""


@dataclass(frozen=True, slots=True)
class Row:
    line: int
    stream: str
    time: float
    time_text: str | None
    value: float


def _open(path: str) -> TextIO:
    if path == "-":
        import sys

        return sys.stdin
    file = Path(path)
    if not file.exists():
        raise InputFileError(f"{path}: no such file")
    if file.is_dir():
        raise InputFileError(f"{path}: is a folder, expected a CSV file")
    return file.open(newline="", encoding="utf-8-sig")


def read_rows(
    path: str,
    value: str,
    time: str | None = None,
    stream: str | None = None,
    default_stream: str = "default",
    time_unit: TimeUnit = "s",
) -> Iterator[Row]:
    """Yield one :class:`Row` per data line. Without a time column the row's position (0, 1,
    2, ... per stream) stands in for the time, which keeps the ordering checks meaningful.
    Blank lines are skipped."""
    handle = _open(path)
    try:
        reader = csv.reader(handle)
        try:
            header = next(reader)
        except StopIteration:
            raise InputFileError(f"{path}: the file is empty; expected a header row") from None
        header = [h.strip() for h in header]
        columns = {"--value": value, "--time": time, "--stream": stream}
        position: dict[str, int] = {}
        for option, name in columns.items():
            if name is None:
                continue
            if name not in header:
                raise InputFileError(
                    f"{path}: {option} column {name!r} is not in the header; "
                    f"the columns are: {', '.join(header)}"
                )
            position[option] = header.index(name)
        counters: dict[str, int] = {}
        for row in reader:
            line = reader.line_num
            if not row or all(not cell.strip() for cell in row):
                continue
            if len(row) != len(header):
                hint = (
                    '; a decimal comma must be quoted ("10,43") or written 10.43'
                    if len(row) > len(header)
                    else ""
                )
                raise InputFileError(
                    f"{path}, line {line}: expected {len(header)} columns, found {len(row)}{hint}"
                )
            stream_id = row[position["--stream"]].strip() if stream else default_stream
            if not stream_id:
                raise InputFileError(f"{path}, line {line}, column {stream!r}: empty stream id")
            cell = row[position["--value"]]
            try:
                number = parse_value(cell, "value")
            except PayloadError as exc:
                raise InputFileError(
                    f"{path}, line {line}, column {value!r}: {exc.message}"
                ) from None
            if time is not None:
                time_text = row[position["--time"]].strip()
                fmt: TimeFormat = "epoch_ms" if time_unit == "ms" else "auto"
                try:
                    moment = parse_time_field(time_text, fmt, "time", history=True)
                except PayloadError as exc:
                    raise InputFileError(
                        f"{path}, line {line}, column {time!r}: {exc.message}"
                    ) from None
            else:
                time_text = None
                moment = float(counters.get(stream_id, 0))
            counters[stream_id] = counters.get(stream_id, 0) + 1
            yield Row(line, stream_id, moment, time_text, number)
    except csv.Error as exc:
        raise InputFileError(f"{path}: not readable as CSV: {exc}") from None
    except UnicodeDecodeError as exc:
        raise InputFileError(f"{path}: not UTF-8 text ({exc.reason})") from None
    finally:
        if handle is not None and path != "-":
            handle.close()
